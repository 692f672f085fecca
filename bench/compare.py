#!/usr/bin/env python3
"""Times the service's engine against reference libraries on the same chains, in one run.

For each chain family and size it measures
  - the engine in-process: `target/release/examples/in_process` on the request file, one fresh
    process per request (parse, validate and solve seconds, and the process's peak memory);
  - the same request body over HTTP to a release server started here (wall time), and from that
    the HTTP overhead;
  - reference libraries on I - Q with the same right-hand sides (absorption columns and the ones
    vector), each timing in a fresh Python process so its peak memory can be read:
      float: scipy.sparse.linalg.splu (symmetric ordering MMD_AT_PLUS_A) and, for random sparse
             chains, scipy.sparse.linalg.bicgstab (no preconditioner, one call per right-hand side);
      exact: python-flint's fmpq_mat.solve on the same exact rationals.
It prints one row per (case, reference) as it goes and writes bench/results.md: the machine, the
column definitions, the table, the targets and notes (failures, skips, disagreements).

Usage: bench/run (builds the release binaries, installs the Python packages, runs this).
Internal: `compare.py --reference NAME CASE.npz` runs one reference timing and prints JSON.
"""
import argparse
import json
import math
import os
import platform
import re
import shutil
import socket
import subprocess
import sys
import tempfile
import time
import urllib.error
import urllib.request
from fractions import Fraction

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
SERVER = os.path.join(ROOT, "target", "release", "oddsmith")
IN_PROCESS = os.path.join(ROOT, "target", "release", "examples", "in_process")
RESULTS = os.path.join(HERE, "results.md")

# Seconds allowed for each measurement (one in-process run, one HTTP request, one reference).
CASE_TIMEOUT_S = 240
# Measurements faster than this are repeated (three runs in all) and the fastest is kept.
REPEAT_BELOW_S = 2.0
REPEATS = 3
# Above these sizes a reference is skipped (see `reference_plan`).
SPLU_RANDOM_MAX = 20_000
FLINT_MAX_TRANSIENT = 2_000

MIB = 1024 * 1024
# References run with single-threaded BLAS: on this shared 2-core machine OpenBLAS's worker
# threads made bicgstab up to five times slower whenever anything else was running.
REFERENCE_ENV = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")


# ---------------------------------------------------------------------------------------------
# Chain families. Each builder returns a Chain: arrays of (from, to, numerator, denominator) over
# state indices, where a row is either an exact probability num/den or (den = 1) an integer weight.


class Chain:
    def __init__(self, family, size, n_states, frm, to, num, den, kind, absorbing, start, ids):
        self.family = family
        self.size = size  # the family's size parameter (for the notes)
        self.n_states = n_states
        self.frm = np.asarray(frm, dtype=np.int64)
        self.to = np.asarray(to, dtype=np.int64)
        self.num = np.asarray(num, dtype=np.int64)
        self.den = np.asarray(den, dtype=np.int64)
        self.kind = kind  # "probability" or "weight"
        self.absorbing = list(absorbing)
        self.start = start
        self.ids = ids  # a function: index -> state id

    @property
    def transitions(self):
        return len(self.frm)


def generic_ids(names):
    return lambda i: names.get(i, f"s{i}")


def walk(n):
    """A 1-D walk on 1..n, absorbing at 0 (`bottom`) and n+1 (`top`): up 2/5, down 1/2, stay
    1/10; it starts 5 steps below the top. I - Q is tridiagonal (banded)."""
    z = np.arange(1, n + 1, dtype=np.int64)
    frm = np.repeat(z, 3)
    to = np.stack([z + 1, z - 1, z], axis=1).reshape(-1)
    num = np.tile(np.array([2, 1, 1], dtype=np.int64), n)
    den = np.tile(np.array([5, 2, 10], dtype=np.int64), n)
    ids = generic_ids({0: "bottom", n + 1: "top"})
    return Chain("walk", n, n + 2, frm, to, num, den, "probability", [0, n + 1], n - 4, ids)


