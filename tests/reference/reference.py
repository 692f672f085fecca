"""Independent reference solver for absorbing Markov chains.

Written from the mathematics alone so that the service can be checked against
something that shares none of its code:

* the request body is parsed from its JSON text, every value read exactly
  (``"1/3"``, ``"0.25"``, ``"2.5e-3"``, ``"40%"``, JSON numbers by their
  decimal text);
* :func:`solve_exact` uses sympy ``Rational`` matrices and exact LU solves;
* :func:`solve_float` follows the same algebra with numpy ``float64``;
* :func:`sensitivity_reference` solves a chain with named parameters (values
  written as expressions such as ``"1 - drop"``) in the field of rational
  functions of each parameter and differentiates every metric symbolically there.

Terminology: a state is *absorbing* if it has no outgoing transitions, only a
self-loop, or is declared ``"absorbing": true``.  Among the other states, a
*closed class* (a strongly connected set with no positive edge leaving it) is
recurrent and traps the walk.  Every other non-absorbing state is *transient*;
``U`` below is that set and ``N = (I - Q_UU)^-1`` is its fundamental matrix.

Both solvers return the same plain structure (``None`` stands for JSON null):

    {"absorption": {a: x}, "never_absorbed": x,
     "steps": {"mean": x|None, "variance": x|None, "mean_given": {a: x|None}},
     "visits": {j: x|None},
     "by_state": {i: {<the four metrics above, from start i>}}}
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass
from fractions import Fraction

import numpy as np
import sympy
from sympy import Rational
from sympy.polys.matrices import DomainMatrix

ZERO = Rational(0)
ONE = Rational(1)


# --------------------------------------------------------------------------
# Parsing the wire format
# --------------------------------------------------------------------------


def parse_value(raw) -> Rational:
    """Read one value exactly: a JSON number's decimal text or a string form.

    JSON numbers reach us as ``str`` because :func:`parse_chain_text` loads
    the body with ``parse_float=str``; integers arrive as ``int``.
    """
    if isinstance(raw, bool):
        raise ValueError(f"boolean is not a value: {raw!r}")
    if isinstance(raw, int):
        return Rational(raw)
    if not isinstance(raw, str):
        raise ValueError(f"not a value: {raw!r}")
    text = raw.strip()
    if text.endswith("%"):
        return parse_value(text[:-1]) / 100
    if "/" in text:
        num, den = text.split("/")
        return Rational(parse_value(num), parse_value(den))
    # Fraction parses integers, decimals and scientific notation exactly.
    frac = Fraction(text)
    return Rational(frac.numerator, frac.denominator)


@dataclass
class Chain:
    """An exact, fully resolved chain: every state, its row, and the start."""

    states: list[str]  # in order of first declaration
    rows: dict[str, dict[str, Rational]]  # from -> to -> probability (zeros kept)
    absorbing: set[str]
    start: dict[str, Rational]  # start distribution (single start = {id: 1})

    @property
    def non_absorbing(self) -> list[str]:
        return [s for s in self.states if s not in self.absorbing]

    @property
    def absorbing_list(self) -> list[str]:
        return [s for s in self.states if s in self.absorbing]

    def positive_successors(self, state: str) -> list[str]:
        return [t for t, p in self.rows.get(state, {}).items() if p > 0]


def parse_chain_text(body_text: str) -> Chain:
    """Parse the ``chain`` of a request body given as JSON text."""
    body = json.loads(body_text, parse_float=str)
    return parse_chain(body["chain"])


def parse_chain(chain: dict, read=parse_value) -> Chain:
    """Resolve states, normalise weights and apply the absorbing rule.

    ``read`` turns one wire value into a Rational; :func:`parse_parametric_chain`
    passes one that evaluates expressions at the parameter values in force.
    """
    states: list[str] = []
    declared_absorbing: set[str] = set()

    def declare(sid: str) -> None:
        if sid not in states:
            states.append(sid)

    for entry in chain.get("states", []):
        if isinstance(entry, str):
            declare(entry)
        else:
            declare(entry["id"])
            if entry.get("absorbing", False):
                declared_absorbing.add(entry["id"])

    raw_rows: dict[str, dict[str, Rational]] = {}
    kinds: dict[str, str] = {}
    for tr in chain["transitions"]:
        src, dst = tr["from"], tr["to"]
        declare(src)
        declare(dst)
        kind = "probability" if "probability" in tr else "weight"
        assert kinds.setdefault(src, kind) == kind, "mixed kinds in one row"
        row = raw_rows.setdefault(src, {})
        row[dst] = row.get(dst, ZERO) + read(tr[kind])

    rows: dict[str, dict[str, Rational]] = {}
    for src, row in raw_rows.items():
        total = sum(row.values(), ZERO)
        if kinds[src] == "probability":
            assert total == 1, f"row {src} sums to {total}"
            rows[src] = dict(row)
        else:
            assert total > 0, f"row {src} has no positive weight"
            rows[src] = {dst: w / total for dst, w in row.items()}

    absorbing = set(declared_absorbing)
    for sid in states:
        row = rows.get(sid, {})
        if not row or set(row) == {sid}:
            absorbing.add(sid)
    for sid in declared_absorbing:
        assert set(rows.get(sid, {})) <= {sid}, f"declared absorbing {sid} has edges"
        rows[sid] = {sid: ONE}
    for sid in absorbing:
        rows[sid] = {sid: ONE}

    start_raw = chain["start"]
    if isinstance(start_raw, str):
        start = {start_raw: ONE}
    else:
        start = {sid: read(v) for sid, v in start_raw.items()}
        assert sum(start.values(), ZERO) == 1, "start distribution must sum to 1"
    for sid in start:
        assert sid in states, f"start state {sid} is not a state"
    return Chain(states, rows, absorbing, start)


# --------------------------------------------------------------------------
# Graph structure (shared by both solvers)
# --------------------------------------------------------------------------


def reachable_from(chain: Chain, sources) -> set[str]:
    """All states reachable (by positive-probability edges) from ``sources``."""
    seen = set(sources)
    stack = list(sources)
    while stack:
        s = stack.pop()
        for t in chain.positive_successors(s):
            if t not in seen:
                seen.add(t)
                stack.append(t)
    return seen


@dataclass
class Structure:
    """The decomposition every metric depends on."""

    absorbing: list[str]
    transient: list[str]  # U: non-absorbing and not in a closed class
    recurrent: list[str]  # C: union of the non-absorbing closed classes
    reach: dict[str, set[str]]  # reach[s]: states reachable from s (s included)
    cannot_absorb: set[str]  # non-absorbing states with no path to an absorbing one


def structure(chain: Chain) -> Structure:
    """Classify states by plain graph search: reachability sets and closed classes."""
    reach = {s: reachable_from(chain, [s]) for s in chain.states}
    recurrent = []
    for s in chain.non_absorbing:
        # s lies in a closed class iff every state it reaches can reach it back.
        if all(s in reach[t] for t in reach[s]):
            recurrent.append(s)
    rec = set(recurrent)
    transient = [s for s in chain.non_absorbing if s not in rec]
    cannot_absorb = {s for s in chain.non_absorbing if not (reach[s] & chain.absorbing)}
    assert rec <= cannot_absorb
    return Structure(chain.absorbing_list, transient, recurrent, reach, cannot_absorb)


# --------------------------------------------------------------------------
# Per-start quantities, then mixtures
# --------------------------------------------------------------------------


@dataclass
class FromState:
    """Everything about the walk started in one state.

    ``second`` is E[T^2] and ``joint[a]`` is E[T * 1{absorbed in a}]; both
    are what mixtures over a start distribution need.
    """

    absorption: dict
    never_absorbed: object
    mean: object  # None when infinite
    second: object  # None when infinite
    joint: dict
    visits: dict  # None where infinite


def _per_state(chain: Chain, st: Structure, zero, one, linear) -> dict[str, FromState]:
    """Compute :class:`FromState` for every state.

    ``linear(U, rhs_columns)`` must return N @ rhs for the fundamental matrix
    N of the transient set; everything else is arithmetic on its answers.
    """
    U, A, C = st.transient, st.absorbing, st.recurrent
    n_u = len(U)
    out: dict[str, FromState] = {}

    for a in A:
        out[a] = FromState(
            absorption={b: (one if b == a else zero) for b in A},
            never_absorbed=zero,
            mean=zero,
            second=zero,
            joint={b: zero for b in A},
            visits={j: zero for j in chain.non_absorbing},
        )
    for c in C:
        out[c] = FromState(
            absorption={b: zero for b in A},
            never_absorbed=one,
            mean=None,
            second=None,
            joint={b: zero for b in A},
            visits={j: (None if j in st.reach[c] else zero) for j in chain.non_absorbing},
        )
    if n_u == 0:
        return out

    # One-step columns out of U: into each absorbing state, and a column of ones.
    r_cols = [[chain.rows[u].get(a, zero) for u in U] for a in A]
    ones = [one] * n_u
    ident = [[one if r == c else zero for r in range(n_u)] for c in range(n_u)]
    sol = linear(U, r_cols + [ones] + ident)
    b_cols = sol[: len(A)]  # B[:, a] = N R[:, a]: absorption probabilities
    t = sol[len(A)]  # t = N 1: expected steps (valid where never trapped)
    n_cols = sol[len(A) + 1 :]  # columns of N itself: visits

    # Second round: N t (for the variance) and N B[:, a] (for E[T 1{a}]).
    sol2 = linear(U, [t] + b_cols)
    n_t = sol2[0]
    joint_cols = sol2[1:]

    for i, u in enumerate(U):
        absorption = {a: b_cols[k][i] for k, a in enumerate(A)}
        trapped_reachable = bool(st.reach[u] & set(C))
        never = one - sum(absorption.values(), zero)
        if trapped_reachable:
            mean = second = None
        else:
            mean = t[i]
            # Var = (2N - I)t - t*t, so E[T^2] = Var + t^2 = 2 N t - t.
            second = 2 * n_t[i] - t[i]
        visits = {}
        for j in chain.non_absorbing:
            if j in U:
                visits[j] = n_cols[U.index(j)][i]
            else:
                visits[j] = None if j in st.reach[u] else zero
        out[u] = FromState(
            absorption=absorption,
            never_absorbed=never,
            mean=mean,
            second=second,
            joint={a: joint_cols[k][i] for k, a in enumerate(A)},
            visits=visits,
        )
    return out


def _mix(chain: Chain, st: Structure, per: dict[str, FromState], start: dict, zero, is_zero, div) -> dict:
    """Metrics of the walk whose start is drawn from ``start``."""
    A = chain.absorbing_list
    support = [(s, w) for s, w in start.items() if not is_zero(w)]

    absorption = {a: sum((w * per[s].absorption[a] for s, w in support), zero) for a in A}
    never = sum((w * per[s].never_absorbed for s, w in support), zero)

    if any(per[s].mean is None for s, _ in support):
        mean = variance = None
    else:
        mean = sum((w * per[s].mean for s, w in support), zero)
        second = sum((w * per[s].second for s, w in support), zero)
        variance = second - mean * mean

    mean_given = {}
    for a in A:
        # P(a) = 0 exactly when no start state in the support can reach a.
        if not any(a in st.reach[s] for s, _ in support):
            mean_given[a] = None
        else:
            joint = sum((w * per[s].joint[a] for s, w in support), zero)
            mean_given[a] = div(joint, absorption[a])

    visits = {}
    for j in chain.non_absorbing:
        vals = [(w, per[s].visits[j]) for s, w in support]
        if any(v is None for _, v in vals):
            visits[j] = None
        else:
            visits[j] = sum((w * v for w, v in vals), zero)

    return {
        "absorption": absorption,
        "never_absorbed": never,
        "steps": {"mean": mean, "variance": variance, "mean_given": mean_given},
        "visits": visits,
    }


def _assemble(chain: Chain, st: Structure, per: dict[str, FromState], start: dict, unit,
              zero, is_zero, div) -> dict:
    """The start's metrics plus ``by_state``: the same metrics from each non-absorbing state."""
    result = _mix(chain, st, per, start, zero, is_zero, div)
    result["by_state"] = {
        s: _mix(chain, st, per, {s: unit}, zero, is_zero, div) for s in chain.non_absorbing
    }
    return result


