//! Shared test harness: start the real `posteriord` binary on port 0, talk HTTP to it, send it
//! real signals, and compute ground truth for generated events independently of the engine.
#![allow(dead_code)]

pub mod browser;
pub mod kafka;
pub mod mapped;
pub mod receiver;

use std::collections::{HashMap, HashSet};
use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, ExitStatus, Stdio};
use std::time::{Duration, Instant};

use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use serde_json::Value;

/// Path of the binary under test.
pub fn bin() -> &'static str {
    env!("CARGO_BIN_EXE_posteriord")
}

/// A running `posteriord` process.
pub struct Service {
    pub child: Child,
    pub base: String,
    pub dir: tempfile::TempDir,
    pub log: PathBuf,
}

impl Service {
    /// Start `posteriord serve` with `config` (its `[store] dir` is pointed into a temp dir).
    pub fn start(config: &str) -> Service {
        Self::start_with_env(config, &[])
    }

    pub fn start_with_env(config: &str, env: &[(&str, &str)]) -> Service {
        Self::start_in(config, None, env)
    }

    /// Start with state kept in `state_dir` (so a restart can restore it), or in a fresh
    /// temporary directory.
    pub fn start_in(config: &str, state_dir: Option<&Path>, env: &[(&str, &str)]) -> Service {
        let dir = tempfile::tempdir().unwrap();
        let state = state_dir.map_or_else(|| dir.path().join("state"), Path::to_path_buf);
        let path = dir.path().join("posteriord.toml");
        std::fs::write(&path, config).unwrap();
        let log = dir.path().join("stderr.log");
        let mut cmd = Command::new(bin());
        cmd.arg("serve")
            .arg("--config")
            .arg(&path)
            .env("POSTERIORD_STORE_DIR", &state)
            .env("POSTERIORD_LOG", "info,librdkafka=warn")
            // The shared streams carry fixed 2026 event times; received today they are late by
            // months, which is not what these tests are about (tests/event_time.rs is).
            .env("POSTERIORD_EVENT_TIME_MAX_BEHIND_DAYS", "3650")
            .stdout(Stdio::piped())
            .stderr(std::fs::File::create(&log).unwrap());
        for (k, v) in env {
            cmd.env(k, v);
        }
        let mut child = cmd.spawn().expect("start posteriord");
        let base = read_listen_line(&mut child, &log);
        Service {
            child,
            base,
            dir,
            log,
        }
    }

    pub fn url(&self, path: &str) -> String {
        format!("{}{}", self.base, path)
    }

    pub fn get(&self, path: &str) -> (u16, Value) {
        let r = client().get(self.url(path)).send().expect("GET");
        let status = r.status().as_u16();
        (status, r.json().unwrap_or(Value::Null))
    }

    pub fn get_text(&self, path: &str) -> (u16, String) {
        let r = client().get(self.url(path)).send().expect("GET");
        (r.status().as_u16(), r.text().unwrap())
    }

    /// Sum of counter `name` over its series whose labels include `label` (e.g.
    /// `source="kafka"`), read from a `/metrics` scrape.
    pub fn metric_sum(&self, name: &str, label: &str) -> u64 {
        metric_sum_in(&self.get_text("/metrics").1, name, label)
    }

    pub fn post(&self, path: &str, body: impl Into<reqwest::blocking::Body>) -> (u16, Value) {
        let r = client()
            .post(self.url(path))
            .body(body)
            .send()
            .expect("POST");
        let status = r.status().as_u16();
        (status, r.json().unwrap_or(Value::Null))
    }

    /// Send SIGTERM and wait for the exit status (at most `timeout`).
    pub fn terminate(&mut self, timeout: Duration) -> ExitStatus {
        signal(self.child.id(), "TERM");
        wait_exit(&mut self.child, timeout).unwrap_or_else(|| {
            panic!(
                "no exit within {timeout:?} of SIGTERM; log:\n{}",
                self.log_text()
            )
        })
    }

