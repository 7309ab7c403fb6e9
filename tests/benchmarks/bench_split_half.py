"""Benchmark: even_odd and resampled_reliability on 1,000,000 respondents x 50 items in 5 or
10 scales, 2% of answers missing. Prints wall-clock and CPU seconds (best of three) per index.
Not part of `make test`; run directly."""

from __future__ import annotations

import argparse
import time

import numpy as np

from detectors import ResponseMatrix, parse_instrument
from detectors.even_odd import EvenOdd
from detectors.resampled_reliability import ResampledReliability


def instrument(k: int, per_scale: int):
    items = [
        {"id": f"q{i + 1:02d}", "scale": f"s{i // per_scale}", "keyed": 1 if i % 2 == 0 else -1}
        for i in range(k)
    ]
    return parse_instrument({"survey": "bench", "response_format": {"points": 5}, "items": items})


def answers(inst, n: int, missing: float, rng) -> ResponseMatrix:
    scale_of = np.array([int(item.scale[1:]) for item in inst.items])
    values = rng.normal(size=(n, scale_of.max() + 1)).astype(np.float32)[:, scale_of]
    values *= inst.keyed.astype(np.float32)
    values += 3 + rng.normal(0, 0.8, values.shape).astype(np.float32)
    codes = np.clip(np.rint(values), 1, 5).astype(np.int8)
    codes[rng.random(codes.shape, dtype=np.float32) < missing] = -128
    return ResponseMatrix(np.arange(n).astype(str).astype(object), codes)


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--respondents", type=int, default=1_000_000)
    parser.add_argument("--items", type=int, default=50)
    parser.add_argument("--missing", type=float, default=0.02)
    parser.add_argument("--splits", default="10", help="comma-separated numbers of splits")
    args = parser.parse_args()
    rng = np.random.default_rng(1)
    for per_scale in (10, 5):
        inst = instrument(args.items, per_scale)
        matrix = answers(inst, args.respondents, args.missing, rng)
        # min_scales=3 so that both indices compute on 5 scales too.
        detectors = [("even_odd", EvenOdd(min_scales=3))] + [
            (f"resampled_reliability, {count} splits",
             ResampledReliability(splits=int(count), min_scales=3))
            for count in args.splits.split(",")
        ]
        for label, detector in detectors:
            best = (float("inf"), float("inf"))
            for _ in range(3):
                wall, cpu = time.perf_counter(), time.process_time()
                detector.screen(inst, matrix)
                best = min(best, (time.perf_counter() - wall, time.process_time() - cpu))
            print(f"{args.respondents:,} x {args.items}, {args.items // per_scale} scales, "
                  f"{label}: {best[0]:.2f} s wall, {best[1]:.2f} s CPU", flush=True)


if __name__ == "__main__":
    main()
