"""Design warnings on instruments."""

from __future__ import annotations

from detectors import lint, parse_instrument
from tests.conftest import make_instrument


def codes(instrument):
    return sorted({note.code for note in lint(instrument)})


def test_balanced_eight_item_scale_on_five_points_has_no_warnings():
    assert lint(make_instrument(n_items=8, points=5)) == []


def test_short_unbalanced_scale_even_points_short_block():
    inst = make_instrument(n_items=3, points=6, keyed=[1, 1, 1])
    assert codes(inst) == ["no_midpoint", "no_opposite_pairs", "short_block", "short_scale", "unbalanced_keying"]
    messages = [str(n) for n in lint(inst)]
    assert any("scale 's': has 3 item(s)" in m for m in messages)
    assert any("has 3 positively and 0 reverse-keyed" in m for m in messages)


def test_six_item_scale_is_short_of_preferred():
    notes = lint(make_instrument(n_items=6))
    assert [n.code for n in notes] == ["short_scale"]
    assert "8 or more" in notes[0].message


def test_given_pairs_satisfy_acquiescence_even_without_scales():
    inst = parse_instrument(
        {
            "survey": "x",
            "response_format": {"points": 5},
            "items": [{"id": f"i{k}", "keyed": 1 if k % 2 else -1} for k in range(4)],
            "opposite_pairs": [["i0", "i1"]],
        }
    )
    assert "no_opposite_pairs" not in codes(inst)
