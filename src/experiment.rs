//! Validated experiment definitions: the pure, resolved form of the config's `[[experiment]]` tables.
//!
//! Everything here is already checked (names unique, weights positive and normalised, priors
//! proper), so the state and decision code can index without re-validating.

/// Most variants one experiment may have; the statistics core is tested up to this size.
pub const MAX_VARIANTS: usize = 64;

/// Most conversion metrics one experiment may have: each takes one bit of a unit's slot in the
/// unit table (see `state::units`), which keeps per-unit memory fixed.
pub const MAX_CONVERSION_METRICS: usize = 24;

/// Most metrics of any kind per experiment.
pub const MAX_METRICS: usize = 64;

/// One experiment: its arms and the metrics observed on them.
#[derive(Debug, Clone, PartialEq)]
pub struct ExperimentDef {
    /// Stable identifier used in events, URLs and metric labels.
    pub id: String,
    /// How many times an experiment with this id was restarted or re-created at run time (0
    /// for config-file experiments). Stored state is keyed by it, so state kept from an older
    /// generation never lands in a newer one with the same id.
    pub generation: u32,
    /// Index into `variants` of the arm every other arm is compared against.
    pub control: usize,
    /// The arms, in configuration order (the order the API reports them in).
    pub variants: Vec<VariantDef>,
    /// Metrics observed on every arm.
    pub metrics: Vec<MetricDef>,
    /// Which metric decides, which guard, and the data-quality checks.
    pub rules: ExperimentRules,
}

/// Experiment-level decision settings (see docs/decisions.md for the defaults and why).
#[derive(Debug, Clone, PartialEq)]
pub struct ExperimentRules {
    /// Index of the metric whose expected loss decides shipping.
    pub primary: usize,
    /// Indices of metrics whose harm blocks shipping the harmed variant.
    pub guardrails: Vec<usize>,
    /// Sample-ratio mismatch flagged below this p-value (suspends ship decisions).
    pub srm_p: f64,
    /// Crossover share of exposed units above which data quality is flagged.
    pub max_crossover_share: f64,
    /// Probability that every variant is within the ROPE for "equivalent".
    pub equivalence_probability: f64,
    /// Event-time span after which an experiment with neither ship nor equivalence is
    /// recorded as inconclusive (µs); `None` = no limit.
    pub max_duration: Option<i64>,
    /// Outcomes naming no experiment count only this long (µs) after the unit's first
    /// exposure; `None` = no limit.
    pub attribution_window: Option<i64>,
    /// Event-time span before `ship` or `equivalent` may hold (µs); 0 = none. Harm rules are
    /// not held back by it.
    pub min_duration: i64,
    /// Configured start (µs since the epoch): events before it are refused (`before_start`)
    /// and durations are measured from it; `None` = from the earliest accepted event time.
    pub start: Option<i64>,
}

impl Default for ExperimentRules {
    fn default() -> Self {
        ExperimentRules {
            primary: 0,
            guardrails: Vec::new(),
            srm_p: DEFAULT_SRM_P,
            max_crossover_share: DEFAULT_MAX_CROSSOVER_SHARE,
            equivalence_probability: DEFAULT_EQUIVALENCE_PROBABILITY,
            max_duration: None,
            attribution_window: None,
            min_duration: DEFAULT_MIN_DURATION,
            start: None,
        }
    }
}

impl ExperimentRules {
    /// Where the experiment's duration is measured from: its configured start, else the
    /// earliest accepted event time (`first`). Only times that passed the event-time check
    /// reach the state, so neither end can be set by one wrong clock.
    pub fn started(&self, first: Option<i64>) -> Option<i64> {
        self.start.or(first)
    }

    /// Event time the experiment has run, from [`ExperimentRules::started`] to `last`.
    pub fn ran(&self, first: Option<i64>, last: Option<i64>) -> Option<i64> {
        match (self.started(first), last) {
            (Some(s), Some(l)) => Some((l - s).max(0)),
            _ => None,
        }
    }
}

/// Default minimum duration before a ship or equivalence decision: seven days of event time,
/// so that a decision covers every weekday once (common practice, from memory) and so that the
/// early, noisy looks of a continuously checked ship rule cannot decide (docs/decisions.md has
/// the measured error rates with and without it).
pub const DEFAULT_MIN_DURATION: i64 = 7 * 86_400 * 1_000_000;

