//! Piecewise Clenshaw–Curtis grids that carry posterior densities, CDFs and survival
//! functions for one or many arms on a shared set of nodes.
//!
//! Why a hand-written grid instead of calling an incomplete beta/gamma per node: the
//! continued fractions in statrs stop after 140 iterations and need O(√max(a, b)) of them near
//! the mode, so they are wrong at n ≈ 1e9 (see tests/stats_reference.rs), and the asymptotic
//! algorithms that would fix that (DiDonato & Morris 1992, Temme 1979) are not in any Rust
//! crate we may use. Integrating the cancellation-free density instead gives the CDF *and* the
//! survival function at every node at once, each as a sum of positive terms, so neither is
//! ever formed as 1 − the other.
//!
//! Every arm lives in a variable on the whole real line in which its density is smooth and
//! log-concave for all parameters > 0: the logit t = ln(x/(1−x)) for a Beta, t = ln λ for a
//! Gamma. Panels are sized from the local curvature and slope of the log density, so the same
//! code handles Beta(0.001, 1.001) (mass spread over thousands of logit units) and
//! Beta(1e7, 1e9) (a spike 3e-4 logit units wide). On each panel the density is sampled at
//! Chebyshev points and integrated with the Clenshaw–Curtis rule and its cumulative
//! (spectral integration) matrix (L. N. Trefethen, "Spectral Methods in MATLAB", SIAM 2000,
//! ch. 12; "Is Gauss quadrature better than Clenshaw–Curtis?", SIAM Review 50(1), 2008).
//! Values between nodes come from barycentric interpolation (Berrut & Trefethen, "Barycentric
//! Lagrange interpolation", SIAM Review 46(3), 2004).

use std::sync::OnceLock;

use super::special::{beta_logit_log_mode_density, gamma_log_log_mode_density, log1pmx};
use super::StatsError;

/// Polynomial degree on each panel.
pub(crate) const DEG: usize = 16;
/// Nodes per panel (Chebyshev points of the second kind include both ends).
pub(crate) const NP: usize = DEG + 1;

/// How far below its peak an arm's log density may fall before the window ends. e^-40 ≈ 4e-18;
/// for a log-concave density the mass beyond is below ~10·e^-40 even for Beta(0.001, ·).
const LOG_DROP: f64 = 40.0;
/// Panel width at most this many local standard deviations (1/√(−ℓ'')).
const WIDTH_SD: f64 = 2.0;
/// Panel width at most this many e-folds of the integrands, C2/(|ℓ'| + 1): the density changes
/// at rate |ℓ'| and the rate-unit jacobian (or a CDF factor of a wide arm) at rate ≤ 1. A
/// degree-16 Chebyshev fit of e^{6u} on [0, 1] is exact to ~6e-12 relative.
const WIDTH_EFOLDS: f64 = 6.0;
/// Panel width near t = 0 for logistic-based integrands (see `Kernel::analytic_width`).
const BETA_POLE_WIDTH: f64 = 2.0;
/// Guard against a bug: with panel widths set by slope, curvature and analyticity, every
/// accepted input needs far fewer (64 arms with shapes from 1e-10 to 1e13: a few thousand).
pub(crate) const MAX_PANELS: usize = 50_000;

/// Clenshaw–Curtis nodes, weights, cumulative matrix and barycentric weights on [−1, 1].
pub(crate) struct Rule {
    /// Nodes in increasing order, s_i = −cos(iπ/DEG).
    pub(crate) s: [f64; NP],
    /// Quadrature weights (sum 2).
    pub(crate) w: [f64; NP],
    /// cum[i][k] = ∫_{−1}^{s_i} ℓ_k(s) ds for the Lagrange basis ℓ_k through the nodes.
    pub(crate) cum: [[f64; NP]; NP],
    /// Barycentric weights (−1)^k, halved at both ends.
    pub(crate) bary: [f64; NP],
}

/// The shared rule, built once.
pub(crate) fn rule() -> &'static Rule {
    static RULE: OnceLock<Rule> = OnceLock::new();
    RULE.get_or_init(build_rule)
}

/// Nodes per panel of the Gauss–Legendre rule used for the ratio (lift, ROPE, harm) integrals.
pub(crate) const GL_N: usize = 16;

/// Gauss–Legendre nodes and weights on [−1, 1].
pub(crate) struct GaussRule {
    /// Nodes, increasing.
    pub(crate) x: [f64; GL_N],
    /// Weights (sum 2).
    pub(crate) w: [f64; GL_N],
}

