"""Screen a response matrix with every registered detector, and tabulate the results."""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from functools import cached_property
from typing import TYPE_CHECKING, Any

import numpy as np

from ._base import DetectorResult, State
from ._registry import REGISTRY, get_detector
from ._text import choose, concat, strings, to_objects
from .calibration import CALIBRATION_KEY, Calibration, apply, calibrate
from .instrument import Instrument
from .responses import ResponseMatrix
from .scales import scale_scores
from .verdict import RANKS_KEY, VERDICTS, Verdicts, assess, rank_tables

if TYPE_CHECKING:
    import pandas as pd

__all__ = [
    "Screening",
    "build_detectors",
    "calibration_kinds",
    "fit_references",
    "reference_calibration",
    "reference_detectors",
    "screen",
]


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


def reference_detectors(reference: Mapping[str, Any]) -> list[str]:
    """Names of the detectors with an entry in a stored reference (not its tables)."""
    return sorted(key for key in reference if key in REGISTRY)


def calibration_kinds(
    instrument: Instrument,
    detectors: Mapping[str, Any],
    overrides: Mapping[str, Mapping[str, Any]] | None = None,
) -> dict[str, str]:
    """Detectors whose cut-off is calibrated from the reference, with their kind: those that
    declare it, in a counted family, whose own cut-off the instrument or the caller did not
    set explicitly (an explicit cut-off is the analyst's decision and is kept)."""
    overrides = overrides or {}
    kinds = {}
    for name, detector in detectors.items():
        if detector.calibration == "fixed" or detector.family not in instrument.verdict.families:
            continue
        setting = detector.cutoff_setting
        if setting is not None and (
            setting in instrument.settings_for(name) or setting in overrides.get(name, {})
        ):
            continue
        kinds[name] = detector.calibration
    return kinds


def reference_calibration(
    instrument: Instrument,
    detectors: Mapping[str, Any],
    reference: Mapping[str, Any] | None,
    overrides: Mapping[str, Mapping[str, Any]] | None = None,
) -> Calibration | None:
    """The calibrated cut-offs stored in a reference, for the detectors that use them now
    (None for a reference from before calibration, or no reference)."""
    stored = reference.get(CALIBRATION_KEY) if reference else None
    if stored is None:
        return None
    kinds = calibration_kinds(instrument, detectors, overrides)
    return Calibration.from_json(stored).only(kinds)


def _calibrated(
    instrument: Instrument,
    detectors: Mapping[str, Any],
    results: dict[str, DetectorResult],
    overrides: Mapping[str, Mapping[str, Any]] | None,
) -> tuple[dict[str, DetectorResult], Calibration]:
    """Calibrate on ``results`` themselves (they are the reference sample's) and apply."""
    calibration = calibrate(
        instrument.verdict, results, calibration_kinds(instrument, detectors, overrides),
        {name: type(detector) for name, detector in detectors.items()},
    )
    return apply(results, calibration, detectors), calibration


def fit_references(
    instrument: Instrument,
    matrix: ResponseMatrix,
    overrides: Mapping[str, Mapping[str, Any]] | None = None,
) -> dict[str, dict[str, Any]]:
    """The reference estimated from a sample ``matrix``: the entry of every detector that needs
    a sample, under ``CALIBRATION_KEY`` the calibrated cut-offs and under ``RANKS_KEY`` the
    percentile tables of the careless score (from screening the sample itself against those
    entries)."""
    out: dict[str, Any] = {}
    detectors = build_detectors(instrument, overrides)
    for name, detector in detectors.items():
        if detector.needs_sample:
            out[name] = detector.fit(instrument, matrix)
    results = {
        name: detector.screen(instrument, matrix, out.get(name))
        for name, detector in detectors.items()
    }
    results, calibration = _calibrated(instrument, detectors, results, overrides)
    out[CALIBRATION_KEY] = calibration.to_json()
    out[RANKS_KEY] = rank_tables(instrument.verdict, results, calibration.unflagged)
    return out


