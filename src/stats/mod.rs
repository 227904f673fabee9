//! The pure statistics core: conjugate posteriors, exact k-arm decision quantities by
//! quadrature, and the sample ratio mismatch test.
//!
//! # Layout
//! - `special`: cancellation-free pieces of log densities (Loader's deviance, Stirling
//!   remainder, `log1pmx`).
//! - `grid`: piecewise Clenshaw–Curtis grids holding densities, CDFs and survival functions.
//! - `posterior`: [`Beta`] (conversion) and [`Gamma`] (defect rate) posteriors.
//! - `arms`: [`compare`] for 2..=64 arms, and [`decide`] (P(best), loss and P(better than
//!   control) only) for frequent re-evaluation.
//! - `pair`: the exact two-arm fast path for Gamma arms, used by [`compare`] and [`decide`].
//! - `srm`: [`sample_ratio_mismatch`].
//! - `drift`: [`shift_bound`], how far any posterior probability can move between two looks.
//! - `density`: posterior and lift densities for plots ([`posterior_density`], [`lift_density`]).
//!
//! **Invariant:** nothing here does I/O, allocates threads, or knows about async runtimes,
//! message brokers, HTTP or serialization; bad input is an `Err`, never a panic.
//! Formulas and their sources are listed in docs/methods.md.

mod arms;
mod density;
mod drift;
mod grid;
mod pair;
mod posterior;
mod special;
mod srm;

pub use arms::{
    compare_general, decide_general, ArmSummary, Arms, CompareOptions, Decision, Lift, MAX_ARMS,
};
pub use density::{lift_density, plot_range, posterior_density, PLOT_TAIL};
pub use drift::{
    pair_divergence, pair_divergences, pair_renyi, pair_shift_bound, proven_below,
    proven_below_renyi, shift_bound, RENYI_ORDERS,
};
pub use posterior::{Beta, Gamma, MAX_LEVEL, MAX_RATE, MAX_SHAPE, MIN_RATE, MIN_SHAPE};
pub use srm::{sample_ratio_mismatch, SampleRatio, SRM_P_THRESHOLD};

// The two entry points choose the route here, above both `arms` and `pair`, so that each of
// those depends only on what lies below it.

/// P(best), expected loss and P(better than control) only, in input order: the same numbers as
/// [`compare()`] (bit for bit, from the same single pass over the shared grid) without the
/// intervals, lifts, ROPE and harm probabilities, which cost more than half of a full
/// `compare`. Meant for continuous re-evaluation against a stopping rule.
///
/// Two Gamma arms take the exact one-table route of `pair` (docs/methods.md §10).
pub fn decide(arms: &Arms, control: usize) -> Result<Vec<Decision>, StatsError> {
    arms::check_arms(arms, control)?;
    if let Arms::Gamma(v) = arms {
        if let Some(fast) = pair::decide(v, control) {
            return fast;
        }
    }
    arms::decide_general(arms, control)
}

/// Compute every decision quantity for `arms`, returned in input order.
///
/// Two Gamma arms take the exact one-table route of `pair` (docs/methods.md §10). More Gamma
/// arms keep the shared grid for what needs every arm (rate intervals, P(best), losses,
/// P(better than control)) and take each variant's lift interval, ROPE and harm from the
/// exact table of that variant and the control, which the ratio quadrature of the shared grid
/// matched only to a few 1e-9 (and lift ends to 1e-5 relative) at shapes below 0.1.
pub fn compare(arms: &Arms, opts: &CompareOptions) -> Result<Vec<ArmSummary>, StatsError> {
    arms::check_options(arms, opts)?;
    if let Arms::Gamma(v) = arms {
        if let Some(fast) = pair::compare(v, opts) {
            return fast;
        }
        let mut out = arms::compare_shared(arms, opts, arms::Ratios::Leave)?;
        let control = &v[opts.control];
        for (j, (summary, arm)) in out.iter_mut().zip(v).enumerate() {
            if j != opts.control {
                pair::pairwise(arm, control, opts)?.apply(summary);
            }
        }
        return Ok(out);
    }
    arms::compare_general(arms, opts)
}

/// Errors from the statistics core.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum StatsError {
    /// A distribution parameter or weight is NaN, infinite, zero or negative.
    #[error("{name} must be a finite number greater than 0, got {value}")]
    InvalidParameter {
        /// Which parameter.
        name: &'static str,
        /// The rejected value.
        value: f64,
    },
    /// A shape parameter is positive but outside the range the numerics are validated for.
    #[error("{name} = {value:e} is outside the supported range [{min:e}, {max:e}]")]
    ParameterOutOfRange {
        /// Which parameter.
        name: &'static str,
        /// The rejected value.
        value: f64,
        /// Smallest accepted value.
        min: f64,
        /// Largest accepted value.
        max: f64,
    },
    /// An interval level outside (0, [`MAX_LEVEL`]].
    #[error("credible interval level must lie in (0, 1 - 1e-10], got {0}")]
    InvalidLevel(f64),
    /// A probability outside [0, 1].
    #[error("probability must lie in [0, 1], got {0}")]
    InvalidProbability(f64),
    /// More successes than trials.
    #[error("successes ({successes}) exceed trials ({trials})")]
    SuccessesExceedTrials {
        /// Reported successes.
        successes: u64,
        /// Reported trials.
        trials: u64,
    },
    /// Exposure is NaN, infinite or negative.
    #[error("exposure must be finite and non-negative, got {0}")]
    InvalidExposure(f64),
    /// Too few or too many arms.
    #[error("need between 2 and {max} arms, got {0}", max = MAX_ARMS)]
    ArmCount(usize),
    /// The control index does not name an arm.
    #[error("control index {control} is out of range for {n_arms} arms")]
    ControlOutOfRange {
        /// Requested control index.
        control: usize,
        /// Number of arms.
        n_arms: usize,
    },
    /// ROPE or harm margin is NaN, infinite or negative.
    #[error("{name} must be finite and non-negative, got {value}")]
    InvalidMargin {
        /// Which option.
        name: &'static str,
        /// The rejected value.
        value: f64,
    },
    /// Observed counts and weights have different lengths.
    #[error("{observed} observed counts but {weights} weights")]
    LengthMismatch {
        /// Number of observed counts.
        observed: usize,
        /// Number of weights.
        weights: usize,
    },
    /// The sample ratio test got no units at all.
    #[error("no units observed")]
    NoUnits,
    /// An internal consistency check failed on accepted input: a defect of ours, never the
    /// caller's (every accepted input is answered; docs/methods.md lists the ranges).
    #[error("numerical failure in the statistics core: {0}")]
    Numerical(&'static str),
    /// Deliberately not computed: an earlier look's exact values and a proven bound on how far
    /// they can have moved ([`shift_bound`]) already decide every rule that reads them.
    #[error("not computed: an earlier look's values and a proven bound already decide every rule that reads them")]
    NotComputed,
}

impl StatsError {
    /// True for a failure of ours on accepted input (report it: exit 1), false for input
    /// the core refuses (the caller's to fix: exit 2).
    pub fn is_internal(&self) -> bool {
        matches!(self, StatsError::Numerical(_))
    }
}

/// An equal-tailed credible interval.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Interval {
    /// Posterior probability inside the interval.
    pub level: f64,
    /// Lower end (the (1 − level)/2 quantile).
    pub lower: f64,
    /// Upper end (the (1 + level)/2 quantile).
    pub upper: f64,
}
