"""Named chains whose answers are known in closed form from the literature.

These anchor the service (and the reference) to published results rather than
to a second implementation of the same algebra.  Each expected value carries
its source in a comment beside it.
"""

from __future__ import annotations

import json
from fractions import Fraction

import numpy as np
import pytest
import scipy.sparse
import scipy.sparse.linalg
from sympy import Rational, harmonic

from compare import FLOAT_TOL, parse_exact


def _solve(service, chain: dict, arithmetic: str, report=("absorption", "steps", "visits")):
    body = {"chain": chain, "arithmetic": arithmetic, "report": list(report)}
    text = json.dumps(body)
    got = service.solve(text)
    assert got["arithmetic"] == arithmetic, got
    return got


def _exact(number: dict) -> Rational:
    assert number is not None, "expected a finite number, got null"
    return parse_exact(number["exact"])


def _close(got: float, want: float, scale: float = 1.0) -> bool:
    """Within FLOAT_TOL, relative or absolute (whichever is larger)."""
    return abs(got - want) <= FLOAT_TOL * max(1.0, abs(want), scale)


# --------------------------------------------------------------------------
# Gambler's ruin: a walk on 0..N moving +1 with probability p, -1 with q = 1 - p,
# absorbed at 0 (ruin) and N (target reached), started from a.
# --------------------------------------------------------------------------


def ruin_chain(p: Fraction, a: int, N: int) -> dict:
    q = 1 - p
    transitions = []
    for k in range(1, N):
        transitions.append({"from": f"c{k}", "to": f"c{k + 1}", "probability": f"{p}"})
        transitions.append({"from": f"c{k}", "to": f"c{k - 1}", "probability": f"{q}"})
    return {"transitions": transitions, "start": f"c{a}"}


def ruin_closed_form(p: Fraction, a: int, N: int) -> tuple[Rational, Rational]:
    """(P(ruin), expected duration) from a, for the walk on 0..N.

    Feller, An Introduction to Probability Theory and Its Applications, Vol. 1,
    ch. XIV (Random Walk and Ruin Problems), sec. 2 (the classical ruin problem)
    and sec. 3 (expected duration of the game):
        p != q, r = q/p:  q_a = (r^N - r^a) / (r^N - 1)
                          D_a = a/(q - p) - N/(q - p) * (1 - r^a) / (1 - r^N)
        p == q:           q_a = 1 - a/N,  D_a = a (N - a)
    """
    p = Rational(p.numerator, p.denominator)
    q = 1 - p
    if p == q:
        return 1 - Rational(a, N), Rational(a * (N - a))
    r = q / p
    ruin = (r**N - r**a) / (r**N - 1)
    duration = Rational(a) / (q - p) - Rational(N) / (q - p) * (1 - r**a) / (1 - r**N)
    return ruin, duration


@pytest.mark.parametrize(
    "p, a, N",
    [
        (Fraction(1, 2), 4, 9),
        (Fraction(2, 5), 3, 10),
        (Fraction(3, 5), 7, 10),
        (Fraction(5, 11), 12, 20),
        (Fraction(9, 10), 1, 5),
        (Fraction(1, 3), 1, 2),
    ],
)
def test_gamblers_ruin_exact(service, p, a, N):
    """Ruin probability and expected duration agree exactly with the classical formulas."""
    ruin, duration = ruin_closed_form(p, a, N)  # Feller Vol. 1, ch. XIV, secs. 2-3
    got = _solve(service, ruin_chain(p, a, N), "exact")
    assert _exact(got["absorption"]["c0"]) == ruin
    assert _exact(got["absorption"][f"c{N}"]) == 1 - ruin
    assert _exact(got["never_absorbed"]) == 0
    assert _exact(got["steps"]["mean"]) == duration


