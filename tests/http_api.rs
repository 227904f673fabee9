//! Black-box tests of the HTTP API over real HTTP against the real binary: exact counts from
//! posted events (checked against the independent ground-truth model in `common`), per-event
//! rejection reasons, error shapes, health, readiness and metrics.

mod common;

use std::time::Duration;

use common::{workload, Service, TEST_EXPERIMENTS};
use serde_json::Value;

fn config() -> String {
    format!("[http]\naddr = \"127.0.0.1:0\"\n{TEST_EXPERIMENTS}")
}

#[test]
fn posted_events_are_counted_exactly() {
    let service = Service::start(&config());
    let w = workload(11, 6_000);
    // Send in NDJSON chunks and as JSON arrays, to cover both body forms.
    for (i, chunk) in w.lines.chunks(500).enumerate() {
        let (status, reply) = if i % 2 == 0 {
            service.post("/v1/events", chunk.join("\n"))
        } else {
            service.post("/v1/events", format!("[{}]", chunk.join(",")))
        };
        assert_eq!(status, 200, "{reply}");
        assert_eq!(reply["received"], chunk.len());
        assert_eq!(reply["rejected"], 0);
    }
    common::assert_exact(&service, &w.expected);
    // The workload must actually exercise the semantics it checks.
    let e = &w.expected[0];
    assert!(
        e.duplicate_id > 0
            && e.crossover > 0
            && e.orphan > 0
            && e.duplicate_exposure > 0
            && e.duplicate_conversion > 0,
        "{e:?}"
    );
}

