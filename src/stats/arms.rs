//! Decision quantities for k = 2..=64 arms with one control: P(best), expected loss,
//! P(better than control), relative lift, ROPE and harm probabilities.
//!
//! Every quantity is a 1-D integral over one shared grid (see `grid`): with independent
//! posteriors, P(i best) = ∫ f_i Π_{j≠i} F_j and E[max_j θ_j − θ_i] = ∫ F_i (1 − Π_{j≠i} F_j) dθ
//! (E. Miller, "Formulas for Bayesian A/B Testing", 2015, for the k-arm integrals; the loss
//! form from (X − Y)⁺ = ∫ 1{Y < u < X} du). For "lower is better" (defect rates) F and S swap.
//! 1 − Π F_j is accumulated as a sum of positive terms, (1 − PQ) = (1 − P) + P(1 − Q), so a
//! tiny loss never arises as a difference of numbers near 1.
//!
//! Exactly two Gamma arms skip all of this for the one-table route of `pair`
//! (docs/methods.md §10); [`compare_general`] and [`decide_general`] keep the shared grid for
//! every input, as the reference that route is tested and benchmarked against.

use statrs::distribution::{ContinuousCDF, Normal};

use std::cell::OnceCell;

use super::grid::{gauss_rule, logistic, rule, softplus, Grid, Kernel, GL_N, NP};
use super::posterior::tail_levels;
use super::{Beta, Gamma, Interval, StatsError};

/// Largest number of arms `compare` accepts.
pub const MAX_ARMS: usize = 64;

/// The posteriors of all arms of one metric, in input order.
#[derive(Clone, Debug, PartialEq)]
pub enum Arms {
    /// Conversion rates: higher is better.
    Beta(Vec<Beta>),
    /// Defect rates per unit exposure: lower is better.
    Gamma(Vec<Gamma>),
}

impl Arms {
    /// Number of arms.
    pub fn len(&self) -> usize {
        match self {
            Arms::Beta(v) => v.len(),
            Arms::Gamma(v) => v.len(),
        }
    }

    /// True when there are no arms.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Whether a higher rate is the better outcome for this metric.
    pub fn higher_is_better(&self) -> bool {
        matches!(self, Arms::Beta(_))
    }
}

/// Options for [`compare`].
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct CompareOptions {
    /// Index of the control arm.
    pub control: usize,
    /// Probability level of every credible interval (0 < level < 1).
    pub level: f64,
    /// Half-width of the region of practical equivalence on the relative lift: the variant is
    /// practically equivalent when |θ_v/θ_c − 1| < rope.
    pub rope: f64,
    /// Relative margin for harm: a conversion variant harms when θ_v < (1 − m)·θ_c, a defect
    /// variant when θ_v > (1 + m)·θ_c.
    pub harm_margin: f64,
    /// Compute the lift interval (two quantiles of the ratio per variant, the dearest part).
    /// Off, `lift` is `None`; every probability is unchanged bit for bit.
    pub lift_interval: bool,
    /// Compute `prob_practically_equivalent` (two ratio evaluations per variant). Off, it is
    /// `None`.
    pub equivalence: bool,
}

impl Default for CompareOptions {
    fn default() -> Self {
        CompareOptions {
            control: 0,
            level: 0.95,
            rope: 0.01,
            harm_margin: 0.0,
            lift_interval: true,
            equivalence: true,
        }
    }
}

/// Relative lift θ_v/θ_c − 1 of a variant against the control.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Lift {
    /// Posterior mean E[θ_v]·E[1/θ_c] − 1; +∞ when the control's first shape is ≤ 1, where
    /// E[1/θ_c] diverges.
    pub mean: f64,
    /// Equal-tailed credible interval of the lift.
    pub interval: Interval,
}

/// Everything `compare` reports for one arm.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct ArmSummary {
    /// Posterior mean of the rate.
    pub mean: f64,
    /// Posterior standard deviation of the rate.
    pub sd: f64,
    /// Equal-tailed credible interval of the rate.
    pub interval: Interval,
    /// Probability that this arm is the best of all k (sums to 1 over the arms).
    pub prob_best: f64,
    /// Expected regret of shipping this arm, in rate units: E[max_j θ_j − θ_v] for conversion,
    /// E[θ_v − min_j θ_j] for defect rates.
    pub expected_loss: f64,
    /// P(θ_v > θ_c) for conversion, P(θ_v < θ_c) for defect rates; None for the control.
    pub prob_better_than_control: Option<f64>,
    /// Relative lift against the control; None for the control.
    pub lift: Option<Lift>,
    /// P(|θ_v/θ_c − 1| < rope); None for the control.
    pub prob_practically_equivalent: Option<f64>,
    /// P(variant worse than control by more than the harm margin, relative); None for the
    /// control.
    pub prob_harm: Option<f64>,
}

