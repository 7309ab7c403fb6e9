"""A survey version's screener (parsed instrument, detector objects, fingerprint) and its
reference samples, built once and cached by the :class:`~service.database.Database` they
belong to.

Versions and reference samples never change once written, so a cache needs no
invalidation; it is held by the database handle (its ``memo``, which ``Database.read()`` and
``Database.write()`` give every session as ``session.info["memo"]``), so two databases in one
process never share entries keyed by the same ids. A session opened elsewhere gets a cache of
its own for its lifetime.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
from sqlalchemy.orm import Session

from detectors import Instrument, build_detectors, parse_instrument
from detectors.screening import calibration_kinds

from . import store
from .models import ReferenceSample, SurveyVersion

__all__ = [
    "Screener",
    "ScreenerCache",
    "screener_for",
    "reference_data",
    "screener_fingerprint",
    "answers_fit",
    "uses_reference",
]

#: Screeners and reference samples kept per database.
CACHE_SIZE = 128


@dataclass(frozen=True, eq=False)
class Screener:
    """A survey version's parsed instrument and detector objects."""

    version_id: int
    number: int
    instrument: Instrument
    detectors: dict[str, Any]
    item_index: dict[str, int]
    #: See :func:`screener_fingerprint`; stored with every result as ``screened_with``.
    fingerprint: str = ""

    @property
    def sample_detectors(self) -> list[str]:
        """Detectors whose result depends on the reference sample: those that need one, and
        those whose cut-off is calibrated from it."""
        calibrated = calibration_kinds(self.instrument, self.detectors)
        return [
            name for name, d in self.detectors.items() if d.needs_sample or name in calibrated
        ]


class _LRU:
    def __init__(self, size: int):
        self.size = size
        self.items: OrderedDict[int, Any] = OrderedDict()
        self.lock = threading.Lock()

    def get(self, key: int) -> Any:
        with self.lock:
            value = self.items.get(key)
            if value is not None:
                self.items.move_to_end(key)
            return value

    def put(self, key: int, value: Any) -> None:
        with self.lock:
            self.items[key] = value
            self.items.move_to_end(key)
            while len(self.items) > self.size:
                self.items.popitem(last=False)


class ScreenerCache:
    """One database's screeners (by survey version id) and reference data (by sample id)."""

    def __init__(self, size: int = CACHE_SIZE):
        self.screeners = _LRU(size)
        self.references = _LRU(size)


def _cache(session: Session) -> ScreenerCache:
    memo = session.info.setdefault("memo", {})
    cache = memo.get("screeners")
    if cache is None:
        cache = memo.setdefault("screeners", ScreenerCache())
    return cache


def screener_for(session: Session, version_id: int) -> Screener:
    """The screener of a stored survey version (``LookupError`` when there is none)."""
    cache = _cache(session).screeners
    cached = cache.get(version_id)
    if cached is not None:
        return cached
    version = session.get(SurveyVersion, version_id)
    if version is None:
        raise LookupError(f"survey version {version_id} does not exist")
    instrument = parse_instrument(version.document)
    detectors = build_detectors(instrument)
    screener = Screener(
        version_id=version.id,
        number=version.number,
        instrument=instrument,
        detectors=detectors,
        item_index=dict(instrument.item_index),
        fingerprint=screener_fingerprint(version.digest, detectors),
    )
    cache.put(version_id, screener)
    return screener


def screener_fingerprint(document_digest: str, detectors: Mapping[str, Any]) -> str:
    """A digest of what a result depends on besides the answers and the reference sample: the
    version's instrument document (its digest) and the name and version of every detector.

    A stored result whose fingerprint differs from its screener's current one was produced by
    other code or settings (a detector added, removed or changed its version) and is stale.
    The first 64 bits (16 hex digits) are kept with every respondent.
    """
    return store.canonical_digest(
        {
            "instrument": document_digest,
            "detectors": {name: type(d).version for name, d in detectors.items()},
        }
    )[:16]


def reference_data(session: Session, reference_id: int | None) -> Mapping[str, Any] | None:
    """A stored reference sample's data (None for no id or a sample that is gone)."""
    if reference_id is None:
        return None
    cache = _cache(session).references
    cached = cache.get(reference_id)
    if cached is not None:
        return cached
    reference = session.get(ReferenceSample, reference_id)
    if reference is None:
        return None
    cache.put(reference_id, reference.data)
    return reference.data


def answers_fit(older: Instrument, newer: Instrument) -> bool:
    """True when answers stored under ``older`` mean the same under ``newer``: the same items in
    the same presentation order, each with the same answer range. Only then may a respondent of
    the older version be re-screened with the newer one."""
    return (
        older.item_ids == newer.item_ids
        and np.array_equal(older.lowest, newer.lowest)
        and np.array_equal(older.highest, newer.highest)
    )


def uses_reference(screener: Screener) -> bool:
    """Whether the screener's results depend on a reference sample."""
    return bool(screener.sample_detectors)
