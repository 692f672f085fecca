#!/usr/bin/env python3
"""Measures where exact arithmetic stops being affordable, to place the `auto` line.

Starts nothing itself: point it at a running release server (default http://127.0.0.1:8080,
started with a generous budget, e.g. ODDSMITH_SOLVE_BUDGET_MS=120000) and it times exact and
float solves of two chain families at growing sizes:
  - dense: every transient state reaches every other (weights 1..5) plus two exits;
  - banded: a 1-D walk with steps -1, 0, +1 and absorbing ends.
Prints one row per size: seconds for exact, seconds for float, their ratio, the exact seconds
per (factor entry x state x system), the cost unit of p-adic lifting in `auto`'s model, and what
`auto` chose. The factor's fill is read from the float answer's method.
Standard library only.
"""
import json
import re
import sys
import time
import urllib.request

BASE = sys.argv[1] if len(sys.argv) > 1 else "http://127.0.0.1:8080"


def dense(n):
    transitions = []
    for i in range(n):
        for j in range(n):
            transitions.append({"from": f"s{i}", "to": f"s{j}", "weight": 1 + (i * 7 + j * 3) % 5})
        transitions.append({"from": f"s{i}", "to": "won", "weight": 1})
        transitions.append({"from": f"s{i}", "to": "lost", "weight": 1 + i % 2})
    return {"transitions": transitions, "start": "s0"}


def banded(n):
    transitions = []
    for z in range(1, n + 1):
        transitions.append({"from": f"z{z}", "to": f"z{z + 1}", "probability": "2/5"})
        transitions.append({"from": f"z{z}", "to": f"z{z - 1}", "probability": "1/2"})
        transitions.append({"from": f"z{z}", "to": f"z{z}", "probability": "1/10"})
    return {"transitions": transitions, "start": "z1"}


def timed(chain, arithmetic):
    """Seconds the service spent, and the factor's fill, or the HTTP error."""
    body = json.dumps({"chain": chain, "arithmetic": arithmetic}).encode()
    request = urllib.request.Request(
        f"{BASE}/v1/solve", data=body, headers={"content-type": "application/json"}
    )
    try:
        with urllib.request.urlopen(request) as response:
            answer = json.load(response)
        found = re.search(r"(\d+) factor entries", answer["solver"]["method"])
        fill = int(found.group(1)) if found else None
        return answer["solver"]["elapsed_ms"] / 1e3, fill, answer["arithmetic"]
    except urllib.error.HTTPError as error:
        return f"HTTP {error.code}", None, None


def main():
    print(
        f"{'family':8} {'states':>7} {'fill':>8} {'exact s':>10} {'float s':>10} {'ratio':>8}"
        f" {'s/(f*n*sys)':>11} {'auto s':>8} {'auto':>6}"
    )
    # Systems solved for the default report with two outcomes: two absorption columns, the
    # steps, their second moment, and one joint moment per outcome.
    systems = 6
    for family, sizes in [
        ("dense", [50, 100, 200, 400]),
        ("banded", [100, 1000, 3000]),
    ]:
        for n in sizes:
            chain = dense(n) if family == "dense" else banded(n)
            (e, _, _), (f, fill, _) = timed(chain, "exact"), timed(chain, "float")
            a, _, used = timed(chain, "auto")
            exact_ok = isinstance(e, float)
            ratio = f"{e / f:8.0f}" if exact_ok and f else "       -"
            unit = f"{e / (fill * n * systems):11.2e}" if exact_ok else "          -"
            show = lambda v, w=10: f"{v:{w}.3f}" if isinstance(v, float) else f"{v:>{w}}"
            print(f"{family:8} {n:7d} {fill:8d} {show(e)} {show(f)} {ratio} {unit} {show(a, 8)} {used:>6}")


if __name__ == "__main__":
    main()
