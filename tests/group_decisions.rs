//! One experiment decided across two instances of a consumer group, on a real Apache Kafka
//! broker: a unit-keyed assignment topic of 4 partitions (produced by the independent Python
//! client with explicit record timestamps), split between two posteriord instances. Each
//! experiment must be evaluated by exactly one instance (the holder of input partition
//! `hash(id) mod 4`), at reference-time boundaries, on the totals of every partition as of the
//! boundary — checked against an independent model computed here from the produced lines and
//! their record timestamps — while both instances read exact totals.
//!
//! The invented team: Tidewater Ferries, whose boarding app assigns riders to two experiments.

mod common;

use std::collections::{BTreeMap, BTreeSet};
use std::time::Duration;

use common::kafka::{brokers, unique};
use common::{wait_for, Service};
use rand::{Rng, SeedableRng};
use serde_json::{json, Value};

const EXPERIMENTS: [(&str, [&str; 2]); 2] = [
    ("quick-board", ["queue", "tap"]),
    ("seat-map", ["list", "map"]),
];
const PARTITIONS: u32 = 4;
const EVERY_SECS: i64 = 60;

/// The configuration shared by both tests: `alerts` after `[alerts]`, one `[[source]]`
/// (`source`), and the two experiments with `rules` under their metric.
fn group_config(
    brokers: &str,
    group: &str,
    changelog: &str,
    alerts: &str,
    source: &str,
    rules: &str,
) -> String {
    let mut s = format!(
        r#"[http]
addr = "127.0.0.1:0"
[store]
snapshot_interval_ms = 250
[alerts]
evaluate_every_secs = {EVERY_SECS}
{alerts}
[kafka]
brokers = "{brokers}"
group = "{group}"
changelog_topic = "{changelog}"
changelog_interval_ms = 300
# The records are stamped up to 45 minutes in the past (a backfill): a quiet partition must
# not declare itself past them between the waves.
idle_allowance_secs = 10800
[kafka.properties]
"session.timeout.ms" = 6000
"heartbeat.interval.ms" = 500

{source}
"#
    );
    for (id, [a, b]) in EXPERIMENTS {
        s.push_str(&format!(
            r#"
[[experiment]]
id = "{id}"
control = "{a}"
variants = [ {{ name = "{a}" }}, {{ name = "{b}" }} ]
[[experiment.metric]]
name = "boarded"
kind = "conversion"
{rules}
"#
        ));
    }
    s
}

fn config(brokers: &str, group: &str, topic: &str, changelog: &str) -> String {
    let source = format!(
        r#"[[source]]
name = "tidewater-assign"
topics = ["{topic}"]
unit = "rider.id"
time = "assigned_ms"
time_format = "epoch_millis"
experiment = "exp.name"
variant = "exp.arm"
exposures = ["assigned"]
constants = {{ event = "assigned" }}"#
    );
    group_config(brokers, group, changelog, "", &source, "")
}

/// One produced record: reference (record timestamp, ms), event time (ms), rider, experiment,
/// arm.
struct Record {
    reference: i64,
    time: i64,
    rider: String,
    experiment: &'static str,
    arm: usize,
}

/// Riders assigned over 40 minutes ending a minute ago; record timestamps trail the event
/// times by up to 2 s and ascend in produce order. Then, 10 minutes later, closing records of
/// an unconfigured experiment on every partition (with high probability), so every partition's
/// watermark passes the last boundary.
fn workload(seed: u64) -> (Vec<Record>, Vec<String>) {
    let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
    let now = time::OffsetDateTime::now_utc().unix_timestamp() * 1000;
    let start = now - 41 * 60 * 1000;
    let mut out = Vec::new();
    let mut reference = start;
    for i in 0..3000 {
        reference += rng.random_range(0..1_600);
        let time = reference - rng.random_range(0..2_000);
        let experiment = EXPERIMENTS[rng.random_range(0..2)].0;
        // Some riders assigned again (counted once).
        let rider = format!("rider-{}", if i % 10 == 9 { i - 5 } else { i });
        out.push(Record {
            reference,
            time,
            rider,
            experiment,
            arm: rng.random_range(0..2),
        });
    }
    let mut lines: Vec<String> = out.iter().map(line).collect();
    let close = reference + 10 * 60 * 1000;
    for k in 0..64 {
        lines.push(format!(
            "{close}\t{}",
            json!({"rider": {"id": format!("closer-{k}")}, "assigned_ms": close,
                   "exp": {"name": "retired-banner", "arm": "old"}})
        ));
    }
    (out, lines)
}