/// The quantities a frequently re-evaluated experiment needs, for one arm (see [`decide`]).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Decision {
    /// Probability that this arm is the best of all k (sums to 1 over the arms).
    pub prob_best: f64,
    /// Expected regret of shipping this arm, in rate units (as in [`ArmSummary`]).
    pub expected_loss: f64,
    /// P(θ_v > θ_c) for conversion, P(θ_v < θ_c) for defect rates; None for the control.
    pub prob_better_than_control: Option<f64>,
}

pub(super) fn check_arms(arms: &Arms, control: usize) -> Result<(), StatsError> {
    let k = arms.len();
    if !(2..=MAX_ARMS).contains(&k) {
        return Err(StatsError::ArmCount(k));
    }
    if control >= k {
        return Err(StatsError::ControlOutOfRange { control, n_arms: k });
    }
    Ok(())
}

/// [`decide`] on the shared grid for every input, never the two-arm fast path: the reference
/// the fast path is tested and benchmarked against.
#[doc(hidden)]
pub fn decide_general(arms: &Arms, control: usize) -> Result<Vec<Decision>, StatsError> {
    check_arms(arms, control)?;
    let k = arms.len();
    let kernels: Vec<Kernel> = match arms {
        Arms::Beta(v) => v.iter().map(Beta::kernel).collect(),
        Arms::Gamma(v) => v.iter().map(Gamma::kernel).collect(),
    };
    let grid = Grid::new(&kernels)?;
    let mut totals = integrate_all(&grid, control, arms.higher_is_better());
    separated_losses(&mut totals, &grid, &means(arms), arms.higher_is_better());
    Ok((0..k)
        .map(|j| Decision {
            prob_best: totals.best[j].clamp(0.0, 1.0),
            expected_loss: totals.loss[j].max(0.0),
            prob_better_than_control: (j != control).then(|| totals.beats[j].clamp(0.0, 1.0)),
        })
        .collect())
}

pub(super) fn check_options(arms: &Arms, opts: &CompareOptions) -> Result<(), StatsError> {
    check_arms(arms, opts.control)?;
    tail_levels(opts.level)?;
    if !opts.rope.is_finite() || opts.rope < 0.0 {
        return Err(StatsError::InvalidMargin {
            name: "rope",
            value: opts.rope,
        });
    }
    if !opts.harm_margin.is_finite() || opts.harm_margin < 0.0 {
        return Err(StatsError::InvalidMargin {
            name: "harm_margin",
            value: opts.harm_margin,
        });
    }
    Ok(())
}

/// [`compare`] on the shared grid and the ratio integrals for every input, never the two-arm
/// fast path: the reference the fast path is tested and benchmarked against.
#[doc(hidden)]
pub fn compare_general(arms: &Arms, opts: &CompareOptions) -> Result<Vec<ArmSummary>, StatsError> {
    compare_shared(arms, opts, Ratios::Compute)
}

/// Whether [`compare_shared`] computes the quantities of the ratio θ_v/θ_c (lift interval,
/// ROPE, harm) by its ratio quadrature or leaves them to the caller.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(super) enum Ratios {
    /// By the ratio quadrature over the shared grid.
    Compute,
    /// Left `None`: the caller has an exact route for each pair (Gamma arms, `pair`).
    Leave,
}

