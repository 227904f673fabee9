//! Mapped decoding against hand-written lines from an invented ferry operator's two streams.

use super::*;

fn assignments() -> Mapping {
    Mapping::new(
        "deckhand-assignments",
        vec![
            FieldSource::Path("who.rider".into()),
            FieldSource::Path("at".into()),
            FieldSource::Constant("assigned".into()),
            FieldSource::Path("trial.key".into()),
            FieldSource::Path("trial.arm".into()),
            FieldSource::Absent,
            FieldSource::Absent,
            FieldSource::Absent,
        ],
        TimeFormat::EpochMillis,
        vec!["assigned".into()],
        vec![],
    )
    .unwrap()
}

fn tickets() -> Mapping {
    Mapping::new(
        "ticket-events",
        vec![
            FieldSource::Path("rider_id".into()),
            FieldSource::Path("ts".into()),
            FieldSource::Path("kind".into()),
            FieldSource::Absent,
            FieldSource::Absent,
            FieldSource::Path("qty".into()),
            FieldSource::Absent,
            FieldSource::Path("ref".into()),
        ],
        TimeFormat::Rfc3339,
        vec![],
        vec![
            ("ticket.bought".into(), "purchase".into()),
            ("app.crash".into(), "crash".into()),
        ],
    )
    .unwrap()
}

const MAX: usize = 64 * 1024;

#[test]
fn an_assignment_line_reads_as_an_exposure() {
    let line = br#"{"who":{"rider":"r-17","tier":"gold"},"at":1767225600123,"trial":{"key":"fare-banner","arm":"wave","extra":[1,2]}}"#;
    let e = assignments().decode(line, MAX).unwrap().unwrap();
    assert_eq!(e.experiment, "fare-banner");
    // 1767225600 s = 2026-01-01T00:00:00Z (date -u -d @1767225600); 123 ms more.
    assert_eq!(e.time, Some(1_767_225_600_123_000));
    assert_eq!(
        e.body,
        EventBody::Exposure {
            variant: "wave".into(),
            unit: "r-17".into()
        }
    );
    assert!(matches!(e.experiment, Cow::Borrowed(_)));
}

#[test]
fn a_business_line_reads_as_an_outcome_naming_no_experiment() {
    let line = br#"{"kind":"ticket.bought","rider_id":"r-17","ts":"2026-01-01T01:00:00+01:00","qty":2,"ref":"t-9"}"#;
    let e = tickets().decode(line, MAX).unwrap().unwrap();
    assert!(e.attributed());
    assert_eq!(e.time, Some(1_767_225_600_000_000));
    assert_eq!(e.id.as_deref(), Some("t-9"));
    assert_eq!(
        e.body,
        EventBody::Outcome {
            metric: "purchase".into(),
            unit: "r-17".into(),
            count: 2,
            exposure: None
        }
    );
    // A name the mapping does not know is ignored, not refused.
    let line = br#"{"kind":"app.open","rider_id":"r-17","ts":"2026-01-01T01:00:00Z"}"#;
    assert_eq!(tickets().decode(line, MAX).unwrap(), None);
}

#[test]
fn numeric_unit_ids_and_times_as_strings_read() {
    let m = assignments();
    let e = m
        .decode(
            br#"{"who":{"rider":4711},"at":"1767225600000","trial":{"key":"k","arm":"a"}}"#,
            MAX,
        )
        .unwrap()
        .unwrap();
    assert_eq!(e.time, Some(1_767_225_600_000_000));
    assert!(matches!(e.body, EventBody::Exposure { ref unit, .. } if unit == "4711"));
}

