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
    /// Index into `variants` of the arm every other arm is compared against.
    pub control: usize,
    /// The arms, in configuration order (the order the API reports them in).
    pub variants: Vec<VariantDef>,
    /// Metrics observed on every arm.
    pub metrics: Vec<MetricDef>,
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
