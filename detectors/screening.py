"""Screen a response matrix with every registered detector, and tabulate the results."""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from ._base import DetectorResult, State
from ._registry import REGISTRY, get_detector
from .instrument import Instrument
from .responses import ResponseMatrix

__all__ = ["Screening", "screen", "build_detectors", "fit_references"]


def build_detectors(
    instrument: Instrument,
    overrides: Mapping[str, Mapping[str, Any]] | None = None,
    names: Iterable[str] | None = None,
) -> dict[str, Any]:
    """Detector objects with defaults < the instrument's settings < ``overrides``."""
    overrides = overrides or {}
    for name in overrides:
        get_detector(name)
    chosen = list(REGISTRY) if names is None else list(names)
    return {
        name: get_detector(name).from_settings(
            instrument.settings_for(name), overrides.get(name)
        )
        for name in chosen
    }


def fit_references(
    instrument: Instrument,
    matrix: ResponseMatrix,
    overrides: Mapping[str, Mapping[str, Any]] | None = None,
) -> dict[str, dict[str, Any]]:
    """The reference of every detector that needs a sample, estimated from ``matrix``."""
    out = {}
    for name, detector in build_detectors(instrument, overrides).items():
        if detector.needs_sample:
            out[name] = detector.fit(instrument, matrix)
    return out


@dataclass(frozen=True, eq=False)
class Screening:
    """Every detector's result for one matrix."""

    instrument: Instrument
    respondent_ids: np.ndarray
    results: dict[str, DetectorResult]

    @property
    def n_respondents(self) -> int:
        return len(self.respondent_ids)

    @property
    def flag_count(self) -> np.ndarray:
        if not self.results:
            return np.zeros(self.n_respondents, dtype=np.int64)
        return np.sum([r.flags for r in self.results.values()], axis=0, dtype=np.int64)

    def flagged_sentences(self, i: int) -> list[str]:
        """The readable evidence of every flag raised for respondent ``i``."""
        return [r.sentence_for(i) for r in self.results.values() if r.flags[i]]

    def to_frame(self) -> pd.DataFrame:
        """One row per respondent: id, ``<name>_score`` and ``<name>_flag`` per detector,
        ``flag_count`` and ``evidence`` (sentences of the flags raised, joined by " | ").

        A flag is 1 or 0 where the respondent was assessed and empty (<NA>) otherwise.
        """
        columns: dict[str, Any] = {"respondent_id": self.respondent_ids}
        for name, result in self.results.items():
            columns[f"{name}_score"] = result.scores
            flag = pd.array(result.flags.astype(np.int8), dtype="Int8")
            flag[result.states != State.ASSESSED] = pd.NA
            columns[f"{name}_flag"] = flag
        count = self.flag_count
        columns["flag_count"] = count
        evidence = np.full(self.n_respondents, "", dtype=object)
        for i in np.flatnonzero(count).tolist():
            evidence[i] = " | ".join(self.flagged_sentences(i))
        columns["evidence"] = evidence
        return pd.DataFrame(columns)

    def summary(self) -> dict[str, Any]:
        """Counts per detector: flagged, assessed, not assessed and not applicable with reasons."""
        detectors = {}
        for name, result in self.results.items():
            reasons = pd.Series(result.reasons[result.states != State.ASSESSED])
            detectors[name] = {
                "flagged": int(result.flags.sum()),
                "assessed": int((result.states == State.ASSESSED).sum()),
                "not_assessed": int((result.states == State.NOT_ASSESSED).sum()),
                "not_applicable": int((result.states == State.NOT_APPLICABLE).sum()),
                "reasons": {str(k): int(v) for k, v in reasons.value_counts().items()},
            }
        count = self.flag_count
        return {
            "respondents": self.n_respondents,
            "flagged_any": int((count > 0).sum()),
            "detectors": detectors,
        }


def screen(
    instrument: Instrument,
    matrix: ResponseMatrix,
    overrides: Mapping[str, Mapping[str, Any]] | None = None,
    references: Mapping[str, Mapping[str, Any]] | None = None,
    names: Iterable[str] | None = None,
    progress: Callable[[str, int, int], None] | None = None,
) -> Screening:
    """Run the detectors (all registered ones by default) over ``matrix``.

    Parameters
    ----------
    instrument : Instrument
    matrix : ResponseMatrix
    overrides : mapping, optional
        Per-detector settings that take precedence over the instrument's ``screening`` section.
    references : mapping, optional
        Per-detector references from :func:`fit_references`; a sample-based detector without one
        estimates it from ``matrix``.
    names : iterable of str, optional
        Only these detectors, in this order.
    progress : callable, optional
        Called as ``progress(name, index, total)`` before each detector runs.
    """
    references = references or {}
    detectors = build_detectors(instrument, overrides, names)
    results = {}
    for index, (name, detector) in enumerate(detectors.items()):
        if progress is not None:
            progress(name, index, len(detectors))
        results[name] = detector.screen(instrument, matrix, references.get(name))
    return Screening(instrument=instrument, respondent_ids=matrix.respondent_ids, results=results)
