//! Pure logic of `posteriord compare`: input JSON text in, report text out.
//!
//! This is an edge module: it owns the wire format (serde) and turns it into the typed
//! arguments of [`crate::stats::compare`]. Input, for conversion:
//!
//! ```json
//! {"metric":"conversion","prior":{"alpha":1,"beta":1},"control":"control","interval":0.95,
//!  "variants":[{"name":"control","trials":1000,"successes":112},
//!              {"name":"alt","trials":1000,"successes":131}]}
//! ```
//!
//! For defect rates, `"metric":"defect_rate"`, `"prior":{"shape":1,"rate":1}` and variants
//! with `count` and `exposure`. Optional: `"control"` (default: the first variant),
//! `"interval"` (0.95), `"rope"` (0.01), `"harm_margin"` (0.0), and a per-variant `"prior"`
//! that overrides the metric's prior. Unknown fields are rejected so that a typo cannot
//! silently fall back to a default.

use std::fmt::Write as _;
use std::str::FromStr;

use serde::{Deserialize, Serialize};

use crate::stats::{self, ArmSummary, Arms, CompareOptions, StatsError};

/// The input and output of `posteriord compare`, shown by `posteriord compare --help`
/// (docs/compare.md has the full schema).
pub const HELP: &str = r#"Input (a JSON object; a file or standard input):
  {"kind": "conversion",                      conversion | defect_rate (the config's `kind`)
   "prior": {"alpha": 1, "beta": 1},          conversion: alpha, beta; defect_rate: shape, rate
   "control": "control",                      optional; default: the first variant
   "interval": 0.95,                          optional; probability inside the credible interval
   "rope": 0.01,                              optional; ±relative lift counted as no difference
   "harm_margin": 0.0,                        optional; relative margin of the harm probability
   "variants": [                              2 to 64 variants
     {"name": "control",   "trials": 1000, "successes": 112},
     {"name": "tall-pots", "trials": 1000, "successes": 131}]}
  Defect rates: variants with "count" (defects) and "exposure" (units of exposure).
  Any variant may carry its own "prior". Unknown fields are refused.

Output (--format json, the default): per variant its posterior ({alpha, beta} or
{shape, rate}), mean, sd, interval, prob_best, expected_loss, prob_better_than_control,
lift {mean, interval}, prob_practically_equivalent and prob_harm (null for the control).
--format text prints the same as a table, rates in %, lifts in relative %.

Posteriors assume the model (independent units, a stable rate per variant) and clean data:
check the sample ratio and data quality before acting on the numbers."#;

/// Output format of `posteriord compare`.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Format {
    /// Machine-readable JSON (the test seam).
    Json,
    /// An aligned text table for a person.
    Table,
}

impl FromStr for Format {
    type Err = CompareError;

    fn from_str(s: &str) -> Result<Self, Self::Err> {
        match s {
            "json" => Ok(Format::Json),
            "table" => Ok(Format::Table),
            other => Err(CompareError::Invalid(format!(
                "unknown format {other:?}; expected \"json\" or \"table\""
            ))),
        }
    }
}

