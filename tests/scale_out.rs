//! Scale-out against a real broker: three instances in one consumer group split the
//! partitions; the one holding data is SIGKILLed mid-stream and a replacement with an empty
//! state directory (another machine, as far as state goes) joins. Partition state moves through
//! the compacted changelog topic; every instance's API must then report the exact totals of
//! all experiments, checked against the independent ground truth.
//!
//! Broker note: on the test broker a dead member's partitions move at the next membership
//! change after its session timeout, so the test waits past the timeout and then starts the
//! replacement; a Kafka cluster moves them at the timeout itself.

mod common;

use std::time::Duration;

use common::kafka::{brokers, produce, unique};
use common::{
    observed, seen, signal, wait_exit, wait_for, workload, Service, SPECS, TEST_EXPERIMENTS,
};

fn kafka_events_applied(s: &Service) -> u64 {
    s.metric_sum("posteriord_events_total", r#"source="kafka""#)
}

#[test]
fn a_killed_instance_s_partitions_move_with_their_exact_state() {
    let brokers = brokers();
    let topic = unique("scale-events");
    let group = unique("scale-group");
    let scratch = tempfile::tempdir().unwrap();
    let w = workload(61, 40_000);
    let (first, second) = w.lines.split_at(20_000);
    assert_eq!(
        produce(&brokers, &topic, 6, first, scratch.path()),
        first.len()
    );
    let config = format!(
        r#"[http]
addr = "127.0.0.1:0"
[store]
snapshot_interval_ms = 300
[kafka]
brokers = "{brokers}"
topics = ["{topic}"]
group = "{group}"
changelog_interval_ms = 300
[kafka.properties]
"session.timeout.ms" = 6000
"heartbeat.interval.ms" = 1000
{TEST_EXPERIMENTS}"#
    );
    let dirs: Vec<_> = (0..4)
        .map(|i| scratch.path().join(format!("state-{i}")))
        .collect();
    let mut instances: Vec<Service> = (0..3)
        .map(|i| Service::start_in(&config, Some(&dirs[i]), &[]))
        .collect();
    let total = |s: &Service| -> u64 { SPECS.iter().map(|spec| seen(s, spec)).sum() };
    wait_for(
        Duration::from_secs(120),
        "the first half to be consumed",
        || {
            let applied: u64 = instances.iter().map(kafka_events_applied).sum();
            (applied >= first.len() as u64).then_some(())
        },
    );
    // Kill the instance that holds the most data, while the second half streams in.
    let victim = (0..3)
        .max_by_key(|&i| kafka_events_applied(&instances[i]))
        .unwrap();
    let producer = {
        let brokers = brokers.clone();
        let topic = topic.clone();
        let lines = second.to_vec();
        let dir = scratch.path().to_path_buf();
        std::thread::spawn(move || produce(&brokers, &topic, 6, &lines, &dir))
    };
    std::thread::sleep(Duration::from_millis(800));
    let mut dead = instances.remove(victim);
    signal(dead.child.id(), "KILL");
    wait_exit(&mut dead.child, Duration::from_secs(10)).expect("killed");
    // Twice the session timeout, so the broker has expired the dead member before the
    // replacement joins (see the broker note at the top). The timeout itself is generous so
    // that heartbeats delayed by a loaded machine do not expire live members.
    std::thread::sleep(Duration::from_millis(12_000));
    instances.push(Service::start_in(&config, Some(&dirs[3]), &[]));
    producer.join().unwrap();
    let complete =
        |instances: &[Service]| instances.iter().all(|s| total(s) >= w.lines.len() as u64);
    let mut waited = std::time::Instant::now();
    // Nudges, if started, stay members until the end: killing one would move partitions again.
    let mut nudges = Vec::new();
    while !complete(&instances) {
        // If the broker still holds partitions for the dead member (its expiry came after
        // the replacement joined), another membership change moves them.
        if nudges.len() < 3 && waited.elapsed() > Duration::from_secs(40) {
            eprintln!(
                "partitions did not move yet; starting one more member to trigger a rebalance"
            );
            let dir = scratch.path().join(format!("state-nudge-{}", nudges.len()));
            nudges.push(Service::start_in(&config, Some(&dir), &[]));
            waited = std::time::Instant::now();
        }
        if nudges.len() == 3 && waited.elapsed() > Duration::from_secs(60) {
            for (i, s) in instances.iter().enumerate() {
                let log = s.log_text();
                let moves: Vec<&str> = log
                    .lines()
                    .filter(|l| {
                        l.contains("assigned")
                            || l.contains("revoked")
                            || l.contains("restored")
                            || l.contains("changelog")
                    })
                    .collect();
                eprintln!(
                    "instance {i}: seen {} of {}\n{}",
                    total(s),
                    w.lines.len(),
                    moves.join("\n")
                );
            }
            panic!("instances did not see every event");
        }
        std::thread::sleep(Duration::from_millis(500));
    }
    std::thread::sleep(Duration::from_secs(2));
    // The killed instance's data moved through the changelog, not by re-reading the topic.
    assert!(
        instances
            .iter()
            .any(|s| s.log_text().contains("restored from the changelog")),
        "no instance restored a partition from the changelog"
    );
    for (i, s) in instances.iter().enumerate() {
        for (spec, expected) in SPECS.iter().zip(&w.expected) {
            assert_eq!(
                &observed(s, spec),
                expected,
                "instance {i}, experiment {}\n{}",
                spec.id,
                s.log_text()
                    .lines()
                    .rev()
                    .take(30)
                    .collect::<Vec<_>>()
                    .join("\n")
            );
        }
    }
}