/// Default SRM alarm threshold: p < 0.001 is common practice for this check.
pub const DEFAULT_SRM_P: f64 = 0.001;
/// Default crossover bound: more than 1% of units seen in a second arm means assignment leaks.
pub const DEFAULT_MAX_CROSSOVER_SHARE: f64 = 0.01;
/// Default probability for practical equivalence.
pub const DEFAULT_EQUIVALENCE_PROBABILITY: f64 = 0.95;
/// Default minimum exposed units per variant before any decision.
pub const DEFAULT_MIN_UNITS: u64 = 500;
/// Default harm probability: strict, because the rule is checked continuously (the rate of
/// false alarms it gives at hourly looks is measured in docs/decisions.md).
pub const DEFAULT_HARM_PROBABILITY: f64 = 0.999;
/// Default clearance of a guardrail before shipping: the variant must be worse than the
/// control by more than this relative margin with probability at most
/// [`DEFAULT_CLEAR_PROBABILITY`].
pub const DEFAULT_CLEAR_MARGIN: f64 = 0.2;
/// Default largest posterior probability of "worse by more than the clearance margin" that
/// still clears a guardrail.
pub const DEFAULT_CLEAR_PROBABILITY: f64 = 0.05;
/// Default false-alarm bound of the anytime-valid harm rule (`harm_evidence`), per metric and
/// variant.
pub const DEFAULT_EVIDENCE_ALPHA: f64 = 0.01;
/// Default ROPE half-width (relative lift).
pub const DEFAULT_ROPE: f64 = 0.01;

/// Metric-level stopping rules.
#[derive(Debug, Clone, PartialEq)]
pub struct MetricRules {
    /// Exposed units each compared variant needs before any decision.
    pub min_units: u64,
    /// Summed exposure each compared variant needs (defect metrics).
    pub min_exposure: f64,
    /// Harm: P(worse than control by more than `margin`, relative) ≥ `probability`.
    pub harm: Option<HarmRule>,
    /// Ship: expected loss of choosing a variant below the threshold of caring.
    pub ship: Option<ShipRule>,
    /// Region of practical equivalence: half-width of the relative lift.
    pub rope: f64,
    /// As a guardrail: what clears it for shipping (`None`: the guardrail is not checked
    /// before shipping, only its harm blocks).
    pub clear: Option<ClearRule>,
    /// The anytime-valid harm rule (`harm_evidence`); `None` = off.
    pub evidence: Option<EvidenceRule>,
}

/// Guardrail clearance: shipping a variant waits until P(variant worse than the control by
/// more than `margin`, relative) ≤ `probability` on this metric.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ClearRule {
    /// Relative margin of tolerated worsening (non-inferiority margin).
    pub margin: f64,
    /// Largest posterior probability of worsening beyond the margin that still clears.
    pub probability: f64,
}

/// The anytime-valid harm rule: a test martingale against "the variant is not worse than the
/// control by more than `margin`" alarms when it reaches 1/`alpha`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct EvidenceRule {
    /// False-alarm bound, at any cadence (Ville's inequality).
    pub alpha: f64,
    /// Relative margin, as in [`HarmRule`].
    pub margin: f64,
}

impl Default for MetricRules {
    fn default() -> Self {
        MetricRules {
            min_units: DEFAULT_MIN_UNITS,
            min_exposure: 0.0,
            harm: Some(HarmRule {
                probability: DEFAULT_HARM_PROBABILITY,
                margin: 0.0,
            }),
            ship: None,
            rope: DEFAULT_ROPE,
            clear: Some(ClearRule {
                margin: DEFAULT_CLEAR_MARGIN,
                probability: DEFAULT_CLEAR_PROBABILITY,
            }),
            evidence: Some(EvidenceRule {
                alpha: DEFAULT_EVIDENCE_ALPHA,
                margin: 0.0,
            }),
        }
    }
}

/// The harm rule.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct HarmRule {
    /// Posterior probability at or above which harm holds.
    pub probability: f64,
    /// Relative margin: harm means worse than the control by more than this.
    pub margin: f64,
}

/// The ship rule.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ShipRule {
    /// Largest expected loss (in the metric's rate units) the team is willing to risk.
    pub threshold_of_caring: f64,
}

impl ExperimentDef {
    /// Index of the variant called `name`, if any. Linear: experiments have few variants.
    pub fn variant_index(&self, name: &str) -> Option<usize> {
        self.variants.iter().position(|v| v.name == name)
    }

    /// Index of the metric called `name`, if any.
    pub fn metric_index(&self, name: &str) -> Option<usize> {
        self.metrics.iter().position(|m| m.name == name)
    }

    /// The key stored state is filed under: the id for generation 0, else `id~generation`
    /// (`~` cannot occur in an id, so the two never collide).
    pub fn state_key(&self) -> String {
        if self.generation == 0 {
            self.id.clone()
        } else {
            format!("{}~{}", self.id, self.generation)
        }
    }

