//! Target 9 of docs/performance.md: one unit-keyed topic of 6 partitions consumed by a consumer
//! group of 1, 2 and 3 posteriord instances on this machine, each run from the beginning of the
//! topic with a fresh group; throughput (events per second until every event is counted, as
//! one instance's merged read reports it) and the ratio of 2 and 3 instances to 1, same run.
//! Reported, not judged: on a 2-core machine three instances and the broker share two cores,
//! so the ratios show the overhead of splitting, not the gain of more machines
//! (docs/performance.md says how it extrapolates).
//!
//! Included by `targets.rs` (`#[path]`), so it shares its broker, servers and rows.

use std::path::Path;
use std::time::{Duration, Instant};

use super::{broker, create_topic_with, http_get, median, sized, Row, Server};

const PARTITIONS: i32 = 6;

/// The invented ferry operator's boarding stream: assignments and tickets on one topic, keyed
/// by rider, record timestamps in produce order.
fn config(brokers: &str, topic: &str, group: &str, dir: &Path) -> String {
    let mut s = format!(
        r#"[store]
dir = "{}"
snapshot_interval_ms = 1000
[kafka]
brokers = "{brokers}"
group = "{group}"
changelog_topic = "{group}-changelog"
changelog_interval_ms = 200
[[source]]
name = "boarding"
topics = ["{topic}"]
unit = "rider"
time = "ms"
time_format = "epoch_millis"
event = "kind"
experiment = "exp"
variant = "arm"
exposures = ["assigned"]
metrics = {{ "ticket" = "boarded" }}
"#,
        dir.display()
    );
    for id in ["quick-board", "seat-map"] {
        s.push_str(&format!(
            "[[experiment]]\nid = \"{id}\"\ncontrol = \"a\"\nvariants = [ {{ name = \"a\" }}, {{ name = \"b\" }} ]\n[[experiment.metric]]\nname = \"boarded\"\nkind = \"conversion\"\n"
        ));
    }
    s
}

/// `riders` assignments (half per experiment, alternating arms) and a ticket for every tenth.
fn events(riders: usize) -> Vec<(String, Vec<u8>, i64)> {
    // Record timestamps of the last hours: the broker's retention deletes by timestamp, so
    // records stamped weeks ago would vanish from under the consumers mid-run.
    let now_ms = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_millis() as i64);
    let base = now_ms - 2 * 3_600_000;
    let mut out = Vec::with_capacity(riders + riders / 10);
    for i in 0..riders {
        let t = base + i as i64;
        let rider = format!("r{i}");
        let exp = if i % 2 == 0 {
            "quick-board"
        } else {
            "seat-map"
        };
        let arm = if (i / 2) % 2 == 0 { "a" } else { "b" };
        let line = format!(
            r#"{{"rider":"{rider}","ms":{t},"kind":"assigned","exp":"{exp}","arm":"{arm}"}}"#
        );
        out.push((rider.clone(), line.into_bytes(), t));
        if i % 10 == 0 {
            let line = format!(r#"{{"rider":"{rider}","ms":{},"kind":"ticket"}}"#, t + 1);
            out.push((rider, line.into_bytes(), t + 1));
        }
    }
    out
}

fn produce(brokers: &str, topic: &str, events: &[(String, Vec<u8>, i64)]) {
    use rdkafka::producer::{BaseProducer, BaseRecord, Producer};
    let producer: BaseProducer = rdkafka::ClientConfig::new()
        .set("bootstrap.servers", brokers)
        .set("linger.ms", "20")
        .set("queue.buffering.max.messages", "1000000")
        .create()
        .expect("producer");
    for (key, payload, t) in events {
        loop {
            let record = BaseRecord::to(topic)
                .key(key.as_str())
                .payload(payload.as_slice())
                .timestamp(*t);
            match producer.send(record) {
                Ok(()) => break,
                Err(_) => {
                    producer.poll(Duration::from_millis(10));
                }
            }
        }
        producer.poll(Duration::ZERO);
    }
    producer
        .flush(Duration::from_secs(300))
        .expect("all events delivered");
}

/// Exposed units of both experiments as instance `port` reads them (its own partitions and the
/// others' last publications).
fn units_read(port: u16) -> u64 {
    ["quick-board", "seat-map"]
        .iter()
        .map(|id| {
            let Some((200, body)) = http_get(port, &format!("/v1/experiments/{id}")) else {
                return 0;
            };
            let doc: serde_json::Value = serde_json::from_str(&body).unwrap_or_default();
            doc["variants"]
                .as_array()
                .map_or(0, |v| v.iter().filter_map(|a| a["units"].as_u64()).sum())
        })
        .sum()
}

/// Seconds for `instances` fresh members of one group to count all `riders`.
fn run(work: &Path, brokers: &str, topic: &str, instances: usize, riders: usize, tag: &str) -> f64 {
    let group = format!("bench-group-{tag}-{instances}-{}", std::process::id());
    let t = Instant::now();
    let servers: Vec<Server> = (0..instances)
        .map(|i| {
            let dir = work.join(format!("{group}-{i}"));
            Server::start(&dir, &config(brokers, topic, &group, &dir.join("store")))
        })
        .collect();
    let limit = Duration::from_secs(900);
    while units_read(servers[0].port) < riders as u64 {
        assert!(t.elapsed() < limit, "the group did not count the topic");
        std::thread::sleep(Duration::from_millis(100));
    }
    let secs = t.elapsed().as_secs_f64();
    for s in servers {
        s.stop();
    }
    secs
}

pub fn group_target(work: &Path) -> Vec<Row> {
    let riders = sized(400_000, 3_000);
    let events = events(riders);
    println!(
        "\n== group: {} events on {PARTITIONS} partitions, 1, 2 and 3 instances in one group ==",
        events.len()
    );
    let not_run = |why: &str| {
        println!("  {why}");
        vec![Row {
            target: "9 group throughput, 3 vs 1 instance",
            baseline: "-".into(),
            ours: "-".into(),
            ratio: "not run".into(),
            goal: "report",
            met: None,
        }]
    };
    let Some(b) = broker(work) else {
        return not_run("no broker: set POSTERIORD_BENCH_BROKERS, or install java");
    };
    let topic = format!("bench-boarding-{}", std::process::id());
    create_topic_with(&b.brokers, &topic, PARTITIONS);
    produce(&b.brokers, &topic, &events);
    let rounds = if super::smoke() { 1 } else { 2 };
    let mut secs = [Vec::new(), Vec::new(), Vec::new()];
    for round in 0..rounds {
        for k in 1..=3 {
            let s = run(work, &b.brokers, &topic, k, riders, &round.to_string());
            println!(
                "  {k} instance(s): {:.1} s ({:.0} ev/s)",
                s,
                events.len() as f64 / s
            );
            secs[k - 1].push(s);
        }
    }
    let rate = |s: f64| events.len() as f64 / s;
    let one = median(secs[0].clone());
    let mut rows = Vec::new();
    for (k, target) in [
        (2, "9 group throughput, 2 vs 1 instance"),
        (3, "9 group throughput, 3 vs 1 instance"),
    ] {
        let s = median(secs[k - 1].clone());
        rows.push(Row {
            target,
            baseline: format!("{:.0} ev/s", rate(one)),
            ours: format!("{:.0} ev/s", rate(s)),
            ratio: format!("{:.2}×", one / s),
            goal: "report",
            met: None,
        });
    }
    rows
}
