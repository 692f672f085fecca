"""The step-count distribution and accumulated costs, against independent references.

* ``distribution``: every CDF entry (overall and per outcome) equals, as a
  rational, the absorbed mass of ``pi P^n`` computed from sympy matrix powers;
  quantiles equal a direct exact scan of that CDF, past the horizon if needed;
  classical distributions (geometric, capped geometric, negative binomial, the
  duration of the ruin game) match their closed forms.
* ``costs``: expected total cost, its variance and its mean given each outcome
  match first-step analysis solved exactly with sympy (see ``reference_time``),
  in exact arithmetic exactly and in float arithmetic to 1e-9.

A failure names its seed and carries the full request body, so one case can be
replayed by hand with curl.
"""

from __future__ import annotations

import functools
import json
import random
from fractions import Fraction

import mpmath
import pytest
import sympy
from sympy import Rational, binomial

from compare import Comparer, parse_exact
from reference import parse_chain_text, solve_exact
from reference_time import (
    absorbed_within,
    cdf_limits,
    cdf_series,
    cost_reference,
    parse_costs,
    quantile_scan,
    random_costed_chain,
)

DIST_SEEDS = range(60)
COST_SEEDS = range(60)
LEVEL_POOL = ["0.25", "0.5", "0.75", "0.9", "0.99", "0.999", "1/3"]


def _body(chain: dict, arithmetic: str, report, **extra) -> str:
    body = {"chain": chain, "arithmetic": arithmetic, "report": list(report)}
    body.update(extra)
    return json.dumps(body)


def _exact(number) -> Rational:
    assert isinstance(number, dict) and "exact" in number, f"expected an exact number, got {number!r}"
    return parse_exact(number["exact"])


def _level(text: str) -> Rational:
    num, _, den = text.partition("/")
    f = Fraction(num) / (Fraction(den) if den else 1)
    return Rational(f.numerator, f.denominator)


# --------------------------------------------------------------------------
# Checking one distribution answer against the references
# --------------------------------------------------------------------------


def check_distribution(cmp: Comparer, got: dict, chain, horizon: int, levels: list[str]) -> None:
    """``got`` (a whole response) against matrix powers and exact quantile scans."""
    dist = got.get("distribution")
    if not isinstance(dist, dict):
        cmp.errors.append(f"distribution: expected an object, got {dist!r}")
        return
    keys = {"horizon", "cdf", "by_outcome", "quantiles", "quantiles_by_outcome", "remaining"}
    if set(dist) != keys:
        cmp.errors.append(f"distribution: keys {sorted(dist)} != {sorted(keys)}")
    if dist.get("horizon") != horizon:
        cmp.errors.append(f"distribution/horizon: {dist.get('horizon')!r} != {horizon}")
    A = chain.absorbing_list
    per = absorbed_within(chain, horizon)
    cdf = [sum((per[a][n] for a in A), Rational(0)) for n in range(horizon + 1)]
    _series(cmp, "distribution/cdf", dist.get("cdf"), cdf)
    by = dist.get("by_outcome")
    if not isinstance(by, dict) or set(by) != set(A):
        cmp.errors.append(f"distribution/by_outcome: keys {sorted(by or {})} != {sorted(A)}")
        by = by if isinstance(by, dict) else {}
    for a in A:
        if a in by:
            _series(cmp, f"distribution/by_outcome/{a}", by[a], per[a])
    cmp.number("distribution/remaining", dist.get("remaining"), 1 - cdf[horizon])

    # Exact arithmetic: the answer's own pieces add up to 1 exactly at the horizon.
    if cmp.mode == "exact" and set(by) == set(A) and not cmp.errors:
        total = sum((_exact(by[a][horizon]) for a in A), Rational(0)) + _exact(dist["remaining"])
        if total != 1:
            cmp.errors.append(f"sum of by_outcome[*][H] + remaining = {total}, not 1")
        for n in range(horizon + 1):
            if sum((_exact(by[a][n]) for a in A), Rational(0)) != _exact(dist["cdf"][n]):
                cmp.errors.append(f"cdf[{n}] != sum of by_outcome[*][{n}]")

    rationals = [_level(q) for q in levels]
    want_q = quantile_scan(chain, rationals)
    warnings = [w for w in got.get("warnings", []) if isinstance(w, str)]
    for q, r in zip(levels, rationals):
        if want_q[r] is None and not any(q in w for w in warnings):
            cmp.errors.append(f"quantile {q} is not reached but no warning names it: {warnings}")
    _quantiles(cmp, "distribution/quantiles", dist.get("quantiles"), levels,
               {q: want_q[r] for q, r in zip(levels, rationals)})
    qbo = dist.get("quantiles_by_outcome")
    if not isinstance(qbo, dict) or set(qbo) != set(A):
        cmp.errors.append(f"distribution/quantiles_by_outcome: keys {sorted(qbo or {})} != {sorted(A)}")
        return
    for a in A:
        want_a = quantile_scan(chain, rationals, outcome=a)
        _quantiles(cmp, f"distribution/quantiles_by_outcome/{a}", qbo[a], levels,
                   {q: want_a[r] for q, r in zip(levels, rationals)})


