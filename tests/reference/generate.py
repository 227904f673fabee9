#!/usr/bin/env python3
"""Reference values for tests/stats_reference.rs and tests/compare_cli.rs.

Regenerate (from the repository root; needs mpmath >= 1.3, scipy >= 1.11, numpy):

    python3 tests/reference/generate.py > tests/reference/cases.json

Runtime: a few minutes on one core. The Rust tests read the committed cases.json; they never
run Python.

Two kinds of case:
* "mpmath": every quantity by mpmath at 40 significant digits. Integrals run in the logit
  (Beta) or log (Gamma) variable, where densities are smooth even for shapes < 1, by
  composite 24-point Gauss-Legendre on pieces refined by adaptive bisection of each arm's
  window (each arm's density is checked to integrate to 1 within 1e-25), with CDFs from
  mpmath.betainc / mpmath.gammainc.
  Quantiles by mpmath.findroot on those CDFs. Gamma lift quantiles use the exact identity
  lam_v/lam_c = (r_c/r_v) W/(1-W), W ~ Beta(a_v, a_c).
* "gamma2": two Gamma arms by closed forms only, at 60 digits (no quadrature at all), for
  shapes so small that the quadrature above does not finish (Gamma(1e-4, r): its log-density
  window spans ~1e5 units of ln(lambda), and the bisection to 1e-30 never ends). With
  X = r_i lam_i ~ Gamma(a_i, 1) independent, W = X_i/(X_i + X_j) ~ Beta(a_i, a_j), so
  P(lam_i < c lam_j) = I_{c r_i/(r_j + c r_i)}(a_i, a_j) (../shared/METHODS.md section 1.2);
  expected losses by the identity of METHODS section 1.3,
  E[(lam_i - lam_j)+] = (a_i/r_i) P(lam_i+ > lam_j) - (a_j/r_j) P(lam_i > lam_j+), whose
  cancellation 60 digits absorb; quantiles by bisection in ln(x) (no derivative, so flat
  tails e^-16000 below the mean are no obstacle). Upper tails are taken as
  betainc(a, b, x, 1), never 1 - lower.
* "scipy": shapes of 1e5 and more (mpmath.betainc's hypergeometric series stops converging
  there, and exact binomial sums take too long at 40 digits). Double
  precision: scipy.special.betainc/betaincc (Boost, ~1e-12 relative at these sizes, cf.
  ../shared/METHODS.md section 1.5 point 3) inside 4000-node composite Gauss-Legendre over
  mean +- 14 sd. Expected accuracy ~1e-11 absolute, well inside the 1e-9 tolerance.

The case data are invented scenarios (a bakery, a mobile app, a factory) and were fixed before
the Rust code was tuned; none of them is a row of METHODS.md.
"""
import json
import sys

import mpmath as mp
import numpy as np
from scipy import special, stats, optimize

mp.mp.dps = 40


# ---------------------------------------------------------------- case definitions
def conv(id_, story, prior, data, control=0, level=0.95, rope=0.01, harm=0.0, kind="mpmath"):
    arms = [(prior[0] + s, prior[1] + n - s) for (n, s) in data]
    return dict(id=id_, story=story, metric="conversion", prior=list(prior),
                variants=[dict(trials=n, successes=s) for (n, s) in data],
                params=[list(map(float, a)) for a in arms], control=control, level=level,
                rope=rope, harm_margin=harm, kind=kind)


def defect(id_, story, prior, data, control=0, level=0.95, rope=0.01, harm=0.0, kind="mpmath"):
    arms = [(prior[0] + c, prior[1] + e) for (c, e) in data]
    return dict(id=id_, story=story, metric="defect_rate", prior=list(prior),
                variants=[dict(count=c, exposure=e) for (c, e) in data],
                params=[list(map(float, a)) for a in arms], control=control, level=level,
                rope=rope, harm_margin=harm, kind=kind)


