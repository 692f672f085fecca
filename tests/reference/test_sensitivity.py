"""Parameter sensitivities of the running service, against sympy and finite differences.

A chain may declare named parameters and write its values as expressions over
them; ``"report": [..., "sensitivity"]`` then adds the derivative (and
elasticity) of every reported metric with respect to each parameter.  On seeded
random parametric chains:

* ``exact``: every metric and every derivative must equal, as a rational, the
  symbolic reference (the chain solved in the field of rational functions of
  each parameter, each metric differentiated there, then evaluated), with
  nulls exactly where a metric is infinite or undefined and elasticities null
  where a metric is 0;
* ``float``: derivatives within 1e-9 of the exact ones, and within 1e-5 of
  central finite differences of the service's own float answers, obtained by
  overriding one parameter at a time in the request's ``parameters``.

Then closed forms derived by hand or taken from the literature, and the
expression errors a client can make.  A failure names its seed and prints the
request body, so it can be replayed by hand.
"""

from __future__ import annotations

import functools
import json
import random
from fractions import Fraction

import pytest
import sympy
from sympy import Rational

from chains import random_parametric_chain, render, request_text
from compare import FLOAT_TOL, Comparer, parse_exact
from reference import (
    metric_leaves,
    metrics_from_leaves,
    parse_parametric_chain,
    sensitivity_reference,
    solve_exact,
)

SEEDS = range(100)
FAMILIES = ("absorption", "steps", "visits")
REPORT = FAMILIES + ("sensitivity",)
FD_TOL = 1e-5  # central differences with h = 1e-6: truncation ~h^2, rounding ~1e-16/h


def _overrides(seed: int, chain: dict) -> dict | None:
    """Every third seed overrides one parameter in the request with another value in (0, 1)."""
    if seed % 3 != 1:
        return None
    rng = random.Random(seed ^ 0x0DD5)
    name = rng.choice(sorted(chain["parameters"]))
    d = rng.randint(3, 11)
    return {name: render(rng, Fraction(rng.randint(1, d - 1), d))}


@functools.lru_cache(maxsize=None)
def case(seed: int):
    """(chain, overrides, parametric chain, symbolic reference) for one seed, computed once."""
    chain = random_parametric_chain(seed)
    overrides = _overrides(seed, chain)
    body = json.loads(request_text(chain, "exact", REPORT, True, overrides), parse_float=str)
    pc = parse_parametric_chain(body["chain"], body.get("parameters"))
    return chain, overrides, pc, sensitivity_reference(pc)


def _variance_scales(one: dict) -> dict:
    """Float tolerance of d Var: Var = E[T^2] - E[T]^2, so its derivative is a difference
    of terms of size 2 E[T] dE[T]; scale to that, as compare.py does for Var itself."""
    mean = one["metrics"][("steps_mean", None)]
    out = {}
    for name, entries in one["sensitivity"].items():
        d_mean = entries[("steps_mean", None)][0]
        if mean is not None:
            out[name] = {("steps_variance", None): float(2 * abs(mean) * abs(d_mean) + mean**2)}
    return out


def _compare(got: dict, ref: dict, mode: str) -> Comparer:
    """Metrics and sensitivities, from the start and from every non-absorbing state."""
    cmp = Comparer(mode)
    want = dict(metrics_from_leaves(ref["metrics"]))
    want["by_state"] = {s: metrics_from_leaves(r["metrics"]) for s, r in ref["by_state"].items()}
    cmp.response(got, want, FAMILIES, by_state=True)
    starts = [("", got, ref)]
    starts += [(f"by_state/{s}", (got.get("by_state") or {}).get(s), r)
               for s, r in ref["by_state"].items()]
    for path, g, r in starts:
        if not isinstance(g, dict):
            continue  # already reported by cmp.response
        scales = _variance_scales(r) if mode == "float" else None
        cmp.sensitivity(path, g, r["sensitivity"], FAMILIES, scales)
    return cmp