def random_sparse(n, seed=7, out=4):
    """Each of n transient states moves to `out` uniformly random transient states (integer
    weights 1..4; repeated targets merged) and, with weight 1, to an exit (`won` for even states,
    `lost` for odd ones): 4-5 out-edges per state, an expander-like graph that fills badly."""
    rng = np.random.default_rng(seed)
    frm = np.repeat(np.arange(n, dtype=np.int64), out)
    to = rng.integers(0, n, size=n * out, dtype=np.int64)
    w = rng.integers(1, 5, size=n * out, dtype=np.int64)
    key, inverse = np.unique(frm * n + to, return_inverse=True)
    w = np.bincount(inverse.reshape(-1), weights=w).astype(np.int64)
    frm, to = key // n, key % n
    exits = np.arange(n, dtype=np.int64)
    frm = np.concatenate([frm, exits])
    to = np.concatenate([to, n + exits % 2])
    w = np.concatenate([w, np.ones(n, dtype=np.int64)])
    order = np.argsort(frm, kind="stable")
    ids = generic_ids({n: "won", n + 1: "lost"})
    return Chain("random", n, n + 2, frm[order], to[order], w[order], np.ones(len(w), np.int64),
                 "weight", [n, n + 1], 0, ids)


def dense(n, seed=11):
    """Every transient state reaches every transient state and two exits, with random integer
    weights 1..5."""
    rng = np.random.default_rng(seed)
    i = np.repeat(np.arange(n, dtype=np.int64), n + 2)
    j = np.tile(np.arange(n + 2, dtype=np.int64), n)
    w = rng.integers(1, 6, size=n * (n + 2), dtype=np.int64)
    ids = generic_ids({n: "won", n + 1: "lost"})
    return Chain("dense", n, n + 2, i, j, w, np.ones(len(w), np.int64), "weight", [n, n + 1], 0,
                 ids)


# Pattern automaton: a stream of symbols a, b, c, d with probabilities 1/2, 1/4, 1/8, 1/8. The
# reader waits for the motif MOTIF to have occurred k times (overlapping occurrences count), but
# stops as soon as the stop run d^m occurs. A state is (occurrences so far, the longest suffix of
# the stream that is a prefix of the motif or of the stop run) -- the Aho-Corasick automaton of
# the two words, one copy per count: about k * (|MOTIF| + m) states, 4 symbols out of each.
SYMBOLS = {"a": Fraction(1, 2), "b": Fraction(1, 4), "c": Fraction(1, 8), "d": Fraction(1, 8)}
MOTIF = "aabacaab"  # probability 2^-13


def stop_length(k):
    """Length m of the stop run that makes both outcomes plausible: k motifs take about
    k * 2^13 symbols, and d^m occurs about once every 8^m."""
    return max(2, round(math.log(k * 2**13, 8)))


def pattern(k):
    m = stop_length(k)
    stop = "d" * m
    prefixes = sorted({MOTIF[:i] for i in range(len(MOTIF) + 1)} | {stop[:i] for i in range(m + 1)},
                      key=lambda s: (len(s), s))

    def goto(u, s):
        text = u + s
        for cut in range(len(text) + 1):
            if text[cut:] in prefix_set:
                return text[cut:]
        return ""

    prefix_set = set(prefixes)
    nodes = [p for p in prefixes if p != stop]
    index = {}
    ids = []
    for c in range(k):
        for u in nodes:
            if c == 0 and u == MOTIF:
                continue  # reached only by completing a motif, i.e. at count >= 1
            index[(c, u)] = len(ids)
            ids.append(f"{c}:{u or '-'}")
    done, stopped = len(ids), len(ids) + 1
    ids += ["done", "stopped"]
    frm, to, num, den = [], [], [], []
    for (c, u), i in index.items():
        out = {}
        for s, p in SYMBOLS.items():
            v = goto(u, s)
            if v == stop:
                target = stopped
            elif v == MOTIF:
                target = done if c + 1 == k else index[(c + 1, v)]
            else:
                target = index[(c, v)]
            out[target] = out.get(target, Fraction(0)) + p
        for target, p in out.items():
            frm.append(i)
            to.append(target)
            num.append(p.numerator)
            den.append(p.denominator)
    return Chain("pattern", k, len(ids), frm, to, num, den, "probability", [done, stopped], 0,
                 lambda i: ids[i])


FAMILIES = {"walk": walk, "random": random_sparse, "dense": dense, "pattern": pattern}

# (family, size parameter, arithmetic). Pattern k=700 and k=7000 give about 10^4 and 10^5 states.
CASES = (
    [("walk", n, "float") for n in (10**4, 10**5, 10**6)]
    + [("random", n, "float") for n in (10**3, 10**4, 10**5, 10**6)]
    + [("pattern", k, "float") for k in (700, 7000)]
    + [("dense", n, "float") for n in (100, 200, 400)]
    + [("walk", n, "exact") for n in (100, 1000, 10**4)]
    + [("random", n, "exact") for n in (100, 200)]
    + [("dense", n, "exact") for n in (50, 100, 200, 400)]
    + [("pattern", 15, "exact")]
)
# Sizes asked for but left out of the run, with the reason (shown in results.md).
DROPPED = []


