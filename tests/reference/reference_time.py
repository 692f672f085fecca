"""Reference for the step-count distribution and for accumulated costs.

Written from the definitions, sharing no code with the service:

* **Distribution.** With the absorbing states made self-loops, the state
  distribution after n steps is ``pi P^n``; because absorbing states keep their
  mass, ``(pi P^n)[a]`` is P(absorbed in a within n steps).  :func:`absorbed_within`
  computes it from sympy matrix powers ``P^n``; :func:`quantile_scan` steps the
  same vector past any horizon with ``fractions.Fraction`` to find the first n
  where a level is reached, or proves it never is.
* **Costs.** The total cost X_i of a walk that has just arrived in state i
  (i's own cost not yet paid) satisfies, by first-step analysis,
  ``X_i = c_i + e_ij + X_j`` with j drawn from row i, and ``X_a = k_a`` for an
  absorbing a (its cost is paid once, on arrival or at the start).  Taking
  expectations gives linear systems over the transient states for E[X_i],
  E[X_i^2] and E[X_i 1{ends in a}], solved exactly with sympy
  (:func:`cost_reference`).

Repeated (from, to) pairs: probabilities are summed and the pair's mean cost is the
probability-weighted average of the copies' costs; the walk still takes one copy at a time,
so the spread of the copies' costs adds to the second moment (see :func:`parse_cost_spreads`).

:func:`random_costed_chain` writes seeded random chains with 2-7 states, some
closed classes that trap the walk, starts that are a state or a distribution,
and random (possibly negative) rational costs on transitions and states.
"""

from __future__ import annotations

import json
import random
from fractions import Fraction

import sympy
from sympy import Rational

from chains import _decimal_text, _is_decimal
from reference import Chain, parse_chain_text, parse_value, structure

ZERO = Rational(0)
ONE = Rational(1)


# --------------------------------------------------------------------------
# Seeded random chains with costs
# --------------------------------------------------------------------------

_WORDS = ["lobby", "vault", "gate", "forge", "mine", "tower", "camp", "dock", "shrine", "pit"]
COST_DIMENSIONS = ["gold", "ms", "risk"]


def _ids(rng: random.Random, n: int) -> list[str]:
    style = rng.choice(["indexed", "words"])
    out: list[str] = []
    while len(out) < n:
        k = len(out)
        sid = f"s{k}" if style == "indexed" else f"{rng.choice(_WORDS)} {k}"
        if sid not in out:
            out.append(sid)
    return out


def _decimal_or_none(x: Fraction) -> str | None:
    """Exact terminating decimal text of x >= 0, or None when there is none."""
    return _decimal_text(x) if _is_decimal(x) else None


def render(rng: random.Random, x: Fraction):
    """One random wire rendering of the rational x (negative allowed)."""
    sign = "-" if x < 0 else ""
    a = abs(x)
    forms = [lambda: f"{sign}{a.numerator}/{a.denominator}"]
    if a.denominator == 1:
        forms += [lambda: int(x), lambda: str(int(x))]
    dec = _decimal_or_none(a)
    if dec is not None:
        forms.append(lambda: f"{sign}{dec}")
        if repr(float(dec)) == dec:  # a JSON number whose decimal text is exactly dec
            forms.append(lambda: float(f"{sign}{dec}"))
        if not sign:
            forms.append(lambda: _decimal_text(a * 100) + "%")
    return rng.choice(forms)()


def _probabilities(rng: random.Random, k: int) -> list[Fraction]:
    """k positive rationals (denominator up to 12) summing exactly to 1."""
    d = rng.randint(max(k, 2), 12)
    cuts = sorted(rng.sample(range(1, d), k - 1))
    return [Fraction(b - a, d) for a, b in zip([0] + cuts, cuts + [d])]


def _cost_value(rng: random.Random) -> Fraction:
    r = rng.random()
    if r < 0.4:
        return Fraction(rng.randint(-5, 12))
    if r < 0.7:
        return Fraction(rng.randint(-9, 9), rng.randint(2, 6))
    return Fraction(rng.choice([-3, -1, 1, 5, 7, 25]), rng.choice([4, 8, 10]))


def _cost(rng: random.Random, dims: list[str]) -> dict:
    chosen = [d for d in dims if rng.random() < 0.7] or [rng.choice(dims)]
    return {d: render(rng, _cost_value(rng)) for d in chosen}