# --------------------------------------------------------------------------
# The symbolic reference itself (no service needed)
# --------------------------------------------------------------------------


@pytest.mark.parametrize("seed", SEEDS)
def test_symbolic_reference_agrees_with_exact_reference(seed):
    """At the values in force the rational functions equal the plain exact solve."""
    _, _, pc, ref = case(seed)
    plain = solve_exact(pc.at_values)
    assert dict(metric_leaves(plain)) == ref["metrics"]
    for s, r in ref["by_state"].items():
        assert dict(metric_leaves(plain["by_state"][s])) == r["metrics"], s


@pytest.mark.parametrize("seed", [s for s in SEEDS if s % 10 == 0])
def test_symbolic_derivatives_match_exact_differences(seed):
    """Exact central differences of the plain reference approach the symbolic derivatives.

    With h = 10^-4 the difference quotient is the derivative plus h^2 f'''/6 + ...,
    so it must agree to well within 10^-5 (relative or absolute).
    """
    chain, overrides, pc, ref = case(seed)
    h = Rational(1, 10**4)
    for name, sym in pc.symbols.items():
        ends = []
        for sign in (1, -1):
            moved = {**(overrides or {}), name: str(pc.values[sym] + sign * h)}
            body = json.loads(request_text(chain, "exact", REPORT, True, moved), parse_float=str)
            at = parse_parametric_chain(body["chain"], body["parameters"]).at_values
            ends.append(dict(metric_leaves(solve_exact(at))))
        for leaf, (derivative, _) in ref["sensitivity"][name].items():
            if derivative is None:
                continue
            quotient = (ends[0][leaf] - ends[1][leaf]) / (2 * h)
            assert abs(quotient - derivative) <= Rational(1, 10**5) * max(1, abs(derivative)), (
                f"seed {seed}: d/d{name} {leaf}: symbolic {derivative} vs difference {float(quotient)}"
            )


# --------------------------------------------------------------------------
# The service on random parametric chains
# --------------------------------------------------------------------------


@pytest.mark.parametrize("seed", SEEDS)
def test_exact_sensitivities_match_sympy(service, seed):
    """Every metric and derivative, from the start and each state, equals the symbolic reference."""
    chain, overrides, pc, ref = case(seed)
    text = request_text(chain, "exact", REPORT, True, overrides)
    got = service.solve(text)
    _compare(got, ref, "exact").check(f"seed {seed}; request: {text}")


def _float_leaves(metrics: dict) -> dict:
    """{leaf: float or None} of one response's metrics."""
    return {leaf: (None if v is None else v["value"]) for leaf, v in metric_leaves(metrics)}


def _derivative_value(metrics: dict, name: str, leaf):
    key, sub = leaf
    node = metrics["sensitivity"][name][key]
    node = node[sub] if sub is not None else node
    return None if node["derivative"] is None else node["derivative"]["value"]


