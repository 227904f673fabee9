//! A team's own streams for the mapped-source tests, and the ground truth computed from their
//! raw lines by event time — with serde_json and the `time` crate, not posteriord's decoding
//! or attribution code.
//!
//! The invented team: Pebblebrook Scooters. Its assignment service writes one line per
//! assignment, the rider in a nested object and the time in epoch milliseconds; its ride
//! service writes business events with RFC 3339 times in the rider's local offset and no
//! experiment. Both topics are keyed by rider.

use std::collections::{BTreeMap, HashMap, HashSet};

use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use serde_json::{json, Value};

/// The experiments, their variants (in configuration order) and the two metrics.
pub const EXPERIMENTS: [(&str, [&str; 2]); 2] = [
    ("unlock-chime", ["silent", "chime"]),
    ("fare-preview", ["hidden", "shown"]),
];

/// The configuration of the two experiments and the two `[[source]]`s over `assignments`
/// and `rides`.
pub fn config_sections(assignments: &str, rides: &str) -> String {
    let mut s = String::new();
    for (id, [a, b]) in EXPERIMENTS {
        s.push_str(&format!(
            r#"
[[experiment]]
id = "{id}"
control = "{a}"
variants = [ {{ name = "{a}" }}, {{ name = "{b}" }} ]
[[experiment.metric]]
name = "paid-ride"
kind = "conversion"
[[experiment.metric]]
name = "crash"
kind = "defect_rate"
exposure = "units"
"#
        ));
    }
    s.push_str(&format!(
        r#"
[[source]]
name = "pebble-assign"
topics = ["{assignments}"]
unit = "rider.id"
time = "assigned_ms"
time_format = "epoch_millis"
experiment = "exp.name"
variant = "exp.arm"
exposures = ["assigned"]
constants = {{ event = "assigned" }}

[[source]]
name = "pebble-rides"
topics = ["{rides}"]
unit = "rider_id"
time = "at"
event = "event"
id = "event_id"
metrics = {{ "ride.paid" = "paid-ride", "app.crash" = "crash" }}
"#
    ));
    s
}

/// 2026-01-01T00:00:00Z (`date -u -d @1767225600`).
pub const T0_SECS: i64 = 1_767_225_600;

/// The two streams, each in its producer's (event-time) order.
pub struct Streams {
    pub assignments: Vec<String>,
    pub rides: Vec<String>,
}

/// RFC 3339 text of `millis` since the epoch in the UTC offset `offset_minutes`.
fn rfc3339(millis: i64, offset_minutes: i32) -> String {
    let t = time::OffsetDateTime::from_unix_timestamp_nanos(i128::from(millis) * 1_000_000)
        .unwrap()
        .to_offset(time::UtcOffset::from_whole_seconds(offset_minutes * 60).unwrap());
    t.format(&time::format_description::well_known::Rfc3339)
        .unwrap()
}

/// `n` riders over an hour: each in one or both experiments (a few in none), with duplicate
/// assignment lines, paid rides, crashes and ignored app opens before and after their
/// assignments; then `tail` riders assigned after every ride, so each partition's assignment
/// stream passes the last ride's time.
pub fn streams(seed: u64, n: usize, tail: usize) -> Streams {
    let mut rng = StdRng::seed_from_u64(seed);
    let mut assignments: Vec<(i64, String)> = Vec::new();
    let mut rides: Vec<(i64, String)> = Vec::new();
    let hour_ms = 3_600_000;
    for r in 0..n {
        let rider = format!("rider-{r}");
        let mut chosen: Vec<usize> = Vec::new();
        match rng.random_range(0..10) {
            0 => {}
            1..=4 => chosen.push(0),
            5..=6 => chosen.push(1),
            _ => chosen.extend([0, 1]),
        }
        for x in chosen {
            let (exp, arms) = EXPERIMENTS[x];
            let arm = arms[rng.random_range(0..2)];
            let at = T0_SECS * 1000 + rng.random_range(0..hour_ms);
            let region = ["north", "harbour", "hill"][r % 3];
            let line = json!({
                "rider": {"id": rider, "region": region},
                "assigned_ms": at,
                "exp": {"name": exp, "arm": arm}
            });
            assignments.push((at, line.to_string()));
            if rng.random_bool(0.05) {
                // The assignment service re-sends the same assignment later.
                let again = at + rng.random_range(1..60_000);
                let mut dup = line.clone();
                dup["assigned_ms"] = json!(again);
                assignments.push((again, dup.to_string()));
            }
        }
        for k in 0..rng.random_range(1..7) {
            let at = T0_SECS * 1000 + rng.random_range(0..hour_ms + 60_000);
            let event = match rng.random_range(0..10) {
                0..=5 => "ride.paid",
                6..=7 => "app.crash",
                _ => "app.open",
            };
            let offset = [0, 60, -300, 330][rng.random_range(0..4)];
            let mut line = json!({
                "event": event,
                "rider_id": rider,
                "at": rfc3339(at, offset),
                "event_id": format!("ev-{r}-{k}"),
                "fare_cents": rng.random_range(150..900),
            });
            if rng.random_bool(0.03) {
                // A retried write: same event id, applied once.
                rides.push((at, line.to_string()));
                line["fare_cents"] = json!(0);
            }
            rides.push((at, line.to_string()));
        }
    }
    let late = T0_SECS * 1000 + 2 * hour_ms;
    for t in 0..tail {
        let line = json!({
            "rider": {"id": format!("tail-{t}"), "region": "depot"},
            "assigned_ms": late + t as i64,
            "exp": {"name": "unlock-chime", "arm": "silent"}
        });
        assignments.push((late + t as i64, line.to_string()));
    }
    assignments.sort_by_key(|(t, _)| *t);
    rides.sort_by_key(|(t, _)| *t);
    Streams {
        assignments: assignments.into_iter().map(|(_, l)| l).collect(),
        rides: rides.into_iter().map(|(_, l)| l).collect(),
    }
}

