//! End-to-end through a real Kafka-protocol broker on loopback (started by tests/run.sh):
//! events produced by an independent client (Python confluent-kafka, tests/tools/produce.py)
//! are consumed by `posteriord serve` and counted exactly; offsets are committed after apply.

mod common;

use std::time::Duration;

use common::kafka::{brokers, consume, produce, unique};
use common::{seen, total_seen, wait_for, workload, Service, SPECS, TEST_EXPERIMENTS};

fn kafka_config(brokers: &str, topic: &str, group: &str) -> String {
    format!(
        r#"[http]
addr = "127.0.0.1:0"
[kafka]
brokers = "{brokers}"
topics = ["{topic}"]
group = "{group}"
[kafka.properties]
"session.timeout.ms" = 6000
"heartbeat.interval.ms" = 1000
{TEST_EXPERIMENTS}"#
    )
}

#[test]
fn events_from_an_independent_producer_are_counted_exactly() {
    let brokers = brokers();
    let topic = unique("exp-events");
    let group = unique("posteriord");
    let scratch = tempfile::tempdir().unwrap();
    let state = scratch.path().join("state");
    let w = workload(21, 20_300);
    let (first, second) = w.lines.split_at(20_000);
    let poison = [
        "not json at all".to_string(),
        "{\"type\":\"exposure\",\"experiment\":\"checkout-copy\"".to_string(),
        "[1,2,3]".to_string(),
        r#"{"type":"exposure","experiment":"checkout-copy","variant":12,"unit":"u","time":"2026-05-02T10:00:00Z"}"#.to_string(),
    ];
    let mut lines = first.to_vec();
    for (i, p) in poison.iter().enumerate() {
        lines.insert(1_000 * (i + 1), p.clone());
    }
    assert_eq!(
        produce(&brokers, &topic, 3, &lines, scratch.path()),
        lines.len()
    );

    let config = kafka_config(&brokers, &topic, &group);
    let mut service = Service::start_in(&config, Some(&state), &[]);
    // Every valid event ends in exactly one outcome, so the outcomes add up to the count.
    wait_for(
        Duration::from_secs(180),
        "the first 20000 events to be consumed",
        || (total_seen(&service) == first.len() as u64).then_some(()),
    );
    let (_, text) = service.get_text("/metrics");
    let rejected = common::metric_sum_in(
        &text,
        "posteriord_events_rejected_total",
        r#"source="kafka""#,
    );
    assert_eq!(rejected, poison.len() as u64, "{text}");
    assert!(text.contains("posteriord_kafka_reachable 1"), "{text}");
    let (status, ready) = service.get("/readyz");
    assert_eq!(status, 200, "{ready}");
    assert_eq!(ready["checks"]["kafka"], "reachable");

    // A clean stop stores state and offsets together; the next start restores both, so the
    // later events add to the earlier ones exactly once.
    let exit = service.terminate(Duration::from_secs(30));
    assert!(exit.success(), "{exit:?}\n{}", service.log_text());
    assert_eq!(
        produce(&brokers, &topic, 3, second, scratch.path()),
        second.len()
    );
    let service = Service::start_in(&config, Some(&state), &[]);
    wait_for(Duration::from_secs(120), "all events to be counted", || {
        (total_seen(&service) >= w.lines.len() as u64).then_some(())
    });
    // Give a wrong re-read of old offsets time to show up before the final check.
    std::thread::sleep(Duration::from_secs(2));
    common::assert_exact(&service, &w.expected);
}

#[test]
fn readiness_is_false_while_the_broker_is_unreachable() {
    // Nothing listens on this port (bound, then released) so the probe must fail.
    let port = std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port();
    let service = Service::start(&kafka_config(&format!("127.0.0.1:{port}"), "nowhere", "g"));
    let (status, body) = service.get("/readyz");
    assert_eq!(status, 503, "{body}");
    assert_eq!(body["ready"], false);
    assert_eq!(body["checks"]["kafka"], "unreachable");
    // The API keeps answering meanwhile.
    let (status, _) = service.get("/v1/experiments");
    assert_eq!(status, 200);
}

#[test]
fn poison_messages_go_to_the_dead_letter_topic_and_the_consumer_keeps_going() {
    let brokers = brokers();
    let topic = unique("poison-events");
    let dead = unique("poison-dead");
    let scratch = tempfile::tempdir().unwrap();
    let w = workload(51, 2_000);
    let huge = format!(r#"{{"type":"exposure","pad":"{}"}}"#, "x".repeat(70_000));
    let poison = [
        ("not json", "invalid_json"),
        (
            "{\"type\":\"exposure\",\"experiment\":\"checkout-copy\",\"variant\":\"con",
            "invalid_json",
        ),
        ("[\"an\",\"array\"]", "not_an_object"),
        (
            r#"{"type":"exposure","experiment":"checkout-copy","variant":12,"unit":"u","time":"2026-05-02T10:00:00Z"}"#,
            "wrong_type",
        ),
        (
            r#"{"type":"exposure","experiment":"checkout-copy","variant":"teal","unit":"u","time":"2026-05-02T10:00:00Z"}"#,
            "unknown_variant",
        ),
        (huge.as_str(), "too_large"),
    ];
    let mut lines = w.lines.clone();
    for (i, (p, _)) in poison.iter().enumerate() {
        lines.insert(300 * (i + 1), p.to_string());
    }
    assert_eq!(
        produce(&brokers, &topic, 3, &lines, scratch.path()),
        lines.len()
    );
    let config = kafka_config(&brokers, &topic, &unique("poison-group")).replace(
        "[kafka.properties]",
        &format!("dead_letter_topic = \"{dead}\"\n[kafka.properties]"),
    );
    let service = Service::start(&config);
    wait_for(
        Duration::from_secs(120),
        "every valid event to be counted",
        || {
            (SPECS.iter().map(|s| seen(&service, s)).sum::<u64>() == w.lines.len() as u64)
                .then_some(())
        },
    );
    common::assert_exact(&service, &w.expected);
    let letters = consume(&brokers, &dead, poison.len());
    assert_eq!(
        letters.len(),
        poison.len(),
        "dead letters read back\n{}",
        service.log_text()
    );
    // Unkeyed messages spread over partitions, so compare as sorted lists of (reason, length,
    // start of the payload): the payload is kept byte for byte.
    let summary = |reason: &str, value: &str| {
        (
            reason.to_string(),
            value.len(),
            value.chars().take(40).collect::<String>(),
        )
    };
    let mut got: Vec<_> = letters
        .iter()
        .map(|l| {
            summary(
                l["headers"]["posteriord-reason"].as_str().unwrap(),
                l["value"].as_str().unwrap(),
            )
        })
        .collect();
    let mut want: Vec<_> = poison.iter().map(|(p, r)| summary(r, p)).collect();
    got.sort();
    want.sort();
    assert_eq!(got, want);
    for letter in &letters {
        assert!(
            letter["headers"]["posteriord-message"]
                .as_str()
                .unwrap()
                .len()
                > 5
        );
        assert!(letter["headers"]["posteriord-source"]
            .as_str()
            .unwrap()
            .starts_with(&topic));
    }
    let (_, text) = service.get_text("/metrics");
    assert!(
        text.contains(r#"posteriord_dead_letters_total{reason="invalid_json"} 2"#),
        "{text}"
    );
}