CASES = [
    conv("bakery_banner_3", "bakery web shop: croissant banner, two new designs",
         (1, 1), [(530, 48), (512, 61), (547, 55)]),
    conv("app_onboarding_4", "mobile app onboarding: four flows, informative prior",
         (2, 20), [(2000, 211), (2010, 236), (1990, 198), (2005, 250)], control=0,
         level=0.9, rope=0.05, harm=0.02),
    conv("no_data_yet", "two arms before any traffic", (1, 1), [(0, 0), (0, 0)]),
    conv("all_or_nothing", "Jeffreys prior, s = 0, s = n and s = n/2",
         (0.5, 0.5), [(50, 25), (50, 0), (50, 50)], control=0, level=0.99),
    conv("tiny_prior", "prior Beta(1e-3, 1e-3), rare conversions", (1e-3, 1e-3),
         [(40, 3), (40, 0)]),
    conv("huge_prior", "prior worth 1e7 trials dominates", (1e6, 9e6),
         [(1000, 120), (1000, 100)], harm=0.01, kind="scipy"),
    conv("far_apart", "non-overlapping posteriors", (1, 1), [(1000, 100), (1000, 300)]),
    conv("app_checkout_2_1e5", "checkout button colour, 1e5 per arm", (1, 1),
         [(100000, 3105), (100000, 3190)], rope=0.02, kind="scipy"),
    defect("factory_welds_3", "factory: weld defects per 1k parts on three lines",
           (1, 1), [(12, 30.5), (7, 29.0), (15, 31.2)]),
    defect("few_events", "crashes per 1k sessions, almost no events", (0.5, 0.1),
           [(0, 5.0), (2, 4.0)], harm=0.1),
    defect("defects_far_apart", "non-overlapping defect rates", (1, 1),
           [(500, 100.0), (100, 100.0)]),
    conv("app_4arms_1e8", "app notification test, 1e8 per arm", (1, 1),
         [(100_000_000, 1_000_000), (100_000_000, 1_000_400), (100_000_000, 999_000),
          (100_000_000, 1_000_900)], kind="scipy"),
    conv("shop_2arms_1e9", "shop-wide price display, 1e9 per arm", (1, 1),
         [(1_000_000_000, 20_000_000), (1_000_000_000, 20_004_000)], kind="scipy"),
    defect("factory_1e6_events", "sensor faults on 1e9 readings (exposure in 1k)", (1, 1),
           [(1_000_000, 1e6), (999_000, 1e6), (1_001_500, 1e6)], kind="scipy"),
    # ---- families added for the edge audit (well-separated arms, tiny shapes, huge
    # exposures, extreme interval levels); fixed before the Rust code was re-tuned.
    conv("sep_dominated_1e4", "newsletter sign-up: a broken form against a working one",
         (1, 0.5), [(10_000, 100), (10_000, 9_500)]),
    conv("sep_three_1e4", "three landing pages, each far from the others", (1, 1),
         [(10_000, 500), (10_000, 2_000), (10_000, 6_000)], control=1, kind="scipy"),
    conv("sep_1e9", "ticket shop: 1e9 visits per arm, 1% against 20% checkout", (1, 1),
         [(1_000_000_000, 10_000_000), (1_000_000_000, 200_000_000)], kind="scipy"),
    defect("sep_exposure_1e9", "sensor faults: 10 per 1e9 readings against 1e8 per 1e3 "
           "(exposure in 1k)", (1, 1), [(10, 1e6), (100_000_000, 1.0)], kind="scipy"),
    defect("exposure_1e12", "ad impressions: 1e9 faults in 1e12 renders (exposure in 1k)",
           (1, 1), [(1_000_000_000, 1e9), (1_000_030_000, 1e9)], kind="scipy"),
    conv("tiny_prior_zero_successes", "prior Beta(1e-4, 1e-4), no conversions yet in one arm",
         (1e-4, 1e-4), [(40, 0), (40, 3)], control=1),
    conv("tiny_prior_all_successes", "prior Beta(1e-4, 1e-4), every unit converted in one arm",
         (1e-4, 1e-4), [(30, 30), (30, 27)], control=1),
    conv("tiny_prior_no_data", "prior Beta(2e-4, 2e-4) before any traffic", (2e-4, 2e-4),
         [(0, 0), (0, 0)]),
    defect("tiny_prior_no_defects", "prior Gamma(1e-4, 1): no crash yet in one arm", (1e-4, 1),
           [(0, 10.0), (5, 10.0)], control=1, kind="gamma2"),
    conv("extreme_level", "bakery banner at interval level 1 - 1e-10", (1, 1),
         [(530, 48), (512, 61)], level=0.9999999999),
]


# ---------------------------------------------------------------- mpmath, 40 digits
# Integrals run in the variable t = logit(x) (Beta) or t = ln(lambda) (Gamma), where every
# density is smooth even for shapes < 1, with composite 24-point Gauss-Legendre on 10 equal
# pieces of each arm's window (log density within 60 of its peak), pieces of all arms merged.
_GL = mp.calculus.quadrature.GaussLegendre(mp.mp)
_NODES = None


def gl_nodes():
    global _NODES
    if _NODES is None:
        # degree 3 of mpmath's Gauss-Legendre tables = 3*2^(3-1) = 12 ... use degree 4: 24 nodes.
        _NODES = _GL.calc_nodes(4, mp.mp.prec)
    return _NODES


