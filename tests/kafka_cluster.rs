//! A three-broker Apache Kafka cluster (KRaft, from tests/kafka/broker.sh) loses a broker to
//! SIGKILL while posteriord consumes, publishes its changelog and publishes alerts; the broker
//! comes back later. Topics are replicated three times (the cluster's default). Afterwards the
//! API's totals equal the ground truth computed independently from the produced events, and
//! the alerts topic, read with the independent client (Python confluent-kafka), holds every
//! alert change exactly once.

mod common;

use std::collections::BTreeMap;
use std::time::Duration;

use common::kafka::{consume_within, produce, service_config, unique, Cluster};
use common::{total_seen, wait_for, workload, Service, TEST_EXPERIMENTS};
use serde_json::Value;

/// An invented experiment of a fictional ferry operator: a new boarding screen that makes
/// fewer riders finish their booking (4% against 12%), so a harm alert must open.
const FERRY_EXPERIMENT: &str = r#"
[[experiment]]
id = "ferry-boarding"
control = "classic"
variants = [ { name = "classic" }, { name = "swipe" } ]
[[experiment.metric]]
name = "booked"
kind = "conversion"
"#;

/// Exposures and bookings of the ferry experiment: 700 riders per arm, all at one event time
/// (so the event count drives evaluation).
fn ferry_events() -> (Vec<String>, [u64; 2]) {
    let t = r#""time":"2026-08-14T07:30:00Z""#;
    let mut lines = Vec::new();
    let mut booked = [0u64; 2];
    for i in 0..700 {
        for (arm_idx, (arm, rate)) in [("classic", 12), ("swipe", 4)].into_iter().enumerate() {
            lines.push(format!(
                r#"{{"type":"exposure","experiment":"ferry-boarding","variant":"{arm}","unit":"rider-{arm}-{i}",{t}}}"#
            ));
            if i % 100 < rate {
                booked[arm_idx] += 1;
                lines.push(format!(
                    r#"{{"type":"conversion","experiment":"ferry-boarding","metric":"booked","unit":"rider-{arm}-{i}",{t}}}"#
                ));
            }
        }
    }
    (lines, booked)
}

#[test]
fn a_broker_killed_and_restarted_loses_and_repeats_nothing() {
    let cluster = Cluster::start(3);
    let brokers = cluster.brokers().to_string();
    let topic = unique("cluster-events");
    let group = unique("cluster-group");
    let alerts = unique("cluster-alerts");
    let scratch = tempfile::tempdir().unwrap();
    let w = workload(73, 30_000);
    let (first, second) = w.lines.split_at(15_000);
    assert_eq!(
        produce(&brokers, &topic, 4, first, scratch.path()),
        first.len()
    );
    let config = service_config(
        &brokers,
        &topic,
        &group,
        10_000,
        &format!(
            r#"[alerts]
evaluate_every_secs = 1
evaluate_every_events = 200
[alerts.kafka]
topic = "{alerts}"
{TEST_EXPERIMENTS}{FERRY_EXPERIMENT}"#
        ),
    );
    let service = Service::start_in(&config, Some(&scratch.path().join("state")), &[]);
    wait_for(
        Duration::from_secs(120),
        "the first half to be counted",
        || (total_seen(&service) >= first.len() as u64).then_some(()),
    );
    // The second half streams in while broker 2 is dead; the ferry events at its end raise
    // the harm alert, published while the cluster runs on two brokers.
    let (ferry, booked) = ferry_events();
    let mut rest: Vec<String> = second.to_vec();
    rest.extend(ferry.iter().cloned());
    let producer = {
        let brokers = brokers.clone();
        let topic = topic.clone();
        let dir = scratch.path().to_path_buf();
        std::thread::spawn(move || produce(&brokers, &topic, 4, &rest, &dir))
    };
    std::thread::sleep(Duration::from_millis(500));
    cluster.kill(2);
    let open_alert = wait_for(
        Duration::from_secs(120),
        "the ferry harm alert to open while broker 2 is down",
        || {
            let (_, list) = service.get("/v1/alerts?experiment=ferry-boarding&state=open");
            list["alerts"]
                .as_array()?
                .iter()
                .find(|a| a["rule"] == "harm")
                .map(|a| a["id"].as_str().unwrap().to_string())
        },
    );
    std::thread::sleep(Duration::from_secs(3));
    cluster.restart(2);
    assert_eq!(
        producer.join().unwrap(),
        second.len() + ferry.len(),
        "the independent producer delivered everything"
    );
    wait_for(
        Duration::from_secs(180),
        "every event to be counted",
        || (total_seen(&service) >= w.lines.len() as u64).then_some(()),
    );
    std::thread::sleep(Duration::from_secs(2));
    common::assert_exact(&service, &w.expected);
    let (_, doc) = service.get("/v1/experiments/ferry-boarding");
    let booked_metric = doc["metrics"]
        .as_array()
        .unwrap()
        .iter()
        .find(|m| m["name"] == "booked")
        .unwrap_or_else(|| panic!("metric booked in {doc}"));
    // Variants are listed in the configured order: classic, swipe.
    for (i, arm) in ["classic", "swipe"].iter().enumerate() {
        let v = &booked_metric["variants"][i];
        assert_eq!(v["trials"], 700, "{arm}: {v}");
        assert_eq!(v["successes"], booked[i], "{arm}: {v}");
    }

    // Every alert change the service made, each exactly once on the alerts topic.
    let (_, list) = service.get("/v1/alerts");
    let n_alerts = list["alerts"].as_array().unwrap().len();
    assert!(n_alerts >= 1, "{list}");
    // Ask for more messages than there can be changes, with a short wait: a repeated
    // publication would show up as a second message with the same CloudEvents id.
    let messages = consume_within(&brokers, &alerts, 4 * n_alerts + 8, 20);
    let mut by_id: BTreeMap<String, usize> = BTreeMap::new();
    for m in &messages {
        let id = m["headers"]["ce_id"].as_str().unwrap().to_string();
        let event: Value = serde_json::from_str(m["value"].as_str().unwrap()).unwrap();
        assert_eq!(event["id"], id.as_str());
        *by_id.entry(id).or_default() += 1;
    }
    assert!(
        by_id.contains_key(&format!("{open_alert}.opened")),
        "the opened change of {open_alert} is missing: {by_id:?}"
    );
    assert!(
        by_id.values().all(|&n| n == 1),
        "an alert change was published twice: {by_id:?}"
    );
    for a in list["alerts"].as_array().unwrap() {
        let id = a["id"].as_str().unwrap();
        assert!(
            by_id.contains_key(&format!("{id}.opened")),
            "alert {id} never reached the topic: {by_id:?}"
        );
    }
    assert!(
        cluster.log_tail(2, 200).contains("Kafka Server started"),
        "broker 2 did not come back:\n{}",
        cluster.log_tail(2, 30)
    );
}