/// Every shared-grid quantity of `compare` (rate intervals, P(best), losses, P(better than
/// control)), and the ratio quantities as `ratios` says.
pub(super) fn compare_shared(
    arms: &Arms,
    opts: &CompareOptions,
    ratios: Ratios,
) -> Result<Vec<ArmSummary>, StatsError> {
    check_options(arms, opts)?;
    let k = arms.len();
    let (lo_q, hi_q) = tail_levels(opts.level)?;
    let higher = arms.higher_is_better();
    let (kernels, moments): (Vec<Kernel>, Vec<(f64, f64, f64)>) = match arms {
        Arms::Beta(v) => (
            v.iter().map(Beta::kernel).collect(),
            v.iter()
                .map(|b| {
                    let inv = if b.alpha() > 1.0 {
                        (b.alpha() + b.beta() - 1.0) / (b.alpha() - 1.0)
                    } else {
                        f64::INFINITY
                    };
                    (b.mean(), b.sd(), inv)
                })
                .collect(),
        ),
        Arms::Gamma(v) => (
            v.iter().map(Gamma::kernel).collect(),
            v.iter()
                .map(|g| {
                    let inv = if g.shape() > 1.0 {
                        g.rate() / (g.shape() - 1.0)
                    } else {
                        f64::INFINITY
                    };
                    (g.mean(), g.sd(), inv)
                })
                .collect(),
        ),
    };
    let grid = Grid::new(&kernels)?;
    let c = opts.control;
    let mut totals = integrate_all(&grid, c, higher);
    separated_losses(&mut totals, &grid, &means(arms), higher);

    let ratios = ratios == Ratios::Compute;
    let log_cumulants = if ratios && opts.lift_interval {
        log_cumulants(&grid, higher)
    } else {
        Vec::new()
    };
    let drop = if opts.lift_interval && lo_q < 1e-6 {
        RATIO_DROP_DEEP
    } else {
        RATIO_DROP
    };
    let outer = OuterCache::new(k, drop);
    let mut out = Vec::with_capacity(k);
    for j in 0..k {
        let kernel = grid.arms[j].kernel;
        let interval = Interval {
            level: opts.level,
            lower: kernel.value(grid.quantile_t(j, lo_q)),
            upper: kernel.value(grid.quantile_t(j, hi_q)),
        };
        let (mean, sd, _) = moments[j];
        let mut summary = ArmSummary {
            mean,
            sd,
            interval,
            prob_best: totals.best[j].clamp(0.0, 1.0),
            expected_loss: totals.loss[j].max(0.0),
            prob_better_than_control: None,
            lift: None,
            prob_practically_equivalent: None,
            prob_harm: None,
        };
        if j != c {
            summary.prob_better_than_control = Some(totals.beats[j].clamp(0.0, 1.0));
            if !ratios {
                out.push(summary);
                continue;
            }
            let ratio = Ratio::new(&grid, &outer, j, c, higher);
            if opts.lift_interval {
                let guess = ratio_guess(&log_cumulants[j], &log_cumulants[c]);
                let lower = ratio.quantile(lo_q, &guess)?;
                let upper = ratio.quantile(hi_q, &guess)?;
                // Quantiles are monotone in the level; where the ratio is 1 to within
                // rounding (identical arms with all mass at x ≈ 1), the two searches may
                // land an ulp or two apart in the wrong order.
                let (lower, upper) = (lower.min(upper), upper.max(lower));
                let lift_mean = if moments[c].2.is_finite() {
                    moments[j].0 * moments[c].2 - 1.0
                } else {
                    f64::INFINITY
                };
                summary.lift = Some(Lift {
                    mean: lift_mean,
                    interval: Interval {
                        level: opts.level,
                        lower: lower.exp_m1(),
                        upper: upper.exp_m1(),
                    },
                });
            }
            if opts.equivalence {
                let rope_hi = ratio.eval(opts.rope.ln_1p(), Tail::Lower, false).tail;
                let rope_lo = if opts.rope < 1.0 {
                    ratio.eval((-opts.rope).ln_1p(), Tail::Lower, false).tail
                } else {
                    0.0
                };
                summary.prob_practically_equivalent = Some((rope_hi - rope_lo).clamp(0.0, 1.0));
            }
            // With no margin, harm is P(θ_v worse than θ_c), which the pass over the shared
            // grid has already integrated (∫ f_v·S_c or ∫ f_v·F_c) more accurately than the
            // ratio quadrature would.
            let harm = if opts.harm_margin == 0.0 {
                totals.worse[j]
            } else if higher {
                if opts.harm_margin < 1.0 {
                    ratio
                        .eval((-opts.harm_margin).ln_1p(), Tail::Lower, false)
                        .tail
                } else {
                    0.0
                }
            } else {
                ratio
                    .eval(opts.harm_margin.ln_1p(), Tail::Upper, false)
                    .tail
            };
            summary.prob_harm = Some(harm.clamp(0.0, 1.0));
        }
        out.push(summary);
    }
    Ok(out)
}

struct Totals {
    best: Vec<f64>,
    loss: Vec<f64>,
    beats: Vec<f64>,
    /// P(θ_j strictly worse than the control): the harm probability at margin 0.
    worse: Vec<f64>,
}

/// One pass over all nodes: P(best), expected loss and P(better than control) for every arm.
fn integrate_all(grid: &Grid, control: usize, higher: bool) -> Totals {
    let k = grid.arms.len();
    let r = rule();
    let jac_kernel = grid.arms[0].kernel;
    let mut totals = Totals {
        best: vec![0.0; k],
        loss: vec![0.0; k],
        beats: vec![0.0; k],
        worse: vec![0.0; k],
    };
    // "good" = P(θ_j below u) for higher-is-better, P(θ_j above u) otherwise; "bad" is its
    // complement, both taken from the tables (never 1 − the other).
    let mut dens = vec![0.0; k];
    let mut good = vec![0.0; k];
    let mut bad = vec![0.0; k];
    let mut pre = vec![0.0; k + 1];
    let mut cpre = vec![0.0; k + 1];
    let mut suf = vec![0.0; k + 1];
    let mut csuf = vec![0.0; k + 1];
    for p in 0..grid.n_panels() {
        let half = 0.5 * (grid.breaks[p + 1] - grid.breaks[p]);
        for i in 0..NP {
            let t = grid.node(p, i);
            let w = half * r.w[i];
            let jac = jac_kernel.jacobian(t);
            for j in 0..k {
                let arm = &grid.arms[j];
                let (g, f, s) = if p < arm.p0 {
                    (0.0, 0.0, 1.0)
                } else if p >= arm.p1 {
                    (0.0, 1.0, 0.0)
                } else {
                    let idx = (p - arm.p0) * NP + i;
                    (arm.dens[idx], arm.cdf[idx], arm.sf[idx])
                };
                dens[j] = g;
                if higher {
                    good[j] = f;
                    bad[j] = s;
                } else {
                    good[j] = s;
                    bad[j] = f;
                }
            }
            pre[0] = 1.0;
            cpre[0] = 0.0;
            for j in 0..k {
                pre[j + 1] = pre[j] * good[j];
                cpre[j + 1] = cpre[j] + pre[j] * bad[j];
            }
            suf[k] = 1.0;
            csuf[k] = 0.0;
            for j in (0..k).rev() {
                suf[j] = suf[j + 1] * good[j];
                csuf[j] = csuf[j + 1] + suf[j + 1] * bad[j];
            }
            for j in 0..k {
                let others = pre[j] * suf[j + 1];
                let not_others = cpre[j] + pre[j] * csuf[j + 1];
                totals.best[j] += w * dens[j] * others;
                totals.loss[j] += w * jac * good[j] * not_others;
                totals.beats[j] += w * dens[j] * good[control];
                totals.worse[j] += w * dens[j] * bad[control];
            }
        }
    }
    totals
}