class MpArm:
    def __init__(self, metric, a, b):
        self.beta = metric == "conversion"
        self.a, self.b = mp.mpf(a), mp.mpf(b)
        if self.beta:
            n = self.a + self.b
            self.mean = self.a / n
            self.sd = mp.sqrt(self.a * self.b / (n * n * (n + 1)))
            self.lognorm = mp.log(mp.beta(self.a, self.b))
            self.mode_t = mp.log(self.a / self.b)
        else:
            self.mean = self.a / self.b
            self.sd = mp.sqrt(self.a) / self.b
            self.lognorm = mp.loggamma(self.a) - self.a * mp.log(self.b)
            self.mode_t = mp.log(self.a / self.b)
        self.window = self._window()

    def x(self, t):
        return 1 / (1 + mp.exp(-t)) if self.beta else mp.exp(t)

    def jac(self, t):
        x = self.x(t)
        return x / (1 + mp.exp(t)) if self.beta else x

    def log_g(self, t):
        """ln density of t."""
        if self.beta:
            return self.a * t - (self.a + self.b) * mp.log1p(mp.exp(t)) - self.lognorm
        return self.a * t - self.b * mp.exp(t) - self.lognorm

    def g(self, t):
        return mp.exp(self.log_g(t))

    def _window(self):
        peak = self.log_g(self.mode_t)
        ends = []
        for sgn in (-1, 1):
            step = mp.mpf(1) / mp.sqrt(self.a) if not self.beta else mp.sqrt(1 / self.a + 1 / self.b)
            hi = self.mode_t + sgn * step
            while self.log_g(hi) > peak - 60:
                step *= 2
                hi = self.mode_t + sgn * step
            lo = self.mode_t
            for _ in range(60):
                mid = (lo + hi) / 2
                if self.log_g(mid) > peak - 60:
                    lo = mid
                else:
                    hi = mid
            ends.append(hi)
        return ends[0], ends[1]

    def cdf_t(self, t):
        x = self.x(t)
        if self.beta:
            if t > 0:
                # Right of the middle 1 - x = 1/(1 + e^t) directly: at t = 1e5 (shapes
                # 1e-4), x itself rounds to 1 even at 40 digits.
                return 1 - mp.betainc(self.b, self.a, 0, 1 / (1 + mp.exp(t)), regularized=True)
            return mp.betainc(self.a, self.b, 0, x, regularized=True)
        return mp.gammainc(self.a, 0, self.b * x, regularized=True)

    def sf_t(self, t):
        x = self.x(t)
        if self.beta:
            if t > 0:
                return mp.betainc(self.b, self.a, 0, 1 / (1 + mp.exp(t)), regularized=True)
            return mp.betainc(self.a, self.b, x, 1, regularized=True)
        return mp.gammainc(self.a, self.b * x, mp.inf, regularized=True)

    def quantile(self, q):
        q = mp.mpf(q)
        f = (lambda t: self.cdf_t(t) - q) if q < 0.5 else (lambda t: (1 - q) - self.sf_t(t))
        lo, hi = self.window
        for _ in range(60):
            mid = (lo + hi) / 2
            if f(mid) < 0:
                lo = mid
            else:
                hi = mid
        try:
            return self.x(mp.findroot(f, (lo, hi), solver="anderson", tol=mp.mpf(10) ** -35))
        except (ZeroDivisionError, ValueError):
            # Tiny shapes: f is flat to working precision over the bracket (the quantile is
            # e^-1000 or so); finish by bisection, which needs no slope.
            for _ in range(200):
                mid = (lo + hi) / 2
                if f(mid) < 0:
                    lo = mid
                else:
                    hi = mid
            return self.x((lo + hi) / 2)


def _gl(f, a, b):
    h = (b - a) / 2
    return h * mp.fsum(w * f(a + h * (x + 1)) for x, w in gl_nodes())


def _pieces(arm, a, b, depth=0):
    """Adaptive bisection until 24-point Gauss-Legendre on [a, b] agrees with the sum over its
    halves to 1e-30 absolute: resolves skewed shoulders and long flat tails alike."""
    m = (a + b) / 2
    whole, halves = _gl(arm.g, a, b), _gl(arm.g, a, m) + _gl(arm.g, m, b)
    if abs(whole - halves) < mp.mpf(10) ** -30 or depth > 40:
        return [a, b]
    return _pieces(arm, a, m, depth + 1)[:-1] + _pieces(arm, m, b, depth + 1)


