//! End-to-end through a real Kafka-protocol broker on loopback (started by tests/run.sh):
//! events produced by an independent client (Python confluent-kafka, tests/tools/produce.py)
//! are consumed by `posteriord serve` and counted exactly; offsets are committed after apply.

mod common;

use std::path::Path;
use std::process::Command;
use std::time::{Duration, SystemTime, UNIX_EPOCH};

use common::{observed, seen, wait_for, workload, Service, SPECS, TEST_EXPERIMENTS};

fn brokers() -> String {
    std::env::var("POSTERIORD_TEST_BROKERS").unwrap_or_else(|_| {
        panic!(
            "POSTERIORD_TEST_BROKERS is not set: run the suite with tests/run.sh, which starts a \
             Kafka-protocol broker on loopback and sets it"
        )
    })
}

fn unique(prefix: &str) -> String {
    let nanos = SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .unwrap()
        .as_nanos();
    format!("{prefix}-{}-{nanos}", std::process::id())
}

/// Produce `lines` with the independent client; returns how many it delivered.
fn produce(brokers: &str, topic: &str, lines: &[String], dir: &Path) -> usize {
    let file = dir.join(format!("{topic}.ndjson"));
    std::fs::write(&file, lines.join("\n") + "\n").unwrap();
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/tools/produce.py");
    let out = Command::new("python3")
        .arg(script)
        .args(["--brokers", brokers, "--topic", topic, "--partitions", "3"])
        .arg(&file)
        .output()
        .expect("run python3 tests/tools/produce.py (confluent-kafka)");
    assert!(
        out.status.success(),
        "independent producer failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8_lossy(&out.stdout).trim().parse().unwrap()
}

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

fn total_seen(service: &Service) -> u64 {
    SPECS.iter().map(|s| seen(service, s)).sum()
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
        produce(&brokers, &topic, &lines, scratch.path()),
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
    let rejected: u64 = text
        .lines()
        .filter(|l| {
            l.starts_with("posteriord_events_rejected_total{") && l.contains("source=\"kafka\"")
        })
        .map(|l| l.rsplit(' ').next().unwrap().parse::<u64>().unwrap())
        .sum();
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
        produce(&brokers, &topic, second, scratch.path()),
        second.len()
    );
    let service = Service::start_in(&config, Some(&state), &[]);
    wait_for(Duration::from_secs(120), "all events to be counted", || {
        (total_seen(&service) >= w.lines.len() as u64).then_some(())
    });
    // Give a wrong re-read of old offsets time to show up before the final check.
    std::thread::sleep(Duration::from_secs(2));
    for (spec, expected) in SPECS.iter().zip(&w.expected) {
        assert_eq!(
            &observed(&service, spec),
            expected,
            "experiment {}",
            spec.id
        );
    }
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
