//! The dashboard's first page, `/`: the fleet at a glance. Counts of experiments per standing
//! and of open alerts (each a link to the list it counts), a search and filter form, and one
//! page of experiments, those that need a person first by default.
//!
//! Everything comes from the fleet's cached verdicts ([`crate::http::fleet`]): rendering a
//! page of a 5 000-experiment fleet runs no quadrature.

use std::fmt::Write;
use std::sync::Arc;

use axum::extract::{Query, State};
use axum::http::StatusCode;
use axum::response::Response;

use super::markup::escape;
use super::page::{layout, REFRESH_SECS};
use super::{html, wants_main, Part};
use crate::decide::Rule;
use crate::http::fleet::facts;
use crate::http::fleet::query::{self, Filter, ListParams, Order, QueryError};
use crate::service::fleet::{Counts, Member, Standing};
use crate::service::Service;

/// Experiments per page of the overview.
pub const PAGE_SIZE: usize = 50;

/// Distinct metric names offered as suggestions in the metric field, at most.
const METRIC_SUGGESTIONS: usize = 200;

/// The query of `/`: the list parameters of the API, a page number and `part`. (Every
/// field is text, so flattening [`ListParams`] works here, unlike for the API's list query
/// with its typed `archived`.)
#[derive(Debug, Default, Clone, serde::Deserialize)]
pub struct OverviewQuery {
    /// The filters and order, as the API takes them.
    #[serde(flatten)]
    pub list: ListParams,
    /// Page number, from 1.
    pub page: Option<String>,
    /// `main`: only the main part, for the refresh script.
    pub part: Option<String>,
}

impl OverviewQuery {
    fn page(&self) -> Result<usize, QueryError> {
        match self.page.as_deref().filter(|p| !p.is_empty()) {
            None => Ok(1),
            Some(p) => p
                .parse::<usize>()
                .ok()
                .filter(|n| *n >= 1)
                .ok_or(QueryError {
                    param: "page",
                    message: format!("must be a whole number from 1, got `{p}`"),
                }),
        }
    }
}

/// What the overview asked for, parsed.
struct Asked {
    filter: Filter,
    order: Order,
    page: usize,
}

/// `GET /`.
pub async fn overview(
    State(service): State<Arc<Service>>,
    Query(q): Query<OverviewQuery>,
) -> Response {
    let part = Part {
        part: q.part.clone(),
    };
    let list = &q.list;
    let asked = (|| {
        Ok::<_, QueryError>(Asked {
            filter: list.filter()?,
            order: list.order(Order::Attention)?,
            page: q.page()?,
        })
    })();
    let clock_panel = super::clock::panel(&service);
    let (status, mut main) = match asked {
        Err(e) => (
            StatusCode::BAD_REQUEST,
            format!(
                r#"<h1>Experiments</h1><p class="caution" data-role="query-error">{}</p><p><a href="/">All experiments</a></p>"#,
                escape(&e.to_string())
            ),
        ),
        Ok(asked) => {
            let now = crate::service::now_micros();
            match crate::http::blocking(move || {
                let all = service.fleet();
                main_part(&all, &asked, now)
            })
            .await
            {
                Ok(main) => (StatusCode::OK, main),
                Err(r) => return r,
            }
        }
    };
    if status == StatusCode::OK {
        main.push_str(&clock_panel);
    }
    if wants_main(&part) {
        return html(status, main);
    }
    let mut refresh = link(list, None);
    refresh.push_str(if refresh.contains('?') { "&" } else { "?" });
    refresh.push_str("part=main");
    html(
        status,
        layout("posteriord · experiments", "experiments", &main, &refresh),
    )
}

/// Percent-encoding of a query value: unreserved characters stay, every other byte is escaped.
fn encode(v: &str) -> String {
    let mut out = String::with_capacity(v.len());
    for b in v.bytes() {
        if b.is_ascii_alphanumeric() || b"-_.~".contains(&b) {
            out.push(b as char);
        } else {
            let _ = write!(out, "%{b:02X}");
        }
    }
    out
}

/// `/` with `list`'s non-empty parameters and `page` (when above 1).
fn link(list: &ListParams, page: Option<usize>) -> String {
    let mut pairs: Vec<(&str, String)> = Vec::new();
    for (k, v) in [
        ("q", &list.q),
        ("state", &list.state),
        ("rule", &list.rule),
        ("metric", &list.metric),
        ("alerting", &list.alerting),
        ("sort", &list.sort),
    ] {
        if let Some(v) = v.as_deref().filter(|v| !v.is_empty()) {
            pairs.push((k, encode(v)));
        }
    }
    if let Some(p) = page.filter(|p| *p > 1) {
        pairs.push(("page", p.to_string()));
    }
    if pairs.is_empty() {
        return "/".into();
    }
    let q: Vec<String> = pairs.iter().map(|(k, v)| format!("{k}={v}")).collect();
    format!("/?{}", q.join("&"))
}

