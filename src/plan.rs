//! `posteriord plan`: what an experiment's stopping rules will do with its traffic, before
//! launch. Simulates many experiments under scenarios (A/A, and each true effect asked for),
//! aggregating traffic per look, and runs every look through the service's own evaluation
//! step (summarize → evaluate → alert book, on the configured event-time cadence). Reports how
//! often each decision is reached, how fast, and the loss the decisions incur; optionally
//! sweeps a threshold to meet a target error rate. Deterministic for a seed, whatever the
//! number of threads: each simulated experiment has its own random stream derived from the
//! seed and its index.

use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::{Arc, Mutex};

use rand::rngs::StdRng;
use rand::SeedableRng;
use rand_distr::{Binomial, Distribution, Poisson};
use serde_json::{json, Value};

use crate::decide::alerts::{AlertBook, AlertChange};
use crate::decide::evaluation::assess_rules_only;
use crate::decide::screen::Screen;
use crate::decide::Rule;
use crate::event::{Micros, Outcome};
use crate::experiment::{ExperimentDef, MetricKind};
use crate::state::cadence::{Cadence, Clock};
use crate::state::{
    ConversionTotals, DefectTotals, ExperimentSnapshot, MetricTotals, OutcomeCounts,
};

const HOUR: Micros = 3_600_000_000;
const DAY: Micros = 24 * HOUR;
/// Simulated experiments start at 2026-01-05T00:00:00Z (any fixed time would do; a fixed one
/// keeps output bytes identical between runs).
const START: Micros = 1_767_571_200_000_000;

/// Why a plan cannot run.
#[derive(Debug, thiserror::Error)]
pub enum PlanError {
    /// Bad options.
    #[error("{0}")]
    Usage(String),
}

fn usage(s: impl Into<String>) -> PlanError {
    PlanError::Usage(s.into())
}

/// A true effect: the variant's rate on the metric is the baseline times (1 + relative).
#[derive(Debug, Clone, PartialEq)]
pub struct Effect {
    /// Variant index.
    pub variant: usize,
    /// Metric index.
    pub metric: usize,
    /// Relative effect, e.g. 0.05 for +5%.
    pub relative: f64,
}

/// A scenario: the A/A case (no effects) or one effect.
#[derive(Debug, Clone, PartialEq)]
pub struct Scenario {
    /// As written on the command line, or "A/A".
    pub name: String,
    /// True effects.
    pub effects: Vec<Effect>,
}

/// What to simulate.
#[derive(Debug, Clone)]
pub struct PlanOptions {
    /// The experiment as configured.
    pub def: Arc<ExperimentDef>,
    /// The evaluation cadence of the service.
    pub cadence: Cadence,
    /// The alert hold-down of the service (µs).
    pub hold_down: Micros,
    /// Simulated experiments per scenario.
    pub sims: usize,
    /// Random seed.
    pub seed: u64,
    /// Units entering the experiment per day (all arms).
    pub units_per_day: f64,
    /// Planned duration.
    pub days: f64,
    /// Simulation step (µs): traffic is aggregated per step and the cadence is checked at
    /// each step's end, so the rules are looked at most once per step.
    pub step: Micros,
    /// Look only once, at the end (no early stopping).
    pub single_look: bool,
    /// Baseline rate per metric (conversion probability, or defects per unit).
    pub baselines: Vec<f64>,
    /// The scenarios, A/A first.
    pub scenarios: Vec<Scenario>,
    /// Worker threads (results do not depend on it).
    pub threads: usize,
    /// Largest acceptable share of runs with a false harm alert (flagged above it).
    pub max_false_harm: f64,
    /// Largest acceptable share of runs shipping the wrong way (flagged above it).
    pub max_wrong_ship: f64,
}

/// Default target for the share of runs with a false harm alert.
pub const DEFAULT_MAX_FALSE_HARM: f64 = 0.05;
/// Default target for the share of runs shipping the wrong way.
pub const DEFAULT_MAX_WRONG_SHIP: f64 = 0.05;

/// How a simulated experiment ended.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Ending {
    /// A variant that is not better than the control on the primary metric was shipped.
    FalseShip,
    /// A variant that is better than the control on the primary metric was shipped.
    TrueShip,
    /// The ship rule chose the control.
    ControlShipped,
    /// A harm alert opened (the team stops the variant).
    Harm,
    /// Every variant was found practically equivalent to the control.
    Equivalent,
    /// No decision within the planned days (or the `inconclusive` rule fired).
    Inconclusive,
}

impl Ending {
    /// Every ending, in reporting order.
    pub const ALL: [Ending; 6] = [
        Ending::FalseShip,
        Ending::TrueShip,
        Ending::ControlShipped,
        Ending::Harm,
        Ending::Equivalent,
        Ending::Inconclusive,
    ];

    /// Stable name.
    pub fn as_str(self) -> &'static str {
        match self {
            Ending::FalseShip => "false_ship",
            Ending::TrueShip => "true_ship",
            Ending::ControlShipped => "control_shipped",
            Ending::Harm => "harm",
            Ending::Equivalent => "equivalent",
            Ending::Inconclusive => "inconclusive",
        }
    }

    fn label(self) -> &'static str {
        match self {
            Ending::FalseShip => "false ship",
            Ending::TrueShip => "true ship",
            Ending::ControlShipped => "control shipped",
            Ending::Harm => "harm alert",
            Ending::Equivalent => "equivalent",
            Ending::Inconclusive => "inconclusive",
        }
    }
}

/// One simulated experiment's end.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RunEnd {
    /// How it ended.
    pub ending: Ending,
    /// Event time from start to the decision (the whole plan when inconclusive).
    pub elapsed: Micros,
    /// Units exposed by then (all arms).
    pub units: u64,
    /// True loss of the arm kept, on the primary metric (best true rate minus the kept arm's).
    pub loss: f64,
    /// Looks evaluated.
    pub looks: u64,
    /// The arm kept: the one shipped, else the control.
    pub kept: usize,
    /// The decision shipped an arm that is truly worse than the best on the primary metric,
    /// or a variant truly worse than the control on a guardrail by more than its clearance
    /// margin.
    pub wrong_ship: bool,
    /// A harm alert (either rule) opened on a (metric, variant) that is truly not worse than
    /// the control by more than the rule's margin.
    pub false_harm: bool,
    /// The first alarm of the anytime-valid harm rule over the whole planned duration
    /// (followed past the run's decision): its (metric, variant, elapsed µs).
    pub evidence_alarm: Option<(usize, usize, Micros)>,
}