/// The shared Gauss–Legendre rule, built once by Newton's method on P_n from the
/// Tricomi-type start cos(π(i − ¼)/(n + ½)) (Abramowitz & Stegun 22.16.6 for the node
/// asymptotics; weights 2/((1 − x²)P_n'(x)²), A&S 25.4.29).
pub(crate) fn gauss_rule() -> &'static GaussRule {
    static RULE: OnceLock<GaussRule> = OnceLock::new();
    RULE.get_or_init(|| {
        let n = GL_N;
        let mut x = [0.0; GL_N];
        let mut w = [0.0; GL_N];
        for i in 0..n {
            let mut z = (std::f64::consts::PI * (i as f64 + 0.75) / (n as f64 + 0.5)).cos();
            let mut dp = 1.0;
            for _ in 0..100 {
                // Three-term recurrence for P_n(z) and its derivative.
                let (mut p0, mut p1) = (1.0, z);
                for k in 2..=n {
                    let kf = k as f64;
                    let p2 = ((2.0 * kf - 1.0) * z * p1 - (kf - 1.0) * p0) / kf;
                    p0 = p1;
                    p1 = p2;
                }
                dp = n as f64 * (z * p1 - p0) / (z * z - 1.0);
                let dz = p1 / dp;
                z -= dz;
                if dz.abs() < 1e-16 {
                    break;
                }
            }
            // Largest root first from the start formula; store increasing.
            x[n - 1 - i] = z;
            w[n - 1 - i] = 2.0 / ((1.0 - z * z) * dp * dp);
        }
        GaussRule { x, w }
    })
}

/// Barycentric factors bary_k·Π_{j≠k}(s − s_j) at s ∈ [−1, 1].
///
/// The second (true) barycentric form Σ c_k v_k / Σ c_k with c_k = bary_k/(s − s_k) is what we
/// evaluate; multiplying every c_k by the common factor Π_j (s − s_j) leaves the quotient
/// unchanged and turns 17 divisions into prefix and suffix products (one division per point
/// instead of seventeen), and it needs no special case when s hits a node: all factors but
/// that node's vanish, so the quotient returns the tabulated value. |s − s_j| ≤ 2, so the
/// products neither overflow nor underflow.
#[inline(always)]
fn lagrange_factors(s: f64) -> [f64; NP] {
    let r = rule();
    let diff: [f64; NP] = std::array::from_fn(|k| s - r.s[k]);
    let mut out = [0.0; NP];
    let mut prefix = 1.0;
    for k in 0..NP {
        out[k] = prefix;
        prefix *= diff[k];
    }
    let mut suffix = 1.0;
    for k in (0..NP).rev() {
        out[k] *= suffix * r.bary[k];
        suffix *= diff[k];
    }
    out
}

fn build_rule() -> Rule {
    use std::f64::consts::PI;
    let n = DEG;
    let nf = n as f64;
    // θ_i for increasing nodes: s_i = −cos(iπ/n) = cos(π − iπ/n).
    let theta: Vec<f64> = (0..NP).map(|i| PI - (i as f64) * PI / nf).collect();
    let mut s = [0.0; NP];
    for i in 0..NP {
        s[i] = theta[i].cos();
    }
    s[0] = -1.0;
    s[n] = 1.0;
    // Clenshaw–Curtis weights (Trefethen, Spectral Methods in MATLAB, program clencurt, even n).
    let mut w = [0.0; NP];
    for i in 0..NP {
        if i == 0 || i == n {
            w[i] = 1.0 / (nf * nf - 1.0);
            continue;
        }
        let mut v = 1.0;
        for k in 1..n / 2 {
            let kf = k as f64;
            v -= 2.0 * (2.0 * kf * theta[i]).cos() / (4.0 * kf * kf - 1.0);
        }
        v -= (nf * theta[i]).cos() / (nf * nf - 1.0);
        w[i] = 2.0 * v / nf;
    }
    // Cumulative matrix: interpolate a unit vector by a Chebyshev series, integrate the series
    // from −1 term by term, evaluate at the nodes.
    let mut cum = [[0.0; NP]; NP];
    for k in 0..NP {
        // Chebyshev coefficients c_j of the interpolant of e_k: c_j = (2/n)·Σ'' f_i T_j(s_i),
        // with the i = 0, n terms halved and c_0, c_n halved again.
        let mut c = vec![0.0; n + 2];
        for (j, cj) in c.iter_mut().enumerate().take(NP) {
            let end = if k == 0 || k == n { 0.5 } else { 1.0 };
            let mut v = (2.0 / nf) * end * ((j as f64) * theta[k]).cos();
            if j == 0 || j == n {
                v *= 0.5;
            }
            *cj = v;
        }
        // Integral coefficients: ∫T_0 = T_1, ∫T_1 = T_2/4, ∫T_j = T_{j+1}/(2(j+1)) − T_{j−1}/(2(j−1)).
        let mut ic = vec![0.0; n + 2];
        for j in 0..NP {
            let cj = c[j];
            match j {
                0 => ic[1] += cj,
                1 => ic[2] += cj / 4.0,
                _ => {
                    ic[j + 1] += cj / (2.0 * (j as f64 + 1.0));
                    ic[j - 1] -= cj / (2.0 * (j as f64 - 1.0));
                }
            }
        }
        // Value at −1: T_j(−1) = (−1)^j.
        let at_minus_one: f64 = ic
            .iter()
            .enumerate()
            .map(|(j, v)| if j % 2 == 0 { *v } else { -*v })
            .sum();
        for i in 0..NP {
            let val: f64 = ic
                .iter()
                .enumerate()
                .map(|(j, v)| v * ((j as f64) * theta[i]).cos())
                .sum();
            cum[i][k] = val - at_minus_one;
        }
    }
    let mut bary = [0.0; NP];
    for (k, b) in bary.iter_mut().enumerate() {
        let sign = if k % 2 == 0 { 1.0 } else { -1.0 };
        *b = if k == 0 || k == n { 0.5 * sign } else { sign };
    }
    Rule { s, w, cum, bary }
}

