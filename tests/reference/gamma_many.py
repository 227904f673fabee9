#!/usr/bin/env python3
"""Reference values for defect-rate metrics of 3 and 4 arms with tiny shapes (1e-3..1e-1) and
rates spread over 1..1e9: the table of `gamma_many_arms_against_mpmath` in
tests/stats_reference.rs.

Regenerate (from the repository root; needs mpmath >= 1.3):

    python3 tests/reference/gamma_many.py > tests/reference/gamma_many_table.in

The test includes that file (a Rust expression, hence `.in`: not a module of its own); it
never runs Python. Runtime: about five
minutes on one core.

How each quantity is computed (mpmath, 50 significant digits; printed to 20):
* Pairwise quantities of a variant v against the control c, exact for any real shapes
  (../shared/METHODS.md section 1.2): with W = X_v/(X_v + X_c) ~ Beta(a_v, a_c),
  P(lam_v < k lam_c) = I_{k r_v/(r_c + k r_v)}(a_v, a_c) by mpmath.betainc, the upper tail
  always taken as its own betainc (never 1 - lower). P(better than control) at k = 1, harm at
  k = 1 + margin (upper tail), ROPE as P(k = 1 + rope) - P(k = 1 - rope).
  Lift ends: lam_v/lam_c - 1 = (r_c/r_v) W/(1 - W) - 1 at the quantiles of W, found by
  bisection in ln(W/(1 - W)) (the upper tail read as I_{1/(1+odds)}(a_c, a_v), so that a W
  within 1e-60 of 1 is not rounded to 1).
* P(best) and expected loss by quadrature in t = ln(lam) (lower is better, METHODS 1.4):
  P(i best) = int f_i(t) prod_{j != i} S_j(t) dt and
  loss_i = int e^t S_i(t) [1 - prod_{j != i} S_j(t)] dt, with 1 - prod S_j as the sum of
  positive terms sum_j F_j prod_{l < j} S_l, F and S each by mpmath.gammainc (never one as
  1 - the other). mpmath.quad (tanh-sinh) on pieces split at ln(1/r_j) + (-8, -3, -1, 0, 1,
  3, 6) of every arm, where the double-exponential right tails turn; the left tail below all
  of them, where every integrand is a sum of powers e^{c t}, after the substitution
  t = L + ln(s)/alpha, s in (0, 1] (alpha = the smallest shape for P(best), 1 for the loss),
  which makes it an integral of algebraic powers of s that tanh-sinh resolves.
  Checks that abort the run: sum_i P(best) = 1 to 1e-35; loss_i - loss_j = mu_i - mu_j
  (exact means a/r) to 1e-35 relative; every quad error estimate below 1e-35; the quadrature
  and the exact betainc agree on P(better than control) (int f_v S_c) to 1e-35.

The cases are invented scenarios (an app's crash reports, a printer fleet, a payment gateway);
their shapes and rates were chosen to span the ranges above, fixed before the Rust code was
changed.
"""
import sys

import mpmath as mp

mp.mp.dps = 50

# (id, story, [(shape, rate)], control, harm margin, rope, level)
CASES = [
    ("crash_builds_3", "app crash reports per session: three builds, nearly empty prior",
     [(1e-3, 1.0), (1e-2, 1e3), (0.1, 1e6)], 0, 0.1, 0.01, 0.95),
    ("printer_fleet_4", "printer jams per page on four firmware versions",
     [(0.05, 1e9), (0.002, 1e4), (0.03, 10.0), (0.1, 1e7)], 2, 0.05, 0.5, 0.95),
    ("gateway_equal_rates_3", "payment gateway timeouts: three regions, same exposure",
     [(1e-3, 1e5), (2e-3, 1e5), (5e-3, 1e5)], 0, 0.0, 0.01, 0.95),
    ("sensor_spread_4", "sensor dropouts: four vendors, exposures 1 to 1e9",
     [(0.0016578552276172037, 450803768.7618457), (0.030935442594251735, 1.0),
      (0.01, 1e3), (0.1, 1e9)], 1, 0.1, 1.5, 0.95),
    ("kiosk_level_999_3", "ticket kiosk faults: three models at level 0.999",
     [(0.1, 1.0), (0.1, 1e4), (0.1, 1e8)], 1, 0.02, 0.2, 0.999),
    ("router_tiny_4", "router reboots: four builds, every shape 1e-3",
     [(1e-3, 1.0), (1e-3, 1e3), (1e-3, 1e6), (1e-3, 1e9)], 3, 0.1, 0.01, 0.95),
    ("close_tiny_3", "upload failures: three close arms, shapes 0.02 to 0.05",
     [(0.02, 1e6), (0.03, 1.2e6), (0.05, 2e6)], 0, 0.01, 0.1, 0.9),
    ("mixed_4", "login errors: four arms, shapes 1e-3 to 1e-1, rates 10 to 1e8",
     [(0.1, 1e8), (0.001, 10.0), (0.05, 1e5), (0.008, 3e3)], 0, 0.2, 0.05, 0.99),
]

