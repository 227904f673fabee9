//! The history recorder: the decision quantities of every evaluation, kept in memory within a
//! budget and, with a store, in one JSON file per experiment (the file format is here too).

use std::collections::HashSet;
use std::path::{Path, PathBuf};
use std::sync::{Mutex, MutexGuard};
use std::time::{Duration, Instant};

use serde_json::{json, Value};

use super::store::{write_atomic, StoreHealth};
use crate::decide::{Finding, Rule};
use crate::history::{
    ArmPoint, Change, ExperimentHistory, History, HistoryParts, Point, QualityPoint, RuleKey,
    Transition,
};
use crate::summary::ExperimentSummary;

/// How often changed histories are written to the store.
pub const SAVE_EVERY: Duration = Duration::from_secs(30);

/// Why the history directory cannot be used.
#[derive(Debug, thiserror::Error)]
pub enum HistoryFileError {
    /// Creating, reading or writing failed.
    #[error("{path}: {source}")]
    Io {
        /// The file or directory.
        path: PathBuf,
        /// What failed.
        source: std::io::Error,
    },
}

/// The history with, when a store is configured, its files: one JSON file per experiment
/// under `<store.dir>/history/`, each replaced atomically (write, fsync, rename, fsync dir)
/// at most every [`SAVE_EVERY`] and at shutdown, changed experiments only.
pub struct Recorder {
    history: Mutex<History>,
    dir: Option<PathBuf>,
    /// Last save and the experiments changed since.
    pending: Mutex<(Instant, HashSet<String>)>,
    /// Where failed and successful writes are reported.
    health: Option<StoreHealth>,
}

/// What [`StoreHealth`] calls the history files.
pub const HISTORY_FILES: &str = "history files";

impl Recorder {
    /// A history kept in memory only (the demo).
    pub fn in_memory(budget: usize) -> Recorder {
        Recorder {
            history: Mutex::new(History::with_budget(budget)),
            dir: None,
            pending: Mutex::new((Instant::now(), HashSet::new())),
            health: None,
        }
    }

    /// The history stored under `store_dir` for the experiments in `configured`, or an empty
    /// one. Files of experiments no longer configured stay on disk untouched. A file that
    /// cannot be read back is set aside as `<name>.unreadable` (never overwritten) and
    /// reported; that experiment starts a fresh history.
    pub fn restore(
        store_dir: &Path,
        configured: &[crate::experiment::ExperimentDef],
        budget: usize,
    ) -> Result<Recorder, HistoryFileError> {
        let dir = store_dir.join("history");
        let io = |path: &Path| {
            let path = path.to_path_buf();
            move |source| HistoryFileError::Io { path, source }
        };
        std::fs::create_dir_all(&dir).map_err(io(&dir))?;
        let mut history = History::with_budget(budget);
        for entry in std::fs::read_dir(&dir).map_err(io(&dir))? {
            let path = entry.map_err(io(&dir))?.path();
            let stem = path.file_stem().and_then(|s| s.to_str()).unwrap_or("");
            if path.extension().and_then(|e| e.to_str()) != Some("json")
                || !configured.iter().any(|d| d.id == stem)
            {
                continue;
            }
            let text = std::fs::read_to_string(&path).map_err(io(&path))?;
            match decode(&text, budget) {
                Ok((id, h)) if id == stem => history.insert(id, h),
                Ok((id, _)) => {
                    tracing::warn!(file = %path.display(), holds = %id, "a history file holds another experiment; ignored");
                }
                Err(e) => {
                    let aside = path.with_extension("json.unreadable");
                    tracing::error!(file = %path.display(), error = %e, moved_to = %aside.display(), "cannot read a stored history; it is set aside and that experiment's history starts over");
                    std::fs::rename(&path, &aside).map_err(io(&path))?;
                }
            }
        }
        Ok(Recorder {
            history: Mutex::new(history),
            dir: Some(dir),
            pending: Mutex::new((Instant::now(), HashSet::new())),
            health: None,
        })
    }

    /// Report failed and successful writes to `health`.
    pub fn watch(&mut self, health: StoreHealth) {
        self.health = Some(health);
    }

    /// The history, even if a panic elsewhere poisoned the lock (it changes one evaluation
    /// at a time, so it is consistent between them).
    pub fn lock(&self) -> MutexGuard<'_, History> {
        self.history.lock().unwrap_or_else(|p| p.into_inner())
    }

    /// Record one evaluation; write changed histories when a save is due.
    pub fn record(&self, summary: &ExperimentSummary, findings: &[Finding], at: i64) {
        self.lock().record(summary, findings, at);
        if self.dir.is_none() {
            return;
        }
        let due = {
            let mut p = self.pending.lock().unwrap_or_else(|p| p.into_inner());
            p.1.insert(summary.snapshot.def.id.clone());
            p.0.elapsed() >= SAVE_EVERY
        };
        if due {
            self.save();
        }
    }

    /// Write every history changed since the last save (no-op without a store). A failed
    /// write is logged and retried at the next save.
    pub fn save(&self) {
        let Some(dir) = &self.dir else { return };
        let ids: Vec<String> = {
            let mut p = self.pending.lock().unwrap_or_else(|p| p.into_inner());
            p.0 = Instant::now();
            p.1.drain().collect()
        };
        let mut failed = None;
        for id in ids {
            let text = match self.lock().experiment(&id) {
                Some(h) => encode(&id, h),
                None => continue,
            };
            if let Err(e) = write_atomic(&dir.join(format!("{id}.json")), text.as_bytes()) {
                tracing::error!(experiment = %id, error = %e, "cannot save the history; will retry");
                failed = Some(e);
                self.pending
                    .lock()
                    .unwrap_or_else(|p| p.into_inner())
                    .1
                    .insert(id);
            }
        }
        if let Some(h) = &self.health {
            match failed {
                Some(e) => h.failed(HISTORY_FILES, &e),
                None => h.succeeded(HISTORY_FILES),
            }
        }
    }
}

