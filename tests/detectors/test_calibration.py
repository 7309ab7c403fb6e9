"""Cut-offs calibrated to a stated false-alarm rate (detectors.calibration)."""

from __future__ import annotations

import numpy as np
import pytest

from detectors import ResponseMatrix, State, screen
from detectors.calibration import CALIBRATION_KEY, Calibration, upper_cutoff
from detectors.planting import plant, simulated_sample
from detectors.screening import fit_references


@pytest.mark.parametrize("share", [0.0, 0.003, 0.01, 0.05, 0.2])
def test_upper_cutoff_flags_at_most_the_share_and_splits_no_ties(share):
    rng = np.random.default_rng(4)
    for values in (rng.normal(size=997), rng.integers(0, 12, size=997).astype(float)):
        cutoff = upper_cutoff(values, share)
        flagged = np.mean(values >= cutoff)
        assert flagged <= share + 1e-12
        # the next lower sample value would flag more than the share (the cut-off is tight)
        lower = values[values < cutoff]
        if len(lower):
            assert np.mean(values >= lower.max()) > share
    # Without ties it is numpy's order statistic: the (n - floor(share n))-th smallest value
    # (numpy.quantile with method="higher" at 1 - floor(share n) / n gives the same value).
    values = rng.permutation(np.arange(1000.0))
    assert upper_cutoff(values, 0.05) == np.quantile(values, 1 - 50 / 1000, method="higher")


def test_calibration_survives_a_round_trip_through_json():
    instrument, matrix = _null_sample(n=1500, seed=3)
    reference = fit_references(instrument, matrix)
    stored = reference[CALIBRATION_KEY]
    again = Calibration.from_json(stored)
    assert again.cutoffs == {k: v["cutoff"] for k, v in stored.items() if k != "(families)"}
    # screening against the stored reference gives the flags of screening the sample itself
    itself = screen(instrument, matrix)
    against = screen(instrument, matrix, references=reference)
    for name in itself.results:
        np.testing.assert_array_equal(itself.results[name].flags, against.results[name].flags)


def _null_sample(n, seed, instrument=None):
    from tests.conftest import make_instrument

    instrument = instrument or _instrument(make_instrument)
    values = simulated_sample(instrument, n, np.random.default_rng(seed))
    return instrument, ResponseMatrix.from_arrays(instrument, values)


def _instrument(make_instrument):
    """Four scales of six five-point items, keying balanced, in four blocks."""
    from detectors import parse_instrument

    items = [
        {"id": f"{s}{i}", "scale": s, "block": s, "keyed": 1 if i % 2 else -1}
        for s in ("work", "home", "mood", "pace") for i in range(1, 7)
    ]
    return parse_instrument({"survey": "t", "response_format": {"points": 5}, "items": items})


def test_under_the_null_each_family_flags_about_its_share_of_the_budget():
    # Ordinary respondents only (answers simulated from the instrument, no careless ones):
    # each family's flagged share is close to its part of the budget, review_rate x (1 -
    # score_review_share) / F. Setting aside what the other families flag thins a family's tail
    # where families are related among ordinary respondents, which weighs most at the small
    # shares of the default policy (0.625% per family); measured on this code's own output
    # (seeds 1-3, 8,000 respondents): 1.06 to 1.84 times the budget per family, and the whole
    # review share (families and the careless score's own hurdle) 10.9-11.5% for a review_rate
    # of 10% (fixed-rule indices such as sequence patterns add their own few). Regression bounds.
    for seed in (1, 2, 3):
        instrument, matrix = _null_sample(n=8000, seed=seed)
        screening = screen(instrument, matrix)
        calibration = screening.calibration
        policy = instrument.verdict
        family_budget = policy.review_rate * (1 - policy.score_review_share)
        budget = family_budget / len(calibration.family_rates)
        by_family: dict[str, np.ndarray] = {}
        for name, result in screening.results.items():
            if name in calibration.cutoffs:
                flags = by_family.setdefault(result.family, np.zeros(len(result), dtype=bool))
                flags |= result.flags
        # binomial standard error of a share near the budget on 8,000 respondents
        error = np.sqrt(budget * (1 - budget) / matrix.n_respondents)
        for family, flags in by_family.items():
            assert budget * 0.7 - 3 * error <= flags.mean() <= budget * 2.0 + 3 * error, family
        not_ok = np.mean(screening.verdicts.verdict != "ok")
        assert not_ok <= instrument.verdict.review_rate * 1.25, not_ok