# --------------------------------------------------------------------------
# The two solvers
# --------------------------------------------------------------------------


def _q_minus(chain: Chain, U: list[str]) -> list[list[Rational]]:
    """Entries of I - Q restricted to the transient set U, as nested lists."""
    return [[(ONE if r == c else ZERO) - chain.rows[r].get(c, ZERO) for c in U] for r in U]


def solve_exact(chain: Chain) -> dict:
    """Exact metrics with sympy rationals; ``None`` marks infinite/undefined."""
    st = structure(chain)

    def linear(U, columns):
        m = sympy.Matrix(_q_minus(chain, U))
        rhs = sympy.Matrix.hstack(*[sympy.Matrix(col) for col in columns])
        sol = m.LUsolve(rhs)
        # Exact LU must really solve the system, not approximately.
        assert m * sol == rhs
        return [list(sol[:, k]) for k in range(sol.shape[1])]

    per = _per_state(chain, st, ZERO, ONE, linear)
    # Internal consistency: the trapped mass is zero exactly where no closed
    # class is reachable, which is how means were declared finite or not.
    for s, f in per.items():
        assert (f.never_absorbed == 0) == (f.mean is not None), s
    return _assemble(chain, st, per, chain.start, ONE, ZERO, lambda w: w == 0, lambda x, y: x / y)