/// Posterior means in input order (exact closed forms).
fn means(arms: &Arms) -> Vec<f64> {
    match arms {
        Arms::Beta(v) => v.iter().map(Beta::mean).collect(),
        Arms::Gamma(v) => v.iter().map(Gamma::mean).collect(),
    }
}

/// The expected loss of an arm that is certainly not the best, from the identity
/// E[max_j θ_j − θ_i] = E[max_j θ_j] − μ_i = loss_b + (μ_b − μ_i) for any arm b (and
/// E[θ_i − min_j θ_j] = loss_b + (μ_i − μ_b) when lower is better), with b the arm of
/// smallest loss.
///
/// Why: when arm i's window lies wholly on the worse side of b's (the arms are more than
/// ~18 sd apart), the loss integral runs across the whole gap between them, where the
/// quadrature is accurate to ~1e-13 relative but the loss is large; the identity costs
/// nothing and is exact to a few ulps of the means (exact closed forms), plus loss_b, whose
/// integrand is confined to b's side and small. Where windows overlap the integral is kept:
/// there the loss may be tiny and the difference of means would cancel. Both routes are
/// compared where both apply in tests/stats_reference.rs.
fn separated_losses(totals: &mut Totals, grid: &Grid, means: &[f64], higher: bool) {
    let Some(b) = (0..totals.loss.len()).min_by(|&x, &y| totals.loss[x].total_cmp(&totals.loss[y]))
    else {
        return;
    };
    let wb = grid.arms[b].window;
    for i in 0..totals.loss.len() {
        let wi = grid.arms[i].window;
        let separated = if higher { wi.1 < wb.0 } else { wi.0 > wb.1 };
        if i != b && separated {
            let gap = if higher {
                means[b] - means[i]
            } else {
                means[i] - means[b]
            };
            totals.loss[i] = totals.loss[b].max(0.0) + gap;
        }
    }
}

/// First four cumulants of ln θ_j for every arm from the grid (used only to start the lift
/// root search). ln θ is computed once per shared node, and the moments are taken about each
/// arm's ln θ at its mode, so the sums carry no large offsets.
fn log_cumulants(grid: &Grid, beta: bool) -> Vec<[f64; 4]> {
    let n_nodes = grid.n_panels() * NP;
    let mut ln_theta = Vec::with_capacity(n_nodes);
    let mut weight = Vec::with_capacity(n_nodes);
    for p in 0..grid.n_panels() {
        for i in 0..NP {
            let t = grid.node(p, i);
            ln_theta.push(if beta { -softplus(-t) } else { t });
            weight.push(grid.weight(p, i));
        }
    }
    grid.arms
        .iter()
        .map(|arm| {
            let m = arm.kernel.mode();
            let centre = if beta { -softplus(-m) } else { m };
            let base = arm.p0 * NP;
            let mut raw = [0.0f64; 4];
            for (idx, g) in arm.dens.iter().enumerate() {
                let wg = weight[base + idx] * g;
                let d = ln_theta[base + idx] - centre;
                let d2 = d * d;
                raw[0] += wg * d;
                raw[1] += wg * d2;
                raw[2] += wg * d2 * d;
                raw[3] += wg * d2 * d2;
            }
            // Central moments from raw moments about the mode; the mode is within a fraction
            // of an sd of the mean, so the conversion loses at most a digit or two, and these
            // only seed a Newton iteration.
            let mu = raw[0];
            let m2 = raw[1] - mu * mu;
            let m3 = raw[2] - 3.0 * mu * raw[1] + 2.0 * mu * mu * mu;
            let m4 = raw[3] - 4.0 * mu * raw[2] + 6.0 * mu * mu * raw[1] - 3.0 * mu.powi(4);
            [centre + mu, m2, m3, m4 - 3.0 * m2 * m2]
        })
        .collect()
}