TOL = mp.mpf(10) ** -35


class Arm:
    def __init__(self, a, r):
        self.a, self.r = mp.mpf(a), mp.mpf(r)
        self.lognorm = mp.loggamma(self.a) - self.a * mp.log(self.r)
        self.knee = -mp.log(self.r)  # t where r e^t = 1

    def log_g(self, t):
        return self.a * t - self.r * mp.exp(t) - self.lognorm

    def lower_series(self, x):
        """P(a, x) = x^a e^-x / Gamma(a + 1) * sum_n x^n / ((a + 1)...(a + n)) for x <= 1:
        mpmath.gammainc takes minutes at x = e^-70000 with a = 1e-3 (the left tail of a
        tiny shape), this series a few dozen terms."""
        term, total, n = mp.mpf(1), mp.mpf(1), 0
        while True:
            n += 1
            term *= x / (self.a + n)
            total += term
            if term < mp.eps * total:
                break
        return mp.exp(self.a * mp.log(x) - x - mp.loggamma(self.a + 1)) * total

    def cdf(self, t):
        x = self.r * mp.exp(t)
        if x <= 1:
            return self.lower_series(x)
        return 1 - mp.gammainc(self.a, x, mp.inf, regularized=True)

    def sf(self, t):
        x = self.r * mp.exp(t)
        if x <= 1:
            # S = 1 - P loses nothing absolute: P carries 50 digits absolute here.
            return 1 - self.lower_series(x)
        return mp.gammainc(self.a, x, mp.inf, regularized=True)


class Table:
    """F, S and density of every arm at t, memoized (every integral shares the nodes)."""

    def __init__(self, arms):
        self.arms = arms
        self.memo = {}

    def at(self, t):
        v = self.memo.get(t)
        if v is None:
            v = ([mp.exp(a.log_g(t)) for a in self.arms], [a.cdf(t) for a in self.arms],
                 [a.sf(t) for a in self.arms])
            self.memo[t] = v
        return v


def integrate(f, arms, alpha, top):
    """int_{-inf}^{top} f(t) dt: pieces split at every arm's knee, the left tail substituted."""
    pts = sorted({a.knee + d for a in arms for d in (-8, -3, -1, 0, 1, 3, 6)})
    left = pts[0]
    pts = [p for p in pts if p < top] + [top]
    total, err = mp.mpf(0), mp.mpf(0)
    for x0, x1 in zip(pts[:-1], pts[1:]):
        v, e = mp.quad(f, [x0, x1], error=True, maxdegree=10)
        total += v
        err += e

    def tail(s):
        if s == 0:
            return mp.mpf(0)
        return f(left + mp.log(s) / alpha) / (alpha * s)

    v, e = mp.quad(tail, [0, mp.mpf(10) ** -30, mp.mpf(10) ** -10, mp.mpf(10) ** -3, 1],
                   error=True, maxdegree=10)
    return total + v, err + e


def below(v, c, k):
    x = k * v.r / (c.r + k * v.r)
    return mp.betainc(v.a, c.a, 0, x, regularized=True)


def above(v, c, k):
    x = k * v.r / (c.r + k * v.r)
    return mp.betainc(v.a, c.a, x, 1, regularized=True)


def w_quantile(av, ac, q):
    """ln(w/(1-w)) at the q-quantile of Beta(av, ac), by bisection."""
    def f(z):
        if z < 0:
            w = mp.exp(z) / (1 + mp.exp(z))
            lower = mp.betainc(av, ac, 0, w, regularized=True)
            return lower - q if q < 0.5 else (1 - q) - (1 - lower)
        # 1 - w = 1/(1 + e^z) directly; P(W > w) = P(1 - W < 1 - w).
        upper = mp.betainc(ac, av, 0, 1 / (1 + mp.exp(z)), regularized=True)
        return (1 - upper) - q if q < 0.5 else (1 - q) - upper
    lo, hi = -mp.mpf(10) ** 6, mp.mpf(10) ** 6
    assert f(lo) < 0 < f(hi)
    for _ in range(500):
        mid = (lo + hi) / 2
        if f(mid) < 0:
            lo = mid
        else:
            hi = mid
        if hi - lo < mp.mpf(10) ** -40 * max(1, abs(lo)):
            break
    return (lo + hi) / 2


