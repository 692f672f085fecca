"""Large chains through the real service, against scipy's sparse solvers and closed forms.

Covers both float engines (the direct LU, chosen for banded chains, and the Krylov method,
chosen where LU would fill) and the exact engine at sizes where p-adic lifting matters, plus
the columnar and gzip inputs that large models use.
"""

from __future__ import annotations

import gzip
import json
from fractions import Fraction

import mpmath
import numpy as np
import pytest
import scipy.sparse
import scipy.sparse.linalg

RELATIVE = 1e-9


def walk_table(n: int, start: int = 1) -> dict:
    """A 1-D walk on 0..n+1 in the columnar form: up 0.4, down 0.5, stay 0.1; absorbing ends."""
    frm, to, probability = [], [], []
    for z in range(1, n + 1):
        for target, p in ((z + 1, "0.4"), (z - 1, "0.5"), (z, "0.1")):
            frm.append(z)
            to.append(target)
            probability.append(p)
    states = [f"z{z}" for z in range(n + 2)]
    return {
        "states": states,
        "table": {"from": frm, "to": to, "probability": probability},
        "start": f"z{start}",
    }


def random_table(n: int, seed: int, out: int = 5) -> tuple[dict, scipy.sparse.csr_matrix, np.ndarray]:
    """Each of n transient states goes to `out` random states (weights 1..4) and with weight 1 to
    one of two exits (n: won, n+1: lost). Returns the chain, I - Q, and R (n x 2)."""
    rng = np.random.default_rng(seed)
    frm, to, weight = [], [], []
    rows, cols, vals = [], [], []
    exits = np.zeros((n, 2))
    for i in range(n):
        targets = rng.integers(0, n, size=out)
        weights = rng.integers(1, 5, size=out)
        total = int(weights.sum()) + 1
        for t, w in zip(targets, weights):
            frm.append(i)
            to.append(int(t))
            weight.append(int(w))
            rows.append(i)
            cols.append(int(t))
            vals.append(-w / total)
        frm.append(i)
        to.append(n + i % 2)
        weight.append(1)
        exits[i, i % 2] = 1 / total
    q = scipy.sparse.csr_matrix((vals, (rows, cols)), shape=(n, n))
    a = (scipy.sparse.identity(n, format="csr") + q).tocsc()
    states = [f"s{i}" for i in range(n)] + ["won", "lost"]
    chain = {"states": states, "table": {"from": frm, "to": to, "weight": weight}, "start": "s0"}
    return chain, a, exits


def close(got: float, want: float) -> bool:
    return abs(got - want) <= RELATIVE * max(1.0, abs(want))


def test_a_long_walk_in_float_uses_the_direct_engine_and_matches_the_ruin_formula(service):
    # Gambler's ruin with a lazy step (Feller, An Introduction to Probability Theory and Its
    # Applications, vol. 1, ch. XIV.2-3): from z, the top N is reached before 0 with
    # probability (1 - r^z)/(1 - r^N), r = q/p = 5/4; the stay probability 0.1 does not change
    # it. The moves form a walk with p' = 4/9, q' = 5/9, whose number of moves is
    # z/(q' - p') - N/(q' - p') (1 - r^z)/(1 - r^N); each move takes 1/(1 - 0.1) steps on average.
    # Started 40 below the top, both ends matter. Evaluated with 40 significant digits (mpmath),
    # since r^N has some 9,700 digits.
    n = 100_000
    big_n = n + 1
    z = big_n - 40
    got = service.solve(json.dumps({"chain": walk_table(n, z), "arithmetic": "float"}))
    assert "minimum degree" in got["solver"]["method"], got["solver"]
    assert got["warnings"] == []
    assert got["solver"]["error_estimate"] < 1e-9
    mpmath.mp.dps = 40
    r = mpmath.mpf(5) / 4
    top = (1 - r**z) / (1 - r**big_n)
    duration = (z * 9 - big_n * 9 * top) / mpmath.mpf("0.9")
    assert close(got["absorption"][f"z{big_n}"]["value"], float(top))
    assert close(got["absorption"]["z0"]["value"], float(1 - top))
    assert close(got["steps"]["mean"]["value"], float(duration))