def reference_plan(chain, arithmetic):
    """[(reference name, reason to skip or None)] for a case."""
    n = chain.n_states - len(chain.absorbing)
    if arithmetic == "exact":
        if n > FLINT_MAX_TRANSIENT:
            return [("python-flint", f"skipped: a dense {n}x{n} rational system is out of reach "
                                     f"(fmpq_mat is dense; limit {FLINT_MAX_TRANSIENT} states)")]
        return [("python-flint", None)]
    if chain.family == "random":
        splu = None if n <= SPLU_RANDOM_MAX else (
            f"skipped: LU fill of a random graph explodes above {SPLU_RANDOM_MAX} states")
        return [("scipy splu", splu), ("scipy bicgstab", None)]
    return [("scipy splu", None)]


# ---------------------------------------------------------------------------------------------
# Request bodies and reference inputs.


def values_json(chain):
    if chain.kind == "weight":
        return ",".join(map(str, chain.num.tolist()))
    pairs = np.stack([chain.num, chain.den], axis=1)
    unique, inverse = np.unique(pairs, axis=0, return_inverse=True)
    texts = np.array([f'"{Fraction(int(a), int(b))}"' for a, b in unique], dtype=object)
    return ",".join(texts[inverse.reshape(-1)].tolist())


def request_body(chain, arithmetic):
    ids = [chain.ids(i) for i in range(chain.n_states)]
    return "".join([
        '{"arithmetic":"', arithmetic, '","chain":{"states":', json.dumps(ids),
        ',"table":{"from":[', ",".join(map(str, chain.frm.tolist())),
        '],"to":[', ",".join(map(str, chain.to.tolist())),
        '],"', chain.kind, '":[', values_json(chain), ']},"start":',
        json.dumps(ids[chain.start]), "}}",
    ]).encode()


def save_reference_input(chain, path):
    np.savez(path, frm=chain.frm, to=chain.to, num=chain.num, den=chain.den,
             weights=np.array(chain.kind == "weight"), absorbing=np.array(chain.absorbing),
             start=np.array(chain.start), n_states=np.array(chain.n_states))


# ---------------------------------------------------------------------------------------------
# References, each run in its own process (`--reference NAME FILE`).


def peak_mb():
    with open("/proc/self/status") as status:
        for line in status:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    return None


def load_system(path):
    d = np.load(path)
    frm, to, num, den = d["frm"], d["to"], d["num"], d["den"]
    n_states, start = int(d["n_states"]), int(d["start"])
    absorbing = [int(a) for a in d["absorbing"]]
    if bool(d["weights"]):
        row_sum = np.zeros(n_states, dtype=np.int64)
        np.add.at(row_sum, frm, num)
        den = row_sum[frm]
    transient = np.unique(frm)
    position = np.full(n_states, -1, dtype=np.int64)
    position[transient] = np.arange(len(transient))
    column = np.full(n_states, -1, dtype=np.int64)
    column[absorbing] = np.arange(len(absorbing))
    return frm, to, num, den, position, column, len(transient), len(absorbing), start


def reference_float(name, path):
    import scipy.sparse as sp
    import scipy.sparse.linalg as spla

    frm, to, num, den, position, column, n, outcomes, start = load_system(path)
    p = num / den
    inner = position[to] >= 0
    q = sp.coo_matrix((p[inner], (position[frm[inner]], position[to[inner]])), shape=(n, n))
    a = (sp.identity(n, format="csr") - q.tocsr()).tocsr()
    b = np.zeros((n, outcomes + 1))
    np.add.at(b, (position[frm[~inner]], column[to[~inner]]), p[~inner])
    b[:, -1] = 1.0
    info, fill = [], None
    if name == "scipy splu":
        a = a.tocsc()
        started = time.perf_counter()
        lu = spla.splu(a, permc_spec="MMD_AT_PLUS_A")
        x = lu.solve(b)
        seconds = time.perf_counter() - started
        fill = (lu.L.nnz + lu.U.nnz) / a.nnz
    else:
        started = time.perf_counter()
        columns = []
        for k in range(outcomes + 1):
            xk, code = spla.bicgstab(a, b[:, k], rtol=1e-12, atol=0.0)
            columns.append(xk)
            if code != 0:
                info.append(f"column {k}: info {code}")
        seconds = time.perf_counter() - started
        x = np.stack(columns, axis=1)
    row = x[position[start]]
    residual = float(np.max(np.abs(a @ x - b)))
    return {"seconds": seconds, "answer": [float(v) for v in row], "residual": residual,
            "fill": fill, "info": "; ".join(info)}