@dataclass(frozen=True, eq=False)
class Screening:
    """Every detector's result for one matrix."""

    instrument: Instrument
    respondent_ids: np.ndarray
    results: dict[str, DetectorResult]
    #: Percentile tables of the careless score (from the reference, or this matrix's own).
    ranks: Mapping[str, list[float]] | None = None
    #: Scale scores, plain and acquiescence-adjusted (``detectors.scales.scale_scores``).
    scales: pd.DataFrame | None = None
    #: The calibrated cut-offs applied (None when every detector kept its own).
    calibration: Calibration | None = None

    @property
    def n_respondents(self) -> int:
        return len(self.respondent_ids)

    @property
    def flag_count(self) -> np.ndarray:
        if not self.results:
            return np.zeros(self.n_respondents, dtype=np.int64)
        return np.stack([r.flags for r in self.results.values()]).sum(axis=0, dtype=np.int64)

    @cached_property
    def verdicts(self) -> Verdicts:
        """Verdict and careless score of every respondent under the instrument's policy."""
        return assess(self.instrument.verdict, self.results, self.ranks, self.n_respondents)

    def flagged_sentences(self, i: int) -> list[str]:
        """The readable evidence of every flag raised for respondent ``i``."""
        return [r.sentence_for(i) for r in self.results.values() if r.flags[i]]

    def evidence_column(self) -> np.ndarray:
        """Per respondent, the sentences of every flag raised joined by " | " (detector order;
        empty without a flag), each detector's sentences built for all its flagged at once."""
        import pyarrow as pa

        out = np.full(self.n_respondents, "", dtype=object)
        flagged = np.flatnonzero(self.flag_count)  # only these get a sentence
        m = len(flagged)
        evidence = strings("", m)
        started = np.zeros(m, dtype=bool)
        for result in self.results.values():
            here = result.flags[flagged]
            if here.any():
                # this detector's sentences in place, empty for the respondents it did not flag
                where = np.full(m, here.sum(), dtype=np.int64)
                where[here] = np.arange(here.sum())
                text = pa.concat_arrays([result.sentence_column(flagged[here]), strings("", 1)])
                evidence = concat(evidence, choose(started & here, " | ", ""), text.take(where))
                started |= here
        out[flagged] = to_objects(evidence)
        return out

    def to_frame(self) -> pd.DataFrame:
        """One row per respondent: id, ``<name>_score`` and ``<name>_flag`` per detector,
        ``flag_count``, ``verdict``, ``careless_score``, the scale scores (``scale_<name>`` and
        ``scale_<name>_adjusted``) and ``evidence`` (sentences of the flags raised, joined by
        " | ", and a note where the careless score alone sent the respondent to review).

        A flag is 1 or 0 where the respondent was assessed and empty (<NA>) otherwise.
        """
        import pandas as pd

        columns: dict[str, Any] = {"respondent_id": self.respondent_ids}
        for name, result in self.results.items():
            columns[f"{name}_score"] = result.scores
            flag = pd.array(result.flags.astype(np.int8), dtype="Int8")
            flag[result.states != State.ASSESSED] = pd.NA
            columns[f"{name}_flag"] = flag
        count = self.flag_count
        columns["flag_count"] = count
        verdicts = self.verdicts
        columns["verdict"] = verdicts.verdict
        columns["careless_score"] = verdicts.careless_score
        if self.scales is not None:
            for name in self.scales.columns:
                columns[name] = self.scales[name].to_numpy()
        evidence = self.evidence_column()
        if verdicts.by_score is not None:
            # sent to review by the careless score alone: say so where no family's flag does
            alone = np.flatnonzero(verdicts.by_score & ~verdicts.family_flags.any(axis=1))
            if len(alone):
                note = (
                    f"careless score in the upper {verdicts.score_share:.1%} of the reference's "
                    "unflagged respondents (its own review hurdle)"
                )
                lead = np.where(count[alone] > 0, " | ", "")
                evidence[alone] = np.char.add(
                    np.char.add(evidence[alone].astype(str), lead), note
                ).astype(object)
        columns["evidence"] = evidence
        return pd.DataFrame(columns)

    def summary(self) -> dict[str, Any]:
        """Counts per detector: flagged, assessed, not assessed and not applicable with reasons."""
        import pandas as pd

        detectors = {}
        for name, result in self.results.items():
            # object dtype: counting needs no conversion to a string column first
            reasons = pd.Series(result.reasons[result.states != State.ASSESSED], dtype=object)
            detectors[name] = {
                "flagged": int(result.flags.sum()),
                "assessed": int((result.states == State.ASSESSED).sum()),
                "not_assessed": int((result.states == State.NOT_ASSESSED).sum()),
                "not_applicable": int((result.states == State.NOT_APPLICABLE).sum()),
                "reasons": {str(k): int(v) for k, v in reasons.value_counts().items()},
            }
        count = self.flag_count
        verdicts = pd.Series(self.verdicts.verdict).value_counts()
        return {
            "respondents": self.n_respondents,
            "flagged_any": int((count > 0).sum()),
            "verdicts": {v: int(verdicts.get(v, 0)) for v in VERDICTS},
            "detectors": detectors,
        }


def screen(
    instrument: Instrument,
    matrix: ResponseMatrix,
    overrides: Mapping[str, Mapping[str, Any]] | None = None,
    references: Mapping[str, Mapping[str, Any]] | None = None,
    names: Iterable[str] | None = None,
    progress: Callable[[str, int, int], None] | None = None,
    calibrate: bool = True,
) -> Screening:
    """Run the detectors (all registered ones by default) over ``matrix``.

    Parameters
    ----------
    instrument : Instrument
    matrix : ResponseMatrix
    overrides : mapping, optional
        Per-detector settings that take precedence over the instrument's ``screening`` section.
    references : mapping, optional
        The reference from :func:`fit_references`; a sample-based detector without an entry
        estimates it from ``matrix``, and without percentile tables the careless score ranks
        respondents within ``matrix`` itself.
    names : iterable of str, optional
        Only these detectors, in this order.
    progress : callable, optional
        Called as ``progress(name, index, total)`` before each detector runs.
    calibrate : bool, default True
        Without ``references``, calibrate cut-offs on ``matrix`` itself (it is its own
        reference sample). False keeps every detector's own cut-off, as the service does for
        respondents screened before a survey has a reference sample.
    """
    references = references or {}
    detectors = build_detectors(instrument, overrides, names)
    results = {}
    for index, (name, detector) in enumerate(detectors.items()):
        if progress is not None:
            progress(name, index, len(detectors))
        results[name] = detector.screen(instrument, matrix, references.get(name))
    ranks = references.get(RANKS_KEY)
    calibration = reference_calibration(instrument, detectors, references, overrides)
    if calibration is not None:
        results = apply(results, calibration, detectors)
    elif ranks is None and calibrate:
        # no reference: the matrix is its own reference sample
        results, calibration = _calibrated(instrument, detectors, results, overrides)
        ranks = rank_tables(instrument.verdict, results, calibration.unflagged)
    else:
        calibration = None  # a reference from before calibration: the detectors' own cut-offs
    if ranks is None:
        ranks = rank_tables(instrument.verdict, results)
    return Screening(
        instrument=instrument,
        respondent_ids=matrix.respondent_ids,
        results=results,
        ranks=ranks,
        scales=scale_scores(instrument, matrix),
        calibration=calibration,
    )