def nodes_for(arms):
    pts = set()
    for arm in arms:
        if not hasattr(arm, "_breaks"):
            lo, hi = arm.window
            # Start from pieces of ~1.5 sd so that a narrow peak cannot hide between nodes.
            sd_t = mp.sqrt(1 / arm.a + 1 / arm.b) if arm.beta else 1 / mp.sqrt(arm.a)
            n = max(10, min(200, int(mp.ceil((hi - lo) / (1.5 * sd_t)))))
            start = [lo + (hi - lo) * i / n for i in range(n + 1)]
            breaks = []
            for x0, x1 in zip(start[:-1], start[1:]):
                breaks += _pieces(arm, x0, x1)[:-1]
            arm._breaks = breaks + [hi]
        pts.update(arm._breaks)
    pts = sorted(pts)
    out = []
    for a, b in zip(pts[:-1], pts[1:]):
        h = (b - a) / 2
        for x, w in gl_nodes():
            out.append((a + h * (x + 1), h * w))
    return out


def mp_case(case):
    arms = [MpArm(case["metric"], a, b) for a, b in case["params"]]
    higher = case["metric"] == "conversion"
    k, c = len(arms), case["control"]
    nodes = nodes_for(arms)
    for arm in arms:
        mass = mp.fsum(w * arm.g(t) for t, w in nodes_for([arm]))
        assert abs(mass - 1) < mp.mpf(10) ** -25, (case["id"], mass)
    tab = []
    for t, w in nodes:
        F = [arm.cdf_t(t) for arm in arms]
        S = [arm.sf_t(t) for arm in arms]
        G = F if higher else S
        B = S if higher else F
        tab.append((t, w, [arm.g(t) for arm in arms], G, B, arms[0].jac(t)))
    out = dict(prob_best=[], expected_loss=[], prob_better_than_control=[], interval=[],
               lift_mean=[], lift_interval=[], prob_practically_equivalent=[], prob_harm=[])
    level = mp.mpf(case["level"])
    for i, arm in enumerate(arms):
        pb, loss, beats = mp.mpf(0), mp.mpf(0), mp.mpf(0)
        for t, w, g, G, B, jac in tab:
            others = mp.fprod(G[j] for j in range(k) if j != i)
            # 1 - prod G_j as a sum of positive terms.
            not_others, run = mp.mpf(0), mp.mpf(1)
            for j in range(k):
                if j != i:
                    not_others += run * B[j]
                    run *= G[j]
            pb += w * g[i] * others
            loss += w * jac * G[i] * not_others
            beats += w * g[i] * G[c]
        out["prob_best"].append(pb)
        out["expected_loss"].append(loss)
        out["interval"].append([arm.quantile((1 - level) / 2), arm.quantile((1 + level) / 2)])
        if i == c:
            for key in ("prob_better_than_control", "lift_mean", "lift_interval",
                        "prob_practically_equivalent", "prob_harm"):
                out[key].append(None)
            continue
        ctrl = arms[c]
        out["prob_better_than_control"].append(beats)
        inv = ((ctrl.a + ctrl.b - 1) / (ctrl.a - 1) if higher else ctrl.b / (ctrl.a - 1)) \
            if ctrl.a > 1 else None
        out["lift_mean"].append(arm.mean * inv - 1 if inv is not None else None)
        ratio_cdf = make_ratio_cdf(arm, ctrl, higher)
        lo_q, hi_q = (1 - level) / 2, (1 + level) / 2
        out["lift_interval"].append([ratio_quantile(ratio_cdf, lo_q, arm, ctrl) - 1,
                                     ratio_quantile(ratio_cdf, hi_q, arm, ctrl) - 1])
        rope, harm = mp.mpf(case["rope"]), mp.mpf(case["harm_margin"])
        lower = ratio_cdf(1 - rope) if rope < 1 else mp.mpf(0)
        out["prob_practically_equivalent"].append(ratio_cdf(1 + rope) - lower)
        out["prob_harm"].append(ratio_cdf(1 - harm) if higher else 1 - ratio_cdf(1 + harm))
    return out