/// Cumulants of s = ln θ_v − ln θ_c.
fn ratio_guess(v: &[f64; 4], c: &[f64; 4]) -> [f64; 4] {
    [v[0] - c[0], v[1] + c[1], v[2] - c[2], v[3] + c[3]]
}

/// Panel width of the ratio rule at most this many local sds: a 16-point Gauss–Legendre rule
/// integrates a normal density times a smooth CDF over 4 sds to ~1e-16 (measured against the
/// closed form P(Z₂ ≤ aZ₁ + b) = Φ(b/√(1 + a²))).
const RATIO_WIDTH_SD: f64 = 4.0;
/// Panel width of the ratio rule at most this many e-folds of the outer density, 16/(|ℓ'| + 1):
/// the Gauss–Legendre error bound for e^{cx} on [−1, 1] with c = 8 is ~2e-16 relative.
const RATIO_EFOLDS: f64 = 16.0;
/// Panel width of the ratio rule for conversion rates at most this many logit units where
/// t > −2·`RATIO_MAX_WIDTH`, and at most |t|/2 further left. The logit density, the images
/// τ(t) = logit(ρ·logistic(t)) and the inner CDF at them are analytic except at points with
/// Re t ≥ 0 and Im t = ±π (the poles of the logistic function and the zeros of 1 − ρ·x), so
/// Gauss–Legendre converges like ρ_B^-2n with ρ_B the Bernstein ellipse that reaches them: a
/// panel of width 2 gives ρ_B ≈ 6.6 and ρ_B^-32 ≈ 1e-26, while far to the left the distance
/// to the singularities grows with |t| and so may the panels (small shapes have left tails
/// thousands of logit units long). Measured before this bound: 3e-13 error in the ratio CDF
/// of two Beta(1, 1) arms with 5.7-unit panels.
const RATIO_MAX_WIDTH: f64 = 2.0;
/// Ratio-rule nodes more than this far below the outer arm's peak log density are dropped:
/// e^-36 ≈ 2e-16, and the ratio probabilities are needed to absolute accuracy only.
const RATIO_DROP: f64 = 36.0;
/// The same for lift intervals whose tails are below 1e-6 (levels above 1 − 2e-6): a lift end
/// at level 1 − 1e-10 needs the ratio CDF at 5e-11 to ~1e-18, and dropping below e^-36 cost
/// 1.5e-9 in the lift there (tests/reference/cases.json, "extreme_level").
const RATIO_DROP_DEEP: f64 = 46.0;

/// Beyond this many panels an arm's own ratio rule gives way to its shared-grid nodes.
const MAX_RATIO_PANELS: usize = 256;

/// Which tail of the ratio distribution a caller needs.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Tail {
    /// P(s_R ≤ s).
    Lower,
    /// P(s_R > s).
    Upper,
}

/// A node of the outer arm with everything that does not depend on s precomputed.
struct OuterNode {
    t: f64,
    /// Quadrature weight × density.
    wg: f64,
    /// ln x (conversion only).
    ln_x: f64,
    /// 1 − x (conversion only).
    comp: f64,
}

/// An arm's outer nodes and the largest conversion rate they carry (for the kink test).
struct OuterNodes {
    nodes: Vec<OuterNode>,
    top: f64,
}

/// Outer node sets per arm, built on first use and shared by every variant that needs them
/// (the control is the outer arm of several ratios).
struct OuterCache {
    /// How far below the peak nodes are kept (`RATIO_DROP` or `RATIO_DROP_DEEP`).
    drop: f64,
    /// Each arm's own Gauss–Legendre rule (the usual case).
    gauss: Vec<OnceCell<OuterNodes>>,
    /// Each arm's nodes on the shared Clenshaw–Curtis grid (fallback near the x = 1 kink).
    shared: Vec<OnceCell<OuterNodes>>,
}

impl OuterCache {
    fn new(k: usize, drop: f64) -> OuterCache {
        OuterCache {
            drop,
            gauss: (0..k).map(|_| OnceCell::new()).collect(),
            shared: (0..k).map(|_| OnceCell::new()).collect(),
        }
    }
}

fn outer_node(t: f64, wg: f64, beta: bool) -> OuterNode {
    let (ln_x, comp) = if beta {
        (-softplus(-t), logistic(-t))
    } else {
        (0.0, 0.0)
    };
    OuterNode { t, wg, ln_x, comp }
}

/// Arm j's nodes on the shared grid (CC, panels resolving every arm).
fn shared_nodes(grid: &Grid, j: usize, beta: bool) -> OuterNodes {
    let arm = &grid.arms[j];
    let mut nodes = Vec::with_capacity((arm.p1 - arm.p0) * NP);
    let mut top = 0.0f64;
    for p in arm.p0..arm.p1 {
        for i in 0..NP {
            let wg = grid.weight(p, i) * arm.dens[(p - arm.p0) * NP + i];
            // Dropped nodes carry < 1e-19 each: far below the 1e-15 the sums resolve.
            if wg <= 1e-19 {
                continue;
            }
            let t = grid.node(p, i);
            top = top.max(logistic(t));
            nodes.push(outer_node(t, wg, beta));
        }
    }
    OuterNodes { nodes, top }
}

