//! The history of decision quantities: per experiment × metric a bounded time series of every
//! arm's posterior summary and decision quantities, recorded at each evaluation, plus a bounded
//! log of when each stopping rule started and stopped holding. Pure: the caller passes the time.
//!
//! # Memory bound and downsampling
//! Each metric's series holds at most [`capacity`] points, a number chosen from a fixed
//! budget of [`ARM_POINT_BUDGET`] arm-points per experiment (so a 2-arm, 1-metric experiment
//! keeps more points than a 64-arm one). When a series is full, the older half is thinned by
//! merging adjacent pairs: the pair becomes one point that keeps the later evaluation's
//! numbers and remembers the time its span began (`since`) and how many evaluations it stands
//! for (`covers`). The newer half is never touched, so the latest points stay exact while older
//! ones lose resolution geometrically (a point in the oldest quarter may stand for many
//! evaluations). Every stored point is a real evaluation; nothing is averaged, because an
//! average of two credible intervals is not a credible interval of anything.
//!
//! Evaluations that saw no new event since the previous point of the experiment are not
//! recorded (the numbers would repeat), so an idle experiment does not thin its own history;
//! nor are evaluations before the experiment's first event (they would show only the prior).

use std::collections::{HashMap, VecDeque};

use crate::decide::{Finding, Rule};
use crate::event::Micros;
use crate::summary::ExperimentSummary;

/// Arm-points (one arm's numbers at one evaluation) each experiment may keep across all its
/// metrics; at 112 bytes an arm-point this is about 230 KiB per experiment once full, except
/// where [`MIN_CAPACITY`] overrides it for very wide experiments. Sized so that a deployment
/// watching thousands of experiments keeps its history in a few hundred MiB to a few GiB
/// (docs/operations.md, Sizing), while a chart still gets up to 256 points per series.
pub const ARM_POINT_BUDGET: usize = 2048;
/// Fewest points a series keeps, however many arms and metrics the experiment has.
pub const MIN_CAPACITY: usize = 32;
/// Most points a series keeps.
pub const MAX_CAPACITY: usize = 256;
/// Rule transitions kept per experiment (the oldest are dropped first).
pub const MAX_TRANSITIONS: usize = 256;

/// Points per metric series for an experiment with `metrics` metrics and `variants` arms:
/// `clamp(ARM_POINT_BUDGET / (metrics × variants), MIN_CAPACITY, MAX_CAPACITY)`, rounded down
/// to an even number so the older half splits into pairs.
pub fn capacity(metrics: usize, variants: usize) -> usize {
    capacity_within(ARM_POINT_BUDGET, metrics, variants)
}

/// [`capacity`] under a budget of `budget` arm-points per experiment (`[history] arm_points`).
pub fn capacity_within(budget: usize, metrics: usize, variants: usize) -> usize {
    let per = budget / (metrics * variants).max(1);
    per.clamp(MIN_CAPACITY, MAX_CAPACITY) & !1
}

/// One arm at one evaluation.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ArmPoint {
    /// Exposed units.
    pub units: u64,
    /// Posterior mean of the rate.
    pub mean: f64,
    /// Credible interval of the rate (lower, upper).
    pub interval: (f64, f64),
    /// Probability of being the best arm.
    pub prob_best: f64,
    /// Expected loss of shipping this arm, in rate units.
    pub expected_loss: f64,
    /// Probability of being better than the control (`None` for the control).
    pub prob_better_than_control: Option<f64>,
    /// Relative lift against the control: mean, interval lower, interval upper (`None` for
    /// the control).
    pub lift: Option<(f64, f64, f64)>,
    /// Probability of harm against the control (`None` for the control).
    pub prob_harm: Option<f64>,
}

/// One metric at one evaluation (possibly standing for several merged evaluations).
#[derive(Debug, Clone, PartialEq)]
pub struct Point {
    /// When the evaluation whose numbers this point keeps ran.
    pub at: Micros,
    /// Start of the span of evaluations this point stands for (`== at` when `covers == 1`).
    pub since: Micros,
    /// How many evaluations this point stands for.
    pub covers: u32,
    /// Every arm, in variant order.
    pub arms: Vec<ArmPoint>,
}

/// Whether a rule began or stopped holding.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Change {
    /// The rule holds now and did not at the previous evaluation.
    Holds,
    /// The rule held at the previous evaluation and does not now.
    Ends,
}