fn line(r: &Record) -> String {
    let arms = EXPERIMENTS.iter().find(|e| e.0 == r.experiment).unwrap().1;
    format!(
        "{}\t{}",
        r.reference,
        json!({"rider": {"id": r.rider}, "assigned_ms": r.time,
               "exp": {"name": r.experiment, "arm": arms[r.arm]}})
    )
}

/// The independent model: units per arm of `experiment` counting the records with a record
/// timestamp before `b` (ms), each rider once (its first record), and the latest event time
/// among them.
fn model(records: &[Record], experiment: &str, b: i64) -> (Vec<u64>, Option<i64>) {
    let mut seen = BTreeSet::new();
    let mut units = vec![0u64; 2];
    let mut latest = None;
    for r in records
        .iter()
        .filter(|r| r.experiment == experiment && r.reference < b)
    {
        latest = Some(latest.map_or(r.time, |l: i64| l.max(r.time)));
        if seen.insert(r.rider.clone()) {
            units[r.arm] += 1;
        }
    }
    (units, latest)
}

fn units_in(doc: &Value) -> Vec<u64> {
    (0..2)
        .map(|i| doc["variants"][i]["units"].as_u64().unwrap())
        .collect()
}

/// The evaluations `service` recorded for experiment `id` (none: it did not evaluate it).
fn history(service: &Service, id: &str) -> Vec<Value> {
    let (status, doc) = service.get(&format!("/v1/experiments/{id}/history?metric=boarded"));
    if status == 404 {
        return Vec::new();
    }
    assert_eq!(status, 200, "{doc}");
    doc["points"].as_array().cloned().unwrap_or_default()
}

fn millis(text: &str) -> i64 {
    let t =
        time::OffsetDateTime::parse(text, &time::format_description::well_known::Rfc3339).unwrap();
    (t.unix_timestamp_nanos() / 1_000_000) as i64
}