def make_ratio_cdf(v, c, higher):
    """P(theta_v / theta_c <= rho)."""
    if not higher:
        # Exact: P(lam_v <= rho lam_c) = I_{rho r_v / (r_c + rho r_v)}(a_v, a_c).
        def cdf(rho):
            x = rho * v.b / (c.b + rho * v.b)
            return mp.betainc(v.a, c.a, 0, x, regularized=True)
        return cdf
    # For rho > 1, rho*x_c can pass 1 and the integrand has a kink that Gauss-Legendre does not
    # resolve; P(x_v <= rho x_c) = 1 - P(x_c < x_v/rho) over the variant's nodes is smooth.
    nodes_c = [(c.x(t), w * c.g(t)) for t, w in nodes_for([c])]
    nodes_v = [(v.x(t), w * v.g(t)) for t, w in nodes_for([v])]

    def cdf(rho):
        if rho == 1:
            # P(x_v <= x_c) in the logit variable itself: with shapes ~1e-4 much of the mass
            # has 1 - x below 1e-40, where x rounds to 1 and F_v(x) would read 1.
            return mp.fsum(w * c.g(t) * v.cdf_t(t) for t, w in nodes_for([c, v]))
        if rho <= 1:
            return mp.fsum(w * mp.betainc(v.a, v.b, 0, rho * x, regularized=True) for x, w in nodes_c)
        return 1 - mp.fsum(w * mp.betainc(c.a, c.b, 0, x / rho, regularized=True) for x, w in nodes_v)
    return cdf


def ratio_quantile(cdf, q, v, c):
    """Root in ln(rho) by a bracketing method: robust even when the quantile is
    astronomically small (shape 1e-3 posteriors put it near 1e-1600)."""
    mu = mp.log(v.mean / c.mean)
    sd = mp.sqrt((v.sd / v.mean) ** 2 + (c.sd / c.mean) ** 2)
    z = mp.sqrt(2) * mp.erfinv(2 * q - 1)
    lo, hi = mu + z * sd - sd, mu + z * sd + sd
    step = sd
    while cdf(mp.exp(lo)) > q:
        step *= 4
        lo -= step
    step = sd
    while cdf(mp.exp(hi)) < q:
        step *= 4
        hi += step
    # Illinois regula falsi on the bracket: superlinear, and never leaves the bracket.
    f_lo, f_hi = cdf(mp.exp(lo)) - q, cdf(mp.exp(hi)) - q
    side = 0
    for _ in range(200):
        x = hi - f_hi * (hi - lo) / (f_hi - f_lo)
        f_x = cdf(mp.exp(x)) - q
        if abs(f_x) < mp.mpf(10) ** -32 or hi - lo < mp.mpf(10) ** -25 * (1 + abs(x)):
            return mp.exp(x)
        if f_x > 0:
            hi, f_hi = x, f_x
            if side == 1:
                f_lo /= 2
            side = 1
        else:
            lo, f_lo = x, f_x
            if side == -1:
                f_hi /= 2
            side = -1
    return mp.exp((lo + hi) / 2)