def solve_float(chain: Chain) -> dict:
    """The same metrics in float64 with numpy, for cross-checking the exact one."""
    st = structure(chain)

    def linear(U, columns):
        m = np.array([[float(x) for x in row] for row in _q_minus(chain, U)], dtype=float)
        rhs = np.array([[float(x) for x in col] for col in columns], dtype=float).T
        sol = np.linalg.solve(m, rhs)
        return [list(sol[:, k]) for k in range(sol.shape[1])]

    per = _per_state(chain, st, 0.0, 1.0, linear)
    start = {s: float(w) for s, w in chain.start.items()}
    return _assemble(chain, st, per, start, 1.0, 0.0, lambda w: w == 0, lambda x, y: x / y)


# --------------------------------------------------------------------------
# Parameters: expressions, the symbolic solution and its derivatives
# --------------------------------------------------------------------------
#
# A chain may declare ``"parameters": {"drop": "1/40"}`` and write any value as
# an expression over them (``"1 - drop"``, ``"2*drop/(1 + drop)"``, ``"drop^-1"``).
# Here, for each parameter x in turn (the others held at their values), every
# value becomes an element of the field QQ(x) of exact rational functions, the
# linear systems are solved in that field, and each metric is differentiated
# symbolically there before substituting the value in force.  The service
# instead differentiates its linear systems at a point, so the two share no
# algebra beyond the definitions of the metrics.