@pytest.mark.parametrize("seed", SEEDS)
def test_float_sensitivities_match_exact_and_finite_differences(service, seed):
    """Float derivatives: within 1e-9 of the exact ones, and of central differences of the
    service's own float answers with h = 1e-6 x max(1, |p|)."""
    chain, overrides, pc, ref = case(seed)
    text = request_text(chain, "float", REPORT, True, overrides)
    got = service.solve(text)
    _compare(got, ref, "float").check(f"seed {seed}; request: {text}")

    errors = []
    for name, sym in pc.symbols.items():
        p = Fraction(int(pc.values[sym].p), int(pc.values[sym].q))
        h = Fraction(1, 10**6) * max(1, abs(p))
        ends = []
        for point in (p + h, p - h):
            moved = {**(overrides or {}), name: str(point)}
            ends.append(service.solve(request_text(chain, "float", FAMILIES, True, moved)))
        starts = [("", got, ends[0], ends[1])]
        starts += [(f"by_state/{s}/", got["by_state"][s], ends[0]["by_state"][s],
                    ends[1]["by_state"][s]) for s in got["by_state"]]
        for path, base, up, down in starts:
            up_v, down_v = _float_leaves(up), _float_leaves(down)
            for leaf, value in _float_leaves(base).items():
                if value is None:
                    continue  # the derivative's null was checked against the reference
                if up_v[leaf] is None or down_v[leaf] is None:
                    errors.append(f"{path}{leaf}: null at {name} = p +- h but not at p")
                    continue
                quotient = (up_v[leaf] - down_v[leaf]) / (2 * float(h))
                derivative = _derivative_value(base, name, leaf)
                if derivative is None or abs(derivative - quotient) > FD_TOL * max(1.0, abs(quotient)):
                    errors.append(f"{path}sensitivity/{name}/{leaf}: derivative {derivative!r} vs "
                                  f"central difference {quotient!r}")
    assert not errors, f"seed {seed}; request: {text}\n  " + "\n  ".join(errors[:40])


@pytest.mark.parametrize("seed", [s for s in SEEDS if s % 12 == 0])
@pytest.mark.parametrize("report", [["absorption", "sensitivity"], ["steps", "sensitivity"],
                                    ["visits", "sensitivity"], ["sensitivity", "steps", "absorption"]])
def test_sensitivity_mirrors_only_the_reported_metrics(service, seed, report):
    """Each parameter's entry holds the keys of the requested metric families and no others."""
    chain, overrides, pc, ref = case(seed)
    text = request_text(chain, "exact", report, False, overrides)
    got = service.solve(text)
    families = [f for f in FAMILIES if f in report]
    cmp = Comparer("exact")
    cmp.metrics("", got, metrics_from_leaves(ref["metrics"]), families)
    cmp.sensitivity("", got, ref["sensitivity"], families)
    cmp.check(f"seed {seed}; request: {text}")


@pytest.mark.parametrize("seed", [s for s in SEEDS if s % 25 == 0])
def test_no_sensitivity_unless_requested(service, seed):
    chain, overrides, _, _ = case(seed)
    got = service.solve(request_text(chain, "exact", FAMILIES, True, overrides))
    assert "sensitivity" not in got
    assert all("sensitivity" not in m for m in got["by_state"].values())


# --------------------------------------------------------------------------
# Closed forms
# --------------------------------------------------------------------------


def _solve(service, chain: dict, arithmetic: str, parameters=None, report=REPORT, by_state=False):
    got = service.solve(request_text(chain, arithmetic, report, by_state, parameters))
    assert got["arithmetic"] == arithmetic, got
    return got


def _exact(number: dict) -> Rational:
    assert number is not None, "expected a finite number, got null"
    return parse_exact(number["exact"])


def _close(got: float, want, scale: float = 1.0) -> bool:
    return abs(got - float(want)) <= FLOAT_TOL * max(1.0, abs(float(want)), scale)


# An invented game: a chest drops the sword with chance `drop` per opening.
CHEST = {
    "parameters": {"drop": "1/40"},
    "transitions": [
        {"from": "chest", "to": "sword", "probability": "drop"},
        {"from": "chest", "to": "chest", "probability": "1 - drop"},
    ],
    "start": "chest",
}


