//! Filters, orders and cursors of the fleet lists (`GET /v1/experiments`, `GET /v1/alerts`
//! and the dashboard overview): parsed from query text with errors that name the parameter,
//! and applied to rows that are already in memory.
//!
//! Paging is by key, not by offset: a cursor holds the sort key of the last row served, and
//! the next page starts strictly after it. Rows created or deleted between two pages therefore
//! never shift the rows that stay: with the `id` order (whose key never changes) every row
//! that exists for the whole walk is served exactly once.

use std::cmp::Ordering;

use crate::decide::Rule;
use crate::experiment::MetricDef;
use crate::service::fleet::Standing;

/// Rows per page when the request names no `limit`.
pub const DEFAULT_LIMIT: usize = 100;

/// The largest `limit` accepted; larger values are refused, not clipped, so a client never
/// mistakes a short page for the end of the list.
pub const MAX_LIMIT: usize = 1000;

/// A bad query parameter: which one, and what is wrong.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("query parameter `{param}`: {message}")]
pub struct QueryError {
    /// The parameter's name.
    pub param: &'static str,
    /// What is wrong with its value.
    pub message: String,
}

fn bad(param: &'static str, message: impl Into<String>) -> QueryError {
    QueryError {
        param,
        message: message.into(),
    }
}

/// The order of an experiment list. Every order ends with the id, so it is total and stable.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Order {
    /// By id, byte order (the API's default; its key never changes).
    Id,
    /// The experiments that need a person first (harm, data quality, ready for a decision),
    /// then by open alerts, most first (the dashboard's default).
    Attention,
    /// Most open alerts first.
    Alerts,
    /// Longest since the last decision first; experiments never decided last.
    Decision,
    /// Most exposed units first.
    Units,
}

impl Order {
    /// Every order.
    pub const ALL: [Order; 5] = [
        Order::Id,
        Order::Attention,
        Order::Alerts,
        Order::Decision,
        Order::Units,
    ];

    /// Name in query strings and cursors.
    pub fn as_str(self) -> &'static str {
        match self {
            Order::Id => "id",
            Order::Attention => "attention",
            Order::Alerts => "alerts",
            Order::Decision => "decision",
            Order::Units => "units",
        }
    }

    /// Words for the dashboard's order menu.
    pub fn label(self) -> &'static str {
        match self {
            Order::Id => "by id",
            Order::Attention => "needs a person first",
            Order::Alerts => "most open alerts",
            Order::Decision => "longest since a decision",
            Order::Units => "most units",
        }
    }

    /// The order called `name`.
    pub fn parse(name: &str) -> Result<Order, QueryError> {
        Order::ALL
            .into_iter()
            .find(|o| o.as_str() == name)
            .ok_or_else(|| {
                bad(
                    "sort",
                    format!("must be one of {}", names(Order::ALL.map(Order::as_str))),
                )
            })
    }
}

fn names<const N: usize>(list: [&str; N]) -> String {
    list.join(", ")
}

/// What a fleet row is sorted and filtered on: the cheap facts of one experiment.
#[derive(Debug, Clone)]
pub struct Facts<'a> {
    /// Experiment id.
    pub id: &'a str,
    /// Where it stands.
    pub standing: Standing,
    /// Rules that held at its latest cached summary.
    pub rules: &'a [Rule],
    /// Its metrics.
    pub metrics: &'a [MetricDef],
    /// Alerts open or easing.
    pub open_alerts: usize,
    /// When the last decision was recorded or acknowledged (microseconds), if ever.
    pub last_decision: Option<i64>,
    /// Exposed units at its latest cached summary.
    pub units: u64,
}

/// Which experiments a list keeps. Every field that is set must match.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Filter {
    /// Only experiments that stand here.
    pub standing: Option<Standing>,
    /// Only experiments where this rule holds.
    pub rule: Option<Rule>,
    /// Only experiments with a metric of this name.
    pub metric: Option<String>,
    /// Only experiments whose id contains this text (ASCII case ignored).
    pub search: Option<String>,
    /// Only experiments with at least one alert open or easing.
    pub alerting: bool,
}

impl Filter {
    /// Whether `f` passes.
    pub fn keeps(&self, f: &Facts<'_>) -> bool {
        self.standing.is_none_or(|s| s == f.standing)
            && self.rule.is_none_or(|r| f.rules.contains(&r))
            && self
                .metric
                .as_deref()
                .is_none_or(|m| f.metrics.iter().any(|d| d.name == m))
            && self
                .search
                .as_deref()
                .is_none_or(|q| contains_ignoring_case(f.id, q))
            && (!self.alerting || f.open_alerts > 0)
    }