    pub fn log_text(&self) -> String {
        std::fs::read_to_string(&self.log).unwrap_or_default()
    }
}

impl Drop for Service {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

pub fn client() -> reqwest::blocking::Client {
    reqwest::blocking::Client::builder()
        .timeout(Duration::from_secs(30))
        .build()
        .unwrap()
}

/// Send a real signal with kill(1).
pub fn signal(pid: u32, name: &str) {
    let ok = Command::new("kill")
        .arg(format!("-{name}"))
        .arg(pid.to_string())
        .status()
        .expect("run kill")
        .success();
    assert!(ok, "kill -{name} {pid} failed");
}

pub fn wait_exit(child: &mut Child, timeout: Duration) -> Option<ExitStatus> {
    let start = Instant::now();
    while start.elapsed() < timeout {
        if let Some(status) = child.try_wait().unwrap() {
            return Some(status);
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    None
}

/// Read stdout until the "listening on http://ADDR" line; returns the base URL.
pub fn read_listen_line(child: &mut Child, log: &Path) -> String {
    let stdout = child.stdout.take().unwrap();
    let (tx, rx) = std::sync::mpsc::channel();
    std::thread::spawn(move || {
        let mut reader = BufReader::new(stdout);
        let mut line = String::new();
        loop {
            line.clear();
            match reader.read_line(&mut line) {
                Ok(0) | Err(_) => return,
                Ok(_) => {
                    if let Some(i) = line.find("http://") {
                        let url = line[i..].split_whitespace().next().unwrap().to_string();
                        let _ = tx.send(url);
                        // Keep draining so the child never blocks on a full pipe.
                    }
                }
            }
        }
    });
    match rx.recv_timeout(Duration::from_secs(60)) {
        Ok(url) => url.trim_end_matches('/').to_string(),
        Err(_) => panic!(
            "posteriord did not report its address; log:\n{}",
            std::fs::read_to_string(log).unwrap_or_default()
        ),
    }
}

/// Sum of integer counter `name` in the Prometheus text `text`, over its series whose labels
/// include `label` (e.g. `stage="done"`).
pub fn metric_sum_in(text: &str, name: &str, label: &str) -> u64 {
    let prefix = format!("{name}{{");
    text.lines()
        .filter(|l| l.starts_with(&prefix) && l.contains(label))
        .map(|l| l.rsplit(' ').next().unwrap().parse::<u64>().unwrap())
        .sum()
}

/// Poll `f` until it returns `Some`, or panic after `timeout` with `what`.
pub fn wait_for<T>(timeout: Duration, what: &str, mut f: impl FnMut() -> Option<T>) -> T {
    let start = Instant::now();
    loop {
        if let Some(v) = f() {
            return v;
        }
        if start.elapsed() > timeout {
            panic!("timed out after {timeout:?} waiting for {what}");
        }
        std::thread::sleep(Duration::from_millis(200));
    }
}

/// Two invented experiments used by the ingest tests: the bakery's checkout copy test and a
/// fictional jam factory's crate-sensor trial (reported exposure in machine hours).
pub const TEST_EXPERIMENTS: &str = r#"
[[experiment]]
id = "checkout-copy"
control = "control"
variants = [ { name = "control", weight = 0.5 }, { name = "short-copy", weight = 0.5 } ]
[[experiment.metric]]
name = "purchase"
kind = "conversion"
prior = { alpha = 1.0, beta = 1.0 }
[[experiment.metric]]
name = "payment-error"
kind = "defect_rate"
exposure = "units"
prior = { shape = 1.0, rate = 1.0 }

[[experiment]]
id = "jar-sensor"
control = "old-sensor"
variants = [ { name = "old-sensor" }, { name = "laser" }, { name = "camera" } ]
[[experiment.metric]]
name = "label-ok"
kind = "conversion"
[[experiment.metric]]
name = "jam"
kind = "defect_rate"
exposure = "reported"
prior = { shape = 2.0, rate = 100.0 }
"#;

/// The shape of one test experiment, as the ground-truth model needs it.
pub struct Spec {
    pub id: &'static str,
    pub variants: &'static [&'static str],
    pub conversion: &'static str,
    pub defect: &'static str,
    pub reported: bool,
}

pub const SPECS: [Spec; 2] = [
    Spec {
        id: "checkout-copy",
        variants: &["control", "short-copy"],
        conversion: "purchase",
        defect: "payment-error",
        reported: false,
    },
    Spec {
        id: "jar-sensor",
        variants: &["old-sensor", "laser", "camera"],
        conversion: "label-ok",
        defect: "jam",
        reported: true,
    },
];

/// Expected totals of one experiment, computed straight from the event semantics in
/// docs/events.md with plain maps — deliberately not the engine's code.
#[derive(Debug, Default, Clone, PartialEq)]
pub struct Expected {
    pub units: Vec<u64>,
    pub trials: Vec<u64>,
    pub successes: Vec<u64>,
    pub defects: Vec<u64>,
    pub exposure: Vec<f64>,
    pub applied: u64,
    pub duplicate_id: u64,
    pub duplicate_exposure: u64,
    pub crossover: u64,
    pub orphan: u64,
    pub duplicate_conversion: u64,
}

#[derive(Default)]
struct TruthState {
    /// Whether the defect metric counts reported exposure (else one unit per exposed unit).
    reported: bool,
    unit_variant: HashMap<String, usize>,
    converted: HashSet<String>,
    ids: HashSet<String>,
    e: Expected,
}

/// Generated events (NDJSON lines) and the expected totals per experiment.
pub struct Workload {
    pub lines: Vec<String>,
    pub expected: Vec<Expected>,
    /// Per line: the experiment's index, the event id and what the event does.
    effects: Vec<(usize, Option<String>, Effect)>,
}

impl Workload {
    /// The expected totals when only the lines for which `keep(i)` holds were delivered,
    /// in order (e.g. the requests a service acknowledged).
    pub fn expected_of(&self, keep: impl Fn(usize) -> bool) -> Vec<Expected> {
        let mut states = fresh_states();
        for (i, (x, id, effect)) in self.effects.iter().enumerate() {
            if keep(i) {
                states[*x].apply(id.as_deref(), effect);
            }
        }
        states.into_iter().map(|s| s.e).collect()
    }
}

fn fresh_states() -> Vec<TruthState> {
    SPECS
        .iter()
        .map(|s| {
            let k = s.variants.len();
            TruthState {
                e: Expected {
                    units: vec![0; k],
                    trials: vec![0; k],
                    successes: vec![0; k],
                    defects: vec![0; k],
                    exposure: vec![0.0; k],
                    ..Default::default()
                },
                reported: s.reported,
                ..Default::default()
            }
        })
        .collect()
}

/// Generate `n` mixed events (exposures, conversions, defects, tallies; with duplicates,
/// producer retries, crossovers and orphans) for the two test experiments.
pub fn workload(seed: u64, n: usize) -> Workload {
    let mut rng = StdRng::seed_from_u64(seed);
    let mut states = fresh_states();
    let mut lines = Vec::with_capacity(n);
    let mut effects = Vec::with_capacity(n);
    let mut next_unit = 0u64;
    let mut next_id = 0u64;
    let t = "2026-05-02T10:00:00Z";
    while lines.len() < n {
        let x = rng.random_range(0..SPECS.len());
        let spec = &SPECS[x];
        let st = &mut states[x];
        let known: Vec<String> = if st.unit_variant.is_empty() {
            Vec::new()
        } else {
            // Sample a few known units cheaply: units are numbered, so pick from the range.
            vec![format!(
                "{}-u{}",
                spec.id,
                rng.random_range(0..next_unit.max(1))
            )]
        };
        let roll: f64 = rng.random();
        let id = if rng.random_bool(0.5) {
            next_id += 1;
            Some(format!("ev-{next_id}"))
        } else {
            None
        };
        let id_field = id
            .as_ref()
            .map_or(String::new(), |i| format!(r#","id":"{i}""#));
        // Each branch: (json line, closure effect on truth) applied in order below.
        let (line, effect): (String, Effect) = if roll < 0.45 || known.is_empty() {
            next_unit += 1;
            let unit = format!("{}-u{}", spec.id, next_unit - 1);
            let v = rng.random_range(0..spec.variants.len());
            (
                format!(
                    r#"{{"type":"exposure","experiment":"{}","variant":"{}","unit":"{unit}","time":"{t}"{id_field}}}"#,
                    spec.id, spec.variants[v]
                ),
                Effect::Exposure(unit, v),
            )
        } else if roll < 0.55 {
            let unit = known[0].clone();
            let v = rng.random_range(0..spec.variants.len());
            (
                format!(
                    r#"{{"type":"exposure","experiment":"{}","variant":"{}","unit":"{unit}","time":"{t}"{id_field}}}"#,
                    spec.id, spec.variants[v]
                ),
                Effect::Exposure(unit, v),
            )
        } else if roll < 0.80 {
            let unit = if rng.random_bool(0.1) {
                format!("{}-stranger-{}", spec.id, rng.random::<u32>())
            } else {
                known[0].clone()
            };
            (
                format!(
                    r#"{{"type":"conversion","experiment":"{}","metric":"{}","unit":"{unit}","time":"{t}"{id_field}}}"#,
                    spec.id, spec.conversion
                ),
                Effect::Conversion(unit),
            )
        } else if roll < 0.95 {
            let unit = known[0].clone();
            let count = rng.random_range(0..4u64);
            if spec.reported {
                let hours = rng.random_range(1..16) as f64 * 0.5;
                (
                    format!(
                        r#"{{"type":"defect","experiment":"{}","metric":"{}","unit":"{unit}","count":{count},"exposure":{hours},"time":"{t}"{id_field}}}"#,
                        spec.id, spec.defect
                    ),
                    Effect::Defect(unit, count, hours),
                )
            } else {
                (
                    format!(
                        r#"{{"type":"defect","experiment":"{}","metric":"{}","unit":"{unit}","count":{count},"time":"{t}"{id_field}}}"#,
                        spec.id, spec.defect
                    ),
                    Effect::Defect(unit, count, 0.0),
                )
            }
        } else {
            let v = rng.random_range(0..spec.variants.len());
            let trials = rng.random_range(0..50u64);
            let successes = rng.random_range(0..=trials);
            (
                format!(
                    r#"{{"type":"tally","experiment":"{}","metric":"{}","variant":"{}","trials":{trials},"successes":{successes}{id_field}}}"#,
                    spec.id, spec.conversion, spec.variants[v]
                ),
                Effect::Tally(v, trials, successes),
            )
        };
        let copies = if id.is_some() && rng.random_bool(0.05) {
            2
        } else {
            1
        };
        for _ in 0..copies {
            lines.push(line.clone());
            st.apply(id.as_deref(), &effect);
            effects.push((x, id.clone(), effect.clone()));
        }
    }
    Workload {
        lines,
        expected: states.into_iter().map(|s| s.e).collect(),
        effects,
    }
}

#[derive(Clone)]
enum Effect {
    Exposure(String, usize),
    Conversion(String),
    Defect(String, u64, f64),
    Tally(usize, u64, u64),
}

impl TruthState {
    fn apply(&mut self, id: Option<&str>, effect: &Effect) {
        if let Some(id) = id {
            if self.ids.contains(id) {
                self.e.duplicate_id += 1;
                return;
            }
        }
        let applied = match effect {
            Effect::Exposure(unit, v) => match self.unit_variant.get(unit) {
                Some(first) if first == v => {
                    self.e.duplicate_exposure += 1;
                    false
                }
                Some(_) => {
                    self.e.crossover += 1;
                    false
                }
                None => {
                    self.unit_variant.insert(unit.clone(), *v);
                    self.e.units[*v] += 1;
                    self.e.trials[*v] += 1;
                    if !self.reported {
                        self.e.exposure[*v] += 1.0;
                    }
                    true
                }
            },
            Effect::Conversion(unit) => match self.unit_variant.get(unit) {
                None => {
                    self.e.orphan += 1;
                    false
                }
                Some(_) if self.converted.contains(unit) => {
                    self.e.duplicate_conversion += 1;
                    false
                }
                Some(&v) => {
                    self.converted.insert(unit.clone());
                    self.e.successes[v] += 1;
                    true
                }
            },
            Effect::Defect(unit, count, hours) => match self.unit_variant.get(unit) {
                None => {
                    self.e.orphan += 1;
                    false
                }
                Some(&v) => {
                    self.e.defects[v] += count;
                    self.e.exposure[v] += hours;
                    true
                }
            },
            Effect::Tally(v, trials, successes) => {
                self.e.trials[*v] += trials;
                self.e.successes[*v] += successes;
                true
            }
        };
        if applied {
            self.e.applied += 1;
            if let Some(id) = id {
                self.ids.insert(id.to_string());
            }
        }
    }
}

/// Read the API's totals of experiment `spec` into an [`Expected`] for comparison.
pub fn observed(service: &Service, spec: &Spec) -> Expected {
    let (status, doc) = service.get(&format!("/v1/experiments/{}", spec.id));
    assert_eq!(status, 200, "{doc}");
    observed_in(&doc, spec)
}

/// The totals of experiment `spec` in `doc`, its `GET /v1/experiments/{id}` document.
pub fn observed_in(doc: &Value, spec: &Spec) -> Expected {
    let k = spec.variants.len();
    let metric = |name: &str| {
        doc["metrics"]
            .as_array()
            .unwrap()
            .iter()
            .find(|m| m["name"] == name)
            .unwrap_or_else(|| panic!("metric {name} in {doc}"))
            .clone()
    };
    let conv = metric(spec.conversion);
    let def = metric(spec.defect);
    let u64_at = |m: &Value, i: usize, f: &str| m["variants"][i][f].as_u64().unwrap();
    let o = &doc["outcomes"];
    Expected {
        units: (0..k)
            .map(|i| doc["variants"][i]["units"].as_u64().unwrap())
            .collect(),
        trials: (0..k).map(|i| u64_at(&conv, i, "trials")).collect(),
        successes: (0..k).map(|i| u64_at(&conv, i, "successes")).collect(),
        defects: (0..k).map(|i| u64_at(&def, i, "count")).collect(),
        exposure: (0..k)
            .map(|i| def["variants"][i]["exposure"].as_f64().unwrap())
            .collect(),
        applied: o["applied"].as_u64().unwrap(),
        duplicate_id: o["duplicate_id"].as_u64().unwrap(),
        duplicate_exposure: o["duplicate_exposure"].as_u64().unwrap(),
        crossover: o["crossover"].as_u64().unwrap(),
        orphan: o["orphan"].as_u64().unwrap(),
        duplicate_conversion: o["duplicate_conversion"].as_u64().unwrap(),
    }
}

/// Total events the API has seen (applied or not) for experiment `spec`.
pub fn seen(service: &Service, spec: &Spec) -> u64 {
    let e = observed(service, spec);
    e.applied
        + e.duplicate_id
        + e.duplicate_exposure
        + e.crossover
        + e.orphan
        + e.duplicate_conversion
}

/// Valid events the API has seen across both test experiments.
pub fn total_seen(service: &Service) -> u64 {
    SPECS.iter().map(|s| seen(service, s)).sum()
}

/// The API's totals equal the ground truth, for both test experiments.
pub fn assert_exact(service: &Service, expected: &[Expected]) {
    for (spec, expected) in SPECS.iter().zip(expected) {
        assert_eq!(&observed(service, spec), expected, "experiment {}", spec.id);
    }
}
