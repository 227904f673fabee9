//! JSON decoding of events: bytes from Kafka or HTTP into [`Event`]s, or a [`Reject`] that says
//! which field is wrong and why.
//!
//! This is the only place the wire format is known. Strings are borrowed from the input where
//! they carry no escapes, so a well-formed event costs no allocation here. Unknown fields are
//! ignored so producers can add fields before posteriord knows them.

use std::borrow::Cow;

use serde::Deserialize;
use serde_json::value::RawValue;

use crate::event::{Event, EventBody, Micros, Reject, RejectReason, TallyAmounts, Target};

/// Default upper bound on one encoded event.
pub const DEFAULT_MAX_EVENT_BYTES: usize = 64 * 1024;

/// A string field borrowed from the input when it has no escapes. serde's own `Cow<str>`
/// always allocates when wrapped in `Option`, which would cost an allocation per field.
struct Text<'a>(Cow<'a, str>);

impl<'de: 'a, 'a> Deserialize<'de> for Text<'a> {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V<'a>(std::marker::PhantomData<&'a ()>);
        impl<'de: 'a, 'a> serde::de::Visitor<'de> for V<'a> {
            type Value = Text<'a>;
            fn expecting(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
                f.write_str("a string")
            }
            fn visit_borrowed_str<E>(self, v: &'de str) -> Result<Text<'a>, E> {
                Ok(Text(Cow::Borrowed(v)))
            }
            fn visit_str<E>(self, v: &str) -> Result<Text<'a>, E> {
                Ok(Text(Cow::Owned(v.to_owned())))
            }
            fn visit_string<E>(self, v: String) -> Result<Text<'a>, E> {
                Ok(Text(Cow::Owned(v)))
            }
        }
        d.deserialize_str(V(std::marker::PhantomData))
    }
}

#[derive(Deserialize)]
struct RawEvent<'a> {
    #[serde(rename = "type", borrow, default)]
    kind: Option<Text<'a>>,
    #[serde(borrow, default)]
    experiment: Option<Text<'a>>,
    #[serde(borrow, default)]
    variant: Option<Text<'a>>,
    #[serde(borrow, default)]
    metric: Option<Text<'a>>,
    #[serde(borrow, default)]
    unit: Option<Text<'a>>,
    #[serde(borrow, default)]
    id: Option<Text<'a>>,
    #[serde(borrow, default)]
    time: Option<Text<'a>>,
    #[serde(default)]
    count: Option<i64>,
    #[serde(default)]
    exposure: Option<f64>,
    #[serde(default)]
    trials: Option<i64>,
    #[serde(default)]
    successes: Option<i64>,
}

/// Decode one JSON event, refusing inputs over `max_bytes`.
pub fn decode_event(bytes: &[u8], max_bytes: usize) -> Result<Event<'_>, Reject> {
    if bytes.len() > max_bytes {
        return Err(Reject::new(
            RejectReason::TooLarge,
            format!("event is {} bytes; the limit is {max_bytes}", bytes.len()),
        ));
    }
    // serde would read a JSON array into the struct field by field, so check the shape first.
    let first = bytes.iter().find(|b| !b.is_ascii_whitespace());
    if first != Some(&b'{') {
        return Err(
            match serde_json::from_slice::<serde::de::IgnoredAny>(bytes) {
                Ok(_) => Reject::new(RejectReason::NotAnObject, "an event must be a JSON object"),
                Err(e) => Reject::new(RejectReason::InvalidJson, format!("not valid JSON: {e}")),
            },
        );
    }
    let raw: RawEvent<'_> = serde_json::from_slice(bytes).map_err(|e| classify(&e))?;
    validate(raw)
}

/// Reason for a serde error on an input already known to start with `{`.
fn classify(err: &serde_json::Error) -> Reject {
    use serde_json::error::Category;
    match err.classify() {
        Category::Data => {
            if err.to_string().starts_with("duplicate field") {
                Reject::new(RejectReason::ConflictingFields, err.to_string())
            } else {
                Reject::new(RejectReason::WrongType, err.to_string())
            }
        }
        Category::Syntax | Category::Eof | Category::Io => {
            Reject::new(RejectReason::InvalidJson, format!("not valid JSON: {err}"))
        }
    }
}

fn required<'a>(value: Option<Text<'a>>, field: &str, kind: &str) -> Result<Cow<'a, str>, Reject> {
    value.map(|t| t.0).ok_or_else(|| missing(field, kind))
}