#[test]
fn each_experiment_is_decided_once_at_boundaries_on_every_partitions_totals() {
    let brokers = brokers();
    let topic = unique("tidewater-assign");
    let group = unique("tidewater-group");
    let changelog = unique("tidewater-changelog");
    let scratch = tempfile::tempdir().unwrap();
    let (records, lines) = workload(7);
    let file = scratch.path().join("assign.ndjson");
    std::fs::write(&file, lines.join("\n") + "\n").unwrap();
    let out = std::process::Command::new("python3")
        .arg(concat!(
            env!("CARGO_MANIFEST_DIR"),
            "/tests/tools/produce.py"
        ))
        .args(["--brokers", &brokers, "--topic", &topic])
        .args(["--partitions", &PARTITIONS.to_string()])
        .args(["--key", "rider.id", "--timestamps"])
        .arg(&file)
        .output()
        .expect("python3 tests/tools/produce.py (confluent-kafka)");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );

    let cfg = config(&brokers, &group, &topic, &changelog);
    let a = Service::start(&cfg);
    let b = Service::start(&cfg);
    let instances = [&a, &b];

    // Exact totals on both instances (each reads the other's partitions via the changelog).
    let far = i64::MAX;
    for (id, _) in EXPERIMENTS {
        let (want, _) = model(&records, id, far);
        for s in instances {
            wait_for(
                Duration::from_secs(90),
                "exact totals on every instance",
                || {
                    let (status, doc) = s.get(&format!("/v1/experiments/{id}"));
                    (status == 200 && units_in(&doc) == want).then_some(())
                },
            );
        }
    }

    for (id, _) in EXPERIMENTS {
        // The last boundary before the closing records: every assignment counted.
        let last_ref = records.iter().map(|r| r.reference).max().unwrap();
        let last_boundary = (last_ref / 1000 / EVERY_SECS + 1) * EVERY_SECS * 1000;
        let (final_units, _) = model(&records, id, last_boundary);
        let histories = wait_for(Duration::from_secs(60), "the owner's last boundary", || {
            let h: Vec<Vec<Value>> = instances.iter().map(|s| history(s, id)).collect();
            let done = h.iter().any(|points| {
                points.last().is_some_and(|p| {
                    let arms = p["arms"].as_array().unwrap();
                    arms.iter()
                        .map(|a| a["units"].as_u64().unwrap())
                        .collect::<Vec<_>>()
                        == final_units
                })
            });
            done.then_some(h)
        });
        let evaluating: Vec<usize> = (0..2).filter(|&i| !histories[i].is_empty()).collect();
        assert_eq!(
            evaluating.len(),
            1,
            "{id}: exactly one instance evaluates it: {histories:?}"
        );
        // Every instance's document names the owner, and exactly one says it is it (not
        // necessarily the one that evaluated: a later rebalance may have moved the partition).
        let owners: Vec<Value> = instances
            .iter()
            .map(|s| s.get(&format!("/v1/experiments/{id}")).1["ownership"].clone())
            .collect();
        assert_eq!(
            owners[0]["owner_partition"], owners[1]["owner_partition"],
            "{owners:?}"
        );
        assert!(owners[0]["owner_partition"].as_u64().unwrap() < u64::from(PARTITIONS));
        assert_eq!(
            owners.iter().filter(|o| o["owned_here"] == true).count(),
            1,
            "{owners:?}"
        );
        let points = &histories[evaluating[0]];
        assert!(
            points.len() >= 10,
            "{id}: one evaluation per boundary: {points:?}"
        );
        // Every evaluation is the model's totals as of one boundary, in boundary order.
        let boundaries: Vec<i64> = (0..=45)
            .map(|k| (records[0].reference / 1000 / EVERY_SECS + k) * EVERY_SECS * 1000)
            .collect();
        let mut by_units: BTreeMap<Vec<u64>, Vec<(i64, Option<i64>)>> = BTreeMap::new();
        for &bnd in &boundaries {
            let (units, latest) = model(&records, id, bnd);
            by_units.entry(units).or_default().push((bnd, latest));
        }
        let mut previous = 0;
        for p in points {
            assert_eq!(p["covers"].as_u64().unwrap_or(1), 1, "{p}");
            let units: Vec<u64> = p["arms"]
                .as_array()
                .unwrap()
                .iter()
                .map(|a| a["units"].as_u64().unwrap())
                .collect();
            let at = millis(p["at"].as_str().unwrap());
            let matches = by_units
                .get(&units)
                .unwrap_or_else(|| panic!("{id}: {units:?} is no boundary's totals"));
            let (bnd, latest) = matches
                .iter()
                .find(|(_, latest)| {
                    *latest == Some(at) || latest.is_some_and(|l| l / 1000 == at / 1000)
                })
                .unwrap_or_else(|| panic!("{id}: {units:?} at {at}: {matches:?}"));
            assert!(latest.is_some());
            assert!(*bnd > previous, "{id}: boundaries evaluated in order");
            previous = *bnd;
        }
    }
}

/// The key of the test webhook, as the receiver is given it (Standard Webhooks `whsec_`).
const WHSEC: &str = "whsec_VGlkZXdhdGVyLWZlcnJpZXMtaG9vay1rZXk=";