/// The parameters that give back `filter` and `order` (the inverse of [`ListParams::filter`]).
fn params(filter: &Filter, order: Order) -> ListParams {
    ListParams {
        state: filter.standing.map(|s| s.as_str().into()),
        rule: filter.rule.map(|r| r.as_str().into()),
        metric: filter.metric.clone(),
        q: filter.search.clone(),
        alerting: filter.alerting.then(|| "true".into()),
        sort: (order != Order::Attention).then(|| order.as_str().into()),
    }
}

/// CSS class of a standing's chip: the experiment pages' classes where they mean the same,
/// two more for the states only the fleet has.
fn chip_class(s: Standing) -> &'static str {
    match s {
        Standing::Harm => "harm",
        Standing::Quality => "quality",
        Standing::Ready => "ready",
        Standing::Decided => "decided",
        Standing::Gathering => "gathering",
    }
}

/// The chips the experiment pages do not have (two states and the open alerts). Colours from the Okabe–Ito palette, each
/// with its own glyph, so no state is told by colour alone.
const STYLE: &str = r#"<style>
.chip.ready { background:#dcecf7; border-color:#0072B2; } .chip.ready::before { content:"◆"; }
.chip.decided { background:#d9f0e6; border-color:#009E73; } .chip.decided::before { content:"✓"; }
.chip.alerting { background:#f7e4ef; border-color:#CC79A7; } .chip.alerting::before { content:"!"; }
nav.counts { display:flex; flex-wrap:wrap; gap:.5rem; margin:.4rem 0 .9rem; }
nav.counts a.chip { font-size:.95rem; padding:.25rem .6rem; text-decoration:none; color:var(--ink); }
nav.counts a.chip .n { font-variant-numeric:tabular-nums; font-size:1.1rem; margin-right:.3rem; }
nav.counts a.total { border:1px solid var(--rule); background:var(--card); }
nav.counts a.current { outline:2px solid var(--ink); }
form.filters { display:flex; flex-wrap:wrap; gap:.6rem; align-items:end; background:var(--card); border:1px solid var(--rule); border-radius:6px; padding:.5rem .7rem; margin:.4rem 0 .8rem; }
form.filters label { display:flex; flex-direction:column; font-size:.8rem; color:var(--soft); gap:.15rem; }
form.filters input, form.filters select, form.filters button { font:inherit; font-size:.9rem; padding:.15rem .3rem; }
nav.pager { display:flex; gap:1rem; align-items:baseline; margin:.6rem 0; }
</style>"#;

/// Writes into the body attribute the page's load time (milliseconds since navigation start,
/// from the browser's own clock), which the bench reads.
const TIMING: &str = r#"<script>addEventListener('load', function () { document.body.setAttribute('data-loaded-ms', String(Math.round(performance.now()))); });</script>"#;

fn counts_nav(s: &mut String, counts: &Counts, filter: &Filter) {
    s.push_str(r#"<nav class="counts" data-role="counts">"#);
    let plain = filter.is_empty();
    let _ = write!(
        s,
        r#"<a class="chip total{}" href="/" data-count="all"><span class="n">{}</span>experiments</a>"#,
        if plain { " current" } else { "" },
        counts.experiments
    );
    for st in Standing::ALL {
        let only = Filter {
            standing: Some(st),
            ..Filter::default()
        };
        let _ = write!(
            s,
            r#"<a class="chip {class}{current}" href="{href}" data-count="{name}"><span class="n">{n}</span>{label}</a>"#,
            class = chip_class(st),
            current = if *filter == only { " current" } else { "" },
            href = escape(&link(&params(&only, Order::Attention), None)),
            name = st.as_str(),
            n = counts.of_standing(st),
            label = escape(st.label()),
        );
    }
    let alerting = Filter {
        alerting: true,
        ..Filter::default()
    };
    let _ = write!(
        s,
        r#"<a class="chip alerting{current}" href="{href}" data-count="open-alerts" data-experiments="{e}"><span class="n">{n}</span>open alerts in {e} experiments</a>"#,
        current = if *filter == alerting { " current" } else { "" },
        href = escape(&link(&params(&alerting, Order::Alerts), None)),
        n = counts.open_alerts,
        e = counts.alerting,
    );
    s.push_str("</nav>");
    if counts.pending > 0 {
        let _ = write!(
            s,
            r#"<p class="muted" data-role="pending" data-pending="{n}">{n} experiments not summarised yet (new, or the service just started); they count as gathering evidence until then.</p>"#,
            n = counts.pending
        );
    }
}

fn option(s: &mut String, value: &str, label: &str, selected: bool) {
    let _ = write!(
        s,
        r#"<option value="{}"{}>{}</option>"#,
        escape(value),
        if selected { " selected" } else { "" },
        escape(label)
    );
}

fn form(s: &mut String, members: &[Member], filter: &Filter, order: Order) {
    s.push_str(
        r#"<form class="filters" method="get" action="/" data-role="filters" role="search">"#,
    );
    let _ = write!(
        s,
        r#"<label>experiment id contains<input type="search" name="q" value="{}" placeholder="e.g. checkout" autocomplete="off"></label>"#,
        escape(filter.search.as_deref().unwrap_or(""))
    );
    s.push_str(r#"<label>state<select name="state">"#);
    option(s, "", "any", filter.standing.is_none());
    for st in Standing::ALL {
        option(s, st.as_str(), st.label(), filter.standing == Some(st));
    }
    s.push_str(r#"</select></label><label>rule that holds<select name="rule">"#);
    option(s, "", "any", filter.rule.is_none());
    for r in Rule::ALL {
        option(s, r.as_str(), r.as_str(), filter.rule == Some(r));
    }
    let _ = write!(
        s,
        r#"</select></label><label>metric<input name="metric" list="metric-names" value="{}" autocomplete="off"></label>"#,
        escape(filter.metric.as_deref().unwrap_or(""))
    );
    let mut names: Vec<&str> = members
        .iter()
        .flat_map(|m| m.def.metrics.iter().map(|x| x.name.as_str()))
        .collect();
    names.sort_unstable();
    names.dedup();
    s.push_str(r#"<datalist id="metric-names">"#);
    for n in names.iter().take(METRIC_SUGGESTIONS) {
        let _ = write!(s, r#"<option value="{}">"#, escape(n));
    }
    s.push_str(r#"</datalist><label>order<select name="sort">"#);
    for o in Order::ALL {
        option(s, o.as_str(), o.label(), o == order);
    }
    s.push_str(r#"</select></label>"#);
    if filter.alerting {
        s.push_str(r#"<input type="hidden" name="alerting" value="true">"#);
    }
    s.push_str(r#"<button type="submit">show</button> <a href="/">clear</a></form>"#);
}

fn prob(x: f64) -> String {
    if !x.is_finite() {
        "—".into()
    } else if x > 0.9999 {
        ">0.9999".into()
    } else {
        format!("{x:.4}")
    }
}

/// "3 h ago" and the like, from microseconds.
fn ago(then: i64, now: i64) -> String {
    let s = (now - then).max(0) / 1_000_000;
    match s {
        0..60 => format!("{s} s ago"),
        60..3600 => format!("{} min ago", s / 60),
        3600..86400 => format!("{} h ago", s / 3600),
        _ => format!("{} d ago", s / 86400),
    }
}

fn row(s: &mut String, m: &Member, now: i64) {
    let def = &m.def;
    let (metric, leader) = match &m.verdict {
        None => ("—".to_string(), None),
        Some(v) => {
            let sdef = &v.summary.snapshot.def;
            let p = sdef.rules.primary;
            let leader = v.summary.metrics[p].arms.as_ref().ok().and_then(|arms| {
                arms.iter()
                    .enumerate()
                    .max_by(|a, b| a.1.prob_best.total_cmp(&b.1.prob_best))
                    .map(|(i, a)| (sdef.variants[i].name.as_str(), a.prob_best))
            });
            (sdef.metrics[p].name.clone(), leader)
        }
    };
    let rules: Vec<&str> = m.rules().iter().map(|r| r.as_str()).collect();
    let _ = write!(
        s,
        r#"<tr data-experiment="{id}" data-state="{state}"><td><a href="/experiments/{id}">{id}</a></td><td><span class="chip {class}">{label}</span>{pending}</td><td>{rules}</td><td class="num">{units}</td><td>{metric}</td><td>{leader}</td><td class="num">{pbest}</td><td class="num">{alerts}</td><td>{decided}</td></tr>"#,
        id = escape(&def.id),
        state = m.standing.as_str(),
        class = chip_class(m.standing),
        label = escape(m.standing.label()),
        pending = if m.verdict.is_none() {
            r#" <span class="muted">(not summarised yet)</span>"#
        } else {
            ""
        },
        rules = if rules.is_empty() {
            "—".into()
        } else {
            escape(&rules.join(", "))
        },
        units = m.units(),
        metric = escape(&metric),
        leader = leader.map_or("—".into(), |l| escape(l.0)),
        pbest = leader.map_or("—".into(), |l| prob(l.1)),
        alerts = m.alerts.open,
        decided = m
            .alerts
            .last_decision
            .map_or("never".into(), |t| ago(t, now)),
    );
}

/// The main part of `/` for `members` (every experiment now).
fn main_part(members: &[Member], asked: &Asked, now: i64) -> String {
    let counts = Counts::of(members);
    let mut s = String::new();
    s.push_str(STYLE);
    s.push_str("<h1>Experiments</h1>");
    s.push_str(r#"<p class="caution">"#);
    s.push_str(&escape(crate::doc::CAUTION));
    s.push_str("</p>");
    counts_nav(&mut s, &counts, &asked.filter);
    form(&mut s, members, &asked.filter, asked.order);
    let skip = (asked.page - 1).saturating_mul(PAGE_SIZE);
    let rows = members.iter().map(|m| (facts(m), m)).collect();
    let page = query::page(
        rows,
        &asked.filter,
        asked.order,
        None,
        skip.saturating_add(PAGE_SIZE),
    );
    let shown: Vec<&Member> = page.rows.into_iter().skip(skip).collect();
    let pages = page.matched.div_ceil(PAGE_SIZE).max(1);
    let _ = write!(
        s,
        r#"<p data-role="showing" data-matched="{matched}" data-page="{p}" data-pages="{pages}">{what}</p>"#,
        matched = page.matched,
        p = asked.page,
        what = if shown.is_empty() {
            format!("No experiment matches (page {} of {pages}).", asked.page)
        } else {
            format!(
                "Experiments {}–{} of {} matching ({} in all), {}; page {} of {pages}.",
                skip + 1,
                skip + shown.len(),
                page.matched,
                counts.experiments,
                asked.order.label(),
                asked.page
            )
        },
    );
    s.push_str(r#"<table class="experiments" data-role="experiments"><thead><tr><th>experiment</th><th>state</th><th>rules that hold</th><th>units</th><th>primary metric</th><th>leading variant</th><th>P(best)</th><th>open alerts</th><th>last decision</th></tr></thead><tbody>"#);
    for m in &shown {
        row(&mut s, m, now);
    }
    s.push_str("</tbody></table>");
    let back = params(&asked.filter, asked.order);
    s.push_str(r#"<nav class="pager" data-role="pager">"#);
    if asked.page > 1 {
        let _ = write!(
            s,
            r#"<a rel="prev" data-role="previous-page" href="{}">← previous</a>"#,
            escape(&link(&back, Some(asked.page - 1)))
        );
    }
    if asked.page < pages {
        let _ = write!(
            s,
            r#"<a rel="next" data-role="next-page" href="{}">next →</a>"#,
            escape(&link(&back, Some(asked.page + 1)))
        );
    }
    s.push_str("</nav>");
    let _ = write!(
        s,
        r#"<p class="muted">States are from the latest cached summary of each experiment (at most a few seconds old) and the alert book; refreshes every {REFRESH_SECS} s. JSON: <a href="/v1/experiments">/v1/experiments</a> (same filters, paged by cursor).</p>"#
    );
    s.push_str(TIMING);
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn links_carry_the_filters_escaped_and_drop_empty_ones() {
        let list = ListParams {
            q: Some("crumb &co/ü".into()),
            state: Some(String::new()),
            sort: Some("units".into()),
            ..ListParams::default()
        };
        assert_eq!(
            link(&list, Some(3)),
            "/?q=crumb%20%26co%2F%C3%BC&sort=units&page=3"
        );
        assert_eq!(link(&ListParams::default(), Some(1)), "/");
    }

    #[test]
    fn params_give_back_the_filter() {
        let f = Filter {
            standing: Some(Standing::Quality),
            rule: Some(Rule::Harm),
            metric: Some("refund".into()),
            search: Some("orchard".into()),
            alerting: true,
        };
        let p = params(&f, Order::Units);
        assert_eq!(p.filter().unwrap(), f);
        assert_eq!(p.order(Order::Attention).unwrap(), Order::Units);
    }
}