/// Arm j's own composite Gauss–Legendre rule over its window.
///
/// The outer integrand is the arm's density times the inner arm's CDF at the image, and the
/// inner arm is the wider one, so the outer density sets the resolution. The shared grid is
/// built for CDFs to ~1e-16 *relative* in the tails (expected losses need that) and for the
/// spread of a maximum of k arms; a probability needs neither, and Gauss–Legendre is exact to
/// degree 2n − 1 instead of n, so this rule needs about a quarter of the shared grid's nodes.
fn gauss_nodes(grid: &Grid, j: usize, beta: bool, drop: f64) -> OuterNodes {
    let arm = &grid.arms[j];
    let kernel = arm.kernel;
    let (lo, hi) = arm.window;
    let peak = kernel.log_density(kernel.mode());
    let sd_cap = RATIO_WIDTH_SD * kernel.sd();
    let step = |t: f64| {
        let cap = if beta {
            sd_cap.min(RATIO_MAX_WIDTH.max(-0.5 * t))
        } else {
            sd_cap
        };
        let (slope, curvature) = kernel.slope_curvature(t);
        let by_curvature = if curvature > 0.0 {
            RATIO_WIDTH_SD / curvature.sqrt()
        } else {
            f64::INFINITY
        };
        by_curvature
            .min(RATIO_EFOLDS / (slope.abs() + 1.0))
            .min(cap)
    };
    let gl = gauss_rule();
    let mut nodes = Vec::with_capacity(8 * GL_N);
    let mut top = 0.0f64;
    let mut total = 0.0;
    let mut t = lo;
    let mut guard = 0;
    while t < hi {
        guard += 1;
        // Shapes near 0 spread an arm over 1e5+ logit or log units, and this rule's widths
        // are tied to one unit; the shared grid (panels sized by slope and curvature of every
        // arm, so it also resolves the inner arm) covers such windows with far fewer nodes.
        if guard > MAX_RATIO_PANELS {
            return shared_nodes(grid, j, beta);
        }
        let h = step(t).min(step((t + step(t)).min(hi)));
        let mut next = (t + h).min(hi);
        if hi - next < 0.1 * h {
            next = hi;
        }
        if next <= t {
            break;
        }
        let (mid, half) = (0.5 * (t + next), 0.5 * (next - t));
        for i in 0..GL_N {
            let u = mid + half * gl.x[i];
            let ld = kernel.log_density(u);
            if ld < peak - drop {
                continue;
            }
            let wg = half * gl.w[i] * ld.exp();
            total += wg;
            top = top.max(logistic(u));
            nodes.push(outer_node(u, wg, beta));
        }
        t = next;
    }
    // The kernel's analytic normalization agrees with the quadrature to ~1e-10; renormalize so
    // that the ratio CDF and survival function each sum to exactly the same total mass.
    if total > 0.0 {
        for node in &mut nodes {
            node.wg /= total;
        }
    }
    OuterNodes { nodes, top }
}

/// P(s_R ≤ s) or P(s_R > s), and the density of s_R at s.
#[derive(Clone, Copy, Debug)]
struct RatioValue {
    tail: f64,
    dens: f64,
}

/// The distribution of s = ln(θ_v/θ_c) by quadrature over the narrower arm (in its working
/// variable), with the wider arm's CDF interpolated at the image of each node.
struct Ratio<'a> {
    grid: &'a Grid,
    cache: &'a OuterCache,
    v: usize,
    c: usize,
    beta: bool,
    variant_is_narrower: bool,
}

