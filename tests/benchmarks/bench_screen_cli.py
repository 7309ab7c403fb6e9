"""Benchmark: `heedful screen` end to end against reading the file and the screening alone.

A 200,000 x 50 CSV (five-point items in five keyed scales, 5% careless respondents of every
kind of ``detectors.planting`` so that there is evidence to write) is screened with the first
six detectors and with all of them. For each set, three figures, each the median of
``--repeat`` runs, as wall time and as processor time (all threads; steadier than wall time
on a machine shared with other work):

- reading the file alone: ``service.files.read_table`` and ``detectors.matrix_from_frame``;
- the detectors' computation alone: ``detectors.screen`` (every detector, calibrated cut-offs,
  scale scores) and the verdict and careless score (both timed in a new process that has
  imported the library, as the command has by then: the modules the detectors import on first
  use, such as scipy's, count in the computation);
- the command end to end: ``heedful screen FILE --instrument ... --out out.csv`` in a new
  process, start-up and the written table included.

The aim is an end-to-end time of at most 1.5 times reading plus computation. Prints the
figures with the ratio and the end-to-end run's other steps measured in that process (table
with the evidence sentences, CSV writing, summary); ``--write`` also writes them to
docs/speed-screen.md with the date and the commit, and the processor-time ratios to the
README's table between its marker lines. Not part of `make test`; run with
`make bench` or directly.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from detectors import REGISTRY, ResponseMatrix, load_instrument, matrix_from_frame, screen
from detectors.planting import KINDS, plant
from service.files import read_table, write_csv

#: The detectors that came first: the six core indices.
CORE = list(REGISTRY)[:6]


def write_data(folder: Path, n: int, k: int, careless: float) -> tuple[Path, Path]:
    items = [{"id": f"q{i + 1:02d}", "scale": f"s{i // 10}", "keyed": 1 if i % 2 == 0 else -1,
              "block": f"page{i // 10}"} for i in range(k)]
    instrument_path = folder / "instrument.json"
    instrument_path.write_text(json.dumps(
        {"survey": "bench", "response_format": {"points": 5}, "items": items}))
    rng = np.random.default_rng(2)
    keyed = np.array([i["keyed"] for i in items])
    values = np.clip(np.rint(3 + keyed * rng.normal(size=(n, 1)) + rng.normal(0, 0.8, (n, k))), 1, 5)
    instrument = load_instrument(instrument_path)
    each = int(n * careless) // len(KINDS)
    rows = rng.permutation(n)[: each * len(KINDS)].reshape(len(KINDS), each)
    for kind, chosen in zip(KINDS, rows, strict=True):
        if kind == "half_run":
            base = ResponseMatrix.from_arrays(instrument, values[:1000])
            values[chosen] = plant(instrument, kind, each, rng, base)
        else:
            values[chosen] = plant(instrument, kind, each, rng)
    frame = pd.DataFrame(values.astype(int), columns=[i["id"] for i in items])
    frame.insert(0, "respondent_id", [f"r{i}" for i in range(n)])
    responses_path = folder / "responses.csv"
    frame.to_csv(responses_path, index=False)
    return responses_path, instrument_path


def in_process(responses: Path, instrument_path: Path, names: list[str] | None, out: Path) -> dict:
    """Seconds of each step of the command, run here in order: wall time, and processor time
    (all threads; ``cpu_`` keys)."""
    clocks = [(time.perf_counter(), time.process_time())]
    instrument = load_instrument(instrument_path)
    frame = read_table(responses, id_column="respondent_id")
    matrix = matrix_from_frame(instrument, frame, id_column="respondent_id").matrix
    clocks.append((time.perf_counter(), time.process_time()))
    screening = screen(instrument, matrix, names=names)
    screening.verdicts  # noqa: B018 (computed on first use)
    clocks.append((time.perf_counter(), time.process_time()))
    table = screening.to_frame()
    clocks.append((time.perf_counter(), time.process_time()))
    write_csv(table, out)
    clocks.append((time.perf_counter(), time.process_time()))
    screening.summary()
    clocks.append((time.perf_counter(), time.process_time()))
    steps = {}
    for step, before, after in zip(STEPS, clocks[:-1], clocks[1:], strict=True):
        steps[step] = after[0] - before[0]
        steps[f"cpu_{step}"] = after[1] - before[1]
    steps["flagged"] = int((screening.flag_count > 0).sum())
    return steps


def fresh(responses: Path, instrument_path: Path, names: list[str] | None, out: Path) -> dict:
    """:func:`in_process` in a new process, as the command meets the steps: the modules the
    detectors import on first use count in the computation, not in the start-up."""
    command = [sys.executable, __file__, "--steps", str(responses), str(instrument_path),
               str(out), ",".join(names or [])]
    done = subprocess.run(command, check=True, capture_output=True, text=True)
    return json.loads(done.stdout)


#: The steps of the command timed in this process.
STEPS = ("read", "compute", "table", "csv", "summary")


def _children_cpu() -> float:
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    return usage.ru_utime + usage.ru_stime


def end_to_end(
    responses: Path, instrument_path: Path, names: list[str] | None, out: Path
) -> tuple[float, float]:
    """Wall time and processor time of the command in a new process."""
    heedful = Path(sys.executable).with_name("heedful")
    command = [str(heedful), "screen", str(responses), "--instrument", str(instrument_path),
               "--out", str(out)]
    if names is not None:
        command += ["--only", ",".join(names)]
    start, cpu = time.perf_counter(), _children_cpu()
    subprocess.run(command, check=True, stdout=subprocess.DEVNULL, env=os.environ.copy())
    return time.perf_counter() - start, _children_cpu() - cpu


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--respondents", type=int, default=200_000)
    parser.add_argument("--items", type=int, default=50)
    parser.add_argument("--careless", type=float, default=0.05,
                        help="share of careless respondents planted (every kind alike)")
    parser.add_argument("--repeat", type=int, default=3, help="runs per figure (median)")
    parser.add_argument("--write", action="store_true",
                        help="also write the figures to docs/speed-screen.md (date, commit)")
    parser.add_argument("--steps", nargs=4, help=argparse.SUPPRESS)  # one timed run, as JSON
    args = parser.parse_args()
    if args.steps:
        responses, instrument_path, out, names = args.steps
        steps = in_process(Path(responses), Path(instrument_path), names.split(",") if names
                           else None, Path(out))
        print(json.dumps(steps))
        return
    n, k = args.respondents, args.items
    rows = []
    lines = [
        f"heedful screen on a {n:,} x {k} CSV ({args.careless:.0%} careless respondents "
        f"planted), median of {args.repeat} runs; aim: end to end <= 1.5 x (read + compute)",
    ]
    with tempfile.TemporaryDirectory() as folder:
        folder = Path(folder)
        responses, instrument_path = write_data(folder, n, k, args.careless)
        out = folder / "out.csv"
        for label, names in ((f"six core detectors ({', '.join(CORE)})", CORE),
                             (f"all {len(REGISTRY)} detectors", None)):
            steps = [fresh(responses, instrument_path, names, out) for _ in range(args.repeat)]
            median = {key: statistics.median(s[key] for s in steps) for key in steps[0]}
            runs = [end_to_end(responses, instrument_path, names, out) for _ in range(args.repeat)]
            whole = statistics.median(wall for wall, _ in runs)
            whole_cpu = statistics.median(cpu for _, cpu in runs)
            alone = median["read"] + median["compute"]
            alone_cpu = median["cpu_read"] + median["cpu_compute"]
            lines += [
                f"{label}:",
                "                                     wall     processor (all threads)",
                f"  reading the file alone            {median['read']:6.2f} s  "
                f"{median['cpu_read']:6.2f} s",
                f"  the detectors' computation alone  {median['compute']:6.2f} s  "
                f"{median['cpu_compute']:6.2f} s  (screen, calibrated cut-offs, scale scores, "
                "verdict, careless score)",
                f"  end to end (new process)          {whole:6.2f} s  {whole_cpu:6.2f} s",
                f"  end to end / (read + compute)     {whole / alone:6.2f}    "
                f"{whole_cpu / alone_cpu:6.2f}     ({n / whole:,.0f} respondents/s)",
                f"  besides, in that process (wall): table with evidence {median['table']:.2f} s "
                f"({median['flagged']:,.0f} respondents flagged), CSV {median['csv']:.2f} s, "
                f"summary {median['summary']:.2f} s; the rest is start-up and imports",
            ]
            ratio = whole_cpu / alone_cpu
            rows.append(
                f"| {label.split(' (')[0]} | {whole_cpu:.1f} s end to end = {ratio:.2f} x (reading "
                f"{median['cpu_read']:.2f} s + computation {median['cpu_compute']:.2f} s) | "
                f"<= 1.5 x: {'met' if ratio <= 1.5 else '**not met**'} |"
            )
    print("\n".join(lines))
    if args.write:
        from figures import write_figures, write_readme_block

        write_figures("speed-screen.md", "Speed of `heedful screen`", "bench_screen_cli.py", lines)
        write_readme_block(README_START, README_END, "\n".join([
            "| detectors (processor time) | measured | aim |", "| --- | --- | --- |", *rows,
        ]))


#: The README's table of these figures lies between these lines.
README_START = "<!-- screen figures: written by bench_screen_cli.py --write -->"
README_END = "<!-- end screen figures -->"


if __name__ == "__main__":
    main()