def _series(cmp: Comparer, path: str, got, want: list) -> None:
    if not isinstance(got, list) or len(got) != len(want):
        cmp.errors.append(f"{path}: expected a list of {len(want)} numbers, got {got!r}")
        return
    for n, (g, w) in enumerate(zip(got, want)):
        cmp.number(f"{path}/{n}", g, w)


def _quantiles(cmp: Comparer, path: str, got, levels, want: dict) -> None:
    if not isinstance(got, dict) or set(got) != set(levels):
        cmp.errors.append(f"{path}: keys {sorted(got or {})} != levels asked {sorted(levels)}")
        return
    for q in levels:
        g = got[q]
        if g is not None and (not isinstance(g, int) or isinstance(g, bool)):
            cmp.errors.append(f"{path}/{q}: a quantile is a plain integer or null, got {g!r}")
        elif g != want[q]:
            cmp.errors.append(f"{path}/{q}: service {g!r} != exact scan {want[q]!r}")


def _levels_for(rng: random.Random, chain) -> list[str]:
    """2-4 levels, none equal to the CDF's limit when it is reached only asymptotically.

    (A level equal to its limit is legitimately searched until the service's
    budget runs out; that case is covered once, by name, below.)
    """
    limit = sum(cdf_limits(chain).values(), Rational(0))
    pool = [q for q in LEVEL_POOL if _level(q) != limit]
    return rng.sample(pool, rng.randint(2, 4))


@functools.lru_cache(maxsize=None)
def dist_case(seed: int):
    chain = random_costed_chain(seed, costs=(seed % 3 == 0))  # costs ignored here, but accepted
    text = _body(chain, "exact", ["absorption"])
    parsed = parse_chain_text(text)
    rng = random.Random(seed * 7919 + 1)
    horizon = rng.randint(0, 12)
    return chain, parsed, horizon, _levels_for(rng, parsed)


# --------------------------------------------------------------------------
# 1 + 2. Random chains: CDFs against matrix powers, quantiles against a scan
# --------------------------------------------------------------------------


@pytest.mark.parametrize("seed", DIST_SEEDS)
def test_distribution_matches_matrix_powers(service, seed):
    chain, parsed, horizon, levels = dist_case(seed)
    text = _body(chain, "exact", ["absorption", "distribution"], horizon=horizon, quantiles=levels)
    got = service.solve(text)
    cmp = Comparer("exact")
    ref = solve_exact(parsed)
    cmp.number_map("absorption", got.get("absorption"), ref["absorption"])
    check_distribution(cmp, got, parsed, horizon, levels)
    cmp.check(f"seed {seed}; request: {text}")


@pytest.mark.parametrize("seed", range(0, 60, 3))
def test_quantiles_past_a_short_horizon(service, seed):
    """Horizon 2 with high levels: the service must keep stepping past the horizon."""
    chain, parsed, _, _ = dist_case(seed)
    limit = sum(cdf_limits(parsed).values(), Rational(0))
    levels = [q for q in ["0.99", "0.9", "0.5"] if _level(q) != limit]
    text = _body(chain, "exact", ["distribution"], horizon=2, quantiles=levels)
    got = service.solve(text)
    cmp = Comparer("exact")
    check_distribution(cmp, got, parsed, 2, levels)
    cmp.check(f"seed {seed}; request: {text}")