_TOKEN = re.compile(
    r"\s*(?:(?P<num>(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)"
    r"|(?P<name>[A-Za-z_][A-Za-z0-9_]*)|(?P<op>[-+*/^()]))"
)


def parse_expression(text: str, symbols: dict[str, sympy.Symbol]) -> sympy.Expr:
    """An exact sympy expression for ``+ - * /``, integer ``^``, parentheses, numbers, names.

    Recursive descent over the usual grammar; unary minus binds looser than
    ``^`` (``-p^2`` is ``-(p^2)``) and an exponent is a signed integer.
    """
    tokens: list[tuple[str, str]] = []
    pos = 0
    text = text.rstrip()
    while pos < len(text):
        m = _TOKEN.match(text, pos)
        if not m or m.end() == pos:
            raise ValueError(f"cannot read {text!r} at column {pos + 1}")
        kind = m.lastgroup
        tokens.append((kind, m.group(kind)))
        pos = m.end()
    at = 0

    def peek() -> str | None:
        return tokens[at][1] if at < len(tokens) and tokens[at][0] == "op" else None

    def take(op: str) -> bool:
        nonlocal at
        if peek() == op:
            at += 1
            return True
        return False

    def expr():
        value = term()
        while peek() in ("+", "-"):
            if take("+"):
                value = value + term()
            else:
                take("-")
                value = value - term()
        return value

    def term():
        value = unary()
        while peek() in ("*", "/"):
            if take("*"):
                value = value * unary()
            else:
                take("/")
                value = value / unary()
        return value

    def unary():
        if take("-"):
            return -unary()
        if take("+"):
            return unary()
        return power()

    def power():
        nonlocal at
        base = atom()
        if take("^"):
            sign = -1 if take("-") else 1
            if sign == 1:
                take("+")
            if at >= len(tokens) or tokens[at][0] != "num" or not tokens[at][1].isdigit():
                raise ValueError(f"{text!r}: an exponent must be an integer")
            exponent = sign * int(tokens[at][1])
            at += 1
            return base**exponent
        return base

    def atom():
        nonlocal at
        if at >= len(tokens):
            raise ValueError(f"{text!r}: unexpected end")
        kind, tok = tokens[at]
        if kind == "num":
            at += 1
            frac = Fraction(tok)
            return Rational(frac.numerator, frac.denominator)
        if kind == "name":
            at += 1
            if tok not in symbols:
                raise ValueError(f"{text!r}: unknown name {tok!r}")
            return symbols[tok]
        if take("("):
            inner = expr()
            if not take(")"):
                raise ValueError(f"{text!r}: missing ')'")
            return inner
        raise ValueError(f"{text!r}: unexpected {tok!r}")

    result = expr()
    if at != len(tokens):
        raise ValueError(f"{text!r}: unexpected {tokens[at][1]!r}")
    return sympy.sympify(result)


