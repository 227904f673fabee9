//! Event time that one bad clock cannot corrupt, end to end: 1% of the events come from
//! invented devices whose clocks are off by hours or years, sent over real HTTP and produced
//! to a real broker by the independent client (Python confluent-kafka,
//! tests/tools/produce.py, with explicit record timestamps). The totals equal an independent
//! model of the documented rule (docs/events.md, "Event time"); the decisions equal those of
//! the same stream without the skewed events; `replay` of the topic dump with its timestamp
//! column equals the live service; and the issue's reproduction — one exposure stamped
//! 9999-12-31 among 2000 — neither ends the experiment nor stalls its evaluations.

mod common;

use std::collections::{BTreeMap, BTreeSet};
use std::process::Command;
use std::time::Duration;

use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use serde_json::Value;

use common::kafka::{brokers, consume_within, unique};
use common::{wait_for, Service};

const EXPERIMENT_ID: &str = "fernhill-onboarding";

/// Fernhill Nursery's onboarding test (an invented plant nursery's app): `quick-tour`
/// converts to a first order clearly less often than the control, so a harm alert opens.
const EXPERIMENT: &str = r#"
[alerts]
evaluate_every_secs = 60
evaluate_every_events = 500
hold_down_secs = 120

[[experiment]]
id = "fernhill-onboarding"
control = "control"
min_duration_days = 0
max_duration_days = 28
variants = [ { name = "control", weight = 0.5 }, { name = "quick-tour", weight = 0.5 } ]
[[experiment.metric]]
name = "first-order"
kind = "conversion"
[experiment.metric.rules]
min_units = 200
harm = { probability = 0.99 }
"#;

/// The bounds of these tests: 5 minutes ahead (the default), 6 hours behind.
const MAX_AHEAD_S: i64 = 300;
const MAX_BEHIND_S: i64 = 6 * 3600;
const BEHIND_DAYS: &str = "0.25";

const YEAR_S: i64 = 365 * 86_400;

/// Clock offsets of the invented skewed devices (a kiosk an hour zone off, a tablet that lost
/// its battery, a phone set to another year, a set-top box that boots at 2006).
const SKEWS_S: [i64; 4] = [3 * 3600, -9 * 3600, 7 * YEAR_S, -20 * YEAR_S];

/// One line of a stream: the reference (Kafka record timestamp, ms), the event, its time
/// (s) and whether its device's clock is off.
#[derive(Debug, Clone)]
struct Line {
    reference_ms: i64,
    time_s: i64,
    json: String,
    skewed: bool,
    unit: String,
    variant: &'static str,
    conversion: bool,
}

fn rfc3339(s: i64) -> String {
    time::OffsetDateTime::from_unix_timestamp(s)
        .unwrap()
        .format(&time::format_description::well_known::Rfc3339)
        .unwrap()
}

fn now_s() -> i64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .unwrap()
        .as_secs() as i64
}

/// `units` users one second apart from `base` (true time), each exposed and perhaps ordering
/// a few seconds later; the record timestamp is the true time plus a delivery delay of up to
/// 3 s. 1% of the units are on a skewed device: all their events carry its offset.
fn stream(seed: u64, units: usize, base: i64) -> Vec<Line> {
    let mut rng = StdRng::seed_from_u64(seed);
    let mut lines = Vec::new();
    for i in 0..units {
        let t = base + i as i64;
        let (variant, rate) = if rng.random_bool(0.5) {
            ("control", 0.12)
        } else {
            ("quick-tour", 0.05)
        };
        let skew = if rng.random_bool(0.01) {
            SKEWS_S[rng.random_range(0..SKEWS_S.len())]
        } else {
            0
        };
        let unit = format!("seedling-{i}");
        let delay = rng.random_range(0..3000);
        lines.push(Line {
            reference_ms: t * 1000 + delay,
            time_s: t + skew,
            json: format!(
                r#"{{"type":"exposure","experiment":"{EXPERIMENT_ID}","variant":"{variant}","unit":"{unit}","time":"{}"}}"#,
                rfc3339(t + skew)
            ),
            skewed: skew != 0,
            unit: unit.clone(),
            variant,
            conversion: false,
        });
        if rng.random_bool(rate) {
            let later = t + rng.random_range(1..5);
            lines.push(Line {
                reference_ms: later * 1000 + delay,
                time_s: later + skew,
                json: format!(
                    r#"{{"type":"conversion","experiment":"{EXPERIMENT_ID}","metric":"first-order","unit":"{unit}","time":"{}"}}"#,
                    rfc3339(later + skew)
                ),
                skewed: skew != 0,
                unit,
                variant,
                conversion: true,
            });
        }
    }
    // Record timestamps of one partition are in produce order.
    lines.sort_by_key(|l| l.reference_ms);
    lines
}