@pytest.mark.parametrize("seed", range(1, 60, 4))
def test_distribution_float_mode(service, seed):
    """Float arithmetic: every CDF entry within 1e-9; quantiles equal away from ties."""
    chain, parsed, horizon, levels = dist_case(seed)
    text = _body(chain, "float", ["distribution"], horizon=horizon, quantiles=levels)
    got = service.solve(text)
    cmp = Comparer("float")
    dist = got.get("distribution") or {}
    per = absorbed_within(parsed, horizon)
    A = parsed.absorbing_list
    cdf = [sum((per[a][n] for a in A), Rational(0)) for n in range(horizon + 1)]
    _series(cmp, "distribution/cdf", dist.get("cdf"), cdf)
    for a in A:
        _series(cmp, f"distribution/by_outcome/{a}", (dist.get("by_outcome") or {}).get(a), per[a])
    cmp.number("distribution/remaining", dist.get("remaining"), 1 - cdf[horizon])
    # Quantiles: compared only where the exact CDF does not sit on the level at the crossing.
    want = quantile_scan(parsed, [_level(q) for q in levels])
    overall = cdf_series(parsed, max([horizon] + [n for n in want.values() if n is not None]))
    for q in levels:
        n = want[_level(q)]
        if n is not None and overall[n] == _level(q):
            continue
        got_q = (dist.get("quantiles") or {}).get(q, "missing")
        if got_q != n:
            cmp.errors.append(f"distribution/quantiles/{q}: service {got_q!r} != exact scan {n!r}")
    cmp.check(f"seed {seed}; request: {text}")


@pytest.mark.parametrize("seed", range(2, 60, 4))
def test_default_horizon(service, seed):
    """Without ``horizon``: ceil(mean + 6 sd) of the steps, at least 10; 100 if the mean is infinite."""
    chain, parsed, _, _ = dist_case(seed)
    ref = solve_exact(parsed)
    mean, var = ref["steps"]["mean"], ref["steps"]["variance"]
    want = 100 if mean is None else max(10, int(sympy.ceiling(mean + 6 * sympy.sqrt(var))))
    limit = sum(cdf_limits(parsed).values(), Rational(0))
    levels = [q for q in ["0.5", "0.9"] if _level(q) != limit][:1]
    text = _body(chain, "exact", ["distribution"], quantiles=levels)
    got = service.solve(text)
    cmp = Comparer("exact")
    check_distribution(cmp, got, parsed, want, levels)
    cmp.check(f"seed {seed}; mean {mean}, variance {var}; request: {text}")


# --------------------------------------------------------------------------
# Named distributions
# --------------------------------------------------------------------------


def ruin_chain(p: Rational, z: int, a: int) -> dict:
    """The walk on 0..a moving +1 with probability p and -1 with 1 - p, from z."""
    transitions = []
    for k in range(1, a):
        transitions.append({"from": f"c{k}", "to": f"c{k + 1}", "probability": str(p)})
        transitions.append({"from": f"c{k}", "to": f"c{k - 1}", "probability": str(1 - p)})
    return {"transitions": transitions, "start": f"c{z}"}


def ruin_at_trial(p: Rational, z: int, a: int, n: int) -> mpmath.mpf:
    """P(the game from z on the board 0..a ends in ruin exactly at trial n), to 50 digits.

    The classical ruin problem: Feller, An Introduction to Probability Theory and
    Its Applications, Vol. 1, ch. XIV (Random Walk and Ruin Problems), sec. 5, the
    explicit expression
        u_{z,n} = a^-1 2^n p^((n-z)/2) q^((n+z)/2)
                  * sum_{v=1}^{a-1} cos^(n-1)(pi v/a) sin(pi v/a) sin(pi z v/a).
    (Recalled from memory, section and form; it is checked against matrix powers
    in ``test_ruin_formula_matches_matrix_powers`` before it judges the service.)
    Reaching a instead of 0 is the same with p and q swapped and z replaced by a - z.
    """
    if n == 0:
        return mpmath.mpf(0)
    with mpmath.workdps(RUIN_DIGITS):
        p_ = mpmath.mpf(int(p.p)) / int(p.q)
        q_ = 1 - p_
        total = mpmath.fsum(mpmath.cos(mpmath.pi * v / a) ** (n - 1) * mpmath.sin(mpmath.pi * v / a)
                            * mpmath.sin(mpmath.pi * z * v / a) for v in range(1, a))
        return mpmath.mpf(2) ** n / a * p_ ** (mpmath.mpf(n - z) / 2) * q_ ** (mpmath.mpf(n + z) / 2) * total