/// Time spent, for `--bench`.
#[derive(Debug, Clone, Copy, Default)]
pub struct Timing {
    /// Nanoseconds in the evaluation step (summarize, evaluate, alert book).
    pub evaluating_ns: u128,
    /// Nanoseconds everywhere else in the simulation (draws, snapshots, bookkeeping).
    pub simulating_ns: u128,
    /// Looks evaluated.
    pub looks: u64,
    /// Metric evaluations decided by the look-to-look bound, without quadrature
    /// (`decide::screen`).
    pub metrics_skipped: u64,
    /// Metric evaluations computed exactly.
    pub metrics_computed: u64,
}

/// The ends of every run of one scenario, in run order.
#[derive(Debug, Clone)]
pub struct ScenarioResult {
    /// The scenario.
    pub scenario: Scenario,
    /// One end per run.
    pub runs: Vec<RunEnd>,
}

/// Parse `variant=+x%` or `variant:metric=-x%` (also `x` as a fraction without `%`); the
/// metric defaults to the primary one.
pub fn parse_effect(def: &ExperimentDef, text: &str) -> Result<Effect, PlanError> {
    let (who, amount) = text.split_once('=').ok_or_else(|| {
        usage(format!(
            "--effect `{text}`: expected VARIANT=+X% or VARIANT:METRIC=+X%"
        ))
    })?;
    let (variant, metric) = match who.split_once(':') {
        Some((v, m)) => (v, Some(m)),
        None => (who, None),
    };
    let v = def.variant_index(variant).ok_or_else(|| {
        usage(format!(
            "--effect `{text}`: experiment `{}` has no variant `{variant}`",
            def.id
        ))
    })?;
    if v == def.control {
        return Err(usage(format!(
            "--effect `{text}`: `{variant}` is the control; give effects of the other variants"
        )));
    }
    let m = match metric {
        None => def.rules.primary,
        Some(m) => def.metric_index(m).ok_or_else(|| {
            usage(format!(
                "--effect `{text}`: experiment `{}` has no metric `{m}`",
                def.id
            ))
        })?,
    };
    let amount = amount.trim();
    let percent = amount.strip_suffix('%');
    let relative = match percent {
        Some(p) => p.trim().parse::<f64>().map(|x| x / 100.0),
        None => amount.parse::<f64>(),
    }
    .map_err(|_| {
        usage(format!(
            "--effect `{text}`: `{amount}` is not a number like +5% or -0.02"
        ))
    })?;
    // A bare number is the unit slip this catches: `v=10` meant +10%, not +1000%. Without
    // `%` the effect is a relative fraction and must say its direction, and stay below 1.
    if percent.is_none() {
        let signed = amount.starts_with('+') || amount.starts_with('-');
        if !signed || relative.abs() >= 1.0 {
            let guess = if relative.abs() >= 1.0 {
                format!("{:+}%", relative)
            } else {
                format!("{:+}% (or {:+} as a fraction)", relative * 100.0, relative)
            };
            return Err(usage(format!(
                "--effect `{text}`: a relative effect needs a sign and % (like +5%) or a signed fraction below 1 (like +0.05); did you mean {variant}{}={guess}?",
                metric.map(|m| format!(":{m}")).unwrap_or_default()
            )));
        }
    }
    if !(relative.is_finite() && relative > -1.0) {
        return Err(usage(format!(
            "--effect `{text}`: the relative effect must be above -100%"
        )));
    }
    Ok(Effect {
        variant: v,
        metric: m,
        relative,
    })
}

/// Parse the `--baseline metric=rate` list into one rate per metric; every metric needs one.
pub fn parse_baselines(def: &ExperimentDef, given: &[String]) -> Result<Vec<f64>, PlanError> {
    let mut rates: Vec<Option<f64>> = vec![None; def.metrics.len()];
    for text in given {
        let (name, rate) = text
            .split_once('=')
            .ok_or_else(|| usage(format!("--baseline `{text}`: expected METRIC=RATE")))?;
        let m = def.metric_index(name).ok_or_else(|| {
            usage(format!(
                "--baseline `{text}`: experiment `{}` has no metric `{name}`",
                def.id
            ))
        })?;
        // A conversion rate may be written in percent (`5%`), as people say it.
        let percent = rate.trim().strip_suffix('%');
        let r: f64 = percent
            .unwrap_or(rate.trim())
            .trim()
            .parse::<f64>()
            .map(|x| if percent.is_some() { x / 100.0 } else { x })
            .map_err(|_| usage(format!("--baseline `{text}`: `{rate}` is not a number")))?;
        if percent.is_some() && def.metrics[m].kind != MetricKind::Conversion {
            return Err(usage(format!(
                "--baseline `{text}`: a defect rate is per unit of exposure, not a percentage; write it as a number"
            )));
        }
        let ok = match def.metrics[m].kind {
            MetricKind::Conversion => r > 0.0 && r < 1.0,
            MetricKind::DefectRate(_) => r > 0.0 && r.is_finite(),
        };
        if !ok {
            let hint = match def.metrics[m].kind {
                MetricKind::Conversion if (1.0..100.0).contains(&r) => {
                    format!("; did you mean {name}={r}% ({})?", r / 100.0)
                }
                _ => String::new(),
            };
            return Err(usage(format!(
                "--baseline `{text}`: a conversion rate must be in (0, 1), a defect rate positive{hint}"
            )));
        }
        rates[m] = Some(r);
    }
    rates
        .iter()
        .enumerate()
        .map(|(m, r)| {
            r.ok_or_else(|| {
                usage(format!(
                    "metric `{}` needs a baseline: --baseline {}=RATE",
                    def.metrics[m].name, def.metrics[m].name
                ))
            })
        })
        .collect()
}