@pytest.mark.parametrize("p", [Rational(1, 40), Rational(1, 6), Rational(2, 7), Rational(9, 10)])
def test_geometric_waiting_time_derivatives(service, p):
    """Openings until the sword: geometric with success chance p.

    Standard: E[T] = 1/p, Var T = (1 - p)/p^2.  Derived by hand:
    dE/dp = -1/p^2, dVar/dp = (-p^2 - 2p(1 - p))/p^4 = (p - 2)/p^3,
    elasticities -1 and (p - 2)/(1 - p); visits to the chest equal E[T].
    """
    got = _solve(service, CHEST, "exact", {"drop": str(p)}, by_state=True)
    assert _exact(got["steps"]["mean"]) == 1 / p
    assert _exact(got["steps"]["variance"]) == (1 - p) / p**2
    for where in (got, got["by_state"]["chest"]):
        sens = where["sensitivity"]["drop"]
        assert _exact(sens["steps_mean"]["derivative"]) == -1 / p**2  # by hand
        assert _exact(sens["steps_mean"]["elasticity"]) == -1
        assert _exact(sens["steps_variance"]["derivative"]) == (p - 2) / p**3  # by hand
        assert _exact(sens["steps_variance"]["elasticity"]) == (p - 2) / (1 - p)
        assert _exact(sens["steps_mean_given"]["sword"]["derivative"]) == -1 / p**2
        assert _exact(sens["visits"]["chest"]["derivative"]) == -1 / p**2
        assert _exact(sens["absorption"]["sword"]["derivative"]) == 0
        assert _exact(sens["never_absorbed"]["derivative"]) == 0
        assert sens["never_absorbed"]["elasticity"] is None  # the metric is 0

    flt = _solve(service, CHEST, "float", {"drop": str(p)})["sensitivity"]["drop"]
    assert "exact" not in flt["steps_mean"]["derivative"]
    assert _close(flt["steps_mean"]["derivative"]["value"], -1 / p**2)
    # The variance's derivative is a difference of terms of size 2 E[T] dE[T].
    assert _close(flt["steps_variance"]["derivative"]["value"], (p - 2) / p**3, float(2 / p**3))


def test_weight_derivative_flows_through_normalisation(service):
    """Weights 1 (sword) and k (chest) give p = 1/(1 + k).  By hand: E[T] = 1 + k, so
    dE/dk = 1; Var T = (1 - p)/p^2 = k (1 + k), so dVar/dk = 1 + 2k; absorption stays 1."""
    chain = {
        "parameters": {"misses": 39},
        "transitions": [
            {"from": "chest", "to": "sword", "weight": 1},
            {"from": "chest", "to": "chest", "weight": "misses"},
        ],
        "start": "chest",
    }
    for k in (Rational(39), Rational(5, 2)):
        sens = _solve(service, chain, "exact", {"misses": str(k)})["sensitivity"]["misses"]
        assert _exact(sens["steps_mean"]["derivative"]) == 1
        assert _exact(sens["steps_mean"]["elasticity"]) == k / (1 + k)
        assert _exact(sens["steps_variance"]["derivative"]) == 1 + 2 * k
        assert _exact(sens["absorption"]["sword"]["derivative"]) == 0


# An invented payment gateway: a share `s` of payments go by card, which the
# issuer declines with chance `fail`; wallet payments always go through.
GATEWAY = {
    "parameters": {"s": "7/10", "fail": "3%"},
    "transitions": [
        {"from": "card", "to": "paid", "probability": "1 - fail"},
        {"from": "card", "to": "declined", "probability": "fail"},
        {"from": "wallet", "to": "paid", "probability": 1},
    ],
    "start": {"card": "s", "wallet": "1 - s"},
}