RUIN = (Rational(2, 5), 5)  # p = 2/5 on the board 0..5
RUIN_DIGITS = 50


def _ruin_cdfs(z: int, horizon: int):
    p, a = RUIN
    with mpmath.workdps(RUIN_DIGITS):
        lose = [mpmath.fsum(ruin_at_trial(p, z, a, m) for m in range(n + 1)) for n in range(horizon + 1)]
        win = [mpmath.fsum(ruin_at_trial(1 - p, a - z, a, m) for m in range(n + 1))
               for n in range(horizon + 1)]
    return lose, win


def _gap(x: mpmath.mpf, r: Rational) -> mpmath.mpf:
    with mpmath.workdps(RUIN_DIGITS):
        return abs(x - mpmath.mpf(int(r.p)) / int(r.q))


def test_ruin_formula_matches_matrix_powers():
    """The recalled explicit expression agrees with pi P^n (to 40 digits) on the board 0..5."""
    p, a = RUIN
    for z in (1, 2, 3):
        parsed = parse_chain_text(json.dumps({"chain": ruin_chain(p, z, a)}))
        per = absorbed_within(parsed, 12)
        lose, win = _ruin_cdfs(z, 12)
        for n in range(13):
            assert _gap(lose[n], per["c0"][n]) < 1e-40, (z, n)
            assert _gap(win[n], per[f"c{a}"][n]) < 1e-40, (z, n)


@pytest.mark.parametrize("z", [1, 2, 3])
def test_ruin_duration_distribution(service, z):
    """The duration of the ruin game on 0..5 with p = 2/5 (Feller Vol. 1, ch. XIV)."""
    p, a = RUIN
    chain = ruin_chain(p, z, a)
    levels = ["0.5", "0.9", "0.99"]
    text = _body(chain, "exact", ["absorption", "distribution"], horizon=12, quantiles=levels)
    got = service.solve(text)
    parsed = parse_chain_text(text)
    cmp = Comparer("exact")
    check_distribution(cmp, got, parsed, 12, levels)
    cmp.check(f"ruin from {z}; request: {text}")
    lose, win = _ruin_cdfs(z, 12)
    by = got["distribution"]["by_outcome"]
    for n in range(13):
        assert _gap(lose[n], _exact(by["c0"][n])) < 1e-40, n
        assert _gap(win[n], _exact(by[f"c{a}"][n])) < 1e-40, n
    # From z, ruin takes z + 2k steps: odd differences add nothing to the ruin CDF.
    for n in range(1, 13):
        if (n - z) % 2:
            assert _exact(by["c0"][n]) == _exact(by["c0"][n - 1]), n


def geometric_chain(p: Rational) -> dict:
    return {"transitions": [{"from": "roll", "to": "hit", "probability": str(p)},
                            {"from": "roll", "to": "roll", "probability": str(1 - p)}],
            "start": "roll"}


@pytest.mark.parametrize("p", [Rational(1, 2), Rational(1, 6), Rational(3, 40), Rational(9, 10)])
def test_geometric_cdf(service, p):
    """Waiting time for the first success in Bernoulli trials.

    P(T <= n) = 1 - (1 - p)^n: the geometric distribution, the waiting time for a
    first success (Feller Vol. 1, ch. VI, sec. 8, waiting times; the section number
    is recalled from memory).  The q-quantile is the least n with (1 - p)^n <= 1 - q.
    """
    H = 15
    levels = ["0.5", "0.9", "0.99", "0.999"]
    text = _body(geometric_chain(p), "exact", ["distribution"], horizon=H, quantiles=levels)
    dist = service.solve(text)["distribution"]
    want = [1 - (1 - p) ** n for n in range(H + 1)]
    assert [_exact(x) for x in dist["cdf"]] == want
    assert [_exact(x) for x in dist["by_outcome"]["hit"]] == want
    assert _exact(dist["remaining"]) == (1 - p) ** H
    for q in levels:
        n = 0
        while (1 - p) ** n > 1 - _level(q):
            n += 1
        assert dist["quantiles"][q] == n, (q, dist["quantiles"])
        assert dist["quantiles_by_outcome"]["hit"][q] == n, q