/// SplitMix64: derives independent per-run seeds from (seed, scenario, run), so results do
/// not depend on which thread runs which simulation.
fn mix(mut z: u64) -> u64 {
    z = z.wrapping_add(0x9E37_79B9_7F4A_7C15);
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

fn run_seed(seed: u64, scenario: usize, run: usize) -> u64 {
    mix(mix(mix(seed) ^ scenario as u64) ^ run as u64)
}

/// True rate of every (metric, variant) under `scenario`.
fn true_rates(opts: &PlanOptions, scenario: &Scenario) -> Vec<Vec<f64>> {
    let k = opts.def.variants.len();
    let mut rates: Vec<Vec<f64>> = opts.baselines.iter().map(|&b| vec![b; k]).collect();
    for e in &scenario.effects {
        rates[e.metric][e.variant] *= 1.0 + e.relative;
    }
    for (m, metric) in opts.def.metrics.iter().enumerate() {
        if metric.kind == MetricKind::Conversion {
            for r in &mut rates[m] {
                *r = r.clamp(0.0, 1.0);
            }
        }
    }
    rates
}

/// Simulate one experiment under `scenario` with its own random stream.
pub fn simulate_run(
    opts: &PlanOptions,
    scenario_index: usize,
    run: usize,
    timing: &mut Timing,
) -> RunEnd {
    simulate_run_with(opts, scenario_index, run, timing, true)
}

/// [`simulate_run`], with the look-to-look bound (`screened`, the default: the same findings
/// at every look, see `decide::screen`) or with every look computed exactly.
fn simulate_run_with(
    opts: &PlanOptions,
    scenario_index: usize,
    run: usize,
    timing: &mut Timing,
    screened: bool,
) -> RunEnd {
    let t_start = std::time::Instant::now();
    let mut evaluating = std::time::Duration::ZERO;
    let scenario = &opts.scenarios[scenario_index];
    let def = &opts.def;
    let k = def.variants.len();
    let rates = true_rates(opts, scenario);
    let p = def.rules.primary;
    let best = rates[p].iter().copied().fold(
        f64::NEG_INFINITY,
        if higher_is_better(def, p) {
            f64::max
        } else {
            f64::min
        },
    );
    let regret = |arm: usize| (best - rates[p][arm]).abs();
    let mut rng = StdRng::seed_from_u64(run_seed(opts.seed, scenario_index, run));
    let mut book = AlertBook::without_intervals(opts.hold_down);
    let mut screen = Screen::new();
    // The anytime-valid processes followed over the whole plan, also after the decision
    // (they read totals only, so following them costs no quadrature).
    let mut shadow = crate::decide::betting::EvidenceBook::new(false);
    let mut evidence_alarm: Option<(usize, usize, Micros)> = None;
    let mut decided: Option<RunEnd> = None;
    let mut clock = Clock::default();
    let applied = Outcome::ALL
        .iter()
        .position(|o| *o == Outcome::Applied)
        .unwrap_or(0);
    let horizon = (opts.days * DAY as f64) as Micros;
    let steps = ((horizon + opts.step - 1) / opts.step).max(1);
    let cum_weights: Vec<f64> = def
        .variants
        .iter()
        .scan(0.0, |acc, v| {
            *acc += v.weight;
            Some(*acc)
        })
        .collect();
    let mut units = vec![0u64; k];
    let mut metrics: Vec<MetricTotals> = def
        .metrics
        .iter()
        .map(|m| match m.kind {
            MetricKind::Conversion => {
                MetricTotals::Conversion(vec![ConversionTotals::default(); k])
            }
            MetricKind::DefectRate(_) => MetricTotals::Defect(vec![DefectTotals::default(); k]),
        })
        .collect();
    let mut events: u64 = 0;
    let mut looks = 0u64;
    let mut new_units = vec![0u64; k];
    for step in 1..=steps {
        let now = (step * opts.step).min(horizon);
        // Steady traffic, split by the weights exactly (cumulative rounding keeps totals
        // exact); sample-ratio mismatch is therefore not simulated.
        let total = (opts.units_per_day * now as f64 / DAY as f64).floor() as u64;
        let mut before = 0u64;
        for (v, cw) in cum_weights.iter().enumerate() {
            let upto = if v + 1 == k {
                total
            } else {
                (total as f64 * cw).floor() as u64
            };
            let arm_total = upto - before;
            before = upto;
            new_units[v] = arm_total - units[v];
            units[v] = arm_total;
        }
        let mut step_events: u64 = new_units.iter().sum();
        for (m, totals) in metrics.iter_mut().enumerate() {
            match totals {
                MetricTotals::Conversion(t) => {
                    for v in 0..k {
                        let n = new_units[v];
                        let s = if n == 0 {
                            0
                        } else {
                            Binomial::new(n, rates[m][v])
                                .map(|d| d.sample(&mut rng))
                                .unwrap_or(0)
                        };
                        t[v].trials += n;
                        t[v].successes += s;
                        step_events += s;
                    }
                }
                MetricTotals::Defect(t) => {
                    for v in 0..k {
                        let n = new_units[v];
                        let mean = n as f64 * rates[m][v];
                        let c = if mean > 0.0 {
                            Poisson::new(mean)
                                .map(|d| d.sample(&mut rng) as u64)
                                .unwrap_or(0)
                        } else {
                            0
                        };
                        t[v].count += c;
                        // One unit of exposure per exposed unit, for either exposure basis.
                        t[v].exposure += n as f64;
                        step_events += c;
                    }
                }
            }
        }
        events += step_events;
        let due = if opts.single_look {
            step == steps
        } else {
            clock.tick_many(&opts.cadence, step_events, Some(START + now))
        };
        if !due {
            continue;
        }
        let mut outcomes = OutcomeCounts::default();
        outcomes.0[applied] = events;
        let snapshot = ExperimentSnapshot {
            def: Arc::clone(def),
            units: units.clone(),
            metrics: metrics.clone(),
            outcomes,
            last_event_time: Some(START + now),
            first_event_time: Some(START),
            positions: Vec::new(),
        };
        if evidence_alarm.is_none() {
            shadow.advance(&snapshot);
            evidence_alarm = first_alarm(def, &shadow, now);
        }
        if decided.is_some() {
            if evidence_alarm.is_some() {
                break;
            }
            continue;
        }
        looks += 1;
        let t_eval = std::time::Instant::now();
        // The service's evaluation step without the lift quantiles, which only the history
        // reads (the decisions are the same bit for bit: src/decide/tests.rs), and without
        // the quadrature of metrics whose rules an earlier look's values and a proven bound
        // already decide (the same findings: decide::screen, tested below).
        let mut evaluation = if screened {
            screen.assess(snapshot)
        } else {
            assess_rules_only(snapshot)
        };
        evaluation.fold_into(&mut book);
        evaluating += t_eval.elapsed();
        let total_units: u64 = units.iter().sum();
        if let Some((ending, kept, harm_at)) = classify(def, &rates, &evaluation.changes) {
            decided = Some(RunEnd {
                ending,
                elapsed: now,
                units: total_units,
                loss: regret(kept),
                looks,
                kept,
                wrong_ship: matches!(
                    ending,
                    Ending::TrueShip | Ending::FalseShip | Ending::ControlShipped
                ) && wrong_way(def, &rates, kept),
                false_harm: harm_at.is_some_and(|(m, v)| !truly_worse(def, &rates, m, v)),
                evidence_alarm: None,
            });
            if evidence_alarm.is_some() {
                break;
            }
        }
    }
    account(timing, t_start, evaluating, looks);
    timing.metrics_skipped += screen.skipped;
    timing.metrics_computed += screen.computed;
    let mut end = decided.unwrap_or(RunEnd {
        ending: Ending::Inconclusive,
        elapsed: horizon,
        units: units.iter().sum(),
        loss: regret(def.control),
        looks,
        kept: def.control,
        wrong_ship: false,
        false_harm: false,
        evidence_alarm: None,
    });
    end.evidence_alarm = evidence_alarm;
    end
}

/// The first (metric, variant) whose anytime-valid harm process alarmed, at `now`.
fn first_alarm(
    def: &ExperimentDef,
    book: &crate::decide::betting::EvidenceBook,
    now: Micros,
) -> Option<(usize, usize, Micros)> {
    let key = def.state_key();
    def.metrics.iter().enumerate().find_map(|(m, metric)| {
        let rule = metric.rules.evidence?;
        (0..def.variants.len())
            .filter(|&v| v != def.control)
            .find(|&v| book.get(&key, m, v).is_some_and(|p| p.alarmed(rule.alpha)))
            .map(|v| (m, v, now))
    })
}

/// Whether variant `v` is truly worse than the control on metric `m` by more than the harm
/// margin (the smaller of the two harm rules' margins).
fn truly_worse(def: &ExperimentDef, rates: &[Vec<f64>], m: usize, v: usize) -> bool {
    let rules = &def.metrics[m].rules;
    let margin = rules
        .harm
        .map(|h| h.margin)
        .into_iter()
        .chain(rules.evidence.map(|e| e.margin))
        .fold(f64::INFINITY, f64::min);
    let margin = if margin.is_finite() { margin } else { 0.0 };
    let (c, x) = (rates[m][def.control], rates[m][v]);
    if higher_is_better(def, m) {
        x < (1.0 - margin) * c
    } else {
        x > (1.0 + margin) * c
    }
}

/// Whether keeping arm `kept` is a wrong-way ship: truly worse than the best arm on the
/// primary metric, or (for a variant) truly worse than the control on a guardrail by more
/// than that guardrail's clearance margin.
fn wrong_way(def: &ExperimentDef, rates: &[Vec<f64>], kept: usize) -> bool {
    let p = def.rules.primary;
    let better = |a: f64, b: f64| {
        if higher_is_better(def, p) {
            a > b
        } else {
            a < b
        }
    };
    if rates[p].iter().any(|&r| better(r, rates[p][kept])) {
        return true;
    }
    if kept == def.control {
        return false;
    }
    def.rules.guardrails.iter().any(|&g| {
        let margin = def.metrics[g].rules.clear.map_or(0.0, |c| c.margin);
        let (c, x) = (rates[g][def.control], rates[g][kept]);
        if higher_is_better(def, g) {
            x < (1.0 - margin) * c
        } else {
            x > (1.0 + margin) * c
        }
    })
}

fn account(
    timing: &mut Timing,
    start: std::time::Instant,
    evaluating: std::time::Duration,
    looks: u64,
) {
    let total = start.elapsed();
    timing.evaluating_ns += evaluating.as_nanos();
    timing.simulating_ns += total.saturating_sub(evaluating).as_nanos();
    timing.looks += looks;
}

fn higher_is_better(def: &ExperimentDef, metric: usize) -> bool {
    def.metrics[metric].kind == MetricKind::Conversion
}

/// An ending, the arm kept, and for harm the (metric, variant) it was raised on.
type Classified = (Ending, usize, Option<(usize, usize)>);

/// The decision an evaluation's alert changes amount to, the arm kept, and for harm the
/// (metric, variant) it was raised on: harm first (either harm rule; the team stops the
/// variant), then ship, equivalence and inconclusive.
fn classify(
    def: &ExperimentDef,
    rates: &[Vec<f64>],
    changes: &[AlertChange],
) -> Option<Classified> {
    let opened: Vec<&crate::decide::alerts::Alert> = changes
        .iter()
        .filter_map(|c| match c {
            AlertChange::Opened(a) => Some(a),
            AlertChange::Closed(_) => None,
        })
        .collect();
    let p = def.rules.primary;
    let control = def.control;
    if let Some(a) = opened
        .iter()
        .find(|a| matches!(a.key.rule, Rule::Harm | Rule::HarmEvidence))
    {
        let at = a.finding.metric.zip(a.finding.variant);
        return Some((Ending::Harm, control, at));
    }
    if let Some(a) = opened.iter().find(|a| a.key.rule == Rule::Ship) {
        let v = a.finding.variant.unwrap_or(control);
        if v == control {
            return Some((Ending::ControlShipped, control, None));
        }
        let better = if higher_is_better(def, p) {
            rates[p][v] > rates[p][control]
        } else {
            rates[p][v] < rates[p][control]
        };
        return Some((
            if better {
                Ending::TrueShip
            } else {
                Ending::FalseShip
            },
            v,
            None,
        ));
    }
    if opened.iter().any(|a| a.key.rule == Rule::Equivalent) {
        return Some((Ending::Equivalent, control, None));
    }
    if opened.iter().any(|a| a.key.rule == Rule::Inconclusive) {
        return Some((Ending::Inconclusive, control, None));
    }
    None
}

/// Observes progress, in finished simulations.
pub trait Progress: Sync {
    /// One more simulation finished.
    fn advance(&self);
}

impl Progress for () {
    fn advance(&self) {}
}

impl Progress for indicatif::ProgressBar {
    fn advance(&self) {
        self.inc(1);
    }
}

/// Run every scenario of `opts` on `opts.threads` threads; results are in run order, so they
/// do not depend on the thread count.
pub fn run(opts: &PlanOptions, progress: &dyn Progress) -> (Vec<ScenarioResult>, Timing) {
    // Interleaved across scenarios (run-major), so that progress and its time estimate see
    // every scenario's pace from the start; results are put back in scenario order below.
    let n_scenarios = opts.scenarios.len();
    let jobs: Vec<(usize, usize)> = (0..opts.sims)
        .flat_map(|r| (0..n_scenarios).map(move |s| (s, r)))
        .collect();
    let next = AtomicUsize::new(0);
    let slots: Vec<Mutex<Option<RunEnd>>> = jobs.iter().map(|_| Mutex::new(None)).collect();
    let timing = Mutex::new(Timing::default());
    std::thread::scope(|scope| {
        for _ in 0..opts.threads.max(1) {
            scope.spawn(|| {
                let mut local = Timing::default();
                loop {
                    let i = next.fetch_add(1, Ordering::Relaxed);
                    let Some(&(s, r)) = jobs.get(i) else { break };
                    let end = simulate_run(opts, s, r, &mut local);
                    *slots[i].lock().unwrap_or_else(|p| p.into_inner()) = Some(end);
                    progress.advance();
                }
                let mut t = timing.lock().unwrap_or_else(|p| p.into_inner());
                t.evaluating_ns += local.evaluating_ns;
                t.simulating_ns += local.simulating_ns;
                t.looks += local.looks;
                t.metrics_skipped += local.metrics_skipped;
                t.metrics_computed += local.metrics_computed;
            });
        }
    });
    let ends: Vec<RunEnd> = slots
        .into_iter()
        .map(|m| {
            m.into_inner()
                .unwrap_or_else(|p| p.into_inner())
                .expect("every job ran")
        })
        .collect();
    let results = opts
        .scenarios
        .iter()
        .enumerate()
        .map(|(s, sc)| ScenarioResult {
            scenario: sc.clone(),
            runs: (0..opts.sims).map(|r| ends[r * n_scenarios + s]).collect(),
        })
        .collect();
    (
        results,
        timing.into_inner().unwrap_or_else(|p| p.into_inner()),
    )
}

/// Share of runs with `ending`.
pub fn share(result: &ScenarioResult, ending: Ending) -> f64 {
    if result.runs.is_empty() {
        return 0.0;
    }
    result.runs.iter().filter(|r| r.ending == ending).count() as f64 / result.runs.len() as f64
}

/// The `q` quantile (nearest rank, 0 < q ≤ 1) of `xs`.
fn quantile(xs: &mut [f64], q: f64) -> Option<f64> {
    if xs.is_empty() {
        return None;
    }
    xs.sort_by(|a, b| a.total_cmp(b));
    let rank = ((q * xs.len() as f64).ceil() as usize).clamp(1, xs.len());
    Some(xs[rank - 1])
}

fn round_to(x: f64, digits: i32) -> f64 {
    let f = 10f64.powi(digits);
    (x * f).round() / f
}

/// The JSON of one scenario's result.
pub fn scenario_json(opts: &PlanOptions, result: &ScenarioResult) -> Value {
    let n = result.runs.len() as f64;
    let mut outcomes = serde_json::Map::new();
    for ending in Ending::ALL {
        let of: Vec<&RunEnd> = result.runs.iter().filter(|r| r.ending == ending).collect();
        let s = of.len() as f64 / n.max(1.0);
        let mut days: Vec<f64> = of.iter().map(|r| r.elapsed as f64 / DAY as f64).collect();
        let mut units: Vec<f64> = of.iter().map(|r| r.units as f64).collect();
        outcomes.insert(
            ending.as_str().into(),
            json!({
                "runs": of.len(),
                "share": s,
                "mc_standard_error": (s * (1.0 - s) / n.max(1.0)).sqrt(),
                "days_to_decision": {
                    "median": quantile(&mut days.clone(), 0.5).map(|x| round_to(x, 4)),
                    "p90": quantile(&mut days, 0.9).map(|x| round_to(x, 4)),
                },
                "units_to_decision": {
                    "median": quantile(&mut units.clone(), 0.5),
                    "p90": quantile(&mut units, 0.9),
                },
            }),
        );
    }
    let def = &opts.def;
    let loss: f64 = result.runs.iter().map(|r| r.loss).sum::<f64>() / n.max(1.0);
    let rates = true_rates(opts, &result.scenario);
    let rate_of = |f: &dyn Fn(&RunEnd) -> bool| {
        let s = result.runs.iter().filter(|r| f(r)).count() as f64 / n.max(1.0);
        json!({"share": s, "mc_standard_error": (s * (1.0 - s) / n.max(1.0)).sqrt()})
    };
    let wrong_ship = rate_of(&|r| r.wrong_ship);
    let false_harm = rate_of(&|r| r.false_harm);
    let mut alarm_days: Vec<f64> = result
        .runs
        .iter()
        .filter_map(|r| r.evidence_alarm.map(|(_, _, t)| t as f64 / DAY as f64))
        .collect();
    let evidence_false = rate_of(&|r| {
        r.evidence_alarm
            .is_some_and(|(m, v, _)| !truly_worse(def, &rates, m, v))
    });
    let flags = flags(opts, &wrong_ship, &false_harm);
    json!({
        "targets": {"false_harm": opts.max_false_harm, "wrong_ship": opts.max_wrong_ship},
        "wrong_ship": wrong_ship,
        "false_harm": false_harm,
        "flags": flags,
        "anytime_harm": {
            "rule": "harm_evidence",
            "alarm": rate_of(&|r| r.evidence_alarm.is_some()),
            "false_alarm": evidence_false,
            "days_to_alarm": {
                "median": quantile(&mut alarm_days.clone(), 0.5).map(|x| round_to(x, 4)),
                "p90": quantile(&mut alarm_days, 0.9).map(|x| round_to(x, 4)),
            },
            "followed_for_days": opts.days,
        },
        "guardrail_harm_incurred": def.rules.guardrails.iter().map(|&g| json!({
            "metric": def.metrics[g].name,
            "kind": def.metrics[g].kind.as_str(),
            "mean": guardrail_harm(opts, &rates, result, g),
        })).collect::<Vec<_>>(),
        "scenario": result.scenario.name,
        "effects": result.scenario.effects.iter().map(|e| json!({
            "variant": def.variants[e.variant].name,
            "metric": def.metrics[e.metric].name,
            "relative": e.relative,
        })).collect::<Vec<_>>(),
        "runs": result.runs.len(),
        "outcomes": outcomes,
        "expected_loss_incurred": loss,
        "mean_looks": result.runs.iter().map(|r| r.looks as f64).sum::<f64>() / n.max(1.0),
        "share_over_time": share_over_time(opts, result).into_iter().map(|(day, shares)| {
            let mut m = serde_json::Map::new();
            m.insert("day".into(), json!(day));
            for (e, s) in Ending::ALL.iter().zip(shares) {
                m.insert(e.as_str().into(), json!(s));
            }
            Value::Object(m)
        }).collect::<Vec<_>>(),
    })
}

/// Mean over runs of the guardrail harm the kept arm brings on guardrail `g`, in the metric's
/// own units: how much worse than the control its true rate is (0 when not worse).
fn guardrail_harm(
    opts: &PlanOptions,
    rates: &[Vec<f64>],
    result: &ScenarioResult,
    g: usize,
) -> f64 {
    let def = &opts.def;
    let n = result.runs.len().max(1) as f64;
    let c = rates[g][def.control];
    result
        .runs
        .iter()
        .map(|r| {
            let x = rates[g][r.kept];
            if higher_is_better(def, g) {
                (c - x).max(0.0)
            } else {
                (x - c).max(0.0)
            }
        })
        .sum::<f64>()
        / n
}

/// The targets a scenario's error rates exceed, each as one sentence.
fn flags(opts: &PlanOptions, wrong_ship: &Value, false_harm: &Value) -> Vec<String> {
    let mut out = Vec::new();
    let share = |v: &Value| v["share"].as_f64().unwrap_or(0.0);
    if share(false_harm) > opts.max_false_harm {
        out.push(format!(
            "false harm alerts in {:.1}% of runs exceed the target {:.1}%: raise harm.probability, lower harm_evidence.alpha, or look less often",
            share(false_harm) * 100.0,
            opts.max_false_harm * 100.0
        ));
    }
    if share(wrong_ship) > opts.max_wrong_ship {
        out.push(format!(
            "wrong-way ships in {:.1}% of runs exceed the target {:.1}%: lower the threshold of caring, raise min_duration_days, or tighten the guardrails' clearance",
            share(wrong_ship) * 100.0,
            opts.max_wrong_ship * 100.0
        ));
    }
    out
}

/// For each whole day of the plan (and its end), the share of runs that had reached each
/// decision by then; runs without a decision count as inconclusive at the end.
pub fn share_over_time(opts: &PlanOptions, result: &ScenarioResult) -> Vec<(f64, [f64; 6])> {
    let n = result.runs.len().max(1) as f64;
    let mut days: Vec<f64> = (1..=opts.days.floor() as u64).map(|d| d as f64).collect();
    if days.last().is_none_or(|d| *d < opts.days) {
        days.push(opts.days);
    }
    days.into_iter()
        .map(|day| {
            let t = (day * DAY as f64) as Micros;
            let mut shares = [0.0; 6];
            for r in &result.runs {
                // Runs still open at the end have elapsed == the plan's length, so they
                // count only at the last point.
                if r.elapsed <= t {
                    let i = Ending::ALL.iter().position(|e| *e == r.ending).unwrap_or(0);
                    shares[i] += 1.0 / n;
                }
            }
            (day, shares)
        })
        .collect()
}

/// A table of one scenario's result, for a person.
pub fn scenario_table(opts: &PlanOptions, result: &ScenarioResult) -> String {
    use std::fmt::Write;
    let v = scenario_json(opts, result);
    let mut out = String::new();
    let _ = writeln!(
        out,
        "scenario {} — {} runs",
        result.scenario.name,
        result.runs.len()
    );
    let _ = writeln!(
        out,
        "  {:<16} {:>7} {:>8}  {:>10} {:>10}  {:>11} {:>11}",
        "decision", "share", "± MC se", "median d", "p90 d", "median units", "p90 units"
    );
    let num = |x: &Value, d: usize| x.as_f64().map_or("—".to_string(), |x| format!("{x:.d$}"));
    for e in Ending::ALL {
        let o = &v["outcomes"][e.as_str()];
        let _ = writeln!(
            out,
            "  {:<16} {:>7.4} {:>8.4}  {:>10} {:>10}  {:>11} {:>11}",
            e.label(),
            o["share"].as_f64().unwrap_or(0.0),
            o["mc_standard_error"].as_f64().unwrap_or(0.0),
            num(&o["days_to_decision"]["median"], 2),
            num(&o["days_to_decision"]["p90"], 2),
            num(&o["units_to_decision"]["median"], 0),
            num(&o["units_to_decision"]["p90"], 0),
        );
    }
    let primary = &opts.def.metrics[opts.def.rules.primary];
    let _ = writeln!(
        out,
        "  expected loss incurred: {} on `{}` (best true arm minus the arm kept)",
        crate::decide::rate_difference_text(
            v["expected_loss_incurred"].as_f64().unwrap_or(0.0),
            primary.kind
        ),
        primary.name
    );
    for g in v["guardrail_harm_incurred"]
        .as_array()
        .into_iter()
        .flatten()
    {
        let kind = match g["kind"].as_str() {
            Some("conversion") => MetricKind::Conversion,
            _ => MetricKind::DefectRate(crate::experiment::ExposureBasis::Units),
        };
        let _ = writeln!(
            out,
            "  guardrail harm incurred on `{}`: {} (kept arm minus control where worse)",
            g["metric"].as_str().unwrap_or(""),
            crate::decide::rate_difference_text(g["mean"].as_f64().unwrap_or(0.0), kind),
        );
    }
    let rate = |x: &Value| {
        format!(
            "{:.4} ± {:.4}",
            x["share"].as_f64().unwrap_or(0.0),
            x["mc_standard_error"].as_f64().unwrap_or(0.0)
        )
    };
    let _ = writeln!(
        out,
        "  wrong-way ship {} (target ≤ {}); false harm alert {} (target ≤ {})",
        rate(&v["wrong_ship"]),
        opts.max_wrong_ship,
        rate(&v["false_harm"]),
        opts.max_false_harm
    );
    let a = &v["anytime_harm"];
    let _ = writeln!(
        out,
        "  anytime-valid harm rule (harm_evidence), followed for all {} days: alarm {}, of which false {}; median {} d, p90 {} d to the alarm",
        opts.days,
        rate(&a["alarm"]),
        rate(&a["false_alarm"]),
        num(&a["days_to_alarm"]["median"], 2),
        num(&a["days_to_alarm"]["p90"], 2),
    );
    for f in v["flags"].as_array().into_iter().flatten() {
        let _ = writeln!(out, "  ⚠ {}", f.as_str().unwrap_or(""));
    }
    out
}

/// What a sweep varies.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SweepKind {
    /// The primary metric's threshold of caring (target: A/A false ship share).
    ThresholdOfCaring,
    /// The harm probability on every metric (target: A/A harm alert share).
    HarmProbability,
}

