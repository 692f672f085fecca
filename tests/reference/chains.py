"""Seeded random chains in the wire format, covering the input shapes the contract allows.

Each chain is built from one ``random.Random(seed)`` so a failing case is
reproduced from its seed alone.  The generator decides roles first (absorbing
states of each kind, closed non-absorbing classes that trap the walk, states
that lead only into those classes, ordinary transient states) and then writes
rows whose probabilities are small exact rationals, rendered in every value
syntax the contract accepts.
"""

from __future__ import annotations

import json
import random
from fractions import Fraction

NAME_POOL = [
    "start", "lobby", "door", "hall", "vault", "cave", "bridge", "tower", "shop", "inn",
    "forest", "river", "gate", "crypt", "arena", "dock", "mine", "camp", "ruin", "peak",
]


def _ids(rng: random.Random, n: int) -> list[str]:
    """Distinct state ids, in a few styles (plain words, indexed, with punctuation)."""
    style = rng.choice(["word", "indexed", "mixed"])
    out: list[str] = []
    while len(out) < n:
        k = len(out)
        if style == "indexed":
            sid = f"s{k}"
        elif style == "word":
            sid = rng.choice(NAME_POOL) + ("" if rng.random() < 0.5 else f"_{k}")
        else:
            sid = rng.choice([f"room {k}", f"q-{k}", f"{rng.choice(NAME_POOL)}.{k}", f"S{k}"])
        if sid not in out:
            out.append(sid)
    return out


def _is_decimal(x: Fraction) -> bool:
    d = x.denominator
    for p in (2, 5):
        while d % p == 0:
            d //= p
    return d == 1


def _decimal_text(x: Fraction) -> str:
    """Exact terminating decimal text of x (only called when one exists)."""
    whole, rem = divmod(x.numerator, x.denominator)
    digits = []
    while rem:
        rem *= 10
        q, rem = divmod(rem, x.denominator)
        digits.append(str(q))
    return str(whole) + ("." + "".join(digits) if digits else "")


def render(rng: random.Random, x: Fraction):
    """One random wire rendering of the non-negative rational x."""
    forms = [lambda: f"{x.numerator}/{x.denominator}"]
    if x.denominator == 1:
        forms += [lambda: x.numerator, lambda: str(x.numerator)]
    if x.numerator and rng.random() < 0.15:
        k = rng.randint(2, 3)  # an unreduced fraction is still a fraction
        forms.append(lambda: f"{x.numerator * k}/{x.denominator * k}")
    if _is_decimal(x):
        dec = _decimal_text(x)
        if repr(float(dec)) == dec:  # a JSON number whose text is exactly dec
            forms.append(lambda: float(dec))
        forms.append(lambda: dec)
        forms.append(lambda: _decimal_text(x * 100) + "%")
        if x:
            forms.append(lambda: _scientific(x))
    return rng.choice(forms)()


def _scientific(x: Fraction) -> str:
    """x as mantissa e exponent, e.g. 1/8 -> '1.25e-1'."""
    exp = 0
    while x >= 10:
        x /= 10
        exp += 1
    while x < 1:
        x *= 10
        exp -= 1
    return f"{_decimal_text(x)}e{exp}"


def _composition(rng: random.Random, total: int, parts: int) -> list[int]:
    """``parts`` positive integers summing to ``total``."""
    cuts = sorted(rng.sample(range(1, total), parts - 1))
    return [b - a for a, b in zip([0] + cuts, cuts + [total])]


def _probabilities(rng: random.Random, k: int) -> list[Fraction]:
    """k positive rationals with denominators up to 12, summing exactly to 1."""
    d = rng.randint(max(k, 2), 12)
    return [Fraction(p, d) for p in _composition(rng, d, k)]


def _row(rng, src, targets, zero_candidates, kind):
    """Transitions out of ``src`` to ``targets`` (all positive), plus maybe a 0-probability edge."""
    out = []
    if kind == "probability":
        for dst, p in zip(targets, _probabilities(rng, len(targets))):
            out.append({"from": src, "to": dst, "probability": render(rng, p)})
        spare = [z for z in zero_candidates if z not in targets]
        if spare and rng.random() < 0.2:
            out.append({"from": src, "to": rng.choice(spare), "probability": render(rng, Fraction(0))})
    else:
        for dst in targets:
            w = rng.choice([Fraction(rng.randint(1, 9)), Fraction(rng.randint(1, 19), 2),
                            Fraction(rng.randint(1, 7), rng.randint(1, 5))])
            out.append({"from": src, "to": dst, "weight": render(rng, w)})
    return out


