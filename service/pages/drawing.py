"""One respondent's answers drawn as an inline SVG, for the review pages.

Pure string building: no web framework, no database. The page embeds the returned string as is
(it is marked safe there), so every text taken from the instrument, the answers or the detector
results is escaped here.

The drawing has one column per item in presentation order and the answer options on the
vertical axis, lowest at the bottom. Blocks (grids, pages) are bands above the plot, scales
brackets under it. Answers are markers joined by a thin line within a block; reverse-keyed
items get a hollow diamond instead of a filled dot and an "R" under their id, so the keying
never rests on colour alone. A missing answer is a cross on the row under the plot; an
attention-check item shows the answer it asks for as a ring. Spans of items that a flagged
detector points at are hatched, numbered, and listed in a legend under the plot; the drawing
says that they are evidence for a reviewer's decision, not a verdict.
"""

from __future__ import annotations

import html
import math
import operator
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from detectors import Instrument, Item, ResponseFormat

__all__ = ["Highlight", "answer_pattern_svg", "highlights_from"]


@dataclass(frozen=True)
class Highlight:
    """A span of items a flagged detector points at, in presentation order."""

    first_item: str  # item id where the highlighted span starts
    last_item: str  # item id where it ends (the same as first_item for one item)
    label: str  # what the detector found, e.g. "long_string: same answer, 4, on 14 items ..."


# From detector results to highlights -----------------------------------------------------------

#: The name the instrument gives the single block of an instrument without blocks.
_WHOLE_QUESTIONNAIRE = "(whole questionnaire)"


def highlights_from(results: Sequence[Any], instrument: Instrument) -> list[Highlight]:
    """The item spans the flagged results point at, in the order of ``results``.

    Each result has ``detector``, ``flagged``, ``evidence`` and ``sentence`` (a stored result of
    the service). Results that are not flagged, and evidence naming no item of ``instrument``,
    give nothing. Read per detector:

    - ``long_string``: ``first_item`` and ``last_item`` (item positions) of the longest run;
    - ``straightlining``: ``straightlined_blocks`` (block names), each block one span (a block
      split by items of another block gives one span per part), ``block`` and ``answer`` for
      the block the sentence describes;
    - ``attention_checks``: ``check_items`` with ``failed``, one span per failed check, with
      ``asked``/``asked_labels`` and ``given``/``given_labels`` in the label;
    - ``sequence_pattern``: ``first_item`` and ``last_item`` of the longest patterned run, when
      ``rule`` names one;
    - ``person_fit``: ``most_unexpected_item`` when ``misfit`` is ``"underfit"``;
    - any other detector whose evidence has ``first_item`` and ``last_item``: that span.

    Item positions may also be given as item ids.
    """
    out: list[Highlight] = []
    for result in results:
        if not bool(getattr(result, "flagged", False)):
            continue
        name = str(getattr(result, "detector", ""))
        evidence = getattr(result, "evidence", None) or {}
        sentence = str(getattr(result, "sentence", "") or "")
        if name == "straightlining":
            out.extend(_straightlining(evidence, instrument))
        elif name == "attention_checks":
            out.extend(_attention_checks(evidence, sentence, instrument))
        elif name == "sequence_pattern":
            if evidence.get("rule") is not None:
                out.extend(_span(name, evidence, sentence, instrument))
        elif name == "person_fit":
            out.extend(_person_fit(evidence, instrument))
        elif "first_item" in evidence and "last_item" in evidence:
            out.extend(_span(name, evidence, sentence, instrument))
    return out


def _position(value: Any, instrument: Instrument) -> int | None:
    """An item's position from evidence (a position, or an item id); None when not an item."""
    if isinstance(value, str):
        return instrument.item_index.get(value)
    if isinstance(value, bool) or value is None:
        return None
    try:
        position = operator.index(value)
    except TypeError:
        return None
    return position if 0 <= position < len(instrument.items) else None


def _span(
    name: str, evidence: Mapping[str, Any], sentence: str, instrument: Instrument
) -> list[Highlight]:
    first = _position(evidence.get("first_item"), instrument)
    last = _position(evidence.get("last_item"), instrument)
    if first is None or last is None:
        return []
    first, last = min(first, last), max(first, last)
    ids = instrument.item_ids
    return [Highlight(ids[first], ids[last], _label(name, sentence))]


