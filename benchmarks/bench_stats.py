"""Trials to reach p <= 1e-9 against local realism, versus the statistical-strength limit.

Scenario (invented for this benchmark): CHSH with uniform random settings, a Werner-type source
of visibility 0.919 (S = 2 sqrt 2 * 0.919 = 2.60), correlators E_xy = +-0.919/sqrt 2 built
directly.  Every method is run on the same seeded streams, peeked after every batch of
``--batch`` trials; a run stops at the first batch end with p <= 1e-9.

The limit is ln(1e9) / KL_q with KL_q the statistical strength (van Dam, Gill & Grünwald, IEEE
Trans. Inf. Theory 51, 2812 (2005)): about 1280 trials.  Target: median ratio <= 1.15 for the
default method.  Baselines side by side: a fixed bet lam = lam_max / 2 chosen without looking
at data (plain), and the oracle bet lam* = (S - 2)/12 that knows the source (not a usable
method: the floor any learning method is compared with).

Run: ``.venv/bin/python benchmarks/bench_stats.py [--runs 400] [--seed 1] [--batch 10]``.
"""

from __future__ import annotations

import argparse
import math
import time

import numpy as np

from labwatch.bell import chsh
from labwatch.stats import LocalRealismEnsemble, LocalRealismTest, statistical_strength
from simulators.ensemble import random_setting_counts

P_TARGET = 1e-9
VISIBILITY = 0.919
RATIO_TARGET = 1.15


def werner_chsh(visibility: float) -> np.ndarray:
    signs = np.array([[1.0, 1.0], [1.0, -1.0]])
    parity = np.array([[1.0, -1.0], [-1.0, 1.0]])
    e = visibility * signs / math.sqrt(2.0)
    return (1.0 + parity[None, None] * e[:, :, None, None]) / 4.0


def trials_to_target(
    method: str, runs: int, seed: int, batch: int, cap: int, **options: object
) -> tuple[np.ndarray, float]:
    f = chsh()
    q = np.full((2, 2), 0.25)
    p = werner_chsh(VISIBILITY)
    test = LocalRealismEnsemble(f, q, runs, method, **options)  # type: ignore[arg-type]
    hit = np.full(runs, np.inf)
    threshold = math.log(1.0 / P_TARGET)
    start = time.perf_counter()
    for counts in random_setting_counts(
        np.random.default_rng(seed), p, q, [batch] * (cap // batch), runs
    ):
        test.update(counts)
        newly = np.isinf(hit) & (test.log_m_max >= threshold)
        hit[newly] = test.trials[newly]
        if not np.isinf(hit).any():
            break
    return hit, time.perf_counter() - start


def single_stream_cost(method: str, batch: int, updates: int = 200) -> float:
    """Seconds per update() of one LocalRealismTest (with its exhaustive factor check)."""
    q = np.full((2, 2), 0.25)
    test = LocalRealismTest(chsh(), q, method=method)
    gen = random_setting_counts(
        np.random.default_rng(0), werner_chsh(VISIBILITY), q, [batch] * updates, 1
    )
    start = time.perf_counter()
    for counts in gen:
        test.update(counts[0])
    return (time.perf_counter() - start) / updates


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=400)
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--batch", type=int, default=10)
    parser.add_argument("--cap", type=int, default=8000, help="give up after this many trials")
    args = parser.parse_args()

    p = werner_chsh(VISIBILITY)
    s_value = chsh().evaluate(p).value
    strength = statistical_strength(p, np.full((2, 2), 0.25))
    limit = strength.minimum_trials(P_TARGET)
    lam_max = 1.0 / 6.0  # 1 / (L - Z_min) for CHSH with uniform settings
    print(f"CHSH, uniform settings, visibility {VISIBILITY}: S = {s_value:.4f}")
    print(
        f"statistical strength {strength.nats_per_trial:.6f} nats/trial; "
        f"limit ln(1e9)/KL = {limit:.0f} trials"
    )
    print(f"{args.runs} seeded runs, peeked every {args.batch} trials\n")
    rows = [
        ("grid (default)", "grid", {}, args.runs),
        ("kelly plug-in", "kelly", {}, args.runs),
        ("pbr", "pbr", {}, max(200, args.runs // 2)),
        ("plain: fixed lam = lam_max/2", "grid", {"grid": ([0.5 / 0.9], [1.0])}, args.runs),
        (
            "oracle lam* = (S-2)/12",
            "grid",
            {"grid": ([((s_value - 2) / 12) / (0.9 * lam_max)], [1.0])},
            args.runs,
        ),
    ]
    print(
        f"{'method':32s} {'runs':>5s} {'median':>8s} {'IQR':>13s} {'ratio':>6s} {'unfinished':>10s} {'time':>7s}"
    )
    results = {}
    for label, method, options, runs in rows:
        hit, seconds = trials_to_target(method, runs, args.seed, args.batch, args.cap, **options)
        med = float(np.median(hit))
        q25, q75 = np.percentile(hit, [25, 75])
        results[label] = med / limit
        print(
            f"{label:32s} {runs:5d} {med:8.0f} {q25:6.0f}-{q75:<6.0f} {med / limit:6.3f} "
            f"{int(np.isinf(hit).sum()):10d} {seconds:6.1f}s"
        )
    ratio = results["grid (default)"]
    verdict = "meets" if ratio <= RATIO_TARGET else "MISSES"
    print(
        f"\ndefault method: ratio {ratio:.3f} {verdict} the target <= {RATIO_TARGET}; "
        f"plain baseline ratio {results['plain: fixed lam = lam_max/2']:.3f}"
    )
    print("\ncost of one LocalRealismTest.update (single stream, exhaustive factor check):")
    for method in ("grid", "kelly", "pbr"):
        print(f"  {method:6s} {1e3 * single_stream_cost(method, args.batch):.2f} ms")


if __name__ == "__main__":
    main()
