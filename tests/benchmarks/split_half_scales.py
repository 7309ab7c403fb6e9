"""How well half-split consistency separates random from ordinary answering, by number of
scales: the simulation behind the default ``min_scales`` of ``even_odd`` and
``resampled_reliability`` (their docstrings show the table).

Ordinary respondents: one standard normal trait per scale, answer = round(midpoint +
LOADING * keying * trait + e), e normal with SD NOISE, clipped to the answer range; keying
alternates within each scale. With these values the inter-item correlation is about .35 and the
item SD about 1.4 on six points, as in the bfi data. Random respondents answer uniformly.
Prints the ROC AUC (scikit-learn) and the shares flagged at the .30 cut-off. Not part of
`make test`; run directly, e.g. ``python tests/benchmarks/split_half_scales.py --items 6``.
"""

from __future__ import annotations

import argparse

import numpy as np
from sklearn.metrics import roc_auc_score

from detectors import ResponseMatrix, parse_instrument
from detectors.resampled_reliability import ResampledReliability

LOADING, NOISE = 0.85, 1.15


def layout(n_scales: int, n_items: int, points: int):
    items = [
        {"id": f"s{c}i{i}", "scale": f"s{c}", "keyed": 1 if i % 2 == 0 else -1}
        for c in range(n_scales)
        for i in range(n_items)
    ]
    document = {"survey": "sim", "response_format": {"points": points}, "items": items}
    return parse_instrument(document)


def ordinary(instrument, n: int, rng) -> np.ndarray:
    points = int(instrument.highest[0])
    scale_of = np.array([int(item.scale[1:]) for item in instrument.items])
    trait = rng.normal(size=(n, scale_of.max() + 1))[:, scale_of]
    noise = rng.normal(0, NOISE, (n, len(instrument.items)))
    answers = np.rint((1 + points) / 2 + LOADING * instrument.keyed * trait + noise)
    return np.clip(answers, 1, points)


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--items", type=int, default=6, help="items per scale")
    parser.add_argument("--points", type=int, default=5)
    parser.add_argument("--splits", default="1,10", help="comma-separated numbers of splits")
    parser.add_argument("--respondents", type=int, default=2000, help="of each kind")
    args = parser.parse_args()
    n = args.respondents
    splits = [int(s) for s in args.splits.split(",")]
    print(f"{args.items} items per scale, {args.points} points; AUC (ordinary flagged, random "
          f"flagged at .30) for splits {splits}")
    for n_scales in (3, 4, 5, 6, 8, 10, 12):
        rng = np.random.default_rng(1000 * n_scales + args.items)
        instrument = layout(n_scales, args.items, args.points)
        random = rng.integers(1, args.points + 1, size=(n, len(instrument.items)))
        answers = np.vstack([ordinary(instrument, n, rng), random])
        matrix = ResponseMatrix.from_arrays(instrument, answers)
        labels = np.r_[np.zeros(n), np.ones(n)]
        cells = []
        for count in splits:
            result = ResampledReliability(splits=count, min_scales=3).screen(instrument, matrix)
            assessed = result.states == 0
            auc = roc_auc_score(labels[assessed], result.scores[assessed])
            cells.append(f"{count}: {auc:.3f} ({result.flags[:n].mean():.2f}, "
                         f"{result.flags[n:].mean():.2f})")
        print(f"{n_scales:3d} scales  " + "  ".join(cells), flush=True)


if __name__ == "__main__":
    main()