def random_costed_chain(seed: int, costs: bool = True) -> dict:
    """A random chain (JSON-ready dict) with 2-7 states; costs when ``costs``."""
    rng = random.Random(seed)
    n = rng.randint(2, 7)
    ids = _ids(rng, n)
    rng.shuffle(ids)
    n_abs = rng.randint(1, min(3, n - 1))
    absorbing, rest = ids[:n_abs], ids[n_abs:]
    trap: list[str] = []
    if len(rest) >= 3 and rng.random() < 0.35:
        trap, rest = rest[:2], rest[2:]
    transient = rest
    dims = rng.sample(COST_DIMENSIONS, rng.randint(1, 2)) if costs else []

    transitions: list[dict] = []
    entries: dict[str, dict] = {}

    def row(src: str, targets: list[str]) -> list[dict]:
        kind = "probability" if rng.random() < 0.75 else "weight"
        if kind == "probability":
            values = _probabilities(rng, len(targets))
        else:
            values = [Fraction(rng.randint(1, 9), rng.choice([1, 1, 2, 3])) for _ in targets]
        out = []
        for dst, v in zip(targets, values):
            parts = [v]
            if rng.random() < 0.15:  # a repeated (from, to) pair, split in two positive parts
                cut = Fraction(rng.choice([1, 1, 2]), 3)
                parts = [v * cut, v * (1 - cut)]
            for part in parts:
                tr = {"from": src, "to": dst, kind: render(rng, part)}
                if costs and rng.random() < 0.6:
                    tr["cost"] = _cost(rng, dims)
                out.append(tr)
        if kind == "probability" and rng.random() < 0.15:
            spare = [t for t in ids if t not in targets]
            if spare:  # an explicit zero-probability edge (never taken, so no cost on it)
                out.append({"from": src, "to": rng.choice(spare), "probability": render(rng, Fraction(0))})
        return out

    for a in absorbing:
        kind = rng.choice(["bare", "self", "declared"])
        if kind == "self":
            transitions.append({"from": a, "to": a, "probability": rng.choice([1, "1"])})
        elif kind == "declared":
            entries[a] = {"id": a, "absorbing": True}
    if trap:
        x, y = trap
        transitions += row(x, [y, x] if rng.random() < 0.5 else [y])
        transitions += row(y, [x, y] if rng.random() < 0.5 else [x])
    for s in transient:
        pool = [t for t in ids if t != s]
        targets = rng.sample(pool, rng.randint(1, min(3, len(pool))))
        if rng.random() < 0.4:
            targets.append(s)
        rng.shuffle(targets)
        transitions += row(s, targets)

    if costs:
        for s in ids:
            if rng.random() < 0.45:
                entries.setdefault(s, {"id": s})["cost"] = _cost(rng, dims)
    appearing = {t["from"] for t in transitions} | {t["to"] for t in transitions}
    for s in ids:
        if s not in appearing and s not in entries:
            entries[s] = {"id": s} if rng.random() < 0.5 else s
    rng.shuffle(transitions)
    chain: dict = {"transitions": transitions}
    if entries:
        listed = list(entries.values())
        rng.shuffle(listed)
        chain["states"] = listed

    def pick() -> str:
        r = rng.random()
        if r < 0.15:
            return rng.choice(absorbing)
        if r < 0.3 and trap:
            return rng.choice(trap)
        return rng.choice(transient or ids)

    if rng.random() < 0.5:
        chain["start"] = pick()
    else:
        chosen: list[str] = []
        for _ in range(rng.randint(2, 3)):
            s = pick()
            if s not in chosen:
                chosen.append(s)
        if len(chosen) == 1:
            chosen.append(rng.choice([s for s in ids if s != chosen[0]]))
        chain["start"] = {s: render(rng, p) for s, p in zip(chosen, _probabilities(rng, len(chosen)))}
    return chain


# --------------------------------------------------------------------------
# The step-count distribution
# --------------------------------------------------------------------------


def transition_matrix(chain: Chain) -> sympy.Matrix:
    """The full matrix over ``chain.states`` (absorbing states as self-loops)."""
    idx = {s: k for k, s in enumerate(chain.states)}
    m = sympy.zeros(len(chain.states), len(chain.states))
    for s, row in chain.rows.items():
        for t, p in row.items():
            m[idx[s], idx[t]] += p
    for k in range(len(chain.states)):
        assert sum(m.row(k)) == 1, f"row {chain.states[k]} does not sum to 1"
    return m