/// Expected totals of one experiment, per variant in configuration order.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct ArmTotals {
    pub units: Vec<u64>,
    pub trials: Vec<u64>,
    pub successes: Vec<u64>,
    pub crashes: Vec<u64>,
    pub crash_exposure: Vec<f64>,
}

/// Whole seconds of epoch milliseconds (floor).
fn secs_of_millis(ms: i64) -> i64 {
    ms.div_euclid(1000)
}

/// The ground truth by event time, read from the raw lines: a rider's first assignment per
/// experiment fixes its arm and second; a paid ride counts once per rider and experiment, a
/// crash every time (once per event id), when it is in or after the assignment's second.
/// Lines that are not valid for their source count nowhere.
pub fn expected(assignments: &[String], rides: &[String]) -> BTreeMap<String, ArmTotals> {
    // experiment → rider → (arm index, second of first assignment)
    let mut exposed: HashMap<&str, HashMap<String, (usize, i64)>> = HashMap::new();
    for line in assignments {
        let Ok(v) = serde_json::from_str::<Value>(line) else {
            continue;
        };
        let (Some(rider), Some(ms), Some(exp), Some(arm)) = (
            v["rider"]["id"].as_str(),
            v["assigned_ms"].as_i64(),
            v["exp"]["name"].as_str(),
            v["exp"]["arm"].as_str(),
        ) else {
            continue;
        };
        let Some((id, arms)) = EXPERIMENTS.iter().find(|(id, _)| *id == exp) else {
            continue;
        };
        let Some(a) = arms.iter().position(|x| *x == arm) else {
            continue;
        };
        exposed
            .entry(id)
            .or_default()
            .entry(rider.to_string())
            .or_insert((a, secs_of_millis(ms)));
    }
    let mut out = BTreeMap::new();
    for (id, _) in EXPERIMENTS {
        let members = exposed.remove(id).unwrap_or_default();
        let mut t = ArmTotals {
            units: vec![0; 2],
            trials: vec![0; 2],
            successes: vec![0; 2],
            crashes: vec![0; 2],
            crash_exposure: vec![0.0; 2],
        };
        for (a, _) in members.values() {
            t.units[*a] += 1;
            t.trials[*a] += 1;
            t.crash_exposure[*a] += 1.0;
        }
        let mut paid: HashSet<&str> = HashSet::new();
        let mut ids: HashSet<&str> = HashSet::new();
        for line in rides {
            let Ok(v) = serde_json::from_str::<Value>(line) else {
                continue;
            };
            let (Some(event), Some(rider), Some(at)) = (
                v["event"].as_str(),
                v["rider_id"].as_str(),
                v["at"].as_str(),
            ) else {
                continue;
            };
            let Ok(when) =
                time::OffsetDateTime::parse(at, &time::format_description::well_known::Rfc3339)
            else {
                continue;
            };
            let Some(&(a, from)) = members.get(rider) else {
                continue;
            };
            if when.unix_timestamp() < from {
                continue;
            }
            let id = v["event_id"].as_str().unwrap_or("");
            match event {
                "ride.paid" if !ids.contains(id) => {
                    ids.insert(id_of(line, &v));
                    if paid.insert(rider_of(line, &v)) {
                        t.successes[a] += 1;
                    }
                }
                "app.crash" if !ids.contains(id) => {
                    ids.insert(id_of(line, &v));
                    t.crashes[a] += 1;
                }
                _ => {}
            }
        }
        out.insert(id.to_string(), t);
    }
    out
}

/// The event id of `line` as a slice of the line (so the set can borrow it).
fn id_of<'a>(line: &'a str, v: &Value) -> &'a str {
    slice_of(line, v["event_id"].as_str().unwrap_or(""))
}

fn rider_of<'a>(line: &'a str, v: &Value) -> &'a str {
    slice_of(line, v["rider_id"].as_str().unwrap_or(""))
}

/// `needle`'s text inside `line` (ids here carry no escapes, so they appear verbatim).
fn slice_of<'a>(line: &'a str, needle: &str) -> &'a str {
    let at = line.find(needle).expect("an id appears in its line");
    &line[at..at + needle.len()]
}

/// The totals of experiment `id` in its `GET /v1/experiments/{id}` document.
pub fn observed(doc: &Value) -> ArmTotals {
    let metric = |name: &str| {
        doc["metrics"]
            .as_array()
            .unwrap()
            .iter()
            .find(|m| m["name"] == name)
            .unwrap_or_else(|| panic!("metric {name} in {doc}"))
            .clone()
    };
    let (paid, crash) = (metric("paid-ride"), metric("crash"));
    let at = |m: &Value, i: usize, f: &str| m["variants"][i][f].as_u64().unwrap();
    ArmTotals {
        units: (0..2)
            .map(|i| doc["variants"][i]["units"].as_u64().unwrap())
            .collect(),
        trials: (0..2).map(|i| at(&paid, i, "trials")).collect(),
        successes: (0..2).map(|i| at(&paid, i, "successes")).collect(),
        crashes: (0..2).map(|i| at(&crash, i, "count")).collect(),
        crash_exposure: (0..2)
            .map(|i| crash["variants"][i]["exposure"].as_f64().unwrap())
            .collect(),
    }
}