def case_values(arms_in, control, margin, rope, level):
    arms = [Arm(a, r) for a, r in arms_in]
    k = len(arms)
    tab = Table(arms)
    top_all = min(a.knee for a in arms) + 6
    alpha = min(a.a for a in arms)
    best, loss = [], []
    for i in range(k):
        def pb(t, i=i):
            g, _, S = tab.at(t)
            return g[i] * mp.fprod(S[j] for j in range(k) if j != i)

        def lo(t, i=i):
            _, F, S = tab.at(t)
            acc, run = mp.mpf(0), mp.mpf(1)
            for j in range(k):
                if j != i:
                    acc += run * F[j]
                    run *= S[j]
            return mp.exp(t) * S[i] * acc
        p, e1 = integrate(pb, arms, alpha, top_all)
        l, e2 = integrate(lo, arms, mp.mpf(1), arms[i].knee + 6)
        assert e1 < TOL and e2 < TOL * max(1, l), (i, e1, e2)
        best.append(p)
        loss.append(l)
    assert abs(mp.fsum(best) - 1) < TOL, mp.fsum(best)
    mu = [a.a / a.r for a in arms]
    for i in range(k):
        for j in range(k):
            d = (loss[i] - loss[j]) - (mu[i] - mu[j])
            assert abs(d) <= TOL * max(mu[i], mu[j], loss[i], loss[j]), (i, j, d)
    c = arms[control]
    rows = []
    for i in range(k):
        row = dict(best=best[i], loss=loss[i])
        if i != control:
            v = arms[i]
            row["better"] = below(v, c, 1)

            def beats(t, i=i):
                g, _, S = tab.at(t)
                return g[i] * S[control]
            q, e = integrate(beats, arms, alpha, min(v.knee, c.knee) + 6)
            assert abs(q - row["better"]) < TOL and e < TOL, (i, q, row["better"])
            row["harm"] = above(v, c, 1 + mp.mpf(margin))
            rope = mp.mpf(rope)
            row["rope"] = below(v, c, 1 + rope) - (below(v, c, 1 - rope) if rope < 1 else 0)
            lvl = mp.mpf(level)
            ends = []
            for qq in ((1 - lvl) / 2, (1 + lvl) / 2):
                z = w_quantile(v.a, c.a, qq)
                # ln(1 + lift) = ln(r_c/r_v) + z; the lift itself is e^that - 1.
                ends.append(mp.expm1(mp.log(c.r / v.r) + z))
            row["lift"] = ends
        rows.append(row)
    return rows


def lit(x):
    """A Rust f64 literal with 20 significant digits; beyond double range f64::INFINITY, and
    -1 + (something below half an ulp) as -1.0."""
    if abs(x) > mp.mpf("1.7e308"):
        return "f64::INFINITY" if x > 0 else "f64::NEG_INFINITY"
    s = mp.nstr(x, 20, min_fixed=-5, max_fixed=5)
    if "." not in s and "e" not in s:
        s += ".0"
    return s


def opt(x):
    return "None" if x is None else f"Some({lit(x)})"


def main():
    only = set(sys.argv[1:])
    print("// Generated by tests/reference/gamma_many.py (mpmath 1.3, 50 significant digits,\n"
          "// printed to 20): pairwise quantities by mpmath.betainc of Beta(a_v, a_c), lift ends\n"
          "// by bisection on it, P(best) and expected loss by mpmath.quad in ln(rate); see the\n"
          "// script's docstring. Do not edit; regenerate.\n&[")
    for id_, story, arms, control, margin, rope, level in CASES:
        if only and id_ not in only:
            continue
        print(f"computing {id_} ...", file=sys.stderr)
        rows = case_values(arms, control, margin, rope, level)
        print(f"ManyCase {{\n    id: \"{id_}\",\n    // {story}")
        print("    arms: &[" + ", ".join(f"({float(a)!r}, {float(r)!r})" for a, r in arms) + "],")
        print(f"    control: {control},\n    harm_margin: {float(margin)!r},\n"
              f"    rope: {float(rope)!r},\n    level: {float(level)!r},")
        print("    expect: &[")
        for row in rows:
            lift = row.get("lift")
            print("        ManyExpect {")
            print(f"            prob_best: {lit(row['best'])},")
            print(f"            expected_loss: {lit(row['loss'])},")
            print(f"            prob_better_than_control: {opt(row.get('better'))},")
            print(f"            prob_harm: {opt(row.get('harm'))},")
            print(f"            prob_practically_equivalent: {opt(row.get('rope'))},")
            print("            lift: " + ("None" if lift is None else
                                        f"Some(({lit(lift[0])}, {lit(lift[1])}))") + ",")
            print("        },")
        print("    ],\n},")
        sys.stdout.flush()
    print("]")


if __name__ == "__main__":
    main()