def start_vector(chain: Chain) -> sympy.Matrix:
    v = sympy.zeros(1, len(chain.states))
    for s, w in chain.start.items():
        v[0, chain.states.index(s)] += w
    return v


def absorbed_within(chain: Chain, horizon: int) -> dict:
    """``{a: [P(absorbed in a within n steps) for n in 0..horizon]}`` from pi P^n."""
    P = transition_matrix(chain)
    pi = start_vector(chain)
    idx = {s: k for k, s in enumerate(chain.states)}
    out = {a: [] for a in chain.absorbing_list}
    power = sympy.eye(len(chain.states))  # P^0
    for _ in range(horizon + 1):
        dist = pi * power
        for a in out:
            out[a].append(dist[0, idx[a]])
        power = power * P
    return out


def _fraction(x: Rational) -> Fraction:
    return Fraction(int(x.p), int(x.q))


class Stepper:
    """The state distribution pi P^n, stepped one n at a time with exact fractions."""

    def __init__(self, chain: Chain):
        self.chain = chain
        self.rows = {s: [(t, _fraction(p)) for t, p in row.items() if p != 0]
                     for s, row in chain.rows.items()}
        self.dist = {s: _fraction(w) for s, w in chain.start.items() if w != 0}
        self.n = 0

    def step(self) -> None:
        nxt: dict[str, Fraction] = {}
        for s, w in self.dist.items():
            for t, p in self.rows[s]:
                nxt[t] = nxt.get(t, Fraction(0)) + w * p
        self.dist = nxt
        self.n += 1

    def mass(self, states) -> Fraction:
        return sum((self.dist.get(s, Fraction(0)) for s in states), Fraction(0))


def cdf_series(chain: Chain, upto: int) -> list[Rational]:
    """[P(absorbed within n steps) for n in 0..upto], stepped with exact fractions."""
    stepper = Stepper(chain)
    out = []
    for n in range(upto + 1):
        if n:
            stepper.step()
        f = stepper.mass(chain.absorbing)
        out.append(Rational(f.numerator, f.denominator))
    return out


def quantile_scan(chain: Chain, levels: list[Rational], outcome: str | None = None,
                  max_steps: int = 200_000) -> dict:
    """First n where P(absorbed [in ``outcome``] within n) reaches a threshold, per level.

    ``outcome=None``: the threshold is the level itself, on the overall CDF.
    Otherwise the threshold is ``level * P(outcome)`` on that outcome's CDF (the
    quantile of the steps given that outcome), and every level is None when
    P(outcome) = 0.  ``None`` marks a threshold never reached: it exceeds the
    CDF's limit L, or equals L while mass that could still arrive stays on
    non-absorbing states forever.  That last case is decided exactly: such
    "live" mass sits on states reached by paths through live states only, so if
    it is still there after len(states) steps a cycle carries it forever.
    """
    st = structure(chain)
    limits = cdf_limits(chain)
    if outcome is None:
        targets = set(chain.absorbing)
        limit = sum(limits.values(), ZERO)
        thresholds = {q: q for q in levels}
    else:
        targets = {outcome}
        limit = limits[outcome]
        if limit == 0:
            return {q: None for q in levels}
        thresholds = {q: q * limit for q in levels}
    live = {s for s in chain.non_absorbing if st.reach[s] & targets}
    out: dict = {}
    pending = set()
    for q, t in thresholds.items():
        if t > limit:
            out[q] = None
        else:
            pending.add(q)
    stepper = Stepper(chain)
    thresholds = {q: _fraction(t) for q, t in thresholds.items()}
    flimit = _fraction(limit)
    while pending:
        got = stepper.mass(targets)
        for q in list(pending):
            if got >= thresholds[q]:
                out[q] = stepper.n
                pending.discard(q)
        if not pending:
            break
        if stepper.mass(live) == 0 or (
            stepper.n > len(chain.states) and all(thresholds[q] == flimit for q in pending)
        ):
            for q in pending:  # nothing more arrives, or never all of it in finite time
                out[q] = None
            break
        if stepper.n > max_steps:
            raise AssertionError(f"quantile scan exceeded {max_steps} steps for {sorted(pending)}")
        stepper.step()
    return out


