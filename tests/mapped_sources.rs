//! A team's own unit-keyed topics read through `[[source]]` mappings, on a real Apache Kafka
//! broker: an assignment topic (nested rider object, epoch-millisecond times) and a ride topic
//! (RFC 3339 times with offsets, no experiment), 3 partitions each, produced by the
//! independent Python client (confluent-kafka) with the rides ahead of the assignments. The
//! API's counts must equal the ground truth of tests/common/mapped.rs, computed from the raw
//! lines by event time — exactly, through SIGKILLs of posteriord.

mod common;

use std::path::PathBuf;
use std::process::Command;
use std::time::Duration;

use common::kafka::{brokers, consume, produce_keyed, unique};
use common::mapped::{config_sections, expected, observed, streams, ArmTotals, EXPERIMENTS};
use common::{signal, wait_exit, Service};
use rand::{Rng, SeedableRng};

fn config(brokers: &str, group: &str, assignments: &str, rides: &str, extra: &str) -> String {
    // A day of lateness: the rides may run far ahead of the assignments here, and every ride
    // must wait for its partition's assignments (the default bound is for live streams).
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
# The last assignments are produced just before each start: a short idle allowance lets them
# pass the ride topic, read to its end, within seconds (the default waits 30 s).
idle_allowance_secs = 2
{extra}
[kafka.properties]
"session.timeout.ms" = 3000
"heartbeat.interval.ms" = 500
{}"#,
        config_sections(assignments, rides)
    )
}

fn observed_all(service: &Service) -> Option<std::collections::BTreeMap<String, ArmTotals>> {
    let mut out = std::collections::BTreeMap::new();
    for (id, _) in EXPERIMENTS {
        let (status, doc) = service.get(&format!("/v1/experiments/{id}"));
        if status != 200 {
            return None;
        }
        out.insert(id.to_string(), observed(&doc));
    }
    Some(out)
}

/// Wait until the API's counts equal `want`, then check they stay so (nothing counted twice
/// late).
fn assert_converges(service: &Service, want: &std::collections::BTreeMap<String, ArmTotals>) {
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
    std::thread::sleep(Duration::from_secs(2));
    assert_eq!(
        observed_all(service).as_ref(),
        Some(want),
        "counts moved on"
    );
}

#[test]
fn two_unit_keyed_topics_count_exactly_by_event_time_through_sigkills() {
    let brokers = brokers();
    let (assign_topic, ride_topic) = (unique("pebble-assign"), unique("pebble-rides"));
    let group = unique("pebble-group");
    let scratch = tempfile::tempdir().unwrap();
    let state: PathBuf = scratch.path().join("state");
    let s = streams(41, 6_000, 30);
    let want = expected(&s.assignments, &s.rides);
    assert!(
        want.values().all(|t| t.successes.iter().sum::<u64>() > 100),
        "the workload exercises attribution: {want:?}"
    );
    // The ride service is ahead: every ride is on the broker before the first assignment.
    let n = produce_keyed(
        &brokers,
        &ride_topic,
        3,
        "rider_id",
        &s.rides,
        scratch.path(),
    );
    assert_eq!(n, s.rides.len());
    let cfg = config(&brokers, &group, &assign_topic, &ride_topic, "");
    let mut rng = rand::rngs::StdRng::seed_from_u64(5);
    let chunks: Vec<&[String]> = s.assignments.chunks(s.assignments.len() / 4 + 1).collect();
    for (i, chunk) in chunks.iter().enumerate() {
        let lines = chunk.to_vec();
        let n = produce_keyed(
            &brokers,
            &assign_topic,
            3,
            "rider.id",
            &lines,
            scratch.path(),
        );
        assert_eq!(n, lines.len());
        let service = Service::start_in(&cfg, Some(&state), &[]);
        // Kill while it restores, joins the group or consumes; later rounds wait longer so
        // some kills land mid-consumption with outcomes held in the saved state.
        let ms = rng.random_range(800..2_500) + 700 * i as u64;
        std::thread::sleep(Duration::from_millis(ms));
        signal(service.child.id(), "KILL");
        let mut service = service;
        assert!(wait_exit(&mut service.child, Duration::from_secs(10)).is_some());
    }
    let service = Service::start_in(&cfg, Some(&state), &[]);
    assert_converges(&service, &want);
    let late = service.metric_sum(
        "posteriord_held_outcomes_decided_total",
        r#"why="lateness""#,
    );
    assert_eq!(late, 0, "every ride waited for its assignments");
}