/// A number, or `null` when not finite (JSON has no infinities).
fn num(x: f64) -> Value {
    if x.is_finite() {
        json!(x)
    } else {
        Value::Null
    }
}

fn key_json(k: &RuleKey) -> Value {
    json!({ "rule": k.0.as_str(), "metric": k.1, "variant": k.2 })
}

/// The file text of experiment `id`'s history. Arms are arrays, to keep files small:
/// `[units, mean, lower, upper, prob_best, expected_loss, prob_better_than_control, lift, prob_harm]`
/// with `lift` = `[mean, lower, upper]` or `null`.
pub fn encode(id: &str, h: &ExperimentHistory) -> String {
    let p = h.to_parts();
    let arm = |a: &ArmPoint| {
        json!([
            a.units,
            num(a.mean),
            num(a.interval.0),
            num(a.interval.1),
            num(a.prob_best),
            num(a.expected_loss),
            a.prob_better_than_control.map(num),
            a.lift.map(|(m, l, u)| json!([num(m), num(l), num(u)])),
            a.prob_harm.map(num),
        ])
    };
    json!({
        "version": 1,
        "experiment": id,
        "metrics": p.metrics,
        "variants": p.variants,
        "evaluations": p.evaluations,
        "last_events": p.last_events,
        "series": p.series.iter().map(|s| s.iter().map(|pt| json!({
            "at": pt.at, "since": pt.since, "covers": pt.covers,
            "arms": pt.arms.iter().map(arm).collect::<Vec<_>>(),
        })).collect::<Vec<_>>()).collect::<Vec<_>>(),
        "quality": p.quality.iter().map(|q| json!([q.at, q.sample_ratio_p.map(num), q.crossovers, q.orphans])).collect::<Vec<_>>(),
        "holding": p.holding.iter().map(|(k, (v, t))| json!({ "key": key_json(k), "value": num(*v), "threshold": num(*t) })).collect::<Vec<_>>(),
        "transitions": p.transitions.iter().map(|t| json!({
            "at": t.at, "change": t.change.as_str(), "key": key_json(&t.key),
            "value": num(t.value), "threshold": num(t.threshold),
        })).collect::<Vec<_>>(),
    })
    .to_string()
}