def reference_exact(path):
    import flint

    frm, to, num, den, position, column, n, outcomes, start = load_system(path)
    a = flint.fmpq_mat(n, n)
    b = flint.fmpq_mat(n, outcomes + 1)
    for k in range(n):
        a[k, k] = 1
        b[k, outcomes] = 1
    for f, t, u, v in zip(frm.tolist(), to.tolist(), num.tolist(), den.tolist()):
        p = flint.fmpq(u, v)
        if position[t] >= 0:
            a[position[f], position[t]] -= p
        else:
            b[position[f], column[t]] += p
    started = time.perf_counter()
    x = a.solve(b)
    seconds = time.perf_counter() - started
    row = position[start]
    return {"seconds": seconds, "answer": [str(x[row, k]) for k in range(outcomes + 1)],
            "info": ""}


def reference_main(name, path):
    result = reference_exact(path) if name == "python-flint" else reference_float(name, path)
    result["peak_mb"] = peak_mb()
    print(json.dumps(result))


# ---------------------------------------------------------------------------------------------
# Measurements from the driver. Each returns a dict with "ok" and either numbers or "error".


def best_of(measure, seconds_of):
    """Runs `measure`; repeats fast successful ones and keeps the fastest."""
    best = measure()
    if not best["ok"] or seconds_of(best) >= REPEAT_BELOW_S:
        return best
    for _ in range(REPEATS - 1):
        again = measure()
        if again["ok"] and seconds_of(again) < seconds_of(best):
            best = again
    return best


def tail(text, limit=300):
    text = " ".join(text.split())
    return text if len(text) <= limit else "..." + text[-limit:]


def run_in_process(path):
    def measure():
        try:
            done = subprocess.run([IN_PROCESS, path], capture_output=True, text=True,
                                  timeout=CASE_TIMEOUT_S)
        except subprocess.TimeoutExpired:
            return {"ok": False, "error": f"timeout ({CASE_TIMEOUT_S} s)"}
        lines = [l for l in done.stdout.splitlines() if l.startswith("{")]
        if done.returncode != 0 or not lines:
            why = f"exit {done.returncode}" if done.returncode >= 0 else f"signal {-done.returncode}"
            return {"ok": False, "error": f"crashed ({why}): {tail(done.stderr)}"}
        line = json.loads(lines[-1])
        if line.get("error"):
            return {"ok": False, "error": tail(line["error"])}
        line["ok"] = True
        line["front_s"] = line["parse_s"] + line["validate_s"]
        line["total_s"] = line["front_s"] + line["solve_s"]
        line["peak_mb"] = line["peak_bytes"] / MIB if line.get("peak_bytes") else None
        return line

    return best_of(measure, lambda r: r["total_s"])


class Server:
    """The release server on a free port, restarted after a timeout or a crash."""

    def __init__(self, log_path):
        self.log_path = log_path
        self.process = None
        self.url = None

    def start(self):
        with socket.socket() as s:
            s.bind(("127.0.0.1", 0))
            port = s.getsockname()[1]
        env = dict(os.environ)
        env.setdefault("ODDSMITH_SOLVE_BUDGET_MS", "600000")
        env.setdefault("ODDSMITH_MAX_BODY_BYTES", str(2 * 1024**3))
        env.setdefault("ODDSMITH_MAX_REQUEST_MEMORY_MB", "16384")
        log = open(self.log_path, "ab")
        self.process = subprocess.Popen(
            [SERVER, "--bind", f"127.0.0.1:{port}", "--log", "warn"],
            stdout=log, stderr=log, env=env)
        self.url = f"http://127.0.0.1:{port}"
        for _ in range(100):
            try:
                with urllib.request.urlopen(f"{self.url}/healthz", timeout=1):
                    return
            except OSError:
                time.sleep(0.1)
        raise RuntimeError(f"the server did not come up; see {self.log_path}")

    def stop(self):
        if self.process and self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(10)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait()

    def restart(self):
        self.stop()
        self.start()


