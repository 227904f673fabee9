//! Scale-out against a real broker: three instances in one consumer group split the
//! partitions; the one holding data is SIGKILLed mid-stream and a replacement with an empty
//! state directory (another machine, as far as state goes) joins. Partition state moves through
//! the compacted changelog topic; every instance's API must then report the exact totals of
//! all experiments, checked against the independent ground truth.
//!
//! On Apache Kafka a dead member's partitions move to the survivors at its session timeout;
//! the replacement then joins in a further rebalance. A second test restarts an instance with
//! a static `group.instance.id` within the session timeout: it gets its partitions back and
//! the other members keep theirs, with no rebalance.

mod common;

use std::time::Duration;

use common::kafka::{brokers, produce, service_config, unique};
use common::{
    observed, seen, signal, wait_exit, wait_for, workload, Service, SPECS, TEST_EXPERIMENTS,
};

fn kafka_events_applied(s: &Service) -> u64 {
    s.metric_sum("posteriord_events_total", r#"source="kafka""#)
}

/// How many partitions the instances have restored from the changelog so far.
fn restores(instances: &[Service]) -> usize {
    instances
        .iter()
        .map(|s| s.log_text().matches("restored from the changelog").count())
        .sum()
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
    let config = service_config(&brokers, &topic, &group, 6000, TEST_EXPERIMENTS);
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
    // Instances joining one by one already moved partitions through the changelog; count
    // those restores so the wait below sees only the moves the kill causes.
    let restores_before_kill = restores(&instances);
    let killed_at = std::time::Instant::now();
    signal(dead.child.id(), "KILL");
    wait_exit(&mut dead.child, Duration::from_secs(10)).expect("killed");
    // Apache Kafka hands the dead member's partitions to the survivors once its session
    // times out (6 s here, generous so that heartbeats delayed by a loaded machine do not
    // expire live members); the survivors restore them from the changelog.
    wait_for(
        Duration::from_secs(60),
        "the survivors to take over the dead member's partitions",
        || (restores(&instances) > restores_before_kill).then_some(()),
    );
    eprintln!("partitions moved {:?} after the kill", killed_at.elapsed());
    instances.push(Service::start_in(&config, Some(&dirs[3]), &[]));
    producer.join().unwrap();
    let complete =
        |instances: &[Service]| instances.iter().all(|s| total(s) >= w.lines.len() as u64);
    let waited = std::time::Instant::now();
    while !complete(&instances) {
        if waited.elapsed() > Duration::from_secs(120) {
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

/// The partitions an instance holds now, read from its log: each rebalance revokes all of a
/// member's partitions (librdkafka's default, eager assignment) and assigns a new set.
fn held(s: &Service) -> std::collections::BTreeSet<String> {
    let mut now = std::collections::BTreeSet::new();
    for line in s.log_text().lines() {
        if line.contains("partitions revoked") {
            now.clear();
        } else if line.contains("partition assigned and restored") {
            let field = |name: &str| {
                let rest = line.split(&format!("{name}=")).nth(1)?;
                Some(
                    rest.split_whitespace()
                        .next()?
                        .trim_matches('"')
                        .to_string(),
                )
            };
            if let (Some(t), Some(p)) = (field("topic"), field("partition")) {
                now.insert(format!("{t}/{p}"));
            }
        }
    }
    now
}

/// Lines of an instance's log that show a rebalance reaching it.
fn rebalance_lines(s: &Service) -> usize {
    s.log_text()
        .lines()
        .filter(|l| l.contains("partitions revoked") || l.contains("partition assigned"))
        .count()
}

#[test]
fn a_static_member_restarted_within_its_session_timeout_gets_its_partitions_back_alone() {
    let brokers = brokers();
    let topic = unique("static-events");
    let group = unique("static-group");
    let scratch = tempfile::tempdir().unwrap();
    let w = workload(67, 12_000);
    let (first, second) = w.lines.split_at(6_000);
    assert_eq!(
        produce(&brokers, &topic, 6, first, scratch.path()),
        first.len()
    );
    // A session timeout far longer than the restart takes: Apache Kafka keeps a static
    // member's assignment for it until then, without a rebalance of the others.
    let config = service_config(&brokers, &topic, &group, 30_000, TEST_EXPERIMENTS);
    let dirs: Vec<_> = (0..3)
        .map(|i| scratch.path().join(format!("state-{i}")))
        .collect();
    let start = |i: usize| {
        let id = format!("{group}-member-{i}");
        Service::start_in(
            &config,
            Some(&dirs[i]),
            &[("POSTERIORD_KAFKA_PROP_GROUP_INSTANCE_ID", id.as_str())],
        )
    };
    let mut instances: Vec<Service> = (0..3).map(start).collect();
    wait_for(
        Duration::from_secs(120),
        "the first half to be consumed",
        || {
            let applied: u64 = instances.iter().map(kafka_events_applied).sum();
            (applied >= first.len() as u64).then_some(())
        },
    );
    // Let the group settle: all three members joined, the six partitions split between them.
    wait_for(
        Duration::from_secs(90),
        "the six partitions to be split between the three instances",
        || {
            let held: Vec<usize> = instances.iter().map(|s| held(s).len()).collect();
            (held.iter().sum::<usize>() == 6 && held.iter().all(|&n| n > 0)).then_some(())
        },
    );
    let victim = 1;
    let before = held(&instances[victim]);
    assert!(
        !before.is_empty(),
        "instance {victim} holds no partition:\n{}",
        instances[victim].log_text()
    );
    let others_before: Vec<usize> = [0, 2]
        .iter()
        .map(|&i| rebalance_lines(&instances[i]))
        .collect();
    let mut dead = instances.remove(victim);
    signal(dead.child.id(), "KILL");
    wait_exit(&mut dead.child, Duration::from_secs(10)).expect("killed");
    let restarted = start(victim);
    wait_for(
        Duration::from_secs(25),
        "the restarted static member to get partitions back",
        || (!held(&restarted).is_empty()).then_some(()),
    );
    instances.insert(victim, restarted);
    let producer = produce(&brokers, &topic, 6, second, scratch.path());
    assert_eq!(producer, second.len());
    wait_for(
        Duration::from_secs(120),
        "every event to be counted",
        || {
            instances
                .iter()
                .all(|s| common::total_seen(s) >= w.lines.len() as u64)
                .then_some(())
        },
    );
    let now = held(&instances[victim]);
    assert_eq!(
        now, before,
        "the restarted static member should hold what it held before the kill"
    );
    for (k, &i) in [0usize, 2].iter().enumerate() {
        assert_eq!(
            rebalance_lines(&instances[i]),
            others_before[k],
            "instance {i} saw a rebalance although the restarted member was static:\n{}",
            instances[i].log_text()
        );
    }
    for (i, s) in instances.iter().enumerate() {
        for (spec, expected) in SPECS.iter().zip(&w.expected) {
            assert_eq!(
                &observed(s, spec),
                expected,
                "instance {i}, experiment {}",
                spec.id
            );
        }
    }
}
