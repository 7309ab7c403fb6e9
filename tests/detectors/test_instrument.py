"""The instrument format: valid documents, derived structure, and every rejection path."""

from __future__ import annotations

import json

import numpy as np
import pytest

from detectors import InstrumentError, load_instrument, parse_instrument

BASE = {
    "survey": "pulse",
    "title": "Pulse",
    "response_format": {"points": 5, "lowest": 1},
    "items": [
        {"id": "a1", "text": "x", "scale": "a", "keyed": 1, "block": "g1"},
        {"id": "a2", "text": "x", "scale": "a", "keyed": -1, "block": "g1"},
        {"id": "a3", "text": "x", "scale": "a", "keyed": 1, "block": "g1"},
        {"id": "b1", "text": "x", "scale": "b", "keyed": -1, "block": "g2"},
        {"id": "chk", "text": "choose 4", "instructed_answer": 4, "block": "g2"},
    ],
}


def doc(**changes):
    out = json.loads(json.dumps(BASE))
    out.update(changes)
    return out


def problems_of(document) -> list[str]:
    with pytest.raises(InstrumentError) as caught:
        parse_instrument(document)
    return [str(p) for p in caught.value.problems]


def test_valid_document_and_derived_structure():
    inst = parse_instrument(BASE)
    assert inst.item_ids == ("a1", "a2", "a3", "b1", "chk")
    assert inst.lowest.tolist() == [1] * 5 and inst.highest.tolist() == [5] * 5
    assert inst.midpoint.tolist() == [3.0] * 5
    assert inst.content_items.tolist() == [0, 1, 2, 3]
    assert {k: v.tolist() for k, v in inst.scales.items()} == {"a": [0, 1, 2], "b": [3]}
    assert {k: v.tolist() for k, v in inst.blocks.items()} == {"g1": [0, 1, 2], "g2": [3]}
    # derived pairs: within scale a, every +1 item with every -1 item
    assert sorted(map(tuple, inst.pairs.tolist())) == [(0, 1), (2, 1)]


def test_given_pairs_replace_derived_ones():
    inst = parse_instrument(doc(opposite_pairs=[["a1", "b1"]]))
    assert inst.pairs.tolist() == [[0, 3]]


def test_item_response_format_override():
    d = doc()
    d["items"][3]["response_format"] = {"points": 7, "lowest": 0}
    inst = parse_instrument(d)
    assert inst.lowest.tolist()[3] == 0 and inst.highest.tolist()[3] == 6
    assert inst.midpoint[3] == 3.0


def test_no_blocks_means_one_block_of_all_content_items():
    d = doc()
    for item in d["items"]:
        item.pop("block")
    inst = parse_instrument(d)
    assert [v.tolist() for v in inst.blocks.values()] == [[0, 1, 2, 3]]


@pytest.mark.parametrize(
    "change, expected",
    [
        ({"response_format": {"points": 11}}, "response_format.points"),
        ({"response_format": {"points": 1}}, "response_format.points"),
        ({"response_format": {"points": 3, "labels": ["a", "b"]}}, "labels has 2 entries but points is 3"),
        ({"opposite_pairs": [["a1", "zz"]]}, "opposite_pairs[0][1]: unknown item id 'zz'"),
        ({"opposite_pairs": [["a1", "a3"]]}, "both keyed +1"),
        ({"opposite_pairs": [["a1", "a1"]]}, "pairs an item ('a1') with itself"),
        ({"screening": {"nonsense": {}}}, "screening.nonsense: unknown detector"),
        ({"screening": {"long_string": {"run_cutoff": 0}}}, "must be an integer >= 2 or null; got 0"),
        ({"screening": {"long_string": {"bogus": 1}}}, "long_string has no setting 'bogus'"),
    ],
)
def test_rejections_name_the_field(change, expected):
    messages = problems_of(doc(**change))
    assert any(expected in m for m in messages), messages


def test_duplicate_ids_and_bad_keying_and_instructed_range():
    d = doc()
    d["items"][1]["id"] = "a1"
    d["items"][4]["instructed_answer"] = 9
    messages = problems_of(d)
    joined = "\n".join(messages)
    assert "items[1].id: duplicate item id 'a1'" in joined
    assert "items[4].instructed_answer: 9 is outside the item's answer range 1..5" in joined


def test_field_errors_name_the_item():
    d = doc()
    d["items"][2]["keyed"] = 2
    assert any(m.startswith("items[2].keyed:") for m in problems_of(d))


def test_unknown_field_rejected():
    d = doc()
    d["items"][0]["colour"] = "red"
    assert any("items[0].colour" in m for m in problems_of(d))


def test_load_instrument_file_errors(tmp_path):
    with pytest.raises(InstrumentError, match="no such file"):
        load_instrument(tmp_path / "missing.json")
    bad = tmp_path / "bad.json"
    bad.write_text("{oops", encoding="utf-8")
    with pytest.raises(InstrumentError, match="not valid JSON"):
        load_instrument(bad)
    good = tmp_path / "good.json"
    good.write_text(json.dumps(BASE), encoding="utf-8")
    assert load_instrument(good).survey == "pulse"


def test_model_round_trip():
    inst = parse_instrument(BASE)
    again = parse_instrument(inst.model_dump(mode="json"))
    assert again == inst
    assert np.array_equal(again.pairs, inst.pairs)
