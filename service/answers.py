"""Stored answers: one byte per item of the respondent's survey version, in the version's item
order (``Respondent.answer_codes``).

A byte is the answer itself (answers are whole numbers within the item's range), ``ABSENT``
for an item the post left out and ``NULL`` for one it sent as null, so the answers read back
exactly as they were received. 50 items take 50 bytes.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
from sqlalchemy.orm import Session

from detectors import MISSING

from .screeners import screener_for

__all__ = [
    "ABSENT", "NULL", "encode", "matrix", "as_received", "answers_of",
]

ABSENT = int(MISSING)  # -128
NULL = ABSENT + 1  # -127


def encode(answers: Mapping[str, int | None], items: Sequence[str]) -> bytes:
    """A respondent's answers (every key an item of ``items``) as stored."""
    codes = np.full(len(items), ABSENT, dtype=np.int8)
    for j, item in enumerate(items):
        if item in answers:
            value = answers[item]
            codes[j] = NULL if value is None else value
    return codes.tobytes()


def matrix(blobs: Sequence[bytes], n_items: int) -> np.ndarray:
    """int8 answer codes (respondents x items) of stored answers of one item order; absent
    and null answers become ``MISSING``."""
    if not blobs:
        return np.full((0, n_items), MISSING, dtype=np.int8)
    joined = b"".join(blobs)
    if len(joined) != len(blobs) * n_items:
        raise ValueError(f"{len(blobs)} stored answer records do not hold {n_items} items each")
    codes = np.frombuffer(joined, dtype=np.int8).reshape(len(blobs), n_items).copy()
    codes[codes == NULL] = MISSING
    return codes


def as_received(blob: bytes, items: Sequence[str]) -> dict[str, int | None]:
    """Stored answers back as the posted object (left-out items absent, nulls as None)."""
    codes = np.frombuffer(blob, dtype=np.int8).tolist()
    return {
        item: (None if code == NULL else code)
        for item, code in zip(items, codes, strict=True)
        if code != ABSENT
    }


def answers_of(session: Session, version_id: int, blob: bytes) -> dict[str, int | None]:
    """A stored respondent's answers as received, read with its survey version's items."""
    return as_received(blob, screener_for(session, version_id).instrument.item_ids)