/// The documented rule, written out independently: `Some("time_ahead" | "time_behind")` for
/// an event refused against reference `reference_s`.
fn verdict(time_s: i64, reference_s: f64) -> Option<&'static str> {
    let diff = time_s as f64 - reference_s;
    if diff > MAX_AHEAD_S as f64 {
        Some("time_ahead")
    } else if -diff > MAX_BEHIND_S as f64 {
        Some("time_behind")
    } else {
        None
    }
}

/// Totals the model expects: exposed units and conversions per variant, refusals by reason.
#[derive(Debug, Default, PartialEq)]
struct Model {
    units: BTreeMap<&'static str, u64>,
    conversions: BTreeMap<&'static str, u64>,
    refused: BTreeMap<&'static str, u64>,
    clamped: u64,
}

/// Apply `lines` to the model; `refuse(line)` says whether a line is out of bounds, and with
/// `clamp` such a line is applied anyway (at its reference).
fn model(lines: &[Line], refuse: impl Fn(&Line) -> Option<&'static str>, clamp: bool) -> Model {
    let mut m = Model::default();
    let mut exposed = BTreeSet::new();
    for l in lines {
        if let Some(reason) = refuse(l) {
            if !clamp {
                *m.refused.entry(reason).or_default() += 1;
                continue;
            }
            m.clamped += 1;
        }
        if !l.conversion {
            if exposed.insert(l.unit.clone()) {
                *m.units.entry(l.variant).or_default() += 1;
            }
        } else if exposed.contains(&l.unit) {
            *m.conversions.entry(l.variant).or_default() += 1;
        }
    }
    m
}

/// The service's totals in the same shape.
fn observed(doc: &Value, event_time: &Value, source: &str) -> Model {
    let mut m = Model::default();
    for (i, v) in ["control", "quick-tour"].into_iter().enumerate() {
        m.units
            .insert(v, doc["variants"][i]["units"].as_u64().unwrap());
        m.conversions.insert(
            v,
            doc["metrics"][0]["variants"][i]["successes"]
                .as_u64()
                .unwrap(),
        );
    }
    let s = event_time["sources"]
        .as_array()
        .unwrap()
        .iter()
        .find(|s| s["source"] == source)
        .unwrap();
    for (reason, dir) in [("time_ahead", "ahead"), ("time_behind", "behind")] {
        let n = s["refused"][dir].as_u64().unwrap();
        if n > 0 {
            m.refused.insert(reason, n);
        }
    }
    m.clamped = s["clamped"]["ahead"].as_u64().unwrap() + s["clamped"]["behind"].as_u64().unwrap();
    m.units.retain(|_, n| *n > 0);
    m.conversions.retain(|_, n| *n > 0);
    m
}

fn tidy(mut m: Model) -> Model {
    m.units.retain(|_, n| *n > 0);
    m.conversions.retain(|_, n| *n > 0);
    m
}

fn write_config(dir: &std::path::Path, extra: &str) -> std::path::PathBuf {
    let path = dir.join(format!("replay-{}.toml", extra.len()));
    std::fs::write(
        &path,
        format!("[http]\naddr = \"127.0.0.1:0\"\n{extra}\n{EXPERIMENT}"),
    )
    .unwrap();
    path
}

