"""Benchmark: the six core detectors together on 1,000,000 respondents x 50 items.

Prints respondents per second, seconds per detector and peak memory (resident set).
Not part of `make test`; run with `make bench` or directly.
"""

from __future__ import annotations

import argparse
import resource
import time

import numpy as np

from detectors import ResponseMatrix, build_detectors, parse_instrument


def instrument(k: int):
    items = [
        {"id": f"q{i + 1:02d}", "scale": f"s{i // 10}", "keyed": 1 if i % 2 == 0 else -1,
         "block": f"page{i // 10}"}
        for i in range(k)
    ]
    return parse_instrument({"survey": "bench", "response_format": {"points": 5}, "items": items})


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--respondents", type=int, default=1_000_000)
    parser.add_argument("--items", type=int, default=50)
    parser.add_argument("--missing", type=float, default=0.02, help="share of missing answers")
    args = parser.parse_args()
    inst = instrument(args.items)
    rng = np.random.default_rng(1)
    n, k = args.respondents, args.items
    trait = rng.normal(size=(n, 1)).astype(np.float32)
    answers = np.clip(np.rint(3 + inst.keyed * trait + rng.normal(0, 0.8, (n, k)).astype(np.float32)), 1, 5)
    codes = answers.astype(np.int8)
    del answers, trait
    codes[rng.random((n, k), dtype=np.float32) < args.missing] = -128
    matrix = ResponseMatrix(np.arange(n).astype(str).astype(object), codes)
    detectors = build_detectors(inst)
    start = time.perf_counter()
    timings = {}
    for name, detector in detectors.items():
        t0 = time.perf_counter()
        result = detector.screen(inst, matrix)
        timings[name] = (time.perf_counter() - t0, int(result.flags.sum()))
    total = time.perf_counter() - start
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"six detectors on {n:,} x {k} ({args.missing:.0%} missing): {total:.2f} s, "
          f"{n / total:,.0f} respondents/s, peak memory {peak:,.0f} MB")
    for name, (seconds, flagged) in timings.items():
        print(f"  {name:<16} {seconds:6.2f} s  flagged {flagged:,}")


if __name__ == "__main__":
    main()