/// One point of a sweep.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SweepPoint {
    /// The value tried.
    pub value: f64,
    /// A/A share of the targeted error at that value.
    pub error_share: f64,
    /// Its Monte Carlo standard error.
    pub standard_error: f64,
}

/// The values a sweep may try, loosest first: thresholds of caring from 8 times the configured
/// one down to 1/512 of it in half-octave steps; harm probabilities from 0.9 to 0.99999.
pub fn sweep_values(def: &ExperimentDef, kind: SweepKind) -> Result<Vec<f64>, PlanError> {
    match kind {
        SweepKind::ThresholdOfCaring => {
            let p = def.rules.primary;
            let t = def.metrics[p].rules.ship.map(|s| s.threshold_of_caring).ok_or_else(|| {
                usage(format!(
                    "--target-false-ship needs a ship rule on the primary metric `{}` (rules.ship.threshold_of_caring) to sweep around",
                    def.metrics[p].name
                ))
            })?;
            Ok((0..=24)
                .map(|i| 8.0 * t * 2f64.powf(-(i as f64) / 2.0))
                .collect())
        }
        SweepKind::HarmProbability => Ok(vec![
            0.9, 0.95, 0.975, 0.99, 0.995, 0.999, 0.9995, 0.9999, 0.99999,
        ]),
    }
}