def read_parametric(raw, symbols: dict[str, sympy.Symbol]) -> sympy.Expr:
    """One wire value as an exact expression over the parameters (plain numbers included)."""
    if isinstance(raw, (bool, int)) or (isinstance(raw, str) and raw.strip().endswith("%")):
        return parse_value(raw)
    if not isinstance(raw, str):
        raise ValueError(f"not a value: {raw!r}")
    return parse_expression(raw, symbols)


@dataclass
class ParametricChain:
    """A chain whose rows and start are exact expressions in its parameters."""

    symbols: dict[str, sympy.Symbol]  # parameter name -> symbol, in declaration order
    values: dict[sympy.Symbol, Rational]  # the values in force (defaults, then overrides)
    kinds: dict[str, str]  # from -> "probability" or "weight"
    raw_rows: dict[str, dict[str, sympy.Expr]]  # from -> to -> value as written (pairs summed)
    raw_start: dict[str, sympy.Expr]
    at_values: Chain  # the same chain evaluated at ``values`` (decides the structure)


def parse_parametric_chain(chain: dict, overrides: dict | None = None) -> ParametricChain:
    """Resolve a chain with ``parameters``; ``overrides`` are the request's ``parameters``.

    Probability rows and a start distribution must sum to 1 identically (as
    rational functions of every parameter), not only at the values.
    """
    declared = chain.get("parameters", {})
    assert declared, "a parametric chain declares at least one parameter"
    symbols = {name: sympy.Symbol(name) for name in declared}
    values = {symbols[n]: parse_value(v) for n, v in declared.items()}
    for name, v in (overrides or {}).items():
        values[symbols[name]] = parse_value(v)

    def at_values(raw) -> Rational:
        x = read_parametric(raw, symbols).xreplace(values)
        assert isinstance(x, Rational), f"{raw!r} does not evaluate to a rational: {x}"
        return x

    numeric = parse_chain(chain, read=at_values)
    raw_rows: dict[str, dict[str, sympy.Expr]] = {}
    kinds: dict[str, str] = {}
    for tr in chain["transitions"]:
        src, dst = tr["from"], tr["to"]
        kinds[src] = "probability" if "probability" in tr else "weight"
        row = raw_rows.setdefault(src, {})
        row[dst] = row.get(dst, ZERO) + read_parametric(tr[kinds[src]], symbols)
    for src, row in raw_rows.items():
        if kinds[src] == "probability" and src not in numeric.absorbing:
            assert sympy.cancel(sum(row.values()) - 1) == 0, f"row {src} is not identically 1"
    start_raw = chain["start"]
    if isinstance(start_raw, str):
        raw_start = {start_raw: ONE}
    else:
        raw_start = {sid: read_parametric(v, symbols) for sid, v in start_raw.items()}
        assert sympy.cancel(sum(raw_start.values()) - 1) == 0, "start is not identically 1"
    return ParametricChain(symbols, values, kinds, raw_rows, raw_start, numeric)