impl<'a> Ratio<'a> {
    fn new(grid: &'a Grid, cache: &'a OuterCache, v: usize, c: usize, beta: bool) -> Ratio<'a> {
        let variant_is_narrower = grid.arms[v].kernel.sd() <= grid.arms[c].kernel.sd();
        Ratio {
            grid,
            cache,
            v,
            c,
            beta,
            variant_is_narrower,
        }
    }

    fn gauss(&self, j: usize) -> &'a OuterNodes {
        self.cache.gauss[j].get_or_init(|| gauss_nodes(self.grid, j, self.beta, self.cache.drop))
    }

    fn shared(&self, j: usize) -> &'a OuterNodes {
        self.cache.shared[j].get_or_init(|| shared_nodes(self.grid, j, self.beta))
    }

    fn eval(&self, s: f64, want: Tail, with_dens: bool) -> RatioValue {
        // Over the control: θ_v ≤ e^s θ_c ⟺ τ_v ≤ image of t under θ ↦ e^s θ.
        // Over the variant: θ_v ≤ e^s θ_c ⟺ τ_c ≥ image of t under θ ↦ e^-s θ.
        // For conversion rates a map with factor > 1 sends some θ past 1, where the integrand
        // has a kink that quadrature resolves only to O(h²); the other orientation (factor
        // < 1) is smooth, so it is used whenever the narrower arm's nodes would reach the kink.
        // The wider arm then carries the outer integral, and its nodes on the shared grid
        // (which also resolve the narrower arm) are used instead of its own coarser rule.
        let mut over_variant = self.variant_is_narrower;
        let narrower = if over_variant { self.v } else { self.c };
        let mut outer = self.gauss(narrower);
        if self.beta {
            let factor = if over_variant { (-s).exp() } else { s.exp() };
            if factor * outer.top >= 1.0 {
                over_variant = !over_variant;
                outer = self.shared(if over_variant { self.v } else { self.c });
            }
        }
        let inner = if over_variant { self.c } else { self.v };
        // Over the variant, P(s_R ≤ s) collects the inner (control) arm's survival function;
        // over the control it collects the inner (variant) arm's CDF.
        let inner_upper = over_variant != (want == Tail::Upper);
        let shift = if over_variant { -s } else { s };
        let rho = shift.exp();
        let one_minus_rho = -shift.exp_m1();
        let (mut tail, mut dens) = (0.0, 0.0);
        let mut cursor = self.grid.arms[inner].p0;
        for node in &outer.nodes {
            let image = if self.beta {
                let ln_rx = shift + node.ln_x;
                // 1 − ρx as a sum of positive terms when ρ ≤ 1: (1 − ρ) + ρ(1 − x).
                let one_minus = if shift <= 0.0 {
                    one_minus_rho + rho * node.comp
                } else {
                    -ln_rx.exp_m1()
                };
                if ln_rx >= 0.0 || one_minus <= 0.0 {
                    None
                } else {
                    Some((ln_rx - one_minus.ln(), 1.0 / one_minus))
                }
            } else {
                Some((node.t + shift, 1.0))
            };
            match image {
                // The image left the support (a conversion rate above 1): the inner arm is
                // certainly below it.
                None => {
                    if !inner_upper {
                        tail += node.wg;
                    }
                }
                Some((tau, dtau)) => {
                    let (v, g) = self.grid.tail_near(inner, tau, &mut cursor, inner_upper);
                    tail += node.wg * v;
                    if with_dens {
                        dens += node.wg * g * dtau;
                    }
                }
            }
        }
        RatioValue { tail, dens }
    }

    /// The s with P(ln R ≤ s) = q: safeguarded Newton from a Cornish–Fisher start.
    fn quantile(&self, q: f64, cumulants: &[f64; 4]) -> Result<f64, StatsError> {
        let z = Normal::new(0.0, 1.0)
            .map_err(|_| StatsError::Numerical("normal"))?
            .inverse_cdf(q);
        let sd = cumulants[1].max(0.0).sqrt();
        let (skew, kurt) = if sd > 0.0 {
            (
                cumulants[2] / (sd * sd * sd),
                cumulants[3] / (sd * sd * sd * sd),
            )
        } else {
            (0.0, 0.0)
        };
        // Cornish–Fisher expansion to second order (Abramowitz & Stegun 26.2.49).
        let w = z + (z * z - 1.0) * skew / 6.0 + (z * z * z - 3.0 * z) * kurt / 24.0
            - (2.0 * z * z * z - 5.0 * z) * skew * skew / 36.0;
        // The expansion is only valid for moderate skew and kurtosis; an arm with a remote
        // tail (a shape-0.2 control, whose ln x reaches −200 with probability 1e-10) has
        // cumulants in the hundreds or millions, and the corrected start would land far
        // outside the distribution. Then the normal start is the better guess.
        let w = if skew.abs() <= 10.0 && kurt.abs() <= 100.0 {
            w
        } else {
            z
        };
        let mut s = cumulants[0] + sd * w;
        if !s.is_finite() {
            s = cumulants[0];
        }
        let upper_tail = q > 0.5;
        let target = if upper_tail { 1.0 - q } else { q };
        let (mut lo, mut hi) = (f64::NEG_INFINITY, f64::INFINITY);
        let mut step = sd.max(1e-12);
        // Doubling out of a poor start and then bisecting to 1e-14 takes at most ~2·50 steps
        // in double precision; Newton usually finishes in two or three.
        for _ in 0..300 {
            let val = self.eval(s, if upper_tail { Tail::Upper } else { Tail::Lower }, true);
            let h = if upper_tail {
                target - val.tail
            } else {
                val.tail - target
            };
            if h == 0.0 {
                return Ok(s);
            }
            if h < 0.0 {
                lo = s;
            } else {
                hi = s;
            }
            let newton = if val.dens > 0.0 {
                s - h / val.dens
            } else {
                f64::NAN
            };
            // Newton converges quadratically: after a step this small the remaining error is
            // ~1e-14 of the local scale, below what the quadrature resolves, so no confirming
            // evaluation. The local scale is the smaller of the overall sd and the tail's own
            // length, tail / density: with a tiny-shape control the sd of ln R runs into the
            // hundreds while the density near the quantile varies on the narrow arm's scale,
            // and a step of 1e-7 sd then left lift ends 3e-7 off (mpmath audit).
            let local = if val.dens > 0.0 {
                sd.min(target / val.dens)
            } else {
                sd
            };
            if newton.is_finite()
                && newton > lo
                && newton < hi
                && (newton - s).abs() <= 1e-7 * local
            {
                return Ok(newton);
            }
            let next = if newton.is_finite() && newton > lo && newton < hi {
                newton
            } else if lo.is_finite() && hi.is_finite() {
                0.5 * (lo + hi)
            } else {
                step *= 2.0;
                if h < 0.0 {
                    s + step
                } else {
                    s - step
                }
            };
            let moved = (next - s).abs();
            s = next;
            if moved <= 1e-14 * (1.0 + s.abs()) {
                return Ok(s);
            }
            if lo.is_finite() && hi.is_finite() && hi - lo <= 1e-14 * (1.0 + s.abs()) {
                return Ok(s);
            }
        }
        Err(StatsError::Numerical(
            "lift quantile search did not converge",
        ))
    }
}