/// Run the A/A scenario for each sweep value, loosest first, until one meets `target`
/// (tighter values only make the error rarer, up to Monte Carlo noise); the same random
/// streams serve every value, so the comparison between values is not blurred by different
/// draws.
pub fn sweep(
    opts: &PlanOptions,
    kind: SweepKind,
    target: f64,
    progress: &dyn Progress,
) -> Result<Vec<SweepPoint>, PlanError> {
    let values = sweep_values(&opts.def, kind)?;
    let mut points = Vec::new();
    for value in values {
        let mut def = (*opts.def).clone();
        match kind {
            SweepKind::ThresholdOfCaring => {
                let p = def.rules.primary;
                if let Some(s) = &mut def.metrics[p].rules.ship {
                    s.threshold_of_caring = value;
                }
            }
            SweepKind::HarmProbability => {
                for m in &mut def.metrics {
                    if let Some(h) = &mut m.rules.harm {
                        h.probability = value;
                    }
                }
            }
        }
        let o = PlanOptions {
            def: Arc::new(def),
            scenarios: vec![opts.scenarios[0].clone()],
            ..opts.clone()
        };
        let (results, _) = run(&o, progress);
        let error = match kind {
            SweepKind::ThresholdOfCaring => Ending::FalseShip,
            SweepKind::HarmProbability => Ending::Harm,
        };
        let s = share(&results[0], error);
        let n = results[0].runs.len().max(1) as f64;
        points.push(SweepPoint {
            value,
            error_share: s,
            standard_error: (s * (1.0 - s) / n).sqrt(),
        });
        if s <= target {
            break;
        }
    }
    Ok(points)
}