def test_a_careless_kind_in_the_reference_does_not_hide_itself():
    # One answer over half the questionnaire, planted as 2% of the reference: a plain 99.5%
    # quantile of the longest run would land among the planted respondents; the calibrated
    # cut-off (never above the repeat model's own) still flags every one of them.
    instrument, ordinary = _null_sample(n=4000, seed=5)
    rng = np.random.default_rng(6)
    planted = plant(instrument, "half_run", 80, rng, ordinary)
    values = np.vstack([ordinary.as_float(), planted])
    matrix = ResponseMatrix.from_arrays(instrument, values)
    screening = screen(instrument, matrix)
    long_string = screening.results["long_string"]
    assert long_string.flags[4000:].all()
    assert long_string.flags[:4000].mean() < 0.02
    plain = np.quantile(long_string.scores, 0.995)
    assert np.mean(long_string.scores[4000:] >= plain) < 1  # what calibration avoids


def test_an_explicit_cut_off_is_kept(bfi_instrument, bfi_frame):
    from detectors import matrix_from_frame, parse_instrument

    document = bfi_instrument.model_dump(mode="json")
    document["screening"] = {"mahalanobis": {"alpha": 0.001}}
    instrument = parse_instrument(document)
    matrix = matrix_from_frame(instrument, bfi_frame).matrix
    screening = screen(instrument, matrix)
    assert "mahalanobis" not in screening.calibration.cutoffs
    own = screen(instrument, matrix, names=["mahalanobis"], calibrate=False)
    np.testing.assert_array_equal(
        screening.results["mahalanobis"].flags, own.results["mahalanobis"].flags
    )
    assert "long_string" in screening.calibration.cutoffs


def test_the_evidence_states_the_calibrated_cut_off(bfi_instrument, bfi_frame):
    from detectors import matrix_from_frame

    matrix = matrix_from_frame(bfi_instrument, bfi_frame).matrix
    screening = screen(bfi_instrument, matrix)
    result = screening.results["mahalanobis"]
    cutoff = screening.calibration.cutoffs["mahalanobis"]
    i = int(np.flatnonzero(result.flags)[0])
    assert f"flagged from {cutoff:.1f}" in result.sentence_for(i)
    assert result.evidence_for(i)["false_alarm_rate"] == screening.calibration.rates["mahalanobis"]


def test_stated_rates_hold_on_fresh_ordinary_respondents():
    # The stated false-alarm rate of an index is its share among the reference respondents
    # that no other family flags. Calibrated on one simulated ordinary sample and applied to a
    # fresh one (no careless respondents in either), each index's share among the fresh
    # respondents no other family flags matches its stated rate within binomial error: the
    # difference of two binomial shares of about n = 8,000 has standard error
    # sqrt(2 p (1 - p) / n); 3.5 such errors allow for about 40 indices checked at once
    # (common practice, no source). Measured on this code's own output: |z| at most 3.0.
    from detectors.calibration import RELATED

    def related(f, g):
        return any({f, g} <= group for group in RELATED)

    for seed in (1, 2, 3):
        instrument, first = _null_sample(n=8000, seed=seed)
        _, fresh = _null_sample(n=8000, seed=seed + 100, instrument=instrument)
        screening = screen(instrument, fresh, references=fit_references(instrument, first))
        families = instrument.verdict.families
        flagged = {f: np.zeros(fresh.n_respondents, dtype=bool) for f in families}
        for result in screening.results.values():
            if result.family in families:
                flagged[result.family] |= result.flags
        for name, rate in screening.calibration.rates.items():
            result = screening.results[name]
            others = [flagged[g] for g in families if g != result.family
                      and not related(g, result.family)]
            kept = ~np.logical_or.reduce(others) & (result.states == State.ASSESSED)
            share = result.flags[kept].mean()
            error = np.sqrt(2 * rate * (1 - rate) / kept.sum())
            assert abs(share - rate) <= 3.5 * error + 1e-12, (seed, name, rate, share)
