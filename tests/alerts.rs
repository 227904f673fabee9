//! Alert delivery end to end, over real HTTP and a real broker: a webhook receiver that is down
//! at first (a Python http.server checking the Standard Webhooks signatures with the independent
//! verifier from PyPI, `standardwebhooks`), a crash between raising and delivering, and the
//! Kafka alerts topic read back with the independent client (Python confluent-kafka).

mod common;

use std::collections::BTreeSet;
use std::time::Duration;

use common::receiver::{free_port, Receiver};
use common::{signal, wait_exit, wait_for, Service};
use serde_json::Value;

/// A secret as operators often set one: any string, used as the key's raw bytes.
const SECRET: &str = "crumb-and-co-hook-key";
/// A secret in the Standard Webhooks form: `whsec_` and the base64 of the key.
const WHSEC_SECRET: &str = "whsec_UG9ja2V0T3JjaGFyZC1ob29rLWtleS0yNA==";

/// The `whsec_` form a receiver is given for the raw-bytes secret (docs/decisions.md).
fn whsec_of_raw(secret: &str) -> String {
    use base64::Engine;
    format!(
        "whsec_{}",
        base64::engine::general_purpose::STANDARD.encode(secret.as_bytes())
    )
}

fn config(port: u16, extra: &str) -> String {
    format!(
        r#"[http]
addr = "127.0.0.1:0"
{extra}
[alerts]
# Every event of harmful_events() has the same time, so the event count drives evaluation:
# 1512 is their number, so the rules are evaluated once, on all of them.
evaluate_every_secs = 1
evaluate_every_events = 1512
[[alerts.webhook]]
url = "http://127.0.0.1:{port}/hooks/experiments"
secret_env = "CRUMB_HOOK_SECRET"
{}"#,
        common::TEST_EXPERIMENTS
    )
}