fn missing(field: &str, kind: &str) -> Reject {
    Reject::new(
        RejectReason::MissingField,
        format!("a `{kind}` event needs `{field}`"),
    )
}

fn non_negative(value: i64, field: &str) -> Result<u64, Reject> {
    u64::try_from(value).map_err(|_| {
        Reject::new(
            RejectReason::NegativeValue,
            format!("`{field}` must not be negative (got {value})"),
        )
    })
}

fn exposure_value(value: Option<f64>) -> Result<Option<f64>, Reject> {
    match value {
        Some(x) if x < 0.0 => Err(Reject::new(
            RejectReason::NegativeValue,
            format!("`exposure` must not be negative (got {x})"),
        )),
        other => Ok(other),
    }
}

/// Parse an RFC 3339 timestamp into microseconds since the epoch.
pub fn parse_time(text: &str) -> Result<Micros, Reject> {
    if let Some(micros) = parse_time_fast(text.as_bytes()) {
        return Ok(micros);
    }
    let t = time::OffsetDateTime::parse(text, &time::format_description::well_known::Rfc3339)
        .map_err(|e| {
            Reject::new(
                RejectReason::BadTime,
                format!("`time` must be RFC 3339, like 2026-03-14T09:26:53Z (got {text:?}: {e})"),
            )
        })?;
    Ok((t.unix_timestamp_nanos() / 1_000) as Micros)
}

/// The common shapes `2026-03-14T09:26:53Z`, `2026-03-14T09:26:53.123Z` and
/// `2026-03-14T09:26:53+01:00`, from 1970 on, parsed by hand: the general parser took a
/// sixth of the decode time. Anything else (other years, leap seconds, lower-case
/// separators, long fractions, malformed text) returns `None` and goes to the general
/// parser, which also writes the error messages. Tests check both agree.
fn parse_time_fast(b: &[u8]) -> Option<Micros> {
    fn digits(b: &[u8]) -> Option<i64> {
        let mut n = 0i64;
        for &c in b {
            if !c.is_ascii_digit() {
                return None;
            }
            n = n * 10 + i64::from(c - b'0');
        }
        Some(n)
    }
    if b.len() < 20 || b[4] != b'-' || b[7] != b'-' || b[10] != b'T' || b[13] != b':' {
        return None;
    }
    if b[16] != b':' {
        return None;
    }
    let (year, month, day) = (digits(&b[0..4])?, digits(&b[5..7])?, digits(&b[8..10])?);
    let (hour, minute, second) = (
        digits(&b[11..13])?,
        digits(&b[14..16])?,
        digits(&b[17..19])?,
    );
    if year < 1970 || !(1..=12).contains(&month) || hour > 23 || minute > 59 || second > 59 {
        return None;
    }
    let leap = (year % 4 == 0 && year % 100 != 0) || year % 400 == 0;
    let month_days = [
        31,
        if leap { 29 } else { 28 },
        31,
        30,
        31,
        30,
        31,
        31,
        30,
        31,
        30,
        31,
    ];
    if day < 1 || day > month_days[(month - 1) as usize] {
        return None;
    }
    let mut rest = &b[19..];
    let mut micros = 0i64;
    if rest.first() == Some(&b'.') {
        let n = rest[1..].iter().take_while(|c| c.is_ascii_digit()).count();
        if n == 0 || n > 9 {
            return None;
        }
        let frac = digits(&rest[1..1 + n])?;
        // Truncate to microseconds, as the general path does (nanoseconds / 1000).
        let nanos = frac * 10i64.pow(9 - n as u32);
        micros = nanos / 1_000;
        rest = &rest[1 + n..];
    }
    let offset_secs = match rest {
        [b'Z'] => 0,
        [sign @ (b'+' | b'-'), h1, h2, b':', m1, m2] => {
            let (h, m) = (digits(&[*h1, *h2])?, digits(&[*m1, *m2])?);
            if h > 23 || m > 59 {
                return None;
            }
            let secs = h * 3600 + m * 60;
            if *sign == b'-' {
                -secs
            } else {
                secs
            }
        }
        _ => return None,
    };
    // Days since the epoch of a proleptic Gregorian date (Howard Hinnant's days_from_civil).
    let y = if month <= 2 { year - 1 } else { year };
    let era = y / 400;
    let yoe = y - era * 400;
    let mp = (month + 9) % 12;
    let doy = (153 * mp + 2) / 5 + day - 1;
    let doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
    let days = era * 146_097 + doe - 719_468;
    let secs = days * 86_400 + hour * 3600 + minute * 60 + second - offset_secs;
    if secs < 0 {
        // Before the epoch once the offset applies: rounding differs; leave it to the
        // general parser.
        return None;
    }
    Some(secs * 1_000_000 + micros)
}