fn harm_config(brokers: &str, group: &str, topic: &str, changelog: &str, port: u16) -> String {
    // One topic carries the assignments and the tickets, keyed by rider, so each partition's
    // log is in reference-time order.
    let alerts = format!(
        "[[alerts.webhook]]\nurl = \"http://127.0.0.1:{port}/hooks/ferries\"\nsecret_env = \"TIDEWATER_HOOK_SECRET\""
    );
    let source = format!(
        r#"[[source]]
name = "tidewater-boarding"
topics = ["{topic}"]
unit = "rider.id"
time = "at_ms"
time_format = "epoch_millis"
event = "kind"
experiment = "exp.name"
variant = "exp.arm"
exposures = ["assigned"]
metrics = {{ "ticket.bought" = "boarded" }}"#
    );
    let rules = "[experiment.metric.rules]\nmin_units = 150";
    group_config(brokers, group, changelog, &alerts, &source, rules)
}

/// Three waves of riders over the last 45 minutes, each a list of `REFERENCE\tEVENT` lines in
/// reference order (assignments and tickets together): in `quick-board` the `tap` arm buys a
/// ticket far less often (4% against 14%), in `seat-map` both arms buy at 10%. The last wave
/// ends with closing records of an unconfigured experiment 10 minutes later.
fn harm_waves(seed: u64) -> Vec<Vec<String>> {
    let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
    let now = time::OffsetDateTime::now_utc().unix_timestamp() * 1000;
    let mut reference = now - 45 * 60 * 1000;
    let mut waves = Vec::new();
    let mut rider = 0;
    for wave in 0..3 {
        let mut lines = Vec::new();
        for _ in 0..1500 {
            rider += 1;
            reference += rng.random_range(0..1_100);
            let (id, arms) = EXPERIMENTS[rng.random_range(0..2)];
            let arm = rng.random_range(0..2);
            lines.push((
                reference,
                json!({"rider": {"id": format!("r{rider}")}, "at_ms": reference - 500,
                       "kind": "assigned", "exp": {"name": id, "arm": arms[arm]}}),
            ));
            let rate = match (id, arm) {
                ("quick-board", 0) => 0.14,
                ("quick-board", _) => 0.04,
                _ => 0.10,
            };
            if rng.random_bool(rate) {
                let at = reference + rng.random_range(2_000..30_000);
                lines.push((
                    at,
                    json!({"rider": {"id": format!("r{rider}")}, "at_ms": at - 200, "kind": "ticket.bought"}),
                ));
            }
        }
        if wave == 2 {
            let close = reference + 10 * 60 * 1000;
            for k in 0..96 {
                lines.push((
                    close,
                    json!({"rider": {"id": format!("closer-{k}")}, "at_ms": close, "kind": "assigned",
                           "exp": {"name": "retired-banner", "arm": "old"}}),
                ));
            }
        }
        lines.sort_by_key(|(r, _)| *r);
        waves.push(
            lines
                .into_iter()
                .map(|(r, e)| format!("{r}\t{e}"))
                .collect(),
        );
    }
    waves
}

fn produce_lines(brokers: &str, topic: &str, lines: &[String], dir: &std::path::Path) {
    let file = dir.join(format!("{topic}-{}.ndjson", lines.len()));
    std::fs::write(&file, lines.join("\n") + "\n").unwrap();
    let out = std::process::Command::new("python3")
        .arg(concat!(
            env!("CARGO_MANIFEST_DIR"),
            "/tests/tools/produce.py"
        ))
        .args(["--brokers", brokers, "--topic", topic])
        .args(["--partitions", "6", "--key", "rider.id", "--timestamps"])
        .arg(&file)
        .output()
        .expect("python3 tests/tools/produce.py (confluent-kafka)");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
}

