"""Benchmark: every registered detector, the verdict and the careless score on 1,000,000
respondents x 50 items.

The reference (covariance, item correlations, Rasch estimates, percentile tables) is estimated
once from a reference sample and timed apart; then the whole matrix is screened against it, as
the service and the nightly job do. Prints seconds per detector and peak memory (resident set).
Not part of `make test`; run with `make bench` or directly.
"""

from __future__ import annotations

import argparse
import resource
import time

import numpy as np

from detectors import REGISTRY, ResponseMatrix, build_detectors, fit_references, parse_instrument
from detectors.calibration import apply
from detectors.screening import Screening, reference_calibration
from detectors.verdict import RANKS_KEY


def instrument(k: int):
    items = [
        {"id": f"q{i + 1:02d}", "scale": f"s{i // 10}", "keyed": 1 if i % 2 == 0 else -1,
         "block": f"page{i // 10}"}
        for i in range(k - 1)
    ]
    items.insert(k // 2, {"id": "check", "instructed_answer": 2, "block": "page2"})
    return parse_instrument({"survey": "bench", "response_format": {"points": 5}, "items": items})


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--respondents", type=int, default=1_000_000)
    parser.add_argument("--items", type=int, default=50)
    parser.add_argument("--missing", type=float, default=0.02, help="share of missing answers")
    parser.add_argument("--reference", type=int, default=20_000, help="reference sample size")
    parser.add_argument("--write", action="store_true",
                        help="also write the figures to docs/speed-detectors.md (date, commit)")
    args = parser.parse_args()
    inst = instrument(args.items)
    rng = np.random.default_rng(1)
    n, k = args.respondents, args.items
    # One trait per scale, so scales differ within a person as real scales do.
    scale_of = np.array([int(i.scale[1:]) if i.scale else 0 for i in inst.items])
    traits = rng.normal(size=(n, scale_of.max() + 1)).astype(np.float32)
    keyed = inst.keyed.astype(np.float32)
    answers = traits[:, scale_of]
    answers *= keyed
    answers += 3
    answers += rng.normal(0, 0.8, (n, k)).astype(np.float32)
    codes = np.clip(np.rint(answers), 1, 5).astype(np.int8)
    del answers, traits
    codes[:, inst.is_instructed] = 2
    codes[rng.random((n, k), dtype=np.float32) < args.missing] = -128
    durations = rng.lognormal(np.log(300), 0.5, n)
    matrix = ResponseMatrix(np.arange(n).astype(str).astype(object), codes, durations)

    t0 = time.perf_counter()
    sample = matrix.take(rng.choice(n, size=min(args.reference, n), replace=False))
    reference = fit_references(inst, sample)
    fit_seconds = time.perf_counter() - t0

    detectors = build_detectors(inst)
    start = time.perf_counter()
    timings, results = {}, {}
    for name, detector in detectors.items():
        t1 = time.perf_counter()
        results[name] = detector.screen(inst, matrix, reference.get(name))
        timings[name] = (time.perf_counter() - t1, int(results[name].flags.sum()))
    t1 = time.perf_counter()
    calibration = reference_calibration(inst, detectors, reference)
    results = apply(results, calibration, detectors)
    screening = Screening(inst, matrix.respondent_ids, results, ranks=reference[RANKS_KEY])
    verdicts = screening.verdicts
    timings["(calibrated cut-offs, verdict and careless score)"] = (
        time.perf_counter() - t1, int((verdicts.verdict != "ok").sum())
    )
    total = time.perf_counter() - start
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    lines = [
        f"reference estimated once from {sample.n_respondents:,} respondents: {fit_seconds:.2f} s",
        f"{len(REGISTRY)} detectors + verdict on {n:,} x {k} ({args.missing:.0%} missing): "
        f"{total:.2f} s, {n / total:,.0f} respondents/s, peak memory {peak:,.0f} MB",
    ]
    for name, (seconds, flagged) in timings.items():
        if name in results:  # flags at the calibrated cut-offs
            flagged = int(results[name].flags.sum())
        lines.append(f"  {name:<50} {seconds:6.2f} s  flagged {flagged:,}")
    print("\n".join(lines))
    if args.write:
        from figures import write_figures

        write_figures(
            "speed-detectors.md", "Speed of the whole detector set", "bench_detectors.py", lines
        )


if __name__ == "__main__":
    main()
