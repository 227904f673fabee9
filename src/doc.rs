//! JSON documents of the HTTP API: wire types built by hand from the pure summaries, so the
//! core never sees serde.

use serde::Serialize;
use serde_json::{json, Value};

use crate::decide::evaluation::Reading;
use crate::decide::Finding;
use crate::decode::Position;
use crate::event::{Outcome, Reject};
use crate::experiment::{ExperimentDef, ExposureBasis, MetricKind, Prior};
use crate::state::{ExperimentSnapshot, MetricTotals};
use crate::stats::{ArmSummary, Arms, Interval, SampleRatio};
use crate::summary::ExperimentSummary;

/// Shown with every experiment document: the numbers are only as good as the model and data.
pub const CAUTION: &str = "Posteriors assume the model (independent units, a stable rate per \
variant) and clean data: check the sample ratio, crossovers and orphans before acting, and leave \
shipping decisions that affect people's money or safety to the team's own review.";

/// The caution in one line, for alerts.
pub const CAUTION_SHORT: &str =
    "posteriors assume the model and clean data; check data quality and review before acting";

/// The evidence of a finding as JSON: arms with posteriors and units, event time, positions.
pub fn evidence(e: &crate::decide::Evidence) -> Value {
    json!({
        "arms": e.arms.iter().map(|a| json!({
            "variant": a.name,
            "posterior": a.posterior.map(posterior_params),
            "units": a.units,
        })).collect::<Vec<_>>(),
        "event_time": e.event_time.and_then(time_text),
        "positions": e.positions.iter().map(|(shard, next)| json!({"shard": shard, "next_offset": next})).collect::<Vec<_>>(),
    })
}

/// `{"alpha", "beta"}` or `{"shape", "rate"}`: a posterior as every document writes it.
pub fn posterior_params(p: crate::decide::PosteriorParams) -> Value {
    match p {
        crate::decide::PosteriorParams::Beta { alpha, beta } => {
            json!({ "alpha": alpha, "beta": beta })
        }
        crate::decide::PosteriorParams::Gamma { shape, rate } => {
            json!({ "shape": shape, "rate": rate })
        }
    }
}

/// One alert of `GET /v1/alerts`.
pub fn alert(a: &crate::decide::alerts::Alert) -> Value {
    json!({
        "id": a.id,
        "experiment": a.key.experiment,
        "metric": a.key.metric,
        "variant": a.key.variant,
        "rule": a.key.rule.as_str(),
        "state": a.state.as_str(),
        "opened_at": time_text(a.opened_at),
        "last_held_at": time_text(a.last_held_at),
        "closed_at": a.closed_at.and_then(time_text),
        "acknowledged_at": a.acknowledged_at.and_then(time_text),
        "value": a.finding.value,
        "threshold": a.finding.threshold,
        "test": a.finding.test,
        "message": a.message_now(),
        "evidence": evidence(&a.finding.evidence),
        "caution": CAUTION_SHORT,
    })
}

/// `{"error":{"code","message","details"}}`, the one error shape of the API.
pub fn error_body(code: &str, message: &str, details: Value) -> Value {
    json!({ "error": { "code": code, "message": message, "details": details } })
}

fn interval(i: &Interval) -> Value {
    json!({ "level": i.level, "lower": i.lower, "upper": i.upper })
}

fn prior(p: Prior) -> Value {
    match p {
        Prior::Beta { alpha, beta } => json!({ "alpha": alpha, "beta": beta }),
        Prior::Gamma { shape, rate } => json!({ "shape": shape, "rate": rate }),
    }
}

/// RFC 3339 text of a time in microseconds since the epoch.
pub fn time_text(micros: i64) -> Option<String> {
    let t = time::OffsetDateTime::from_unix_timestamp_nanos(i128::from(micros) * 1_000).ok()?;
    t.format(&time::format_description::well_known::Rfc3339)
        .ok()
}

fn outcomes(snap: &ExperimentSnapshot) -> Value {
    let mut map = serde_json::Map::new();
    for o in Outcome::PER_EXPERIMENT {
        map.insert(o.as_str().into(), json!(snap.outcomes.get(o)));
    }
    Value::Object(map)
}