#[cfg(test)]
mod tests {
    use super::super::decide;
    use super::*;

    /// Loss of every arm by the full integral alone (no identity), for comparison.
    fn integral_losses(arms: &Arms) -> Vec<f64> {
        let kernels: Vec<Kernel> = match arms {
            Arms::Beta(v) => v.iter().map(Beta::kernel).collect(),
            Arms::Gamma(v) => v.iter().map(Gamma::kernel).collect(),
        };
        let grid = Grid::new(&kernels).expect("grid");
        integrate_all(&grid, 0, arms.higher_is_better()).loss
    }

    #[test]
    fn separated_arms_get_the_same_loss_by_identity_and_by_integral() {
        // Where both routes apply (windows disjoint), the identity loss_b + (μ_b − μ_i) and
        // the full integral across the gap must agree far inside the 1e-9 goal; the cases
        // span the audit's families: a dominated conversion arm at 1e4 (mpmath value
        // 0.939859021146828 in tests/reference/cases.json, "sep_dominated_1e4"), three
        // far-apart pages, 1e9 visits at 1% vs 20%, and defect rates 1e13 apart.
        let b = |a: f64, bb: f64| Beta::new(a, bb).unwrap();
        let g = |a: f64, r: f64| Gamma::new(a, r).unwrap();
        let cases = [
            Arms::Beta(vec![b(101.0, 9_900.5), b(9_501.0, 500.5)]),
            Arms::Beta(vec![
                b(501.0, 9_501.0),
                b(2_001.0, 8_001.0),
                b(6_001.0, 4_001.0),
            ]),
            Arms::Beta(vec![b(1e7 + 1.0, 9.9e8 + 1.0), b(2e8 + 1.0, 8e8 + 1.0)]),
            Arms::Gamma(vec![g(11.0, 1e6 + 1.0), g(1e8 + 1.0, 2.0)]),
            Arms::Gamma(vec![g(3.0, 10.0), g(400.0, 10.0), g(90.0, 10.0)]),
        ];
        for arms in cases {
            let by_integral = integral_losses(&arms);
            let got = decide(&arms, 0).unwrap();
            let mut identity_used = false;
            for (j, d) in got.iter().enumerate() {
                let scale = by_integral[j].abs().max(1e-300);
                let rel = (d.expected_loss - by_integral[j]).abs() / scale;
                identity_used |= d.expected_loss != by_integral[j];
                assert!(
                    rel < 1e-11,
                    "{arms:?} arm {j}: identity {} vs integral {} (relative {rel:e})",
                    d.expected_loss,
                    by_integral[j]
                );
            }
            assert!(identity_used, "{arms:?}: the identity should apply");
        }
    }

    #[test]
    fn the_audits_dominated_arm_is_within_1e9_of_mpmath() {
        // tests/reference/cases.json "sep_dominated_1e4": prior Beta(1, 0.5), 100 and 9 500
        // successes of 10 000; mpmath (40 digits) gives 0.939859021146828 for arm 0. Before
        // the panel-width limit the integral gave 0.9398590176815351 (error 3.5e-9).
        let arms = Arms::Beta(vec![
            Beta::new(101.0, 9_900.5).unwrap(),
            Beta::new(9_501.0, 500.5).unwrap(),
        ]);
        let by_integral = integral_losses(&arms);
        let want = 0.939_859_021_146_828;
        assert!((by_integral[0] - want).abs() < 1e-13, "{}", by_integral[0]);
        let got = decide(&arms, 0).unwrap();
        assert!((got[0].expected_loss - want).abs() < 1e-13);
    }
}