impl Change {
    /// Stable name used in the API.
    pub fn as_str(self) -> &'static str {
        match self {
            Change::Holds => "holds",
            Change::Ends => "ends",
        }
    }
}

/// What a rule is about: the rule, and its metric and variant indices if any.
pub type RuleKey = (Rule, Option<usize>, Option<usize>);

/// A rule starting or stopping to hold.
#[derive(Debug, Clone, PartialEq)]
pub struct Transition {
    /// When the evaluation that saw the change ran.
    pub at: Micros,
    /// Began or stopped holding.
    pub change: Change,
    /// Which rule, on which metric and variant.
    pub key: RuleKey,
    /// The value compared when the rule began to hold, or the last value it held with.
    pub value: f64,
    /// Its threshold.
    pub threshold: f64,
}

/// Experiment-wide numbers at one evaluation, for the data-quality plots.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct QualityPoint {
    /// When.
    pub at: Micros,
    /// Sample-ratio p-value, when there were units.
    pub sample_ratio_p: Option<f64>,
    /// Crossover and orphan events so far.
    pub crossovers: u64,
    /// Orphan events so far.
    pub orphans: u64,
}

/// The history of one experiment.
#[derive(Debug, Clone)]
pub struct ExperimentHistory {
    /// Metric names, in definition order, when the history began (a redefinition with other
    /// metrics or variants starts a new history).
    metrics: Vec<String>,
    variants: Vec<String>,
    capacity: usize,
    series: Vec<Vec<Point>>,
    quality: Vec<QualityPoint>,
    evaluations: u64,
    last_events: Option<u64>,
    holding: HashMap<RuleKey, (f64, f64)>,
    transitions: VecDeque<Transition>,
}

impl ExperimentHistory {
    fn new(budget: usize, metrics: Vec<String>, variants: Vec<String>) -> ExperimentHistory {
        let capacity = capacity_within(budget, metrics.len(), variants.len());
        ExperimentHistory {
            series: vec![Vec::new(); metrics.len()],
            metrics,
            variants,
            capacity,
            quality: Vec::new(),
            evaluations: 0,
            last_events: None,
            holding: HashMap::new(),
            transitions: VecDeque::new(),
        }
    }

    /// Points per series before the older half is thinned.
    pub fn capacity(&self) -> usize {
        self.capacity
    }

    /// Evaluations recorded (including those merged into other points).
    pub fn evaluations(&self) -> u64 {
        self.evaluations
    }

    /// The series of metric `name`, oldest first; `None` for a metric the history lacks.
    pub fn series(&self, name: &str) -> Option<&[Point]> {
        let i = self.metrics.iter().position(|m| m == name)?;
        Some(&self.series[i])
    }

    /// Metric names, in definition order.
    pub fn metrics(&self) -> &[String] {
        &self.metrics
    }

    /// Variant names, in definition order.
    pub fn variants(&self) -> &[String] {
        &self.variants
    }

    /// Data-quality numbers over time, oldest first (thinned like the series).
    pub fn quality(&self) -> &[QualityPoint] {
        &self.quality
    }

    /// Rule transitions, oldest first (at most [`MAX_TRANSITIONS`]).
    pub fn transitions(&self) -> impl Iterator<Item = &Transition> {
        self.transitions.iter()
    }

    /// The rules holding at the latest evaluation, with value and threshold.
    pub fn holding(&self) -> impl Iterator<Item = (&RuleKey, &(f64, f64))> {
        self.holding.iter()
    }

    fn record_transitions(&mut self, findings: &[Finding], at: Micros) {
        let now: HashMap<RuleKey, (f64, f64)> = findings
            .iter()
            .map(|f| ((f.rule, f.metric, f.variant), (f.value, f.threshold)))
            .collect();
        let mut changes: Vec<Transition> = Vec::new();
        for (key, &(value, threshold)) in &now {
            if !self.holding.contains_key(key) {
                changes.push(Transition {
                    at,
                    change: Change::Holds,
                    key: *key,
                    value,
                    threshold,
                });
            }
        }
        for (key, &(value, threshold)) in &self.holding {
            if !now.contains_key(key) {
                changes.push(Transition {
                    at,
                    change: Change::Ends,
                    key: *key,
                    value,
                    threshold,
                });
            }
        }
        // A stable order within one evaluation, so the log reads the same every time.
        changes.sort_by(|a, b| {
            a.key
                .cmp(&b.key)
                .then((a.change as u8).cmp(&(b.change as u8)))
        });
        for c in changes {
            if self.transitions.len() == MAX_TRANSITIONS {
                self.transitions.pop_front();
            }
            self.transitions.push_back(c);
        }
        self.holding = now;
    }
}

