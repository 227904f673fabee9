//! `posteriord replay` against the live service: a recorded stream produced to a one-partition
//! topic on a real Kafka-protocol broker by the independent client (Python confluent-kafka,
//! tests/tools/produce.py) and consumed by `posteriord serve` yields exactly the alerts that
//! `replay` computes from the same file (ids, states, times, values — bit for bit); bad and
//! truncated lines are reported with their line numbers, skipped and counted.

mod common;

use std::io::Write;
use std::process::{Command, Stdio};
use std::time::Duration;

use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use serde_json::Value;

use common::kafka::{brokers, produce, unique};
use common::{wait_for, Service};

/// Crumb & Co's checkout test (invented): `short-copy` converts clearly worse than the
/// control, `big-button` better. Evaluated every 60 s of event time or 500 events.
const EXPERIMENT: &str = r#"
[alerts]
evaluate_every_secs = 60
evaluate_every_events = 500
hold_down_secs = 120

[[experiment]]
id = "crumb-checkout"
control = "control"
min_duration_days = 0
variants = [ { name = "control", weight = 0.34 }, { name = "short-copy", weight = 0.33 }, { name = "big-button", weight = 0.33 } ]
[[experiment.metric]]
name = "purchase"
kind = "conversion"
[experiment.metric.rules]
min_units = 300
ship = { threshold_of_caring = 0.002 }
harm = { probability = 0.99 }

[[experiment]]
id = "orchard-reminders"
control = "control"
variants = [ { name = "control", weight = 0.5 }, { name = "nudge", weight = 0.5 } ]
[[experiment.metric]]
name = "watering"
kind = "conversion"
[experiment.metric.rules]
min_units = 100
harm = { probability = 0.95 }
"#;

/// A recorded stream: `units` shoppers one second apart (event time), each exposed and
/// perhaps converting a few seconds later, with some dirt: repeats, orphans, a line that is
/// not JSON, and an event for an unknown variant. Interleaved with it, Pocket Orchard's
/// reminder test (invented), whose `nudge` looks harmful at first and then recovers, so its
/// harm alert opens, eases and closes after the hold-down of event time.
fn stream(seed: u64, units: usize) -> Vec<String> {
    let mut rng = StdRng::seed_from_u64(seed);
    let arms = [
        ("control", 0.10),
        ("short-copy", 0.05),
        ("big-button", 0.15),
    ];
    let start = 1_780_000_000i64; // 2026-05-28, seconds
    let at = |s: i64| {
        time::OffsetDateTime::from_unix_timestamp(s)
            .unwrap()
            .format(&time::format_description::well_known::Rfc3339)
            .unwrap()
    };
    let mut lines = Vec::new();
    for i in 0..units {
        let t = start + i as i64;
        let (arm, rate) = arms[rng.random_range(0..arms.len())];
        lines.push(format!(
            r#"{{"type":"exposure","experiment":"crumb-checkout","variant":"{arm}","unit":"shopper-{i}","time":"{}"}}"#,
            at(t)
        ));
        if rng.random_bool(rate) {
            lines.push(format!(
                r#"{{"type":"conversion","experiment":"crumb-checkout","metric":"purchase","unit":"shopper-{i}","time":"{}"}}"#,
                at(t + rng.random_range(1..5))
            ));
        }
        if i % 701 == 0 {
            lines.push(lines[lines.len() - 1].clone());
        }
        if i % 1009 == 0 {
            lines.push(format!(
                r#"{{"type":"conversion","experiment":"crumb-checkout","metric":"purchase","unit":"ghost-{i}","time":"{}"}}"#,
                at(t)
            ));
        }
        if i % 2 == 0 {
            let j = i / 2;
            let (arm, rate) = if rng.random_bool(0.5) {
                ("control", 0.3)
            } else if j < 400 {
                ("nudge", 0.1)
            } else {
                ("nudge", 0.6)
            };
            lines.push(format!(
                r#"{{"type":"exposure","experiment":"orchard-reminders","variant":"{arm}","unit":"gardener-{j}","time":"{}"}}"#,
                at(t)
            ));
            if rng.random_bool(rate) {
                lines.push(format!(
                    r#"{{"type":"conversion","experiment":"orchard-reminders","metric":"watering","unit":"gardener-{j}","time":"{}"}}"#,
                    at(t)
                ));
            }
        }
        if i == 2500 {
            lines.push("this line is not an event".into());
            lines.push(format!(
                r#"{{"type":"exposure","experiment":"crumb-checkout","variant":"huge-button","unit":"x-{i}","time":"{}"}}"#,
                at(t)
            ));
        }
    }
    lines
}

fn replay_json(config: &std::path::Path, files: &[&std::path::Path]) -> Value {
    let out = Command::new(common::bin())
        .arg("replay")
        .arg("--config")
        .arg(config)
        .args(files)
        .arg("--json")
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "replay failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).expect("replay --json prints JSON")
}