def run_http(server, path):
    with open(path, "rb") as f:
        body = f.read()

    def measure():
        request = urllib.request.Request(f"{server.url}/v1/solve", data=body,
                                         headers={"content-type": "application/json"})
        started = time.perf_counter()
        try:
            with urllib.request.urlopen(request, timeout=CASE_TIMEOUT_S) as response:
                raw = response.read()
            wall = time.perf_counter() - started
        except urllib.error.HTTPError as error:
            try:
                problem = json.loads(error.read())
                detail = problem.get("detail") or problem.get("title")
            except ValueError:
                detail = ""
            return {"ok": False, "error": f"HTTP {error.code}", "detail": tail(str(detail))}
        except (OSError, urllib.error.URLError) as error:
            # A timeout or a dropped connection: the server may still be working, or be gone.
            server.restart()
            kind = "timeout" if "timed out" in str(error) else "connection failed"
            return {"ok": False, "error": f"{kind} ({CASE_TIMEOUT_S} s limit)",
                    "detail": tail(str(error))}
        return {"ok": True, "wall_s": wall, "answer": json.loads(raw)}

    return best_of(measure, lambda r: r["wall_s"])


def run_reference(name, path):
    def measure():
        try:
            done = subprocess.run([sys.executable, os.path.abspath(__file__), "--reference", name,
                                   path], capture_output=True, text=True, timeout=CASE_TIMEOUT_S,
                                  env=REFERENCE_ENV)
        except subprocess.TimeoutExpired:
            return {"ok": False, "error": f"timeout ({CASE_TIMEOUT_S} s)"}
        lines = [l for l in done.stdout.splitlines() if l.startswith("{")]
        if done.returncode != 0 or not lines:
            return {"ok": False, "error": f"failed (exit {done.returncode}): {tail(done.stderr)}"}
        result = json.loads(lines[-1])
        result["ok"] = True
        return result

    return best_of(measure, lambda r: r["seconds"])


def disagreement(chain, answer, reference, arithmetic):
    """How far the service's answer (from the start) is from the reference's: for exact runs
    'equal' or 'DIFFERENT'; for float runs the larger of the largest absolute difference in
    absorption probabilities and the relative difference in expected steps."""
    try:
        names = [chain.ids(a) for a in chain.absorbing]
        if arithmetic == "exact":
            ours = [answer["absorption"][name]["exact"] for name in names]
            ours.append(answer["steps"]["mean"]["exact"])
            return ("equal" if ours == reference["answer"] else "DIFFERENT"), ours
        ours = [answer["absorption"][name]["value"] for name in names]
        steps = answer["steps"]["mean"]["value"]
        theirs = reference["answer"]
        worst = max(abs(x - y) for x, y in zip(ours, theirs[:-1]))
        worst = max(worst, abs(steps - theirs[-1]) / max(abs(theirs[-1]), 1e-300))
        return f"{worst:.0e}", ours + [steps]
    except (KeyError, TypeError, ValueError) as error:
        return f"unreadable ({error})", None


# ---------------------------------------------------------------------------------------------
# Reporting.


def short_method(method):
    if not method:
        return "-"
    fill = re.search(r"([\d.]+)x the matrix", method)
    if "Krylov" in method:
        return "Krylov" + (f" (LU fill {fill.group(1)}x predicted)" if fill else "")
    if "p-adic" in method:
        return "p-adic"
    if "rational" in method:
        entries = re.search(r"(\d+) factor entries", method)
        return "exact LU" + (f" ({entries.group(1)} entries)" if entries else "")
    if "LU" in method:
        return "LU" + (f" (fill {fill.group(1)}x)" if fill else "")
    return method[:40]


def seconds(value):
    if value is None:
        return "-"
    return f"{value:.3f}" if value >= 0.1 else f"{value:.4f}"


def megabytes(value):
    return "-" if value is None else f"{value:.0f}"


def ratio(a, b):
    return None if a is None or b is None or b <= 0 else a / b


def fmt_ratio(value):
    return "-" if value is None else f"{value:.2f}"


def cell(text):
    return str(text).replace("|", "/")


COLUMNS = [
    ("family", "---"), ("states", "--:"), ("transitions", "--:"), ("arithmetic", "---"),
    ("parse+validate s", "--:"), ("engine solve s", "--:"), ("engine peak MB", "--:"),
    ("HTTP wall s", "--:"), ("HTTP overhead %", "--:"), ("method", "---"),
    ("reference", "---"), ("reference s", "--:"), ("reference peak MB", "--:"),
    ("engine/reference time", "--:"), ("engine/reference peak", "--:"), ("agreement", "---"),
]


