//! Crash and outage tests against a real broker: the service is SIGKILLed at random moments
//! while an independent client (Python confluent-kafka) produces events, or its broker is
//! stopped and restarted; afterwards the API's counts must equal the ground truth computed
//! independently from the produced events — exactly.
//!
//! `POSTERIORD_SOAK=1` raises the crash loop to 1M events and 40 kills.

mod common;

use std::path::PathBuf;
use std::time::{Duration, Instant};

use common::kafka::{brokers, spawn_producer, unique, Cluster};
use common::{signal, total_seen, wait_exit, wait_for, workload, Service, TEST_EXPERIMENTS};
use rand::{Rng, SeedableRng};

fn soak() -> bool {
    std::env::var("POSTERIORD_SOAK").is_ok_and(|v| v == "1")
}

fn config(brokers: &str, topic: &str, group: &str) -> String {
    // A short session timeout lets a replacement take over soon after a kill; frequent
    // snapshots make kills land between, during and right after saves.
    format!(
        r#"[http]
addr = "127.0.0.1:0"
[store]
snapshot_interval_ms = 250
[kafka]
brokers = "{brokers}"
topics = ["{topic}"]
group = "{group}"
[kafka.properties]
"session.timeout.ms" = 3000
"heartbeat.interval.ms" = 500
{TEST_EXPERIMENTS}"#
    )
}

#[test]
fn sigkill_at_random_moments_loses_and_doubles_nothing() {
    let brokers = brokers();
    let (n_events, n_kills) = if soak() {
        (1_000_000, 40)
    } else {
        (100_000, 20)
    };
    let topic = unique("crash-events");
    let group = unique("crash-group");
    let scratch = tempfile::tempdir().unwrap();
    let state: PathBuf = scratch.path().join("state");
    let w = workload(31, n_events);
    let producer = spawn_producer(&brokers, &topic, 4, &w.lines, scratch.path());
    let cfg = config(&brokers, &topic, &group);
    let mut rng = rand::rngs::StdRng::seed_from_u64(99);
    let started = Instant::now();
    for kill in 0..n_kills {
        let mut service = Service::start_in(&cfg, Some(&state), &[]);
        std::thread::sleep(Duration::from_millis(rng.random_range(300..2_000)));
        signal(service.child.id(), "KILL");
        let status =
            wait_exit(&mut service.child, Duration::from_secs(10)).expect("killed process exits");
        assert!(!status.success(), "kill {kill}: the process was not killed");
        // Past the dead member's session timeout, so each life of the service gets its
        // partitions and consumes some events before the next kill.
        std::thread::sleep(Duration::from_millis(3_500));
    }
    let out = producer.wait_with_output().unwrap();
    assert!(
        out.status.success(),
        "producer failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let delivered: usize = String::from_utf8_lossy(&out.stdout).trim().parse().unwrap();
    assert_eq!(delivered, w.lines.len());
    let service = Service::start_in(&cfg, Some(&state), &[]);
    wait_for(
        Duration::from_secs(300),
        "every event to be counted",
        || (total_seen(&service) >= w.lines.len() as u64).then_some(()),
    );
    std::thread::sleep(Duration::from_secs(2));
    common::assert_exact(&service, &w.expected);
    eprintln!(
        "crash loop: {n_events} events, {n_kills} SIGKILLs, exact after {:?}",
        started.elapsed()
    );
}

#[test]
fn a_broker_outage_leaves_the_service_up_and_resumes_exactly() {
    let scratch = tempfile::tempdir().unwrap();
    // A private one-node Apache Kafka (tests/kafka/broker.sh) that the test can stop.
    let broker = Cluster::start(1);
    let topic = unique("outage-events");
    let w = workload(41, 10_000);
    let (first, second) = w.lines.split_at(5_000);
    let mut p = spawn_producer(broker.brokers(), &topic, 4, first, scratch.path());
    assert!(p.wait().unwrap().success());
    let cfg = config(broker.brokers(), &topic, "outage-group");
    let service = Service::start_in(&cfg, Some(&scratch.path().join("state")), &[]);
    wait_for(
        Duration::from_secs(120),
        "the first half to be counted",
        || (total_seen(&service) == first.len() as u64).then_some(()),
    );
    let outage = Duration::from_secs(if soak() { 60 } else { 30 });
    broker.stop_all();
    let down_at = Instant::now();
    wait_for(Duration::from_secs(20), "readiness to turn false", || {
        let (status, body) = service.get("/readyz");
        (status == 503 && body["checks"]["kafka"] == "unreachable").then_some(())
    });
    // The API keeps answering during the outage.
    let (status, _) = service.get("/v1/experiments/checkout-copy");
    assert_eq!(status, 200);
    std::thread::sleep(outage.saturating_sub(down_at.elapsed()));
    broker.start_all();
    wait_for(Duration::from_secs(60), "readiness to return", || {
        (service.get("/readyz").0 == 200).then_some(())
    });
    let mut p = spawn_producer(broker.brokers(), &topic, 4, second, scratch.path());
    assert!(p.wait().unwrap().success());
    wait_for(
        Duration::from_secs(180),
        "the second half to be counted",
        || (total_seen(&service) >= w.lines.len() as u64).then_some(()),
    );
    std::thread::sleep(Duration::from_secs(1));
    common::assert_exact(&service, &w.expected);
}