def random_chain(seed: int) -> dict:
    """A random chain in the wire format (a JSON-ready dict)."""
    rng = random.Random(seed)
    n = rng.randint(2, 12)
    ids = _ids(rng, n)
    rng.shuffle(ids)

    n_abs = rng.randint(1, min(3, n - 1))
    absorbing, rest = ids[:n_abs], ids[n_abs:]

    classes: list[list[str]] = []  # closed non-absorbing classes (trap the walk)
    while len(rest) >= 3 and rng.random() < (0.4 if not classes else 0.25):
        size = rng.randint(2, min(3, len(rest) - 1))
        classes.append(rest[:size])
        rest = rest[size:]
    trapped_members = [s for c in classes for s in c]
    leads_in: list[str] = []  # transient states that can only go into the classes
    if classes and len(rest) >= 2 and rng.random() < 0.4:
        leads_in, rest = rest[:1], rest[1:]
    transient = rest

    transitions: list[dict] = []
    states_entries: dict[str, object] = {}
    needs_listing: set[str] = set()

    for a in absorbing:
        kind = rng.choice(["bare", "self", "declared", "declared_self"])
        if kind in ("self", "declared_self"):
            if rng.random() < 0.7:
                transitions.append({"from": a, "to": a, "probability": render(rng, Fraction(1))})
            else:
                transitions.append({"from": a, "to": a, "weight": render(rng, Fraction(rng.randint(1, 5)))})
        if kind.startswith("declared"):
            states_entries[a] = {"id": a, "absorbing": True}
            needs_listing.add(a)

    for cls in classes:
        for k, s in enumerate(cls):
            nxt = cls[(k + 1) % len(cls)]
            extra = [t for t in cls if t != nxt and rng.random() < 0.4]
            kind = "probability" if rng.random() < 0.7 else "weight"
            transitions += _row(rng, s, [nxt] + extra, ids, kind)

    for s in leads_in:
        targets = rng.sample(trapped_members, rng.randint(1, min(2, len(trapped_members))))
        if rng.random() < 0.5:
            targets.append(s)
        kind = "probability" if rng.random() < 0.7 else "weight"
        transitions += _row(rng, s, targets, ids, kind)

    everything = ids
    for s in transient:
        k = rng.randint(1, min(4, n))
        pool = [t for t in everything if rng.random() < 0.8 or t in absorbing]
        targets = rng.sample(pool, min(k, len(pool)))
        if targets == [s] or not targets:
            targets = [rng.choice([t for t in everything if t != s])] + ([s] if targets else [])
        kind = "probability" if rng.random() < 0.7 else "weight"
        transitions += _row(rng, s, targets, everything, kind)

    # Zero-probability edges may point at absorbing states that nothing else reaches.
    appearing = {t["from"] for t in transitions} | {t["to"] for t in transitions}
    for s in ids:
        if s not in appearing:
            needs_listing.add(s)

    rng.shuffle(transitions)
    chain: dict = {"transitions": transitions}

    listing = rng.choice(["none", "needed", "all"])
    if listing == "none" and needs_listing:
        listing = "needed"
    if listing != "none":
        entries = []
        for s in ids:
            if s in states_entries:
                entries.append(states_entries[s])
            elif listing == "all" or s in needs_listing:
                if s in absorbing or rng.random() < 0.6:
                    entries.append(s)
                elif rng.random() < 0.5:
                    entries.append({"id": s})
                else:
                    entries.append({"id": s, "absorbing": False})
        rng.shuffle(entries)
        chain["states"] = entries

    chain["start"] = _random_start(rng, ids, absorbing, trapped_members + leads_in, transient)
    return chain