    /// Whether no field is set.
    pub fn is_empty(&self) -> bool {
        *self == Filter::default()
    }
}

fn contains_ignoring_case(haystack: &str, needle: &str) -> bool {
    let (h, n) = (haystack.as_bytes(), needle.as_bytes());
    n.is_empty() || h.windows(n.len()).any(|w| w.eq_ignore_ascii_case(n))
}

/// The position of a row in an order: two numbers, then the id. Compared as a tuple,
/// smallest first.
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord)]
pub struct Key {
    /// First number.
    pub a: i64,
    /// Second number.
    pub b: i64,
    /// The id, which makes every key unique.
    pub id: String,
}

/// The key of `f` in `order`, borrowed id and all, for sorting without allocating.
fn key_parts(order: Order, f: &Facts<'_>) -> (i64, i64) {
    let alerts = i64::try_from(f.open_alerts).unwrap_or(i64::MAX);
    match order {
        Order::Id => (0, 0),
        Order::Attention => (f.standing.rank(), -alerts),
        Order::Alerts => (-alerts, 0),
        Order::Decision => (f.last_decision.unwrap_or(i64::MAX), 0),
        Order::Units => (-(i64::try_from(f.units).unwrap_or(i64::MAX)), 0),
    }
}

fn compare(order: Order, x: &Facts<'_>, y: &Facts<'_>) -> Ordering {
    key_parts(order, x)
        .cmp(&key_parts(order, y))
        .then_with(|| x.id.cmp(y.id))
}

fn after(order: Order, f: &Facts<'_>, k: &Key) -> bool {
    let (a, b) = key_parts(order, f);
    (a, b, f.id) > (k.a, k.b, k.id.as_str())
}

/// Where the previous page ended, in one order.
#[derive(Debug, Clone, PartialEq)]
pub struct Cursor {
    /// The order the cursor belongs to (`opened` for alerts).
    pub order: &'static str,
    /// The last row served.
    pub key: Key,
}

impl Cursor {
    /// Opaque text for the `next` field: the order, the numbers, the id in hex (so any id
    /// survives a query string without escaping).
    pub fn encode(&self) -> String {
        let mut hex = String::with_capacity(self.key.id.len() * 2);
        for b in self.key.id.bytes() {
            hex.push_str(&format!("{b:02x}"));
        }
        format!("{}~{}~{}~{hex}", self.order, self.key.a, self.key.b)
    }

    /// A cursor from `text`, which must belong to `order`.
    pub fn decode(text: &str, order: &'static str) -> Result<Cursor, QueryError> {
        let broken = || bad("after", "is not a cursor from a `next` field of this list");
        let mut parts = text.split('~');
        let (Some(o), Some(a), Some(b), Some(hex), None) = (
            parts.next(),
            parts.next(),
            parts.next(),
            parts.next(),
            parts.next(),
        ) else {
            return Err(broken());
        };
        if o != order {
            return Err(bad(
                "after",
                format!(
                    "the cursor belongs to order `{o}`, not `{order}`; start again without `after`"
                ),
            ));
        }
        let a = a.parse().map_err(|_| broken())?;
        let b = b.parse().map_err(|_| broken())?;
        if hex.len() % 2 != 0 || !hex.is_ascii() {
            return Err(broken());
        }
        let bytes = (0..hex.len())
            .step_by(2)
            .map(|i| u8::from_str_radix(&hex[i..i + 2], 16))
            .collect::<Result<Vec<u8>, _>>()
            .map_err(|_| broken())?;
        let id = String::from_utf8(bytes).map_err(|_| broken())?;
        Ok(Cursor {
            order,
            key: Key { a, b, id },
        })
    }
}

/// One page of a list.
#[derive(Debug)]
pub struct Page<T> {
    /// The rows, in order.
    pub rows: Vec<T>,
    /// Rows that pass the filter, on every page together.
    pub matched: usize,
    /// Where the next page starts; `None` on the last page.
    pub next: Option<Cursor>,
}