/// One line of `GET /v1/experiments`.
pub fn experiment_entry(snap: &ExperimentSnapshot) -> Value {
    let def = &snap.def;
    json!({
        "id": def.id,
        "control": def.variants[def.control].name,
        "variants": def.variants.iter().map(|v| v.name.as_str()).collect::<Vec<_>>(),
        "metrics": def.metrics.iter().map(|m| json!({"name": m.name, "kind": m.kind.as_str()})).collect::<Vec<_>>(),
        "units": snap.units.iter().sum::<u64>(),
        "last_event_time": snap.last_event_time.and_then(time_text),
    })
}

/// The sample-ratio check against the experiment's own `srm_p` (the threshold its
/// `sample_ratio` rule uses), so the document and the rules never disagree.
fn sample_ratio(s: &Option<Result<SampleRatio, crate::stats::StatsError>>, srm_p: f64) -> Value {
    match s {
        None => Value::Null,
        Some(Err(e)) => json!({ "error": e.to_string() }),
        Some(Ok(s)) => json!({
            "chi2": s.chi2,
            "df": s.df,
            "p_value": s.p_value,
            "threshold": srm_p,
            "mismatch": s.p_value < srm_p,
        }),
    }
}

fn arm_posterior(arms: &Arms, i: usize) -> Value {
    match arms {
        Arms::Beta(v) => json!({ "alpha": v[i].alpha(), "beta": v[i].beta() }),
        Arms::Gamma(v) => json!({ "shape": v[i].shape(), "rate": v[i].rate() }),
    }
}

fn arm_quantities(a: &ArmSummary) -> serde_json::Map<String, Value> {
    let mut m = serde_json::Map::new();
    m.insert("mean".into(), json!(a.mean));
    m.insert("sd".into(), json!(a.sd));
    m.insert("interval".into(), interval(&a.interval));
    m.insert("prob_best".into(), json!(a.prob_best));
    m.insert("expected_loss".into(), json!(a.expected_loss));
    m.insert(
        "prob_better_than_control".into(),
        json!(a.prob_better_than_control),
    );
    m.insert(
        "lift".into(),
        match &a.lift {
            None => Value::Null,
            Some(l) => json!({ "mean": l.mean, "interval": interval(&l.interval) }),
        },
    );
    m.insert(
        "prob_practically_equivalent".into(),
        json!(a.prob_practically_equivalent),
    );
    m.insert("prob_harm".into(), json!(a.prob_harm));
    m
}

/// The anytime-valid numbers of one variant on one metric: the harm process and the
/// confidence sequence for the lift, shown beside the credible interval.
fn anytime(
    def: &ExperimentDef,
    evidence: Option<&crate::decide::betting::EvidenceBook>,
    m: usize,
    v: usize,
) -> Value {
    let Some(rule) = def.metrics[m].rules.evidence else {
        return Value::Null;
    };
    let Some(p) = evidence.and_then(|e| e.get(&def.state_key(), m, v)) else {
        return Value::Null;
    };
    let st = p.standing();
    json!({
        "e_value": st.e_value,
        "max_e_value": st.max_e_value,
        "alarm_at": 1.0 / rule.alpha,
        "always_valid_p_value": st.p_value,
        "margin": rule.margin,
        "lift_sequence": p.lift_interval(rule.alpha).map(|(lo, hi)| json!({
            "level": 1.0 - rule.alpha,
            "lower": if lo.is_finite() { json!(lo) } else { Value::Null },
            "upper": if hi.is_finite() { json!(hi) } else { Value::Null },
        })),
        "looks": p.blocks(),
    })
}

/// Where every rule stands, per metric and variant.
pub fn rule_standings(
    summary: &ExperimentSummary,
    findings: &[crate::decide::Finding],
    evidence: Option<&crate::decide::betting::EvidenceBook>,
) -> Value {
    let def = &summary.snapshot.def;
    Value::Array(
        crate::decide::standing::standings(summary, findings, evidence)
            .into_iter()
            .map(|s| {
                json!({
                    "rule": s.rule.as_str(),
                    "metric": s.metric.map(|m| def.metrics[m].name.clone()),
                    "variant": s.variant.map(|v| def.variants[v].name.clone()),
                    "state": s.state.as_str(),
                    "value": s.value,
                    "threshold": s.threshold,
                    "progress": s.progress.map(|(have, need)| json!({"have": have, "need": need})),
                    "detail": s.detail,
                })
            })
            .collect(),
    )
}

