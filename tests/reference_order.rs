//! Co-partitioned topics applied in reference-time order, on a real Apache Kafka broker: the
//! ride topic (business events) is produced before the assignment topic, each record with an
//! explicit timestamp (Python confluent-kafka, tests/tools/produce.py), and the shard must
//! apply them by (record timestamp, topic order, offset), not in the order the broker hands
//! them out. Checked against a model of that order written here from the produced records
//! (which rides wait for their assignments), against the event-time ground truth of
//! tests/common/mapped.rs, against `replay --merge-by-reference` of the two topic dumps, across
//! a SIGKILL and through a partition moving to a second instance mid-stream; and an idle ride
//! topic holds the assignments back only for the allowance, while records stamped far ahead of
//! the clock or behind the watermark are applied and counted.

mod common;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, SystemTime, UNIX_EPOCH};

use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use serde_json::Value;

use common::kafka::{brokers, unique};
use common::mapped::{config_sections, expected, observed, streams, ArmTotals, EXPERIMENTS};
use common::{signal, wait_exit, wait_for, Service};

/// Milliseconds since the epoch now.
fn now_ms() -> i64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .unwrap()
        .as_millis() as i64
}

/// Event time of a line of either stream, in milliseconds.
fn event_ms(line: &str) -> i64 {
    let v: Value = serde_json::from_str(line).unwrap();
    if let Some(ms) = v["assigned_ms"].as_i64() {
        return ms;
    }
    let at = v["at"].as_str().unwrap();
    let t =
        time::OffsetDateTime::parse(at, &time::format_description::well_known::Rfc3339).unwrap();
    (t.unix_timestamp_nanos() / 1_000_000) as i64
}

/// Each line with a record timestamp: its event time moved by `shift_ms`, plus a producer
/// delay from `delay`; the lines in timestamp order, as a producer writes them. The event
/// times move with the shift (so the event-time check passes).
fn stamped(lines: &[String], shift_ms: i64, mut delay: impl FnMut() -> i64) -> Vec<(i64, String)> {
    let mut out: Vec<(i64, String)> = lines
        .iter()
        .map(|l| {
            let mut v: Value = serde_json::from_str(l).unwrap();
            let t = event_ms(l) + shift_ms;
            if v.get("assigned_ms").is_some() {
                v["assigned_ms"] = Value::from(t);
            } else {
                let at = time::OffsetDateTime::from_unix_timestamp_nanos(i128::from(t) * 1_000_000)
                    .unwrap()
                    .format(&time::format_description::well_known::Rfc3339)
                    .unwrap();
                v["at"] = Value::from(at);
            }
            (t + delay(), v.to_string())
        })
        .collect();
    out.sort_by_key(|(ts, _)| *ts);
    out
}

/// How many rides the shard holds for their assignments when it applies the two topics in
/// reference-time order: merge the topics' heads by (timestamp, topic order — assignments
/// first, as configured), and a ride naming a metric is held when the latest assignment
/// time applied before it is not past its second (docs/events.md, "Lateness"). Written from
/// the produced records, not from posteriord's code.
fn model_held(assignments: &[(i64, String)], rides: &[(i64, String)]) -> (u64, u64) {
    let (mut a, mut r) = (0, 0);
    let mut watermark: Option<i64> = None;
    let (mut held, mut outcomes) = (0, 0);
    while a < assignments.len() || r < rides.len() {
        let take_assignment =
            r == rides.len() || (a < assignments.len() && assignments[a].0 <= rides[r].0);
        if take_assignment {
            let t = event_ms(&assignments[a].1);
            watermark = Some(watermark.map_or(t, |w| w.max(t)));
            a += 1;
        } else {
            let line = &rides[r].1;
            r += 1;
            if !(line.contains("\"ride.paid\"") || line.contains("\"app.crash\"")) {
                continue;
            }
            outcomes += 1;
            let t = event_ms(line);
            if watermark.is_none_or(|w| w.div_euclid(1000) <= t.div_euclid(1000)) {
                held += 1;
            }
        }
    }
    (held, outcomes)
}