def table_row(row):
    svc, http, ref = row["service"], row["http"], row["reference"]
    values = [row["family"], row["states"], row["transitions"], row["arithmetic"]]
    if svc["ok"]:
        values += [seconds(svc["front_s"]), seconds(svc["solve_s"]), megabytes(svc["peak_mb"])]
    else:
        values += ["-", svc["error"][:60], "-"]
    if http is None:
        values += ["-", "-"]
    elif http["ok"]:
        values += [seconds(http["wall_s"]), f"{row['overhead'] * 100:.1f}"
                   if row["overhead"] is not None else "-"]
    else:
        values += [http["error"], "-"]
    values.append(short_method(svc.get("method")))
    fill = ref.get("fill") if ref["ok"] else None
    values.append(row["reference_name"] + (f" (fill {fill:.1f}x)" if fill else ""))
    if ref["ok"]:
        values += [seconds(ref["seconds"]), megabytes(ref["peak_mb"]),
                   fmt_ratio(row["time_ratio"]), fmt_ratio(row["peak_ratio"])]
    else:
        values += [ref["error"][:60], "-", "-", "-"]
    values.append(row["agreement"])
    return "| " + " | ".join(cell(v) for v in values) + " |"


def targets(rows):
    """[(target, measured, met)] computed from the rows."""
    out = []

    def time_ratios(family, arithmetic, reference, sizes):
        found = {}
        for r in rows:
            if (r["family"], r["arithmetic"], r["reference_name"]) == (family, arithmetic,
                                                                        reference) \
                    and r["size"] in sizes:
                found[r["size"]] = r["time_ratio"]
        return [(n, found.get(n)) for n in sizes]

    def judge(name, pairs, limit, label):
        measured = ", ".join(f"{label(n)}: {fmt_ratio(v)}" for n, v in pairs)
        met = all(v is not None and v <= limit for _, v in pairs)
        out.append((name, measured, "met" if met else "NOT met"))

    judge("float banded (walk) 10^5 and 10^6: engine / splu <= 1.0",
          time_ratios("walk", "float", "scipy splu", [10**5, 10**6]), 1.0, lambda n: f"{n:.0e}")
    judge("float random 10^6: engine / bicgstab <= 0.25",
          time_ratios("random", "float", "scipy bicgstab", [10**6]), 0.25, lambda n: f"{n:.0e}")
    judge("exact dense 50-400: engine / python-flint <= 2",
          time_ratios("dense", "exact", "python-flint", [50, 100, 200, 400]), 2.0, str)
    seen, overheads = set(), []
    for r in rows:
        key = (r["family"], r["size"], r["arithmetic"])
        if r["transitions"] > 10**4 and key not in seen:
            seen.add(key)
            overheads.append((key, r["overhead"], r["http"]))
    measured = [o for _, o, _ in overheads if o is not None]
    missing = [k for k, o, _ in overheads if o is None]
    worst = max(measured, default=None)
    text = (f"{len(measured)} cases, worst {worst * 100:.1f}%, median "
            f"{sorted(measured)[len(measured) // 2] * 100:.1f}%" if measured else "no cases")
    if missing:
        text += f"; not measured: {', '.join(f'{f} {n} {a}' for f, n, a in missing)}"
    out.append(("HTTP overhead < 20% for chains above 10^4 transitions", text,
                "met" if measured and not missing and worst < 0.2 else "NOT met"))
    return out


def versions():
    import scipy
    import flint

    def first_line(command):
        try:
            return subprocess.run(command, capture_output=True, text=True).stdout.strip()
        except OSError:
            return "unknown"

    cpu = "unknown"
    with open("/proc/cpuinfo") as f:
        for line in f:
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    with open("/proc/meminfo") as f:
        mem_kib = int(next(l for l in f if l.startswith("MemTotal")).split()[1])
    return {
        "cpu": cpu, "cores": os.cpu_count(), "ram_gib": mem_kib / 1024**2,
        "os": f"{platform.system()} {platform.release()} ({platform.machine()})",
        "python": platform.python_version(), "numpy": np.__version__, "scipy": scipy.__version__,
        "flint": flint.__version__, "rustc": first_line(["rustc", "--version"]),
    }


def load_average():
    with open("/proc/loadavg") as f:
        return " ".join(f.read().split()[:3])


def python_baseline_mb():
    """Peak memory of a Python process that only imports the reference libraries."""
    code = ("import numpy, scipy.sparse.linalg, flint\n"
            "print([l for l in open('/proc/self/status') if l.startswith('VmHWM')][0].split()[1])")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    try:
        return int(done.stdout.strip()) / 1024
    except ValueError:
        return None