def _label(name: str, sentence: str) -> str:
    return f"{name}: {sentence}" if sentence else name


def _block_parts(instrument: Instrument, block: str) -> list[tuple[int, int]]:
    """(first, last) positions of each stretch of consecutive items of ``block``."""
    if block == _WHOLE_QUESTIONNAIRE and all(item.block is None for item in instrument.items):
        content = [int(c) for c in instrument.content_items]
        return [(content[0], content[-1])] if content else []
    parts: list[tuple[int, int]] = []
    for position, item in enumerate(instrument.items):
        if item.block != block:
            continue
        if parts and parts[-1][1] == position - 1:
            parts[-1] = (parts[-1][0], position)
        else:
            parts.append((position, position))
    return parts


def _straightlining(evidence: Mapping[str, Any], instrument: Instrument) -> list[Highlight]:
    ids = instrument.item_ids
    main, answer = evidence.get("block"), evidence.get("answer")
    out: list[Highlight] = []
    for block in _as_list(evidence.get("straightlined_blocks")):
        block = str(block)
        where = "the whole questionnaire" if block == _WHOLE_QUESTIONNAIRE else f"block {block!r}"
        given = f", {answer}," if block == main and answer is not None else ""
        label = f"straightlining: same answer{given} on every answered item of {where}"
        for first, last in _block_parts(instrument, block):
            out.append(Highlight(ids[first], ids[last], label))
    return out


def _attention_checks(
    evidence: Mapping[str, Any], sentence: str, instrument: Instrument
) -> list[Highlight]:
    checks = _as_list(evidence.get("check_items"))
    failed = _as_list(evidence.get("failed"))
    if len(failed) != len(checks):
        return []
    asked = _padded(evidence.get("asked"), len(checks))
    asked_labels = _padded(evidence.get("asked_labels"), len(checks))
    given = _padded(evidence.get("given"), len(checks))
    given_labels = _padded(evidence.get("given_labels"), len(checks))
    out: list[Highlight] = []
    for c, (check, did_fail) in enumerate(zip(checks, failed, strict=True)):
        position = _position(check, instrument)
        if not did_fail or position is None:
            continue
        item_id = instrument.item_ids[position]
        if asked[c] is None:
            label = _label("attention_checks", sentence)
        else:
            answer = (
                "left unanswered" if given[c] is None
                else f"answered {_option(given[c], given_labels[c])}"
            )
            label = (
                f"attention_checks: {item_id} asked for {_option(asked[c], asked_labels[c])}, "
                f"{answer}"
            )
        out.append(Highlight(item_id, item_id, label))
    return out


def _person_fit(evidence: Mapping[str, Any], instrument: Instrument) -> list[Highlight]:
    if evidence.get("misfit") != "underfit":
        return []
    position = _position(evidence.get("most_unexpected_item"), instrument)
    if position is None:
        return []
    item_id = instrument.item_ids[position]
    label = f"person_fit: most unexpected answer for the rating scale model, {item_id}"
    residual = evidence.get("largest_squared_residual")
    if isinstance(residual, int | float) and math.isfinite(residual):
        label += f" (squared standardised residual {residual:.1f})"
    return [Highlight(item_id, item_id, label)]


def _as_list(value: Any) -> list[Any]:
    if value is None or isinstance(value, str | bytes):
        return []
    try:
        return list(value)
    except TypeError:
        return []


def _padded(value: Any, n: int) -> list[Any]:
    values = _as_list(value)
    return values if len(values) == n else [None] * n


def _option(code: Any, label: Any) -> str:
    return f"{code}" if label is None else f"{code} ({label})"


# Drawing ----------------------------------------------------------------------------------------

COLUMN = 20  # px per item
RIGHT = 20
TOP_TITLE = 20
BAND_TOP, BAND_HEIGHT = 30, 18
PLOT_TOP = 76
OPTION_STEP = 30  # px between answer options on one format
MIXED_HEIGHT = 150  # plot height when items use different formats
ID_FONT = 10
ID_CHARS = 14  # item ids longer than this are cut (the full id stays in a title)
LABEL_CHARS = 28  # option labels on the axis
LEGEND_CHARS = 110  # legend lines
LEGEND_LINE = 17
CHAR_WIDTH = 0.64  # average glyph width in ems, to size text areas (an estimate, generous
# for wide sans-serif faces such as DejaVu Sans, a common fallback for system-ui on Linux)
FONT = "system-ui, sans-serif"