def cdf_limits(chain: Chain) -> dict:
    """P(ends in a) for every absorbing a, by first-step analysis (exact)."""
    h = _absorption(chain, structure(chain))
    return {a: sum((w * h[a][s] for s, w in chain.start.items()), ZERO) for a in chain.absorbing_list}


def _absorption(chain: Chain, st) -> dict:
    """h[a][s] = P(ends in a | start s) for every state s."""
    U = st.transient
    out = {}
    m = _i_minus_q(chain, U)
    for a in chain.absorbing_list:
        h = {s: ZERO for s in chain.states}
        h[a] = ONE
        if U:
            rhs = sympy.Matrix([chain.rows[u].get(a, ZERO) for u in U])
            sol = m.LUsolve(rhs)
            assert m * sol == rhs
            for k, u in enumerate(U):
                h[u] = sol[k]
        out[a] = h
    return out


def _i_minus_q(chain: Chain, U: list[str]) -> sympy.Matrix:
    return sympy.Matrix([[(ONE if r == c else ZERO) - chain.rows[r].get(c, ZERO) for c in U] for r in U])


# --------------------------------------------------------------------------
# Accumulated costs
# --------------------------------------------------------------------------


def parse_costs(body_text: str, chain: Chain) -> tuple[list[str], dict, dict]:
    """(dimensions, state_cost[dim][s], edge_cost[dim][(s, t)]) read exactly from the body.

    A repeated (from, to) pair gets the probability-weighted average of its
    copies' costs; weights are compared within their row, so normalisation cancels.
    """
    body = json.loads(body_text, parse_float=str)
    raw = body["chain"]
    dims: list[str] = []

    def note(cost: dict) -> None:
        for d in cost:
            if d not in dims:
                dims.append(d)

    state_cost: dict[str, dict[str, Rational]] = {}
    for entry in raw.get("states", []):
        if isinstance(entry, dict) and "cost" in entry:
            note(entry["cost"])
            state_cost[entry["id"]] = {d: parse_value(v) for d, v in entry["cost"].items()}
    copies: dict[tuple[str, str], list[tuple[Rational, dict]]] = {}
    for tr in raw["transitions"]:
        kind = "probability" if "probability" in tr else "weight"
        cost = tr.get("cost", {})
        note(cost)
        copies.setdefault((tr["from"], tr["to"]), []).append(
            (parse_value(tr[kind]), {d: parse_value(v) for d, v in cost.items()})
        )
    states_c = {d: {s: state_cost.get(s, {}).get(d, ZERO) for s in chain.states} for d in dims}
    edges_c: dict[str, dict[tuple[str, str], Rational]] = {d: {} for d in dims}
    for pair, items in copies.items():
        total = sum((w for w, _ in items), ZERO)
        for d in dims:
            if total == 0:
                edges_c[d][pair] = ZERO
            else:
                edges_c[d][pair] = sum((w * c.get(d, ZERO) for w, c in items), ZERO) / total
    return dims, states_c, edges_c


def parse_cost_spreads(body_text: str, chain: Chain) -> dict:
    """``{dim: {(s, t): Var}}``: the variance of a repeated pair's cost over its copies,
    weighted by probability (zero for a pair given once)."""
    body = json.loads(body_text, parse_float=str)
    copies: dict[tuple[str, str], list[tuple[Rational, dict]]] = {}
    for tr in body["chain"]["transitions"]:
        kind = "probability" if "probability" in tr else "weight"
        cost = {d: parse_value(v) for d, v in tr.get("cost", {}).items()}
        copies.setdefault((tr["from"], tr["to"]), []).append((parse_value(tr[kind]), cost))
    spreads: dict[str, dict] = {}
    for pair, items in copies.items():
        total = sum((w for w, _ in items), ZERO)
        if total == 0:
            continue
        dims = {d for _, c in items for d in c}
        for d in dims:
            mean = sum((w * c.get(d, ZERO) for w, c in items), ZERO) / total
            square = sum((w * c.get(d, ZERO) ** 2 for w, c in items), ZERO) / total
            spreads.setdefault(d, {})[pair] = square - mean**2
    return spreads