# ---------------------------------------------------------------- scipy, double precision
def sp_case(case):
    higher = case["metric"] == "conversion"
    P = [(float(a), float(b)) for a, b in case["params"]]
    if higher:
        mean = [a / (a + b) for a, b in P]
        sd = [np.sqrt(a * b / ((a + b) ** 2 * (a + b + 1))) for a, b in P]
        pdf = [stats.beta(a, b).pdf for a, b in P]
        cdf = [lambda x, a=a, b=b: special.betainc(a, b, x) for a, b in P]
        sf = [lambda x, a=a, b=b: special.betaincc(a, b, x) for a, b in P]
    else:
        mean = [a / r for a, r in P]
        sd = [np.sqrt(a) / r for a, r in P]
        pdf = [stats.gamma(a, scale=1 / r).pdf for a, r in P]
        cdf = [lambda x, a=a, r=r: special.gammainc(a, r * x) for a, r in P]
        sf = [lambda x, a=a, r=r: special.gammaincc(a, r * x) for a, r in P]
    # Pieces where the mass is: 40 pieces over each arm's mean +- 14 sd, merged where the
    # windows overlap, and 10 pieces over each gap between windows (where the loss integrand
    # is a product of CDFs equal to 0 or 1 to double precision, so GL is exact there).
    wins = sorted((max(m - 14 * s, 0.0), m + 14 * s) for m, s in zip(mean, sd))
    merged = [list(wins[0])]
    for a, b in wins[1:]:
        if a <= merged[-1][1]:
            merged[-1][1] = max(merged[-1][1], b)
        else:
            merged.append([a, b])
    pieces = []
    for idx, (a, b) in enumerate(merged):
        if idx > 0:
            pieces.append(np.linspace(merged[idx - 1][1], a, 11)[:-1])
        n_here = 40 * sum(1 for lo_, hi_ in wins if lo_ >= a and hi_ <= b)
        pieces.append(np.linspace(a, b, n_here + 1)[:-1])
    edges = np.concatenate(pieces + [np.array([merged[-1][1]])])
    z, w = np.polynomial.legendre.leggauss(100)
    xs = np.concatenate([0.5 * (b - a) * z + 0.5 * (a + b) for a, b in zip(edges[:-1], edges[1:])])
    ws = np.concatenate([0.5 * (b - a) * w for a, b in zip(edges[:-1], edges[1:])])
    k, c = len(P), case["control"]
    # scipy's pdf forms ln f from terms of size ~a (lgamma, a*ln r, r*x), so at shapes ~1e9
    # each value carries ~1e-6 relative noise (METHODS 1.5 point 2), enough to move P(better)
    # by 1e-9. Use the deviance from the mode instead, whose linear terms cancel exactly:
    # ln f(x) - ln f(m) = (a-1)[log1p(d1) - d1] + (b-1)[log1p(d2) - d2] (Beta) or
    # (a-1)[log1p(d) - d] (Gamma), then normalize each density on the grid.
    def stable_pdf(a, b):
        if higher:
            m = (a - 1) / (a + b - 2) if a > 1 and b > 1 else a / (a + b)

            def f(x):
                x = np.asarray(x, dtype=float)
                with np.errstate(divide="ignore", invalid="ignore"):
                    d1, d2 = x / m - 1, (1 - x) / (1 - m) - 1
                    v = np.exp((a - 1) * (np.log1p(d1) - d1) + (b - 1) * (np.log1p(d2) - d2))
                return np.where((x > 0) & (x < 1), v, 0.0)
            return f
        m = (a - 1) / b if a > 1 else a / b

        def f(x):
            x = np.asarray(x, dtype=float)
            with np.errstate(divide="ignore", invalid="ignore"):
                d = x / m - 1
                v = np.exp((a - 1) * (np.log1p(d) - d))
            return np.where(x > 0, v, 0.0)
        return f
    if all(a > 1 and (b > 1 or not higher) for a, b in P):
        pdf = [stable_pdf(a, b) for a, b in P]
    raw_pdf = pdf
    Z = [float(np.sum(ws * raw_pdf[j](xs))) for j in range(k)]
    pdf = [lambda x, j=j: raw_pdf[j](x) / Z[j] for j in range(k)]
    G = [cdf[j](xs) if higher else sf[j](xs) for j in range(k)]
    B = [sf[j](xs) if higher else cdf[j](xs) for j in range(k)]
    out = dict(prob_best=[], expected_loss=[], prob_better_than_control=[], interval=[],
               lift_mean=[], lift_interval=[], prob_practically_equivalent=[], prob_harm=[])
    level = case["level"]
    for i in range(k):
        others = np.prod([G[j] for j in range(k) if j != i], axis=0)
        # 1 - prod G_j from the complements, as a sum of positive terms.
        not_others = np.zeros_like(xs)
        run = np.ones_like(xs)
        for j in range(k):
            if j != i:
                not_others = not_others + run * B[j]
                run = run * G[j]
        out["prob_best"].append(float(np.sum(ws * pdf[i](xs) * others)))
        out["expected_loss"].append(float(np.sum(ws * G[i] * not_others)))
        if higher:
            q = stats.beta(*P[i]).ppf([(1 - level) / 2, (1 + level) / 2])
        else:
            q = stats.gamma(P[i][0], scale=1 / P[i][1]).ppf([(1 - level) / 2, (1 + level) / 2])
        out["interval"].append([float(q[0]), float(q[1])])
        if i == c:
            for key in ("prob_better_than_control", "lift_mean", "lift_interval",
                        "prob_practically_equivalent", "prob_harm"):
                out[key].append(None)
            continue
        if higher:
            out["prob_better_than_control"].append(float(np.sum(ws * pdf[i](xs) * G[c])))
        else:
            # Exact (METHODS 1.2): P(lam_i < lam_c) = I_{r_i/(r_c + r_i)}(a_i, a_c).
            out["prob_better_than_control"].append(
                float(special.betainc(P[i][0], P[c][0], P[i][1] / (P[c][1] + P[i][1]))))
        ac, bc = P[c]
        inv = (ac + bc - 1) / (ac - 1) if higher else bc / (ac - 1)
        out["lift_mean"].append(mean[i] * inv - 1)
        # Ratio CDF over the control's own window.
        zc, wc = np.polynomial.legendre.leggauss(200)
        xc = mean[c] + 12 * sd[c] * zc
        wcc = 12 * sd[c] * wc * raw_pdf[c](xc)
        wcc = wcc / np.sum(wcc)
        zv, wv = np.polynomial.legendre.leggauss(200)
        xv = mean[i] + 12 * sd[i] * zv
        wvv = 12 * sd[i] * wv * raw_pdf[i](xv)
        wvv = wvv / np.sum(wvv)
        if higher:
            # rho > 1 is integrated over the variant so that rho*x never passes 1 (no kink).
            rcdf = lambda rho: (float(np.sum(wcc * cdf[i](rho * xc))) if rho <= 1
                                else 1.0 - float(np.sum(wvv * cdf[c](xv / rho))))
        else:
            # Exact (METHODS 1.2): P(lam_v <= rho lam_c) = I_{rho r_v/(r_c + rho r_v)}(a_v, a_c).
            av, rv, ac_, rc = P[i][0], P[i][1], P[c][0], P[c][1]
            rcdf = lambda rho: float(special.betainc(av, ac_, rho * rv / (rc + rho * rv)))
            rsf = lambda rho: float(special.betaincc(av, ac_, rho * rv / (rc + rho * rv)))
        mu = np.log(mean[i] / mean[c]); s = np.hypot(sd[i] / mean[i], sd[c] / mean[c])
        qs = []
        for qq in ((1 - level) / 2, (1 + level) / 2):
            if not higher:
                # Exact (METHODS 1.2): lam_v/lam_c = (r_c/r_v) W/(1-W), W ~ Beta(a_v, a_c).
                wq = special.betaincinv(P[i][0], P[c][0], qq)
                qs.append((P[c][1] / P[i][1]) * wq / (1 - wq) - 1)
                continue
            qs.append(optimize.brentq(lambda r: rcdf(r) - qq, np.exp(mu - 10 * s),
                                      np.exp(mu + 10 * s), xtol=1e-15, rtol=1e-15) - 1)
        out["lift_interval"].append(qs)
        rope, harm = case["rope"], case["harm_margin"]
        out["prob_practically_equivalent"].append(rcdf(1 + rope) - rcdf(1 - rope))
        out["prob_harm"].append(rcdf(1 - harm) if higher else rsf(1 + harm))
    if not higher and k == 2:
        # Two Gamma arms: the loss in closed form (METHODS 1.3, E[(l_A - l_B)+] =
        # mu_A P(l_A+ > l_B) - mu_B P(l_A > l_B+), each P an incomplete beta by 1.2), Boost's
        # ibeta ~1e-15 relative: more accurate here than quadrature over gammainc values at
        # shapes 1e9 (which differed by 1.6e-11 in "exposure_1e12").
        for i in range(2):
            j = 1 - i
            (ai, ri), (aj, rj) = P[i], P[j]
            x = rj / (ri + rj)
            out["expected_loss"][i] = float(
                (ai / ri) * special.betainc(aj, ai + 1, x) - (aj / rj) * special.betainc(aj + 1, ai, x))
    # Arms whose +-14 sd windows lie wholly below the best arm's: the loss integral runs
    # across the whole gap; E[max - theta_i] = loss_b + (mu_b - mu_i) exactly, with the means
    # in exact rational arithmetic (mpmath), is the more accurate reference there.
    b = int(np.argmin(out["expected_loss"]))
    for i in range(k):
        sep = (mean[i] + 14 * sd[i] < mean[b] - 14 * sd[b]) if higher else \
            (mean[i] - 14 * sd[i] > mean[b] + 14 * sd[b])
        if i != b and sep:
            mp_mean = [mp.mpf(a) / (mp.mpf(a) + mp.mpf(bb)) if higher else mp.mpf(a) / mp.mpf(bb)
                       for a, bb in case["params"]]
            gap = mp_mean[b] - mp_mean[i] if higher else mp_mean[i] - mp_mean[b]
            out["expected_loss"][i] = float(gap + mp.mpf(out["expected_loss"][b]))
    return out