/// Why `posteriord compare` rejected its input. `Display` is the message for stderr.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum CompareError {
    /// The text is not JSON of the expected shape.
    #[error("invalid input: {0}")]
    Json(#[from] serde_json::Error),
    /// The JSON is well-formed but its content is inconsistent.
    #[error("invalid input: {0}")]
    Invalid(String),
    /// A variant's data or prior is out of range.
    #[error("invalid input: variant {name:?}: {source}")]
    Variant {
        /// The variant's name.
        name: String,
        /// What was wrong.
        source: StatsError,
    },
    /// The comparison itself refused the options.
    #[error("invalid input: {0}")]
    Stats(#[from] StatsError),
    /// The input was accepted but the statistics core failed on it: a defect of ours, not
    /// of the input (the caller exits 1, not 2).
    #[error("internal error: {0}; the input is valid, so this is a defect of posteriord — please report it with the input")]
    Internal(StatsError),
}

impl CompareError {
    /// True when the input was at fault (exit 2); false for a failure of ours (exit 1).
    pub fn is_input_error(&self) -> bool {
        !matches!(self, CompareError::Internal(_))
    }
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawInput {
    #[serde(alias = "metric")]
    kind: String,
    prior: Option<RawPrior>,
    control: Option<String>,
    interval: Option<f64>,
    rope: Option<f64>,
    harm_margin: Option<f64>,
    variants: Vec<RawVariant>,
}

#[derive(Deserialize, Clone, Copy)]
#[serde(deny_unknown_fields)]
struct RawPrior {
    alpha: Option<f64>,
    beta: Option<f64>,
    shape: Option<f64>,
    rate: Option<f64>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawVariant {
    name: String,
    trials: Option<u64>,
    successes: Option<u64>,
    count: Option<u64>,
    exposure: Option<f64>,
    prior: Option<RawPrior>,
}

#[derive(Clone, Copy, PartialEq)]
enum Metric {
    Conversion,
    DefectRate,
}

impl Metric {
    fn name(self) -> &'static str {
        match self {
            Metric::Conversion => "conversion",
            Metric::DefectRate => "defect_rate",
        }
    }
}

#[derive(Serialize)]
struct Output {
    kind: &'static str,
    control: String,
    rope: f64,
    harm_margin: f64,
    variants: Vec<OutVariant>,
}

#[derive(Serialize)]
#[serde(untagged)]
enum OutPosterior {
    Beta { alpha: f64, beta: f64 },
    Gamma { shape: f64, rate: f64 },
}

#[derive(Serialize)]
struct OutInterval {
    level: f64,
    lower: f64,
    upper: f64,
}

impl From<stats::Interval> for OutInterval {
    fn from(i: stats::Interval) -> Self {
        OutInterval {
            level: i.level,
            lower: i.lower,
            upper: i.upper,
        }
    }
}

#[derive(Serialize)]
struct OutLift {
    /// None when the posterior mean of the ratio diverges (control shape ≤ 1).
    mean: Option<f64>,
    interval: OutInterval,
}

#[derive(Serialize)]
struct OutVariant {
    name: String,
    posterior: OutPosterior,
    mean: f64,
    sd: f64,
    interval: OutInterval,
    prob_best: f64,
    expected_loss: f64,
    prob_better_than_control: Option<f64>,
    lift: Option<OutLift>,
    prob_practically_equivalent: Option<f64>,
    prob_harm: Option<f64>,
}

/// The input read in the user's terms: the shape is checked on the JSON value first, so a
/// wrong shape is named as the user wrote it (an array, a missing `variants`), never as our
/// internal types.
fn parse_input(input: &str) -> Result<RawInput, CompareError> {
    let value: serde_json::Value = serde_json::from_str(input)?;
    let Some(object) = value.as_object() else {
        return Err(invalid(format!(
            "the input must be one JSON object such as {{\"kind\": \"conversion\", \"prior\": {{...}}, \"variants\": [...]}}, not {} (see posteriord compare --help)",
            json_kind(&value)
        )));
    };
    if !object.contains_key("kind") && !object.contains_key("metric") {
        return Err(invalid(
            "missing field `kind` (\"conversion\" or \"defect_rate\")",
        ));
    }
    match object.get("variants") {
        None => {
            return Err(invalid(
                "missing field `variants` (a list of 2 to 64 variants)",
            ))
        }
        Some(serde_json::Value::Array(vs)) => {
            for (i, v) in vs.iter().enumerate() {
                if !v.is_object() {
                    return Err(invalid(format!(
                        "variant #{} must be an object such as {{\"name\": \"control\", \"trials\": 1000, \"successes\": 112}}, not {}",
                        i + 1,
                        json_kind(v)
                    )));
                }
            }
        }
        Some(other) => {
            return Err(invalid(format!(
                "`variants` must be a list of variant objects, not {}",
                json_kind(other)
            )))
        }
    }
    if let Some(p) = object
        .get("prior")
        .filter(|p| !p.is_object() && !p.is_null())
    {
        return Err(invalid(format!(
            "`prior` must be an object such as {{\"alpha\": 1, \"beta\": 1}}, not {}",
            json_kind(p)
        )));
    }
    serde_json::from_value(value).map_err(|e| {
        // Whatever serde still finds (a wrong type, an unknown field) is said without the
        // names of our own structs.
        invalid(
            e.to_string()
                .replace("struct RawInput", "the input object")
                .replace("struct RawVariant", "a variant object")
                .replace("struct RawPrior", "a prior object"),
        )
    })
}

fn json_kind(v: &serde_json::Value) -> &'static str {
    match v {
        serde_json::Value::Null => "null",
        serde_json::Value::Bool(_) => "true or false",
        serde_json::Value::Number(_) => "a number",
        serde_json::Value::String(_) => "a string",
        serde_json::Value::Array(_) => "a list",
        serde_json::Value::Object(_) => "an object",
    }
}

fn invalid(msg: impl Into<String>) -> CompareError {
    CompareError::Invalid(msg.into())
}

/// Run `posteriord compare` on the input JSON text and render the report.
pub fn run(input: &str, format: Format) -> Result<String, CompareError> {
    let raw = parse_input(input)?;
    let metric = match raw.kind.as_str() {
        "conversion" => Metric::Conversion,
        "defect_rate" => Metric::DefectRate,
        other => {
            return Err(invalid(format!(
                "unknown kind {other:?}; expected \"conversion\" or \"defect_rate\""
            )))
        }
    };
    if raw.variants.len() < 2 || raw.variants.len() > stats::MAX_ARMS {
        return Err(invalid(format!(
            "need between 2 and {} variants, got {}",
            stats::MAX_ARMS,
            raw.variants.len()
        )));
    }
    for (i, v) in raw.variants.iter().enumerate() {
        if v.name.trim().is_empty() {
            return Err(invalid(format!("variant #{} has an empty name", i + 1)));
        }
        if raw.variants[..i].iter().any(|w| w.name == v.name) {
            return Err(invalid(format!("variant name {:?} appears twice", v.name)));
        }
    }
    let control_name = raw
        .control
        .clone()
        .unwrap_or_else(|| raw.variants[0].name.clone());
    let control = raw
        .variants
        .iter()
        .position(|v| v.name == control_name)
        .ok_or_else(|| {
            invalid(format!(
                "control {control_name:?} is not one of the variants"
            ))
        })?;
    let defaults = CompareOptions::default();
    let opts = CompareOptions {
        control,
        level: raw.interval.unwrap_or(defaults.level),
        rope: raw.rope.unwrap_or(defaults.rope),
        harm_margin: raw.harm_margin.unwrap_or(defaults.harm_margin),
        ..defaults
    };
    let metric_prior = raw.prior.ok_or_else(|| invalid("missing field `prior`"))?;
    let arms = build_arms(metric, &metric_prior, &raw.variants)?;
    let summaries = stats::compare(&arms, &opts).map_err(|e| {
        if e.is_internal() {
            CompareError::Internal(e)
        } else {
            CompareError::Stats(e)
        }
    })?;

    let variants: Vec<OutVariant> = raw
        .variants
        .iter()
        .zip(&summaries)
        .enumerate()
        .map(|(i, (v, s))| out_variant(&v.name, posterior_of(&arms, i), s))
        .collect();
    let output = Output {
        kind: metric.name(),
        control: control_name,
        rope: opts.rope,
        harm_margin: opts.harm_margin,
        variants,
    };
    match format {
        Format::Json => {
            let mut text = serde_json::to_string_pretty(&output)?;
            text.push('\n');
            Ok(text)
        }
        Format::Table => Ok(render_table(&output, metric, opts.level)),
    }
}

fn build_arms(
    metric: Metric,
    metric_prior: &RawPrior,
    variants: &[RawVariant],
) -> Result<Arms, CompareError> {
    let wrap = |name: &str, source: StatsError| CompareError::Variant {
        name: name.to_string(),
        source,
    };
    match metric {
        Metric::Conversion => {
            let mut out = Vec::with_capacity(variants.len());
            for v in variants {
                if v.count.is_some() || v.exposure.is_some() {
                    return Err(invalid(format!(
                        "variant {:?}: conversion variants take `trials` and `successes`, not `count`/`exposure`",
                        v.name
                    )));
                }
                let (trials, successes) = match (v.trials, v.successes) {
                    (Some(n), Some(s)) => (n, s),
                    _ => {
                        return Err(invalid(format!(
                            "variant {:?}: conversion variants need `trials` and `successes`",
                            v.name
                        )))
                    }
                };
                let prior = beta_prior(v.prior.as_ref().unwrap_or(metric_prior))
                    .map_err(|e| prefix_prior(&v.name, v.prior.is_some(), e))?;
                out.push(
                    stats::Beta::posterior(&prior, trials, successes)
                        .map_err(|e| wrap(&v.name, e))?,
                );
            }
            Ok(Arms::Beta(out))
        }
        Metric::DefectRate => {
            let mut out = Vec::with_capacity(variants.len());
            for v in variants {
                if v.trials.is_some() || v.successes.is_some() {
                    return Err(invalid(format!(
                        "variant {:?}: defect_rate variants take `count` and `exposure`, not `trials`/`successes`",
                        v.name
                    )));
                }
                let (count, exposure) = match (v.count, v.exposure) {
                    (Some(c), Some(e)) => (c, e),
                    _ => {
                        return Err(invalid(format!(
                            "variant {:?}: defect_rate variants need `count` and `exposure`",
                            v.name
                        )))
                    }
                };
                let prior = gamma_prior(v.prior.as_ref().unwrap_or(metric_prior))
                    .map_err(|e| prefix_prior(&v.name, v.prior.is_some(), e))?;
                out.push(
                    stats::Gamma::posterior(&prior, count, exposure)
                        .map_err(|e| wrap(&v.name, e))?,
                );
            }
            Ok(Arms::Gamma(out))
        }
    }
}

fn prefix_prior(name: &str, own: bool, e: CompareError) -> CompareError {
    if !own {
        return e;
    }
    match e {
        CompareError::Invalid(msg) => invalid(format!("variant {name:?}: {msg}")),
        CompareError::Stats(source) => CompareError::Variant {
            name: name.to_string(),
            source,
        },
        other => other,
    }
}

fn beta_prior(p: &RawPrior) -> Result<stats::Beta, CompareError> {
    if p.shape.is_some() || p.rate.is_some() {
        return Err(invalid(
            "a conversion prior takes `alpha` and `beta`, not `shape`/`rate`",
        ));
    }
    match (p.alpha, p.beta) {
        (Some(a), Some(b)) => {
            Ok(stats::Beta::new(a, b).map_err(|e| invalid(format!("prior: {e}")))?)
        }
        _ => Err(invalid("a conversion prior needs both `alpha` and `beta`")),
    }
}

fn gamma_prior(p: &RawPrior) -> Result<stats::Gamma, CompareError> {
    if p.alpha.is_some() || p.beta.is_some() {
        return Err(invalid(
            "a defect_rate prior takes `shape` and `rate`, not `alpha`/`beta`",
        ));
    }
    match (p.shape, p.rate) {
        (Some(a), Some(r)) => {
            Ok(stats::Gamma::new(a, r).map_err(|e| invalid(format!("prior: {e}")))?)
        }
        _ => Err(invalid("a defect_rate prior needs both `shape` and `rate`")),
    }
}

fn posterior_of(arms: &Arms, i: usize) -> OutPosterior {
    match arms {
        Arms::Beta(v) => OutPosterior::Beta {
            alpha: v[i].alpha(),
            beta: v[i].beta(),
        },
        Arms::Gamma(v) => OutPosterior::Gamma {
            shape: v[i].shape(),
            rate: v[i].rate(),
        },
    }
}

fn out_variant(name: &str, posterior: OutPosterior, s: &ArmSummary) -> OutVariant {
    OutVariant {
        name: name.to_string(),
        posterior,
        mean: s.mean,
        sd: s.sd,
        interval: s.interval.into(),
        prob_best: s.prob_best,
        expected_loss: s.expected_loss,
        prob_better_than_control: s.prob_better_than_control,
        lift: s.lift.map(|l| OutLift {
            mean: if l.mean.is_finite() {
                Some(l.mean)
            } else {
                None
            },
            interval: l.interval.into(),
        }),
        prob_practically_equivalent: s.prob_practically_equivalent,
        prob_harm: s.prob_harm,
    }
}

fn render_table(out: &Output, metric: Metric, level: f64) -> String {
    let pct = format!("{}%", trim_number(level * 100.0));
    let direction = match metric {
        Metric::Conversion => "higher is better",
        Metric::DefectRate => "lower is better",
    };
    let mut text = String::new();
    let _ = writeln!(
        text,
        "kind: {} ({direction}); control: {}; ROPE: ±{}% relative lift; harm margin: {}% relative",
        out.kind,
        out.control,
        trim_number(out.rope * 100.0),
        trim_number(out.harm_margin * 100.0)
    );
    // Rates in % and their differences in percentage points for conversion; defect rates
    // and their differences per unit of exposure.
    let (unit, loss_unit) = match metric {
        Metric::Conversion => ("", " (pp)"),
        Metric::DefectRate => (" (per unit of exposure)", " (per unit of exposure)"),
    };
    let rate = |x: f64| match metric {
        Metric::Conversion => format!("{:.3}%", x * 100.0),
        Metric::DefectRate => format!("{x:.4e}"),
    };
    let header: Vec<String> = vec![
        "variant".into(),
        "posterior".into(),
        format!("posterior mean{unit}"),
        format!("{pct} interval{unit}"),
        "P(best)".into(),
        format!("expected loss{loss_unit}"),
        "P(better than control)".into(),
        "lift mean (relative)".into(),
        format!("lift {pct} interval (relative)"),
        "P(practically equivalent)".into(),
        "P(harm)".into(),
    ];
    let mut rows = vec![header];
    for v in &out.variants {
        let posterior = match v.posterior {
            OutPosterior::Beta { alpha, beta } => {
                format!("Beta({}, {})", trim_number(alpha), trim_number(beta))
            }
            OutPosterior::Gamma { shape, rate } => {
                format!("Gamma({}, {})", trim_number(shape), trim_number(rate))
            }
        };
        let dash = || "-".to_string();
        let (lift_mean, lift_interval) = match &v.lift {
            Some(l) => (
                l.mean
                    .map(|m| format!("{:+.2}%", m * 100.0))
                    .unwrap_or_else(|| "undefined".into()),
                format!(
                    "[{:+.2}%, {:+.2}%]",
                    l.interval.lower * 100.0,
                    l.interval.upper * 100.0
                ),
            ),
            None => (dash(), dash()),
        };
        rows.push(vec![
            v.name.clone(),
            posterior,
            rate(v.mean),
            format!("[{}, {}]", rate(v.interval.lower), rate(v.interval.upper)),
            format!("{:.4}", v.prob_best),
            match metric {
                Metric::Conversion => format!("{:.4}", v.expected_loss * 100.0),
                Metric::DefectRate => format!("{:.3e}", v.expected_loss),
            },
            v.prob_better_than_control
                .map(|p| format!("{p:.4}"))
                .unwrap_or_else(dash),
            lift_mean,
            lift_interval,
            v.prob_practically_equivalent
                .map(|p| format!("{p:.4}"))
                .unwrap_or_else(dash),
            v.prob_harm.map(|p| format!("{p:.4}")).unwrap_or_else(dash),
        ]);
    }
    let n_cols = rows[0].len();
    let widths: Vec<usize> = (0..n_cols)
        .map(|c| rows.iter().map(|r| r[c].chars().count()).max().unwrap_or(0))
        .collect();
    for row in &rows {
        let line: Vec<String> = row
            .iter()
            .zip(&widths)
            .enumerate()
            .map(|(c, (cell, w))| {
                let pad = w - cell.chars().count();
                // Text columns align left, numbers right.
                if c < 2 {
                    format!("{cell}{}", " ".repeat(pad))
                } else {
                    format!("{}{cell}", " ".repeat(pad))
                }
            })
            .collect();
        let _ = writeln!(text, "{}", line.join("  ").trim_end());
    }
    text
}

/// Shortest decimal that reads naturally for parameters and percentages (no trailing zeros).
fn trim_number(x: f64) -> String {
    if x.fract() == 0.0 && x.abs() < 1e15 {
        format!("{x:.0}")
    } else {
        let s = format!("{x:.6}");
        s.trim_end_matches('0').trim_end_matches('.').to_string()
    }
}
