//! Conjugate posteriors: Beta for conversion rates, Gamma (shape, rate) for defect rates.

use super::grid::{logistic, Grid, Kernel};
use super::{Interval, StatsError};

/// Smallest shape parameter accepted. Far below any sensible prior (1e-3 is the smallest we
/// test); it keeps ln(b/a) and the logit window finite in f64.
pub const MIN_SHAPE: f64 = 1e-10;
/// Largest shape parameter accepted: 1e13 leaves the posterior sd in logit units (≥ 3e-7)
/// many thousand ulps wide, so node placement stays exact to ~1e-9 of an sd.
pub const MAX_SHAPE: f64 = 1e13;

/// Highest credible level accepted: tails of 5e-11 each are resolved to full accuracy
/// (each arm's window reaches ~1e-17 of mass), beyond that the interval ends would be
/// clamped to the window.
pub const MAX_LEVEL: f64 = 1.0 - 1e-10;

/// Smallest Gamma rate accepted (prior rate plus exposure): with shapes in
/// [`MIN_SHAPE`], [`MAX_SHAPE`], every mean a/r stays far inside double range.
pub const MIN_RATE: f64 = 1e-10;
/// Largest Gamma rate accepted: exposures up to 1e15 units (1e18 requests counted in
/// thousands).
pub const MAX_RATE: f64 = 1e15;

fn check_shape(name: &'static str, value: f64) -> Result<f64, StatsError> {
    if !value.is_finite() || value <= 0.0 {
        return Err(StatsError::InvalidParameter { name, value });
    }
    if !(MIN_SHAPE..=MAX_SHAPE).contains(&value) {
        return Err(StatsError::ParameterOutOfRange {
            name,
            value,
            min: MIN_SHAPE,
            max: MAX_SHAPE,
        });
    }
    Ok(value)
}

fn check_probability(p: f64) -> Result<f64, StatsError> {
    if p.is_nan() || !(0.0..=1.0).contains(&p) {
        return Err(StatsError::InvalidProbability(p));
    }
    Ok(p)
}

/// Tail probabilities of an equal-tailed interval at `level`.
pub(crate) fn tail_levels(level: f64) -> Result<(f64, f64), StatsError> {
    if !(level > 0.0 && level <= MAX_LEVEL) {
        return Err(StatsError::InvalidLevel(level));
    }
    Ok((0.5 * (1.0 - level), 0.5 * (1.0 + level)))
}

/// Beta(α, β): the posterior of a conversion rate after a Beta prior and binomial data.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Beta {
    alpha: f64,
    beta: f64,
}

impl Beta {
    /// A Beta distribution; both shapes must be finite and in [`MIN_SHAPE`], [`MAX_SHAPE`].
    pub fn new(alpha: f64, beta: f64) -> Result<Self, StatsError> {
        Ok(Beta {
            alpha: check_shape("alpha", alpha)?,
            beta: check_shape("beta", beta)?,
        })
    }

    /// The posterior Beta(α + s, β + n − s) after `successes` out of `trials`.
    pub fn posterior(prior: &Beta, trials: u64, successes: u64) -> Result<Self, StatsError> {
        if successes > trials {
            return Err(StatsError::SuccessesExceedTrials { successes, trials });
        }
        Beta::new(
            prior.alpha + successes as f64,
            prior.beta + (trials - successes) as f64,
        )
    }

    /// First shape α.
    pub fn alpha(&self) -> f64 {
        self.alpha
    }

    /// Second shape β.
    pub fn beta(&self) -> f64 {
        self.beta
    }

    /// Mean α/(α+β).
    pub fn mean(&self) -> f64 {
        self.alpha / (self.alpha + self.beta)
    }

    /// Standard deviation √(αβ/((α+β)²(α+β+1))).
    pub fn sd(&self) -> f64 {
        let n = self.alpha + self.beta;
        (self.alpha * self.beta / (n * n * (n + 1.0))).sqrt()
    }

    pub(crate) fn kernel(&self) -> Kernel {
        Kernel::beta(self.alpha, self.beta)
    }

    /// Density at x (0 outside [0, 1]; +∞ at an endpoint where a shape is below 1).
    pub fn pdf(&self, x: f64) -> f64 {
        if x.is_nan() {
            return f64::NAN;
        }
        if !(0.0..=1.0).contains(&x) {
            return 0.0;
        }
        let edge = |shape: f64, other: f64| {
            if shape < 1.0 {
                f64::INFINITY
            } else if shape == 1.0 {
                // Beta(1, b) has density b at 0 (and Beta(a, 1) density a at 1).
                other
            } else {
                0.0
            }
        };
        if x == 0.0 {
            return edge(self.alpha, self.beta);
        }
        if x == 1.0 {
            return edge(self.beta, self.alpha);
        }
        let t = x.ln() - (-x).ln_1p();
        (self.kernel().log_density(t) - x.ln() - (-x).ln_1p()).exp()
    }

    /// P(θ ≤ x). NaN for NaN input.
    pub fn cdf(&self, x: f64) -> f64 {
        self.tail(x, false)
    }

    /// P(θ > x), computed directly (never as 1 − cdf).
    pub fn sf(&self, x: f64) -> f64 {
        self.tail(x, true)
    }