/// Events in which `short-copy` converts far worse than `control` (4% against 12%).
fn harmful_events() -> String {
    let t = r#""time":"2026-05-02T10:00:00Z""#;
    let mut lines = Vec::new();
    for i in 0..700 {
        for (arm, rate) in [("control", 12), ("short-copy", 4)] {
            lines.push(format!(r#"{{"type":"exposure","experiment":"checkout-copy","variant":"{arm}","unit":"{arm}-{i}",{t}}}"#));
            if i % 100 < rate {
                lines.push(format!(r#"{{"type":"conversion","experiment":"checkout-copy","metric":"purchase","unit":"{arm}-{i}",{t}}}"#));
            }
        }
    }
    lines.join("\n")
}

fn open_harm_alert(service: &Service) -> String {
    wait_for(Duration::from_secs(20), "an open harm alert", || {
        let (_, list) = service.get("/v1/alerts?experiment=checkout-copy&state=open");
        list["alerts"]
            .as_array()?
            .iter()
            .find(|a| {
                a["rule"] == "harm" && a["metric"] == "purchase" && a["variant"] == "short-copy"
            })
            .map(|a| a["id"].as_str().unwrap().to_string())
    })
}

fn event_ids(records: &[Value]) -> BTreeSet<String> {
    records
        .iter()
        .map(|r| r["event"]["id"].as_str().unwrap().to_string())
        .collect()
}

const ENV: [(&str, &str); 1] = [("CRUMB_HOOK_SECRET", SECRET)];
const ENV_WHSEC: [(&str, &str); 1] = [("CRUMB_HOOK_SECRET", WHSEC_SECRET)];

#[test]
fn alerts_reach_a_receiver_that_was_down_signed_and_once_per_id() {
    let dir = tempfile::tempdir().unwrap();
    let port = free_port();
    let service = Service::start_in(&config(port, ""), Some(&dir.path().join("state")), &ENV);
    assert_eq!(service.post("/v1/events", harmful_events()).0, 200);
    let id = open_harm_alert(&service);
    // The receiver is down: deliveries fail and are retried.
    wait_for(Duration::from_secs(20), "failed delivery attempts", || {
        let (_, text) = service.get_text("/metrics");
        text.lines()
            .any(|l| {
                l.starts_with(r#"posteriord_alert_deliveries_total{result="error",sink="webhook"}"#)
                    && !l.ends_with(" 0")
            })
            .then_some(())
    });
    let receiver = Receiver::start(port, dir.path(), &whsec_of_raw(SECRET));
    wait_for(Duration::from_secs(90), "the alert to be delivered", || {
        (!receiver.records().is_empty()).then_some(())
    });
    // Later evaluations and retries must not deliver it again under another id.
    std::thread::sleep(Duration::from_secs(3));
    let records = receiver.records();
    // The independent verifier accepts every delivery and refuses it under another key.
    assert!(
        records
            .iter()
            .all(|r| r["valid"] == true && r["valid_with_other_secret"] == false),
        "signatures verified by PyPI standardwebhooks: {records:?}"
    );
    assert_eq!(
        event_ids(&records),
        BTreeSet::from([format!("{id}.opened")])
    );
    let r = &records[0];
    assert_eq!(r["webhook_id"], format!("{id}.opened"));
    assert!(r["webhook_signature"].as_str().unwrap().starts_with("v1,"));
    let sent: i64 = r["webhook_timestamp"].as_str().unwrap().parse().unwrap();
    let now = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .unwrap()
        .as_secs() as i64;
    assert!(
        (now - sent).abs() < 120,
        "timestamp {sent} is the attempt's, now {now}"
    );
    assert_eq!(r["path"], "/hooks/experiments");
    assert!(r["content_type"]
        .as_str()
        .unwrap()
        .starts_with("application/cloudevents+json"));
    // CloudEvents 1.0 required attributes, and our data.
    let e = &r["event"];
    assert_eq!(e["specversion"], "1.0");
    assert_eq!(e["type"], "posteriord.alert.opened");
    assert!(e["source"].as_str().is_some_and(|s| !s.is_empty()));
    assert_eq!(e["data"]["rule"], "harm");
    assert_eq!(e["data"]["experiment"], "checkout-copy");
    assert!(e["data"]["value"].as_f64().unwrap() >= e["data"]["threshold"].as_f64().unwrap());
    assert!(e["data"]["caution"].as_str().unwrap().contains("model"));
    // The evidence: both arms' posteriors (Beta(1,1) prior + counts) and units, and the time.
    let arms = e["data"]["evidence"]["arms"].as_array().unwrap();
    assert_eq!(arms.len(), 2);
    assert_eq!(arms[0]["variant"], "control");
    assert_eq!(arms[0]["units"], 700);
    assert_eq!(
        arms[0]["posterior"],
        serde_json::json!({"alpha": 85.0, "beta": 617.0})
    );
    assert_eq!(
        arms[1]["posterior"],
        serde_json::json!({"alpha": 29.0, "beta": 673.0})
    );
    assert_eq!(e["data"]["evidence"]["event_time"], "2026-05-02T10:00:00Z");
    // Acknowledging is recorded.
    let (status, acked) = service.post(&format!("/v1/alerts/{id}/ack"), "");
    assert_eq!(status, 200, "{acked}");
    assert!(acked["acknowledged_at"].is_string());
    assert_eq!(service.post("/v1/alerts/nope/ack", "").0, 404);
}

#[test]
fn an_alert_raised_before_a_crash_is_delivered_after_restart_with_the_same_id() {
    let dir = tempfile::tempdir().unwrap();
    let state = dir.path().join("state");
    let port = free_port();
    let mut service = Service::start_in(&config(port, ""), Some(&state), &ENV_WHSEC);
    assert_eq!(service.post("/v1/events", harmful_events()).0, 200);
    let id = open_harm_alert(&service);
    signal(service.child.id(), "KILL");
    wait_exit(&mut service.child, Duration::from_secs(10)).expect("killed");
    // This time the secret is given in the Standard Webhooks form, as the receiver holds it.
    let receiver = Receiver::start(port, dir.path(), WHSEC_SECRET);
    let service = Service::start_in(&config(port, ""), Some(&state), &ENV_WHSEC);
    wait_for(
        Duration::from_secs(60),
        "the alert to be delivered after the restart",
        || (!receiver.records().is_empty()).then_some(()),
    );
    assert!(
        receiver.records().iter().all(|r| r["valid"] == true),
        "signatures verified by PyPI standardwebhooks: {:?}",
        receiver.records()
    );
    // Evaluations after the restart see the restored alert: no second alert, no new id.
    std::thread::sleep(Duration::from_secs(4));
    assert_eq!(
        event_ids(&receiver.records()),
        BTreeSet::from([format!("{id}.opened")])
    );
    assert_eq!(open_harm_alert(&service), id);
}

#[test]
fn alerts_are_published_to_the_kafka_topic() {
    let brokers = std::env::var("POSTERIORD_TEST_BROKERS")
        .expect("POSTERIORD_TEST_BROKERS is not set: run the suite with tests/run.sh");
    let dir = tempfile::tempdir().unwrap();
    let nanos = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .unwrap()
        .as_nanos();
    let topic = format!("experiment-alerts-{nanos}");
    let kafka = format!(
        "[kafka]\nbrokers = \"{brokers}\"\ntopics = [\"alerts-test-input-{nanos}\"]\ngroup = \"alerts-{nanos}\"\n"
    );
    let cfg = config(free_port(), &kafka).replace(
        "[[alerts.webhook]]",
        &format!("[alerts.kafka]\ntopic = \"{topic}\"\n[[alerts.webhook]]"),
    );
    let service = Service::start_in(&cfg, Some(&dir.path().join("state")), &ENV);
    assert_eq!(service.post("/v1/events", harmful_events()).0, 200);
    let id = open_harm_alert(&service);
    let messages = common::kafka::consume(&brokers, &topic, 1);
    let message = messages.first().expect("one alert message");
    assert_eq!(message["key"], "checkout-copy");
    assert_eq!(message["headers"]["ce_id"], format!("{id}.opened"));
    let event: Value = serde_json::from_str(message["value"].as_str().unwrap()).unwrap();
    assert_eq!(event["id"], format!("{id}.opened"));
    assert_eq!(event["data"]["rule"], "harm");
}
