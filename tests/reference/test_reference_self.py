"""Checks of the reference itself, needing no service.

Before the reference may judge the service it must agree with a definition it
does not share code with: here, plain time-stepping of the state distribution
p_{n+1} = p_n P, from which every metric is a (truncated) series:

* P(absorbed in a)      = lim p_n(a)
* E[T]                  = sum_n P(T > n)           = sum_n p_n(non-absorbing)
* E[T^2]                = sum_n (2n + 1) P(T > n)
* E[T 1{a}]             = sum_n n (p_n(a) - p_{n-1}(a))
* visits to j           = sum_n p_n(j)   (infinite when p_n(j) does not vanish)

The exact and float solvers are also compared with each other.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from chains import random_chain, request_text
from reference import parse_chain_text, parse_value, solve_exact, solve_float

SEEDS = range(80)
ALL_SEEDS = range(300)  # the seeds the service is checked on
STEPS = 12_000


def _time_stepping(chain, start):
    """Truncated series for every metric from the start distribution ``start``."""
    states = chain.states
    idx = {s: k for k, s in enumerate(states)}
    P = np.zeros((len(states), len(states)))
    for s, row in chain.rows.items():
        for t, p in row.items():
            P[idx[s], idx[t]] += float(p)
    absorbing = [idx[a] for a in chain.absorbing_list]
    other = [idx[s] for s in chain.non_absorbing]
    p = np.zeros(len(states))
    for s, w in start.items():
        p[idx[s]] += float(w)
    prev_abs = p[absorbing].copy()
    mean = second = 0.0
    joint = np.zeros(len(absorbing))
    visits = np.zeros(len(states))
    tail = np.zeros(len(states))
    for n in range(STEPS):
        alive = p[other].sum()
        mean += alive
        second += (2 * n + 1) * alive
        visits += p
        if n >= STEPS - 100:
            tail += p
        p = p @ P
        now_abs = p[absorbing]
        joint += (n + 1) * (now_abs - prev_abs)
        prev_abs = now_abs.copy()
    return {
        "absorption": dict(zip(chain.absorbing_list, p[absorbing])),
        "mean": mean,
        "second": second,
        "joint": dict(zip(chain.absorbing_list, joint)),
        "visits": {s: visits[idx[s]] for s in chain.non_absorbing},
        "visits_tail": {s: tail[idx[s]] for s in chain.non_absorbing},
    }


@pytest.mark.parametrize("seed", SEEDS)
def test_reference_matches_time_stepping(seed):
    """The exact reference equals the series definitions on random chains."""
    chain = parse_chain_text(request_text(random_chain(seed), "exact"))
    ref = solve_exact(chain)
    ts = _time_stepping(chain, chain.start)

    tol = 1e-7
    for a, x in ref["absorption"].items():
        assert math.isclose(ts["absorption"][a], float(x), abs_tol=tol), (a, x)
    never = 1.0 - sum(ts["absorption"].values())
    assert math.isclose(never, float(ref["never_absorbed"]), abs_tol=tol)

    steps = ref["steps"]
    if steps["mean"] is None:
        # A positive trapped mass makes sum_n P(T > n) grow without bound.
        assert float(ref["never_absorbed"]) > 0 and ts["mean"] > 0.5 * STEPS * never
    else:
        mean = float(steps["mean"])
        assert math.isclose(ts["mean"], mean, rel_tol=1e-7, abs_tol=tol)
        second = float(steps["variance"]) + mean * mean
        assert math.isclose(ts["second"], second, rel_tol=1e-6, abs_tol=1e-6)
    for a, given in steps["mean_given"].items():
        if given is None:
            assert ts["absorption"][a] == 0.0
        else:
            joint = ts["joint"][a]
            assert math.isclose(joint / ts["absorption"][a], float(given), rel_tol=1e-6, abs_tol=1e-6)

    for j, v in ref["visits"].items():
        if v is None:
            assert ts["visits_tail"][j] > 1e-3, j  # mass keeps returning to j
        else:
            assert ts["visits_tail"][j] < 1e-9, j
            assert math.isclose(ts["visits"][j], float(v), rel_tol=1e-7, abs_tol=tol), j


@pytest.mark.parametrize("seed", ALL_SEEDS)
def test_exact_and_float_references_agree(seed):
    """The sympy and numpy versions of the reference give the same answers."""
    chain = parse_chain_text(request_text(random_chain(seed), "exact"))
    exact, flt = solve_exact(chain), solve_float(chain)

    def same(path, x, y):
        if x is None or y is None:
            assert x is None and y is None, path
        else:
            assert math.isclose(float(x), y, rel_tol=1e-9, abs_tol=1e-9), (path, x, y)

    def metrics(path, e, f):
        for a in e["absorption"]:
            same(f"{path}/absorption/{a}", e["absorption"][a], f["absorption"][a])
        same(f"{path}/never_absorbed", e["never_absorbed"], f["never_absorbed"])
        same(f"{path}/mean", e["steps"]["mean"], f["steps"]["mean"])
        same(f"{path}/variance", e["steps"]["variance"], f["steps"]["variance"])
        for a in e["steps"]["mean_given"]:
            same(f"{path}/mean_given/{a}", e["steps"]["mean_given"][a], f["steps"]["mean_given"][a])
        for j in e["visits"]:
            same(f"{path}/visits/{j}", e["visits"][j], f["visits"][j])

    metrics("", exact, flt)
    for s in exact["by_state"]:
        metrics(f"by_state/{s}", exact["by_state"][s], flt["by_state"][s])


@pytest.mark.parametrize(
    "text, value",
    [
        (0, "0"), (1, "1"), ("3", "3"), ("0.125", "1/8"), ("2.5e-3", "1/400"),
        ("1/6", "1/6"), ("40%", "2/5"), ("0.6%", "3/500"), ("2/4", "1/2"), ("1E1", "10"),
    ],
)
def test_value_syntax(text, value):
    """Every value form the contract lists is read exactly."""
    from sympy import Rational

    assert parse_value(text) == Rational(value)


def test_json_numbers_are_read_from_their_decimal_text():
    """0.1 in the body means 1/10, not the nearest double."""
    chain = parse_chain_text(
        '{"chain": {"transitions": [{"from": "a", "to": "b", "probability": 0.1},'
        ' {"from": "a", "to": "a", "probability": 0.9}], "start": "a"}}'
    )
    from sympy import Rational

    assert chain.rows["a"]["b"] == Rational(1, 10)
    assert solve_exact(chain)["steps"]["mean"] == 10


def test_reference_reproduces_closed_forms():
    """The reference agrees with the published formulas used in test_closed_forms."""
    import json
    from fractions import Fraction

    from sympy import Rational, harmonic

    from reference import parse_chain
    from test_closed_forms import collector_chain, ruin_chain, ruin_closed_form, run_chain

    def ref(chain):
        return solve_exact(parse_chain(json.loads(json.dumps(chain))))

    for p, a, N in [(Fraction(2, 5), 3, 10), (Fraction(1, 2), 4, 9), (Fraction(9, 10), 1, 5)]:
        ruin, duration = ruin_closed_form(p, a, N)
        got = ref(ruin_chain(p, a, N))
        assert got["absorption"]["c0"] == ruin and got["steps"]["mean"] == duration
    for p, r in [(Rational(1, 2), 3), (Rational(2, 3), 4)]:
        x = (1 - p) * p**r
        got = ref(run_chain(Fraction(int(p.p), int(p.q)), r))
        assert got["steps"]["mean"] == (1 - p**r) / x
        assert got["steps"]["variance"] == 1 / x**2 - (2 * r + 1) / x - p / (1 - p) ** 2
    got = ref(collector_chain(6))
    assert got["steps"]["mean"] == 6 * harmonic(6)
    assert got["steps"]["variance"] == 36 * harmonic(6, 2) - 6 * harmonic(6)
