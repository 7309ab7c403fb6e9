"""The answer-pattern drawing: highlights from real detector output, and the SVG's marks.

Every drawing is parsed with the Python standard library's XML parser
(``xml.etree.ElementTree``): the check that the string is well-formed XML, with every text
escaped, is that parser's, not the project's.
"""

from __future__ import annotations

import re
import xml.etree.ElementTree as ET

import numpy as np
import pytest

from detectors import Instrument, ResponseMatrix, State, parse_instrument
from detectors.attention_checks import AttentionChecks
from detectors.long_string import LongString
from detectors.sequence_pattern import SequencePattern
from detectors.straightlining import Straightlining
from service.demo import demo_instrument
from service.outcomes import StoredResult
from service.pages.drawing import (
    COLUMN,
    LEGEND_CHARS,
    Highlight,
    answer_pattern_svg,
    highlights_from,
)

SVG = "{http://www.w3.org/2000/svg}"
NAN = np.nan


def parse(svg: str) -> ET.Element:
    # The standard library's XML parser: raises on anything that is not well-formed XML.
    return ET.fromstring(svg)


def groups(root: ET.Element, kind: str) -> list[ET.Element]:
    return [g for g in root.iter(f"{SVG}g") if kind in (g.get("class") or "").split()]


def translate(element: ET.Element) -> tuple[float, float]:
    found = re.fullmatch(r"translate\(([-\d.]+),([-\d.]+)\)", element.get("transform", ""))
    assert found, element.get("transform")
    return float(found.group(1)), float(found.group(2))


def title_of(element: ET.Element) -> str:
    title = element.find(f"{SVG}title")
    assert title is not None and title.text is not None
    return title.text


def small_instrument() -> Instrument:
    """Two grids of five items, the first with an attention check; keying alternates."""
    items = [
        {"id": f"q{i:02d}", "text": f"statement {i}", "scale": "s" if i <= 5 else "t",
         "keyed": 1 if i % 2 else -1, "block": "grid-a" if i <= 5 else "grid-b"}
        for i in range(1, 11)
    ]
    items.insert(5, {"id": "chk", "text": "Please choose 'Disagree'.", "block": "grid-a",
                     "instructed_answer": 2})
    return parse_instrument({
        "survey": "t",
        "response_format": {"points": 5, "labels": ["SD", "D", "N", "A", "SA"]},
        "items": items,
    })


# Rows of small_instrument: q01..q05, chk, q06..q10.
CARELESS = [4, 4, 4, 4, 4, 4, 2, 3, 2, 3, 2]  # one answer on grid-a, chk failed, grid-b alternates
ATTENTIVE = [4, 2, 5, 1, 3, 2, 2, 5, 3, 1, 4]


def stored_results(instrument: Instrument, rows: list[list[float]], row: int) -> list[StoredResult]:
    """Real detector output for respondent ``row``, shaped as the service stores it."""
    matrix = ResponseMatrix.from_arrays(instrument, np.array(rows, dtype=float))
    detectors = [
        LongString(run_cutoff=5),
        Straightlining(),
        AttentionChecks(),
        SequencePattern(min_period_2_run=5),
    ]
    out = []
    for detector in detectors:
        result = detector.screen(instrument, matrix)
        out.append(StoredResult(
            detector=result.name, detector_version=result.version, state=result.state_of(row),
            score=float(result.scores[row]), cutoff=float(result.cutoffs[row]),
            flagged=bool(result.flags[row]), reason=result.reasons[row],
            evidence=result.evidence_for(row), sentence=result.sentence_for(row),
            reference_id=None,
        ))
    return out


# highlights_from ------------------------------------------------------------------------------


def test_highlights_from_real_detector_output():
    inst = small_instrument()
    results = stored_results(inst, [CARELESS, ATTENTIVE], 0)
    assert all(r.state is State.ASSESSED and r.flagged for r in results)
    highlights = highlights_from(results, inst)
    spans = [(h.first_item, h.last_item, h.label.split(":")[0]) for h in highlights]
    assert spans == [
        ("q01", "q05", "long_string"),  # the check is left out of runs, so q05 ends it
        ("q01", "chk", "straightlining"),  # the whole grid as shown, its check included
        ("chk", "chk", "attention_checks"),
        ("q06", "q10", "sequence_pattern"),
    ]
    labels = [h.label for h in highlights]
    assert labels[0] == "long_string: " + results[0].sentence
    assert "block 'grid-a'" in labels[1] and ", 4," in labels[1]
    assert labels[2] == "attention_checks: chk asked for 2 (D), answered 4 (A)"