def capped_chain(p: Rational, N: int, gems=None) -> dict:
    """Draws numbered 1..N; each succeeds with p and draw N always does."""
    transitions = []
    for k in range(1, N):
        hit = {"from": f"d{k}", "to": "done", "probability": str(p)}
        miss = {"from": f"d{k}", "to": f"d{k + 1}", "probability": str(1 - p)}
        if gems is not None:
            hit["cost"] = miss["cost"] = {"gems": gems}
        transitions += [hit, miss]
    last = {"from": f"d{N}", "to": "done", "probability": 1}
    if gems is not None:
        last["cost"] = {"gems": gems}
    transitions.append(last)
    return {"transitions": transitions, "start": "d1"}


@pytest.mark.parametrize("p, N", [(Rational(1, 10), 8), (Rational(3, 500), 90), (Rational(1, 2), 1),
                                  (Rational(1, 3), 5)])
def test_capped_geometric(service, p, N):
    """A geometric waiting time cut off at N.

    P(T <= n) = 1 - (1 - p)^n for n < N and 1 from n = N on; by the tail-sum
    formula E[T] = sum_{n>=0} P(T > n) = sum_{k=0}^{N-1} (1 - p)^k = (1 - (1 - p)^N) / p,
    a finite geometric series (tail-sum formula: Feller Vol. 1, ch. XI, sec. 1,
    recalled from memory).  With 160 gems paid per draw the expected spend is 160 E[T].
    The level 1 is reached at exactly N (the distribution has finite support).
    """
    H = min(N + 2, 12)
    levels = ["0.5", "0.99", "1"]
    text = _body(capped_chain(p, N, gems=160), "exact", ["steps", "distribution", "costs"],
                 horizon=H, quantiles=levels)
    got = service.solve(text)
    dist = got["distribution"]
    want = [(1 - (1 - p) ** n) if n < N else Rational(1) for n in range(H + 1)]
    assert [_exact(x) for x in dist["cdf"]] == want
    mean = (1 - (1 - p) ** N) / p
    assert _exact(got["steps"]["mean"]) == mean
    assert _exact(got["costs"]["gems"]["mean"]) == 160 * mean
    assert _exact(got["costs"]["gems"]["mean_given"]["done"]) == 160 * mean
    # Variance of 160 T is 160^2 Var T, Var T from the same survival function:
    # E[T^2] = sum_{n>=0} (2n + 1) P(T > n).
    second = sum((2 * n + 1) * (1 - p) ** n for n in range(N))
    assert _exact(got["steps"]["variance"]) == second - mean**2
    assert _exact(got["costs"]["gems"]["variance"]) == 160**2 * (second - mean**2)
    for q in levels:
        n = 0
        while n < N and (1 - p) ** n > 1 - _level(q):
            n += 1
        assert dist["quantiles"][q] == n, (q, dist["quantiles"])
        assert dist["quantiles_by_outcome"]["done"][q] == n, q


def negative_binomial_chain(p: Rational, k: int) -> dict:
    transitions = []
    for j in range(k):
        nxt = "won" if j + 1 == k else f"have{j + 1}"
        transitions.append({"from": f"have{j}", "to": nxt, "probability": str(p)})
        transitions.append({"from": f"have{j}", "to": f"have{j}", "probability": str(1 - p)})
    return {"transitions": transitions, "start": "have0"}


@pytest.mark.parametrize("p, k", [(Rational(1, 2), 3), (Rational(1, 6), 2), (Rational(3, 4), 5),
                                  (Rational(2, 7), 4)])
