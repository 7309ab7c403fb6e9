"""Hypothesis strategies for instrument documents, valid and broken, and a check that a
problem's location names a place in the document (for ``parse_instrument`` and the
registration endpoint alike)."""

from __future__ import annotations

import copy
import re
from typing import Any

from hypothesis import strategies as st

from detectors import REGISTRY, Interval

#: Keys of the generated fields: letters and digits only, so a dotted location or a JSON
#: pointer made from them reads back unambiguously.
KEYS = st.text(alphabet="abcdefghijklmnopqrstuvwxyz0123456789_", min_size=1, max_size=8)
ITEM_IDS = st.from_regex(r"[A-Za-z0-9_.\-]{1,8}", fullmatch=True)

#: Any JSON value (small), for a field of the wrong type.
JSON_VALUES = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats(allow_nan=False, allow_infinity=False)
    | st.text(max_size=8),
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(KEYS, inner, max_size=3),
    max_leaves=6,
)
#: Numbers and near-numbers at and past the edges of what a setting or a format takes;
#: 2**64 - 1 is the largest whole number a JSON reader such as orjson hands over as an int;
#: Python's own reads any (10**400, past the largest float).
EDGE_NUMBERS = st.sampled_from(
    [0, 1, -1, 2, 11, 51, -51, 0.5, 1.5, 1e308, -1e308, 2**63 - 1, 2**63, 2**64 - 1, -(2**63) - 1,
     10**400, True, False, None, "5", [], {}]
)
NAMES = sorted(REGISTRY)
#: (detector, setting) of every setting that takes a number.
NUMBER_SETTINGS = [
    (name, key) for name in NAMES
    for key, constraint in REGISTRY[name].parameter_constraints.items()
    if isinstance(constraint, Interval)
]


@st.composite
def valid_documents(draw: st.DrawFn) -> dict[str, Any]:
    """An instrument document ``parse_instrument`` accepts."""
    points = draw(st.integers(2, 10))
    lowest = draw(st.integers(-50, 50))
    ids = draw(st.lists(ITEM_IDS, min_size=1, max_size=8, unique=True))
    items = []
    for item_id in ids:
        item: dict[str, Any] = {"id": item_id, "keyed": draw(st.sampled_from([1, -1]))}
        if draw(st.booleans()):
            item["scale"] = draw(st.sampled_from(["calm", "drive"]))
        if draw(st.booleans()):
            item["block"] = draw(st.sampled_from(["page-1", "page-2"]))
        if draw(st.integers(0, 9)) == 0:
            item["instructed_answer"] = draw(st.integers(lowest, lowest + points - 1))
        items.append(item)
    document: dict[str, Any] = {
        "survey": draw(ITEM_IDS),
        "title": draw(st.text(max_size=12)),
        "response_format": {"points": points, "lowest": lowest},
        "items": items,
    }
    if draw(st.booleans()):
        name = draw(st.sampled_from(NAMES))
        defaults = REGISTRY[name].defaults()
        chosen = draw(st.lists(st.sampled_from(sorted(defaults)), max_size=2, unique=True))
        document["screening"] = {name: {key: defaults[key] for key in chosen}}
    if draw(st.booleans()):
        document["verdict"] = {"review_from": 1, "likely_careless_from": draw(st.integers(1, 3))}
    return document


def _spot(draw: st.DrawFn, document: dict[str, Any]) -> tuple[Any, Any]:
    """A container somewhere in the document and a key or index in it (a random walk)."""
    node: Any = document
    key: Any = draw(st.sampled_from(sorted(node)))
    while isinstance(node[key], dict | list) and node[key] and draw(st.booleans()):
        node = node[key]
        key = draw(st.sampled_from(sorted(node) if isinstance(node, dict) else range(len(node))))
    return node, key


#: Ways to break a document, in the order they are applied.
BREAKS = [
    "unknown_field", "keyed", "duplicate_id", "format", "screening_number", "screening_value",
    "screening_setting",
    "screening_detector", "item_format", "pairs", "verdict", "screening_shape", "wrong_type",
]