#[test]
fn bad_lines_are_refused_counted_and_dead_lettered_and_the_rest_counts() {
    let brokers = brokers();
    let (assign_topic, ride_topic) = (unique("pebble-assign-bad"), unique("pebble-rides-bad"));
    let dead = unique("pebble-dead");
    let group = unique("pebble-group-bad");
    let scratch = tempfile::tempdir().unwrap();
    let s = streams(43, 300, 30);
    let mut assignments = s.assignments.clone();
    let mut rides = s.rides.clone();
    let bad_assignments = [
        // No unit id (the nested object lacks it).
        r#"{"rider":{"region":"hill"},"assigned_ms":1767225601000,"exp":{"name":"unlock-chime","arm":"chime"}}"#,
        // Wrong type: the unit is an object.
        r#"{"rider":{"id":{"n":4}},"assigned_ms":1767225601000,"exp":{"name":"unlock-chime","arm":"chime"}}"#,
        // Unparseable time.
        r#"{"rider":{"id":"rider-1"},"assigned_ms":"soon","exp":{"name":"unlock-chime","arm":"chime"}}"#,
        // Not JSON at all.
        r#"{"rider":"#,
    ];
    let bad_rides = [
        r#"{"event":"ride.paid","rider_id":"rider-2","at":"yesterday","event_id":"bad-1"}"#,
        r#"{"event":"ride.paid","at":"2026-01-01T00:30:00Z","event_id":"bad-2"}"#,
        r#"{"event":"ride.paid","rider_id":true,"at":"2026-01-01T00:30:00Z","event_id":"bad-3"}"#,
        "not json",
    ];
    // Bad lines in the middle of each stream: the lines after them must still count.
    for (i, b) in bad_assignments.iter().enumerate() {
        assignments.insert(10 + 5 * i, b.to_string());
    }
    for (i, b) in bad_rides.iter().enumerate() {
        rides.insert(10 + 5 * i, b.to_string());
    }
    let want = expected(&assignments, &rides);
    let ignored = rides.iter().filter(|l| l.contains("\"app.open\"")).count() as u64;
    produce_keyed(&brokers, &ride_topic, 3, "rider_id", &rides, scratch.path());
    produce_keyed(
        &brokers,
        &assign_topic,
        3,
        "rider.id",
        &assignments,
        scratch.path(),
    );
    let extra = format!("dead_letter_topic = \"{dead}\"");
    let service = Service::start(&config(
        &brokers,
        &group,
        &assign_topic,
        &ride_topic,
        &extra,
    ));
    assert_converges(&service, &want);
    let rejected = |reason: &str| {
        service.metric_sum(
            "posteriord_events_rejected_total",
            &format!(r#"reason="{reason}""#),
        )
    };
    let total: u64 = ["missing_field", "wrong_type", "bad_time", "invalid_json"]
        .iter()
        .map(|r| {
            let n = rejected(r);
            assert!(n > 0, "a line refused as {r}; log:\n{}", service.log_text());
            n
        })
        .sum();
    assert_eq!(total, 8, "each bad line refused once, for its own reason");
    let by_source = |name: &str, outcome: &str| {
        service.metric_sum(
            "posteriord_mapped_events_total",
            &format!(r#"outcome="{outcome}",source_name="{name}""#),
        )
    };
    assert_eq!(by_source("pebble-rides", "ignored"), ignored);
    assert_eq!(by_source("pebble-rides", "rejected"), 4);
    assert_eq!(by_source("pebble-assign", "rejected"), 4);
    // The dead letters, read back with the independent client, carry each line and reason.
    let letters = consume(&brokers, &dead, 8);
    assert_eq!(letters.len(), 8);
    for bad in bad_assignments.iter().chain(&bad_rides) {
        let letter = letters
            .iter()
            .find(|l| l["value"] == *bad)
            .unwrap_or_else(|| panic!("dead letter of {bad} in {letters:?}"));
        assert!(letter["headers"]["posteriord-reason"].is_string());
        assert!(letter["headers"]["posteriord-message"].is_string());
    }
    // Still serving.
    assert_eq!(service.get("/v1/experiments").0, 200);
}

#[test]
fn topics_of_different_partition_counts_are_refused_at_start_up() {
    let brokers = brokers();
    let (assign_topic, ride_topic) = (unique("pebble-assign-3"), unique("pebble-rides-2"));
    let scratch = tempfile::tempdir().unwrap();
    let s = streams(47, 20, 2);
    produce_keyed(
        &brokers,
        &assign_topic,
        3,
        "rider.id",
        &s.assignments,
        scratch.path(),
    );
    produce_keyed(
        &brokers,
        &ride_topic,
        2,
        "rider_id",
        &s.rides,
        scratch.path(),
    );
    let cfg = config(
        &brokers,
        &unique("pebble-group-mismatch"),
        &assign_topic,
        &ride_topic,
        "",
    );
    let path = scratch.path().join("posteriord.toml");
    std::fs::write(&path, cfg).unwrap();
    let mut child = Command::new(common::bin())
        .args(["serve", "--config"])
        .arg(&path)
        .env("POSTERIORD_STORE_DIR", scratch.path().join("state"))
        .stdout(std::process::Stdio::null())
        .stderr(std::fs::File::create(scratch.path().join("err")).unwrap())
        .spawn()
        .unwrap();
    let status = wait_exit(&mut child, Duration::from_secs(60)).expect("refused, not running");
    assert!(!status.success());
    let err = std::fs::read_to_string(scratch.path().join("err")).unwrap();
    assert!(
        err.contains(&format!("`{assign_topic}` 3")) && err.contains(&format!("`{ride_topic}` 2")),
        "the error names each topic with its count: {err}"
    );
}

#[test]
fn a_topic_read_both_built_in_and_mapped_is_a_config_error_with_key_and_line() {
    let scratch = tempfile::tempdir().unwrap();
    let cfg = format!(
        "[kafka]\nbrokers = \"127.0.0.1:9\"\ntopics = [\"pebble-assign\"]\n{}",
        config_sections("pebble-assign", "pebble-rides")
    );
    let path = scratch.path().join("p.toml");
    std::fs::write(&path, &cfg).unwrap();
    let out = Command::new(common::bin())
        .arg("check-config")
        .arg(&path)
        .output()
        .unwrap();
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("source[0].topics"), "{err}");
    assert!(err.contains("also in kafka.topics"), "{err}");
    // The line of the source's `topics` (the second `topics =` line of the file).
    let want_line = cfg
        .lines()
        .enumerate()
        .filter(|(_, l)| l.starts_with("topics = "))
        .nth(1)
        .map(|(i, _)| i + 1)
        .unwrap();
    assert!(
        err.contains(&format!("p.toml:{want_line}:")),
        "line {want_line} in: {err}"
    );
    assert_eq!(out.status.code(), Some(2));
}
