"""The running service against the independent reference on seeded random chains.

For every seed the same chain is solved twice by the service:

* ``exact``: every ``exact`` string must equal the sympy answer as a rational,
  ``value`` must be its double, and nulls must sit exactly where the reference
  says a quantity is infinite or undefined;
* ``float``: every ``value`` must be within 1e-9 of the exact answer (relative
  or absolute, whichever is larger) with the same nulls and no ``exact`` key.

A failure names its seed; ``python chains.py SEED`` prints the request body.
"""

from __future__ import annotations

import functools
import random

import pytest

from chains import random_chain, request_text
from compare import Comparer
from reference import parse_chain_text, solve_exact, structure

SEEDS = range(300)
REPORT = ("absorption", "steps", "visits")


@functools.lru_cache(maxsize=None)
def case(seed: int):
    """(chain, parsed chain, exact reference) for one seed, computed once."""
    chain = random_chain(seed)
    parsed = parse_chain_text(request_text(chain, "exact"))
    return chain, parsed, solve_exact(parsed)


def _report_order(seed: int) -> list[str]:
    """The report list in a seed-dependent order (order must not matter)."""
    order = list(REPORT)
    random.Random(seed ^ 0x5EED).shuffle(order)
    return order


@pytest.mark.parametrize("mode", ["exact", "float"])
@pytest.mark.parametrize("seed", SEEDS)
def test_random_chain(service, seed, mode):
    """Every metric, from the start and from each non-absorbing state, matches the reference."""
    chain, parsed, ref = case(seed)
    text = request_text(chain, mode, report=_report_order(seed))
    got = service.solve(text)
    cmp = Comparer(mode)
    cmp.response(got, ref, REPORT, by_state=True)
    cmp.check(f"seed {seed}; request: {text}")


def _trapping_seeds(limit: int = 25) -> list[int]:
    """Seeds whose start can end trapped (the reference is cached for reuse)."""
    return [s for s in SEEDS if case(s)[2]["never_absorbed"] > 0][:limit]


@pytest.mark.parametrize("seed", _trapping_seeds())
def test_trapping_is_explained_in_warnings(service, seed):
    """Where the walk can be trapped, a warning names at least one trapping state."""
    chain, parsed, ref = case(seed)
    got = service.solve(request_text(chain, "exact"))
    trapping = set(structure(parsed).recurrent)
    warnings = got.get("warnings", [])
    assert any(any(s in w for s in trapping) for w in warnings if isinstance(w, str)), (
        f"seed {seed}: never_absorbed = {ref['never_absorbed']} but no warning names one of "
        f"{sorted(trapping)}: {warnings}"
    )


@pytest.mark.parametrize("seed", [s for s in SEEDS if s % 15 == 0])
@pytest.mark.parametrize("report", [["absorption"], ["steps"], ["visits"], ["absorption", "visits"]])
def test_report_subset(service, seed, report):
    """Only the requested metric groups are reported, and they still match."""
    chain, parsed, ref = case(seed)
    text = request_text(chain, "exact", report=report, by_state=False)
    got = service.solve(text)
    cmp = Comparer("exact")
    cmp.response(got, ref, report, by_state=False)
    for group in REPORT:
        if group not in report and group in got:
            cmp.errors.append(f"{group}: present although not requested")
    if got.get("by_state"):
        cmp.errors.append("by_state: reported although by_state was false")
    cmp.check(f"seed {seed}; request: {text}")
