//! Special functions written for cancellation-free log densities at counts up to ~1e13.
//!
//! statrs' `ln_gamma` is accurate to ~1e-15 *relative*, which at a = 1e9 (ln Γ ≈ 2e10) is an
//! absolute error of ~1e-5 in a log density. The posterior densities are therefore written in
//! C. Loader's saddle-point form ("Fast and accurate computation of binomial probabilities",
//! 2000): a Stirling remainder `stirling_delta` plus a deviance term (`bd0` = k·ln(k/M) + M − k = −k·log1pmx(M/k − 1)), both small numbers
//! computed without cancellation. statrs is still used for ln Γ at small arguments, where its
//! accuracy is ample.

use statrs::function::gamma::ln_gamma;

/// ½·ln(2π).
const HALF_LN_2PI: f64 = 0.918_938_533_204_672_8;

/// 1/(2j+1) for j = 1..=40, so the series loop multiplies instead of dividing.
const INV_ODD: [f64; 40] = {
    let mut out = [0.0; 40];
    let mut j = 0;
    while j < 40 {
        out[j] = 1.0 / (2 * j + 3) as f64;
        j += 1;
    }
    out
};

/// `ln(1 + e) − e` for `e > −1`, accurate in relative terms near `e = 0`.
///
/// Near zero the naive form loses every digit (both terms are ≈ e and the result ≈ −e²/2), so
/// for |e| < 0.5 we use the series in v = e/(2+e) from ln(1+e) = 2·atanh(v):
/// ln(1+e) − e = −e·v + 2·Σ_{j≥1} v^{2j+1}/(2j+1).
pub(crate) fn log1pmx(e: f64) -> f64 {
    if e.abs() >= 0.5 {
        return e.ln_1p() - e;
    }
    let v = e / (2.0 + e);
    let v2 = v * v;
    let mut power = v * v2;
    let mut sum = 0.0;
    // |v| ≤ 1/3 here, so at most ~30 terms are needed; typical |e| < 0.05 stops after 5.
    for inv_j in INV_ODD {
        let term = power * inv_j;
        sum += term;
        if term.abs() <= 1e-18 * sum.abs() {
            break;
        }
        power *= v2;
    }
    -e * v + 2.0 * sum
}

/// Stirling remainder δ(z) = ln Γ(z) − [(z − ½)·ln z − z + ½·ln 2π] for z > 0.
///
/// For z ≥ 10 the asymptotic series is used (its 7th term is below 1e-16 there); below 10 the
/// difference is O(1) and statrs' ln Γ is accurate enough.
pub(crate) fn stirling_delta(z: f64) -> f64 {
    if z >= 10.0 {
        let r = 1.0 / z;
        let r2 = r * r;
        // Coefficients B_{2m} / (2m(2m−1)): 1/12, −1/360, 1/1260, −1/1680, 1/1188, −691/360360, 1/156.
        r * (1.0 / 12.0
            + r2 * (-1.0 / 360.0
                + r2 * (1.0 / 1260.0
                    + r2 * (-1.0 / 1680.0
                        + r2 * (1.0 / 1188.0 + r2 * (-691.0 / 360_360.0 + r2 / 156.0))))))
    } else {
        ln_gamma(z) - ((z - 0.5) * z.ln() - z + HALF_LN_2PI)
    }
}

/// ln of the Beta(a, b) density of the logit `t = ln(x/(1−x))`, evaluated at its mode
/// x* = a/(a+b): ½·ln(ab / (2π(a+b))) + δ(a+b) − δ(a) − δ(b). No large terms cancel.
pub(crate) fn beta_logit_log_mode_density(a: f64, b: f64) -> f64 {
    let n = a + b;
    0.5 * (a.ln() + b.ln() - n.ln()) - HALF_LN_2PI + stirling_delta(n)
        - stirling_delta(a)
        - stirling_delta(b)
}

/// ln of the Gamma(shape a, rate r) density of `t = ln λ` at its mode λ* = a/r:
/// ½·ln(a/(2π)) − δ(a). Independent of the rate, as a shift in t should be.
pub(crate) fn gamma_log_log_mode_density(a: f64) -> f64 {
    0.5 * a.ln() - HALF_LN_2PI - stirling_delta(a)
}

#[cfg(test)]
mod tests {
    // Reference values are copied digit for digit from mpmath.
    #![allow(clippy::excessive_precision)]
    use super::*;

    #[test]
    fn log1pmx_matches_series_and_direct_form() {
        // Reference: mpmath.log1p(e) - e at 40 digits (values computed with mpmath 1.3).
        let cases = [
            (1e-8, -4.999_999_966_666_666_9e-17),
            (-0.3, -0.056_674_943_938_732_379),
            (0.49, -0.091_223_880_042_632_227),
            (2.0, -0.901_387_711_331_890_31),
        ];
        for (e, want) in cases {
            let got = log1pmx(e);
            assert!(
                ((got - want) / want).abs() < 1e-14,
                "e={e}: {got} vs {want}"
            );
        }
    }

    #[test]
    fn stirling_delta_is_continuous_across_the_switch() {
        // Both branches must agree at the switch point (the asymptotic series at 10 is
        // accurate to ~1e-16; the ln Γ branch inherits statrs' ~1e-15 relative error on
        // ln Γ(10) ≈ 12.8, i.e. ~1e-14 absolute).
        let below = ln_gamma(10.0) - ((10.0 - 0.5) * 10f64.ln() - 10.0 + HALF_LN_2PI);
        assert!((stirling_delta(10.0) - below).abs() < 5e-14);
        // Published value: δ(1) = 1 − ½ ln(2π) (from Γ(1) = 1).
        assert!((stirling_delta(1.0) - (1.0 - HALF_LN_2PI)).abs() < 1e-15);
    }
}