def _board_by_sparse_solve(p: float, a: int, N: int) -> dict:
    """Every metric for the ruin walk by sparse LU (scipy.sparse.linalg.spsolve).

    Transient states are 1..N-1; with t = N 1 and N = (I - Q)^-1:
    Var T = 2 N t - t - t^2, E[T 1{x}] = (N B)[:, x].
    """
    n = N - 1
    q = 1.0 - p
    main = np.ones(n)
    upper = -p * np.ones(n - 1)  # c_k -> c_{k+1}
    lower = -q * np.ones(n - 1)  # c_{k+1} -> c_k
    m = scipy.sparse.diags([lower, main, upper], [-1, 0, 1], format="csc")
    rhs = np.zeros((n, 3))
    rhs[0, 0] = q  # c1 -> c0
    rhs[n - 1, 1] = p  # c_{N-1} -> c_N
    rhs[:, 2] = 1.0
    sol = scipy.sparse.linalg.spsolve(m, rhs)
    b_ruin, b_win, t = sol[:, 0], sol[:, 1], sol[:, 2]
    sol2 = scipy.sparse.linalg.spsolve(m, np.column_stack([t, b_ruin, b_win]))
    n_t, joint_ruin, joint_win = sol2[:, 0], sol2[:, 1], sol2[:, 2]
    e_a = np.zeros(n)
    e_a[a - 1] = 1.0
    visits = scipy.sparse.linalg.spsolve(m.T.tocsc(), e_a)  # row a of N
    i = a - 1
    return {
        "ruin": b_ruin[i],
        "win": b_win[i],
        "mean": t[i],
        "variance": 2 * n_t[i] - t[i] - t[i] ** 2,
        "given_ruin": joint_ruin[i] / b_ruin[i],
        "given_win": joint_win[i] / b_win[i],
        "visits": {f"c{k}": visits[k - 1] for k in range(1, N)},
    }


@pytest.mark.parametrize(
    "p, a",
    [(Fraction(1, 2), 100), (Fraction(9, 20), 100), (Fraction(13, 25), 37), (Fraction(12, 25), 180)],
)
def test_gamblers_ruin_board_of_200_states_float(service, p, a):
    """A 200-state board (0..199) in float mode matches a sparse LU solution to 1e-9."""
    N = 199
    want = _board_by_sparse_solve(float(p), a, N)
    ruin, duration = ruin_closed_form(p, a, N)  # Feller Vol. 1, ch. XIV, secs. 2-3
    # The sparse solution itself must reproduce the published formulas first.
    assert _close(want["ruin"], float(ruin)) and _close(want["mean"], float(duration))

    got = _solve(service, ruin_chain(p, a, N), "float")
    assert "exact" not in got["absorption"]["c0"]
    pairs = [
        ("absorption/c0", got["absorption"]["c0"], want["ruin"], 1.0),
        (f"absorption/c{N}", got["absorption"][f"c{N}"], want["win"], 1.0),
        ("never_absorbed", got["never_absorbed"], 0.0, 1.0),
        ("steps/mean", got["steps"]["mean"], want["mean"], 1.0),
        # A variance is a difference of terms of size mean^2; scale the tolerance to that.
        ("steps/variance", got["steps"]["variance"], want["variance"], want["mean"] ** 2),
        ("mean_given/c0", got["steps"]["mean_given"]["c0"], want["given_ruin"], 1.0),
        (f"mean_given/c{N}", got["steps"]["mean_given"][f"c{N}"], want["given_win"], 1.0),
    ]
    pairs += [(f"visits/{k}", got["visits"][k], v, 1.0) for k, v in want["visits"].items()]
    bad = [
        f"{path}: service {g['value'] if g else g!r} vs spsolve {w!r}"
        for path, g, w, scale in pairs
        if g is None or not _close(g["value"], w, scale)
    ]
    assert set(got["visits"]) == {f"c{k}" for k in range(1, N)}
    assert not bad, "\n".join(bad)


