"""Benchmark: the local-polytope engine against a plain linprog baseline, side by side.

Data: a maximally entangled pair of dimension ``d``; Alice measures the first ``m`` of the
``d + 1`` mutually unbiased bases, Bob the same bases turned by one seeded Haar-random
unitary (so the data are nonlocal).  A "refresh" is a re-solve after the data move slightly:
``p' = (1 - 1e-3) p + 1e-3 L`` with a fresh random local point ``L`` each time.

Engine: :class:`labwatch.polytope.VisibilitySolver` (model built once, data in the RHS,
warm basis; enumeration or column generation chosen by vertex count).

Baseline: every solve rebuilds the full vertex matrix (sparse) and calls
``scipy.optimize.linprog(method="highs")`` on ``max v : sum_l w_l D_l - v (p - u) = u,
w >= 0``.  Above ``BASELINE_MAX_VERTICES`` it is not built.

Each case runs in its own subprocess so the peak resident memory (``ru_maxrss``, which
includes the HiGHS C++ heap that tracemalloc cannot see) belongs to that case alone.
tracemalloc is not used: its allocation hooks would inflate the millisecond timings.

Run:  .venv/bin/python benchmarks/bench_polytope.py  [--quick]
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import time

import numpy as np

CASES = [(2, 2), (2, 3), (3, 3), (2, 5), (3, 4), (4, 3), (4, 4), (5, 4), (6, 5)]
BASELINE_MAX_VERTICES = 200_000
REFRESH_STEP = 1e-3


def make_data(m: int, d: int) -> np.ndarray:
    from labwatch.models import (
        haar_unitary,
        maximally_entangled,
        mutually_unbiased_bases,
        probabilities,
    )

    mub = np.asarray(mutually_unbiased_bases(d))[:m]
    turn = haar_unitary(d, np.random.default_rng(1000 + d))
    return probabilities(maximally_entangled(d), mub, np.einsum("ij,xjk->xik", turn, mub))


def random_local(shape, rng) -> np.ndarray:
    from labwatch.strategies import vertex_tensor

    m_a, m_b, d_a, d_b = shape
    w = rng.dirichlet(np.ones(4))
    return sum(
        w[k] * vertex_tensor(rng.integers(0, d_a, m_a), rng.integers(0, d_b, m_b), d_a, d_b)
        for k in range(4)
    )


def baseline_solve(p: np.ndarray) -> float:
    """Build the full vertex LP from scratch and solve it with scipy's linprog."""
    from scipy.optimize import linprog
    from scipy.sparse import csc_matrix

    from labwatch.strategies import party_strategies

    m_a, m_b, d_a, d_b = p.shape
    sa = party_strategies(m_a, d_a)
    sb = party_strategies(m_b, d_b)
    ia = np.repeat(np.arange(sa.shape[0]), sb.shape[0])
    ib = np.tile(np.arange(sb.shape[0]), sa.shape[0])
    n_vert = ia.size
    x = np.arange(m_a)[:, None]
    y = np.arange(m_b)[None, :]
    # Row of entry [x, y, a, b] in the flattened tensor, for every vertex and setting pair.
    rows = ((x * m_b + y)[None] * d_a + sa[ia][:, :, None]) * d_b + sb[ib][:, None, :]
    rows = rows.reshape(n_vert, m_a * m_b)
    u = np.full(p.size, 1.0 / (d_a * d_b))
    vertex_part = csc_matrix(
        (
            np.ones(rows.size),
            rows.ravel(),
            np.arange(0, rows.size + 1, m_a * m_b),
        ),
        shape=(p.size, n_vert),
    )
    from scipy.sparse import hstack

    a_eq = hstack([vertex_part, csc_matrix(-(p.ravel() - u)[:, None])], format="csc")
    cost = np.zeros(n_vert + 1)
    cost[-1] = -1.0
    res = linprog(cost, A_eq=a_eq, b_eq=u, bounds=(0, None), method="highs")
    if res.status != 0:
        raise RuntimeError(f"baseline linprog failed: {res.message}")
    return float(-res.fun)