#[test]
fn each_defect_gets_its_reason_and_names_the_path() {
    let m = assignments();
    let reject = |line: &str| m.decode(line.as_bytes(), MAX).unwrap_err();
    let r = reject(r#"{"who":{},"at":1767225600000,"trial":{"key":"k","arm":"a"}}"#);
    assert_eq!(r.reason, RejectReason::MissingField);
    assert!(r.message.contains("`who.rider`"), "{}", r.message);
    let r = reject(r#"{"who":{"rider":null},"at":1767225600000,"trial":{"key":"k","arm":"a"}}"#);
    assert_eq!(r.reason, RejectReason::MissingField);
    let r = reject(r#"{"who":{"rider":["x"]},"at":1767225600000,"trial":{"key":"k","arm":"a"}}"#);
    assert_eq!(r.reason, RejectReason::WrongType);
    let r = reject(r#"{"who":{"rider":"x"},"at":"soon","trial":{"key":"k","arm":"a"}}"#);
    assert_eq!(r.reason, RejectReason::BadTime);
    // Seconds written where milliseconds are expected land in 1970: still a valid time. But
    // microseconds read as milliseconds land past the year 9999.
    let r =
        reject(r#"{"who":{"rider":"x"},"at":1767225600000000000,"trial":{"key":"k","arm":"a"}}"#);
    assert_eq!(r.reason, RejectReason::BadTime);
    let r = reject(r#"{"who":{"rider":"x"},"at":true,"trial":{"key":"k","arm":"a"}}"#);
    assert_eq!(r.reason, RejectReason::WrongType);
    let r = reject(r#"{"who":{"rider":"x"},"at":1767225600000,"trial":{"key":"k"}}"#);
    assert_eq!(r.reason, RejectReason::MissingField);
    assert!(r.message.contains("`trial.arm`"), "{}", r.message);
    assert_eq!(reject("{").reason, RejectReason::InvalidJson);
    assert_eq!(reject("[1]").reason, RejectReason::NotAnObject);
    assert_eq!(reject(r#"{"a":1} x"#).reason, RejectReason::InvalidJson);
    let t = tickets();
    let r = t
        .decode(
            br#"{"kind":"app.crash","rider_id":"r","ts":"2026-01-01T00:00:00Z","qty":-1}"#,
            MAX,
        )
        .unwrap_err();
    assert_eq!(r.reason, RejectReason::NegativeValue);
    let r = t
        .decode(
            br#"{"kind":"app.crash","rider_id":"r","ts":"2026-01-01T00:00:00Z","qty":1.5}"#,
            MAX,
        )
        .unwrap_err();
    assert_eq!(r.reason, RejectReason::WrongType);
    let r = t
        .decode(
            br#"{"kind":"app.crash","rider_id":"r","ts":1767225600}"#,
            MAX,
        )
        .unwrap_err();
    assert_eq!(r.reason, RejectReason::WrongType);
}

#[test]
fn array_indices_and_escaped_keys_are_followed() {
    let m = Mapping::new(
        "x",
        vec![
            FieldSource::Path("ids.1".into()),
            FieldSource::Path("t".into()),
            FieldSource::Path("n\u{e9}".into()),
            FieldSource::Absent,
            FieldSource::Absent,
            FieldSource::Absent,
            FieldSource::Absent,
            FieldSource::Absent,
        ],
        TimeFormat::EpochSeconds,
        vec![],
        vec![("buy".into(), "purchase".into())],
    )
    .unwrap();
    let e = m
        .decode(br#"{"ids":["a","b","c"],"t":1.5,"n\u00e9":"buy"}"#, MAX)
        .unwrap()
        .unwrap();
    assert_eq!(e.time, Some(1_500_000));
    assert!(matches!(e.body, EventBody::Outcome { ref unit, .. } if unit == "b"));
}

#[test]
fn bad_mappings_are_refused_naming_the_key() {
    let fields = |unit: FieldSource| {
        vec![
            unit,
            FieldSource::Path("t".into()),
            FieldSource::Path("e".into()),
            FieldSource::Absent,
            FieldSource::Absent,
            FieldSource::Absent,
            FieldSource::Absent,
            FieldSource::Absent,
        ]
    };
    let metrics = || vec![("buy".to_string(), "purchase".to_string())];
    let err = |unit, exposures: Vec<String>, metrics| {
        Mapping::new("s", fields(unit), TimeFormat::Rfc3339, exposures, metrics).unwrap_err()
    };
    assert_eq!(err(FieldSource::Absent, vec![], metrics()).key, "unit");
    assert_eq!(
        err(FieldSource::Constant("u".into()), vec![], metrics()).key,
        "unit"
    );
    assert_eq!(
        err(FieldSource::Path("a..b".into()), vec![], metrics()).key,
        "unit"
    );
    assert_eq!(
        err(FieldSource::Path("t".into()), vec![], metrics()).key,
        "time"
    );
    assert_eq!(
        err(FieldSource::Path("t.x".into()), vec![], metrics()).key,
        "time"
    );
    assert_eq!(
        err(FieldSource::Path("u".into()), vec![], vec![]).key,
        "metrics"
    );
    assert_eq!(
        err(
            FieldSource::Path("u".into()),
            vec!["seen".into()],
            metrics()
        )
        .key,
        "experiment"
    );
    assert_eq!(
        err(FieldSource::Path("u".into()), vec!["buy".into()], metrics()).key,
        "experiment"
    );
}