fn config(brokers: &str, group: &str, assignments: &str, rides: &str, extra: &str) -> String {
    format!(
        r#"[http]
addr = "127.0.0.1:0"
[store]
snapshot_interval_ms = 250
[kafka]
brokers = "{brokers}"
group = "{group}"
changelog_interval_ms = 300
outcome_lateness_secs = 86400
{extra}
[kafka.properties]
"session.timeout.ms" = 3000
"heartbeat.interval.ms" = 500
{}"#,
        config_sections(assignments, rides)
    )
}

/// Produce `lines` (timestamp, line) to one partition of `topic` with the independent client,
/// each with its record timestamp, keyed by `key`; also writes the dump `replay` reads.
fn produce_stamped(brokers: &str, topic: &str, key: &str, lines: &[(i64, String)], dump: &Path) {
    produce_stamped_in(brokers, topic, 1, key, lines, dump)
}

/// [`produce_stamped`] to a topic of `partitions` partitions (created if missing).
fn produce_stamped_in(
    brokers: &str,
    topic: &str,
    partitions: u32,
    key: &str,
    lines: &[(i64, String)],
    dump: &Path,
) {
    let text: String = lines.iter().map(|(ts, l)| format!("{ts}\t{l}\n")).collect();
    std::fs::write(dump, text).unwrap();
    let out = Command::new("python3")
        .arg(Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/tools/produce.py"))
        .args(["--brokers", brokers, "--topic", topic, "--partitions"])
        .arg(partitions.to_string())
        .args(["--key", key, "--timestamps"])
        .arg(dump)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .output()
        .expect("python3 tests/tools/produce.py (confluent-kafka)");
    assert!(
        out.status.success(),
        "independent producer failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let n: usize = String::from_utf8_lossy(&out.stdout).trim().parse().unwrap();
    assert_eq!(n, lines.len());
}

fn observed_all(service: &Service) -> Option<BTreeMap<String, ArmTotals>> {
    let mut out = BTreeMap::new();
    for (id, _) in EXPERIMENTS {
        let (status, doc) = service.get(&format!("/v1/experiments/{id}"));
        if status != 200 {
            return None;
        }
        out.insert(id.to_string(), observed(&doc));
    }
    Some(out)
}

fn converge(service: &Service, want: &BTreeMap<String, ArmTotals>) {
    let mut last = None;
    let ok = (0..600).any(|_| {
        let got = observed_all(service);
        let done = got.as_ref() == Some(want);
        last = got;
        if !done {
            std::thread::sleep(Duration::from_millis(200));
        }
        done
    });
    assert!(
        ok,
        "counts never reached the ground truth\nwant {want:#?}\ngot {last:#?}\nlog:\n{}",
        service.log_text()
    );
}

/// An alert as compared between live and replay: without input positions (shard names
/// differ) and acknowledgements.
fn comparable(alert: &Value) -> Value {
    let mut a = alert.clone();
    let m = a.as_object_mut().unwrap();
    m.remove("acknowledged_at");
    if let Some(e) = m.get_mut("evidence").and_then(Value::as_object_mut) {
        e.remove("positions");
    }
    a
}

struct Scenario {
    _scratch: tempfile::TempDir,
    dir: PathBuf,
    brokers: String,
    group: String,
    assign_topic: String,
    ride_topic: String,
    assignments: Vec<(i64, String)>,
    rides: Vec<(i64, String)>,
}

/// Riders of tests/common/mapped.rs moved to start three hours ago (so every stamp, the
/// late tail's too, is well before now − allowance), stamped and produced: every ride before
/// the first assignment.
fn scenario(seed: u64, riders: usize) -> Scenario {
    scenario_in(seed, riders, 1)
}

/// [`scenario`] on topics of `partitions` partitions.
fn scenario_in(seed: u64, riders: usize, partitions: u32) -> Scenario {
    let scratch = tempfile::tempdir().unwrap();
    let dir = scratch.path().to_path_buf();
    let s = streams(seed, riders, 20);
    let first = s
        .assignments
        .iter()
        .chain(&s.rides)
        .map(|l| event_ms(l))
        .min()
        .unwrap();
    let shift = now_ms() - 3 * 3_600_000 - first;
    let mut rng = StdRng::seed_from_u64(seed);
    // The assignment service stamps 30 s after the event, so its topic stays in event-time
    // order (which the hold rule relies on, docs/events.md); the ride service's delays vary
    // from 0 to 90 s, so its records interleave with the assignments' by timestamp.
    let assignments = stamped(&s.assignments, shift, || 30_000);
    let rides = stamped(&s.rides, shift, || rng.random_range(0..90_000));
    let sc = Scenario {
        brokers: brokers(),
        group: unique("order-group"),
        assign_topic: unique("order-assign"),
        ride_topic: unique("order-rides"),
        assignments,
        rides,
        dir,
        _scratch: scratch,
    };
    produce_stamped_in(
        &sc.brokers,
        &sc.ride_topic,
        partitions,
        "rider_id",
        &sc.rides,
        &sc.dir.join("rides.dump"),
    );
    produce_stamped_in(
        &sc.brokers,
        &sc.assign_topic,
        partitions,
        "rider.id",
        &sc.assignments,
        &sc.dir.join("assign.dump"),
    );
    sc
}

impl Scenario {
    fn lines(v: &[(i64, String)]) -> Vec<String> {
        v.iter().map(|(_, l)| l.clone()).collect()
    }

    fn want(&self) -> BTreeMap<String, ArmTotals> {
        expected(&Self::lines(&self.assignments), &Self::lines(&self.rides))
    }

    /// The mapped tests' configuration with a harm rule on paid rides touchy enough (60%)
    /// that chance swings between the arms open and close alerts: decisions that depend on
    /// the order the rides are applied in.
    fn config(&self, extra: &str) -> String {
        let alerts = "[alerts]\nevaluate_every_secs = 60\nevaluate_every_events = 200\nhold_down_secs = 120\n";
        let rules = "kind = \"conversion\"\n[experiment.metric.rules]\nmin_units = 50\nharm = { probability = 0.6 }\n";
        let base = config(
            &self.brokers,
            &self.group,
            &self.assign_topic,
            &self.ride_topic,
            extra,
        );
        format!(
            "{}\n{alerts}",
            base.replace("kind = \"conversion\"\n", rules)
        )
    }
}

#[test]
fn rides_produced_first_are_applied_in_timestamp_order_and_replay_merges_the_same() {
    let sc = scenario(61, 1_500);
    let (held, outcomes) = model_held(&sc.assignments, &sc.rides);
    // In arrival order every ride would be read before any assignment and held; in
    // reference-time order only some are.
    assert!(
        held > 50 && held + 50 < outcomes,
        "the scenario separates the two orders: {held} of {outcomes} held"
    );
    eprintln!("model: {held} of {outcomes} rides held in reference-time order");
    let cfg = sc.config("");
    let service = Service::start(&cfg);
    converge(&service, &sc.want());
    let by_source = |outcome: &str| {
        service.metric_sum(
            "posteriord_mapped_events_total",
            &format!(r#"outcome="{outcome}",source_name="pebble-rides""#),
        )
    };
    assert_eq!(
        by_source("held"),
        held,
        "rides held for their assignments (model: {held} of {outcomes}); log:\n{}",
        service.log_text()
    );
    assert_eq!(
        service.metric_sum(
            "posteriord_held_outcomes_decided_total",
            r#"why="watermark""#
        ),
        held,
        "every held ride decided when the assignments passed it"
    );
    assert_eq!(
        service.metric_sum("posteriord_kafka_records_out_of_order_total", ""),
        0
    );
    // The watermark lag is exported for the shard and is about the idle allowance once
    // everything is read (both topics at their end: now − 30 s).
    let (_, text) = service.get_text("/metrics");
    let lag: f64 = text
        .lines()
        .find(|l| l.starts_with("posteriord_shard_reference_lag_seconds{shard=\"kafka/+units/0\"}"))
        .and_then(|l| l.rsplit(' ').next())
        .and_then(|v| v.parse().ok())
        .unwrap_or_else(|| panic!("a reference lag for the shard in:\n{text}"));
    assert!((29.0..40.0).contains(&lag), "lag {lag}");
    // The new series read as valid exposition by Prometheus' own linter.
    let mut lint = Command::new("promtool")
        .args(["check", "metrics"])
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("promtool");
    use std::io::Write;
    lint.stdin
        .take()
        .unwrap()
        .write_all(text.as_bytes())
        .unwrap();
    let out = lint.wait_with_output().unwrap();
    assert!(
        out.status.success() && out.stdout.is_empty() && out.stderr.is_empty(),
        "promtool check metrics: {}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );

    // Live has begun evaluating (at boundaries, as its owner): compare with replay.
    wait_for(Duration::from_secs(60), "a first evaluation", || {
        (service.metric_sum("posteriord_evaluations_total", r#"stage="done""#) > 0).then_some(())
    });
    let config_file = sc.dir.join("posteriord.toml");
    std::fs::write(&config_file, &cfg).unwrap();
    // How live decided: a consumer group's owner at reference-time boundaries, on the
    // partition's two topics merged by reference (one partition: `--partitioned` with the
    // partition's two dumps). `--merge-by-reference` alone applies the same order with the
    // per-event cadence; file order is another order.
    #[derive(Clone, Copy, PartialEq)]
    enum Mode {
        Files,
        Merged,
        Partitioned,
    }
    let replay = |mode: Mode| -> Value {
        let mut cmd = Command::new(common::bin());
        cmd.arg("replay")
            .arg("--config")
            .arg(&config_file)
            .arg("--json");
        let assign = format!("pebble-assign={}", sc.dir.join("assign.dump").display());
        let rides = format!("pebble-rides={}", sc.dir.join("rides.dump").display());
        match mode {
            Mode::Files => {
                cmd.arg(assign).arg(rides);
            }
            Mode::Merged => {
                cmd.arg("--merge-by-reference").arg(assign).arg(rides);
            }
            Mode::Partitioned => {
                cmd.arg("--partitioned").arg(format!("{assign},{rides}"));
            }
        }
        let out = cmd.output().unwrap();
        assert!(
            out.status.success(),
            "replay failed: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        serde_json::from_slice(&out.stdout).unwrap()
    };
    let by_reference = replay(Mode::Merged);
    assert_eq!(
        by_reference["input"]["outcomes"]["held"], held,
        "{}",
        by_reference["input"]
    );
    let merged = replay(Mode::Partitioned);
    assert_eq!(
        merged["input"]["outcomes"]["held"], held,
        "{}",
        merged["input"]
    );
    // The owner evaluates boundaries as the partitions pass them, so live reaches the
    // replay's count once it has caught up (and must not go past it).
    let want = merged["evaluations"].as_u64().unwrap();
    let live_evaluations = wait_for(
        Duration::from_secs(60),
        "live to evaluate the boundaries the partitioned replay evaluates",
        || {
            let done = service.metric_sum("posteriord_evaluations_total", r#"stage="done""#);
            (done == want).then_some(done)
        },
    );
    std::thread::sleep(Duration::from_secs(2));
    assert_eq!(
        service.metric_sum("posteriord_evaluations_total", r#"stage="done""#),
        want,
        "live evaluated no boundary more"
    );
    let (_, live_alerts) = service.get("/v1/alerts?limit=1000");
    for (id, _) in EXPERIMENTS {
        let doc = merged["experiments"]
            .as_array()
            .unwrap()
            .iter()
            .find(|d| d["id"] == id)
            .unwrap();
        let (_, live_doc) = service.get(&format!("/v1/experiments/{id}"));
        assert_eq!(observed(doc), observed(&live_doc), "final state of {id}");
    }
    let mut live: Vec<Value> = live_alerts["alerts"]
        .as_array()
        .unwrap()
        .iter()
        .map(comparable)
        .collect();
    let mut offline: Vec<Value> = merged["alerts"]
        .as_array()
        .unwrap()
        .iter()
        .map(comparable)
        .collect();
    for list in [&mut live, &mut offline] {
        list.sort_by_key(|a| (a["opened_at"].to_string(), a["id"].to_string()));
    }
    assert_eq!(
        live, offline,
        "the same alerts live and in the merged replay"
    );
    eprintln!(
        "{live_evaluations} evaluations and {} alerts, live and in the merged replay",
        live.len()
    );
    assert!(
        !live.is_empty(),
        "the touchy harm rule raised alerts to compare"
    );
    // File order (every assignment, then every ride) is another order: rides are not held.
    let sequential = replay(Mode::Files);
    assert_eq!(sequential["input"]["outcomes"]["held"], 0);
}

#[test]
fn an_idle_ride_topic_holds_the_assignments_back_only_for_the_allowance() {
    let scratch = tempfile::tempdir().unwrap();
    let brokers = brokers();
    let (assign_topic, ride_topic) = (unique("idle-assign"), unique("idle-rides"));
    // Both topics exist; the rides stay empty.
    produce_stamped(
        &brokers,
        &ride_topic,
        "rider_id",
        &[],
        &scratch.path().join("r"),
    );
    produce_stamped(
        &brokers,
        &assign_topic,
        "rider.id",
        &[],
        &scratch.path().join("a0"),
    );
    let allowance_secs = 4;
    let cfg = config(
        &brokers,
        &unique("idle-group"),
        &assign_topic,
        &ride_topic,
        &format!("idle_allowance_secs = {allowance_secs}"),
    );
    let service = Service::start(&cfg);
    wait_for(Duration::from_secs(60), "the consumer joined", || {
        let (_, text) = service.get_text("/metrics");
        text.contains("posteriord_shard_reference_lag_seconds{shard=\"kafka/+units/0\"}")
            .then_some(())
    });
    // Assignments stamped now, while the rides stay idle.
    let stamp = now_ms();
    let line = format!(
        r#"{{"rider":{{"id":"idle-1"}},"assigned_ms":{stamp},"exp":{{"name":"unlock-chime","arm":"chime"}}}}"#
    );
    produce_stamped(
        &brokers,
        &assign_topic,
        "rider.id",
        &[(stamp, line)],
        &scratch.path().join("a"),
    );
    let units = || {
        let (_, doc) = service.get("/v1/experiments/unlock-chime");
        doc["variants"][1]["units"].as_u64().unwrap_or(0)
    };
    let seen_at = wait_for(Duration::from_secs(60), "the assignment applied", || {
        (units() == 1).then(now_ms)
    });
    let waited = seen_at - stamp;
    assert!(
        waited >= allowance_secs * 1000,
        "applied {waited} ms after its timestamp: the idle rides may hold it back for {allowance_secs} s"
    );
    assert!(
        waited < (allowance_secs + 10) * 1000,
        "applied {waited} ms after its timestamp: the idle rides held it back beyond the allowance"
    );
    // A producer clock an hour fast: the record is ordered as now + allowance, not held back
    // for an hour, and counted.
    let fast = now_ms() + 3_600_000;
    let line = format!(
        r#"{{"rider":{{"id":"idle-2"}},"assigned_ms":{fast},"exp":{{"name":"unlock-chime","arm":"chime"}}}}"#
    );
    produce_stamped(
        &brokers,
        &assign_topic,
        "rider.id",
        &[(fast, line)],
        &scratch.path().join("a2"),
    );
    wait_for(
        Duration::from_secs(3 * allowance_secs as u64 + 15),
        "the record stamped an hour ahead applied within the allowance",
        || (units() == 2).then_some(()),
    );
    assert_eq!(
        service.metric_sum(
            "posteriord_kafka_records_out_of_order_total",
            r#"why="ahead_of_clock""#
        ),
        1
    );
    // A ride stamped an hour ago reaches the idle ride topic after the shard's watermark
    // passed that time (a producer that held it back): applied at once, out of order, counted.
    let old = now_ms() - 3_600_000;
    let at = time::OffsetDateTime::from_unix_timestamp_nanos(i128::from(old) * 1_000_000)
        .unwrap()
        .format(&time::format_description::well_known::Rfc3339)
        .unwrap();
    let ride =
        format!(r#"{{"event":"ride.paid","rider_id":"idle-1","at":"{at}","event_id":"late-1"}}"#);
    produce_stamped(
        &brokers,
        &ride_topic,
        "rider_id",
        &[(old, ride)],
        &scratch.path().join("r2"),
    );
    wait_for(Duration::from_secs(30), "the late ride applied", || {
        (service.metric_sum(
            "posteriord_mapped_events_total",
            r#"outcome="before_exposure",source_name="pebble-rides""#,
        ) == 1)
            .then_some(())
    });
    assert_eq!(
        service.metric_sum(
            "posteriord_kafka_records_out_of_order_total",
            r#"why="behind_watermark""#
        ),
        1
    );
}

#[test]
fn a_sigkill_mid_stream_ends_in_the_same_counts() {
    let sc = scenario(67, 6_000);
    let cfg = sc.config("");
    let state = sc.dir.join("state");
    let log = [(
        "POSTERIORD_LOG",
        "info,posteriord::kafka::merge=debug,librdkafka=warn",
    )];
    let service = Service::start_in(&cfg, Some(&state), &log);
    // Wait until part of the stream is applied, then kill.
    wait_for(
        Duration::from_secs(60),
        "part of the stream applied",
        || {
            (service.metric_sum(
                "posteriord_mapped_events_total",
                "source_name=\"pebble-rides\"",
            ) > 500)
                .then_some(())
        },
    );
    std::thread::sleep(Duration::from_millis(300));
    signal(service.child.id(), "KILL");
    // Both topics were on the broker in full: a lane filled, its partition was paused, and
    // resumed once the merge drained it (memory bounded while one topic runs ahead).
    let log = service.log_text();
    assert!(
        log.contains("merge lane full: partition paused")
            && log.contains("merge lanes drained: partitions resumed"),
        "pause and resume at the lane bound; log:\n{log}"
    );
    let mut service = service;
    assert!(wait_exit(&mut service.child, Duration::from_secs(10)).is_some());
    drop(service);
    let service = Service::start_in(&cfg, Some(&state), &[]);
    converge(&service, &sc.want());
    assert_eq!(
        service.metric_sum(
            "posteriord_held_outcomes_decided_total",
            r#"why="lateness""#
        ),
        0
    );
}

#[test]
fn a_second_instance_joining_mid_stream_moves_a_partition_and_loses_nothing() {
    // Two partitions per topic; the second instance's arrival revokes both from the first
    // while its lanes hold records that were fetched but not applied: they are dropped and
    // read again from the positions saved with the state.
    let sc = scenario_in(71, 12_000, 2);
    let cfg = sc.config("");
    let a = Service::start_in(&cfg, Some(&sc.dir.join("state-a")), &[]);
    wait_for(
        Duration::from_secs(60),
        "part of the stream applied",
        || {
            (a.metric_sum(
                "posteriord_mapped_events_total",
                "source_name=\"pebble-rides\"",
            ) > 300)
                .then_some(())
        },
    );
    let b = Service::start_in(&cfg, Some(&sc.dir.join("state-b")), &[]);
    let joined = a.metric_sum("posteriord_mapped_events_total", "");
    let total = (sc.assignments.len() + sc.rides.len()) as u64;
    eprintln!("the second instance started with {joined} of {total} lines read by the first");
    let want = sc.want();
    // Each instance reads the other's partition through the changelog.
    converge(&a, &want);
    converge(&b, &want);
    // The partition moved mid-stream: the second instance took it over from the position the
    // first saved at its revocation, well before the partition's end (about half the lines).
    let restored: Vec<u64> = b
        .log_text()
        .lines()
        .filter(|l| l.contains("restored from the changelog"))
        .filter_map(|l| {
            l.split("next_offset=Some(")
                .nth(1)?
                .split(')')
                .next()?
                .parse()
                .ok()
        })
        .collect();
    eprintln!("the second instance restored at {restored:?} (sum of the topics' offsets)");
    assert!(
        restored.iter().any(|&n| n > 0 && n < total / 4),
        "a partition handed over mid-stream: {restored:?} of {total} lines; log:\n{}",
        b.log_text()
    );
    let moved = a.log_text().contains("partitions revoked");
    assert!(
        moved,
        "the first instance gave up partitions; log:\n{}",
        a.log_text()
    );
    for s in [&a, &b] {
        assert_eq!(
            s.metric_sum(
                "posteriord_held_outcomes_decided_total",
                r#"why="lateness""#
            ),
            0
        );
    }
}