/// `ln(1 + e^u)` without overflow.
pub(crate) fn softplus(u: f64) -> f64 {
    if u > 0.0 {
        u + (-u).exp().ln_1p()
    } else {
        u.exp().ln_1p()
    }
}

/// Logistic function 1/(1 + e^-t).
pub(crate) fn logistic(t: f64) -> f64 {
    if t >= 0.0 {
        1.0 / (1.0 + (-t).exp())
    } else {
        let e = t.exp();
        e / (1.0 + e)
    }
}

/// One arm's density in its working variable t (logit for Beta, log for Gamma).
#[derive(Clone, Copy, Debug)]
pub(crate) enum Kernel {
    /// Beta(a, b) seen through t = ln(x/(1−x)).
    BetaLogit {
        /// First shape.
        a: f64,
        /// Second shape.
        b: f64,
        /// Mode of the logit density, ln(a/b).
        mode: f64,
        /// ln of the logit density at the mode.
        log_peak: f64,
        /// a/b = e^mode, kept so that each density evaluation needs one exponential fewer.
        a_over_b: f64,
        /// b/a = e^-mode.
        b_over_a: f64,
    },
    /// Gamma(shape a, rate r) seen through t = ln λ.
    GammaLog {
        /// Shape.
        a: f64,
        /// ln of the rate.
        ln_rate: f64,
        /// Mode of the log density, ln(a/r).
        mode: f64,
        /// ln of the log density at the mode.
        log_peak: f64,
    },
}

impl Kernel {
    /// Kernel for Beta(a, b).
    pub(crate) fn beta(a: f64, b: f64) -> Kernel {
        Kernel::BetaLogit {
            a,
            b,
            mode: a.ln() - b.ln(),
            log_peak: beta_logit_log_mode_density(a, b),
            a_over_b: a / b,
            b_over_a: b / a,
        }
    }

    /// Kernel for Gamma(shape a, rate r).
    pub(crate) fn gamma(a: f64, r: f64) -> Kernel {
        let ln_rate = r.ln();
        Kernel::GammaLog {
            a,
            ln_rate,
            mode: a.ln() - ln_rate,
            log_peak: gamma_log_log_mode_density(a),
        }
    }

    /// Mode of the density in t.
    pub(crate) fn mode(&self) -> f64 {
        match *self {
            Kernel::BetaLogit { mode, .. } | Kernel::GammaLog { mode, .. } => mode,
        }
    }

    /// Approximate standard deviation in t (exact curvature at the mode).
    pub(crate) fn sd(&self) -> f64 {
        match *self {
            Kernel::BetaLogit { a, b, .. } => (1.0 / a + 1.0 / b).sqrt(),
            Kernel::GammaLog { a, .. } => 1.0 / a.sqrt(),
        }
    }

    /// ln of the (normalized) density in t; relative accuracy ~1e-15 even at a, b ≈ 1e9
    /// because only the deviance from the mode is formed (Loader 2000).
    pub(crate) fn log_density(&self, t: f64) -> f64 {
        match *self {
            Kernel::BetaLogit {
                a,
                b,
                mode,
                log_peak,
                a_over_b,
                b_over_a,
            } => {
                let d = t - mode;
                // e1 = x/x* − 1 and e2 = (1−x)/(1−x*) − 1, from whichever algebraic form
                // neither overflows nor cancels; a·e1 + b·e2 = 0 gives the other one. e^t is
                // e^mode·(1 + expm1(d)): it only enters 1 + e^t, where a relative error of an
                // ulp or two is harmless, and it saves an exponential per node.
                let (e1, e2) = if t <= 0.0 {
                    let em1 = d.exp_m1();
                    let e1 = em1 / (1.0 + a_over_b * (1.0 + em1));
                    (e1, -a_over_b * e1)
                } else {
                    let em1 = (-d).exp_m1();
                    let e2 = em1 / (1.0 + b_over_a * (1.0 + em1));
                    (-b_over_a * e2, e2)
                };
                // a·[ln(1+e1) − e1] + b·[ln(1+e2) − e2]; the linear terms cancel exactly
                // (a·e1 + b·e2 = 0). Far out, ln(1+e) comes from softplus differences so
                // that x/x* below 1e-16 still has a finite logarithm.
                let part1 = if e1.abs() < 0.5 {
                    log1pmx(e1)
                } else {
                    (softplus(-mode) - softplus(-t)) - e1
                };
                let part2 = if e2.abs() < 0.5 {
                    log1pmx(e2)
                } else {
                    (softplus(mode) - softplus(t)) - e2
                };
                log_peak + a * part1 + b * part2
            }
            Kernel::GammaLog {
                a, mode, log_peak, ..
            } => {
                let d = t - mode;
                let e = d.exp_m1();
                // ln(1 + e) is exactly d here.
                let part = if e.abs() < 0.5 { log1pmx(e) } else { d - e };
                log_peak + a * part
            }
        }
    }