@st.composite
def broken_documents(draw: st.DrawFn) -> Any:
    """A valid document with one to three things broken (or not a document at all)."""
    document = draw(valid_documents())
    if draw(st.integers(0, 19)) == 0:
        return draw(st.lists(JSON_VALUES, max_size=2) | st.integers() | st.text() | st.none())
    kinds = draw(st.lists(st.sampled_from(BREAKS), min_size=1, max_size=3))
    document = copy.deepcopy(document)
    items = document["items"]
    # Breaks that need the document's shape come before those that replace a part of it.
    for kind in sorted(kinds, key=BREAKS.index):
        if kind == "wrong_type":
            node, key = _spot(draw, document)
            node[key] = draw(JSON_VALUES)
        elif kind == "unknown_field":
            target = draw(st.sampled_from(["root", "item", "format", "verdict"]))
            node = {"root": document, "item": items[0], "format": document["response_format"],
                    "verdict": document.setdefault("verdict", {})}[target]
            node[draw(KEYS.filter(lambda k, taken=node: k not in taken))] = draw(JSON_VALUES)
        elif kind == "keyed":
            items[draw(st.integers(0, len(items) - 1))]["keyed"] = draw(
                st.sampled_from([0, 2, -2, "1", None, 1.5, True, [1]])
            )
        elif kind == "duplicate_id":
            items.append(dict(items[draw(st.integers(0, len(items) - 1))]))
        elif kind == "format":
            document["response_format"][draw(st.sampled_from(["points", "lowest", "labels"]))] = (
                draw(EDGE_NUMBERS | st.lists(st.text(max_size=4), max_size=12))
            )
        elif kind == "item_format":
            items[0]["response_format"] = draw(
                st.fixed_dictionaries({"points": EDGE_NUMBERS}, optional={"lowest": EDGE_NUMBERS})
                | JSON_VALUES
            )
        elif kind == "screening_number":
            name, key = draw(st.sampled_from(NUMBER_SETTINGS))
            document.setdefault("screening", {}).setdefault(name, {})[key] = draw(EDGE_NUMBERS)
        elif kind == "screening_value":
            name = draw(st.sampled_from(NAMES))
            key = draw(st.sampled_from(sorted(REGISTRY[name].defaults())))
            document.setdefault("screening", {}).setdefault(name, {})[key] = draw(
                EDGE_NUMBERS | JSON_VALUES
            )
        elif kind == "screening_setting":
            name = draw(st.sampled_from(NAMES))
            document.setdefault("screening", {}).setdefault(name, {})[draw(KEYS)] = 1
        elif kind == "screening_detector":
            document.setdefault("screening", {})[draw(KEYS.filter(lambda k: k not in REGISTRY))] = {}
        elif kind == "screening_shape":
            document["screening"] = draw(
                JSON_VALUES | st.dictionaries(st.sampled_from(NAMES), JSON_VALUES, max_size=2)
            )
        elif kind == "pairs":
            ids = [item["id"] for item in items if isinstance(item, dict)]
            document["opposite_pairs"] = draw(
                st.lists(st.lists(st.sampled_from([*ids, "nowhere"]), min_size=1, max_size=3),
                         max_size=3)
                | JSON_VALUES
            )
        else:
            document["verdict"] = draw(
                st.fixed_dictionaries({}, optional={
                    "review_from": EDGE_NUMBERS, "likely_careless_from": EDGE_NUMBERS,
                    "families": st.lists(st.sampled_from(["effort", "style", "whim"]), max_size=3),
                    "review_rate": EDGE_NUMBERS,
                })
                | JSON_VALUES
            )
    return document


def location_parts(location: str) -> list[str | int]:
    """'items[3].keyed' -> ['items', 3, 'keyed']."""
    parts: list[str | int] = []
    for name, index in re.findall(r"([^.\[\]]+)|\[(\d+)\]", location):
        parts.append(int(index) if index else name)
    return parts


def pointer_parts(pointer: str) -> list[str | int]:
    """'#/items/3/keyed' -> ['items', 3, 'keyed'] (RFC 6901 unescaping)."""
    assert pointer == "#" or pointer.startswith("#/"), pointer
    raw = pointer[2:].split("/") if pointer != "#" else []
    return [int(p) if p.isdigit() else p.replace("~1", "/").replace("~0", "~") for p in raw]


def names_a_place(document: Any, parts: list[str | int]) -> bool:
    """Whether the path leads to a value in the document, or to a field missing from an object
    that exists (a required field left out); an empty path is the whole document."""
    node = document
    for depth, part in enumerate(parts):
        last = depth == len(parts) - 1
        if isinstance(node, dict):
            key = str(part)
            if key not in node:
                return last
            node = node[key]
        elif isinstance(node, list) and isinstance(part, int):
            if part >= len(node):
                return last  # a member a pair lacks
            node = node[part]
        else:
            return False
    return True


@st.composite
def edge_setting_documents(draw: st.DrawFn) -> dict[str, Any]:
    """A valid document but for one number setting at or past the edge of what it takes."""
    document = draw(valid_documents())
    name, key = draw(st.sampled_from(NUMBER_SETTINGS))
    document.setdefault("screening", {}).setdefault(name, {})[key] = draw(EDGE_NUMBERS)
    return document