#[test]
fn bad_events_get_a_reason_each_and_good_ones_still_apply() {
    let service = Service::start(&config());
    let t = r#""time":"2026-05-02T10:00:00Z""#;
    let body = [
        format!(r#"{{"type":"exposure","experiment":"checkout-copy","variant":"control","unit":"a",{t}}}"#),
        "{not json".to_string(),
        format!(r#"{{"type":"exposure","experiment":"nope","variant":"control","unit":"a",{t}}}"#),
        format!(r#"{{"type":"exposure","experiment":"checkout-copy","variant":"blue","unit":"a",{t}}}"#),
        format!(r#"{{"type":"conversion","experiment":"checkout-copy","metric":"refund","unit":"a",{t}}}"#),
        format!(r#"{{"type":"conversion","experiment":"checkout-copy","unit":"a",{t}}}"#),
        format!(r#"{{"type":"conversion","experiment":"checkout-copy","metric":7,"unit":"a",{t}}}"#),
        format!(r#"{{"type":"defect","experiment":"checkout-copy","metric":"payment-error","unit":"a","count":-1,{t}}}"#),
        r#"{"type":"tally","experiment":"checkout-copy","metric":"purchase","variant":"control","trials":2,"successes":3}"#.to_string(),
        r#"{"type":"exposure","experiment":"checkout-copy","variant":"control","unit":"a","time":"noon"}"#.to_string(),
        format!(r#"{{"type":"conversion","experiment":"checkout-copy","metric":"purchase","unit":"a",{t}}}"#),
    ]
    .join("\n");
    let (status, reply) = service.post("/v1/events", body);
    assert_eq!(status, 422, "{reply}");
    assert_eq!(reply["received"], 11);
    assert_eq!(reply["applied"], 2);
    assert_eq!(reply["rejected"], 9);
    let reasons: Vec<(u64, &str)> = reply["errors"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| (e["line"].as_u64().unwrap(), e["reason"].as_str().unwrap()))
        .collect();
    assert_eq!(
        reasons,
        vec![
            (2, "invalid_json"),
            (3, "unknown_experiment"),
            (4, "unknown_variant"),
            (5, "unknown_metric"),
            (6, "missing_field"),
            (7, "wrong_type"),
            (8, "negative_value"),
            (9, "successes_exceed_trials"),
            (10, "bad_time"),
        ]
    );
    for e in reply["errors"].as_array().unwrap() {
        assert!(!e["message"].as_str().unwrap().is_empty());
    }
    // Array bodies report by index.
    let (status, reply) = service.post("/v1/events", "[{\"type\":\"exposure\"}, 3]");
    assert_eq!(status, 422);
    assert_eq!(reply["errors"][0]["index"], 0);
    assert_eq!(reply["errors"][1]["index"], 1);
    assert_eq!(reply["errors"][1]["reason"], "not_an_object");
    // The applied ones are in the state.
    let (_, doc) = service.get("/v1/experiments/checkout-copy");
    assert_eq!(doc["metrics"][0]["variants"][0]["trials"], 1);
    assert_eq!(doc["metrics"][0]["variants"][0]["successes"], 1);
    // Reject reasons are counted in metrics.
    let (_, text) = service.get_text("/metrics");
    assert!(
        text.contains(
            r#"posteriord_events_rejected_total{reason="unknown_variant",source="http"} 1"#
        ),
        "{text}"
    );
    assert!(
        text.contains(r#"posteriord_events_rejected_total{reason="invalid_json",source="http"} 1"#)
    );
}

#[test]
fn malformed_bodies_and_unknown_routes_get_the_json_error_shape() {
    let service = Service::start(&config());
    for (body, code) in [
        ("", "bad_body"),
        ("  \n ", "bad_body"),
        ("[{\"a\":1},", "bad_body"),
    ] {
        let (status, reply) = service.post("/v1/events", body);
        assert_eq!(status, 400, "{reply}");
        assert_eq!(reply["error"]["code"], code);
        assert!(reply["error"]["message"].as_str().unwrap().len() > 10);
    }
    let (status, reply) = service.get("/v1/experiments/not-there");
    assert_eq!(status, 404);
    assert_eq!(reply["error"]["code"], "unknown_experiment");
    let (status, reply) = service.get("/v2/nothing");
    assert_eq!(status, 404);
    assert_eq!(reply["error"]["code"], "not_found");
}

#[test]
fn experiment_documents_carry_posteriors_and_intervals() {
    let service = Service::start(&config());
    // 3 of 10 control units convert, none of 10 short-copy units do.
    let t = r#""time":"2026-05-02T10:00:00Z""#;
    let mut lines = Vec::new();
    for i in 0..10 {
        lines.push(format!(r#"{{"type":"exposure","experiment":"checkout-copy","variant":"control","unit":"c{i}",{t}}}"#));
        lines.push(format!(r#"{{"type":"exposure","experiment":"checkout-copy","variant":"short-copy","unit":"s{i}",{t}}}"#));
    }
    for i in 0..3 {
        lines.push(format!(r#"{{"type":"conversion","experiment":"checkout-copy","metric":"purchase","unit":"c{i}",{t}}}"#));
    }
    lines.push(format!(r#"{{"type":"defect","experiment":"checkout-copy","metric":"payment-error","unit":"c1","count":2,{t}}}"#));
    let (status, _) = service.post("/v1/events", lines.join("\n"));
    assert_eq!(status, 200);
    let (status, doc) = service.get("/v1/experiments/checkout-copy");
    assert_eq!(status, 200);
    let control = &doc["metrics"][0]["variants"][0];
    // Beta(1,1) prior + 3/10 → Beta(4, 8): mean 1/3 (conjugate update, BDA3 §2.4).
    assert_eq!(control["posterior"]["alpha"], 4.0);
    assert_eq!(control["posterior"]["beta"], 8.0);
    assert!((control["mean"].as_f64().unwrap() - 1.0 / 3.0).abs() < 1e-12);
    // scipy.stats.beta.ppf([0.025, 0.975], 4, 8) = 0.1092634, 0.6097426 (scipy 1.17).
    let lower = control["interval"]["lower"].as_f64().unwrap();
    let upper = control["interval"]["upper"].as_f64().unwrap();
    assert!((lower - 0.1092634).abs() < 1e-6, "{lower}");
    assert!((upper - 0.6097426).abs() < 1e-6, "{upper}");
    assert_eq!(control["interval"]["level"], 0.95);
    let defect = &doc["metrics"][1];
    assert_eq!(defect["kind"], "defect_rate");
    assert_eq!(defect["exposure"], "units");
    // Gamma(1,1) prior + 2 defects over 10 units → Gamma(3, 11).
    assert_eq!(defect["variants"][0]["posterior"]["shape"], 3.0);
    assert_eq!(defect["variants"][0]["posterior"]["rate"], 11.0);
    assert_eq!(doc["variants"][0]["units"], 10);
    assert!(doc["sample_ratio"]["p_value"].as_f64().unwrap() > 0.99);
    assert!(doc["caution"].as_str().unwrap().contains("model"));
    // Control has no comparison with itself; the variant does.
    assert_eq!(control["prob_better_than_control"], Value::Null);
    let variant = &doc["metrics"][0]["variants"][1];
    let p = variant["prob_better_than_control"].as_f64().unwrap();
    assert!(p > 0.0 && p < 0.1, "{p}");
    let (status, list) = service.get("/v1/experiments");
    assert_eq!(status, 200);
    let ids: Vec<&str> = list["experiments"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["id"].as_str().unwrap())
        .collect();
    assert_eq!(ids, vec!["checkout-copy", "jar-sensor"]);
    assert_eq!(list["experiments"][0]["units"], 20);
}

#[test]
fn health_readiness_and_metrics() {
    let service = Service::start(&config());
    let (status, body) = service.get("/healthz");
    assert_eq!((status, body["status"].as_str()), (200, Some("ok")));
    let (status, body) = service.get("/readyz");
    assert_eq!(status, 200);
    assert_eq!(body["checks"]["kafka"], "not configured");
    let (status, text) = service.get_text("/metrics");
    assert_eq!(status, 200);
    assert!(text.contains("# TYPE posteriord_events_total counter"));
    assert!(text.contains(r#"posteriord_events_total{outcome="applied",source="http"} 0"#));
}

#[test]
fn sigterm_drains_and_exits_zero() {
    let mut service = Service::start(&config());
    let (status, _) = service.get("/healthz");
    assert_eq!(status, 200);
    let exit = service.terminate(Duration::from_secs(20));
    assert!(exit.success(), "{exit:?}\n{}", service.log_text());
    assert!(
        service.log_text().contains("all tasks stopped"),
        "{}",
        service.log_text()
    );
}

#[test]
fn accepted_events_survive_a_sigkill() {
    // A long snapshot interval, so only the write-ahead log can carry the events over.
    let config = format!("[http]\naddr = \"127.0.0.1:0\"\n[store]\nsnapshot_interval_ms = 3600000\n{TEST_EXPERIMENTS}");
    let state = tempfile::tempdir().unwrap();
    let w = workload(81, 3_000);
    let (first, second) = w.lines.split_at(1_500);
    let mut service = Service::start_in(&config, Some(state.path()), &[]);
    for chunk in first.chunks(300) {
        assert_eq!(service.post("/v1/events", chunk.join("\n")).0, 200);
    }
    common::signal(service.child.id(), "KILL");
    common::wait_exit(&mut service.child, Duration::from_secs(10)).expect("killed");
    // Restart, add the rest, kill again, restart: every accepted event counted once.
    let mut service = Service::start_in(&config, Some(state.path()), &[]);
    for chunk in second.chunks(300) {
        assert_eq!(service.post("/v1/events", chunk.join("\n")).0, 200);
    }
    common::signal(service.child.id(), "KILL");
    common::wait_exit(&mut service.child, Duration::from_secs(10)).expect("killed");
    let service = Service::start_in(&config, Some(state.path()), &[]);
    common::assert_exact(&service, &w.expected);
    assert!(
        service
            .log_text()
            .contains("replayed events posted over HTTP"),
        "{}",
        service.log_text()
    );
}