def test_negative_binomial(service, p, k):
    """Trials until the k-th success.

    T <= n exactly when n Bernoulli trials hold at least k successes, so
    P(T <= n) = sum_{j>=k} C(n, j) p^j (1 - p)^(n - j): the binomial distribution
    (Feller Vol. 1, ch. VI, sec. 2) and the negative binomial waiting time
    (Feller Vol. 1, ch. VI, sec. 8; section numbers recalled from memory).
    E[T] = k/p and Var T = k(1 - p)/p^2, a sum of k independent geometric times.
    """
    H = 12
    levels = ["0.5", "0.9"]
    text = _body(negative_binomial_chain(p, k), "exact", ["steps", "distribution"],
                 horizon=H, quantiles=levels)
    got = service.solve(text)
    dist = got["distribution"]

    def tail(n):
        return sum((binomial(n, j) * p**j * (1 - p) ** (n - j) for j in range(k, n + 1)), Rational(0))

    assert [_exact(x) for x in dist["cdf"]] == [tail(n) for n in range(H + 1)]
    assert _exact(dist["remaining"]) == 1 - tail(H)
    assert _exact(got["steps"]["mean"]) == k / p
    assert _exact(got["steps"]["variance"]) == k * (1 - p) / p**2
    for q in levels:
        n = 0
        while tail(n) < _level(q):
            n += 1
        assert dist["quantiles"][q] == n, (q, dist["quantiles"])


def test_level_equal_to_a_finitely_reached_limit(service):
    """Half the walks are trapped and the other half are absorbed by step 2: level 0.5 is 2."""
    chain = {"transitions": [
        {"from": "go", "to": "mid", "probability": "1/2"},
        {"from": "go", "to": "loop_a", "probability": "1/2"},
        {"from": "mid", "to": "out", "probability": 1},
        {"from": "loop_a", "to": "loop_b", "probability": 1},
        {"from": "loop_b", "to": "loop_a", "probability": 1},
    ], "start": "go"}
    text = _body(chain, "exact", ["distribution"], horizon=1, quantiles=["0.5", "0.25", "0.6"])
    dist = service.solve(text)["distribution"]
    assert dist["quantiles"] == {"0.5": 2, "0.25": 2, "0.6": None}, dist
    assert dist["quantiles_by_outcome"]["out"] == {"0.5": 2, "0.25": 2, "0.6": 2}, dist
    assert _exact(dist["remaining"]) == 1


def test_level_equal_to_a_limit_reached_only_in_the_limit(service):
    """Half the walks are trapped, the rest absorbed at a geometric time: 0.5 is never reached.

    P(absorbed within n) = (1 - 2^-n)/2 < 1/2 for every n, so the level 0.5 is null with a
    warning (the service may search up to its budget before giving up).
    """
    chain = {"transitions": [
        {"from": "go", "to": "out", "probability": "1/4"},
        {"from": "go", "to": "go", "probability": "1/2"},
        {"from": "go", "to": "loop_a", "probability": "1/4"},
        {"from": "loop_a", "to": "loop_b", "probability": 1},
        {"from": "loop_b", "to": "loop_a", "probability": 1},
    ], "start": "go"}
    text = _body(chain, "exact", ["distribution"], horizon=3, quantiles=["0.5", "0.25"])
    got = service.solve(text)
    cmp = Comparer("exact")
    check_distribution(cmp, got, parse_chain_text(text), 3, ["0.5", "0.25"])
    cmp.check(f"request: {text}")
    assert got["distribution"]["quantiles"] == {"0.5": None, "0.25": 1}


def test_start_in_absorbing_state_is_absorbed_at_step_zero(service):
    chain = {"transitions": [{"from": "a", "to": "b", "probability": "1/2"},
                             {"from": "a", "to": "a", "probability": "1/2"}],
             "start": {"b": "1/3", "a": "2/3"}}
    text = _body(chain, "exact", ["distribution"], horizon=2, quantiles=["0.25", "0.5"])
    dist = service.solve(text)["distribution"]
    assert [_exact(x) for x in dist["cdf"]] == [Rational(1, 3), Rational(2, 3), Rational(5, 6)]
    assert dist["quantiles"] == {"0.25": 0, "0.5": 1}
    assert dist["quantiles_by_outcome"]["b"] == {"0.25": 0, "0.5": 1}