def test_start_distribution_derivative_counts_but_not_by_state(service):
    """P(paid) = s (1 - fail) + (1 - s) = 1 - s fail, so d/ds = -fail and d/dfail = -s.
    From `card` alone (start fixed) P(paid) = 1 - fail: d/ds = 0, d/dfail = -1; every
    walk takes one step, so the steps' derivatives are 0."""
    s, fail = Rational(7, 10), Rational(3, 100)
    got = _solve(service, GATEWAY, "exact", by_state=True)
    assert _exact(got["absorption"]["paid"]) == 1 - s * fail
    top = got["sensitivity"]
    assert _exact(top["s"]["absorption"]["paid"]["derivative"]) == -fail
    assert _exact(top["s"]["absorption"]["declined"]["derivative"]) == fail
    assert _exact(top["fail"]["absorption"]["paid"]["derivative"]) == -s
    assert _exact(top["fail"]["absorption"]["declined"]["elasticity"]) == 1  # s fail is linear
    assert _exact(top["s"]["steps_mean"]["derivative"]) == 0
    assert _exact(top["s"]["steps_mean"]["elasticity"]) == 0
    card = got["by_state"]["card"]["sensitivity"]
    assert _exact(card["s"]["absorption"]["paid"]["derivative"]) == 0
    assert _exact(card["fail"]["absorption"]["paid"]["derivative"]) == -1
    wallet = got["by_state"]["wallet"]["sensitivity"]
    assert _exact(wallet["fail"]["absorption"]["paid"]["derivative"]) == 0
    # From the wallet the walk never ends declined: the metric is 0, so no elasticity.
    assert wallet["fail"]["absorption"]["declined"]["elasticity"] is None


@pytest.mark.parametrize("arithmetic", ["exact", "float"])
def test_chain_without_transient_states(service, arithmetic):
    """No transient state at all: the hero either already holds the sword or wanders
    between two rooms forever.  By hand, with start {wander: drop, sword: 1 - drop}:
    P(sword) = 1 - drop (d = -1), never_absorbed = drop (d = 1), E[T] infinite (null),
    E[T | sword] = 0 (d = 0, no elasticity since the metric is 0), visits infinite."""
    chain = {
        "parameters": {"drop": "1/40"},
        "states": [{"id": "sword", "absorbing": True}],
        "transitions": [
            {"from": "wander", "to": "idle", "probability": 1},
            {"from": "idle", "to": "wander", "probability": 1},
        ],
        "start": {"wander": "drop", "sword": "1 - drop"},
    }
    got = _solve(service, chain, arithmetic)
    sens = got["sensitivity"]["drop"]
    want = {("absorption", "sword"): -1, ("never_absorbed", None): 1,
            ("steps_mean", None): None, ("steps_variance", None): None,
            ("steps_mean_given", "sword"): 0, ("visits", "idle"): None, ("visits", "wander"): None}
    for (key, sub), derivative in want.items():
        node = sens[key] if sub is None else sens[key][sub]
        if derivative is None:
            assert node == {"derivative": None, "elasticity": None}, (key, sub, node)
        else:
            assert node["derivative"]["value"] == derivative, (key, sub, node)
    assert sens["steps_mean_given"]["sword"]["elasticity"] is None


def ruin_chain_with_parameter(p: Rational, z: int, a: int) -> dict:
    """The walk on 0..a moving up with chance `p` (a parameter), down with 1 - p, from z."""
    transitions = []
    for k in range(1, a):
        transitions.append({"from": f"c{k}", "to": f"c{k + 1}", "probability": "p"})
        transitions.append({"from": f"c{k}", "to": f"c{k - 1}", "probability": "1 - p"})
    return {"parameters": {"p": str(p)}, "transitions": transitions, "start": f"c{z}"}


def ruin_probability(p, z: int, a: int):
    """Feller, An Introduction to Probability Theory and Its Applications, Vol. 1,
    ch. XIV (Random Walk and Ruin Problems), sec. 2: with r = q/p != 1,
    q_z = (r^a - r^z) / (r^a - 1)."""
    r = (1 - p) / p
    return (r**a - r**z) / (r**a - 1)


def ruin_probability_derivative(p, z: int, a: int):
    """d q_z / dp of the formula above, differentiated by hand.

    d/dr (r^a - r^z)/(r^a - 1)
      = [(a r^(a-1) - z r^(z-1))(r^a - 1) - (r^a - r^z) a r^(a-1)] / (r^a - 1)^2
      = [a r^(a-1) (r^z - 1) - z r^(z-1) (r^a - 1)] / (r^a - 1)^2,
    and dr/dp = d/dp (1 - p)/p = -1/p^2.
    """
    r = (1 - p) / p
    return -(a * r ** (a - 1) * (r**z - 1) - z * r ** (z - 1) * (r**a - 1)) / (p**2 * (r**a - 1) ** 2)