# --------------------------------------------------------------------------
# Success runs: repeated trials with success probability p until r successes
# in a row.  State k = length of the current run of successes.
# --------------------------------------------------------------------------


def run_chain(p: Fraction, r: int) -> dict:
    q = 1 - p
    transitions = []
    for k in range(r):
        nxt = "done" if k + 1 == r else f"run{k + 1}"
        transitions.append({"from": f"run{k}", "to": nxt, "probability": f"{p}"})
        transitions.append({"from": f"run{k}", "to": "run0", "probability": f"{q}"})
    return {"transitions": transitions, "start": "run0"}


@pytest.mark.parametrize(
    "p, r",
    [(Fraction(1, 2), 1), (Fraction(1, 2), 2), (Fraction(1, 2), 3), (Fraction(1, 6), 1),
     (Fraction(2, 3), 4), (Fraction(3, 10), 3)],
)
def test_success_runs_exact(service, p, r):
    """Mean and variance of the waiting time for a run of r successes, exactly."""
    pr = Rational(p.numerator, p.denominator)
    q = 1 - pr
    x = q * pr**r
    # Feller, Vol. 1, ch. XIII (Recurrent Events), sec. 7 (success runs):
    # mean (1 - p^r) / (q p^r), variance 1/(q p^r)^2 - (2r + 1)/(q p^r) - p/q^2.
    mean = (1 - pr**r) / x
    variance = 1 / x**2 - (2 * r + 1) / x - pr / q**2
    got = _solve(service, run_chain(p, r), "exact")
    assert _exact(got["absorption"]["done"]) == 1
    assert _exact(got["steps"]["mean"]) == mean
    assert _exact(got["steps"]["variance"]) == variance
    assert _exact(got["steps"]["mean_given"]["done"]) == mean


def test_fair_coin_two_in_a_row_values():
    """Sanity check of the formula above at p = 1/2, r = 2: mean 6, variance 22."""
    x = Rational(1, 2) * Rational(1, 4)
    assert (1 - Rational(1, 4)) / x == 6  # Feller, Vol. 1, ch. XIII, sec. 7
    assert 1 / x**2 - 5 / x - Rational(1, 2) / Rational(1, 4) == 22  # same source


# --------------------------------------------------------------------------
# Coupon collecting: draws uniformly from n kinds until all have been seen.
# State k = number of distinct kinds seen so far; weights show normalisation.
# --------------------------------------------------------------------------


def collector_chain(n: int) -> dict:
    transitions = []
    for k in range(n):
        nxt = "all" if k + 1 == n else f"seen{k + 1}"
        transitions.append({"from": f"seen{k}", "to": nxt, "weight": n - k})
        if k:
            transitions.append({"from": f"seen{k}", "to": f"seen{k}", "weight": k})
    return {"transitions": transitions, "start": "seen0"}


@pytest.mark.parametrize("n", [2, 6, 10])
def test_coupon_collector_exact(service, n):
    """Expected draws n H_n, its variance, and the time spent at each stage."""
    # Feller, Vol. 1, ch. IX (Random Variables; Expectation), sec. 3, waiting
    # times in sampling: the stage with k kinds seen lasts a geometric time with
    # success probability (n - k)/n, so E = n H_n and Var = n^2 H_n^(2) - n H_n.
    mean = n * harmonic(n)
    variance = n**2 * harmonic(n, 2) - n * harmonic(n)
    got = _solve(service, collector_chain(n), "exact")
    assert _exact(got["steps"]["mean"]) == mean
    assert _exact(got["steps"]["variance"]) == variance
    for k in range(n):
        # Expected draws spent having seen k kinds: the geometric mean n/(n - k).
        assert _exact(got["visits"][f"seen{k}"]) == Rational(n, n - k)


def test_six_sided_die_collection_value():
    """The six-kind case is the familiar 14.7 draws."""
    assert 6 * harmonic(6) == Rational(147, 10)  # Feller, Vol. 1, ch. IX, sec. 3
