# Reference values for tests/plan.rs, computed independently of posteriord with scipy:
# the probability, under an A/A null (both arms convert at rate p), that one look at n_c
# control and n_v variant units fires the ship rule for the variant (a false ship), and that
# it fires the harm rule.
#
# Ship rule (docs/decisions.md): the arm with the smallest expected loss is shipped when its
# loss is below the threshold of caring T. With two arms, loss_v - loss_c = E[θc] - E[θv]
# (E[(c-v)+] - E[(v-c)+] = E[c-v]), so the variant is chosen exactly when its posterior mean
# is larger, and shipped when moreover loss_v = E[(θc-θv)+] < T. Harm: P(θv < θc) >= q.
# For a fixed control count x_c each condition holds on one side of a cut-off in x_v
# (loss_v falls and P(θv < θc) falls monotonically as x_v grows), found by a local search
# from the previous control count's cut-off; the answer is
#   Σ_xc Binom(x_c; n_c, p) · P(X_v ≥ cutoff(x_c)),
# an exact sum over the binomial outcomes with one 1-D quadrature per search step:
#   E[(θc-θv)+] = ∫ f_v(y) [ m_c (1 - I_y(a_c+1, b_c)) - y (1 - I_y(a_c, b_c)) ] dy,
#   P(θv < θc)  = ∫ f_v(y) (1 - I_y(a_c, b_c)) dy,
# with f_v the variant's Beta posterior density and I the regularized incomplete beta.
#
# usage: one_look.py P N_C N_V THRESHOLD HARM_Q [ALPHA BETA]  → JSON on stdout
import json
import sys

from scipy import integrate, stats
from scipy.special import betainc


def expect(a_v, b_v, g):
    lo, hi = stats.beta.ppf([1e-13, 1 - 1e-13], a_v, b_v)
    val, _ = integrate.quad(lambda y: stats.beta.pdf(y, a_v, b_v) * g(y), lo, hi,
                            limit=400, epsabs=1e-14, epsrel=1e-11)
    return val


def loss_v(a_c, b_c, a_v, b_v):
    m_c = a_c / (a_c + b_c)
    return expect(a_v, b_v, lambda y: m_c * (1 - betainc(a_c + 1, b_c, y)) - y * (1 - betainc(a_c, b_c, y)))


def p_worse(a_c, b_c, a_v, b_v):
    return expect(a_v, b_v, lambda y: 1 - betainc(a_c, b_c, y))


def cutoff(pred, n_v, start):
    """Smallest x_v in [0, n_v] with pred(x_v) true (pred monotone), or n_v + 1, searched
    from `start`: the cut-off moves little from one control count to the next."""
    c = min(max(start, 0), n_v + 1)
    while c <= n_v and not pred(c):
        c += 1
    while c > 0 and pred(c - 1):
        c -= 1
    return c


def main():
    p, n_c, n_v, t, q = float(sys.argv[1]), int(sys.argv[2]), int(sys.argv[3]), float(sys.argv[4]), float(sys.argv[5])
    alpha = float(sys.argv[6]) if len(sys.argv) > 6 else 1.0
    beta = float(sys.argv[7]) if len(sys.argv) > 7 else 1.0
    ctrl = stats.binom(n_c, p)
    var = stats.binom(n_v, p)
    lo, hi = int(ctrl.ppf(1e-12)), int(ctrl.isf(1e-12))
    ship = 0.0
    harm = 0.0
    ship_cut = harm_cut = int(p * n_v)
    for x_c in range(lo, hi + 1):
        w = ctrl.pmf(x_c)
        a_c, b_c = alpha + x_c, beta + n_c - x_c
        m_c = a_c / (a_c + b_c)

        def ships(x_v):
            a_v, b_v = alpha + x_v, beta + n_v - x_v
            return a_v / (a_v + b_v) > m_c and loss_v(a_c, b_c, a_v, b_v) < t

        # Harm is monotone the other way (fewer variant successes, more harm).
        def not_harmed(x_v):
            a_v, b_v = alpha + x_v, beta + n_v - x_v
            return p_worse(a_c, b_c, a_v, b_v) < q

        ship_cut = cutoff(ships, n_v, ship_cut)
        harm_cut = cutoff(not_harmed, n_v, harm_cut)
        ship += w * var.sf(ship_cut - 1)
        harm += w * var.cdf(harm_cut - 1)
    json.dump({"false_ship": ship, "harm": harm}, sys.stdout)


main()