def ruin_duration(p, z: int, a: int):
    """Feller, Vol. 1, ch. XIV, sec. 3 (expected duration of the game), p != q:
    D_z = z/(q - p) - a/(q - p) (1 - r^z)/(1 - r^a)."""
    q = 1 - p
    r = q / p
    return z / (q - p) - a / (q - p) * (1 - r**z) / (1 - r**a)


RUIN_CASES = [(3, 10, Rational(2, 5)), (1, 5, Rational(9, 10)), (7, 10, Rational(3, 5)),
              (12, 20, Rational(5, 11)), (1, 2, Rational(1, 3)), (4, 9, Rational(11, 20))]


def test_ruin_derivative_by_hand_agrees_with_sympy():
    """The hand derivation above against sympy.diff of Feller's closed form (no service)."""
    x = sympy.Symbol("x")
    for z, a, p in RUIN_CASES:
        by_sympy = sympy.diff(ruin_probability(x, z, a), x).subs(x, p)
        assert by_sympy.is_Rational and by_sympy == ruin_probability_derivative(p, z, a), (z, a, p)


@pytest.mark.parametrize("z, a, p", RUIN_CASES)
def test_ruin_probability_and_duration_derivatives(service, z, a, p):
    """d(ruin)/dp by hand from Feller's formula (ch. XIV, sec. 2); d(duration)/dp by
    sympy.diff of Feller's closed form for the expected duration (ch. XIV, sec. 3)."""
    x = sympy.Symbol("x")
    d_duration = sympy.diff(ruin_duration(x, z, a), x).subs(x, p)
    d_ruin = ruin_probability_derivative(p, z, a)  # by hand, see above
    chain = ruin_chain_with_parameter(p, z, a)

    got = _solve(service, chain, "exact")
    assert _exact(got["absorption"]["c0"]) == ruin_probability(p, z, a)
    sens = got["sensitivity"]["p"]
    assert _exact(sens["absorption"]["c0"]["derivative"]) == d_ruin
    assert _exact(sens["absorption"][f"c{a}"]["derivative"]) == -d_ruin
    assert _exact(sens["absorption"]["c0"]["elasticity"]) == d_ruin * p / ruin_probability(p, z, a)
    assert _exact(sens["steps_mean"]["derivative"]) == d_duration

    flt = _solve(service, chain, "float")["sensitivity"]["p"]
    assert _close(flt["absorption"]["c0"]["derivative"]["value"], d_ruin)
    assert _close(flt["steps_mean"]["derivative"]["value"], d_duration)


# --------------------------------------------------------------------------
# Expression errors, through HTTP
# --------------------------------------------------------------------------


def _chest(**changes) -> dict:
    chain = json.loads(json.dumps(CHEST))
    for index, value in changes.items():
        chain["transitions"][int(index[1:])]["probability"] = value
    return chain


def _problem(service, body: dict):
    status, doc, ctype = service.post_text_typed("/v1/solve", json.dumps(body))
    assert ctype.split(";")[0].strip() == "application/problem+json", (ctype, doc)
    assert status == 422, (status, doc)
    assert doc["status"] == 422, doc
    assert isinstance(doc.get("errors"), list) and doc["errors"], doc
    return doc, {e["pointer"]: e["detail"] for e in doc["errors"]}


def test_unknown_name_is_reported_at_its_value_with_the_column(service):
    doc, errors = _problem(service, {"chain": _chest(t1="1 - dorp")})
    assert "/chain/transitions/1/probability" in errors, doc
    detail = errors["/chain/transitions/1/probability"]
    assert "dorp" in detail and "column" in detail, detail