/// Everything an [`ExperimentHistory`] holds, as plain data (for the history file).
#[derive(Debug, Clone, PartialEq)]
pub struct HistoryParts {
    /// Metric names, in definition order.
    pub metrics: Vec<String>,
    /// Variant names, in definition order.
    pub variants: Vec<String>,
    /// One series per metric.
    pub series: Vec<Vec<Point>>,
    /// Data-quality numbers over time.
    pub quality: Vec<QualityPoint>,
    /// Evaluations recorded.
    pub evaluations: u64,
    /// Valid events the experiment had seen at its latest point.
    pub last_events: Option<u64>,
    /// Rules holding at the latest evaluation, with value and threshold.
    pub holding: Vec<(RuleKey, (f64, f64))>,
    /// Rule transitions, oldest first.
    pub transitions: Vec<Transition>,
}

/// Why stored parts cannot become a history.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum PartsError {
    /// The series do not match the metrics, or a point's arms the variants.
    #[error("{0}")]
    Shape(String),
}

impl ExperimentHistory {
    /// The history as plain data.
    pub fn to_parts(&self) -> HistoryParts {
        let mut holding: Vec<(RuleKey, (f64, f64))> =
            self.holding.iter().map(|(k, v)| (*k, *v)).collect();
        holding.sort_by_key(|a| a.0);
        HistoryParts {
            metrics: self.metrics.clone(),
            variants: self.variants.clone(),
            series: self.series.clone(),
            quality: self.quality.clone(),
            evaluations: self.evaluations,
            last_events: self.last_events,
            holding,
            transitions: self.transitions.iter().cloned().collect(),
        }
    }

    /// A history from plain data, checked for shape and time order. A series longer than the
    /// capacity for its shape is thinned by the usual scheme, so a file written under larger
    /// limits still fits the bound.
    pub fn from_parts(p: HistoryParts) -> Result<ExperimentHistory, PartsError> {
        Self::from_parts_within(ARM_POINT_BUDGET, p)
    }

    /// [`ExperimentHistory::from_parts`] under a budget of `budget` arm-points.
    pub fn from_parts_within(
        budget: usize,
        p: HistoryParts,
    ) -> Result<ExperimentHistory, PartsError> {
        if p.series.len() != p.metrics.len() {
            return Err(PartsError::Shape(format!(
                "{} series for {} metrics",
                p.series.len(),
                p.metrics.len()
            )));
        }
        let n = p.variants.len();
        for s in &p.series {
            if let Some(bad) = s.iter().find(|pt| pt.arms.len() != n) {
                return Err(PartsError::Shape(format!(
                    "a point has {} arms for {n} variants",
                    bad.arms.len()
                )));
            }
            if !s
                .windows(2)
                .all(|w| w[0].at <= w[1].since && w[1].since <= w[1].at)
            {
                return Err(PartsError::Shape("points are not in time order".into()));
            }
        }
        let mut h = ExperimentHistory::new(budget, p.metrics, p.variants);
        let cap = h.capacity;
        for (slot, series) in h.series.iter_mut().zip(p.series) {
            for point in series {
                push_bounded(slot, point, cap, merge_points);
            }
        }
        for q in p.quality {
            push_bounded(&mut h.quality, q, cap, |_, b| b);
        }
        h.evaluations = p.evaluations;
        h.last_events = p.last_events;
        h.holding = p.holding.into_iter().collect();
        let skip = p.transitions.len().saturating_sub(MAX_TRANSITIONS);
        h.transitions = p.transitions.into_iter().skip(skip).collect();
        Ok(h)
    }
}

/// Thin the older half of `points` by merging adjacent pairs when it is full.
fn push_bounded<T>(points: &mut Vec<T>, point: T, capacity: usize, merge: impl Fn(T, T) -> T) {
    if points.len() >= capacity {
        let half = capacity / 2;
        let older: Vec<T> = points.drain(..half).collect();
        let mut merged = Vec::with_capacity(half / 2 + 1);
        let mut it = older.into_iter();
        while let Some(a) = it.next() {
            match it.next() {
                Some(b) => merged.push(merge(a, b)),
                None => merged.push(a),
            }
        }
        points.splice(0..0, merged);
    }
    points.push(point);
}