    /// ln density and its first two derivatives' magnitudes, for panel sizing.
    pub(crate) fn slope_curvature(&self, t: f64) -> (f64, f64) {
        match *self {
            Kernel::BetaLogit { a, b, .. } => {
                let x = logistic(t);
                let one_minus_x = logistic(-t);
                let n = a + b;
                (a * one_minus_x - b * x, n * x * one_minus_x)
            }
            Kernel::GammaLog { a, ln_rate, .. } => {
                let m = (t + ln_rate).exp();
                (a - m, m)
            }
        }
    }

    /// Largest panel width that keeps the density well resolved at t.
    fn step(&self, t: f64) -> f64 {
        self.scaled_step(t, 1.0)
    }

    /// `step` shrunk by `scale` (≤ 1) for grids with many arms.
    ///
    /// The density changes by at most e^WIDTH_EFOLDS over a panel and is resolved to
    /// WIDTH_SD local sds; nothing else limits the width here. In particular the width is
    /// not tied to one logit or log unit: a Beta(1e-4, ·) left tail is e^{1e-4·t} over
    /// 4e5 logit units and takes a few dozen panels, not 1e5 (the rate-unit jacobian, which
    /// changes at rate ≤ 1, is limited separately where it matters, in `Grid::new`).
    fn scaled_step(&self, t: f64, scale: f64) -> f64 {
        let (slope, curvature) = self.slope_curvature(t);
        let by_curvature = if curvature > 0.0 {
            scale * WIDTH_SD / curvature.sqrt()
        } else {
            f64::INFINITY
        };
        let by_slope = if slope != 0.0 {
            scale * WIDTH_EFOLDS / slope.abs()
        } else {
            f64::INFINITY
        };
        let h = by_curvature.min(by_slope).min(self.analytic_width(t));
        if h.is_finite() {
            h
        } else {
            scale * WIDTH_SD * self.sd()
        }
    }

    /// Widest panel around t on which functions of the working variable built from the
    /// logistic map (the Beta logit density, its CDF, the jacobian x(1 − x)) stay
    /// polynomial to ~1e-13: they are analytic except at t = ±iπ(2j + 1), so a panel of
    /// width w centred at c converges like ρ^-16 with ρ the Bernstein ellipse parameter of
    /// those points; w = 2 at c = 0 gives ρ ≈ 6.4 (ρ^-16 ≈ 1e-13), and w = |c|/2 further out
    /// gives ρ ≥ 7.9. The log-Gamma density e^{a·t − r·e^t} is entire: no limit. Before this
    /// limit, 6-unit panels across the gap between two distant conversion arms put 5e-9 of
    /// error into the dominated arm's expected loss (tests/stats_reference.rs).
    pub(crate) fn analytic_width(&self, t: f64) -> f64 {
        match *self {
            Kernel::BetaLogit { .. } => BETA_POLE_WIDTH.max(0.5 * t.abs()),
            Kernel::GammaLog { .. } => f64::INFINITY,
        }
    }

    /// Map t back to the rate scale (x for Beta, λ for Gamma).
    pub(crate) fn value(&self, t: f64) -> f64 {
        match *self {
            Kernel::BetaLogit { .. } => logistic(t),
            Kernel::GammaLog { .. } => t.exp(),
        }
    }

    /// dθ/dt, turning a t-integral into a rate-unit integral.
    pub(crate) fn jacobian(&self, t: f64) -> f64 {
        match *self {
            Kernel::BetaLogit { .. } => logistic(t) * logistic(-t),
            Kernel::GammaLog { .. } => t.exp(),
        }
    }

    /// The window [L, U] where ln density ≥ peak − LOG_DROP, found by walking panel steps
    /// out from the mode (log-concavity makes the walk monotone).
    fn window(&self) -> Result<(f64, f64), StatsError> {
        let mode = self.mode();
        let peak = self.log_density(mode);
        let mut bounds = [mode, mode];
        for (side, bound) in bounds.iter_mut().enumerate() {
            let dir = if side == 0 { -1.0 } else { 1.0 };
            let mut t = mode;
            let mut n_steps = 0;
            loop {
                t += dir * safe_step(|u| self.step(u), t, dir);
                n_steps += 1;
                if self.log_density(t) < peak - LOG_DROP {
                    break;
                }
                if n_steps > MAX_PANELS || !t.is_finite() {
                    return Err(StatsError::Numerical("posterior window did not close"));
                }
            }
            *bound = t;
        }
        Ok((bounds[0], bounds[1]))
    }
}