def test_unknown_name_in_a_weight_and_in_the_start(service):
    chain = json.loads(json.dumps(GATEWAY))
    chain["transitions"] = [
        {"from": "card", "to": "paid", "weight": "1 - fial"},
        {"from": "card", "to": "declined", "weight": "fail"},
        {"from": "wallet", "to": "paid", "probability": 1},
    ]
    chain["start"] = {"card": "share", "wallet": "1 - s"}
    doc, errors = _problem(service, {"chain": chain})
    assert "/chain/transitions/0/weight" in errors and "/chain/start/card" in errors, doc
    assert "column" in errors["/chain/transitions/0/weight"], doc
    assert "column" in errors["/chain/start/card"], doc


@pytest.mark.parametrize("text", ["(1 - drop", "1 - drop)", "1 - * drop", "drop^", "drop^0.5", "1 -"])
def test_syntax_errors_are_422_at_their_value(service, text):
    doc, errors = _problem(service, {"chain": _chest(t1=text)})
    assert list(errors) == ["/chain/transitions/1/probability"], doc


def test_division_by_zero_at_the_values_in_force(service):
    chain = {
        "parameters": {"drop": "1/40"},
        "transitions": [
            {"from": "chest", "to": "sword", "weight": "1/(drop - 1/40)"},
            {"from": "chest", "to": "chest", "weight": 1},
        ],
        "start": "chest",
    }
    doc, errors = _problem(service, {"chain": chain})
    assert "/chain/transitions/0/weight" in errors, doc
    # Away from the pole the same chain is fine.
    assert service.post_text("/v1/solve", json.dumps(
        {"chain": chain, "parameters": {"drop": "1/20"}}))[0] == 200


def test_override_that_leaves_a_row_out_of_range_names_the_values(service):
    doc, errors = _problem(service, {"chain": CHEST, "parameters": {"drop": "3/2"}})
    assert "/chain/transitions/0/probability" in errors, doc
    assert "/chain/transitions/1/probability" in errors, doc
    assert any("drop = 3/2" in d for d in errors.values()), doc


def test_override_of_an_unknown_parameter(service):
    doc, errors = _problem(service, {"chain": CHEST, "parameters": {"fail": "1/2"}})
    assert list(errors) == ["/parameters/fail"], doc


@pytest.mark.parametrize("where", ["override", "default"])
def test_parameter_value_must_be_a_number_and_is_quoted_whole(service, where):
    """Parameter values are numbers (constant expressions such as "1/4 + 1/8" included), never
    names; the problem quotes the value as sent."""
    chain = json.loads(json.dumps(CHEST))
    body = {"chain": chain}
    if where == "override":
        body["parameters"] = {"drop": "1/4 + drop"}
        pointer = "/parameters/drop"
    else:
        chain["parameters"] = {"drop": "1/4 + drop"}
        pointer = "/chain/parameters/drop"
    doc, errors = _problem(service, body)
    assert list(errors) == [pointer], doc
    assert "1/4 + drop" in errors[pointer], doc
    # A constant expression is a number: 1/4 + 1/8 = 3/8.
    if where == "override":
        body["parameters"] = {"drop": "1/4 + 1/8"}
    else:
        chain["parameters"] = {"drop": "1/4 + 1/8"}
    status, answer = service.post_text("/v1/solve", json.dumps(body))
    assert status == 200, answer


def test_row_summing_to_one_only_at_the_values_is_not_silent(service):
    """``drop`` and ``1/2`` sum to 1 at drop = 1/2 only; derivatives would be meaningless,
    so the service must either refuse the chain or warn about the row."""
    chain = _chest(t1="1/2")
    chain["parameters"] = {"drop": "1/2"}
    status, body = service.post_text("/v1/solve", json.dumps(
        {"chain": chain, "report": ["absorption", "sensitivity"]}))
    if status == 422:
        assert any("/chain/transitions/" in e["pointer"] for e in body["errors"]), body
    else:
        assert status == 200, body
        assert any("chest" in w for w in body.get("warnings", [])), body