def _random_start(rng, ids, absorbing, trapped, transient):
    """A single start state (mostly transient) or a distribution over 2-3 states."""
    def pick():
        r = rng.random()
        if r < 0.15:
            return rng.choice(absorbing)
        if r < 0.3 and trapped:
            return rng.choice(trapped)
        return rng.choice(transient or ids)

    if rng.random() < 0.55:
        return pick()
    chosen: list[str] = []
    for _ in range(rng.randint(2, 3)):
        s = pick()
        if s not in chosen:
            chosen.append(s)
    if len(chosen) == 1:
        return chosen[0] if rng.random() < 0.5 else {chosen[0]: render(rng, Fraction(1))}
    probs = _probabilities(rng, len(chosen))
    dist = {s: render(rng, p) for s, p in zip(chosen, probs)}
    if rng.random() < 0.15:
        spare = [s for s in ids if s not in dist]
        if spare:
            dist[rng.choice(spare)] = render(rng, Fraction(0))
    return dist


def request_text(chain: dict, arithmetic: str, report=("absorption", "steps", "visits"),
                 by_state: bool = True, parameters: dict | None = None) -> str:
    """The exact JSON body sent to the service (and parsed by the reference).

    ``parameters`` (request-level overrides of the chain's values) is sent only when given.
    """
    body = {"chain": chain, "arithmetic": arithmetic, "report": list(report), "by_state": by_state}
    if parameters:
        body["parameters"] = parameters
    return json.dumps(body)


# --------------------------------------------------------------------------
# Parametric chains: values written as expressions over named parameters
# --------------------------------------------------------------------------

PARAMETER_POOL = ["p", "q", "drop", "fail", "hit_rate", "k2"]

# Expressions that lie strictly inside (0, 1) whenever every parameter does, so a
# row built from them stays valid for any value in (0, 1) (defaults, overrides,
# and the finite-difference points beside them).
CHANCE_FORMS = [
    "{a}", "1 - {a}", "{a}*{b}", "{a}^2", "(1 + {a})/2", "{a}/2", "2*{a}/(1 + {a})",
    "1/(1 + {a})", "{b}*(1 - {a})", "1 - {a}*{b}", "({a} + {b})/3", "{a}^-1/(1 + {a}^-1)",
    "1/3 + {a}/3",
]
# Weights that stay positive whenever every parameter lies in (0, 1).
WEIGHT_FORMS = [
    "1 + 2*{a}", "3 - {a}", "{a}", "2*{b} + {a}", "1/2 + {a}^2", "{a}^-1", "(1 + {a})*(2 - {b})",
]


def _grouped(expr: str) -> str:
    """``expr`` safe to use as an operand (a bare name or number needs no parentheses)."""
    return expr if expr.replace("_", "").isalnum() else f"({expr})"


def _chance(rng: random.Random, names: list[str]) -> str:
    return rng.choice(CHANCE_FORMS).format(a=rng.choice(names), b=rng.choice(names))


def _shares(rng: random.Random, rest: str, k: int) -> list[str]:
    """k expressions summing identically to ``rest``."""
    if k == 1:
        return [rest]
    if rng.random() < 0.4:
        return [f"{_grouped(rest)}/{k}"] * k
    out = []
    for f in _probabilities(rng, k):
        out.append(rng.choice([f"{_grouped(rest)}*{f}", f"{f.numerator}*{_grouped(rest)}/{f.denominator}"]))
    return out


def _parametric_row(rng: random.Random, src: str, targets: list[str], names: list[str]) -> list[dict]:
    """Transitions out of ``src``: probabilities summing to 1 identically, or positive weights."""
    k = len(targets)
    style = rng.choice(["chance", "chance", "split", "weights", "weights", "constant"])
    if k == 1:
        style = rng.choice(["constant", "weights"])
    if style == "split" and k < 3:
        style = "chance"
    if style == "chance":  # [e, shares of 1 - e]
        e = _chance(rng, names)
        values = [e] + _shares(rng, f"1 - {_grouped(e)}", k - 1)
    elif style == "split":  # [a*b, a*(1 - b), shares of 1 - a]
        a, b = rng.choice(names), rng.choice(names)
        values = [f"{a}*{b}", f"{a}*(1 - {b})"] + _shares(rng, f"1 - {a}", k - 2)
    elif style == "constant":
        values = [render(rng, p) for p in _probabilities(rng, k)]
    else:
        weights = []
        for _ in targets:
            if rng.random() < 0.7:
                weights.append(rng.choice(WEIGHT_FORMS).format(a=rng.choice(names), b=rng.choice(names)))
            else:
                weights.append(render(rng, Fraction(rng.randint(1, 9), rng.randint(1, 3))))
        return [{"from": src, "to": t, "weight": w} for t, w in zip(targets, weights)]
    return [{"from": src, "to": t, "probability": v} for t, v in zip(targets, values)]