    fn tail(&self, x: f64, upper: bool) -> f64 {
        if x.is_nan() {
            return f64::NAN;
        }
        let below = if x <= 0.0 {
            Some(0.0)
        } else if x >= 1.0 {
            Some(1.0)
        } else {
            None
        };
        if let Some(c) = below {
            return if upper { 1.0 - c } else { c };
        }
        let t = x.ln() - (-x).ln_1p();
        match Grid::new(&[self.kernel()]) {
            Ok(grid) => {
                let v = grid.eval(0, t);
                if upper {
                    v.sf
                } else {
                    v.cdf
                }
            }
            Err(_) => f64::NAN,
        }
    }

    /// The p-quantile (0 ≤ p ≤ 1).
    pub fn quantile(&self, p: f64) -> Result<f64, StatsError> {
        let p = check_probability(p)?;
        if p == 0.0 {
            return Ok(0.0);
        }
        if p == 1.0 {
            return Ok(1.0);
        }
        let grid = Grid::new(&[self.kernel()])?;
        Ok(logistic(grid.quantile_t(0, p)))
    }

    /// Equal-tailed credible interval with the given probability `level` (0 < level < 1).
    pub fn interval(&self, level: f64) -> Result<Interval, StatsError> {
        let (lo, hi) = tail_levels(level)?;
        let grid = Grid::new(&[self.kernel()])?;
        Ok(Interval {
            level,
            lower: logistic(grid.quantile_t(0, lo)),
            upper: logistic(grid.quantile_t(0, hi)),
        })
    }
}

/// Gamma(shape, rate): the posterior of a defect rate per unit of exposure after a Gamma prior
/// and Poisson counts.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Gamma {
    shape: f64,
    rate: f64,
}

impl Gamma {
    /// A Gamma distribution; the shape must lie in [`MIN_SHAPE`], [`MAX_SHAPE`] and the rate
    /// must be finite and positive.
    pub fn new(shape: f64, rate: f64) -> Result<Self, StatsError> {
        let shape = check_shape("shape", shape)?;
        if !rate.is_finite() || rate <= 0.0 {
            return Err(StatsError::InvalidParameter {
                name: "rate",
                value: rate,
            });
        }
        if !(MIN_RATE..=MAX_RATE).contains(&rate) {
            return Err(StatsError::ParameterOutOfRange {
                name: "rate",
                value: rate,
                min: MIN_RATE,
                max: MAX_RATE,
            });
        }
        Ok(Gamma { shape, rate })
    }

    /// The posterior Gamma(a + count, b + exposure) after `count` events in `exposure` units.
    pub fn posterior(prior: &Gamma, count: u64, exposure: f64) -> Result<Self, StatsError> {
        if !exposure.is_finite() || exposure < 0.0 {
            return Err(StatsError::InvalidExposure(exposure));
        }
        Gamma::new(prior.shape + count as f64, prior.rate + exposure)
    }

    /// Shape a.
    pub fn shape(&self) -> f64 {
        self.shape
    }

    /// Rate b (inverse scale).
    pub fn rate(&self) -> f64 {
        self.rate
    }

    /// Mean a/b.
    pub fn mean(&self) -> f64 {
        self.shape / self.rate
    }

    /// Standard deviation √a/b.
    pub fn sd(&self) -> f64 {
        self.shape.sqrt() / self.rate
    }

    pub(crate) fn kernel(&self) -> Kernel {
        Kernel::gamma(self.shape, self.rate)
    }

    /// Density at λ (0 for λ < 0; +∞ at 0 when the shape is below 1).
    pub fn pdf(&self, x: f64) -> f64 {
        if x.is_nan() {
            return f64::NAN;
        }
        if x < 0.0 || x == f64::INFINITY {
            return 0.0;
        }
        if x == 0.0 {
            return if self.shape < 1.0 {
                f64::INFINITY
            } else if self.shape == 1.0 {
                self.rate
            } else {
                0.0
            };
        }
        (self.kernel().log_density(x.ln()) - x.ln()).exp()
    }

    /// P(λ ≤ x). NaN for NaN input.
    pub fn cdf(&self, x: f64) -> f64 {
        self.tail(x, false)
    }

    /// P(λ > x), computed directly (never as 1 − cdf).
    pub fn sf(&self, x: f64) -> f64 {
        self.tail(x, true)
    }

    fn tail(&self, x: f64, upper: bool) -> f64 {
        if x.is_nan() {
            return f64::NAN;
        }
        if x <= 0.0 {
            return if upper { 1.0 } else { 0.0 };
        }
        if x == f64::INFINITY {
            return if upper { 0.0 } else { 1.0 };
        }
        match Grid::new(&[self.kernel()]) {
            Ok(grid) => {
                let v = grid.eval(0, x.ln());
                if upper {
                    v.sf
                } else {
                    v.cdf
                }
            }
            Err(_) => f64::NAN,
        }
    }

    /// The p-quantile (0 ≤ p ≤ 1; p = 1 gives +∞).
    pub fn quantile(&self, p: f64) -> Result<f64, StatsError> {
        let p = check_probability(p)?;
        if p == 0.0 {
            return Ok(0.0);
        }
        if p == 1.0 {
            return Ok(f64::INFINITY);
        }
        let grid = Grid::new(&[self.kernel()])?;
        Ok(grid.quantile_t(0, p).exp())
    }

    /// Equal-tailed credible interval with the given probability `level` (0 < level < 1).
    pub fn interval(&self, level: f64) -> Result<Interval, StatsError> {
        let (lo, hi) = tail_levels(level)?;
        let grid = Grid::new(&[self.kernel()])?;
        Ok(Interval {
            level,
            lower: grid.quantile_t(0, lo).exp(),
            upper: grid.quantile_t(0, hi).exp(),
        })
    }
}