# --------------------------------------------------------------------------
# 4. Costs
# --------------------------------------------------------------------------


@functools.lru_cache(maxsize=None)
def cost_case(seed: int):
    chain = random_costed_chain(10_000 + seed)
    text = _body(chain, "exact", ["absorption", "costs"])
    parsed = parse_chain_text(text)
    return chain, parsed, cost_reference(text, parsed), cost_reference(text, parsed, absolute=True)


def _check_costs(cmp: Comparer, got: dict, ref: dict, scale: dict) -> None:
    costs = got.get("costs")
    if not isinstance(costs, dict) or set(costs) != set(ref):
        cmp.errors.append(f"costs: dimensions {sorted(costs or {})} != {sorted(ref)}")
        costs = costs if isinstance(costs, dict) else {}
    for d, want in ref.items():
        if d not in costs:
            continue
        here = costs[d]
        if not isinstance(here, dict) or set(here) != {"mean", "variance", "mean_given"}:
            cmp.errors.append(f"costs/{d}: keys {sorted(here or {})} (nulls must be explicit)")
            continue
        s = scale[d]
        mean_scale = float(s["mean"]) if s["mean"] is not None else None
        var_scale = float(s["second"]) if s["second"] is not None else None
        cmp.number(f"costs/{d}/mean", here["mean"], want["mean"], mean_scale)
        cmp.number(f"costs/{d}/variance", here["variance"], want["variance"], var_scale)
        given = here["mean_given"]
        if not isinstance(given, dict) or set(given) != set(want["mean_given"]):
            cmp.errors.append(f"costs/{d}/mean_given: keys {sorted(given or {})} != "
                              f"{sorted(want['mean_given'])}")
            continue
        for a, w in want["mean_given"].items():
            sa = s["mean_given"][a]
            cmp.number(f"costs/{d}/mean_given/{a}", given[a], w, float(sa) if sa is not None else None)


@pytest.mark.parametrize("mode", ["exact", "float"])
@pytest.mark.parametrize("seed", COST_SEEDS)
def test_costs_match_first_step_analysis(service, seed, mode):
    chain, parsed, ref, scale = cost_case(seed)
    text = _body(chain, mode, ["absorption", "costs"])
    got = service.solve(text)
    cmp = Comparer(mode)
    cmp.number_map("absorption", got.get("absorption"), solve_exact(parsed)["absorption"])
    _check_costs(cmp, got, ref, scale)
    cmp.check(f"seed {10_000 + seed}; reference: {ref}; request: {text}")


def test_cost_reference_reduces_to_steps():
    """With cost 1 on every transition (and none on states) the cost is the step count."""
    for seed in COST_SEEDS:
        chain = random_costed_chain(10_000 + seed, costs=False)
        for tr in chain["transitions"]:
            tr["cost"] = {"steps": 1}
        text = _body(chain, "exact", ["costs"])
        parsed = parse_chain_text(text)
        steps = solve_exact(parsed)["steps"]
        got = cost_reference(text, parsed)["steps"]
        assert got["mean"] == steps["mean"], seed
        assert got["variance"] == steps["variance"], seed
        assert got["mean_given"] == steps["mean_given"], seed


def test_cost_reference_mean_by_visits():
    """A second route to the mean: sum_j visits_j (c_j + sum_l P_jl e_jl) + sum_a P(a) k_a."""
    checked = 0
    for seed in COST_SEEDS:
        chain, parsed, ref, _ = cost_case(seed)
        text = _body(chain, "exact", ["costs"])
        exact = solve_exact(parsed)
        dims, states_c, edges_c = parse_costs(text, parsed)
        for d in dims:
            if ref[d]["mean"] is None:
                assert exact["steps"]["mean"] is None, seed
                continue
            total = sum((exact["absorption"][a] * states_c[d][a] for a in parsed.absorbing_list),
                        Rational(0))
            for j, v in exact["visits"].items():
                if v == 0:
                    continue
                per_visit = states_c[d][j] + sum((p * edges_c[d].get((j, l), 0)
                                                  for l, p in parsed.rows[j].items()), Rational(0))
                total += v * per_visit
            assert total == ref[d]["mean"], (seed, d)
            checked += 1
    assert checked > 30