fn merge_points(a: Point, b: Point) -> Point {
    Point {
        since: a.since,
        covers: a.covers.saturating_add(b.covers),
        ..b
    }
}

/// The histories of all experiments, by id.
#[derive(Debug, Clone)]
pub struct History {
    experiments: HashMap<String, ExperimentHistory>,
    /// Arm-points each experiment may keep.
    budget: usize,
}

impl Default for History {
    fn default() -> History {
        History::with_budget(ARM_POINT_BUDGET)
    }
}

impl History {
    /// An empty history with the default budget.
    pub fn new() -> History {
        History::default()
    }

    /// An empty history keeping at most `budget` arm-points per experiment (at least
    /// [`MIN_CAPACITY`] points per series whatever the budget).
    pub fn with_budget(budget: usize) -> History {
        History {
            experiments: HashMap::new(),
            budget,
        }
    }

    /// Arm-points each experiment may keep.
    pub fn budget(&self) -> usize {
        self.budget
    }

    /// A history of `def`'s shape with nothing recorded.
    pub fn empty_for(&self, def: &crate::experiment::ExperimentDef) -> ExperimentHistory {
        ExperimentHistory::new(
            self.budget,
            def.metrics.iter().map(|m| m.name.clone()).collect(),
            def.variants.iter().map(|v| v.name.clone()).collect(),
        )
    }

    /// Put back the stored history of experiment `id` (at start-up).
    pub fn insert(&mut self, id: String, h: ExperimentHistory) {
        self.experiments.insert(id, h);
    }

    /// The history of experiment `id`, if it was ever evaluated.
    pub fn experiment(&self, id: &str) -> Option<&ExperimentHistory> {
        self.experiments.get(id)
    }

