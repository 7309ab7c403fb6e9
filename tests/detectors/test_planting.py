"""Planting recipes and the drill (detectors.planting)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from sklearn.metrics import roc_auc_score

from detectors import ResponseMatrix, parse_instrument
from detectors.planting import KINDS, drill, drill_summary, plant, roc_auc, simulated_sample


def instrument(points=6, items=24):
    entries = [
        {"id": f"q{i:02d}", "scale": f"s{i % 4}", "keyed": 1 if i % 3 else -1}
        for i in range(1, items + 1)
    ]
    return parse_instrument({"survey": "t", "response_format": {"points": points}, "items": entries})


def test_roc_auc_equals_scikit_learn():
    rng = np.random.default_rng(8)
    scores = rng.integers(0, 7, size=500).astype(float)  # many ties
    positive = rng.random(500) < 0.2
    assert roc_auc(scores, positive) == pytest.approx(roc_auc_score(positive, scores), abs=1e-12)


@pytest.mark.parametrize("points", [5, 6, 7])
def test_recipes_do_what_they_say(points):
    inst = instrument(points)
    rng = np.random.default_rng(points)
    k, n = len(inst.items), 400
    ordinary = ResponseMatrix.from_arrays(inst, simulated_sample(inst, 200, rng))
    low, high, mid = 1, points, (1 + points) / 2
    made = {kind: plant(inst, kind, n, rng, ordinary) for kind in KINDS}
    for kind, values in made.items():
        assert values.shape == (n, k), kind
        assert np.nanmin(values) >= low and np.nanmax(values) <= high, kind
        assert np.all(values[np.isfinite(values)] == np.round(values[np.isfinite(values)])), kind
    # uniform: every option about equally often (chi-square goodness of fit, scipy.stats)
    from scipy.stats import chisquare

    counts = np.bincount(made["uniform_random"].astype(int).ravel(), minlength=high + 1)[low:]
    assert chisquare(counts).pvalue > 0.001
    # around the middle: mean at the midpoint, spread below uniform's
    assert abs(made["middle_random"].mean() - mid) < 0.05
    assert made["middle_random"].std() < made["uniform_random"].std()
    middle = made["middle_only"]
    if points % 2:
        assert (middle == mid).all()
    else:
        assert set(np.unique(middle)) == {mid - 0.5, mid + 0.5}
    assert (made["one_answer"] == made["one_answer"][:, :1]).all()
    assert set(np.unique(made["agree_all"])) == {high - 1, high}
    # a run of one answer over ceil(k / 2) items in a row
    run = math.ceil(k / 2)
    half = made["half_run"]
    longest = np.zeros(n, dtype=int)
    current = np.ones(n, dtype=int)
    for j in range(1, k):
        current = np.where(half[:, j] == half[:, j - 1], current + 1, 1)
        longest = np.maximum(longest, current)
    assert (longest >= run).all()
    # patterns: a zig-zag repeats every 2 (points - 1) items, a staircase every `points`
    pattern = made["pattern"]
    zigzag = (pattern[:, 2 * (points - 1):] == pattern[:, : k - 2 * (points - 1)]).all(axis=1)
    stairs = (pattern[:, points:] == pattern[:, : k - points]).all(axis=1)
    assert (zigzag | stairs).all() and zigzag.any() and stairs.any()
    steps = np.abs(np.diff(pattern, axis=1))
    assert ((steps == 1) | (steps == points - 1)).all()


def test_attention_checks_are_followed_by_simulated_ordinary_respondents():
    inst = parse_instrument({
        "survey": "t", "response_format": {"points": 5},
        "items": [{"id": f"q{i}", "scale": "a"} for i in range(6)]
        + [{"id": "check", "instructed_answer": 2}],
    })
    values = simulated_sample(inst, 50, np.random.default_rng(1))
    assert (values[:, -1] == 2).all()


def test_drill_counts_what_was_planted():
    inst = instrument()
    result = drill(inst, None, seed=3, n_simulated=900)
    assert result.simulated_ordinary
    assert result.ordinary["respondents"] == 900
    planted = {kind: figures["planted"] for kind, figures in result.kinds.items()}
    # one in ten of the screened set: 0.1 / 0.9 x 900 / 7 kinds = 14.3 -> 14 each
    assert planted == {kind: 14 for kind in KINDS}
    for figures in result.kinds.values():
        assert 0 <= figures["not_ok"] <= 1 and 0 <= figures["auc"] <= 1
    assert 0 <= result.ordinary["not_ok"] <= 1


def test_drill_summary_is_the_mean_of_its_seeds():
    inst = instrument()
    summary = drill_summary(inst, None, seeds=(4, 5))
    runs = [drill(inst, None, seed=seed) for seed in (4, 5)]
    for kind in KINDS:
        expected = np.mean([r.kinds[kind]["auc"] for r in runs])
        assert summary["kinds"][kind]["auc"] == pytest.approx(expected)
    assert summary["simulation"] is True and summary["recipes"].keys() == set(KINDS)
    with pytest.raises(ValueError, match="at least one seed"):
        drill_summary(inst, None, seeds=())


def test_drill_refuses_unknown_kinds_and_shares():
    inst = instrument()
    with pytest.raises(ValueError, match="unknown careless kind 'sleepy'"):
        drill(inst, None, kinds=["sleepy"])
    with pytest.raises(ValueError, match="careless_share"):
        drill(inst, None, careless_share=0.9)