fn validate(raw: RawEvent<'_>) -> Result<Event<'_>, Reject> {
    let Some(kind) = raw.kind else {
        return Err(Reject::new(
            RejectReason::UnknownType,
            "an event needs `type`: exposure, conversion, defect, outcome or tally",
        ));
    };
    let kind: &str = &kind.0;
    let experiment = match kind {
        "exposure" | "conversion" | "defect" | "tally" => {
            required(raw.experiment, "experiment", kind)?
        }
        // An outcome may name its experiment; without one it is attributed through exposures.
        "outcome" => raw.experiment.map_or(Cow::Borrowed(""), |t| t.0),
        other => {
            return Err(Reject::new(
                RejectReason::UnknownType,
                format!(
                    "unknown event type `{other}`; expected exposure, conversion, defect, outcome or tally"
                ),
            ))
        }
    };
    // Time is required where events describe one moment; tallies summarise a period.
    let time = match (raw.time, kind) {
        (Some(t), _) => Some(parse_time(&t.0)?),
        (None, "tally") => None,
        (None, _) => return Err(missing("time", kind)),
    };
    let body = match kind {
        "exposure" => EventBody::Exposure {
            variant: required(raw.variant, "variant", kind)?,
            unit: required(raw.unit, "unit", kind)?,
        },
        "outcome" => EventBody::Outcome {
            metric: required(raw.metric, "metric", kind)?,
            unit: required(raw.unit, "unit", kind)?,
            count: match raw.count {
                Some(n) => non_negative(n, "count")?,
                None => 1,
            },
            exposure: exposure_value(raw.exposure)?,
        },
        "conversion" => EventBody::Conversion {
            metric: required(raw.metric, "metric", kind)?,
            unit: required(raw.unit, "unit", kind)?,
        },
        "defect" => {
            let target = match (raw.unit, raw.variant) {
                (Some(u), None) => Target::Unit(u.0),
                (None, Some(v)) => Target::Variant(v.0),
                (Some(_), Some(_)) => {
                    return Err(Reject::new(
                        RejectReason::ConflictingFields,
                        "a `defect` event names either `unit` or `variant`, not both",
                    ))
                }
                (None, None) => return Err(missing("unit` or `variant", kind)),
            };
            let count = raw.count.ok_or_else(|| missing("count", kind))?;
            EventBody::Defect {
                metric: required(raw.metric, "metric", kind)?,
                target,
                count: non_negative(count, "count")?,
                exposure: exposure_value(raw.exposure)?,
            }
        }
        _ => {
            let metric = required(raw.metric, "metric", kind)?;
            let variant = required(raw.variant, "variant", kind)?;
            let has_trials = raw.trials.is_some() || raw.successes.is_some();
            let has_defects = raw.count.is_some() || raw.exposure.is_some();
            let amounts = match (has_trials, has_defects) {
                (true, true) => return Err(Reject::new(
                    RejectReason::ConflictingFields,
                    "a `tally` carries either `trials`/`successes` or `count`/`exposure`, not both",
                )),
                (true, false) => TallyAmounts::Trials {
                    trials: non_negative(
                        raw.trials.ok_or_else(|| missing("trials", kind))?,
                        "trials",
                    )?,
                    successes: non_negative(
                        raw.successes.ok_or_else(|| missing("successes", kind))?,
                        "successes",
                    )?,
                },
                (false, true) => TallyAmounts::Defects {
                    count: non_negative(raw.count.ok_or_else(|| missing("count", kind))?, "count")?,
                    exposure: exposure_value(raw.exposure)?,
                },
                (false, false) => {
                    return Err(missing("trials`/`successes` or `count", kind));
                }
            };
            EventBody::Tally {
                metric,
                variant,
                amounts,
            }
        }
    };
    Ok(Event {
        experiment,
        id: raw.id.map(|t| t.0),
        time,
        body,
    })
}

/// The built-in encoding of `event`, which [`decode_event`] reads back as the same event (how
/// events read under a mapping are logged: the HTTP write-ahead log holds the built-in format).
pub fn encode_event(event: &Event<'_>) -> Vec<u8> {
    use serde_json::{json, Map, Value};
    let mut m = Map::new();
    let mut put = |k: &str, v: Value| {
        m.insert(k.to_string(), v);
    };
    if !event.experiment.is_empty() {
        put("experiment", json!(event.experiment));
    }
    if let Some(id) = &event.id {
        put("id", json!(id));
    }
    if let Some(t) = event.time {
        put("time", json!(format_time(t)));
    }
    match &event.body {
        EventBody::Exposure { variant, unit } => {
            put("type", json!("exposure"));
            put("variant", json!(variant));
            put("unit", json!(unit));
        }
        EventBody::Conversion { metric, unit } => {
            put("type", json!("conversion"));
            put("metric", json!(metric));
            put("unit", json!(unit));
        }
        EventBody::Outcome {
            metric,
            unit,
            count,
            exposure,
        } => {
            put("type", json!("outcome"));
            put("metric", json!(metric));
            put("unit", json!(unit));
            put("count", json!(count));
            if let Some(x) = exposure {
                put("exposure", json!(x));
            }
        }
        EventBody::Defect {
            metric,
            target,
            count,
            exposure,
        } => {
            put("type", json!("defect"));
            put("metric", json!(metric));
            match target {
                Target::Unit(u) => put("unit", json!(u)),
                Target::Variant(v) => put("variant", json!(v)),
            }
            put("count", json!(count));
            if let Some(x) = exposure {
                put("exposure", json!(x));
            }
        }
        EventBody::Tally {
            metric,
            variant,
            amounts,
        } => {
            put("type", json!("tally"));
            put("metric", json!(metric));
            put("variant", json!(variant));
            match amounts {
                TallyAmounts::Trials { trials, successes } => {
                    put("trials", json!(trials));
                    put("successes", json!(successes));
                }
                TallyAmounts::Defects { count, exposure } => {
                    put("count", json!(count));
                    if let Some(x) = exposure {
                        put("exposure", json!(x));
                    }
                }
            }
        }
    }
    serde_json::to_vec(&Value::Object(m)).expect("a JSON map always encodes")
}

/// RFC 3339 in UTC with microseconds, which [`parse_time`] reads back exactly.
pub fn format_time(micros: Micros) -> String {
    let t = time::OffsetDateTime::from_unix_timestamp_nanos(i128::from(micros) * 1_000)
        .unwrap_or(time::OffsetDateTime::UNIX_EPOCH);
    let (y, mo, d) = (t.year(), t.month() as u8, t.day());
    let (h, mi, s, us) = (t.hour(), t.minute(), t.second(), t.microsecond());
    format!("{y:04}-{mo:02}-{d:02}T{h:02}:{mi:02}:{s:02}.{us:06}Z")
}

/// Where an event sat in a request body, for error reports.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Position {
    /// Zero-based index in a JSON array body.
    Index(usize),
    /// One-based line number in an NDJSON body.
    Line(usize),
}