def run_case(m: int, d: int, which: str, refreshes: int) -> dict:
    """Time one case in this process; returns a JSON-able dict."""
    from labwatch.polytope import VisibilitySolver
    from labwatch.scenario import Scenario

    p = make_data(m, d)
    sc = Scenario.from_shape(p.shape)
    rng = np.random.default_rng(7)
    moved = [
        (1 - REFRESH_STEP) * p + REFRESH_STEP * random_local(p.shape, rng) for _ in range(refreshes)
    ]
    out: dict = {"m": m, "d": d, "vertices": sc.local_vertices, "which": which}
    if which == "engine":
        t0 = time.perf_counter()
        solver = VisibilitySolver(sc)
        res = solver.solve(p)
        out["solve"] = time.perf_counter() - t0
        out["visibility"] = res.visibility
        out["method"] = res.method
        out["iterations"] = res.iterations
        out["columns"] = res.columns
        out["gap"] = res.visibility_upper - res.visibility
        times = []
        for q in moved:
            t0 = time.perf_counter()
            solver.solve(q)
            times.append(time.perf_counter() - t0)
        out["refresh"] = float(np.median(times))
    else:
        t0 = time.perf_counter()
        out["visibility"] = baseline_solve(p)
        out["solve"] = time.perf_counter() - t0
        times = []
        for q in moved:
            t0 = time.perf_counter()
            baseline_solve(q)
            times.append(time.perf_counter() - t0)
        out["refresh"] = float(np.median(times))
    out["rss_peak_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return out


def child(args: list[str]) -> dict:
    proc = subprocess.run(
        [sys.executable, __file__, "--child", *args], capture_output=True, text=True, check=False
    )
    lines = [ln for ln in proc.stdout.splitlines() if ln.startswith("{")]
    if proc.returncode != 0 or not lines:
        raise RuntimeError(f"case {args} failed:\n{proc.stdout}\n{proc.stderr}")
    return json.loads(lines[-1])


def idle_rss() -> float:
    code = (
        "import resource, labwatch.polytope, labwatch.models, scipy.optimize;"
        "print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024)"
    )
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return float(proc.stdout.split()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="skip (5,4) and (6,5)")
    parser.add_argument("--child", nargs=4, metavar=("M", "D", "WHICH", "REFRESHES"))
    args = parser.parse_args()
    if args.child:
        m, d, which, refreshes = args.child
        print(json.dumps(run_case(int(m), int(d), which, int(refreshes))))
        return
    cases = CASES[:-2] if args.quick else CASES
    print(f"idle process after imports: {idle_rss():.0f} MB resident")
    head = (
        f"{'(m,d)':>7} {'vertices':>11} | {'engine':>28} | {'baseline linprog':>28} | "
        f"{'ratio':>13} | {'peak RSS MB':>11} | {'visibility':>10} {'proven gap':>10}"
    )
    sub = (
        f"{'':>7} {'':>11} | {'method':>6} {'solve':>9} {'refresh':>10} | "
        f"{'solve':>13} {'refresh':>14} | {'solve':>6} {'refr.':>6} | {'eng':>5} {'base':>5} |"
    )
    print(head)
    print(sub)
    for m, d in cases:
        vertices = d ** (2 * m)
        refreshes = 20 if vertices <= 100_000 else 3
        eng = child([str(m), str(d), "engine", str(refreshes)])
        if vertices <= BASELINE_MAX_VERTICES:
            base = child([str(m), str(d), "baseline", str(min(refreshes, 3))])
            if abs(base["visibility"] - eng["visibility"]) > 1e-6:
                raise RuntimeError(f"engine and baseline disagree at {(m, d)}: {eng} {base}")
            bs = f"{base['solve']:10.4f} s {1e3 * base['refresh']:11.2f} ms"
            ratio = f"{base['solve'] / eng['solve']:6.1f} {base['refresh'] / eng['refresh']:6.0f}"
            brss = f"{base['rss_peak_mb']:5.0f}"
        else:
            bs = f"{'not built: ' + str(vertices) + ' vertices':>28}"
            ratio = f"{'-':>6} {'-':>6}"
            brss = f"{'-':>5}"
        method = "enum" if eng["method"] == "enumeration" else "colgen"
        print(
            f"{str((m, d)):>7} {vertices:>11} | {method:>6} {eng['solve']:7.4f} s "
            f"{1e3 * eng['refresh']:7.2f} ms | {bs} | {ratio} | {eng['rss_peak_mb']:5.0f} {brss} "
            f"| {eng['visibility']:.7f} {eng['gap']:10.1e}",
            flush=True,
        )
    print(
        "solve: model build + first solve (engine), build + solve (baseline); refresh: median "
        "re-solve after a 1e-3 data change; ratio = baseline / engine; proven gap = "
        "visibility_upper - visibility (certificate bound minus master value)."
    )


if __name__ == "__main__":
    main()