def test_results_not_flagged_give_no_highlight():
    inst = small_instrument()
    results = stored_results(inst, [CARELESS, ATTENTIVE], 1)
    assert not any(r.flagged for r in results)
    assert highlights_from(results, inst) == []


def test_evidence_naming_no_item_of_the_instrument_gives_no_highlight():
    inst = small_instrument()
    real = stored_results(inst, [CARELESS], 0)[0]
    moved = StoredResult(**{**real.__dict__, "evidence": {**real.evidence, "first_item": 99}})
    assert highlights_from([moved], inst) == []
    unknown_block = StoredResult(
        **{**real.__dict__, "detector": "straightlining",
           "evidence": {"straightlined_blocks": ["no-such-grid"], "block": None, "answer": None}}
    )
    assert highlights_from([unknown_block], inst) == []


# The drawing ----------------------------------------------------------------------------------


def draw(inst: Instrument, row: list[float], highlights=(), **kw) -> tuple[str, ET.Element]:
    answers = {
        i: (None if np.isnan(v) else int(v)) for i, v in zip(inst.item_ids, row, strict=True)
    }
    svg = answer_pattern_svg(inst, answers, list(highlights), title=kw.pop("title", "R-1"), **kw)
    return svg, parse(svg)


def test_one_marker_per_answered_item_and_a_no_answer_mark_for_the_others():
    inst = small_instrument()
    row = [4, NAN, 4, 4, NAN, 2, 2, 3, 2, 3, NAN]
    _, root = draw(inst, row)
    answered = [g.get("data-item") for g in groups(root, "answer")]
    missing = [g.get("data-item") for g in groups(root, "no-answer")]
    assert answered == [i for i, v in zip(inst.item_ids, row, strict=True) if not np.isnan(v)]
    assert missing == ["q02", "q05", "q10"]
    for g in groups(root, "no-answer"):
        assert title_of(g).split("\n")[0].endswith(": no answer")
    # The missing answers sit on one row below every answer.
    baseline = {translate(g)[1] for g in groups(root, "no-answer")}
    assert len(baseline) == 1
    assert min(baseline) > max(translate(g)[1] for g in groups(root, "answer"))


def test_reverse_keyed_items_have_another_shape_and_an_r_mark():
    inst = small_instrument()
    _, root = draw(inst, ATTENTIVE)
    for g in groups(root, "answer"):
        item = inst.items[inst.item_index[g.get("data-item")]]
        shapes = [child.tag for child in g if child.tag != f"{SVG}title"]
        if item.keyed == -1:
            assert "reverse" in g.get("class") and shapes == [f"{SVG}path"]
            assert "reverse-keyed" in title_of(g)
        else:
            assert "positive" in g.get("class") and shapes == [f"{SVG}circle"]
            assert "reverse-keyed" not in title_of(g)
    marks = [t for t in root.iter(f"{SVG}text") if t.get("class") == "keyed-mark"]
    assert [t.text for t in marks] == ["R"] * 5
    reverse_x = sorted(
        translate(g)[0] for g in groups(root, "answer") if "reverse" in g.get("class")
    )
    assert sorted(float(t.get("x")) for t in marks) == reverse_x


def test_markers_sit_at_the_height_of_their_answer_lowest_at_the_bottom():
    inst = small_instrument()
    _, root = draw(inst, ATTENTIVE)
    height = {int(g.get("data-answer")): translate(g)[1] for g in groups(root, "answer")}
    heights = [height[a] for a in sorted(height)]  # SVG y grows downwards
    assert heights == sorted(heights, reverse=True) and len(set(heights)) == len(heights)
    steps = np.diff(heights)
    assert np.allclose(steps, steps[0])  # evenly spaced options
    # The axis labels sit at the same heights, lowest option at the bottom.
    labels = {
        t.text: float(t.get("y"))
        for t in root.iter(f"{SVG}text") if t.get("class") == "option-label"
    }
    assert [labels[name] - 4 for name in ["SD", "D", "N", "A", "SA"]] == pytest.approx(heights)


def test_the_instructed_answer_is_a_ring_at_its_height():
    inst = small_instrument()
    _, root = draw(inst, CARELESS)
    (ring,) = groups(root, "instructed")
    assert ring.get("data-item") == "chk"
    answer_heights = {int(g.get("data-answer")): translate(g)[1] for g in groups(root, "answer")}
    assert translate(ring)[1] == answer_heights[2]
    (check,) = [g for g in groups(root, "answer") if g.get("data-item") == "chk"]
    assert translate(check)[0] == translate(ring)[0]
    assert title_of(check).startswith("chk (attention check asking for 2 = D, block grid-a): 4 = A")