def in_one_parameter(pc: ParametricChain, name: str):
    """(field, chain): the chain over QQ(name), every other parameter held at its value.

    A partial derivative holds the other parameters fixed by definition, and
    one-variable rational functions keep the exact solve fast.  Weights are
    normalised in the field, so a weight's derivative flows through the normalisation.
    """
    sym = pc.symbols[name]
    fixed = {s: v for s, v in pc.values.items() if s != sym}
    field = sympy.QQ.frac_field(sym)

    def element(expr):
        return field.from_sympy(sympy.sympify(expr).xreplace(fixed))

    rows: dict[str, dict[str, object]] = {}
    for src, row in pc.raw_rows.items():
        entries = {dst: element(x) for dst, x in row.items()}
        if pc.kinds[src] == "weight":
            total = sum(entries.values(), field.zero)
            entries = {dst: w / total for dst, w in entries.items()}
        rows[src] = entries
    for sid in pc.at_values.absorbing:
        rows[sid] = {sid: field.one}
    start = {sid: element(x) for sid, x in pc.raw_start.items()}
    return field, Chain(pc.at_values.states, rows, pc.at_values.absorbing, start)


def solve_parametric(pc: ParametricChain, name: str):
    """(field, metrics): every metric as an element of QQ(name), shaped as :func:`solve_exact`.

    The structure (which states are transient, which trap the walk) is taken at
    the values in force; it stays the same nearby as long as no expression
    crosses zero there.
    """
    field, chain = in_one_parameter(pc, name)
    st = structure(pc.at_values)

    def linear(U, columns):
        n = len(U)
        m = DomainMatrix(_q_minus_in(chain, U, field), (n, n), field)
        rhs = DomainMatrix([list(r) for r in zip(*columns)], (n, len(columns)), field)
        sol = m.lu_solve(rhs)
        assert m * sol == rhs  # the field is exact: the solve must be too
        rows = sol.to_list()
        return [[rows[r][k] for r in range(n)] for k in range(len(columns))]

    per = _per_state(chain, st, field.zero, field.one, linear)
    return field, _assemble(chain, st, per, chain.start, field.one, field.zero,
                            lambda w: w == field.zero, lambda x, y: x / y)


def _q_minus_in(chain: Chain, U: list[str], field) -> list[list[object]]:
    """I - Q on the transient set, with entries in ``field``."""
    return [[(field.one if r == c else field.zero) - chain.rows[r].get(c, field.zero) for c in U]
            for r in U]