/// A panel width h from t in direction `dir` that `step` allows at both ends and the middle.
///
/// The allowed width can fall by orders of magnitude within one step (a Gamma log density's
/// curvature r·e^t grows e-fold per unit), so the width allowed at t alone may overshoot
/// into a region needing panels 1e-12 wide; shrinking until the far end agrees keeps each
/// panel inside its own resolution limits. A width that is infinite (no arm needs
/// resolving) is returned as is.
fn safe_step(step: impl Fn(f64) -> f64, t: f64, dir: f64) -> f64 {
    let mut h = step(t);
    if !h.is_finite() {
        return h;
    }
    for _ in 0..200 {
        let far = step(t + dir * h).min(step(t + dir * 0.5 * h));
        if far >= h {
            break;
        }
        h = far.max(0.25 * h);
    }
    h
}

/// One arm's values on the shared grid.
#[derive(Clone, Debug)]
pub(crate) struct ArmTable {
    /// The arm's density.
    pub(crate) kernel: Kernel,
    /// First panel in which the arm has mass.
    pub(crate) p0: usize,
    /// One past the last panel in which the arm has mass.
    pub(crate) p1: usize,
    /// The arm's window [L, U] in t (log density within `LOG_DROP` of its peak).
    pub(crate) window: (f64, f64),
    /// Normalized density in t at the nodes of panels p0..p1, NP per panel.
    pub(crate) dens: Vec<f64>,
    /// CDF at the same nodes (summed from the left).
    pub(crate) cdf: Vec<f64>,
    /// Survival function at the same nodes (summed from the right, never 1 − cdf).
    pub(crate) sf: Vec<f64>,
}

/// Values of one arm at a point: density in t, CDF, survival.
#[derive(Clone, Copy, Debug)]
pub(crate) struct PointValue {
    /// Density in t.
    pub(crate) dens: f64,
    /// CDF.
    pub(crate) cdf: f64,
    /// Survival function.
    pub(crate) sf: f64,
}

/// Shared panels and each arm's tables on them.
#[derive(Clone, Debug)]
pub(crate) struct Grid {
    /// Panel boundaries, increasing.
    pub(crate) breaks: Vec<f64>,
    /// Per-arm tables.
    pub(crate) arms: Vec<ArmTable>,
}

impl Grid {
    /// Build panels that resolve every arm, then tabulate each arm on them.
    pub(crate) fn new(kernels: &[Kernel]) -> Result<Grid, StatsError> {
        let windows: Vec<(f64, f64)> = kernels
            .iter()
            .map(|k| k.window())
            .collect::<Result<_, _>>()?;
        let lo = windows.iter().map(|w| w.0).fold(f64::INFINITY, f64::min);
        let hi = windows
            .iter()
            .map(|w| w.1)
            .fold(f64::NEG_INFINITY, f64::max);
        let mut starts: Vec<f64> = windows.iter().map(|w| w.0).collect();
        // Losses are integrals in rate units, dθ = jacobian·dt, and |d ln jacobian/dt| ≤ 1 for
        // both working variables; wherever the jacobian is not negligible against the arms'
        // rates, panels stay within WIDTH_EFOLDS of it too (this matters in gaps between arms).
        let rate_scale = kernels
            .iter()
            .map(|k| k.value(k.mode()))
            .fold(0.0, f64::max);
        let jac_kernel = kernels[0];
        // With k arms, Π F_j switches from 0 to 1 over ~1/z_k sd, z_k ≈ √(2 ln k) the normal
        // quantile of 1 − 1/k (the spread of a maximum of k draws), so panels shrink
        // accordingly; k ≤ 3 keeps the single-arm width.
        let n_kernels = kernels.len() as f64;
        let width_scale = 1.0 / ((2.0 * n_kernels.ln()).sqrt() - 0.5).max(1.0);
        starts.sort_by(|x, y| x.total_cmp(y));

        let mut breaks = vec![lo];
        let mut t = lo;
        while t < hi {
            // A window that starts ahead must not be stepped over.
            let next_start = starts.iter().copied().find(|&s| s > t).unwrap_or(hi);
            let local_step = |u: f64| {
                let h = kernels
                    .iter()
                    .zip(&windows)
                    .filter(|(_, w)| w.0 <= u && u <= w.1)
                    .map(|(k, _)| k.scaled_step(u, width_scale))
                    .fold(f64::INFINITY, f64::min);
                if jac_kernel.jacobian(u) > 1e-20 * rate_scale {
                    h.min(WIDTH_EFOLDS).min(jac_kernel.analytic_width(u))
                } else {
                    h
                }
            };
            let h0 = safe_step(local_step, t, 1.0);
            let mut next = if h0.is_finite() { t + h0 } else { next_start };
            next = next.min(next_start).min(hi);
            // A sliver shorter than a tenth of a step before a boundary is merged into it,
            // unless the widths allowed at the far end or the middle forbid the longer panel.
            let merged = next_start.min(hi);
            if merged - next < 0.1 * (next - t)
                && local_step(merged).min(local_step(0.5 * (t + merged))) >= merged - t
            {
                next = merged;
            }
            if next <= t {
                return Err(StatsError::Numerical("quadrature panels stopped advancing"));
            }
            breaks.push(next);
            t = next;
            if breaks.len() > MAX_PANELS {
                return Err(StatsError::Numerical("too many quadrature panels"));
            }
        }
        let n_panels = breaks.len() - 1;
        let mut arms = Vec::with_capacity(kernels.len());
        for (kernel, window) in kernels.iter().zip(&windows) {
            let p0 = breaks
                .partition_point(|&b| b <= window.0)
                .saturating_sub(1)
                .min(n_panels - 1);
            let p1 = breaks
                .partition_point(|&b| b < window.1)
                .clamp(p0 + 1, n_panels);
            arms.push(tabulate(*kernel, *window, &breaks, p0, p1)?);
        }
        Ok(Grid { breaks, arms })
    }