def random_parametric_chain(seed: int) -> dict:
    """A random chain with one or two parameters (rational defaults in (0, 1)), 2-7 states.

    Rows are valid for every parameter value in (0, 1) and no expression
    vanishes there, so the structure of the chain does not depend on the values.
    Some chains have a closed class that traps the walk; some starts are
    distributions whose weights depend on a parameter.
    """
    rng = random.Random(seed)
    names = rng.sample(PARAMETER_POOL, rng.choice([1, 2, 2]))
    parameters = {}
    for name in names:
        d = rng.randint(2, 9)
        parameters[name] = render(rng, Fraction(rng.randint(1, d - 1), d))

    n = rng.randint(2, 7)
    ids = _ids(rng, n)
    rng.shuffle(ids)
    n_abs = rng.randint(1, min(2, n - 1))
    absorbing, rest = ids[:n_abs], ids[n_abs:]
    trap: list[str] = []
    if len(rest) >= 3 and rng.random() < 0.35:
        trap, rest = rest[:2], rest[2:]
    transient = rest

    transitions: list[dict] = []
    listed: list[object] = []
    for a in absorbing:
        kind = rng.choice(["bare", "bare", "self", "declared"])
        if kind == "self":
            transitions.append({"from": a, "to": a, "probability": rng.choice([1, "1"])})
        elif kind == "declared":
            listed.append({"id": a, "absorbing": True})
    if trap:
        x, y = trap
        transitions += _parametric_row(rng, x, [y, x] if rng.random() < 0.5 else [y], names)
        transitions += _parametric_row(rng, y, [x, y] if rng.random() < 0.5 else [x], names)
    for s in transient:
        pool = [t for t in ids if t != s]
        targets = rng.sample(pool, rng.randint(1, min(3, len(pool))))
        if rng.random() < 0.4:
            targets.append(s)
        rng.shuffle(targets)
        row = _parametric_row(rng, s, targets, names)
        if rng.random() < 0.15:  # a repeated (from, to) pair: the two halves are summed
            k = rng.randrange(len(row))
            kind = "probability" if "probability" in row[k] else "weight"
            v = row[k][kind]
            if isinstance(v, str) and not v.endswith("%"):
                half = {**row[k], kind: f"{_grouped(v)}/2"}
                row[k:k + 1] = [half, dict(half)]
        transitions += row

    appearing = {t["from"] for t in transitions} | {t["to"] for t in transitions}
    listed += [s for s in ids if s not in appearing and s not in [e["id"] for e in listed]]
    rng.shuffle(transitions)
    chain: dict = {"parameters": parameters, "transitions": transitions}
    if listed:
        chain["states"] = listed

    r = rng.random()
    if r < 0.5:
        pick = rng.random()
        chain["start"] = (rng.choice(absorbing) if pick < 0.1 else
                          rng.choice(trap) if pick < 0.2 and trap else rng.choice(transient))
    else:
        chosen = rng.sample(ids, min(len(ids), rng.randint(2, 3)))
        if r < 0.8:  # the start itself depends on a parameter
            e = _chance(rng, names)
            values = [e] + _shares(rng, f"1 - {_grouped(e)}", len(chosen) - 1)
        else:
            values = [render(rng, p) for p in _probabilities(rng, len(chosen))]
        chain["start"] = dict(zip(chosen, values))
    return chain


if __name__ == "__main__":  # print one chain, for reproducing a failure by hand
    import sys

    print(request_text(random_chain(int(sys.argv[1])), sys.argv[2] if len(sys.argv) > 2 else "exact"))