def test_items_of_different_formats_are_placed_by_their_position_in_their_own_scale():
    inst = parse_instrument({
        "survey": "t", "response_format": {"points": 5},
        "items": [{"id": "a"}, {"id": "b", "response_format": {"points": 7, "lowest": 0}}],
    })
    svg = answer_pattern_svg(inst, {"a": 5, "b": 6}, [], title="t")
    top = {g.get("data-item"): translate(g)[1] for g in groups(parse(svg), "answer")}
    assert top["a"] == top["b"]  # both the highest option
    svg = answer_pattern_svg(inst, {"a": 3, "b": 3}, [], title="t")
    middle = {g.get("data-item"): g for g in groups(parse(svg), "answer")}
    assert translate(middle["a"])[1] == translate(middle["b"])[1]
    assert "placed at option 4 of 7 of its own scale" in title_of(middle["b"])


def test_blocks_and_scales_are_labelled():
    inst = small_instrument()
    _, root = draw(inst, ATTENTIVE)
    assert [g.get("data-block") for g in groups(root, "block")] == ["grid-a", "grid-b"]
    block_labels = [t.text for t in root.iter(f"{SVG}text") if t.get("class") == "block-label"]
    assert block_labels == ["grid-a", "grid-b"]
    # chk has no scale, so it splits nothing here (s ends at q05) but stands between s and t.
    assert [g.get("data-scale") for g in groups(root, "scale")] == ["s", "t"]
    items_without_block = parse_instrument({
        "survey": "t", "response_format": {"points": 5}, "items": [{"id": "a"}, {"id": "b"}],
    })
    _, root = draw(items_without_block, [1, 2])
    assert groups(root, "block") == []


def test_answered_items_are_joined_within_a_block_only():
    inst = small_instrument()
    _, root = draw(inst, [1, 2, NAN, 4, 5, 2, 1, 2, 3, 4, 5])
    lines = [p.get("points").split() for p in root.iter(f"{SVG}polyline")]
    # grid-a: q01-q02, then q04-q05-chk after the gap; grid-b: q06..q10 on its own line.
    assert [len(points) for points in lines] == [2, 3, 5]


def test_a_highlight_covers_exactly_its_items_columns():
    inst = small_instrument()
    highlights = [Highlight("q03", "q07", "first"), Highlight("chk", "chk", "second")]
    _, root = draw(inst, ATTENTIVE, highlights)
    centre = {g.get("data-item"): translate(g)[0] for g in groups(root, "answer")}
    spans = groups(root, "highlight")
    expected = [("q03", "q07"), ("chk", "chk")]
    assert [(g.get("data-first"), g.get("data-last")) for g in spans] == expected
    for g, (first, last) in zip(spans, expected, strict=True):
        rect = g.find(f"{SVG}rect")
        left, width = float(rect.get("x")), float(rect.get("width"))
        assert left == pytest.approx(centre[first] - COLUMN / 2)
        assert left + width == pytest.approx(centre[last] + COLUMN / 2)
        assert rect.get("fill").startswith("url(#")
    numbers = [g.find(f"{SVG}text").text for g in groups(root, "highlight-number")]
    assert numbers == ["1", "2"]


def test_the_legend_lists_each_highlight_and_cuts_long_labels():
    inst = small_instrument()
    long_label = "sequence_pattern: " + "x" * 200
    highlights = [Highlight("q01", "q02", "short one"), Highlight("q03", "q03", long_label)]
    _, root = draw(inst, ATTENTIVE, highlights)
    items = [t for t in root.iter(f"{SVG}text") if t.get("class") == "legend-item"]
    assert items[0].text == "1 — short one"
    assert len(items[1].text) == LEGEND_CHARS and items[1].text.endswith("…")
    assert title_of(items[1]) == "2 — " + long_label
    notes = " ".join(t.text for t in root.iter(f"{SVG}text") if t.get("class") == "legend-note")
    assert "not a verdict" in notes


def test_unknown_ids_in_highlights_and_answers_are_ignored():
    inst = small_instrument()
    answers = {"q01": 3, "nobody": 4}
    svg = answer_pattern_svg(inst, answers, [Highlight("q01", "zz9", "gone")], title="t")
    root = parse(svg)
    assert [g.get("data-item") for g in groups(root, "answer")] == ["q01"]
    assert groups(root, "highlight") == []
    desc = root.find(f"{SVG}desc").text
    assert "11 items" in desc and "1 answered" in desc and "no highlighted span" in desc