/// The instance among `instances` that evaluates `id` (has recorded evaluations).
fn evaluator(instances: &[Service], id: &str) -> Option<usize> {
    let with: Vec<usize> = (0..instances.len())
        .filter(|&i| {
            let (status, doc) =
                instances[i].get(&format!("/v1/experiments/{id}/history?metric=boarded"));
            status == 200 && doc["evaluations"].as_u64().unwrap_or(0) > 0
        })
        .collect();
    with.first().copied()
}

#[test]
fn each_alert_change_is_delivered_once_by_id_through_a_sigkill_of_the_owner() {
    let brokers = brokers();
    let topic = unique("tidewater-boarding");
    let group = unique("tidewater-group");
    let changelog = unique("tidewater-changelog");
    let scratch = tempfile::tempdir().unwrap();
    let port = common::receiver::free_port();
    let receiver = common::receiver::Receiver::start(port, scratch.path(), WHSEC);
    let cfg = harm_config(&brokers, &group, &topic, &changelog, port);
    let env = [("TIDEWATER_HOOK_SECRET", WHSEC)];
    let waves = harm_waves(11);
    // Topics exist before the instances start (they check partition counts).
    produce_lines(&brokers, &topic, &waves[0], scratch.path());
    let mut instances: Vec<Service> = (0..3)
        .map(|_| Service::start_with_env(&cfg, &env))
        .collect();

    // Wave 1: the harm alert opens at the owner and reaches the receiver.
    let find = || {
        receiver
            .records()
            .iter()
            .find(|r| {
                r["event"]["data"]["rule"] == "harm"
                    && r["event"]["data"]["experiment"] == "quick-board"
            })
            .map(|r| r["webhook_id"].as_str().unwrap().to_string())
    };
    let deadline = std::time::Instant::now() + Duration::from_secs(120);
    let opened = loop {
        if let Some(id) = find() {
            break id;
        }
        if std::time::Instant::now() > deadline {
            let state: Vec<String> = instances
                .iter()
                .map(|s| {
                    format!(
                        "doc {}\nhistory {}\nalerts {}\nlog {}",
                        s.get("/v1/experiments/quick-board").1,
                        s.get("/v1/experiments/quick-board/history?metric=boarded")
                            .1["evaluations"],
                        s.get("/v1/alerts").1,
                        s.log_text()
                            .lines()
                            .filter(|l| l.contains("WARN")
                                || l.contains("ERROR")
                                || l.contains("group")
                                || l.contains("revoked"))
                            .take(40)
                            .collect::<Vec<_>>()
                            .join("\n")
                    )
                })
                .collect();
            let partials = common::kafka::consume_within(
                &brokers,
                &format!("{changelog}-partials"),
                100_000,
                5,
            );
            let partials: Vec<String> = partials
                .iter()
                .map(|m| {
                    format!(
                        "{} {}",
                        m["key"],
                        m["value"]
                            .as_str()
                            .unwrap_or("")
                            .chars()
                            .take(160)
                            .collect::<String>()
                    )
                })
                .collect();
            panic!(
                "the harm alert was not delivered:\n{}\npartials:\n{}",
                state.join("\n\n"),
                partials.join("\n")
            );
        }
        std::thread::sleep(Duration::from_millis(300));
    };
    let owner = evaluator(&instances, "quick-board").expect("an owner evaluates quick-board");
    // SIGKILL the owner mid-stream; a replacement joins.
    let _ = instances[owner].child.kill();
    let _ = instances[owner].child.wait();
    instances[owner] = Service::start_with_env(&cfg, &env);
    for wave in &waves[1..] {
        produce_lines(&brokers, &topic, wave, scratch.path());
    }
    // The owner after the kill evaluates the last boundary on every partition's totals.
    for (id, _) in EXPERIMENTS {
        let deadline = std::time::Instant::now() + Duration::from_secs(150);
        loop {
            let (_, doc) = instances[0].get(&format!("/v1/experiments/{id}"));
            let want: Vec<u64> = doc["variants"]
                .as_array()
                .map(|v| v.iter().filter_map(|a| a["units"].as_u64()).collect())
                .unwrap_or_default();
            let last = |s: &Service| {
                history(s, id).last().map(|p| {
                    p["arms"]
                        .as_array()
                        .unwrap()
                        .iter()
                        .map(|a| a["units"].as_u64().unwrap())
                        .collect::<Vec<_>>()
                })
            };
            if want.iter().sum::<u64>() > 2000
                && instances.iter().any(|s| last(s) == Some(want.clone()))
            {
                break;
            }
            if std::time::Instant::now() > deadline {
                let diag: Vec<String> = instances
                    .iter()
                    .map(|s| {
                        format!(
                            "ownership {} last {:?} units {:?}\n{}",
                            s.get(&format!("/v1/experiments/{id}")).1["ownership"],
                            last(s),
                            s.get(&format!("/v1/experiments/{id}")).1["variants"],
                            s.log_text()
                                .lines()
                                .filter(|l| l.contains("WARN")
                                    || l.contains("ERROR")
                                    || l.contains("owns")
                                    || l.contains("revoked")
                                    || l.contains("assigned"))
                                .take(30)
                                .collect::<Vec<_>>()
                                .join("\n")
                        )
                    })
                    .collect();
                panic!(
                    "{id}: the last boundary was not evaluated after the kill (want {want:?}):\n{}",
                    diag.join("\n\n")
                );
            }
            std::thread::sleep(Duration::from_millis(300));
        }
    }
    // Counts exact on every instance once caught up: an independent count of the lines.
    let mut arm_of = std::collections::HashMap::new();
    let mut want: BTreeMap<&str, [[u64; 2]; 2]> = BTreeMap::new();
    for line in waves.iter().flatten() {
        let e: Value = serde_json::from_str(line.split_once('\t').unwrap().1).unwrap();
        let rider = e["rider"]["id"].as_str().unwrap().to_string();
        if e["kind"] == "assigned" {
            if let Some((id, arms)) = EXPERIMENTS.iter().find(|(id, _)| e["exp"]["name"] == *id) {
                let arm = arms.iter().position(|a| e["exp"]["arm"] == *a).unwrap();
                want.entry(id).or_default()[arm][0] += 1;
                arm_of.insert(rider, (*id, arm));
            }
        } else if let Some(&(id, arm)) = arm_of.get(&rider) {
            want.entry(id).or_default()[arm][1] += 1;
        }
    }
    for (id, _) in EXPERIMENTS {
        for s in &instances {
            wait_for(
                Duration::from_secs(60),
                "exact counts on every instance",
                || {
                    let (_, doc) = s.get(&format!("/v1/experiments/{id}"));
                    let m = &doc["metrics"][0]["variants"];
                    let got: Vec<[u64; 2]> = (0..2)
                        .map(|i| Some([m[i]["trials"].as_u64()?, m[i]["successes"].as_u64()?]))
                        .collect::<Option<_>>()?;
                    (got == want[id].to_vec()).then_some(())
                },
            );
        }
    }
    // Every instance ends with the same alerts of quick-board, from the one owner's book.
    let books = wait_for(
        Duration::from_secs(150),
        "the same alerts on every instance",
        || {
            let lists: Vec<Vec<String>> = instances
                .iter()
                .map(|s| {
                    let (_, list) = s.get("/v1/alerts?experiment=quick-board");
                    let mut ids: Vec<String> = list["alerts"]
                        .as_array()
                        .map(|a| {
                            a.iter()
                                .map(|x| format!("{}:{}", x["id"], x["state"]))
                                .collect()
                        })
                        .unwrap_or_default();
                    ids.sort();
                    ids
                })
                .collect();
            (!lists[0].is_empty() && lists.iter().all(|l| *l == lists[0])).then_some(lists)
        },
    );
    std::thread::sleep(Duration::from_secs(3));
    let records = receiver.records();
    assert!(
        records.iter().all(|r| r["valid"] == true),
        "signatures verified by PyPI standardwebhooks"
    );
    // Counted by id: the harm alert opened once, under one id, through the kill.
    let harm_opened: BTreeSet<String> = records
        .iter()
        .filter(|r| {
            let d = &r["event"]["data"];
            d["rule"] == "harm"
                && d["experiment"] == "quick-board"
                && r["event"]["type"] == "posteriord.alert.opened"
        })
        .map(|r| r["webhook_id"].as_str().unwrap().to_string())
        .collect();
    assert_eq!(harm_opened, BTreeSet::from([opened.clone()]), "{books:?}");
    // Every change in the owner's book reached the receiver, each id once or repeated (an
    // at-least-once resend carries the same id).
    let ids: BTreeSet<String> = records
        .iter()
        .map(|r| r["webhook_id"].as_str().unwrap().to_string())
        .collect();
    // Replay of the six partitions' dumps (record timestamps as the reference column)
    // reaches the live owner's decisions: the same alerts, ids, states and times.
    let total: usize = waves.iter().map(Vec::len).sum();
    let dumped = common::kafka::consume_within(&brokers, &topic, total, 60);
    let mut files = Vec::new();
    for p in 0..6 {
        let mut records: Vec<&Value> = dumped.iter().filter(|m| m["partition"] == p).collect();
        records.sort_by_key(|m| m["offset"].as_i64().unwrap());
        let text: String = records
            .iter()
            .map(|m| format!("{}\t{}\n", m["timestamp"], m["value"].as_str().unwrap()))
            .collect();
        let file = scratch.path().join(format!("partition-{p}.txt"));
        std::fs::write(&file, text).unwrap();
        files.push(format!("tidewater-boarding={}", file.display()));
    }
    assert_eq!(dumped.len(), total);
    let cfg_file = scratch.path().join("replay.toml");
    std::fs::write(&cfg_file, &cfg).unwrap();
    let out = std::process::Command::new(common::bin())
        .args(["replay", "--partitioned", "--format", "json", "--config"])
        .arg(&cfg_file)
        .args(&files)
        .env("POSTERIORD_EVENT_TIME_MAX_BEHIND_DAYS", "3650")
        .env("TIDEWATER_HOOK_SECRET", WHSEC)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let replayed: Value = serde_json::from_slice(&out.stdout).unwrap();
    let summary = |alerts: &Value, id: &str| -> Vec<String> {
        let mut v: Vec<String> = alerts
            .as_array()
            .unwrap()
            .iter()
            .filter(|a| a["experiment"] == id)
            .map(|a| {
                format!(
                    "{} {} {} {} {}",
                    a["id"], a["rule"], a["state"], a["opened_at"], a["closed_at"]
                )
            })
            .collect();
        v.sort();
        v
    };
    assert!(
        !summary(&replayed["alerts"], "quick-board").is_empty(),
        "replay raises the harm alert too: {replayed}"
    );
    for (id, _) in EXPERIMENTS {
        let (_, live) = instances[0].get(&format!("/v1/alerts?experiment={id}"));
        assert_eq!(
            summary(&live["alerts"], id),
            summary(&replayed["alerts"], id),
            "{id}: live and replay decide alike"
        );
    }
    let (_, list) = instances[0].get("/v1/alerts?experiment=quick-board");
    for a in list["alerts"].as_array().unwrap() {
        let id = a["id"].as_str().unwrap();
        assert!(
            ids.contains(&format!("{id}.opened")),
            "{id} opened was delivered: {ids:?}"
        );
        if a["state"] == "closed" {
            assert!(
                ids.contains(&format!("{id}.closed")),
                "{id} closed was delivered"
            );
        }
    }
}