    /// Number of panels.
    pub(crate) fn n_panels(&self) -> usize {
        self.breaks.len() - 1
    }

    /// The t coordinate of node i of panel p.
    pub(crate) fn node(&self, p: usize, i: usize) -> f64 {
        let (a, b) = (self.breaks[p], self.breaks[p + 1]);
        0.5 * (a + b) + 0.5 * (b - a) * rule().s[i]
    }

    /// Quadrature weight (in t) of node i of panel p.
    pub(crate) fn weight(&self, p: usize, i: usize) -> f64 {
        0.5 * (self.breaks[p + 1] - self.breaks[p]) * rule().w[i]
    }

    /// Density, CDF and survival of arm j at an arbitrary t by barycentric interpolation.
    pub(crate) fn eval(&self, j: usize, t: f64) -> PointValue {
        let mut cursor = self.arms[j].p0;
        self.eval_near(j, t, &mut cursor)
    }

    /// Like `eval`, starting the panel search at `cursor` and leaving it at the panel found;
    /// callers that sweep t monotonically pay O(1) per lookup instead of a binary search.
    pub(crate) fn eval_near(&self, j: usize, t: f64, cursor: &mut usize) -> PointValue {
        let arm = &self.arms[j];
        let lower = self.breaks[arm.p0];
        let upper = self.breaks[arm.p1];
        if t.is_nan() {
            return PointValue {
                dens: f64::NAN,
                cdf: f64::NAN,
                sf: f64::NAN,
            };
        }
        if t <= lower {
            return PointValue {
                dens: 0.0,
                cdf: 0.0,
                sf: 1.0,
            };
        }
        if t >= upper {
            return PointValue {
                dens: 0.0,
                cdf: 1.0,
                sf: 0.0,
            };
        }
        let mut p = (*cursor).clamp(arm.p0, arm.p1 - 1);
        while t < self.breaks[p] && p > arm.p0 {
            p -= 1;
        }
        while t >= self.breaks[p + 1] && p + 1 < arm.p1 {
            p += 1;
        }
        *cursor = p;
        let (a, b) = (self.breaks[p], self.breaks[p + 1]);
        let s = (2.0 * t - a - b) / (b - a);
        let base = (p - arm.p0) * NP;
        let (dens, cdf, sf) = (
            &arm.dens[base..base + NP],
            &arm.cdf[base..base + NP],
            &arm.sf[base..base + NP],
        );
        let c = lagrange_factors(s);
        let mut num = [0.0f64; 3];
        let mut den = 0.0;
        for k in 0..NP {
            den += c[k];
            num[0] += c[k] * dens[k];
            num[1] += c[k] * cdf[k];
            num[2] += c[k] * sf[k];
        }
        PointValue {
            dens: (num[0] / den).max(0.0),
            cdf: (num[1] / den).clamp(0.0, 1.0),
            sf: (num[2] / den).clamp(0.0, 1.0),
        }
    }

    /// Arm j's density and one tail (the survival function when `upper`, else the CDF) at t,
    /// for the ratio integrals, which need only these two and call this ~1e3 times per variant.
    pub(crate) fn tail_near(
        &self,
        j: usize,
        t: f64,
        cursor: &mut usize,
        upper: bool,
    ) -> (f64, f64) {
        let arm = &self.arms[j];
        let lower = self.breaks[arm.p0];
        let top = self.breaks[arm.p1];
        if t <= lower {
            return (if upper { 1.0 } else { 0.0 }, 0.0);
        }
        if t >= top {
            return (if upper { 0.0 } else { 1.0 }, 0.0);
        }
        if t.is_nan() {
            return (f64::NAN, f64::NAN);
        }
        let mut p = (*cursor).clamp(arm.p0, arm.p1 - 1);
        while t < self.breaks[p] && p > arm.p0 {
            p -= 1;
        }
        while t >= self.breaks[p + 1] && p + 1 < arm.p1 {
            p += 1;
        }
        *cursor = p;
        let (a, b) = (self.breaks[p], self.breaks[p + 1]);
        let s = (2.0 * t - a - b) / (b - a);
        let base = (p - arm.p0) * NP;
        let tail = if upper {
            &arm.sf[base..base + NP]
        } else {
            &arm.cdf[base..base + NP]
        };
        let dens = &arm.dens[base..base + NP];
        let c = lagrange_factors(s);
        let (mut den, mut num_tail, mut num_dens) = (0.0, 0.0, 0.0);
        for k in 0..NP {
            den += c[k];
            num_tail += c[k] * tail[k];
            num_dens += c[k] * dens[k];
        }
        ((num_tail / den).clamp(0.0, 1.0), (num_dens / den).max(0.0))
    }

