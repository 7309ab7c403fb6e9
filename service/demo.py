"""Demo data: an invented community-orchard network surveys its volunteers.

The scenario (all invented): the Brambleford Community Orchards, a network of volunteer-run
orchards, asks its volunteers about belonging, workload, trust in the coordinators and safety on
site, in four pages of eight statements on a five-point agreement scale, with one attention
check. Most simulated volunteers answer from a stable opinion per scale; a tenth answer
carelessly or with a marked style, of a known kind recorded in ``planted.csv`` so a new user can
see what each detector catches.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

__all__ = ["demo_instrument", "demo_responses", "write_demo"]

LABELS = ["Strongly disagree", "Disagree", "Neither agree nor disagree", "Agree", "Strongly agree"]

# (scale, page, statements: (text, keyed))
_SCALES = [
    ("belonging", "page-1", [
        ("I feel part of the orchard team.", 1),
        ("I often feel like an outsider at work days.", -1),
        ("Other volunteers notice when I am missing.", 1),
        ("I rarely talk to the other volunteers.", -1),
        ("I am proud to tell people I volunteer here.", 1),
        ("I would not mind if my orchard closed.", -1),
        ("I have made friends through the orchard.", 1),
        ("I do not feel welcome at harvest meetings.", -1),
    ]),
    ("workload", "page-2", [
        ("The tasks on a work day fit the time we have.", 1),
        ("I leave work days exhausted.", -1),
        ("I can choose tasks that suit my strength.", 1),
        ("Too much is expected of a few volunteers.", -1),
        ("Breaks are long enough.", 1),
        ("I am asked to do more than I signed up for.", -1),
        ("The pace of pruning season is manageable.", 1),
        ("I feel pressed to come more often than I want.", -1),
    ]),
    ("trust", "page-3", [
        ("The coordinators keep their promises.", 1),
        ("Decisions about the orchards are made behind closed doors.", -1),
        ("I can raise a problem with a coordinator openly.", 1),
        ("The coordinators ignore what volunteers suggest.", -1),
        ("I understand how the harvest money is spent.", 1),
        ("I doubt the coordinators tell us the whole story.", -1),
        ("The coordinators treat all orchards fairly.", 1),
        ("Complaints to the coordinators go nowhere.", -1),
    ]),
    ("safety", "page-4", [
        ("Ladders and tools are checked before use.", 1),
        ("I have seen unsafe practice go unchallenged.", -1),
        ("I know what to do if someone is hurt.", 1),
        ("Safety briefings are skipped when we are busy.", -1),
        ("Protective gloves and glasses are always available.", 1),
        ("I have been asked to use equipment I was not shown how to use.", -1),
        ("Risks are explained before new tasks.", 1),
        ("Near misses are not talked about.", -1),
    ]),
]

#: Planted kinds and their share of the demo sample.
PLANTED = {
    "straightline": 0.025,
    "random": 0.025,
    "agree_all": 0.02,
    "extremes": 0.015,
    "midpoints": 0.015,
}


def demo_instrument() -> dict:
    """The demo questionnaire as an instrument document."""
    items = []
    for scale, page, statements in _SCALES:
        prefix = scale[:2]
        for number, (text, keyed) in enumerate(statements, start=1):
            items.append(
                {"id": f"{prefix}{number:02d}", "text": text, "scale": scale, "keyed": keyed, "block": page}
            )
    check = {
        "id": "check1",
        "text": "To show you are reading, please choose 'Disagree' here.",
        "block": "page-3",
        "instructed_answer": 2,
    }
    items.insert(20, check)
    return {
        "survey": "orchard-volunteers-2027",
        "title": "Brambleford Community Orchards: volunteer survey 2027",
        "response_format": {"points": 5, "lowest": 1, "labels": LABELS},
        "items": items,
    }


def demo_responses(n: int = 600, seed: int = 2027) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Simulated responses and the planted kinds: (responses, planted)."""
    rng = np.random.default_rng(seed)
    instrument = demo_instrument()
    items = instrument["items"]
    k = len(items)
    scale_names = [s[0] for s in _SCALES]
    # Attentive volunteers: one opinion per scale (correlated), a little personal acquiescence.
    correlation = np.full((4, 4), 0.35) + np.eye(4) * 0.65
    opinions = rng.multivariate_normal(np.zeros(4), correlation, size=n)
    bias = rng.normal(0.0, 0.25, size=(n, 1))
    answers = np.empty((n, k))
    for j, item in enumerate(items):
        if "instructed_answer" in item:
            answers[:, j] = np.where(rng.random(n) < 0.97, item["instructed_answer"], 3)
            continue
        trait = opinions[:, scale_names.index(item["scale"])]
        latent = 3 + 1.1 * item["keyed"] * trait + bias[:, 0] + rng.normal(0, 0.75, n)
        answers[:, j] = np.clip(np.rint(latent), 1, 5)
    kinds = np.full(n, "attentive", dtype=object)
    order = rng.permutation(n)
    start = 0
    for kind, share in PLANTED.items():
        rows = order[start : start + int(round(share * n))]
        start += len(rows)
        kinds[rows] = kind
        if kind == "straightline":
            answers[rows] = rng.integers(2, 5, size=(len(rows), 1))
        elif kind == "random":
            answers[rows] = rng.integers(1, 6, size=(len(rows), k))
        elif kind == "agree_all":
            answers[rows] = rng.choice([4, 5], p=[0.6, 0.4], size=(len(rows), k))
        elif kind == "extremes":
            answers[rows] = np.where(answers[rows] >= 3, 5, 1)
        elif kind == "midpoints":
            keep = rng.random((len(rows), k)) < 0.8
            answers[rows] = np.where(keep, 3, answers[rows])
    # A few unanswered items, as on any real survey.
    answers[rng.random((n, k)) < 0.01] = np.nan
    durations = np.where(kinds == "attentive", rng.lognormal(np.log(420), 0.35, n), rng.lognormal(np.log(150), 0.5, n))
    ids = np.array([f"v{i:04d}" for i in range(1, n + 1)])
    frame = pd.DataFrame(answers, columns=[item["id"] for item in items]).astype("Int64")
    frame.insert(0, "respondent_id", ids)
    frame["duration_seconds"] = np.round(durations)
    planted = pd.DataFrame({"respondent_id": ids, "kind": kinds})
    return frame, planted


def write_demo(out: str | Path, n: int = 600, seed: int = 2027) -> list[Path]:
    """Write instrument.json, responses.csv and planted.csv into ``out``; return the paths."""
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    responses, planted = demo_responses(n, seed)
    paths = [out / "instrument.json", out / "responses.csv", out / "planted.csv"]
    paths[0].write_text(json.dumps(demo_instrument(), indent=2) + "\n", encoding="utf-8")
    responses.to_csv(paths[1], index=False)
    planted.to_csv(paths[2], index=False)
    return paths