    /// Why state counted under `self` cannot carry over to `new` (same id), if it cannot.
    ///
    /// State carries over when `new` keeps every variant and metric of `self` in the same
    /// order (unit slots store variant indices and conversion-flag positions) with the same
    /// kind and priors (a changed prior would silently re-read every count already made), and
    /// only appends variants or metrics. Weights, control and rules may change freely.
    pub fn incompatibility(&self, new: &ExperimentDef) -> Option<String> {
        if new.variants.len() < self.variants.len() {
            return Some("variants cannot be removed from a running experiment".into());
        }
        for (i, (a, b)) in self.variants.iter().zip(&new.variants).enumerate() {
            if a.name != b.name {
                return Some(format!(
                    "variant #{i} was `{}` and is now `{}`; variants of a running experiment keep their order and only new ones may be appended",
                    a.name, b.name
                ));
            }
        }
        if new.metrics.len() < self.metrics.len() {
            return Some("metrics cannot be removed from a running experiment".into());
        }
        for (i, (a, b)) in self.metrics.iter().zip(&new.metrics).enumerate() {
            if a.name != b.name {
                return Some(format!(
                    "metric #{i} was `{}` and is now `{}`; metrics of a running experiment keep their order and only new ones may be appended",
                    a.name, b.name
                ));
            }
            if a.kind != b.kind {
                return Some(format!("metric `{}` changes its kind or exposure", a.name));
            }
            if a.prior != b.prior {
                return Some(format!("metric `{}` changes its prior", a.name));
            }
            let old_priors = (0..self.variants.len()).map(|v| a.prior_for(v));
            if !old_priors.eq((0..self.variants.len()).map(|v| b.prior_for(v))) {
                return Some(format!("metric `{}` changes a variant prior", a.name));
            }
        }
        None
    }
}

/// One arm of an experiment.
#[derive(Debug, Clone, PartialEq)]
pub struct VariantDef {
    /// Name used in events.
    pub name: String,
    /// Planned share of exposed units; the weights of an experiment sum to 1.
    pub weight: f64,
}

/// One metric observed on every arm.
#[derive(Debug, Clone, PartialEq)]
pub struct MetricDef {
    /// Name used in events.
    pub name: String,
    /// What is counted and which conjugate model applies.
    pub kind: MetricKind,
    /// Prior shared by all arms, unless `variant_priors` overrides it for one arm.
    pub prior: Prior,
    /// Per-arm prior overrides, indexed like `ExperimentDef::variants`.
    pub variant_priors: Vec<Option<Prior>>,
    /// Stopping rules of this metric.
    pub rules: MetricRules,
}

impl MetricDef {
    /// The prior in force for arm `variant_idx`.
    pub fn prior_for(&self, variant_idx: usize) -> Prior {
        self.variant_priors
            .get(variant_idx)
            .copied()
            .flatten()
            .unwrap_or(self.prior)
    }
}

/// Which conjugate model a metric uses.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum MetricKind {
    /// Beta-Binomial: each exposed unit is a trial, its first conversion a success.
    Conversion,
    /// Gamma-Poisson: defects counted per unit of exposure; lower is better.
    DefectRate(ExposureBasis),
}

impl MetricKind {
    /// The name used in config and documents.
    pub fn as_str(self) -> &'static str {
        match self {
            MetricKind::Conversion => "conversion",
            MetricKind::DefectRate(_) => "defect_rate",
        }
    }
}

/// Where a defect metric's exposure comes from.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ExposureBasis {
    /// Each unit's first exposure adds one unit of exposure.
    Units,
    /// Events report their own exposure (sessions, requests, machine hours, ...).
    Reported,
}

impl ExposureBasis {
    /// The name used in config and documents.
    pub fn as_str(self) -> &'static str {
        match self {
            ExposureBasis::Units => "units",
            ExposureBasis::Reported => "reported",
        }
    }
}

/// A conjugate prior.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Prior {
    /// Beta(alpha, beta) on a conversion probability.
    Beta {
        /// Prior pseudo-successes.
        alpha: f64,
        /// Prior pseudo-failures.
        beta: f64,
    },
    /// Gamma(shape, rate) on a defect rate per unit of exposure.
    Gamma {
        /// Prior pseudo-defects.
        shape: f64,
        /// Prior pseudo-exposure.
        rate: f64,
    },
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn durations_run_from_the_configured_start_else_the_earliest_time() {
        let day = 86_400 * 1_000_000i64;
        let mut rules = ExperimentRules::default();
        assert_eq!(rules.ran(Some(2 * day), Some(5 * day)), Some(3 * day));
        assert_eq!(rules.ran(None, Some(5 * day)), None);
        rules.start = Some(day);
        assert_eq!(rules.ran(Some(2 * day), Some(5 * day)), Some(4 * day));
        // No event time yet: nothing has run.
        assert_eq!(rules.ran(None, None), None);
        // Never negative.
        assert_eq!(rules.ran(None, Some(0)), Some(0));
    }
}