/// The loosest value meeting `target`: the largest threshold of caring, or the smallest harm
/// probability, whose A/A error share is at most `target`.
pub fn recommend(points: &[SweepPoint], kind: SweepKind, target: f64) -> Option<f64> {
    let ok = points
        .iter()
        .filter(|p| p.error_share <= target)
        .map(|p| p.value);
    match kind {
        SweepKind::ThresholdOfCaring => {
            ok.fold(None, |a: Option<f64>, v| Some(a.map_or(v, |a| a.max(v))))
        }
        SweepKind::HarmProbability => {
            ok.fold(None, |a: Option<f64>, v| Some(a.map_or(v, |a| a.min(v))))
        }
    }
}

/// An SVG plot of the share of runs decided over time, one panel per scenario.
pub fn svg(opts: &PlanOptions, results: &[ScenarioResult]) -> Result<String, String> {
    use plotters::prelude::*;
    let mut out = String::new();
    {
        let height = 300 * results.len().max(1) as u32;
        let root = SVGBackend::with_string(&mut out, (720, height)).into_drawing_area();
        root.fill(&WHITE).map_err(|e| e.to_string())?;
        let panels = root.split_evenly((results.len().max(1), 1));
        let colors = [RED, GREEN, BLUE, MAGENTA, CYAN, BLACK];
        for (panel, result) in panels.iter().zip(results) {
            let mut chart = ChartBuilder::on(panel)
                .caption(
                    format!("{} — share of runs decided by day", result.scenario.name),
                    ("sans-serif", 16),
                )
                .margin(10)
                .x_label_area_size(30)
                .y_label_area_size(40)
                .build_cartesian_2d(0f64..opts.days, 0f64..1f64)
                .map_err(|e| e.to_string())?;
            chart
                .configure_mesh()
                .x_desc("days")
                .y_desc("share")
                .draw()
                .map_err(|e| e.to_string())?;
            let series = share_over_time(opts, result);
            for (i, ending) in Ending::ALL.iter().enumerate() {
                let color = colors[i];
                // Steps, not ramps: the shares are known at the end of each day only.
                let mut points = vec![(0.0, 0.0)];
                let mut last = 0.0;
                for (d, s) in &series {
                    points.push((*d, last));
                    points.push((*d, s[i]));
                    last = s[i];
                }
                chart
                    .draw_series(LineSeries::new(points, color.stroke_width(2)))
                    .map_err(|e| e.to_string())?
                    .label(ending.label())
                    .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 16, y)], color));
            }
            chart
                .configure_series_labels()
                .background_style(WHITE.mix(0.8))
                .border_style(BLACK)
                .position(SeriesLabelPosition::UpperLeft)
                .draw()
                .map_err(|e| e.to_string())?;
        }
        root.present().map_err(|e| e.to_string())?;
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::experiment::{ExperimentRules, MetricDef, MetricRules, Prior, VariantDef};

    fn def() -> ExperimentDef {
        ExperimentDef {
            generation: 0,
            id: "orchard-tour".into(),
            control: 0,
            variants: ["control", "tour"]
                .iter()
                .map(|n| VariantDef {
                    name: n.to_string(),
                    weight: 0.5,
                })
                .collect(),
            metrics: vec![MetricDef {
                name: "first-planting".into(),
                kind: MetricKind::Conversion,
                prior: Prior::Beta {
                    alpha: 1.0,
                    beta: 1.0,
                },
                variant_priors: vec![None, None],
                rules: MetricRules::default(),
            }],
            rules: ExperimentRules::default(),
        }
    }

    #[test]
    fn effects_and_baselines_parse_with_their_errors_named() {
        let d = def();
        let e = parse_effect(&d, "tour=+5%").unwrap();
        assert_eq!((e.variant, e.metric), (1, 0));
        assert!((e.relative - 0.05).abs() < 1e-15);
        assert!(
            (parse_effect(&d, "tour:first-planting=-0.1")
                .unwrap()
                .relative
                + 0.1)
                .abs()
                < 1e-15
        );
        for (bad, says) in [
            ("tour", "expected VARIANT=+X%"),
            ("hedge=+5%", "no variant `hedge`"),
            ("control=+5%", "is the control"),
            ("tour:height=+5%", "no metric `height`"),
            ("tour=lots", "not a number"),
            ("tour=-150%", "above -100%"),
        ] {
            let msg = parse_effect(&d, bad).unwrap_err().to_string();
            assert!(msg.contains(says), "{bad}: {msg}");
        }
        assert_eq!(
            parse_baselines(&d, &["first-planting=0.2".into()]).unwrap(),
            vec![0.2]
        );
        let msg = parse_baselines(&d, &[]).unwrap_err().to_string();
        assert!(msg.contains("--baseline first-planting=RATE"), "{msg}");
        let msg = parse_baselines(&d, &["first-planting=1.5".into()])
            .unwrap_err()
            .to_string();
        assert!(msg.contains("(0, 1)"), "{msg}");
    }

    #[test]
    fn the_recommendation_is_the_loosest_value_meeting_the_target() {
        let pts = |v: &[(f64, f64)]| -> Vec<SweepPoint> {
            v.iter()
                .map(|&(value, error_share)| SweepPoint {
                    value,
                    error_share,
                    standard_error: 0.0,
                })
                .collect()
        };
        let ship = pts(&[(0.004, 0.2), (0.002, 0.08), (0.001, 0.03), (0.0005, 0.01)]);
        assert_eq!(
            recommend(&ship, SweepKind::ThresholdOfCaring, 0.05),
            Some(0.001)
        );
        assert_eq!(recommend(&ship, SweepKind::ThresholdOfCaring, 0.001), None);
        let harm = pts(&[(0.95, 0.3), (0.99, 0.08), (0.999, 0.01)]);
        assert_eq!(
            recommend(&harm, SweepKind::HarmProbability, 0.1),
            Some(0.99)
        );
    }

    #[test]
    fn per_run_seeds_differ_between_runs_and_scenarios() {
        let seeds: std::collections::HashSet<u64> = (0..3)
            .flat_map(|s| (0..1000).map(move |r| run_seed(7, s, r)))
            .collect();
        assert_eq!(seeds.len(), 3000);
    }

    /// The look-to-look bound must not change a single decision: whole simulated runs, with
    /// the exact path at every look against the screened one, over A/A, a harmful and a
    /// helpful variant, on a conversion metric (harm at 0.99, equivalence on the primary) and
    /// a defect-rate guardrail with a harm margin.
    #[test]
    fn screened_runs_end_exactly_like_runs_computed_at_every_look() {
        let mut d = def();
        d.metrics[0].rules.harm = Some(crate::experiment::HarmRule {
            probability: 0.99,
            margin: 0.0,
        });
        d.metrics.push(MetricDef {
            name: "wilted-seedlings".into(),
            kind: MetricKind::DefectRate(crate::experiment::ExposureBasis::Units),
            prior: Prior::Gamma {
                shape: 1.0,
                rate: 1.0,
            },
            variant_priors: vec![None, None],
            rules: MetricRules {
                harm: Some(crate::experiment::HarmRule {
                    probability: 0.95,
                    margin: 0.1,
                }),
                ..MetricRules::default()
            },
        });
        d.rules.guardrails = vec![1];
        let aa = Scenario {
            name: "A/A".into(),
            effects: Vec::new(),
        };
        let effect = |metric: usize, relative: f64| Scenario {
            name: format!("{relative}"),
            effects: vec![Effect {
                variant: 1,
                metric,
                relative,
            }],
        };
        let opts = PlanOptions {
            def: Arc::new(d),
            cadence: crate::state::cadence::Cadence::new(HOUR, 100_000_000),
            hold_down: 0,
            sims: 3,
            seed: 11,
            units_per_day: 4000.0,
            days: 6.0,
            step: HOUR,
            single_look: false,
            baselines: vec![0.05, 0.02],
            scenarios: vec![aa, effect(0, -0.2), effect(0, 0.1), effect(1, 0.5)],
            threads: 1,
            max_false_harm: 0.05,
            max_wrong_ship: 0.05,
        };
        let mut skipped = 0;
        for s in 0..opts.scenarios.len() {
            for r in 0..opts.sims {
                let mut exact = Timing::default();
                let mut screened = Timing::default();
                let a = simulate_run_with(&opts, s, r, &mut exact, false);
                let b = simulate_run_with(&opts, s, r, &mut screened, true);
                assert_eq!(a, b, "scenario {s}, run {r}");
                skipped += screened.metrics_skipped;
            }
        }
        // The bound must also be doing something, or this test proves nothing.
        assert!(skipped > 100, "only {skipped} metric evaluations skipped");

        // With a ship rule the primary metric and the guardrail are computed at every look
        // (a guardrail left out would block shipping); a second, non-guardrail metric with a
        // harm rule may still be skipped.
        let mut d = (*opts.def).clone();
        d.metrics[0].rules.ship = Some(crate::experiment::ShipRule {
            threshold_of_caring: 0.002,
        });
        d.rules.min_duration = 0;
        let mut third = d.metrics[1].clone();
        third.name = "returned-pots".into();
        d.metrics.push(third);
        let ship_opts = PlanOptions {
            def: Arc::new(d),
            baselines: vec![0.05, 0.02, 0.01],
            scenarios: vec![opts.scenarios[0].clone(), effect(0, 0.3), effect(1, 0.5)],
            ..opts.clone()
        };
        let mut skipped = 0;
        for s in 0..ship_opts.scenarios.len() {
            for r in 0..ship_opts.sims {
                let mut exact = Timing::default();
                let mut screened = Timing::default();
                let a = simulate_run_with(&ship_opts, s, r, &mut exact, false);
                let b = simulate_run_with(&ship_opts, s, r, &mut screened, true);
                assert_eq!(a, b, "with a ship rule: scenario {s}, run {r}");
                skipped += screened.metrics_skipped;
                assert!(screened.metrics_computed >= 2 * screened.looks);
            }
        }
        assert!(skipped > 10, "only {skipped} metric evaluations skipped");
    }

    #[test]
    fn quantiles_are_nearest_rank() {
        let mut xs = vec![5.0, 1.0, 4.0, 2.0, 3.0];
        assert_eq!(quantile(&mut xs, 0.5), Some(3.0));
        assert_eq!(quantile(&mut xs, 0.9), Some(5.0));
        assert_eq!(quantile(&mut [], 0.5), None);
    }
}
