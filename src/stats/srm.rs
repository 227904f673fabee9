//! Sample ratio mismatch: a chi-square goodness-of-fit test of exposed units per variant
//! against the configured traffic weights.
//!
//! X² = Σ (O_i − N·w_i)² / (N·w_i) with k − 1 degrees of freedom (Pearson's test, as in
//! `scipy.stats.chisquare(obs, f_exp)`). The alarm threshold p < 0.001 is common practice for
//! this check, not a derived quantity (R. Kohavi, D. Tang, Y. Xu, "Trustworthy Online Controlled
//! Experiments", Cambridge UP 2020, ch. 21; Fabijan et al., KDD 2019). Checking continuously
//! repeats the test, so the threshold is itself "peeked" at; keep it strict.

use statrs::distribution::{ChiSquared, ContinuousCDF};

use super::StatsError;

/// p-value below which a sample ratio mismatch is flagged (common practice, see module docs).
pub const SRM_P_THRESHOLD: f64 = 0.001;

/// Result of the chi-square goodness-of-fit test.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct SampleRatio {
    /// Pearson's X² statistic.
    pub chi2: f64,
    /// Degrees of freedom, k − 1.
    pub df: usize,
    /// P(χ²_df ≥ X²), taken from the upper tail directly.
    pub p_value: f64,
}

impl SampleRatio {
    /// True when p < [`SRM_P_THRESHOLD`].
    pub fn is_mismatch(&self) -> bool {
        self.p_value < SRM_P_THRESHOLD
    }

    /// True when p is below a caller-chosen threshold.
    pub fn is_mismatch_at(&self, threshold: f64) -> bool {
        self.p_value < threshold
    }
}

/// Test observed unit counts per variant against planned weights (any positive scale; they are
/// normalized to sum to 1).
pub fn sample_ratio_mismatch(
    observed_units: &[u64],
    weights: &[f64],
) -> Result<SampleRatio, StatsError> {
    let k = observed_units.len();
    if k != weights.len() {
        return Err(StatsError::LengthMismatch {
            observed: k,
            weights: weights.len(),
        });
    }
    if k < 2 {
        return Err(StatsError::ArmCount(k));
    }
    for &w in weights {
        if !w.is_finite() || w <= 0.0 {
            return Err(StatsError::InvalidParameter {
                name: "weight",
                value: w,
            });
        }
    }
    let total_weight: f64 = weights.iter().sum();
    let n: f64 = observed_units.iter().map(|&o| o as f64).sum();
    if n == 0.0 {
        return Err(StatsError::NoUnits);
    }
    let chi2: f64 = observed_units
        .iter()
        .zip(weights)
        .map(|(&o, &w)| {
            let expected = n * (w / total_weight);
            let d = o as f64 - expected;
            d * d / expected
        })
        .sum();
    let df = k - 1;
    let dist = ChiSquared::new(df as f64).map_err(|_| StatsError::Numerical("chi-square"))?;
    let p_value = if chi2 > 0.0 { dist.sf(chi2) } else { 1.0 };
    Ok(SampleRatio { chi2, df, p_value })
}
