"""Benchmark: person_fit's estimation (fit) and screening on generated rating-scale data.

Fit on 5,000 x 50 items (five scales of 10, five options); screen 1,000,000 x 50 against that
reference. Answers are drawn from the rating scale model itself, with 2% missing by default.
Prints seconds, respondents per second and peak memory. Not part of `make test`; run directly.
"""

from __future__ import annotations

import argparse
import resource
import time

import numpy as np

from detectors import ResponseMatrix, parse_instrument
from detectors.person_fit import PersonFit, category_probabilities


def instrument(k: int, per_scale: int):
    items = [
        {"id": f"q{i + 1:02d}", "scale": f"s{i // per_scale}", "keyed": 1 if i % 2 == 0 else -1}
        for i in range(k)
    ]
    return parse_instrument({"survey": "bench", "response_format": {"points": 5}, "items": items})


def generate(inst, n: int, per_scale: int, missing: float, seed: int) -> ResponseMatrix:
    """Answers under the rating scale model, drawn in slices to bound memory."""
    rng = np.random.default_rng(seed)
    k = len(inst.items)
    difficulties = np.tile(np.linspace(-1, 1, per_scale), k // per_scale)
    thresholds = np.array([-1.5, -0.5, 0.5, 1.5])
    codes = np.empty((n, k), dtype=np.int8)
    for start in range(0, n, 50_000):
        rows = min(50_000, n - start)
        theta = rng.normal(0, 1.5, (rows, k // per_scale)).repeat(per_scale, axis=1)
        p, _, _ = category_probabilities(theta - difficulties, thresholds)
        category = (p.cumsum(axis=-1) < rng.random((rows, k, 1))).sum(axis=-1)
        codes[start : start + rows] = np.where(inst.keyed == 1, 1 + category, 5 - category)
    codes[rng.random((n, k), dtype=np.float32) < missing] = -128
    return ResponseMatrix(np.arange(n).astype(str).astype(object), codes)


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--respondents", type=int, default=1_000_000)
    parser.add_argument("--fit-respondents", type=int, default=5_000)
    parser.add_argument("--items", type=int, default=50)
    parser.add_argument("--per-scale", type=int, default=10)
    parser.add_argument("--missing", type=float, default=0.02, help="share of missing answers")
    parser.add_argument("--repeat", type=int, default=3, help="timings are the best of this many")
    args = parser.parse_args()
    inst = instrument(args.items, args.per_scale)
    sample = generate(inst, args.fit_respondents, args.per_scale, args.missing, seed=1)
    matrix = generate(inst, args.respondents, args.per_scale, args.missing, seed=2)
    detector = PersonFit()
    fit_times, screen_times = [], []
    for _ in range(args.repeat):
        t0 = time.perf_counter()
        reference = detector.fit(inst, sample)
        fit_times.append(time.perf_counter() - t0)
    for _ in range(args.repeat):
        t0 = time.perf_counter()
        result = detector.screen(inst, matrix, reference)
        screen_times.append(time.perf_counter() - t0)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    shape = f"{args.items} items in scales of {args.per_scale}, {args.missing:.0%} missing"
    sweeps = [scale["iterations"] for scale in reference["scales"]]
    print(f"person_fit fit on {args.fit_respondents:,} x {shape}: {min(fit_times):.3f} s "
          f"(sweeps per scale: {sweeps})")
    print(f"person_fit screen on {args.respondents:,} x {shape}: {min(screen_times):.2f} s, "
          f"{args.respondents / min(screen_times):,.0f} respondents/s, "
          f"flagged {int(result.flags.sum()):,}, peak memory {peak:,.0f} MB")


if __name__ == "__main__":
    main()