fn replay(config: &std::path::Path, file: &std::path::Path) -> Value {
    let out = Command::new(common::bin())
        .arg("replay")
        .arg("--config")
        .arg(config)
        .arg(file)
        .arg("--json")
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "replay failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

/// An alert as compared: without input positions (a partition live, a file in replay).
fn comparable(alerts: &Value) -> Vec<Value> {
    alerts
        .as_array()
        .unwrap()
        .iter()
        .map(|a| {
            let mut a = a.clone();
            let m = a.as_object_mut().unwrap();
            m.remove("acknowledged_at");
            m["evidence"].as_object_mut().unwrap().remove("positions");
            a
        })
        .collect()
}

fn bounds_toml() -> String {
    format!("[event_time]\nmax_ahead_secs = {MAX_AHEAD_S}\nmax_behind_days = {BEHIND_DAYS}\n")
}

/// The experiment's document once it shows `units` exposed units (readers share a summary for
/// up to a second, so one read right after the last event may be older).
fn settled_doc(service: &Service, units: u64) -> Value {
    wait_for(
        Duration::from_secs(10),
        "the document to show every unit",
        || {
            let (_, doc) = service.get(&format!("/v1/experiments/{EXPERIMENT_ID}"));
            let seen: u64 = (0..2)
                .map(|i| doc["variants"][i]["units"].as_u64().unwrap())
                .sum();
            (seen == units).then_some(doc)
        },
    )
}

fn wait_evaluated(service: &Service, done_at_least: u64) {
    wait_for(Duration::from_secs(120), "due evaluations done", || {
        let (_, text) = service.get_text("/metrics");
        let queued =
            common::metric_sum_in(&text, "posteriord_evaluations_total", r#"stage="queued""#);
        let done = common::metric_sum_in(&text, "posteriord_evaluations_total", r#"stage="done""#);
        (queued == done && done >= done_at_least).then_some(done)
    });
}

#[test]
fn skewed_clocks_over_kafka_are_refused_exactly_and_replay_equals_live() {
    let brokers = brokers();
    let topic = unique("event-time");
    let dead = unique("event-time-refused");
    let group = unique("posteriord-event-time");
    let scratch = tempfile::tempdir().unwrap();
    // True times end an hour ago (the broker refuses record times far in its future).
    let units = 8000;
    let lines = stream(21, units, now_s() - 3600 - units as i64);
    let skewed = lines.iter().filter(|l| l.skewed).count();
    assert!(
        (40..=200).contains(&skewed),
        "about 1% of the events are skewed: {skewed}"
    );

    // The topic dump, with the record timestamp column: what the producer sends and what
    // replay reads.
    let dump = scratch.path().join("dump.tsv");
    let text: String = lines
        .iter()
        .map(|l| format!("{}\t{}\n", l.reference_ms, l.json))
        .collect();
    std::fs::write(&dump, text).unwrap();
    let out = Command::new("python3")
        .arg(concat!(
            env!("CARGO_MANIFEST_DIR"),
            "/tests/tools/produce.py"
        ))
        .args([
            "--brokers",
            &brokers,
            "--topic",
            &topic,
            "--partitions",
            "1",
        ])
        .arg("--timestamps")
        .arg(&dump)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );

    let config = format!(
        "[http]\naddr = \"127.0.0.1:0\"\n[kafka]\nbrokers = \"{brokers}\"\ntopics = [\"{topic}\"]\ngroup = \"{group}\"\ndead_letter_topic = \"{dead}\"\n{}\n{EXPERIMENT}",
        bounds_toml()
    );
    let service = Service::start_with_env(
        &config,
        &[("POSTERIORD_EVENT_TIME_MAX_BEHIND_DAYS", BEHIND_DAYS)],
    );
    let offset_line = format!(
        "posteriord_kafka_next_offset{{partition=\"0\",topic=\"{topic}\"}} {}",
        lines.len()
    );
    wait_for(Duration::from_secs(180), "every message applied", || {
        let (_, text) = service.get_text("/metrics");
        text.contains(&offset_line).then_some(())
    });
    wait_evaluated(&service, 1);

    // Counts: the independent model of the rule, against the record timestamps.
    let expected = model(
        &lines,
        |l| verdict(l.time_s, l.reference_ms as f64 / 1000.0),
        false,
    );
    assert_eq!(
        expected.refused.values().sum::<u64>() as usize,
        skewed,
        "every event of a skewed device is out of bounds, and no other"
    );
    let doc = settled_doc(&service, expected.units.values().sum());
    let (_, clock) = service.get("/v1/event-time");
    assert_eq!(tidy(observed(&doc, &clock, "kafka")), tidy(expected));
    let kafka = clock["sources"]
        .as_array()
        .unwrap()
        .iter()
        .find(|s| s["source"] == "kafka")
        .unwrap();
    assert_eq!(kafka["checked"].as_u64().unwrap() as usize, lines.len());
    assert!(kafka["largest_skew_seconds"]["behind"].as_f64().unwrap() > 19.0 * YEAR_S as f64);
    // Every refused message is in the dead-letter topic with its reason (read back with the
    // independent consumer).
    let letters = consume_within(&brokers, &dead, skewed, 60);
    assert_eq!(letters.len(), skewed);
    assert!(letters.iter().all(|m| {
        let r = &m["headers"]["posteriord-reason"];
        r == "time_ahead" || r == "time_behind"
    }));
    // The experiment's clock stayed on real time: its latest event is its latest true one.
    let last_true = lines
        .iter()
        .filter(|l| !l.skewed)
        .map(|l| l.time_s)
        .max()
        .unwrap();
    assert_eq!(doc["last_event_time"], rfc3339(last_true));

    // Decisions: the live alerts equal replay of the dump (references from its column) and
    // replay of the same stream without the skewed events.
    let (_, live) = service.get("/v1/alerts?limit=1000");
    let live = comparable(&live["alerts"]);
    assert!(
        live.iter().any(|a| a["rule"] == "harm"),
        "the stream should open a harm alert: {live:?}"
    );
    let cfg = write_config(scratch.path(), &bounds_toml());
    let replayed = replay(&cfg, &dump);
    assert_eq!(comparable(&replayed["alerts"]), live, "replay of the dump");
    assert_eq!(
        replayed["event_time"]["checked"].as_u64().unwrap() as usize,
        lines.len()
    );
    assert_eq!(replayed["event_time"]["unchecked"], 0);
    let clean = scratch.path().join("clean.ndjson");
    let text: String = lines
        .iter()
        .filter(|l| !l.skewed)
        .map(|l| format!("{}\n", l.json))
        .collect();
    std::fs::write(&clean, text).unwrap();
    let without = replay(&cfg, &clean);
    assert_eq!(
        comparable(&without["alerts"]),
        live,
        "the stream without the skewed events"
    );

    // Clamping instead (a per-source option): every event counts, the skewed ones at their
    // record time, and each is counted as clamped.
    let cfg = write_config(
        scratch.path(),
        &format!("{}[event_time.kafka]\non_skew = \"clamp\"\n", bounds_toml()),
    );
    let clamped = replay(&cfg, &dump);
    let expected = model(
        &lines,
        |l| verdict(l.time_s, l.reference_ms as f64 / 1000.0),
        true,
    );
    let doc = &clamped["experiments"][0];
    assert_eq!(doc["id"], EXPERIMENT_ID);
    let got = observed(
        doc,
        &serde_json::json!({"sources": [{"source": "kafka",
            "refused": clamped["event_time"]["refused"], "clamped": clamped["event_time"]["clamped"]}]}),
        "kafka",
    );
    assert_eq!(tidy(got), tidy(expected));
}

#[test]
fn skewed_clocks_over_http_are_refused_exactly_and_decide_as_without_them() {
    let scratch = tempfile::tempdir().unwrap();
    let units = 6000;
    // True times end now: received from now on, they are up to 100 minutes late.
    let lines = stream(34, units, now_s() - units as i64);
    let config = format!(
        "[http]\naddr = \"127.0.0.1:0\"\n{}\n{EXPERIMENT}",
        bounds_toml()
    );
    let service = Service::start_with_env(
        &config,
        &[("POSTERIORD_EVENT_TIME_MAX_BEHIND_DAYS", BEHIND_DAYS)],
    );
    let sent_from = now_s() as f64;
    let mut reasons: BTreeMap<String, u64> = BTreeMap::new();
    for chunk in lines.chunks(500) {
        let body: String = chunk.iter().map(|l| format!("{}\n", l.json)).collect();
        let (status, reply) = service.post("/v1/events", body);
        assert!(status == 200 || status == 422, "{status} {reply}");
        for e in reply["errors"].as_array().unwrap() {
            *reasons
                .entry(e["reason"].as_str().unwrap().to_string())
                .or_default() += 1;
        }
    }
    let sent_to = now_s() as f64 + 1.0;
    // The model is exact when each verdict is the same for any receive time within the
    // sending window (the offsets are hours and years, the window seconds).
    let rule = |l: &Line| {
        let early = verdict(l.time_s, sent_from);
        assert_eq!(early, verdict(l.time_s, sent_to), "{l:?}");
        early
    };
    let expected = model(&lines, rule, false);
    assert_eq!(
        expected.refused.values().sum::<u64>() as usize,
        lines.iter().filter(|l| l.skewed).count()
    );
    let replied: BTreeMap<&'static str, u64> = expected.refused.clone();
    assert_eq!(
        reasons,
        replied
            .iter()
            .map(|(k, v)| (k.to_string(), *v))
            .collect::<BTreeMap<_, _>>(),
        "the replies list each refused event with its reason"
    );
    wait_evaluated(&service, 1);
    let doc = settled_doc(&service, expected.units.values().sum());
    let (_, clock) = service.get("/v1/event-time");
    assert_eq!(tidy(observed(&doc, &clock, "http")), tidy(expected));
    let (_, text) = service.get_text("/metrics");
    assert_eq!(
        common::metric_sum_in(
            &text,
            "posteriord_event_time_skewed_total",
            r#"source="http""#
        ),
        lines.iter().filter(|l| l.skewed).count() as u64
    );
    assert_eq!(
        common::metric_sum_in(
            &text,
            "posteriord_event_time_checked_total",
            r#"source="http""#
        ),
        lines.len() as u64
    );
    // The dashboard's panel shows the source with its skewed count.
    let (_, page) = service.get_text("/");
    assert!(
        page.contains(&format!(
            r#"data-source="http" data-skewed="{}""#,
            lines.iter().filter(|l| l.skewed).count()
        )),
        "{page}"
    );

    // Decisions equal those of the stream without the skewed events.
    let (_, live) = service.get("/v1/alerts?limit=1000");
    let live = comparable(&live["alerts"]);
    assert!(live.iter().any(|a| a["rule"] == "harm"), "{live:?}");
    let clean = scratch.path().join("clean.ndjson");
    let text: String = lines
        .iter()
        .filter(|l| !l.skewed)
        .map(|l| format!("{}\n", l.json))
        .collect();
    std::fs::write(&clean, text).unwrap();
    let without = replay(&write_config(scratch.path(), &bounds_toml()), &clean);
    assert_eq!(comparable(&without["alerts"]), live);
}

#[test]
fn one_event_stamped_9999_neither_ends_nor_stalls_an_experiment() {
    // The issue's reproduction: 1000 events, one exposure stamped 9999-12-31, 1000 more,
    // over HTTP, with the default bounds; and one stamped 0001-01-01.
    // No save before the kill below: the restart re-applies everything from the log.
    let config = format!(
        "[http]\naddr = \"127.0.0.1:0\"\n[store]\nsnapshot_interval_ms = 3600000\n{}",
        EXPERIMENT.replace("evaluate_every_events = 500", "evaluate_every_events = 100")
    );
    let dir = tempfile::tempdir().unwrap();
    let state = dir.path().join("state");
    let mut service = Service::start_in(
        &config,
        Some(&state),
        &[("POSTERIORD_EVENT_TIME_MAX_BEHIND_DAYS", "7")],
    );
    let base = now_s() - 2000;
    let batch = |from: usize| -> String {
        (from..from + 1000)
            .map(|i| {
                let variant = if i % 2 == 0 { "control" } else { "quick-tour" };
                format!(
                    "{{\"type\":\"exposure\",\"experiment\":\"{EXPERIMENT_ID}\",\"variant\":\"{variant}\",\"unit\":\"sprout-{i}\",\"time\":\"{}\"}}\n",
                    rfc3339(base + i as i64)
                )
            })
            .collect()
    };
    assert_eq!(service.post("/v1/events", batch(0)).0, 200);
    wait_evaluated(&service, 10);
    let far = format!(
        "{{\"type\":\"exposure\",\"experiment\":\"{EXPERIMENT_ID}\",\"variant\":\"control\",\"unit\":\"clockless-kiosk\",\"time\":\"9999-12-31T23:59:59Z\"}}\n\
         {{\"type\":\"exposure\",\"experiment\":\"{EXPERIMENT_ID}\",\"variant\":\"control\",\"unit\":\"rebooted-sensor\",\"time\":\"0001-01-01T00:00:00Z\"}}\n"
    );
    let (status, reply) = service.post("/v1/events", far);
    assert_eq!(status, 422, "{reply}");
    let reasons: Vec<&str> = reply["errors"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["reason"].as_str().unwrap())
        .collect();
    assert_eq!(reasons, ["time_ahead", "time_behind"]);
    let (_, text) = service.get_text("/metrics");
    let done_before =
        common::metric_sum_in(&text, "posteriord_evaluations_total", r#"stage="done""#);
    assert_eq!(service.post("/v1/events", batch(1000)).0, 200);
    // Evaluation went on with the later events: 1000 more at one look per 100.
    wait_evaluated(&service, done_before + 10);

    let check = |service: &Service, counted: bool| {
        // Readers share a summary for up to a second: wait for one taken after the last batch.
        let doc = wait_for(Duration::from_secs(10), "all 2000 units read", || {
            let (_, doc) = service.get(&format!("/v1/experiments/{EXPERIMENT_ID}"));
            let units: u64 = (0..2)
                .map(|i| doc["variants"][i]["units"].as_u64().unwrap())
                .sum();
            (units == 2000).then_some(doc)
        });
        assert_eq!(doc["last_event_time"], rfc3339(base + 1999), "{doc}");
        let (_, alerts) = service.get("/v1/alerts?limit=1000");
        assert!(
            !alerts["alerts"]
                .as_array()
                .unwrap()
                .iter()
                .any(|a| a["rule"] == "inconclusive"),
            "{alerts}"
        );
        if counted {
            let (_, clock) = service.get("/v1/event-time");
            let http = &clock["sources"][0];
            assert_eq!(http["source"], "http");
            assert_eq!(http["refused"]["ahead"], 1);
            assert_eq!(http["refused"]["behind"], 1);
            assert_eq!(http["checked"], 2002);
            assert!(
                http["largest_skew_seconds"]["ahead"].as_f64().unwrap() > 7.9e3 * YEAR_S as f64
            );
        }
    };
    check(&service, true);
    // Killed before any save and restarted from the write-ahead log alone: the same, checks
    // included, since the receive times came back with the logged events.
    common::signal(service.child.id(), "KILL");
    let _ = service.child.wait();
    let service = Service::start_in(
        &config,
        Some(&state),
        &[("POSTERIORD_EVENT_TIME_MAX_BEHIND_DAYS", "7")],
    );
    check(&service, true);
}

#[test]
fn clamping_over_http_applies_at_the_receive_time_and_says_so() {
    let config = format!(
        "[http]\naddr = \"127.0.0.1:0\"\n[event_time.http]\non_skew = \"clamp\"\n{EXPERIMENT}"
    );
    let service =
        Service::start_with_env(&config, &[("POSTERIORD_EVENT_TIME_MAX_BEHIND_DAYS", "7")]);
    let now = now_s();
    // 100 units with good clocks, 10 on a kiosk 3 hours ahead, 5 on a box set to 20 years ago.
    let body: String = (0..115)
        .map(|i| {
            let t = match i {
                0..100 => now - 200 + i,
                100..110 => now + 3 * 3600,
                _ => now - 20 * YEAR_S,
            };
            let variant = if i % 2 == 0 { "control" } else { "quick-tour" };
            format!(
                "{{\"type\":\"exposure\",\"experiment\":\"{EXPERIMENT_ID}\",\"variant\":\"{variant}\",\"unit\":\"cutting-{i}\",\"time\":\"{}\"}}\n",
                rfc3339(t)
            )
        })
        .collect();
    let (status, reply) = service.post("/v1/events", body);
    let received_by = now_s() + 1;
    assert_eq!(status, 200, "{reply}");
    assert_eq!(
        (reply["applied"].as_u64(), reply["clamped"].as_u64()),
        (Some(115), Some(15))
    );
    let doc = settled_doc(&service, 115);
    // The kiosk's events count at their receive time, not three hours on.
    let last = time::OffsetDateTime::parse(
        doc["last_event_time"].as_str().unwrap(),
        &time::format_description::well_known::Rfc3339,
    )
    .unwrap()
    .unix_timestamp();
    assert!(
        (now..=received_by).contains(&last),
        "{last} not in {now}..={received_by}"
    );
    let (_, clock) = service.get("/v1/event-time");
    let http = &clock["sources"][0];
    assert_eq!(http["clamped"]["ahead"], 10);
    assert_eq!(http["clamped"]["behind"], 5);
    assert_eq!(http["refused"]["ahead"], 0);
    assert_eq!(http["bounds"]["on_skew"], "clamp");
}
