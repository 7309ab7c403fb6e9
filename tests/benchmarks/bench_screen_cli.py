"""Benchmark: `heedful screen` end to end (process start-up included) on a 200,000-row CSV.

Prints wall time, respondents per second and the child's peak memory.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--respondents", type=int, default=200_000)
    parser.add_argument("--items", type=int, default=50)
    args = parser.parse_args()
    n, k = args.respondents, args.items
    with tempfile.TemporaryDirectory() as folder:
        folder = Path(folder)
        items = [{"id": f"q{i + 1:02d}", "scale": f"s{i // 10}", "keyed": 1 if i % 2 == 0 else -1,
                  "block": f"page{i // 10}"} for i in range(k)]
        (folder / "instrument.json").write_text(json.dumps(
            {"survey": "bench", "response_format": {"points": 5}, "items": items}))
        rng = np.random.default_rng(2)
        keyed = np.array([i["keyed"] for i in items])
        values = np.clip(np.rint(3 + keyed * rng.normal(size=(n, 1)) + rng.normal(0, 0.8, (n, k))), 1, 5)
        frame = pd.DataFrame(values.astype(int), columns=[i["id"] for i in items])
        frame.insert(0, "respondent_id", [f"r{i}" for i in range(n)])
        frame.to_csv(folder / "responses.csv", index=False)
        heedful = Path(sys.executable).with_name("heedful")
        command = [str(heedful), "screen", str(folder / "responses.csv"), "--instrument",
                   str(folder / "instrument.json"), "--out", str(folder / "out.csv")]
        start = time.perf_counter()
        subprocess.run(command, check=True, stdout=subprocess.DEVNULL, env=os.environ.copy())
        seconds = time.perf_counter() - start
        peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
        print(f"heedful screen on {n:,} x {k} CSV: {seconds:.2f} s end to end, "
              f"{n / seconds:,.0f} respondents/s, peak memory {peak:,.0f} MB")


if __name__ == "__main__":
    main()