@pytest.mark.parametrize("n, seed", [(3_000, 1), (20_000, 2)])
def test_random_sparse_chains_in_float_agree_with_scipy(service, n, seed):
    chain, a, exits = random_table(n, seed)
    got = service.solve(json.dumps({"chain": chain, "arithmetic": "float"}))
    # Random chains fill a sparse LU hundreds of times over: the Krylov engine answers.
    assert "Krylov" in got["solver"]["method"], got["solver"]
    assert got["solver"]["error_estimate"] < 1e-9
    # scipy's own iterative solver at a tight tolerance: its sparse LU would fill (minutes).
    def solve(b):
        x, info = scipy.sparse.linalg.bicgstab(a, b, rtol=1e-14, atol=0.0, maxiter=10_000)
        assert info == 0
        return x

    absorbed = np.column_stack([solve(exits[:, 0]), solve(exits[:, 1])])
    steps = solve(np.ones(n))
    second = solve(steps)
    assert close(got["absorption"]["won"]["value"], absorbed[0, 0])
    assert close(got["absorption"]["lost"]["value"], absorbed[0, 1])
    assert close(got["steps"]["mean"]["value"], steps[0])
    variance = 2 * second[0] - steps[0] - steps[0] ** 2
    assert close(got["steps"]["variance"]["value"], variance)


def test_visits_from_the_krylov_engine_agree_with_scipy(service):
    n = 5_000
    chain, a, _ = random_table(n, 3)
    got = service.solve(
        json.dumps({"chain": chain, "arithmetic": "float", "report": ["visits"]})
    )
    start = np.zeros(n)
    start[0] = 1.0
    visits = scipy.sparse.linalg.splu(a.T.tocsc()).solve(start)
    for i in (0, 1, 17, n - 1):
        assert close(got["visits"][f"s{i}"]["value"], visits[i])


def test_exact_and_float_agree_on_a_walk_at_the_size_exact_still_handles(service):
    chain = walk_table(2_000, 1_000)
    exact = service.solve(json.dumps({"chain": chain, "arithmetic": "exact"}))
    floating = service.solve(json.dumps({"chain": chain, "arithmetic": "float"}))
    for outcome in ("z0", "z2001"):
        value = Fraction(exact["absorption"][outcome]["exact"])
        assert close(floating["absorption"][outcome]["value"], float(value))
    assert close(
        floating["steps"]["mean"]["value"], float(Fraction(exact["steps"]["mean"]["exact"]))
    )
    # The ruin formula, exactly (Feller, vol. 1, ch. XIV.2).
    r = Fraction(5, 4)
    assert Fraction(exact["absorption"]["z2001"]["exact"]) == (1 - r**1000) / (1 - r**2001)


def test_exact_and_float_agree_on_a_random_chain(service):
    chain, _, _ = random_table(150, 4)
    exact = service.solve(json.dumps({"chain": chain, "arithmetic": "exact"}))
    floating = service.solve(json.dumps({"chain": chain, "arithmetic": "float"}))
    assert exact["arithmetic"] == "exact"
    for outcome in ("won", "lost"):
        value = Fraction(exact["absorption"][outcome]["exact"])
        assert close(floating["absorption"][outcome]["value"], float(value))
    assert close(
        floating["steps"]["variance"]["value"],
        float(Fraction(exact["steps"]["variance"]["exact"])),
    )


def test_a_gzip_body_gives_the_same_answer_as_the_plain_one(service):
    chain, _, _ = random_table(4_000, 5)
    text = json.dumps({"chain": chain, "arithmetic": "float"})
    plain = service.solve(text)
    status, raw, _ = service._request(
        "POST",
        "/v1/solve",
        gzip.compress(text.encode()),
        {"Content-Type": "application/json", "Content-Encoding": "gzip"},
    )
    assert status == 200, raw[:500]
    zipped = json.loads(raw)
    for answer in (plain, zipped):
        answer["solver"]["elapsed_ms"] = 0
    assert zipped == plain