/// The page of `rows` (each with its facts) that passes `filter`, in `order`, after `from`,
/// at most `limit` long.
pub fn page<T>(
    rows: Vec<(Facts<'_>, T)>,
    filter: &Filter,
    order: Order,
    from: Option<&Cursor>,
    limit: usize,
) -> Page<T> {
    let mut kept: Vec<(Facts<'_>, T)> = rows.into_iter().filter(|(f, _)| filter.keeps(f)).collect();
    let matched = kept.len();
    if let Some(c) = from {
        kept.retain(|(f, _)| after(order, f, &c.key));
    }
    let more = kept.len() > limit;
    if more {
        // Only the first `limit` need to be in order.
        kept.select_nth_unstable_by(limit, |x, y| compare(order, &x.0, &y.0));
        kept.truncate(limit);
    }
    kept.sort_unstable_by(|x, y| compare(order, &x.0, &y.0));
    let next = if more {
        kept.last().map(|(f, _)| {
            let (a, b) = key_parts(order, f);
            Cursor {
                order: order.as_str(),
                key: Key {
                    a,
                    b,
                    id: f.id.to_string(),
                },
            }
        })
    } else {
        None
    };
    Page {
        rows: kept.into_iter().map(|(_, t)| t).collect(),
        matched,
        next,
    }
}

/// `limit` from its query text.
pub fn limit(text: Option<&str>) -> Result<usize, QueryError> {
    match text {
        None => Ok(DEFAULT_LIMIT),
        Some(t) => match t.parse::<usize>() {
            Ok(n) if (1..=MAX_LIMIT).contains(&n) => Ok(n),
            _ => Err(bad(
                "limit",
                format!("must be a whole number from 1 to {MAX_LIMIT}, got `{t}`"),
            )),
        },
    }
}

/// The query parameters shared by the experiment lists, as text.
#[derive(Debug, Clone, Default, serde::Deserialize)]
pub struct ListParams {
    /// A [`Standing`] name.
    pub state: Option<String>,
    /// A rule name.
    pub rule: Option<String>,
    /// A metric name.
    pub metric: Option<String>,
    /// Text the id must contain.
    pub q: Option<String>,
    /// `true`: only experiments with open alerts.
    pub alerting: Option<String>,
    /// An [`Order`] name.
    pub sort: Option<String>,
}

impl ListParams {
    /// The filter these parameters ask for. Empty text counts as absent, as an HTML form
    /// sends every field.
    pub fn filter(&self) -> Result<Filter, QueryError> {
        let set = |v: &Option<String>| v.as_deref().filter(|s| !s.is_empty()).map(str::to_string);
        let standing = match set(&self.state) {
            None => None,
            Some(s) => Some(Standing::parse(&s).ok_or_else(|| {
                bad(
                    "state",
                    format!(
                        "must be one of {}",
                        names(Standing::ALL.map(Standing::as_str))
                    ),
                )
            })?),
        };
        let rule = match set(&self.rule) {
            None => None,
            Some(r) => Some(Rule::from_name(&r).ok_or_else(|| {
                bad(
                    "rule",
                    format!("must be one of {}", names(Rule::ALL.map(Rule::as_str))),
                )
            })?),
        };
        let alerting = match set(&self.alerting).as_deref() {
            None | Some("false") => false,
            Some("true") => true,
            Some(other) => {
                return Err(bad(
                    "alerting",
                    format!("must be true or false, got `{other}`"),
                ))
            }
        };
        Ok(Filter {
            standing,
            rule,
            metric: set(&self.metric),
            search: set(&self.q),
            alerting,
        })
    }

    /// The order asked for, or `default`.
    pub fn order(&self, default: Order) -> Result<Order, QueryError> {
        match self.sort.as_deref().filter(|s| !s.is_empty()) {
            None => Ok(default),
            Some(s) => Order::parse(s),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn purchase() -> &'static [MetricDef] {
        use crate::experiment::{MetricKind, MetricRules, Prior};
        Box::leak(Box::new([MetricDef {
            name: "purchase".into(),
            kind: MetricKind::Conversion,
            prior: Prior::Beta {
                alpha: 1.0,
                beta: 1.0,
            },
            variant_priors: Vec::new(),
            rules: MetricRules::default(),
        }]))
    }

    fn facts(id: &str, standing: Standing, alerts: usize, units: u64) -> Facts<'_> {
        Facts {
            id,
            standing,
            rules: &[],
            metrics: purchase(),
            open_alerts: alerts,
            last_decision: None,
            units,
        }
    }

    fn ids(p: &Page<&str>) -> Vec<String> {
        p.rows.iter().map(|s| s.to_string()).collect()
    }

    #[test]
    fn cursors_round_trip_any_id_and_refuse_other_orders() {
        let c = Cursor {
            order: "units",
            key: Key {
                a: -42,
                b: 0,
                id: "crumb ~/é?&".into(),
            },
        };
        let text = c.encode();
        assert!(text
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || b"~-".contains(&b)));
        assert_eq!(Cursor::decode(&text, "units").unwrap(), c);
        assert_eq!(Cursor::decode(&text, "id").unwrap_err().param, "after");
        for broken in [
            "",
            "units~1~2",
            "units~x~0~61",
            "units~1~0~6",
            "units~1~0~zz",
            "units~1~0~ff~",
        ] {
            assert!(Cursor::decode(broken, "units").is_err(), "{broken}");
        }
    }

    #[test]
    fn pages_in_id_order_cover_every_row_once() {
        let names: Vec<String> = (0..23)
            .map(|i| format!("exp-{:02}", (i * 7) % 23))
            .collect();
        let mut seen = Vec::new();
        let mut from: Option<Cursor> = None;
        loop {
            let rows = names
                .iter()
                .map(|n| (facts(n, Standing::Gathering, 0, 0), n.as_str()))
                .collect();
            let p = page(rows, &Filter::default(), Order::Id, from.as_ref(), 5);
            assert_eq!(p.matched, 23);
            seen.extend(ids(&p));
            match p.next {
                Some(c) => from = Some(c),
                None => break,
            }
        }
        let mut want: Vec<String> = names.clone();
        want.sort();
        assert_eq!(seen, want);
    }

    #[test]
    fn attention_puts_people_first_then_alerts_then_id() {
        let rows = vec![
            (facts("d", Standing::Gathering, 3, 10), "d"),
            (facts("c", Standing::Ready, 0, 10), "c"),
            (facts("b", Standing::Harm, 1, 10), "b"),
            (facts("a", Standing::Harm, 2, 10), "a"),
            (facts("e", Standing::Quality, 0, 10), "e"),
            (facts("f", Standing::Decided, 0, 10), "f"),
        ];
        let p = page(rows, &Filter::default(), Order::Attention, None, 10);
        assert_eq!(ids(&p), ["a", "b", "e", "c", "d", "f"]);
    }

    #[test]
    fn filters_combine_and_search_ignores_ascii_case() {
        let rows = || {
            vec![
                (facts("Crumb-Banner", Standing::Harm, 1, 5), "1"),
                (facts("crumb-copy", Standing::Gathering, 0, 5), "2"),
                (facts("orchard", Standing::Harm, 0, 5), "3"),
            ]
        };
        let f = Filter {
            search: Some("CRUMB".into()),
            ..Filter::default()
        };
        assert_eq!(ids(&page(rows(), &f, Order::Id, None, 10)), ["1", "2"]);
        let f = Filter {
            search: Some("crumb".into()),
            standing: Some(Standing::Harm),
            ..Filter::default()
        };
        assert_eq!(ids(&page(rows(), &f, Order::Id, None, 10)), ["1"]);
        let f = Filter {
            alerting: true,
            ..Filter::default()
        };
        assert_eq!(ids(&page(rows(), &f, Order::Id, None, 10)), ["1"]);
        let f = Filter {
            metric: Some("purchase".into()),
            ..Filter::default()
        };
        assert_eq!(page(rows(), &f, Order::Id, None, 10).matched, 3);
        let f = Filter {
            metric: Some("revenue".into()),
            ..Filter::default()
        };
        let p = page(rows(), &f, Order::Id, None, 10);
        assert_eq!((p.matched, p.rows.len(), p.next.is_none()), (0, 0, true));
    }

    #[test]
    fn bad_parameters_name_themselves() {
        let p = ListParams {
            state: Some("sleepy".into()),
            ..Default::default()
        };
        assert_eq!(p.filter().unwrap_err().param, "state");
        let p = ListParams {
            rule: Some("ship-it".into()),
            ..Default::default()
        };
        assert_eq!(p.filter().unwrap_err().param, "rule");
        assert_eq!(limit(Some("0")).unwrap_err().param, "limit");
        assert_eq!(limit(Some("1001")).unwrap_err().param, "limit");
        assert_eq!(limit(Some("ten")).unwrap_err().param, "limit");
        assert_eq!(limit(None).unwrap(), DEFAULT_LIMIT);
        assert_eq!(limit(Some("1000")).unwrap(), MAX_LIMIT);
        // An HTML form sends empty fields: they mean "any".
        let p = ListParams {
            state: Some(String::new()),
            sort: Some(String::new()),
            ..Default::default()
        };
        assert!(p.filter().unwrap().is_empty());
        assert_eq!(p.order(Order::Attention).unwrap(), Order::Attention);
    }
}