/// An alert as compared: everything except the input positions (shard names differ: a Kafka
/// partition live, the file in replay) and acknowledgements (an operator action).
fn comparable(alert: &Value) -> Value {
    let mut a = alert.clone();
    let m = a.as_object_mut().unwrap();
    m.remove("acknowledged_at");
    m["evidence"].as_object_mut().unwrap().remove("positions");
    a
}

#[test]
fn replay_decides_exactly_what_the_live_service_decided() {
    let brokers = brokers();
    let topic = unique("replay-events");
    let group = unique("posteriord-replay");
    let scratch = tempfile::tempdir().unwrap();
    let lines = stream(5, 6000);
    assert_eq!(
        produce(&brokers, &topic, 1, &lines, scratch.path()),
        lines.len()
    );
    let config = format!(
        r#"[http]
addr = "127.0.0.1:0"
[kafka]
brokers = "{brokers}"
topics = ["{topic}"]
group = "{group}"
{EXPERIMENT}"#
    );
    let service = Service::start(&config);
    let offset_line = format!(
        "posteriord_kafka_next_offset{{partition=\"0\",topic=\"{topic}\"}} {}",
        lines.len()
    );
    wait_for(
        Duration::from_secs(180),
        "every message applied and every due evaluation done",
        || {
            let (_, text) = service.get_text("/metrics");
            let queued =
                common::metric_sum_in(&text, "posteriord_evaluations_total", r#"stage="queued""#);
            let done =
                common::metric_sum_in(&text, "posteriord_evaluations_total", r#"stage="done""#);
            (text.contains(&offset_line) && queued == done && queued > 0).then_some(())
        },
    );
    let (_, live) = service.get("/v1/alerts?limit=1000");
    let mut live: Vec<Value> = live["alerts"]
        .as_array()
        .unwrap()
        .iter()
        .map(comparable)
        .collect();

    let file = scratch.path().join("recorded.ndjson");
    std::fs::write(&file, lines.join("\n") + "\n").unwrap();
    let config_file = scratch.path().join("posteriord.toml");
    std::fs::write(&config_file, &config).unwrap();
    let replayed = replay_json(&config_file, &[&file]);
    let mut offline: Vec<Value> = replayed["alerts"]
        .as_array()
        .unwrap()
        .iter()
        .map(comparable)
        .collect();
    // The API lists alerts by opening time, then id; replay in the order they were raised.
    // Alerts opened at the same event time are compared in the API's order.
    for list in [&mut live, &mut offline] {
        list.sort_by(|a, b| {
            let key = |x: &Value| (x["opened_at"].to_string(), x["id"].to_string());
            key(a).cmp(&key(b))
        });
    }
    let rules: Vec<&str> = offline.iter().filter_map(|a| a["rule"].as_str()).collect();
    eprintln!(
        "{} alerts live, {} in replay ({rules:?}); {} evaluations in replay",
        live.len(),
        offline.len(),
        replayed["evaluations"]
    );
    assert!(
        rules.contains(&"harm") && rules.contains(&"ship"),
        "the stream should raise harm and record a ship decision: {rules:?}"
    );
    assert!(
        offline.iter().any(|a| a["state"] == "closed"),
        "the stream should close an alert after its hold-down: {offline:?}"
    );
    assert_eq!(live.len(), offline.len(), "alert counts differ");
    for (l, o) in live.iter().zip(&offline) {
        assert_eq!(l, o, "an alert differs between live and replay");
    }
    let (_, text) = service.get_text("/metrics");
    assert_eq!(
        common::metric_sum_in(&text, "posteriord_evaluations_total", r#"stage="done""#),
        replayed["evaluations"].as_u64().unwrap(),
        "live and replay evaluated at different events"
    );
    assert_eq!(replayed["input"]["bad_lines"], 2);
}

#[test]
fn bad_and_truncated_lines_are_reported_with_their_line_numbers() {
    let dir = tempfile::tempdir().unwrap();
    let config = dir.path().join("posteriord.toml");
    std::fs::write(
        &config,
        format!("[http]\naddr = \"127.0.0.1:0\"\n{EXPERIMENT}"),
    )
    .unwrap();
    let mut lines = stream(6, 300);
    let clean = lines.len();
    lines.insert(10, "{\"type\":\"exposure\",".into()); // line 11
    lines.insert(20, String::new()); // line 21: blank, skipped silently
    let mut text = lines.join("\n");
    // A file cut off in the middle of its last event, as a crashed recorder leaves it.
    text.push_str("\n{\"type\":\"conversion\",\"experiment\":\"crumb-chec");
    let file = dir.path().join("cut.ndjson");
    std::fs::write(&file, &text).unwrap();
    let doc = replay_json(&config, &[&file]);
    let errors = doc["errors"].as_array().unwrap();
    let numbers: Vec<u64> = errors.iter().map(|e| e["line"].as_u64().unwrap()).collect();
    let last = lines.len() as u64 + 1;
    // The stream's own bad lines (none below 300 units) plus the two made here.
    assert_eq!(numbers, vec![11, last], "{errors:?}");
    assert!(
        errors.iter().all(|e| e["reason"] == "invalid_json"),
        "{errors:?}"
    );
    assert_eq!(doc["input"]["bad_lines"], 2);
    assert_eq!(doc["input"]["lines"], last);
    assert_eq!(doc["input"]["events"], clean as u64);

    // The same through standard input, as text for a person.
    let mut child = Command::new(common::bin())
        .args(["replay", "--config"])
        .arg(&config)
        .arg("-")
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .spawn()
        .unwrap();
    child
        .stdin
        .take()
        .unwrap()
        .write_all(text.as_bytes())
        .unwrap();
    let out = child.wait_with_output().unwrap();
    assert!(out.status.success());
    let shown = String::from_utf8_lossy(&out.stdout);
    assert!(shown.contains("bad line -:11:"), "{shown}");
    assert!(shown.contains(&format!("bad line -:{last}:")), "{shown}");
    assert!(shown.contains("2 bad lines skipped"), "{shown}");

    // A missing file is a usage error that names it.
    let out = Command::new(common::bin())
        .args(["replay", "--config"])
        .arg(&config)
        .arg(dir.path().join("missing.ndjson"))
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("missing.ndjson"));
}

/// The alert changes of a replay as (alert id, change) pairs.
fn changes(doc: &Value) -> Vec<(String, String)> {
    doc["decisions"]
        .as_array()
        .unwrap()
        .iter()
        .map(|d| {
            (
                d["id"].as_str().unwrap().to_string(),
                d["change"].as_str().unwrap().to_string(),
            )
        })
        .collect()
}

#[test]
fn each_decision_names_the_line_of_the_event_that_made_it_due() {
    let dir = tempfile::tempdir().unwrap();
    let config = dir.path().join("posteriord.toml");
    std::fs::write(
        &config,
        format!("[http]\naddr = \"127.0.0.1:0\"\n{EXPERIMENT}"),
    )
    .unwrap();
    let lines = stream(6, 3000);
    let file = dir.path().join("recorded.ndjson");
    std::fs::write(&file, lines.join("\n")).unwrap();
    let doc = replay_json(&config, &[&file]);
    let decisions = doc["decisions"].as_array().unwrap().clone();
    assert!(decisions.len() >= 2, "{decisions:?}");
    let named: Vec<u64> = decisions
        .iter()
        .map(|d| d["line"].as_u64().unwrap())
        .collect();
    assert!(
        named.iter().all(|&n| n >= 1 && n < lines.len() as u64),
        "lines {named:?} of {}",
        lines.len()
    );
    // The evidence's input position is just past that event too (the file has no blank
    // lines, so the replay offset of line N is N - 1).
    for d in decisions.iter().filter(|d| d["change"] == "opened") {
        let positions = d["evidence"]["positions"].as_array().unwrap();
        assert_eq!(
            positions,
            &vec![serde_json::json!({"shard": "replay", "next_offset": d["line"]})],
            "{d}"
        );
    }
    // Independent of how replay counts: the file cut just before the named line does not
    // yet make the decision, and the file cut just after it does.
    for d in decisions.iter().take(3) {
        let n = d["line"].as_u64().unwrap() as usize;
        let key = (
            d["id"].as_str().unwrap().to_string(),
            d["change"].as_str().unwrap().to_string(),
        );
        let cut = |upto: usize| {
            let path = dir.path().join(format!("first-{upto}.ndjson"));
            std::fs::write(&path, lines[..upto].join("\n")).unwrap();
            changes(&replay_json(&config, &[&path]))
        };
        assert!(
            !cut(n - 1).contains(&key),
            "{key:?} already before line {n}"
        );
        assert!(cut(n).contains(&key), "{key:?} not made by line {n}");
        // The named line is an event of the decision's experiment.
        assert!(
            lines[n - 1].contains(d["experiment"].as_str().unwrap()),
            "line {n}: {}",
            lines[n - 1]
        );
    }

    // The text names the same places, and the final state lists variants by name with
    // their final posteriors.
    let out = Command::new(common::bin())
        .args(["replay", "--config"])
        .arg(&config)
        .arg(&file)
        .output()
        .unwrap();
    assert!(out.status.success());
    let shown = String::from_utf8_lossy(&out.stdout);
    assert!(
        shown.contains(&format!("(at {}:{})", file.display(), named[0])),
        "{shown}"
    );
    let units = &doc["experiments"];
    let crumb = units
        .as_array()
        .unwrap()
        .iter()
        .find(|e| e["id"] == "crumb-checkout")
        .unwrap();
    let short = &crumb["variants"]
        .as_array()
        .unwrap()
        .iter()
        .find(|v| v["name"] == "short-copy")
        .unwrap()["units"];
    assert!(
        shown.contains(&format!("    short-copy: {short} units")),
        "{shown}"
    );
    assert!(shown.contains("    control (control): "), "{shown}");
    assert!(shown.contains("purchase         Beta("), "{shown}");
    assert!(shown.contains("posterior mean "), "{shown}");
}
