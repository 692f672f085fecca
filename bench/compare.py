#!/usr/bin/env python3
"""Times the service against reference libraries on the same chains, in one run.

For each chain family and size it measures
  - the service over HTTP (wall time, and the service's own `solver.elapsed_ms`, which covers
    parsing, validation and solving), in float and, where affordable, in exact arithmetic;
  - scipy's sparse LU (`scipy.sparse.linalg.splu`) on I - Q with the same right-hand sides
    (absorption columns and the ones vector), for float;
  - python-flint's exact rational solve (`fmpq_mat.solve`), for exact;
and prints seconds and the ratio service / reference (below 1: the service is faster).
Results are also written to bench/results.md with a description of the machine.

Usage: bench/run (builds the release binary, starts it, installs the Python packages).
"""
import gc
import json
import os
import platform
import resource
import sys
import time
import urllib.request

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

BASE = os.environ.get("ODDSMITH_URL", "http://127.0.0.1:8080")


def walk(n):
    """A 1-D walk on 1..n with absorbing ends 0 and n+1: steps +1 2/5, -1 1/2, stay 1/10."""
    rows = []
    for z in range(1, n + 1):
        rows.append((z, z + 1, "2/5", 0.4))
        rows.append((z, z - 1, "1/2", 0.5))
        rows.append((z, z, "1/10", 0.1))
    return n + 2, rows, [0, n + 1]


def random_sparse(n, seed=7, out=5):
    """Random chain: each of n transient states goes to `out` random states (weights 1..4)
    and to the exit with weight 1; exits are states n (won) and n+1 (lost)."""
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n):
        targets = rng.integers(0, n, size=out)
        weights = rng.integers(1, 5, size=out)
        exit_to = n + (i % 2)
        total = int(weights.sum()) + 1
        for t, w in zip(targets, weights):
            rows.append((i, int(t), f"{int(w)}/{total}", int(w) / total))
        rows.append((i, exit_to, f"1/{total}", 1 / total))
    return n + 2, rows, [n, n + 1]


def dense(n):
    """Every transient state reaches every other (weights 1..5) plus two exits."""
    rows = []
    for i in range(n):
        ws = [1 + (i * 7 + j * 3) % 5 for j in range(n)] + [1, 1 + i % 2]
        total = sum(ws)
        for j in range(n):
            rows.append((i, j, f"{ws[j]}/{total}", ws[j] / total))
        rows.append((i, n, f"{ws[n]}/{total}", ws[n] / total))
        rows.append((i, n + 1, f"{ws[n + 1]}/{total}", ws[n + 1] / total))
    return n + 2, rows, [n, n + 1]


def merged(rows):
    """Sums repeated (from, to) pairs in float (the service sums them exactly)."""
    acc = {}
    for i, j, _, p in rows:
        acc[(i, j)] = acc.get((i, j), 0.0) + p
    return acc


def request_body(states, rows, arithmetic):
    table = {
        "from": [r[0] for r in rows],
        "to": [r[1] for r in rows],
        "probability": [r[2] for r in rows],
    }
    chain = {"states": [f"s{i}" for i in range(states)], "table": table, "start": "s1"}
    return json.dumps({"chain": chain, "arithmetic": arithmetic}).encode()


def time_service(states, rows, arithmetic):
    body = request_body(states, rows, arithmetic)
    request = urllib.request.Request(
        f"{BASE}/v1/solve", data=body, headers={"content-type": "application/json"}
    )
    started = time.perf_counter()
    try:
        with urllib.request.urlopen(request, timeout=600) as response:
            answer = json.load(response)
    except urllib.error.HTTPError as error:
        return None, None, f"HTTP {error.code}"
    wall = time.perf_counter() - started
    return wall, answer["solver"]["elapsed_ms"] / 1e3, answer["solver"]["method"]


def time_scipy(states, rows, absorbing):
    transient = [s for s in range(states) if s not in absorbing]
    position = {s: k for k, s in enumerate(transient)}
    n = len(transient)
    i_idx, j_idx, vals = [], [], []
    rhs = np.zeros((n, len(absorbing) + 1))
    rhs[:, -1] = 1.0
    for (i, j), p in merged(rows).items():
        if j in position:
            i_idx.append(position[i])
            j_idx.append(position[j])
            vals.append(-p)
        else:
            rhs[position[i], absorbing.index(j)] += p
    started = time.perf_counter()
    a = sp.identity(n, format="csc") + sp.csc_matrix((vals, (i_idx, j_idx)), shape=(n, n))
    lu = spla.splu(a.tocsc(), permc_spec="MMD_AT_PLUS_A")
    lu.solve(rhs)
    return time.perf_counter() - started


def time_flint(states, rows, absorbing):
    import flint

    transient = [s for s in range(states) if s not in absorbing]
    position = {s: k for k, s in enumerate(transient)}
    n = len(transient)
    exact = {}
    for i, j, text, _ in rows:
        num, den = (int(x) for x in text.split("/"))
        exact[(i, j)] = exact.get((i, j), flint.fmpq(0)) + flint.fmpq(num, den)
    started = time.perf_counter()
    a = flint.fmpq_mat(n, n)
    b = flint.fmpq_mat(n, len(absorbing) + 1)
    for k in range(n):
        a[k, k] = 1
        b[k, len(absorbing)] = 1
    for (i, j), p in exact.items():
        if j in position:
            a[position[i], position[j]] -= p
        else:
            b[position[i], absorbing.index(j)] += p
    a.solve(b)
    return time.perf_counter() - started


def show(seconds, otherwise="-"):
    return f"{seconds:.4f}" if seconds is not None else otherwise


def main():
    cases = [
        ("walk", walk, [10_000, 100_000], [100, 1_000]),
        ("random", random_sparse, [1_000, 3_000, 10_000], [100, 200]),
        ("dense", dense, [100, 200, 400], [50, 100]),
    ]
    lines = []
    header = (
        f"| family | states | arithmetic | service wall s | service solver s | reference | "
        f"reference s | ratio |"
    )
    lines.append(header)
    lines.append("|---|---:|---|---:|---:|---|---:|---:|")
    print(header)
    for family, build, float_sizes, exact_sizes in cases:
        runs = [("float", n, time_scipy, "scipy splu") for n in float_sizes]
        runs += [("exact", n, time_flint, "python-flint") for n in exact_sizes]
        for arithmetic, n, reference_timer, reference_name in runs:
            states, rows, absorbing = build(n)
            wall, inside, method = time_service(states, rows, arithmetic)
            reference = reference_timer(states, rows, absorbing)
            ratio = f"{wall / reference:.2f}" if wall else "-"
            line = (
                f"| {family} | {n} | {arithmetic} | {show(wall, method)} | {show(inside)} | "
                f"{reference_name} | {reference:.4f} | {ratio} |"
            )
            print(line, flush=True)
            lines.append(line)
            gc.collect()
    machine = (
        f"{platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}, "
        f"peak RSS of this script {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss // 1024} MB"
    )
    with open(os.path.join(os.path.dirname(__file__), "results.md"), "w") as out:
        out.write("# Benchmark results (last run)\n\n")
        out.write(f"Machine: {machine}. Written by `bench/run`; service timings include HTTP, "
                  "parsing and validation (`service solver s` is the service's own measure "
                  "from parsing to answer). `ratio` is service wall time over the reference's "
                  "time (below 1: the service is faster); reference times exclude building the "
                  "matrices in Python.\n\n")
        out.write("\n".join(lines) + "\n")
    print(f"\nmachine: {machine}", file=sys.stderr)


if __name__ == "__main__":
    main()