/// Why a whole body could not be split into events.
#[derive(Debug, thiserror::Error)]
pub enum BodyError {
    /// The body has no events at all.
    #[error("the body holds no events; send a JSON array of events or one event per line")]
    Empty,
    /// The body starts like a JSON array but is not one.
    #[error("the body starts with `[` but is not a JSON array: {0}")]
    BadArray(serde_json::Error),
}

/// Split a request body into the encoded events it carries: a JSON array of events, or NDJSON
/// (one event per line; a single object is the one-line case). Blank lines are skipped.
pub fn split_body(body: &[u8]) -> Result<Vec<(Position, &[u8])>, BodyError> {
    let first = body.iter().position(|b| !b.is_ascii_whitespace());
    let Some(first) = first else {
        return Err(BodyError::Empty);
    };
    let items: Vec<(Position, &[u8])> = if body[first] == b'[' {
        let raws: Vec<&RawValue> = serde_json::from_slice(body).map_err(BodyError::BadArray)?;
        raws.into_iter()
            .enumerate()
            .map(|(i, raw)| (Position::Index(i), raw.get().as_bytes()))
            .collect()
    } else {
        body.split(|&b| b == b'\n')
            .enumerate()
            .filter(|(_, line)| line.iter().any(|b| !b.is_ascii_whitespace()))
            .map(|(i, line)| (Position::Line(i + 1), line))
            .collect()
    };
    if items.is_empty() {
        return Err(BodyError::Empty);
    }
    Ok(items)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn reason(json: &str) -> RejectReason {
        decode_event(json.as_bytes(), DEFAULT_MAX_EVENT_BYTES)
            .expect_err(json)
            .reason
    }

    const T: &str = r#""time":"2026-03-14T09:26:53Z""#;

    #[test]
    fn decodes_each_event_type() {
        let text = format!(
            r#"{{"type":"exposure","experiment":"crumb","variant":"control","unit":"u1",{T},"id":"e1"}}"#
        );
        let e = decode_event(text.as_bytes(), DEFAULT_MAX_EVENT_BYTES).unwrap();
        assert_eq!(e.experiment, "crumb");
        assert_eq!(e.id.as_deref(), Some("e1"));
        // 2026-03-14T09:26:53Z = 1773480413 s after the epoch (date -u -d @1773480413).
        assert_eq!(e.time, Some(1_773_480_413_000_000));
        assert!(matches!(e.body, EventBody::Exposure { .. }));

        let e = decode_event(
            br#"{"type":"defect","experiment":"x","metric":"crash","variant":"v","count":3,"exposure":12.5,"time":"2026-03-14T09:26:53+01:00"}"#,
            DEFAULT_MAX_EVENT_BYTES,
        )
        .unwrap();
        assert_eq!(
            e.body,
            EventBody::Defect {
                metric: "crash".into(),
                target: Target::Variant("v".into()),
                count: 3,
                exposure: Some(12.5)
            }
        );
        let e = decode_event(
            br#"{"type":"tally","experiment":"x","metric":"buy","variant":"v","trials":10,"successes":2}"#,
            DEFAULT_MAX_EVENT_BYTES,
        )
        .unwrap();
        assert_eq!(e.time, None);
        assert!(matches!(
            e.body,
            EventBody::Tally {
                amounts: TallyAmounts::Trials {
                    trials: 10,
                    successes: 2
                },
                ..
            }
        ));
    }

    #[test]
    fn strings_without_escapes_are_borrowed() {
        let bytes = format!(
            r#"{{"type":"conversion","experiment":"crumb","metric":"buy","unit":"u\u0031",{T}}}"#
        );
        let e = decode_event(bytes.as_bytes(), DEFAULT_MAX_EVENT_BYTES).unwrap();
        assert!(matches!(e.experiment, Cow::Borrowed(_)));
        let EventBody::Conversion { unit, .. } = e.body else {
            panic!()
        };
        assert_eq!(unit, "u1");
    }

    #[test]
    fn each_defect_gets_its_reason() {
        assert_eq!(reason("{"), RejectReason::InvalidJson);
        assert_eq!(reason("\u{feff}"), RejectReason::InvalidJson);
        assert_eq!(reason("[1,2]"), RejectReason::NotAnObject);
        assert_eq!(reason("17"), RejectReason::NotAnObject);
        assert_eq!(reason(r#"["exposure","x","v"]"#), RejectReason::NotAnObject);
        assert_eq!(reason(""), RejectReason::InvalidJson);
        assert_eq!(reason(r#"{"experiment":"x"}"#), RejectReason::UnknownType);
        assert_eq!(
            reason(r#"{"type":"purchase","experiment":"x"}"#),
            RejectReason::UnknownType
        );
        assert_eq!(
            reason(&format!(
                r#"{{"type":"exposure","experiment":"x","unit":"u",{T}}}"#
            )),
            RejectReason::MissingField
        );
        assert_eq!(
            reason(r#"{"type":"exposure","experiment":"x","variant":"v","unit":"u"}"#),
            RejectReason::MissingField
        );
        assert_eq!(
            reason(&format!(
                r#"{{"type":"exposure","experiment":"x","variant":7,"unit":"u",{T}}}"#
            )),
            RejectReason::WrongType
        );
        assert_eq!(
            reason(
                r#"{"type":"exposure","experiment":"x","variant":"v","unit":"u","time":"yesterday"}"#
            ),
            RejectReason::BadTime
        );
        assert_eq!(
            reason(&format!(
                r#"{{"type":"defect","experiment":"x","metric":"m","unit":"u","count":-2,{T}}}"#
            )),
            RejectReason::NegativeValue
        );
        assert_eq!(
            reason(&format!(
                r#"{{"type":"defect","experiment":"x","metric":"m","unit":"u","count":2.5,{T}}}"#
            )),
            RejectReason::WrongType
        );
        assert_eq!(
            reason(&format!(
                r#"{{"type":"defect","experiment":"x","metric":"m","unit":"u","variant":"v","count":1,{T}}}"#
            )),
            RejectReason::ConflictingFields
        );
        assert_eq!(
            reason(
                r#"{"type":"tally","experiment":"x","metric":"m","variant":"v","trials":3,"count":1}"#
            ),
            RejectReason::ConflictingFields
        );
        assert_eq!(
            reason(r#"{"type":"tally","experiment":"x","metric":"m","variant":"v","trials":3}"#),
            RejectReason::MissingField
        );
        assert_eq!(
            reason(
                r#"{"type":"tally","experiment":"x","experiment":"y","metric":"m","variant":"v","trials":3}"#
            ),
            RejectReason::ConflictingFields
        );
        let big = format!(
            r#"{{"type":"tally","pad":"{}"}}"#,
            "x".repeat(DEFAULT_MAX_EVENT_BYTES)
        );
        assert_eq!(reason(&big), RejectReason::TooLarge);
    }

    #[test]
    fn outcomes_may_name_no_experiment_and_every_event_round_trips() {
        let lines = [
            format!(r#"{{"type":"outcome","metric":"buy","unit":"u1",{T}}}"#),
            format!(r#"{{"type":"outcome","experiment":"x","metric":"crash","unit":"u1","count":3,"exposure":2.5,"id":"e",{T}}}"#),
            format!(r#"{{"type":"exposure","experiment":"crumb","variant":"control","unit":"u1",{T}}}"#),
            format!(r#"{{"type":"defect","experiment":"x","metric":"m","variant":"v","count":1,{T}}}"#),
            r#"{"type":"tally","experiment":"x","metric":"buy","variant":"v","trials":10,"successes":2}"#.to_string(),
            r#"{"type":"conversion","experiment":"x","metric":"buy","unit":"u","time":"1999-12-31T23:59:59.123456-05:00"}"#.to_string(),
        ];
        for line in &lines {
            let e = decode_event(line.as_bytes(), DEFAULT_MAX_EVENT_BYTES).unwrap();
            let bytes = encode_event(&e);
            assert_eq!(
                decode_event(&bytes, DEFAULT_MAX_EVENT_BYTES).unwrap(),
                e,
                "{line}"
            );
        }
        let e = decode_event(lines[0].as_bytes(), DEFAULT_MAX_EVENT_BYTES).unwrap();
        assert!(e.attributed());
        assert_eq!(
            e.body,
            EventBody::Outcome {
                metric: "buy".into(),
                unit: "u1".into(),
                count: 1,
                exposure: None
            }
        );
        assert_eq!(
            reason(&format!(
                r#"{{"type":"outcome","metric":"buy","unit":"u1","count":-1,{T}}}"#
            )),
            RejectReason::NegativeValue
        );
        assert_eq!(
            reason(&format!(r#"{{"type":"outcome","unit":"u1",{T}}}"#)),
            RejectReason::MissingField
        );
    }

    #[test]
    fn messages_name_the_field() {
        let err = decode_event(
            br#"{"type":"conversion","experiment":"x","unit":"u","time":"2026-01-01T00:00:00Z"}"#,
            1024,
        )
        .unwrap_err();
        assert!(err.message.contains("`metric`"), "{}", err.message);
    }

    #[test]
    fn bodies_split_by_index_or_line() {
        let items = split_body(b" [ {\"a\":1}, 5 ,{\"b\":[2]} ]").unwrap();
        let positions: Vec<_> = items.iter().map(|(p, _)| *p).collect();
        assert_eq!(
            positions,
            vec![Position::Index(0), Position::Index(1), Position::Index(2)]
        );
        assert_eq!(items[2].1, b"{\"b\":[2]}");
        let items = split_body(b"{\"a\":1}\n\n  \nnot json\r\n{\"c\":3}").unwrap();
        let positions: Vec<_> = items.iter().map(|(p, _)| *p).collect();
        assert_eq!(
            positions,
            vec![Position::Line(1), Position::Line(4), Position::Line(5)]
        );
        assert!(matches!(split_body(b"  \n "), Err(BodyError::Empty)));
        assert!(matches!(split_body(b"[]"), Err(BodyError::Empty)));
        assert!(matches!(
            split_body(b"[{\"a\":1},"),
            Err(BodyError::BadArray(_))
        ));
    }
}