    /// Record one evaluation of `summary`'s experiment at `at`: every metric's arms (when its
    /// posteriors could be computed) and the rules that hold (`findings`). Points are skipped
    /// when no event reached the experiment since its previous point, or ever.
    pub fn record(&mut self, summary: &ExperimentSummary, findings: &[Finding], at: Micros) {
        let snap = &summary.snapshot;
        let def = &snap.def;
        let metrics: Vec<String> = def.metrics.iter().map(|m| m.name.clone()).collect();
        let variants: Vec<String> = def.variants.iter().map(|v| v.name.clone()).collect();
        let budget = self.budget;
        let h = self
            .experiments
            .entry(def.id.clone())
            .or_insert_with(|| ExperimentHistory::new(budget, metrics.clone(), variants.clone()));
        if h.metrics != metrics || h.variants != variants {
            // Points of another shape cannot be plotted against the new arms.
            *h = ExperimentHistory::new(budget, metrics, variants);
        }
        h.record_transitions(findings, at);
        let events: u64 = snap.outcomes.0.iter().sum();
        if events == 0 || h.last_events == Some(events) {
            return;
        }
        h.last_events = Some(events);
        h.evaluations += 1;
        let capacity = h.capacity;
        for (series, ms) in h.series.iter_mut().zip(&summary.metrics) {
            let Ok(arms) = &ms.arms else { continue };
            let point = Point {
                at,
                since: at,
                covers: 1,
                arms: arms
                    .iter()
                    .zip(&snap.units)
                    .map(|(a, &units)| ArmPoint {
                        units,
                        mean: a.mean,
                        interval: (a.interval.lower, a.interval.upper),
                        prob_best: a.prob_best,
                        expected_loss: a.expected_loss,
                        prob_better_than_control: a.prob_better_than_control,
                        lift: a.lift.map(|l| (l.mean, l.interval.lower, l.interval.upper)),
                        prob_harm: a.prob_harm,
                    })
                    .collect(),
            };
            push_bounded(series, point, capacity, merge_points);
        }
        let quality = QualityPoint {
            at,
            sample_ratio_p: summary
                .sample_ratio
                .as_ref()
                .and_then(|r| r.as_ref().ok())
                .map(|s| s.p_value),
            crossovers: snap.outcomes.get(crate::event::Outcome::Crossover),
            orphans: snap.outcomes.get(crate::event::Outcome::Orphan),
        };
        push_bounded(&mut h.quality, quality, capacity, |_, b| b);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn capacity_follows_the_budget_within_its_bounds() {
        assert_eq!(capacity(1, 2), MAX_CAPACITY);
        assert_eq!(capacity(4, 8), 64);
        assert_eq!(capacity(24, 64), MIN_CAPACITY);
        for m in 1..=24 {
            for v in 2..=64 {
                let c = capacity(m, v);
                assert!(c % 2 == 0 && (MIN_CAPACITY..=MAX_CAPACITY).contains(&c));
                assert!(c * m * v <= ARM_POINT_BUDGET || c == MIN_CAPACITY);
            }
        }
    }

    #[test]
    fn a_configured_budget_sets_the_capacity() {
        assert_eq!(capacity_within(64, 1, 2), MIN_CAPACITY);
        assert_eq!(capacity_within(8192, 1, 2), MAX_CAPACITY);
        assert_eq!(capacity_within(1024, 2, 4), 128);
        let h = History::with_budget(1024);
        assert_eq!(h.empty_for(&def(&["a", "b", "c", "d"])).capacity(), 256);
    }

    #[test]
    fn the_budget_is_a_quarter_mebibyte() {
        assert!(std::mem::size_of::<ArmPoint>() * ARM_POINT_BUDGET <= 1 << 18);
    }

    fn point(at: Micros) -> Point {
        Point {
            at,
            since: at,
            covers: 1,
            arms: Vec::new(),
        }
    }

    #[test]
    fn a_series_never_exceeds_its_capacity_and_keeps_the_latest_points_exact() {
        let cap = 32;
        let mut s: Vec<Point> = Vec::new();
        for t in 0..10_000 {
            push_bounded(&mut s, point(t), cap, merge_points);
            assert!(s.len() <= cap);
            // Time order is kept and every evaluation is accounted for exactly once.
            assert!(s
                .windows(2)
                .all(|w| w[0].at < w[1].at && w[0].at < w[1].since));
            assert_eq!(s.iter().map(|p| p.covers as i64).sum::<i64>(), t + 1);
            assert_eq!(s[0].since, 0);
            // Spans tile the timeline: each begins right after the previous one ends.
            assert!(s.windows(2).all(|w| w[1].since == w[0].at + 1));
        }
        // The newest half was never merged.
        let tail = &s[s.len() - cap / 2..];
        assert!(tail.iter().all(|p| p.covers == 1));
        assert_eq!(s.last().unwrap().at, 9_999);
        // Older points stand for more evaluations than newer ones (graceful degradation).
        assert!(s.windows(2).all(|w| w[0].covers >= w[1].covers));
    }

    use std::sync::Arc;

    use crate::experiment::{
        ExperimentDef, ExperimentRules, MetricDef, MetricKind, Prior, VariantDef,
    };
    use crate::state::{ConversionTotals, ExperimentSnapshot, MetricTotals, OutcomeCounts};

    fn def(variants: &[&str]) -> Arc<ExperimentDef> {
        Arc::new(ExperimentDef {
            id: "orchard-bulb-packets".into(),
            generation: 0,
            control: 0,
            variants: variants
                .iter()
                .map(|n| VariantDef {
                    name: n.to_string(),
                    weight: 1.0 / variants.len() as f64,
                })
                .collect(),
            metrics: vec![MetricDef {
                name: "sign-up".into(),
                kind: MetricKind::Conversion,
                prior: Prior::Beta {
                    alpha: 1.0,
                    beta: 1.0,
                },
                variant_priors: vec![None; variants.len()],
                rules: Default::default(),
            }],
            rules: ExperimentRules::default(),
        })
    }

    fn summary(def: &Arc<ExperimentDef>, units: u64) -> ExperimentSummary {
        let n = def.variants.len();
        let mut outcomes = OutcomeCounts::default();
        outcomes.0[0] = units * n as u64;
        crate::summary::summarize(
            ExperimentSnapshot {
                def: Arc::clone(def),
                units: vec![units; n],
                metrics: vec![MetricTotals::Conversion(
                    (0..n)
                        .map(|i| ConversionTotals {
                            trials: units,
                            successes: units / (4 + i as u64),
                        })
                        .collect(),
                )],
                outcomes,
                last_event_time: None,
                first_event_time: None,
                positions: Vec::new(),
            },
            0.95,
        )
    }

    fn finding(rule: Rule, variant: usize, value: f64) -> Finding {
        Finding {
            rule,
            metric: Some(0),
            variant: Some(variant),
            value,
            threshold: 0.95,
            test: rule.test(),
            message: String::new(),
            evidence: Default::default(),
        }
    }

    #[test]
    fn record_keeps_points_with_new_data_and_logs_rule_transitions() {
        let d = def(&["control", "bigger-photos"]);
        let mut h = History::new();
        h.record(&summary(&d, 0), &[], 1);
        assert!(h
            .experiment(&d.id)
            .unwrap()
            .series("sign-up")
            .unwrap()
            .is_empty());
        let s = summary(&d, 400);
        h.record(&s, &[], 2);
        h.record(&s, &[finding(Rule::Harm, 1, 0.97)], 3);
        h.record(&summary(&d, 800), &[], 4);
        let e = h.experiment(&d.id).unwrap();
        let pts = e.series("sign-up").unwrap();
        // The idle evaluation at 3 added no point, but its finding was logged.
        assert_eq!(pts.iter().map(|p| p.at).collect::<Vec<_>>(), vec![2, 4]);
        assert_eq!(e.evaluations(), 2);
        let arms = s.metrics[0].arms.as_ref().unwrap();
        assert_eq!(pts[0].arms[1].mean, arms[1].mean);
        assert_eq!(pts[0].arms[1].prob_best, arms[1].prob_best);
        assert_eq!(pts[0].arms[1].units, 400);
        assert!(pts[0].arms[0].lift.is_none() && pts[0].arms[1].lift.is_some());
        let t: Vec<(Micros, Change, f64)> =
            e.transitions().map(|t| (t.at, t.change, t.value)).collect();
        assert_eq!(t, vec![(3, Change::Holds, 0.97), (4, Change::Ends, 0.97)]);
        assert_eq!(e.holding().count(), 0);
        assert_eq!(e.quality().len(), 2);
        assert!(e.series("refund").is_none());
        // A redefinition with other arms starts over.
        let d3 = def(&["control", "bigger-photos", "video"]);
        h.record(&summary(&d3, 100), &[], 5);
        let e = h.experiment(&d.id).unwrap();
        assert_eq!(e.variants().len(), 3);
        assert_eq!(e.series("sign-up").unwrap().len(), 1);
    }

    #[test]
    fn parts_round_trip_and_bad_shapes_are_refused() {
        let d = def(&["control", "bigger-photos"]);
        let mut h = History::new();
        for t in 0..700 {
            let f = if t > 600 {
                vec![finding(Rule::Harm, 1, 0.99)]
            } else {
                vec![]
            };
            h.record(&summary(&d, 10 + t as u64), &f, t);
        }
        let e = h.experiment(&d.id).unwrap();
        let parts = e.to_parts();
        let back = ExperimentHistory::from_parts(parts.clone()).unwrap();
        assert_eq!(back.to_parts(), parts);
        let mut bad = parts.clone();
        bad.series[0][3].arms.pop();
        assert!(ExperimentHistory::from_parts(bad).is_err());
        let mut bad = parts.clone();
        bad.series[0].swap(1, 2);
        assert!(ExperimentHistory::from_parts(bad).is_err());
        let mut bad = parts;
        bad.metrics.push("refund".into());
        assert!(ExperimentHistory::from_parts(bad).is_err());
    }

    #[test]
    fn the_transition_log_is_bounded() {
        let d = def(&["control", "bigger-photos"]);
        let mut h = History::new();
        for t in 0..(MAX_TRANSITIONS as i64 + 10) {
            let f = if t % 2 == 0 {
                vec![finding(Rule::Ship, 1, 0.001)]
            } else {
                vec![]
            };
            h.record(&summary(&d, 10 + t as u64), &f, t);
        }
        let e = h.experiment(&d.id).unwrap();
        assert_eq!(e.transitions().count(), MAX_TRANSITIONS);
        assert_eq!(
            e.transitions().last().unwrap().at,
            MAX_TRANSITIONS as i64 + 9
        );
    }

    #[test]
    fn merging_keeps_the_later_evaluation() {
        let mut s: Vec<Point> = (0..4).map(point).collect();
        push_bounded(&mut s, point(4), 4, merge_points);
        let ats: Vec<(Micros, Micros, u32)> = s.iter().map(|p| (p.since, p.at, p.covers)).collect();
        assert_eq!(ats, vec![(0, 1, 2), (2, 2, 1), (3, 3, 1), (4, 4, 1)]);
    }
}