def test_cost_starting_on_an_absorbing_state(service):
    """Starting on an absorbing state pays its cost once; nothing else."""
    chain = {"states": [{"id": "paid", "cost": {"ms": "5/2"}}, {"id": "retry", "cost": {"ms": 3}}],
             "transitions": [{"from": "retry", "to": "paid", "probability": "1/4", "cost": {"ms": -1}},
                             {"from": "retry", "to": "retry", "probability": "3/4", "cost": {"ms": 2}}],
             "start": {"paid": "1/2", "retry": "1/2"}}
    text = _body(chain, "exact", ["costs"])
    got = service.solve(text)["costs"]["ms"]
    # From retry: T ~ geometric(1/4) visits cost 3 each, T - 1 retries cost 2, the last -1, then 5/2:
    # X = 3T + 2(T - 1) - 1 + 5/2 = 5T - 1/2, E = 20 - 1/2, Var = 25 * (3/4)/(1/16) = 300.
    # Mixed half and half with X = 5/2 (the start on "paid"): E = (39/2 + 5/2)/2 = 11 and
    # E[X^2] = ((300 + (39/2)^2) + (5/2)^2)/2, so Var = E[X^2] - 11^2.
    from_retry_second = 300 + Rational(39, 2) ** 2
    second = (from_retry_second + Rational(5, 2) ** 2) / 2
    assert _exact(got["mean"]) == 11
    assert _exact(got["variance"]) == second - 121
    assert _exact(got["mean_given"]["paid"]) == 11
    text_parsed = parse_chain_text(text)
    assert cost_reference(text, text_parsed)["ms"]["variance"] == second - 121


def test_repeated_pair_cost_is_probability_weighted(service):
    """Two copies of (a, won) with 1/4 at cost 8 and 1/2 at cost 2: one 3/4 edge costing 4 on
    average, but 8 or 2 each time (1/3 and 2/3 of the time), so the variance is 24 - 16 = 8."""
    chain = {"transitions": [
        {"from": "a", "to": "won", "probability": "1/4", "cost": {"gold": 8}},
        {"from": "a", "to": "won", "probability": "1/2", "cost": {"gold": 2}},
        {"from": "a", "to": "a", "probability": "1/4"},
    ], "start": "a"}
    text = _body(chain, "exact", ["costs"])
    got = service.solve(text)["costs"]["gold"]
    assert _exact(got["mean"]) == 4
    assert _exact(got["variance"]) == 8
    assert cost_reference(text)["gold"]["mean"] == 4
    assert cost_reference(text)["gold"]["variance"] == 8


# --------------------------------------------------------------------------
# 5. Errors
# --------------------------------------------------------------------------

_SMALL = geometric_chain(Rational(1, 2))


def _problem(service, body: dict) -> dict:
    status, doc = service.post_text("/v1/solve", json.dumps(body))
    assert status == 422, f"HTTP {status}: {doc}"
    assert isinstance(doc, dict) and doc.get("status") == 422, doc
    return doc


def _pointers(doc: dict) -> list[str]:
    return [e.get("pointer") for e in doc.get("errors", [])]


def test_horizon_without_distribution_is_rejected(service):
    doc = _problem(service, {"chain": _SMALL, "report": ["absorption"], "horizon": 5})
    assert "/horizon" in _pointers(doc), doc


def test_quantiles_without_distribution_is_rejected(service):
    doc = _problem(service, {"chain": _SMALL, "report": ["absorption", "steps"], "quantiles": ["0.5"]})
    assert "/quantiles" in _pointers(doc), doc


@pytest.mark.parametrize("bad", ["1.5", "0", "-0.5"])
def test_quantile_outside_the_unit_interval_is_rejected(service, bad):
    doc = _problem(service, {"chain": _SMALL, "report": ["distribution"], "quantiles": [bad, "0.5"]})
    assert _pointers(doc) == ["/quantiles/0"], doc


def test_bad_quantile_is_pointed_at_by_index(service):
    doc = _problem(service, {"chain": _SMALL, "report": ["distribution"],
                             "quantiles": ["0.5", "0.9", "1.5"]})
    assert _pointers(doc) == ["/quantiles/2"], doc