# Colours: all text and markers have at least 4.5:1 contrast on white.
INK = "#1c2731"  # text
MUTED = "#4a5663"  # secondary text, axis labels (about 7.4:1)
GRID = "#dde3e8"
LINE = "#6b7884"
POSITIVE = "#0f5a7d"  # filled dots (about 7.3:1)
REVERSE = "#6d3a8c"  # hollow diamonds (about 8:1)
MISSING_MARK = "#8f1f1f"
TARGET = "#1d6a3a"
HATCH = "#a34a08"  # about 5.6:1
HATCH_FILL = "#fdebd3"
BAND_FILLS = ("#e4ecf2", "#ece6f1")
BAND_EDGE = "#9aa8b5"

_ID_PREFIX = re.compile(r"^[A-Za-z][A-Za-z0-9_\-]*$")
_NOT_XML = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\ud800-\udfff\ufffe\uffff]")


def _text(value: object) -> str:
    """Escaped for XML text and attribute values; characters XML cannot hold become U+FFFD."""
    return html.escape(_NOT_XML.sub("\ufffd", str(value)), quote=True)


def _cut(text: str, limit: int) -> str:
    return text if len(text) <= limit else text[: max(limit - 1, 1)].rstrip() + "…"


def _num(value: float) -> str:
    """A coordinate as short, deterministic text."""
    text = f"{value:.1f}"
    return text[:-2] if text.endswith(".0") else text


def _width_of(chars: int, font_px: float) -> float:
    return chars * font_px * CHAR_WIDTH


def _format_key(fmt: ResponseFormat) -> tuple[int, int, tuple[str, ...] | None]:
    return fmt.points, fmt.lowest, None if fmt.labels is None else tuple(fmt.labels)