def write_results(path, rows, notes, machine, elapsed_s, finished):
    header = "| " + " | ".join(name for name, _ in COLUMNS) + " |"
    rule = "|" + "|".join(align for _, align in COLUMNS) + "|"
    m = machine
    lines = [
        "# Benchmark results" + ("" if finished else " (run in progress)"),
        "",
        f"Written by `bench/run` on {time.strftime('%Y-%m-%d')}; the whole run took "
        f"{elapsed_s / 60:.1f} minutes.",
        "",
        f"Machine: {m['cpu']}, {m['cores']} cores, {m['ram_gib']:.1f} GiB RAM, {m['os']}. "
        f"{m['rustc']}, release build. Python {m['python']}, numpy {m['numpy']}, "
        f"scipy {m['scipy']}, python-flint {m['flint']}. A Python process that only imports "
        f"these libraries peaks at {megabytes(m['python_mb'])} MB. Load average (1, 5, 15 "
        f"minutes): {m.get('load', load_average() + ' now')}; other work on the machine "
        "during the run makes the times noisier.",
        "",
        "## Chains",
        "",
        "- **walk**: a 1-D walk on n states with absorbing ends, steps up 2/5, down 1/2, stay "
        "1/10, starting 5 steps below the top (I - Q tridiagonal). Sizes are n.",
        "- **random**: each of n states moves to 4 uniformly random states (integer weights "
        "1..4) and to one of two exits (weight 1): 4-5 out-edges, fill-heavy for LU.",
        "- **pattern**: symbols a, b, c, d with probabilities 1/2, 1/4, 1/8, 1/8; wait for the "
        f"motif `{MOTIF}` to occur k times (overlaps count), unless a run of m d's occurs first "
        "(m chosen so both outcomes are plausible). States are (count, longest suffix that is a "
        "prefix of either word): the pattern-matching automaton, copied k times.",
        "- **dense**: each of n states reaches all n states and two exits (random weights 1..5).",
        "",
        "Every request is a `POST /v1/solve` body with the chain in the columnar `table` form "
        "(probabilities as exact fractions such as \"2/5\", or integer weights), `arithmetic` "
        "\"float\" or \"exact\" and the default report (absorption and steps).",
        "",
        "## Columns",
        "",
        "- **states**, **transitions**: all states (absorbing included) and table rows sent.",
        "- **parse+validate s**, **engine solve s**, **engine peak MB**: the engine in-process "
        "(`target/release/examples/in_process`, one process per request): seconds to parse the "
        "JSON body and to validate the chain, seconds to solve, and the process's peak resident "
        "memory (VmHWM, everything included). The solve covers the default report: absorption "
        "probabilities and expected steps (one batch of right-hand sides), then step variance "
        "and conditional mean steps (a second batch of as many).",
        "- **HTTP wall s**: the same body posted to the release server on loopback, from sending "
        "to the last byte of the answer. **HTTP overhead %** = wall / (parse + validate + solve "
        "in-process) - 1; the two are separate runs, so timing noise can make it negative.",
        "- **method**: the engine's method from the answer's `solver.method`, shortened.",
        "- **reference**, **reference s**, **reference peak MB**: the reference library on I - Q "
        "with the absorption columns and the ones vector as right-hand sides, timed from the "
        "assembled matrix to the solutions (building the matrices in Python is not timed, as "
        "parsing is not in the engine's solve time), in a fresh Python process whose peak "
        "resident memory (VmHWM, interpreter and libraries included) is reported. `scipy splu`: "
        "`splu(A, permc_spec=\"MMD_AT_PLUS_A\")` then one solve with all right-hand sides (its "
        "fill, (nnz L + nnz U) / nnz A, in brackets). "
        "`scipy bicgstab`: no preconditioner, `rtol=1e-12`, one call per right-hand side. "
        "`python-flint`: `fmpq_mat.solve` on the exact rationals. References run with "
        "single-threaded BLAS (`OPENBLAS_NUM_THREADS=1`), which was the faster setting here.",
        "- **engine/reference time**: engine solve s / reference s (below 1: the engine is "
        "faster). **engine/reference peak**: engine peak MB / reference peak MB.",
        "- **agreement**: the service's HTTP answer from the start state against the "
        "reference's: for float, the larger of the largest absolute difference in absorption "
        "probabilities and the relative difference in expected steps; for exact, whether the "
        "rationals are equal.",
        "",
        f"Times under {REPEAT_BELOW_S} s are the fastest of {REPEATS} runs. Each measurement has "
        f"a {CASE_TIMEOUT_S} s limit; a failure or refusal is shown in place of the number and "
        "explained under Notes.",
        "",
        "## Results",
        "",
        header,
        rule,
    ]
    lines += [table_row(r) for r in rows]
    if finished:
        lines += ["", "## Targets", "", "| target | measured | verdict |", "|---|---|---|"]
        lines += [f"| {a} | {b} | {c} |" for a, b, c in targets(rows)]
    lines += ["", "## Notes", ""]
    lines += [f"- {cell(n)}" for n in notes] if notes else ["- None."]
    with open(path, "w") as out:
        out.write("\n".join(lines) + "\n")
    return header, rule


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--reference", nargs=2, metavar=("NAME", "FILE"))
    parser.add_argument("--only", help="run only these families (comma-separated), for trials")
    parser.add_argument("--output", default=RESULTS, help="where to write the results")
    args = parser.parse_args()
    if args.reference:
        reference_main(*args.reference)
        return

    began = time.perf_counter()
    load_before = load_average()
    for binary in (SERVER, IN_PROCESS):
        if not os.access(binary, os.X_OK):
            sys.exit(f"{binary} is missing: run bench/run, which builds it")
    machine = versions()
    machine["python_mb"] = python_baseline_mb()
    work = tempfile.mkdtemp(prefix="oddsmith-bench-")
    server = Server(os.path.join(work, "server.log"))
    server.start()
    rows, notes = [], []
    notes += [f"Dropped {f} {n} {a}: {why}" for f, n, a, why in DROPPED]
    cases = CASES
    if args.only:
        wanted = set(args.only.split(","))
        cases = [c for c in CASES if c[0] in wanted]
    header, rule = write_results(args.output, rows, notes, machine, 0, False)
    print(header)
    print(rule, flush=True)
    try:
        for family, size, arithmetic in cases:
            chain = FAMILIES[family](size)
            body_path = os.path.join(work, f"{family}-{size}-{arithmetic}.json")
            with open(body_path, "wb") as f:
                f.write(request_body(chain, arithmetic))
            npz_path = os.path.join(work, f"{family}-{size}.npz")
            save_reference_input(chain, npz_path)
            label = f"{family} {size} {arithmetic}"

            service = run_in_process(body_path)
            if not service["ok"]:
                notes.append(f"{label}: in-process run failed: {service['error']}")
            http = None
            if service["ok"]:
                http = run_http(server, body_path)
                if not http["ok"]:
                    notes.append(f"{label}: HTTP failed: {http['error']} {http.get('detail', '')}")
            else:
                notes.append(f"{label}: HTTP not tried, since the in-process run failed")
            overhead = None
            if service["ok"] and http and http["ok"]:
                overhead = http["wall_s"] / service["total_s"] - 1
                if http["answer"].get("warnings"):
                    notes.append(f"{label}: warnings: {'; '.join(http['answer']['warnings'])}")

            for name, skip in reference_plan(chain, arithmetic):
                if skip and name == "scipy splu":
                    notes.append(f"{label}: {name} {skip} (no row)")
                    continue
                reference = {"ok": False, "error": skip} if skip else run_reference(name,
                                                                                    npz_path)
                if skip:
                    notes.append(f"{label}: {name} {skip}")
                elif not reference["ok"]:
                    notes.append(f"{label}: {name} failed: {reference['error']}")
                elif reference.get("info"):
                    notes.append(f"{label}: {name}: {reference['info']}")
                agreement = "-"
                if reference["ok"] and http and http["ok"]:
                    agreement, ours = disagreement(chain, http["answer"], reference, arithmetic)
                    if agreement == "DIFFERENT" or (
                            arithmetic == "float" and not agreement.startswith("unreadable")
                            and float(agreement) > 1e-6):
                        notes.append(f"{label}: answers differ from {name}: service {ours}, "
                                     f"reference {reference['answer']}")
                    elif agreement.startswith("unreadable"):
                        notes.append(f"{label}: could not compare with {name}: {agreement}")
                row = {
                    "family": family, "size": size, "arithmetic": arithmetic,
                    "states": chain.n_states, "transitions": chain.transitions,
                    "service": service, "http": http, "overhead": overhead,
                    "reference_name": name, "reference": reference, "agreement": agreement,
                    "time_ratio": ratio(service.get("solve_s"), reference.get("seconds")),
                    "peak_ratio": ratio(service.get("peak_mb"), reference.get("peak_mb")),
                }
                rows.append(row)
                print(table_row(row), flush=True)
            os.remove(body_path)
            os.remove(npz_path)
            write_results(args.output, rows, notes, machine, time.perf_counter() - began, False)
    finally:
        server.stop()
    elapsed = time.perf_counter() - began
    machine["load"] = f"{load_before} before the run, {load_average()} after"
    write_results(args.output, rows, notes, machine, elapsed, True)
    print()
    for target, measured, verdict in targets(rows):
        print(f"{verdict:8} {target}: {measured}")
    for note in notes:
        print(f"note: {note}")
    print(f"\nwhole run: {elapsed / 60:.1f} minutes; wrote {args.output}")
    shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