/// Experiment id and history from file text.
pub fn decode(text: &str, budget: usize) -> Result<(String, ExperimentHistory), String> {
    let doc: Value = serde_json::from_str(text).map_err(|e| e.to_string())?;
    if doc["version"] != 1 {
        return Err(format!("unknown history file version {}", doc["version"]));
    }
    let strings = |v: &Value, what: &str| -> Result<Vec<String>, String> {
        v.as_array()
            .ok_or(format!("`{what}` is not a list"))?
            .iter()
            .map(|s| {
                s.as_str()
                    .map(str::to_string)
                    .ok_or(format!("`{what}` holds a non-string"))
            })
            .collect()
    };
    let list = |v: &Value, what: &str| -> Result<Vec<Value>, String> {
        v.as_array()
            .cloned()
            .ok_or(format!("`{what}` is not a list"))
    };
    let int = |v: &Value, what: &str| v.as_i64().ok_or(format!("`{what}` is not an integer"));
    // `null` stands for a non-finite number; only the lift mean can be one (+∞).
    let f = |v: &Value| v.as_f64().unwrap_or(f64::INFINITY);
    let opt = |v: &Value| if v.is_null() { None } else { Some(f(v)) };
    let key = |v: &Value| -> Result<RuleKey, String> {
        let rule = v["rule"]
            .as_str()
            .and_then(Rule::from_name)
            .ok_or(format!("unknown rule {}", v["rule"]))?;
        let idx = |x: &Value| x.as_u64().map(|n| n as usize);
        Ok((rule, idx(&v["metric"]), idx(&v["variant"])))
    };
    let id = doc["experiment"]
        .as_str()
        .ok_or("`experiment` is missing")?
        .to_string();
    let mut series = Vec::new();
    for s in list(&doc["series"], "series")? {
        let mut points = Vec::new();
        for pt in list(&s, "series")? {
            let mut arms = Vec::new();
            for a in list(&pt["arms"], "arms")? {
                let a = a.as_array().ok_or("an arm is not a list")?;
                if a.len() != 9 {
                    return Err(format!("an arm has {} fields, not 9", a.len()));
                }
                arms.push(ArmPoint {
                    units: a[0].as_u64().ok_or("arm units are not a count")?,
                    mean: f(&a[1]),
                    interval: (f(&a[2]), f(&a[3])),
                    prob_best: f(&a[4]),
                    expected_loss: f(&a[5]),
                    prob_better_than_control: opt(&a[6]),
                    lift: match &a[7] {
                        Value::Null => None,
                        l => Some((f(&l[0]), f(&l[1]), f(&l[2]))),
                    },
                    prob_harm: opt(&a[8]),
                });
            }
            points.push(Point {
                at: int(&pt["at"], "at")?,
                since: int(&pt["since"], "since")?,
                covers: u32::try_from(int(&pt["covers"], "covers")?)
                    .map_err(|_| "`covers` out of range")?,
                arms,
            });
        }
        series.push(points);
    }
    let mut quality = Vec::new();
    for q in list(&doc["quality"], "quality")? {
        quality.push(QualityPoint {
            at: int(&q[0], "quality time")?,
            sample_ratio_p: opt(&q[1]),
            crossovers: q[2].as_u64().ok_or("crossovers are not a count")?,
            orphans: q[3].as_u64().ok_or("orphans are not a count")?,
        });
    }
    let mut holding = Vec::new();
    for h in list(&doc["holding"], "holding")? {
        holding.push((key(&h["key"])?, (f(&h["value"]), f(&h["threshold"]))));
    }
    let mut transitions = Vec::new();
    for t in list(&doc["transitions"], "transitions")? {
        transitions.push(Transition {
            at: int(&t["at"], "at")?,
            change: match t["change"].as_str() {
                Some("holds") => Change::Holds,
                Some("ends") => Change::Ends,
                _ => return Err(format!("unknown change {}", t["change"])),
            },
            key: key(&t["key"])?,
            value: f(&t["value"]),
            threshold: f(&t["threshold"]),
        });
    }
    let parts = HistoryParts {
        metrics: strings(&doc["metrics"], "metrics")?,
        variants: strings(&doc["variants"], "variants")?,
        series,
        quality,
        evaluations: doc["evaluations"]
            .as_u64()
            .ok_or("`evaluations` is not a count")?,
        last_events: doc["last_events"].as_u64(),
        holding,
        transitions,
    };
    let h = ExperimentHistory::from_parts_within(budget, parts).map_err(|e| e.to_string())?;
    Ok((id, h))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::history::HistoryParts;

    fn parts() -> HistoryParts {
        let arm = |lift: Option<(f64, f64, f64)>| ArmPoint {
            units: 1200,
            mean: 0.1093,
            interval: (0.0925, 0.1274),
            prob_best: 0.08,
            expected_loss: 0.0131,
            prob_better_than_control: lift.map(|_| 0.92),
            lift,
            prob_harm: lift.map(|_| 0.08),
        };
        HistoryParts {
            metrics: vec!["purchase".into()],
            variants: vec!["control".into(), "short-copy".into()],
            series: vec![vec![
                Point {
                    at: 20,
                    since: 10,
                    covers: 2,
                    arms: vec![arm(None), arm(Some((f64::INFINITY, -0.02, 0.31)))],
                },
                Point {
                    at: 30,
                    since: 30,
                    covers: 1,
                    arms: vec![arm(None), arm(Some((0.12, -0.02, 0.31)))],
                },
            ]],
            quality: vec![QualityPoint {
                at: 30,
                sample_ratio_p: Some(0.41),
                crossovers: 3,
                orphans: 1,
            }],
            evaluations: 3,
            last_events: Some(2400),
            holding: vec![((Rule::Ship, Some(0), Some(1)), (0.0004, 0.002))],
            transitions: vec![Transition {
                at: 30,
                change: Change::Holds,
                key: (Rule::Ship, Some(0), Some(1)),
                value: 0.0004,
                threshold: 0.002,
            }],
        }
    }

    #[test]
    fn the_file_format_round_trips_including_an_infinite_lift_mean() {
        let h = ExperimentHistory::from_parts(parts()).unwrap();
        let text = encode("crumb-checkout-copy", &h);
        let (id, back) = decode(&text, crate::history::ARM_POINT_BUDGET).unwrap();
        assert_eq!(id, "crumb-checkout-copy");
        assert_eq!(back.to_parts(), parts());
    }

    #[test]
    fn a_damaged_file_is_an_error_with_a_reason() {
        let h = ExperimentHistory::from_parts(parts()).unwrap();
        let text = encode("crumb-checkout-copy", &h);
        assert!(decode(&text[..text.len() / 2], crate::history::ARM_POINT_BUDGET).is_err());
        let wrong = text.replace("\"version\":1", "\"version\":9");
        assert!(decode(&wrong, crate::history::ARM_POINT_BUDGET)
            .unwrap_err()
            .contains("version"));
        let short = text.replace("[1200,", "[");
        assert!(decode(&short, crate::history::ARM_POINT_BUDGET)
            .unwrap_err()
            .contains("fields"));
    }
}