def _answer_code(item: Item, value: Any, fmt: ResponseFormat) -> int | None:
    """The answer code of ``item`` (None: no answer); an error names the item when invalid."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return None
    if isinstance(value, bool):
        raise ValueError(f"answers[{item.id!r}]: {value!r} is not an answer code")
    try:
        code = operator.index(value)
    except TypeError:
        if isinstance(value, float) and value.is_integer():
            code = int(value)
        else:
            raise ValueError(f"answers[{item.id!r}]: {value!r} is not an answer code") from None
    if not fmt.lowest <= code <= fmt.highest:
        raise ValueError(
            f"answers[{item.id!r}]: {code} is outside the item's answer range "
            f"{fmt.lowest}..{fmt.highest}"
        )
    return code


def _runs(values: Sequence[str | None]) -> list[tuple[str, int, int]]:
    """(value, first, last) of each stretch of equal, not-None consecutive values."""
    runs: list[tuple[str, int, int]] = []
    for position, value in enumerate(values):
        if value is None:
            continue
        if runs and runs[-1][0] == value and runs[-1][2] == position - 1:
            runs[-1] = (value, runs[-1][1], position)
        else:
            runs.append((value, position, position))
    return runs


def _option_text(code: int, fmt: ResponseFormat) -> str:
    return f"{code}" if fmt.labels is None else f"{code} = {fmt.labels[code - fmt.lowest]}"


def _describe_item(item: Item, fmt: ResponseFormat) -> str:
    parts = []
    if item.instructed_answer is not None:
        parts.append(f"attention check asking for {_option_text(item.instructed_answer, fmt)}")
    if item.scale is not None:
        parts.append(f"scale {item.scale}")
    if item.keyed == -1:
        parts.append("reverse-keyed")
    if item.block is not None:
        parts.append(f"block {item.block}")
    return f"{item.id} ({', '.join(parts)})" if parts else item.id


def answer_pattern_svg(
    instrument: Instrument,
    answers: Mapping[str, int | None],
    highlights: Sequence[Highlight],
    *,
    title: str,
    id_prefix: str = "ap",
) -> str:
    """One respondent's answers to ``instrument`` as an SVG document fragment (a string).

    ``answers`` maps item ids to answer codes (None or absent: no answer; ids not in the
    instrument are ignored). ``highlights`` are drawn in the order given and numbered from 1;
    those naming an unknown item are left out. ``id_prefix`` starts every element id, so that
    several drawings can share a page. The same input always gives the same string.

    Raises ValueError naming the item for an answer that is not a code of the item's format,
    and for an ``id_prefix`` that cannot start an XML id.
    """
    if not _ID_PREFIX.match(id_prefix):
        raise ValueError(
            f"id_prefix: {id_prefix!r} must start with a letter and hold only letters, digits, "
            "'-' and '_'"
        )
    items = instrument.items
    n = len(items)
    formats = [instrument.format_of(item) for item in items]
    mixed = len({_format_key(fmt) for fmt in formats}) > 1
    codes = [
        _answer_code(item, answers.get(item.id), fmt)
        for item, fmt in zip(items, formats, strict=True)
    ]
    spans = _known_spans(highlights, instrument)

    # Vertical layout.
    common = instrument.response_format if mixed else formats[0]
    plot_height = MIXED_HEIGHT if mixed else max(OPTION_STEP * (common.points - 1), 60)
    plot_bottom = PLOT_TOP + plot_height
    base_y = plot_bottom + 20  # the row of missing answers
    scale_y = base_y + 16
    ids_top = scale_y + 22
    longest_id = max(len(_cut(item.id, ID_CHARS)) for item in items)
    ids_bottom = ids_top + _width_of(longest_id, ID_FONT) + 4
    keyed_y = ids_bottom + 12
    legend_top = keyed_y + 26

    # Horizontal layout.
    axis_labels = _axis_labels(common, mixed)
    left = 24 + max(_width_of(len(text), 11) for _, text in axis_labels)
    left = max(left, 24 + _width_of(len("no answer"), 11))

    def x_of(position: int) -> float:
        return left + COLUMN * position + COLUMN / 2

    def y_of(code: int, fmt: ResponseFormat) -> float:
        return plot_bottom - plot_height * (code - fmt.lowest) / (fmt.points - 1)

    legend = _legend_lines(spans)
    notes = [
        "Highlighted spans are evidence for a reviewer's decision, not a verdict on the "
        "respondent."
    ]
    if mixed:
        notes.append(
            "The items use different answer formats: each answer is placed by its position in "
            "its own item's scale."
        )
    legend_chars = max([95, *(len(line) for line in notes), *(len(line) for line, _ in legend)])
    width = max(
        left + COLUMN * n + RIGHT, 16 + _width_of(legend_chars, 12) + RIGHT, _key_width() + RIGHT
    )
    height = legend_top + 16 + LEGEND_LINE * (len(legend) + len(notes)) + 14

    answered = sum(code is not None for code in codes)
    p = id_prefix
    out: list[str] = [
        f'<svg xmlns="http://www.w3.org/2000/svg" role="img" '
        f'aria-labelledby="{p}-title {p}-desc" width="{_num(width)}" height="{_num(height)}" '
        f'viewBox="0 0 {_num(width)} {_num(height)}" font-family="{FONT}" font-size="11" '
        f'fill="{INK}" class="answer-pattern">',
        f'<title id="{p}-title">{_text(title)}</title>',
        f'<desc id="{p}-desc">{_text(_summary(n, answered, len(spans)))}</desc>',
        "<defs>",
        f'<pattern id="{p}-hatch" width="6" height="6" patternUnits="userSpaceOnUse" '
        f'patternTransform="rotate(45)"><rect width="6" height="6" fill="{HATCH_FILL}"/>'
        f'<line x1="0" y1="0" x2="0" y2="6" stroke="{HATCH}" stroke-width="1.6"/></pattern>',
        "</defs>",
        f'<rect width="{_num(width)}" height="{_num(height)}" fill="#ffffff"/>',
        f'<text x="16" y="{TOP_TITLE}" font-size="13" font-weight="600">{_text(_cut(title, 140))}'
        "</text>",
    ]

    # Highlights go first, behind everything else; their numbers last, above everything.
    badges: list[str] = []
    lanes: list[tuple[int, int, int]] = []  # (first, last, lane) of the spans drawn so far
    for number, (first, last, label) in enumerate(spans, start=1):
        lane = min(
            set(range(len(lanes) + 1))
            - {ln for f, la, ln in lanes if not (last < f or first > la)}
        )
        lanes.append((first, last, lane))
        x0 = left + COLUMN * first
        span_width = COLUMN * (last - first + 1)
        top = PLOT_TOP - 26
        out.append(
            f'<g class="highlight" data-number="{number}" data-first="{_text(items[first].id)}" '
            f'data-last="{_text(items[last].id)}"><title>{number} — {_text(label)}</title>'
            f'<rect class="highlight-span" x="{_num(x0)}" y="{top}" width="{span_width}" '
            f'height="{_num(base_y + 10 - top)}" fill="url(#{p}-hatch)" fill-opacity="0.45" '
            f'stroke="{HATCH}" stroke-width="1" stroke-dasharray="3 2"/></g>'
        )
        badges.append(
            f'<g class="highlight-number" data-number="{number}"><title>{number} — '
            f'{_text(label)}</title><circle cx="{_num(x0 + 9 + 17 * lane)}" cy="{top + 9}" '
            f'r="7.5" fill="#ffffff" stroke="{HATCH}" stroke-width="1.2"/>'
            f'<text x="{_num(x0 + 9 + 17 * lane)}" y="{top + 12.5}" font-size="10" '
            f'font-weight="700" text-anchor="middle">{number}</text></g>'
        )

    out.extend(_bands(items, left))
    out.extend(_axes(axis_labels, common, mixed, left, n, plot_height, plot_bottom, base_y))
    out.extend(_scale_brackets(items, left, scale_y))

    # Lines joining consecutive answered items of one block.
    segment: list[str] = []
    segments: list[list[str]] = []
    for position, (item, code, fmt) in enumerate(zip(items, codes, formats, strict=True)):
        joins = position > 0 and items[position - 1].block == item.block
        if code is None or not joins or codes[position - 1] is None:
            if len(segment) > 1:
                segments.append(segment)
            segment = []
        if code is not None:
            segment.append(f"{_num(x_of(position))},{_num(y_of(code, fmt))}")
    if len(segment) > 1:
        segments.append(segment)
    for points in segments:
        out.append(
            f'<polyline class="answer-line" points="{" ".join(points)}" fill="none" '
            f'stroke="{LINE}" stroke-width="1.2"/>'
        )

    # Instructed answers, answers, missing answers, item ids and keying marks.
    for position, (item, code, fmt) in enumerate(zip(items, codes, formats, strict=True)):
        x = x_of(position)
        about = _describe_item(item, fmt)
        text = f"\n{item.text}" if item.text else ""
        if item.instructed_answer is not None:
            y = y_of(item.instructed_answer, fmt)
            out.append(
                f'<g class="instructed" data-item="{_text(item.id)}" '
                f'transform="translate({_num(x)},{_num(y)})"><title>{_text(item.id)}: the '
                f"instructed answer, {_text(_option_text(item.instructed_answer, fmt))}</title>"
                f'<circle r="9" fill="none" stroke="{TARGET}" stroke-width="1.5"/>'
                f'<circle r="12.5" fill="none" stroke="{TARGET}" stroke-width="1" '
                f'stroke-dasharray="2 2"/></g>'
            )
        if code is None:
            out.append(
                f'<g class="no-answer" data-item="{_text(item.id)}" '
                f'transform="translate({_num(x)},{_num(base_y)})">'
                f"<title>{_text(about)}: no answer{_text(text)}</title>"
                f'<path d="M-4,-4L4,4M-4,4L4,-4" stroke="{MISSING_MARK}" stroke-width="1.8"/>'
                f'<rect x="-6" y="-6" width="12" height="12" fill="none" stroke="none"/></g>'
            )
        else:
            placed = (
                f" (placed at option {code - fmt.lowest + 1} of {fmt.points} of its own "
                "scale: the items use different answer formats)" if mixed else ""
            )
            label = f"{about}: {_option_text(code, fmt)}{placed}{text}"
            shape = (
                f'<path d="M0,-6.5L6.5,0L0,6.5L-6.5,0Z" fill="#ffffff" stroke="{REVERSE}" '
                'stroke-width="2"/>'
                if item.keyed == -1
                else f'<circle r="4.5" fill="{POSITIVE}" stroke="#ffffff" stroke-width="1"/>'
            )
            kind = "reverse" if item.keyed == -1 else "positive"
            out.append(
                f'<g class="answer {kind}" data-item="{_text(item.id)}" data-answer="{code}" '
                f'transform="translate({_num(x)},{_num(y_of(code, fmt))})">'
                f"<title>{_text(label)}</title>{shape}</g>"
            )
        shown = _cut(item.id, ID_CHARS)
        out.append(
            f'<text class="item-id" font-size="{ID_FONT}" text-anchor="end" '
            f'transform="translate({_num(x + 3.5)},{_num(ids_top)}) rotate(-90)">'
            f"{_text(shown)}<title>{_text(item.id)}</title></text>"
        )
        if item.keyed == -1:
            out.append(
                f'<text class="keyed-mark" x="{_num(x)}" y="{_num(keyed_y)}" font-size="10" '
                f'font-weight="700" text-anchor="middle" fill="{REVERSE}">R'
                f"<title>{_text(item.id)} is reverse-keyed</title></text>"
            )

    out.extend(badges)
    out.extend(_legend(p, legend, notes, legend_top))
    out.append("</svg>")
    return "\n".join(out)


def _known_spans(
    highlights: Iterable[Highlight], instrument: Instrument
) -> list[tuple[int, int, str]]:
    spans = []
    for highlight in highlights:
        first = instrument.item_index.get(highlight.first_item)
        last = instrument.item_index.get(highlight.last_item)
        if first is None or last is None:
            continue
        spans.append((min(first, last), max(first, last), highlight.label))
    return spans


def _summary(n: int, answered: int, spans: int) -> str:
    items = "item" if n == 1 else "items"
    span_text = (
        "no highlighted span" if spans == 0
        else f"{spans} highlighted span{'s' if spans != 1 else ''} of items a flagged "
        "detector points at (evidence for a reviewer's decision, not a verdict)"
    )
    return (
        f"Answers of one respondent to {n} {items} in presentation order, {answered} answered "
        f"and {n - answered} without an answer, with {span_text}."
    )


def _axis_labels(fmt: ResponseFormat, mixed: bool) -> list[tuple[float, str]]:
    """(height 0..1, text) of each labelled level of the vertical axis."""
    if mixed:
        return [(0.0, "lowest option"), (0.5, "middle"), (1.0, "highest option")]
    out = []
    for step in range(fmt.points):
        code = fmt.lowest + step
        text = str(code) if fmt.labels is None else _cut(fmt.labels[step], LABEL_CHARS)
        out.append((step / (fmt.points - 1), text))
    return out


def _axes(
    labels: list[tuple[float, str]], fmt: ResponseFormat, mixed: bool, left: float, n: int,
    plot_height: float, plot_bottom: float, base_y: float,
) -> list[str]:
    right = left + COLUMN * n
    out = []
    for level, text in labels:
        y = plot_bottom - plot_height * level
        out.append(
            f'<line class="grid" x1="{_num(left)}" y1="{_num(y)}" x2="{_num(right)}" '
            f'y2="{_num(y)}" stroke="{GRID}" stroke-width="1"/>'
        )
        full = text
        if not mixed and fmt.labels is not None:
            step = round(level * (fmt.points - 1))
            full = f"{fmt.lowest + step} = {fmt.labels[step]}"
        out.append(
            f'<text class="option-label" x="{_num(left - 8)}" y="{_num(y + 4)}" '
            f'text-anchor="end" fill="{MUTED}">{_text(text)}<title>{_text(full)}</title></text>'
        )
    out.append(
        f'<line x1="{_num(left)}" y1="{_num(base_y)}" x2="{_num(right)}" y2="{_num(base_y)}" '
        f'stroke="{GRID}" stroke-width="1" stroke-dasharray="2 3"/>'
    )
    out.append(
        f'<text x="{_num(left - 8)}" y="{_num(base_y + 4)}" text-anchor="end" '
        f'fill="{MUTED}" font-style="italic">no answer</text>'
    )
    return out


def _bands(items: Sequence[Item], left: float) -> list[str]:
    out = []
    for number, (block, first, last) in enumerate(_runs([item.block for item in items])):
        x0 = left + COLUMN * first
        span_width = COLUMN * (last - first + 1)
        shown = _cut(block, max(int((span_width - 6) / _width_of(1, 11)), 1))
        out.append(
            f'<g class="block" data-block="{_text(block)}"><title>block {_text(block)}</title>'
            f'<rect x="{_num(x0 + 1)}" y="{BAND_TOP}" width="{span_width - 2}" '
            f'height="{BAND_HEIGHT}" rx="3" fill="{BAND_FILLS[number % 2]}" '
            f'stroke="{BAND_EDGE}" stroke-width="0.8"/>'
            f'<text class="block-label" x="{_num(x0 + span_width / 2)}" '
            f'y="{BAND_TOP + 13}" text-anchor="middle">{_text(shown)}</text></g>'
        )
    return out


def _scale_brackets(items: Sequence[Item], left: float, y: float) -> list[str]:
    out = []
    for scale, first, last in _runs([item.scale for item in items]):
        x0 = left + COLUMN * first + 3
        x1 = left + COLUMN * (last + 1) - 3
        shown = _cut(scale, max(int((x1 - x0 + 6) / _width_of(1, 10)), 1))
        out.append(
            f'<g class="scale" data-scale="{_text(scale)}"><title>scale {_text(scale)}</title>'
            f'<path d="M{_num(x0)},{_num(y - 5)}V{_num(y)}H{_num(x1)}V{_num(y - 5)}" '
            f'fill="none" stroke="{MUTED}" stroke-width="1"/>'
            f'<text class="scale-label" x="{_num((x0 + x1) / 2)}" y="{_num(y + 11)}" '
            f'font-size="10" text-anchor="middle" fill="{MUTED}">{_text(shown)}</text></g>'
        )
    return out


def _legend_lines(spans: Sequence[tuple[int, int, str]]) -> list[tuple[str, str]]:
    """(line shown, full text) per highlight."""
    out = []
    for number, (_, _, label) in enumerate(spans, start=1):
        full = f"{number} — {label}"
        out.append((_cut(full, LEGEND_CHARS), full))
    return out


def _legend(p: str, lines: list[tuple[str, str]], notes: list[str], top: float) -> list[str]:
    """The key of the marks, the numbered highlights and the note on what they mean."""
    y = top
    out = [f'<g class="legend" id="{p}-legend">']
    for (shape, meaning), x in zip(_key(p), _key_positions(), strict=True):
        out.append(f'<g transform="translate({_num(x + 7)},{_num(y - 4)})">{shape}</g>')
        out.append(f'<text x="{_num(x + 18)}" y="{_num(y)}">{_text(meaning)}</text>')
    y += 8
    for shown, full in lines:
        y += LEGEND_LINE
        out.append(
            f'<text class="legend-item" x="16" y="{_num(y)}" font-size="12">{_text(shown)}'
            f"<title>{_text(full)}</title></text>"
        )
    for note in notes:
        y += LEGEND_LINE
        out.append(
            f'<text class="legend-note" x="16" y="{_num(y)}" font-size="11" fill="{MUTED}">'
            f"{_text(note)}</text>"
        )
    out.append("</g>")
    return out


#: The meanings the key lists, in order.
KEY_MEANINGS = (
    "answer",
    "answer to a reverse-keyed item (R)",
    "no answer",
    "answer an attention check asks for",
    "span a flagged detector points at",
)


def _key_positions() -> list[float]:
    """The left edge of each entry of the key."""
    out, x = [], 16.0
    for meaning in KEY_MEANINGS:
        out.append(x)
        x += 18 + _width_of(len(meaning), 11) + 18
    return out


def _key_width() -> float:
    return _key_positions()[-1] + 18 + _width_of(len(KEY_MEANINGS[-1]), 11)


def _key(p: str) -> list[tuple[str, str]]:
    """Each mark of the key drawn as in the plot, with its meaning."""
    shapes = [
        f'<circle r="4.5" fill="{POSITIVE}"/>',
        f'<path d="M0,-6L6,0L0,6L-6,0Z" fill="#ffffff" stroke="{REVERSE}" stroke-width="2"/>',
        f'<path d="M-4,-4L4,4M-4,4L4,-4" stroke="{MISSING_MARK}" stroke-width="1.8"/>',
        f'<circle r="7" fill="none" stroke="{TARGET}" stroke-width="1.5"/>',
        f'<rect x="-6" y="-6" width="12" height="12" fill="url(#{p}-hatch)" '
        f'stroke="{HATCH}" stroke-width="1"/>',
    ]
    return list(zip(shapes, KEY_MEANINGS, strict=True))