    /// The t at which arm j's CDF equals `p` (0 < p < 1). Probabilities beyond the resolved
    /// window (below ~1e-17) clamp to the window's edge.
    pub(crate) fn quantile_t(&self, j: usize, p: f64) -> f64 {
        let arm = &self.arms[j];
        let n = arm.p1 - arm.p0;
        // Work on whichever tail is smaller so that the target is resolved in relative terms.
        let use_sf = p > 0.5;
        let target = if use_sf { 1.0 - p } else { p };
        let tail = |idx: usize| if use_sf { arm.sf[idx] } else { arm.cdf[idx] };
        // Find the panel whose end values bracket the target; tails are monotone in the index.
        let panel = if use_sf {
            (0..n).rev().find(|&q| tail(q * NP) >= target).unwrap_or(0)
        } else {
            (0..n)
                .find(|&q| tail(q * NP + DEG) >= target)
                .unwrap_or(n - 1)
        };
        let p_abs = arm.p0 + panel;
        let (a, b) = (self.breaks[p_abs], self.breaks[p_abs + 1]);
        // Bisection on the interpolant (monotone within a panel), finished by Newton steps.
        let f = |t: f64| {
            let v = self.eval(j, t);
            if use_sf {
                (target - v.sf, v.dens)
            } else {
                (v.cdf - target, v.dens)
            }
        };
        let (mut lo, mut hi) = (a, b);
        let mut t = 0.5 * (a + b);
        for _ in 0..200 {
            let (g, dens) = f(t);
            if g == 0.0 {
                return t;
            }
            if g < 0.0 {
                lo = t;
            } else {
                hi = t;
            }
            let newton = if dens > 0.0 { t - g / dens } else { f64::NAN };
            let next = if newton > lo && newton < hi {
                newton
            } else {
                0.5 * (lo + hi)
            };
            let moved = (next - t).abs();
            t = next;
            if moved <= 1e-15 * (1.0 + t.abs()) || (hi - lo) <= 1e-15 * (1.0 + t.abs()) {
                break;
            }
        }
        t
    }
}