def test_text_with_markup_characters_is_escaped():
    odd_block = 'grid <b> & "quoted" \'x\''
    odd_text = "Is 3 < 4 & \"yes\"? </title><script>alert(1)</script>"
    inst = parse_instrument({
        "survey": "t", "response_format": {"points": 3, "labels": ["<no>", "a & b", '"yes"']},
        "items": [
            {"id": "a", "text": odd_text, "block": odd_block, "scale": "s<&>"},
            {"id": "b", "text": "plain", "block": odd_block, "scale": "s<&>"},
        ],
    })
    label = 'note <i>&amp; "q"'
    svg = answer_pattern_svg(
        inst, {"a": 1, "b": 3}, [Highlight("a", "b", label)], title='R <1> & "2"', id_prefix="r1"
    )
    assert "<script>" not in svg and "<b>" not in svg
    root = parse(svg)
    assert root.find(f"{SVG}title").text == 'R <1> & "2"'
    assert [g.get("data-block") for g in groups(root, "block")] == [odd_block]
    assert [g.get("data-scale") for g in groups(root, "scale")] == ["s<&>"]
    (a,) = [g for g in groups(root, "answer") if g.get("data-item") == "a"]
    assert title_of(a) == f"a (scale s<&>, block {odd_block}): 1 = <no>\n{odd_text}"
    legend = [t.text for t in root.iter(f"{SVG}text") if t.get("class") == "legend-item"]
    assert legend == [f"1 — {label}"]
    # Characters XML cannot hold at all are replaced rather than breaking the document.
    svg = answer_pattern_svg(inst, {}, [], title="bell \x07 here")
    assert parse(svg).find(f"{SVG}title").text == "bell \ufffd here"


def test_accessible_names_and_ids_unique_per_prefix():
    inst = small_instrument()
    one, root = draw(inst, ATTENTIVE, [Highlight("q01", "q03", "x")], id_prefix="first")
    two, _ = draw(inst, ATTENTIVE, [Highlight("q01", "q03", "x")], id_prefix="second")
    assert root.get("role") == "img"
    assert root.get("aria-labelledby") == "first-title first-desc"
    ids = [e.get("id") for e in root.iter() if e.get("id")]
    assert len(ids) == len(set(ids)) and all(i.startswith("first-") for i in ids)
    assert {"first-title", "first-desc"} <= set(ids)
    ids_two = {e.get("id") for e in parse(two).iter() if e.get("id")}
    assert not ids_two & set(ids)
    # Every reference to an id points into the same drawing.
    for ref in re.findall(r"url\(#([^)]+)\)", one):
        assert ref in ids
    assert all(title_of(g) for g in groups(root, "answer") + groups(root, "no-answer"))
    with pytest.raises(ValueError, match="id_prefix"):
        draw(inst, ATTENTIVE, id_prefix="1 bad")


def test_same_input_same_string():
    inst = small_instrument()
    first, _ = draw(inst, CARELESS, [Highlight("q01", "q05", "x")])
    again, _ = draw(small_instrument(), CARELESS, [Highlight("q01", "q05", "x")])
    assert first == again


def test_an_answer_outside_the_format_names_the_item():
    inst = small_instrument()
    with pytest.raises(ValueError, match=r"answers\['q02'\]: 9 is outside .* 1\.\.5"):
        answer_pattern_svg(inst, {"q02": 9}, [], title="t")


def test_the_demo_instrument_with_a_straightlining_respondent():
    inst = Instrument.model_validate(demo_instrument())
    row = [4.0 if item.block in ("page-2", "page-3") else float(1 + i % 5)
           for i, item in enumerate(inst.items)]
    row[3] = NAN
    matrix = ResponseMatrix.from_arrays(inst, np.array([row]))
    results = []
    for detector in (Straightlining(), AttentionChecks()):
        result = detector.screen(inst, matrix)
        results.append(StoredResult(
            detector=result.name, detector_version=result.version, state=result.state_of(0),
            score=float(result.scores[0]), cutoff=float(result.cutoffs[0]),
            flagged=bool(result.flags[0]), reason=result.reasons[0],
            evidence=result.evidence_for(0), sentence=result.sentence_for(0), reference_id=None,
        ))
    highlights = highlights_from(results, inst)
    assert [(h.first_item, h.last_item) for h in highlights] == [
        ("wo01", "wo08"), ("tr01", "tr08"), ("check1", "check1"),
    ]
    _, root = draw(inst, row, highlights, title="Demo respondent")
    assert len(groups(root, "answer")) == len(inst.items) - 1
    assert len(groups(root, "highlight")) == 3
    blocks = [g.get("data-block") for g in groups(root, "block")]
    assert blocks == ["page-1", "page-2", "page-3", "page-4"]
    item_ids = [t.text for t in root.iter(f"{SVG}text") if t.get("class") == "item-id"]
    assert item_ids == list(inst.item_ids)