/// `GET /v1/experiments/{id}`: the reading of one experiment (its summary and the rules that
/// hold on it), with this process's anytime-valid harm processes when given (they advance at
/// each look of the evaluator, so they are not part of the cached reading).
pub fn experiment_document(
    reading: &Reading,
    evidence: Option<&crate::decide::betting::EvidenceBook>,
) -> Value {
    let summary: &ExperimentSummary = &reading.summary;
    let snap = &summary.snapshot;
    let def: &ExperimentDef = &snap.def;
    let mut findings = reading.findings.clone();
    if let Some(e) = evidence {
        crate::decide::add_evidence_findings(summary, e, &mut findings);
    }
    let metrics: Vec<Value> = def
        .metrics
        .iter()
        .zip(&snap.metrics)
        .zip(&summary.metrics)
        .enumerate()
        .map(|(mi, ((m, totals), ms))| {
            let mut variants = Vec::with_capacity(def.variants.len());
            for (i, v) in def.variants.iter().enumerate() {
                let mut obj = serde_json::Map::new();
                obj.insert("name".into(), json!(v.name));
                match totals {
                    MetricTotals::Conversion(t) => {
                        obj.insert("trials".into(), json!(t[i].trials));
                        obj.insert("successes".into(), json!(t[i].successes));
                    }
                    MetricTotals::Defect(t) => {
                        obj.insert("count".into(), json!(t[i].count));
                        obj.insert("exposure".into(), json!(t[i].exposure));
                    }
                }
                if let Ok(p) = &ms.posteriors {
                    obj.insert("posterior".into(), arm_posterior(p, i));
                }
                if let Ok(arms) = &ms.arms {
                    obj.extend(arm_quantities(&arms[i]));
                }
                if i != def.control {
                    obj.insert("anytime".into(), anytime(def, evidence, mi, i));
                }
                variants.push(Value::Object(obj));
            }
            let mut metric = json!({
                "name": m.name,
                "kind": m.kind.as_str(),
                "prior": prior(m.prior),
                "variants": variants,
            });
            if let MetricKind::DefectRate(basis) = m.kind {
                metric["exposure"] = json!(match basis {
                    ExposureBasis::Units => "units",
                    ExposureBasis::Reported => "reported",
                });
            }
            if let Err(e) = &ms.arms {
                metric["error"] = json!(e.to_string());
            }
            metric
        })
        .collect();
    json!({
        "id": def.id,
        "control": def.variants[def.control].name,
        "variants": def.variants.iter().zip(&snap.units).map(|(v, u)| json!({
            "name": v.name, "weight": v.weight, "units": u,
        })).collect::<Vec<_>>(),
        "outcomes": outcomes(snap),
        "sample_ratio": sample_ratio(&summary.sample_ratio, summary.snapshot.def.rules.srm_p),
        "last_event_time": snap.last_event_time.and_then(time_text),
        "metrics": metrics,
        "decisions": decisions(def, &findings),
        "rules": rule_standings(summary, &findings, evidence),
        "caution": CAUTION,
    })
}

/// The rules that hold now, with the numbers they compared.
fn decisions(def: &ExperimentDef, findings: &[Finding]) -> Value {
    let found: Vec<Value> = findings
        .iter()
        .map(|f| {
            json!({
                "rule": f.rule.as_str(),
                "metric": f.metric.map(|m| def.metrics[m].name.clone()),
                "variant": f.variant.map(|v| def.variants[v].name.clone()),
                "value": f.value,
                "threshold": f.threshold,
                "test": f.test,
                "message": f.message,
                "evidence": evidence(&f.evidence),
            })
        })
        .collect();
    Value::Array(found)
}

/// One refused event in an ingest reply.
#[derive(Debug, Serialize)]
pub struct IngestError {
    /// Zero-based index, for JSON array bodies.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub index: Option<usize>,
    /// One-based line, for NDJSON bodies.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub line: Option<usize>,
    /// Machine-readable reason.
    pub reason: &'static str,
    /// What is wrong.
    pub message: String,
}

impl IngestError {
    /// From a reject at `position`.
    pub fn new(position: Position, reject: &Reject) -> IngestError {
        let (index, line) = match position {
            Position::Index(i) => (Some(i), None),
            Position::Line(l) => (None, Some(l)),
        };
        IngestError {
            index,
            line,
            reason: reject.reason.as_str(),
            message: reject.message.clone(),
        }
    }
}