def metric_leaves(metrics: dict):
    """Every number of one metrics dict, keyed as the service keys its sensitivities.

    Yields ``((key, sub_key_or_None), value)``: ``("absorption", a)``,
    ``("never_absorbed", None)``, ``("steps_mean", None)``, ``("steps_variance", None)``,
    ``("steps_mean_given", a)``, ``("visits", j)``.  Works on the reference's
    plain structure and on a response's metrics alike (keys missing there are skipped).
    """
    for a, v in (metrics.get("absorption") or {}).items():
        yield ("absorption", a), v
    if "never_absorbed" in metrics:
        yield ("never_absorbed", None), metrics["never_absorbed"]
    steps = metrics.get("steps")
    if steps is not None:
        yield ("steps_mean", None), steps.get("mean")
        yield ("steps_variance", None), steps.get("variance")
        for a, v in (steps.get("mean_given") or {}).items():
            yield ("steps_mean_given", a), v
    for j, v in (metrics.get("visits") or {}).items():
        yield ("visits", j), v


def metrics_from_leaves(leaves: dict) -> dict:
    """The inverse of :func:`metric_leaves`: the plain nested metrics structure."""
    out = {"absorption": {}, "never_absorbed": None,
           "steps": {"mean": None, "variance": None, "mean_given": {}}, "visits": {}}
    for (key, sub), v in leaves.items():
        if key == "absorption":
            out["absorption"][sub] = v
        elif key == "never_absorbed":
            out["never_absorbed"] = v
        elif key == "steps_mean":
            out["steps"]["mean"] = v
        elif key == "steps_variance":
            out["steps"]["variance"] = v
        elif key == "steps_mean_given":
            out["steps"]["mean_given"][sub] = v
        else:
            out["visits"][sub] = v
    return out


def _at(v, x: Rational) -> Rational:
    """A one-variable rational function evaluated exactly at x."""
    point = [(v.numer.ring.gens[0], sympy.QQ(int(x.p), int(x.q)))]
    num, den = sympy.QQ(v.numer.evaluate(point)), sympy.QQ(v.denom.evaluate(point))
    assert den != 0, f"{v} has a pole at {x}"
    return sympy.QQ.to_sympy(num / den)


def sensitivity_reference(pc: ParametricChain) -> dict:
    """The metrics at the values in force and their derivatives, from the start and each state.

    Returns ``{"metrics": {leaf: x}, "sensitivity": {name: {leaf: (d, e)}},
    "by_state": {s: {"metrics": ..., "sensitivity": ...}}}`` with ``leaf`` as in
    :func:`metric_leaves`, exact Rationals and ``None`` for null; ``e`` (the
    elasticity ``d * value / metric``) is ``None`` where the metric is 0.  A
    state's own entry holds its start fixed, so only the chain's dependence counts.
    Each metric is differentiated symbolically in sympy's field of rational
    functions (``FracElement.diff``: the quotient rule on exact polynomials).
    """
    out: dict = {}
    for name, sym in pc.symbols.items():
        field, result = solve_parametric(pc, name)
        gen, x = field.gens[0], pc.values[sym]
        starts = [(out, result)]
        for s, m in result["by_state"].items():
            starts.append((out.setdefault("by_state", {}).setdefault(s, {}), m))
        for slot, metrics in starts:
            leaves = dict(metric_leaves(metrics))
            values = {leaf: (None if v is None else _at(v, x)) for leaf, v in leaves.items()}
            if "metrics" in slot:  # every parameter's solve must agree on the values
                assert slot["metrics"] == values, name
            slot["metrics"] = values
            entries = {}
            for leaf, v in leaves.items():
                if v is None:
                    entries[leaf] = (None, None)
                    continue
                derivative = _at(v.diff(gen), x)
                metric = values[leaf]
                entries[leaf] = (derivative, None if metric == 0 else derivative * x / metric)
            slot.setdefault("sensitivity", {})[name] = entries
    out.setdefault("by_state", {})
    return out