# ---------------------------------------------------------------- two Gamma arms, closed forms
def _bisect_log(f, lo, hi, iters=400):
    """Root of an increasing f on [e^lo, e^hi] by bisection in ln(x)."""
    lo, hi = mp.mpf(lo), mp.mpf(hi)
    for _ in range(iters):
        mid = (lo + hi) / 2
        if f(mp.exp(mid)) < 0:
            lo = mid
        else:
            hi = mid
        if hi - lo < mp.mpf(10) ** -45 * max(1, abs(lo)):
            break
    return mp.exp((lo + hi) / 2)


def gamma2_case(case):
    assert case["metric"] == "defect_rate" and len(case["params"]) == 2
    with mp.workdps(60):
        (a0, r0), (a1, r1) = [(mp.mpf(a), mp.mpf(b)) for a, b in case["params"]]
        a, r = [a0, a1], [r0, r1]
        c = case["control"]

        def below(i, j, cc, ai=None, aj=None):
            """P(lam_i < cc lam_j), lam_i ~ Gamma(ai, r_i), lam_j ~ Gamma(aj, r_j)."""
            ai = a[i] if ai is None else ai
            aj = a[j] if aj is None else aj
            x = cc * r[i] / (r[j] + cc * r[i])
            return mp.betainc(ai, aj, 0, x, regularized=True)

        def above(i, j, cc, ai=None, aj=None):
            """P(lam_i > cc lam_j), directly from the upper tail."""
            ai = a[i] if ai is None else ai
            aj = a[j] if aj is None else aj
            x = cc * r[i] / (r[j] + cc * r[i])
            return mp.betainc(ai, aj, x, 1, regularized=True)

        out = dict(prob_best=[], expected_loss=[], prob_better_than_control=[], interval=[],
                   lift_mean=[], lift_interval=[], prob_practically_equivalent=[],
                   prob_harm=[])
        level = mp.mpf(case["level"])
        lo_q, hi_q = (1 - level) / 2, (1 + level) / 2
        for i in range(2):
            j = 1 - i
            out["prob_best"].append(below(i, j, 1))
            loss = (a[i] / r[i]) * above(i, j, 1, ai=a[i] + 1) \
                - (a[j] / r[j]) * above(i, j, 1, aj=a[j] + 1)
            out["expected_loss"].append(loss)

            def cdf(x, i=i):
                return mp.gammainc(a[i], 0, r[i] * x, regularized=True)

            def sf(x, i=i):
                return mp.gammainc(a[i], r[i] * x, mp.inf, regularized=True)

            ends = []
            for q in (lo_q, hi_q):
                f = (lambda x, q=q: cdf(x) - q) if q < 0.5 else (lambda x, q=q: (1 - q) - sf(x))
                ends.append(_bisect_log(f, -10 ** 6, 50))
            out["interval"].append(ends)
            if i == c:
                for key in ("prob_better_than_control", "lift_mean", "lift_interval",
                            "prob_practically_equivalent", "prob_harm"):
                    out[key].append(None)
                continue
            out["prob_better_than_control"].append(below(i, c, 1))
            inv = r[c] / (a[c] - 1) if a[c] > 1 else None
            out["lift_mean"].append(a[i] / r[i] * inv - 1 if inv is not None else None)
            # lam_i/lam_c = (r_c/r_i) W/(1-W), W ~ Beta(a_i, a_c): quantiles of W by bisection
            # in ln(W/(1-W)).
            lift = []
            for q in (lo_q, hi_q):
                def f(odds, q=q):
                    w = odds / (1 + odds)
                    if q < 0.5:
                        return mp.betainc(a[i], a[c], 0, w, regularized=True) - q
                    return (1 - q) - mp.betainc(a[i], a[c], w, 1, regularized=True)
                odds = _bisect_log(f, -10 ** 6, 10 ** 4)
                lift.append(r[c] / r[i] * odds - 1)
            out["lift_interval"].append(lift)
            rope, harm = mp.mpf(case["rope"]), mp.mpf(case["harm_margin"])
            lower = below(i, c, 1 - rope) if rope < 1 else mp.mpf(0)
            out["prob_practically_equivalent"].append(below(i, c, 1 + rope) - lower)
            out["prob_harm"].append(above(i, c, 1 + harm))
        return out


def to_json(v):
    """Numbers to JSON; values beyond double range (a lift quantile of e^1000) become null,
    which the Rust test reads as "must be infinite or beyond 1e300"."""
    if v is None:
        return None
    if isinstance(v, list):
        return [to_json(x) for x in v]
    x = float(mp.nstr(mp.mpf(v), 20)) if not isinstance(v, float) else v
    return x if np.isfinite(x) else None


def main():
    out = []
    only = set(sys.argv[1:])
    for case in CASES:
        if only and case["id"] not in only:
            continue
        print(f"computing {case['id']} ...", file=sys.stderr)
        if case["kind"] == "mpmath":
            res = mp_case(case)
        elif case["kind"] == "gamma2":
            res = gamma2_case(case)
        else:
            res = sp_case(case)
        case = dict(case)
        case["expect"] = {key: to_json(val) for key, val in res.items()}
        out.append(case)
    json.dump({"generator": "tests/reference/generate.py", "cases": out}, sys.stdout, indent=1)
    print()


if __name__ == "__main__":
    main()