/// Sample an arm's density on panels p0..p1 and integrate it both ways.
fn tabulate(
    kernel: Kernel,
    window: (f64, f64),
    breaks: &[f64],
    p0: usize,
    p1: usize,
) -> Result<ArmTable, StatsError> {
    let r = rule();
    let n = p1 - p0;
    let mut dens = vec![0.0; n * NP];
    let mut cdf = vec![0.0; n * NP];
    let mut sf = vec![0.0; n * NP];
    let mut masses = vec![0.0; n];
    for q in 0..n {
        let (a, b) = (breaks[p0 + q], breaks[p0 + q + 1]);
        let (mid, half) = (0.5 * (a + b), 0.5 * (b - a));
        let vals = &mut dens[q * NP..(q + 1) * NP];
        for (i, v) in vals.iter_mut().enumerate() {
            let t = if i == 0 {
                a
            } else if i == DEG {
                b
            } else {
                mid + half * r.s[i]
            };
            *v = kernel.log_density(t).exp();
        }
        masses[q] = half * vals.iter().zip(&r.w).map(|(v, w)| v * w).sum::<f64>();
    }
    let total: f64 = masses.iter().sum();
    if !(total.is_finite() && (total - 1.0).abs() < 1e-6) {
        return Err(StatsError::Numerical(
            "posterior density did not integrate to 1",
        ));
    }
    let mut left = 0.0;
    for q in 0..n {
        let half = 0.5 * (breaks[p0 + q + 1] - breaks[p0 + q]);
        let vals = &dens[q * NP..(q + 1) * NP];
        for i in 0..NP {
            let partial: f64 = r.cum[i].iter().zip(vals).map(|(c, v)| c * v).sum();
            cdf[q * NP + i] = (left + half * partial) / total;
        }
        left += masses[q];
    }
    let mut right = 0.0;
    for q in (0..n).rev() {
        let half = 0.5 * (breaks[p0 + q + 1] - breaks[p0 + q]);
        let vals = &dens[q * NP..(q + 1) * NP];
        for i in 0..NP {
            let partial: f64 = r.cum[i]
                .iter()
                .zip(&r.w)
                .zip(vals)
                .map(|((c, w), v)| (w - c) * v)
                .sum();
            sf[q * NP + i] = (right + half * partial) / total;
        }
        right += masses[q];
    }
    for v in dens.iter_mut() {
        *v /= total;
    }
    Ok(ArmTable {
        kernel,
        p0,
        p1,
        window,
        dens,
        cdf,
        sf,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn clenshaw_curtis_rule_is_exact_for_low_degree_polynomials() {
        // ∫_{-1}^{1} s^m ds = 2/(m+1) for even m (closed form); CC with 17 nodes is exact to
        // degree 16.
        let r = rule();
        for m in [0u32, 2, 8, 16] {
            let got: f64 =
                r.s.iter()
                    .zip(&r.w)
                    .map(|(s, w)| w * s.powi(m as i32))
                    .sum();
            assert!((got - 2.0 / (m as f64 + 1.0)).abs() < 1e-14, "m={m}: {got}");
        }
        // Cumulative matrix: ∫_{-1}^{s} 3u² du = s³ + 1.
        for i in 0..NP {
            let got: f64 = (0..NP).map(|k| r.cum[i][k] * 3.0 * r.s[k] * r.s[k]).sum();
            assert!((got - (r.s[i].powi(3) + 1.0)).abs() < 1e-14);
        }
    }

    #[test]
    fn densities_integrate_to_one_across_regimes() {
        // The analytic normalization (Stirling remainders) must agree with the quadrature; the
        // check inside `tabulate` allows 1e-6, here we demand 1e-10. The floor is node placement:
        // for Gamma(1e9, ·) the window sits at t ≈ 20 with sd 3e-5, so ulp(t) is 1e-10 sd.
        let cases = [
            Kernel::beta(1.0, 1.0),
            Kernel::beta(0.001, 1.001),
            Kernel::beta(1e7 + 1.0, 1e9 - 1e7 + 1.0),
            Kernel::beta(1.0, 1e9 + 1.0),
            Kernel::gamma(0.001, 1e-3),
            Kernel::gamma(1e9, 3.0),
            Kernel::gamma(51.0, 101.0),
        ];
        for k in cases {
            let g = Grid::new(&[k]).unwrap_or_else(|e| panic!("{k:?}: {e}"));
            let arm = &g.arms[0];
            let mut mass = 0.0;
            for p in arm.p0..arm.p1 {
                for i in 0..NP {
                    mass += g.weight(p, i) * k.log_density(g.node(p, i)).exp();
                }
            }
            assert!((mass - 1.0).abs() < 1e-10, "{k:?}: mass {mass}");
        }
    }

    use proptest::prelude::*;

    /// Shapes evenly in log10 over the whole accepted range's prior part and counts up to
    /// 1e9: an arm as `compare` may receive it.
    fn arb_kernel() -> impl Strategy<Value = Kernel> {
        let shape = prop_oneof![(-10.0f64..3.0).prop_map(|e| 10f64.powf(e)), Just(1e-10)];
        let count = prop_oneof![Just(0.0), (0.0f64..9.0).prop_map(|e| 10f64.powf(e).round())];
        prop_oneof![
            (shape.clone(), shape.clone(), count.clone(), 0.0f64..=1.0).prop_map(|(a, b, n, f)| {
                Kernel::beta(a + (n * f).round(), b + n - (n * f).round())
            }),
            (shape, -3.0f64..3.0, count, -3.0f64..12.0)
                .prop_map(|(a, r, c, e)| Kernel::gamma(a + c, 10f64.powf(r) + 10f64.powf(e))),
        ]
    }

    proptest! {
        #![proptest_config(ProptestConfig { cases: 64, ..ProptestConfig::default() })]

        /// Bounded work and memory for any accepted input (the worst case of
        /// docs/performance.md): the panels and table entries of a 2..64-arm grid stay
        /// below fixed bounds, so one summary's time and memory are bounded too (a table
        /// entry is three f64: 1.2 M entries are 29 MB, under the 64 MB goal). Before the
        /// panel rules were tied to slope rather than to one unit, 64 arms of
        /// Beta(0.001, 0.001) hit the 50 000-panel guard after 1.4 GB.
        #[test]
        fn grid_work_is_bounded_for_every_accepted_input(
            kernels in prop::collection::vec(arb_kernel(), 2..=64),
        ) {
            let same_family: Vec<Kernel> = kernels
                .iter()
                .copied()
                .filter(|k| matches!(k, Kernel::BetaLogit { .. }) == matches!(kernels[0], Kernel::BetaLogit { .. }))
                .collect();
            prop_assume!(same_family.len() >= 2);
            let g = Grid::new(&same_family);
            prop_assert!(g.is_ok(), "{:?}", g.err());
            let g = g.unwrap();
            let entries: usize = g.arms.iter().map(|a| a.dens.len()).sum();
            prop_assert!(g.n_panels() <= 8_000, "{} panels", g.n_panels());
            prop_assert!(entries <= 1_200_000, "{entries} table entries");
        }
    }
}