def _moments(chain: Chain, st, h: dict, c: dict, e: dict, spread: dict | None = None) -> dict:
    """Per state: m (E[X], None when trappable), s (E[X^2]), g[a] (E[X 1{a}])."""
    A = chain.absorbing_list
    C = set(st.recurrent)
    U = st.transient
    finite = [u for u in U if not (st.reach[u] & C)]
    m = {a: c[a] for a in A}
    s = {a: c[a] ** 2 for a in A}

    def step_cost(i, j):
        return c[i] + e.get((i, j), ZERO)

    def solve(states, rhs_of):
        if not states:
            return {}
        mat = _i_minus_q(chain, states)
        rhs = sympy.Matrix([rhs_of(i) for i in states])
        sol = mat.LUsolve(rhs)
        assert mat * sol == rhs
        return dict(zip(states, list(sol)))

    def outside(i, value, inside):
        """sum_j P_ij value(j) over successors j outside the unknowns."""
        return sum((p * value(j) for j, p in chain.rows[i].items() if j not in inside and p != 0), ZERO)

    inside = set(finite)
    # m_i = sum_j P_ij (c_i + e_ij) + sum_{j in U} P_ij m_j + sum_{j absorbing} P_ij m_j
    m.update(solve(finite, lambda i: sum((p * step_cost(i, j) for j, p in chain.rows[i].items()), ZERO)
                   + outside(i, lambda j: m[j], inside)))
    spread = spread or {}
    # s_i = sum_j P_ij [(c_i + e_ij)^2 + Var(e_ij) + 2 (c_i + e_ij) m_j + s_j]
    s.update(solve(finite, lambda i: sum((p * (step_cost(i, j) ** 2 + spread.get((i, j), ZERO)
                                               + 2 * step_cost(i, j) * m[j])
                                          for j, p in chain.rows[i].items() if p != 0), ZERO)
                   + outside(i, lambda j: s[j], inside)))
    for u in chain.non_absorbing:
        if u not in inside:
            m[u] = s[u] = None
    # g^a_i = sum_j P_ij [(c_i + e_ij) h^a_j + g^a_j]; zero on closed classes.
    g = {}
    everything = set(U)
    for a in A:
        ga = {b: (c[a] if b == a else ZERO) for b in A}
        ga.update({r: ZERO for r in C})
        ha = h[a]
        ga.update(solve(U, lambda i: sum((p * step_cost(i, j) * ha[j] for j, p in chain.rows[i].items()), ZERO)
                        + outside(i, lambda j: ga[j], everything)))
        g[a] = ga
    return {"m": m, "s": s, "g": g}


def cost_reference(body_text: str, chain: Chain | None = None, absolute: bool = False) -> dict:
    """``{dim: {"mean", "variance", "mean_given": {a: x|None}}}`` for the request's chain.

    ``mean`` and ``variance`` are None when the start can lead into a closed class;
    ``mean_given[a]`` is None when P(ends in a) = 0.  With ``absolute`` every cost
    is replaced by its absolute value (used only to size float tolerances).
    """
    if chain is None:
        chain = parse_chain_text(body_text)
    st = structure(chain)
    h = _absorption(chain, st)
    dims, states_c, edges_c = parse_costs(body_text, chain)
    spreads = parse_cost_spreads(body_text, chain)
    support = [(s, w) for s, w in chain.start.items() if w != 0]
    out = {}
    for d in dims:
        c, e = states_c[d], edges_c[d]
        if absolute:
            c = {k: abs(v) for k, v in c.items()}
            e = {k: abs(v) for k, v in e.items()}
        mom = _moments(chain, st, h, c, e, spreads.get(d, {}))
        if any(mom["m"][s] is None for s, _ in support):
            mean = variance = None
        else:
            mean = sum((w * mom["m"][s] for s, w in support), ZERO)
            second = sum((w * mom["s"][s] for s, w in support), ZERO)
            variance = second - mean**2
        given = {}
        for a in chain.absorbing_list:
            pa = sum((w * h[a][s] for s, w in support), ZERO)
            joint = sum((w * mom["g"][a][s] for s, w in support), ZERO)
            given[a] = None if pa == 0 else joint / pa
        out[d] = {"mean": mean, "variance": variance, "mean_given": given,
                  "second": None if mean is None else variance + mean**2}
    return out
