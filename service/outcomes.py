"""The one code that turns a screening into stored results and stored results back.

A respondent's row holds its whole screening (see ``models.Respondent``):

- ``flag_count``, ``verdict``, ``careless_score``, and ``flag_bits``, the flag set as a bitmask
  of stable detector codes (``detector_codes``: a detector's code is given on first sight and
  never changes), so a listing filters on a detector with one bit test;
- ``results``: every detector's result packed as :data:`PACKED` records (code, state and flag
  in one byte, score as float64), in the screener's order;
- ``kept_evidence``: the evidence of detectors that compare respondents with each other
  (``compares_respondents``), whose evidence the respondent screened alone would not give
  back; None when there is none.

Everything else a reader sees (each detector's evidence, readable sentence, exact cut-off and
reason) is derived on read by screening the respondent again: the screening is deterministic
given the answers, the survey version, the reference sample and the screener
(:func:`results_of`). The rest of the service gets typed objects: :class:`Summary` (the flag
set as a tuple of names, the verdict as ``Verdict``), :class:`StoredResult` (the state as the
library's :class:`~detectors.State`), :class:`ResultColumns`; nothing else knows the layout.
"""

from __future__ import annotations

import datetime as dt
from collections import Counter
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import orjson
from sqlalchemy.orm import Session

from detectors import REGISTRY, DetectorResult, ResponseMatrix, State
from detectors.calibration import apply as apply_calibration
from detectors.screening import reference_calibration
from detectors.verdict import Verdicts, assess, reference_ranks

from . import store
from .answers import matrix as stored_matrix
from .models import Respondent, Verdict
from .screeners import Screener, reference_data, screener_for

__all__ = [
    "NO_REFERENCE",
    "PACKED",
    "DetectorCodes",
    "detector_codes",
    "Screened",
    "screen_matrix",
    "seconds_taken",
    "Summary",
    "Written",
    "written",
    "Rewritten",
    "rewritten",
    "flag_bits_of",
    "ResultColumns",
    "result_columns",
    "join_columns",
    "registry_sorted",
    "StoredResult",
    "results_of",
    "not_assessed_of",
    "flag_set",
    "flags_column",
    "evidence_columns",
    "detector_tallies",
    "cutoffs_now",
    "flagged_by_day",
    "earlier_records",
    "COMPACT",
    "StoredScreenings",
    "earlier_results",
    "survey_counts",
]

#: Reason stored for a sample-dependent detector before the survey has a reference sample.
NO_REFERENCE = "no reference sample yet"
#: One detector's stored result: its code, ``state | 4 * flagged`` and score.
PACKED = np.dtype([("code", "u1"), ("mark", "u1"), ("score", "<f8")])
#: One detector's earlier result in the screening history as kept before the compact layout
#: (``earlier_records``); such rows are still read.
EARLIER = PACKED
_FLAGGED = 4
#: Flag bits available in a signed 64-bit column.
MAX_CODES = 63


# The flag set in a column of the history tables --------------------------------------------------


def flags_column(names: Sequence[str]) -> str:
    """A flag set as kept in the history tables: detector names, comma-separated."""
    return ",".join(names)


def flag_set(stored: str | None) -> tuple[str, ...]:
    """A history table's flag set back as detector names ("" and None are no flags)."""
    return tuple(stored.split(",")) if stored else ()


# Detector codes ----------------------------------------------------------------------------------


def _registry_order(name: str) -> tuple[int, str]:
    order = list(REGISTRY)
    return (order.index(name), "") if name in REGISTRY else (len(order), name)


@dataclass(frozen=True)
class DetectorCodes:
    """Detector name to its stable code (and back)."""

    by_name: dict[str, int]

    def name(self, code: int) -> str | None:
        return self._names.get(code)

    @property
    def _names(self) -> dict[int, str]:
        return {code: name for name, code in self.by_name.items()}

    def bits(self, names: Iterable[str]) -> int:
        out = 0
        for name in names:
            out |= 1 << self.by_name[name]
        return out

    def names(self, bits: int) -> tuple[str, ...]:
        """The detectors of a bitmask, in registry order."""
        if not bits:
            return ()
        found = [name for name, code in self.by_name.items() if bits >> code & 1]
        return tuple(sorted(found, key=_registry_order))


def detector_codes(session: Session, names: Iterable[str] = ()) -> DetectorCodes:
    """The stored detector codes, giving the next free codes to any of ``names`` without one
    (in the caller's transaction). Codes read back unchanged are kept by the database handle."""
    memo = session.info.setdefault("memo", {})
    known: DetectorCodes | None = memo.get("detector_codes")
    wanted = list(dict.fromkeys(names))
    if known is not None and all(name in known.by_name for name in wanted):
        return known
    by_name = store.detector_code_map(session)
    missing = [name for name in wanted if name not in by_name]
    if missing:
        first = max(by_name.values(), default=-1) + 1
        if first + len(missing) > MAX_CODES:
            raise RuntimeError(
                f"{first + len(missing)} detectors named; flag bits hold at most {MAX_CODES}"
            )
        added = {name: first + i for i, name in enumerate(missing)}
        store.add_detector_codes(session, added)
        return DetectorCodes({**by_name, **added})  # not kept until committed
    codes = DetectorCodes(by_name)
    memo["detector_codes"] = codes
    return codes


# A respondent's summary --------------------------------------------------------------------------


@dataclass(frozen=True)
class Summary:
    """A respondent's screening summary: the flags raised, the verdict, the careless score."""

    flags: tuple[str, ...]
    verdict: Verdict
    careless_score: float | None

    @property
    def flag_count(self) -> int:
        return len(self.flags)

    def columns(self, codes: DetectorCodes) -> dict[str, Any]:
        """The respondent row's summary columns."""
        return {
            "flag_count": self.flag_count,
            "flag_bits": codes.bits(self.flags),
            "verdict": self.verdict,
            "careless_score": self.careless_score,
        }

    def history_columns(self) -> dict[str, Any]:
        """The summary columns of a screening history row."""
        return {
            "flag_count": self.flag_count,
            "flags": flags_column(self.flags),
            "verdict": self.verdict,
            "careless_score": self.careless_score,
        }

    @classmethod
    def stored(
        cls, codes: DetectorCodes, flag_bits: int, verdict: Any, careless_score: float | None
    ) -> Summary:
        """A summary from a respondent row's columns."""
        return cls(codes.names(int(flag_bits or 0)), Verdict(verdict), careless_score)


# Screening ---------------------------------------------------------------------------------------


@dataclass
class Screened:
    """Every detector's outcome for a matrix, ready to store."""

    names: list[str]
    versions: list[str]
    results: dict[str, DetectorResult | None]  # None: sample detector without a reference
    flags: np.ndarray  # bool (detectors, respondents)
    states: np.ndarray  # int8 (detectors, respondents)
    sample_names: set[str]  # detectors whose result depends on the reference sample
    verdicts: Verdicts  # verdict and careless score under the instrument's policy

    def flag_names(self, i: int) -> list[str]:
        return [self.names[d] for d in np.flatnonzero(self.flags[:, i])]

    def not_assessed(self, i: int) -> list[str]:
        return [self.names[d] for d in np.flatnonzero(self.states[:, i] != State.ASSESSED)]

    def summary(self, i: int) -> Summary:
        careless = float(self.verdicts.careless_score[i])
        return Summary(
            flags=tuple(self.flag_names(i)),
            verdict=Verdict(self.verdicts.verdict[i]),
            careless_score=None if careless != careless else careless,
        )


def screen_matrix(
    screener: Screener, matrix: ResponseMatrix, reference: Mapping[str, Any] | None
) -> Screened:
    """Run every registered detector; a sample-dependent one only with a stored reference."""
    n = matrix.n_respondents
    names = list(screener.detectors)
    results: dict[str, DetectorResult | None] = {}
    flags = np.zeros((len(names), n), dtype=bool)
    states = np.full((len(names), n), State.NOT_ASSESSED, dtype=np.int8)
    for d, (name, detector) in enumerate(screener.detectors.items()):
        if detector.needs_sample and (reference is None or name not in reference):
            results[name] = None
            continue
        given = reference[name] if detector.needs_sample and reference is not None else None
        result = detector.screen(screener.instrument, matrix, given)
        results[name] = result
        flags[d] = result.flags
        states[d] = result.states
    calibration = reference_calibration(screener.instrument, screener.detectors, reference)
    if calibration is not None:
        results = apply_calibration(results, calibration, screener.detectors)
        for d, name in enumerate(names):
            if (calibrated := results[name]) is not None:
                flags[d] = calibrated.flags
    versions = [type(d).version for d in screener.detectors.values()]
    verdicts = assess(screener.instrument.verdict, results, reference_ranks(reference), n)
    return Screened(
        names, versions, results, flags, states, set(screener.sample_detectors), verdicts
    )



# Detector results ------------------------------------------------------------------------------


def _finite(values: np.ndarray) -> list[float | None]:
    return [None if v != v or v in (np.inf, -np.inf) else v for v in values.tolist()]


def _plain(value: Any) -> Any:
    """One evidence value as a plain Python value (as ``DetectorResult.evidence_for`` does)."""
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and value != value:
        return None
    return value


def _plain_column(values: Any) -> list[Any]:
    """An evidence column as plain values (NaN as None)."""
    array = np.asarray(values)
    if array.dtype == object:
        return [_plain(value) for value in values]
    listed = array.tolist()
    if array.dtype.kind == "f" and array.ndim == 1 and np.isnan(array).any():
        listed = [None if v != v else v for v in listed]
    return listed


def evidence_columns(result: DetectorResult) -> list[dict[str, Any]]:
    """Every respondent's evidence as plain values, converted column by column (the same values
    as ``result.evidence_for(i)``, without a per-respondent pass over numpy scalars)."""
    n = len(result)
    columns = {key: _plain_column(values) for key, values in result.evidence.items()}
    keys = list(columns)
    return [dict(zip(keys, row, strict=True)) for row in zip(*columns.values(), strict=True)] if (
        keys
    ) else [{} for _ in range(n)]


def seconds_taken(row: Any) -> float:
    """The response's duration: ``duration_seconds`` when given, else ``submitted_at -
    started_at`` when both are known (NaN when neither, or when the difference is negative)."""
    if row.duration_seconds is not None:
        return row.duration_seconds
    if row.started_at is None or row.submitted_at is None:
        return np.nan
    seconds = (row.submitted_at - row.started_at).total_seconds()
    return seconds if seconds >= 0 else np.nan


# Writing -----------------------------------------------------------------------------------------


def _packed(screened: Screened, codes: DetectorCodes) -> np.ndarray:
    """(respondents, detectors) PACKED records of a screening."""
    n, d = screened.flags.shape[1], len(screened.names)
    packed = np.zeros((n, d), dtype=PACKED)
    packed["code"] = np.array([codes.by_name[name] for name in screened.names], dtype=np.uint8)
    packed["mark"] = (screened.states.T.astype(np.uint8) & 3) | (
        screened.flags.T.astype(np.uint8) * _FLAGGED
    )
    packed["score"] = np.nan
    for j, name in enumerate(screened.names):
        result = screened.results[name]
        if result is not None:
            scores = np.asarray(result.scores, dtype=np.float64)
            packed["score"][:, j] = np.where(np.isfinite(scores), scores, np.nan)
    return packed


def _kept(screened: Screened, codes: DetectorCodes) -> list[dict[str, Any] | None]:
    """Per respondent, the values of the evidence entries that depend on the other respondents
    (``compares_respondents``), by detector code, for the detectors that assessed it."""
    n = screened.flags.shape[1]
    kept: list[dict[str, Any] | None] = [None] * n
    for j, name in enumerate(screened.names):
        result = screened.results[name]
        keys = getattr(REGISTRY.get(name), "compares_respondents", ())
        if result is None or not keys:
            continue
        # No other respondent counted where every entry is empty: what screening alone gives
        # back, so nothing is kept there.
        counted = np.zeros(n, dtype=bool)
        for key in keys:
            counted |= ~_empty_cells(np.asarray(result.evidence[key]))
        rows = np.flatnonzero((screened.states[j] == State.ASSESSED) & counted)
        if not len(rows):
            continue
        values = [_plain_column(np.asarray(result.evidence[key])[rows]) for key in keys]
        code = str(codes.by_name[name])
        for k, i in enumerate(rows.tolist()):
            mine = kept[i]
            if mine is None:
                mine = kept[i] = {}
            mine[code] = [column[k] for column in values]
    return kept


def _empty_cells(values: np.ndarray) -> np.ndarray:
    """bool per respondent: whether an evidence column's value is empty (as ``_empty``)."""
    if values.dtype.kind in "biuf":
        cells = values == 0
        if values.dtype.kind == "f" and values.ndim == 1:  # NaN reads back as None
            cells |= np.isnan(values)
    else:
        cells = np.equal(values, np.array(None, dtype=object)).astype(bool)
        rest = ~cells  # only values that are not None need a closer look
        cells[rest] = [_empty(_plain(v)) for v in values[rest].tolist()]
    return cells.reshape(len(values), -1).all(axis=1)


def _empty(value: Any) -> bool:
    if isinstance(value, list | tuple):
        return all(_empty(v) for v in value)
    return value is None or value == 0


@dataclass(frozen=True, slots=True)
class Written:
    """What a respondent's row stores of its screening."""

    summary: Summary
    results: bytes
    kept_evidence: dict[str, Any] | None

    def columns(self, codes: DetectorCodes) -> dict[str, Any]:
        return {
            **self.summary.columns(codes),
            "results": self.results,
            "kept_evidence": self.kept_evidence,
        }


def written(screened: Screened, codes: DetectorCodes) -> list[Written]:
    """Each respondent's stored screening."""
    columns = rewritten(screened, codes)
    return [
        Written(screened.summary(i), columns.results(i), columns.kept_evidence[i])
        for i in range(len(columns))
    ]


@dataclass(frozen=True, eq=False)
class Rewritten:
    """What the respondent rows store of a screening, a column per field (for bulk writes)."""

    flag_counts: np.ndarray  # int64
    flag_bits: np.ndarray  # int64
    verdicts: list[str]  # the verdicts' stored values
    careless_scores: list[float | None]
    packed: np.ndarray  # (respondents, detectors) PACKED
    kept_evidence: list[dict[str, Any] | None]

    def __len__(self) -> int:
        return len(self.flag_counts)

    def results(self, i: int) -> bytes:
        return self.packed[i].tobytes()

    def update_rows(self, pks: np.ndarray) -> list[tuple[Any, ...]]:
        """(flag_count, flag_bits, verdict, careless_score, results, kept_evidence, pk) per
        respondent, as ``store.update_screenings`` takes them."""
        width = self.packed.shape[1] * PACKED.itemsize
        data = self.packed.tobytes()
        blobs = [data[start : start + width] for start in range(0, len(data), width)]
        return list(zip(
            self.flag_counts.tolist(), self.flag_bits.tolist(), self.verdicts,
            self.careless_scores, blobs, self.kept_evidence, pks.tolist(), strict=True,
        ))


def _verdict_values(verdicts: np.ndarray) -> list[str]:
    values: list[str] = verdicts.tolist()
    for value in set(values):
        Verdict(value)  # raises on a value that is not a verdict
    return values


def flag_bits_of(flags: np.ndarray, names: Sequence[str], codes: DetectorCodes) -> np.ndarray:
    """int64 per respondent: the flag set of bool (detectors, respondents) ``flags`` as stored."""
    bits = np.array([1 << codes.by_name[name] for name in names], dtype=np.int64)
    return (flags.T.astype(np.int64) * bits).sum(axis=1) if len(names) else np.zeros(
        flags.shape[1], dtype=np.int64
    )


def rewritten(
    screened: Screened,
    codes: DetectorCodes,
    keep: np.ndarray | None = None,
    before: Sequence[bytes | None] = (),
    before_kept: Sequence[dict[str, Any] | None] = (),
    rewrite: Sequence[str] = (),
) -> Rewritten:
    """The respondents' stored screening. Where ``keep`` (bool per respondent) is set, only
    the detectors named in ``rewrite`` take the new results; the others keep their stored
    ones (``before``: the stored results, ``before_kept``: the kept evidence)."""
    packed = _packed(screened, codes)
    kept = _kept(screened, codes)
    if keep is not None and keep.any():
        replaced = np.array([name in rewrite for name in screened.names], dtype=bool)
        kept_rows = np.flatnonzero(keep)
        blobs = [before[i] or b"" for i in kept_rows.tolist()]
        lengths = np.fromiter((len(b) // PACKED.itemsize for b in blobs), np.int64, len(blobs))
        entries = np.frombuffer(b"".join(blobs), dtype=PACKED)
        owner = np.repeat(kept_rows, lengths)
        column = np.full(256, -1, dtype=np.int64)
        for j in np.flatnonzero(~replaced).tolist():
            column[codes.by_name[screened.names[j]]] = j
        where = column[entries["code"]]
        mine = where >= 0
        packed[owner[mine], where[mine]] = entries[mine]
        rewritten_codes = {str(codes.by_name[name]) for name in rewrite}
        for i in kept_rows.tolist():
            evidence, new = before_kept[i], kept[i]
            if evidence is None and new is None:
                continue
            merged = {c: v for c, v in (evidence or {}).items() if c not in rewritten_codes}
            merged.update({c: v for c, v in (new or {}).items() if c in rewritten_codes})
            kept[i] = merged or None
    careless = screened.verdicts.careless_score
    return Rewritten(
        flag_counts=screened.flags.sum(axis=0).astype(np.int64),
        flag_bits=flag_bits_of(screened.flags, screened.names, codes),
        verdicts=_verdict_values(screened.verdicts.verdict),
        careless_scores=[None if c != c else c for c in np.asarray(careless, float).tolist()],
        packed=packed,
        kept_evidence=kept,
    )


# Reading -----------------------------------------------------------------------------------------


@dataclass
class ResultColumns:
    """Stored results of some respondents, a column per detector: (respondents, detectors)."""

    names: list[str]
    present: np.ndarray  # bool
    states: np.ndarray  # int8, -1 where absent
    flagged: np.ndarray  # bool
    scores: np.ndarray  # float64, NaN unless a score was stored
    #: Stored results of detectors outside ``names``.
    others: int = 0
    codes: DetectorCodes | None = None

    def take(self, rows: np.ndarray | slice) -> ResultColumns:
        """The respondents at ``rows`` (positions, a mask or a slice); ``others`` is kept as
        it was (results of detectors without a code are never written)."""
        return ResultColumns(
            names=self.names, present=self.present[rows], states=self.states[rows],
            flagged=self.flagged[rows], scores=self.scores[rows], others=self.others,
            codes=self.codes,
        )

    def flags_of(self, names: Sequence[str]) -> np.ndarray:
        """bool (respondents, len(names)): which of these detectors flagged each respondent."""
        at = {name: j for j, name in enumerate(self.names)}
        out = np.zeros((self.present.shape[0], len(names)), dtype=bool)
        for k, name in enumerate(names):
            if name in at:
                out[:, k] = self.flagged[:, at[name]]
        return out


def result_columns(
    blobs: Sequence[bytes | None], codes: DetectorCodes, names: Sequence[str] | None = None
) -> ResultColumns:
    """Unpack respondents' stored results into columns, for the detectors ``names`` (every
    detector found, in registry order, when None)."""
    n = len(blobs)
    lengths = np.fromiter((len(b or b"") // PACKED.itemsize for b in blobs), np.int64, n)
    entries = np.frombuffer(b"".join(b or b"" for b in blobs), dtype=PACKED)
    owner = np.repeat(np.arange(n), lengths)
    if names is None:
        found = {codes.name(int(c)) for c in np.unique(entries["code"]).tolist()}
        names = sorted((x for x in found if x is not None), key=_registry_order)
    names = list(names)
    column = np.full(256, -1, dtype=np.int64)
    for j, name in enumerate(names):
        if name in codes.by_name:
            column[codes.by_name[name]] = j
    where = column[entries["code"]]
    mine = where >= 0
    rows, cols, chosen = owner[mine], where[mine], entries[mine]
    out = ResultColumns(
        names=names,
        present=np.zeros((n, len(names)), dtype=bool),
        states=np.full((n, len(names)), -1, dtype=np.int8),
        flagged=np.zeros((n, len(names)), dtype=bool),
        scores=np.full((n, len(names)), np.nan),
        others=int((~mine).sum()),
        codes=codes,
    )
    out.present[rows, cols] = True
    out.states[rows, cols] = chosen["mark"] & 3
    out.flagged[rows, cols] = (chosen["mark"] & _FLAGGED) != 0
    out.scores[rows, cols] = chosen["score"]
    return out


def join_columns(parts: Sequence[ResultColumns]) -> ResultColumns:
    """Columns of the same detectors, read for one group of respondents after another."""
    first = parts[0]
    return ResultColumns(
        names=first.names,
        present=np.concatenate([p.present for p in parts]),
        states=np.concatenate([p.states for p in parts]),
        flagged=np.concatenate([p.flagged for p in parts]),
        scores=np.concatenate([p.scores for p in parts]),
        others=sum(p.others for p in parts),
        codes=first.codes,
    )


def registry_sorted(names: Iterable[str]) -> list[str]:
    """Detector names in registry order, then names no longer registered, alphabetically."""
    return sorted(names, key=_registry_order)


def not_assessed_of(session: Session, pks: Sequence[int]) -> dict[int, list[str]]:
    """Respondent pk -> the detectors that could not judge it."""
    blobs = store.packed_results_of(session, pks)
    order = list(blobs)
    columns = result_columns([blobs[pk] for pk in order], detector_codes(session))
    judged = columns.present & (columns.states != State.ASSESSED)
    return {
        pk: [columns.names[j] for j in np.flatnonzero(judged[i])]
        for i, pk in enumerate(order)
        if judged[i].any()
    }


@dataclass(frozen=True)
class StoredResult:
    """One detector's result for a respondent: state, flag and score as stored; evidence,
    sentence, reason and cut-off derived by screening the respondent again."""

    detector: str
    detector_version: str
    state: State
    score: float | None
    cutoff: float | None
    flagged: bool
    reason: str | None
    evidence: dict[str, Any]
    sentence: str
    reference_id: int | None


def _one_row(screener: Screener, respondent: Respondent) -> ResponseMatrix:
    return ResponseMatrix(
        respondent_ids=np.array([respondent.respondent_id], dtype=object),
        answers=stored_matrix([respondent.answer_codes], len(screener.instrument.item_ids)),
        durations=np.array([seconds_taken(respondent)], dtype=np.float64),
    )


def _finite_one(value: Any) -> float | None:
    value = float(value)
    return value if np.isfinite(value) else None


def results_of(session: Session, respondent: Respondent) -> list[StoredResult]:
    """A respondent's detector results, in registry order: what is stored, with the evidence
    derived by screening the respondent again with its version's screener and reference
    sample (the kept evidence of detectors that compare respondents)."""
    codes = detector_codes(session)
    stored = np.frombuffer(respondent.results or b"", dtype=PACKED)
    screener = screener_for(session, respondent.survey_version_id)
    reference = reference_data(session, respondent.reference_id)
    screened = screen_matrix(screener, _one_row(screener, respondent), reference)
    kept = respondent.kept_evidence or {}
    out = []
    for entry in stored:
        code = int(entry["code"])
        name = codes.name(code) or f"detector {code}"
        state = State(int(entry["mark"]) & 3)
        score = _finite_one(entry["score"])
        flagged = bool(int(entry["mark"]) & _FLAGGED)
        reference_id = respondent.reference_id if name in screened.sample_names else None
        if name not in screener.detectors:  # a detector no longer run
            out.append(StoredResult(
                name, "", state, score, None, flagged, None, {}, "",
                None,
            ))
            continue
        version = type(screener.detectors[name]).version
        result = screened.results[name]
        if result is None:
            out.append(StoredResult(
                name, version, state, score, None, flagged, NO_REFERENCE, {},
                f"{name}: not assessed ({NO_REFERENCE}).", None,
            ))
            continue
        evidence = result.evidence_for(0)
        keys = getattr(REGISTRY.get(name), "compares_respondents", ())
        if str(code) in kept and keys:
            evidence.update(zip(keys, kept[str(code)], strict=True))
        sentence = (
            result.describe(evidence, result.item_ids) if state == State.ASSESSED
            else result.sentence_for(0)
        )
        evidence = orjson.loads(store.json_text(evidence))  # as JSON gives it back
        out.append(StoredResult(
            name, version, state, score, _finite_one(result.cutoffs[0]), flagged,
            result.reasons[0], evidence, sentence, reference_id,
        ))
    return sorted(out, key=lambda r: _registry_order(r.detector))


#: Respondents whose results are read per query (bounds memory).
READ_RESPONDENTS = 50_000


def _ranges(pks: np.ndarray) -> Iterable[tuple[int, int, int]]:
    for start in range(0, len(pks), READ_RESPONDENTS):
        stop = min(start + READ_RESPONDENTS, len(pks))
        yield start, int(pks[start]), int(pks[stop - 1])


def _columns_along(
    session: Session, survey_id: int | None, pks: np.ndarray, names: Sequence[str] | None
) -> Iterable[tuple[np.ndarray, ResultColumns]]:
    """The stored results of the (ascending) ``pks``, read along the id range a part at a
    time: (positions in ``pks``, their columns)."""
    codes = detector_codes(session)
    for _, low, high in _ranges(pks):
        rows = store.packed_results_between(session, survey_id, low, high)
        if not rows:
            continue
        found = np.fromiter((row[0] for row in rows), np.int64, len(rows))
        at = np.minimum(np.searchsorted(pks, found), len(pks) - 1)
        mine = pks[at] == found  # the range may hold other surveys' respondents
        blobs = [row[1] for row, keep in zip(rows, mine.tolist(), strict=True) if keep]
        yield at[mine], result_columns(blobs, codes, names)


def detector_tallies(session: Session, survey_id: int, pks: np.ndarray) -> dict[str, Counter]:
    """Per detector, respondents by ``State`` and how many it flagged (key ``"flagged"``), for
    the survey's respondents ``pks`` (ascending), read a range of respondents at a time."""
    tallies: dict[str, Counter] = {}
    for _, columns in _columns_along(session, survey_id, pks, None):
        for j, name in enumerate(columns.names):
            tally = tallies.setdefault(name, Counter())
            present = columns.present[:, j]
            for state in State:
                tally[state] += int((present & (columns.states[:, j] == state)).sum())
            tally["flagged"] += int((present & columns.flagged[:, j]).sum())
    return tallies


def cutoffs_now(
    session: Session,
    names: Sequence[str],
    groups: Iterable[tuple[int, int | None, np.ndarray, ResponseMatrix]],
    n: int | None = None,
    reasons: dict[str, Counter[str]] | None = None,
) -> np.ndarray:
    """(respondents, detectors) cut-offs of respondents screened again with their versions'
    screeners and reference samples, a group of respondents at a time: each group is (survey
    version id, reference sample id, positions of its respondents, their matrix). NaN where a
    detector gives none. ``reasons``, when given, receives each detector's count of every
    reason it gave for not assessing a respondent (or finding it not applicable)."""
    groups = list(groups)
    if n is None:
        n = sum(len(positions) for _, _, positions, _ in groups)
    out = np.full((n, len(names)), np.nan)
    column = {name: j for j, name in enumerate(names)}
    for version_id, reference_id, rows, matrix in groups:
        screener = screener_for(session, version_id)
        screened = screen_matrix(screener, matrix, reference_data(session, reference_id))
        for name, result in screened.results.items():
            if result is not None and name in column:
                cutoffs = np.asarray(result.cutoffs, dtype=np.float64)
                out[rows, column[name]] = np.where(np.isfinite(cutoffs), cutoffs, np.nan)
                if reasons is not None:
                    judged = np.asarray(result.states) == State.ASSESSED
                    given, times = np.unique(
                        np.asarray(result.reasons, dtype=object)[~judged].astype(str),
                        return_counts=True,
                    )
                    reasons.setdefault(name, Counter()).update(
                        dict(zip(given.tolist(), times.tolist(), strict=True))
                    )
    return out


def flagged_by_day(session: Session, survey_id: int) -> dict[dt.date, dict[str, int]]:
    """Per day of arrival (UTC), respondents flagged by each detector."""
    codes = detector_codes(session)
    out: dict[dt.date, dict[str, int]] = {}
    for day, bits, n in store.flag_bits_by_day(session, survey_id):
        counts = out.setdefault(dt.date.fromisoformat(str(day)), {})
        for name in codes.names(int(bits)):
            counts[name] = counts.get(name, 0) + int(n)
    return out


@dataclass(frozen=True, eq=False)
class StoredScreenings:
    """The stored screenings of some respondents (in the order asked for), a column per
    field, as a re-screen reads them before replacing them. ``found`` is False for a
    respondent no longer stored."""

    pks: np.ndarray  # int64
    found: np.ndarray  # bool
    digests: np.ndarray  # object: answers_digest
    version_ids: np.ndarray  # int64
    reference_ids: list[int | None]
    screened_at: list[Any]  # as stored
    flag_bits: np.ndarray  # int64
    verdicts: np.ndarray  # object: the stored verdict values
    careless_scores: list[float | None]
    screened_with: np.ndarray  # object
    results: list[bytes | None]
    kept_evidence: list[dict[str, Any] | None]

    @classmethod
    def read(cls, session: Session, pks: np.ndarray) -> StoredScreenings:
        """The stored screenings of ``pks`` (ascending)."""
        rows = store.screening_rows(session, pks.tolist())
        n = len(pks)
        columns: list[Sequence[Any]] = list(zip(*rows, strict=True)) if rows else [()] * 12
        (ids, digests, versions, references, screened_at, _, bits, verdicts, careless,
         screened_with, results, kept) = columns
        at = np.searchsorted(pks, np.fromiter(ids, np.int64, len(rows)))
        found = np.zeros(n, dtype=bool)
        found[at] = True

        def spread(values: Sequence[Any], fill: Any = None, dtype: Any = object) -> np.ndarray:
            out = np.full(n, fill, dtype=dtype)
            out[at] = np.array(values, dtype=dtype) if len(values) else out[at]
            return out

        kept_values = [
            orjson.loads(value) if isinstance(value, str) else value for value in kept
        ]
        return cls(
            pks=pks,
            found=found,
            digests=spread(digests),
            version_ids=spread(versions, 0, np.int64),
            reference_ids=spread(references).tolist(),
            screened_at=spread(screened_at).tolist(),
            flag_bits=spread([b or 0 for b in bits], 0, np.int64),
            verdicts=spread(verdicts),
            careless_scores=spread(careless).tolist(),
            screened_with=spread(screened_with),
            results=spread(results).tolist(),
            kept_evidence=spread(kept_values).tolist(),
        )

    def take(self, rows: np.ndarray) -> StoredScreenings:
        """The respondents at ``rows`` (a mask or positions)."""
        picked = np.flatnonzero(rows) if rows.dtype == bool else rows
        listed = picked.tolist()

        def pick(values: list[Any]) -> list[Any]:
            return [values[i] for i in listed]

        return StoredScreenings(
            pks=self.pks[picked], found=self.found[picked], digests=self.digests[picked],
            version_ids=self.version_ids[picked], reference_ids=pick(self.reference_ids),
            screened_at=pick(self.screened_at), flag_bits=self.flag_bits[picked],
            verdicts=self.verdicts[picked], careless_scores=pick(self.careless_scores),
            screened_with=self.screened_with[picked], results=pick(self.results),
            kept_evidence=pick(self.kept_evidence),
        )

    def history(
        self,
        rows: np.ndarray,
        earlier: ResultColumns,
        codes: DetectorCodes,
        versions: Sequence[str],
        fingerprint: str,
        replaced_at: dt.datetime,
    ) -> tuple[list[str], list[tuple[Any, ...]], tuple[str, ...]]:
        """The screening history rows that keep these respondents' stored screenings (at
        ``rows``; ``earlier``: their stored results as columns, ``versions``: the versions
        of ``earlier``'s detectors, known where the result was produced by the screener
        ``fingerprint``), for ``store.insert_screening_history``: column names, rows, and
        the columns whose values are as stored."""
        names = [
            "respondent_pk", "survey_version_id", "reference_id", "screened_at", "replaced_at",
            "flag_count", "flags", "verdict", "careless_score", "packed_results", "versions",
            "results",
        ]
        known = self.screened_with[rows] == fingerprint
        records, kept_versions = earlier_records(earlier, rows, versions, known)
        flag_sets: dict[int, tuple[str, ...]] = {}
        out: list[tuple[Any, ...]] = []
        for at, k in enumerate(rows.tolist()):
            bits = int(self.flag_bits[k])
            flags = flag_sets.get(bits)
            if flags is None:
                flags = flag_sets[bits] = codes.names(bits)
            out.append((
                int(self.pks[k]), int(self.version_ids[k]), self.reference_ids[k],
                self.screened_at[k], replaced_at, len(flags), flags_column(flags),
                self.verdicts[k], self.careless_scores[k], records[at], kept_versions[at], {},
            ))
        return names, out, ("screened_at", "verdict", "packed_results")


#: First byte of a compact history record set (a detector code is at most ``MAX_CODES - 1``).
COMPACT = 0xFF
#: How a compact record's score is kept (bits 3-4 of its mark): not at all (no finite score,
#: read back as None as a NaN would be), as float32 (when that holds it exactly), as float64.
_NO_SCORE, _SINGLE, _DOUBLE = 0, 1, 2
_SCORE_BYTES = np.array([0, 4, 8])


def earlier_records(
    columns: ResultColumns, rows: np.ndarray, versions: Sequence[str], known: np.ndarray
) -> tuple[list[bytes], list[Any]]:
    """The screening history's record of the stored results of the respondents at ``rows``
    of ``columns``, and the detectors' versions to keep with each (``versions``: of
    ``columns``' detectors, kept where ``known``: one text when all are equal, else a list in
    the records' order).

    Compact layout (``COMPACT``): the marker byte, the set of detector codes present as a
    little-endian 64-bit mask, one mark per present detector in code order (state, flag
    and how the score is kept, see ``_SINGLE``), then the kept scores in the same order.
    """
    assert columns.codes is not None
    by_code = np.array([columns.codes.by_name[name] for name in columns.names], dtype=np.int64)
    order = np.argsort(by_code)
    present = np.ascontiguousarray(columns.present[rows][:, order])
    scores = np.ascontiguousarray(columns.scores[rows][:, order], dtype="<f8")
    n, d = present.shape
    finite = present & np.isfinite(scores)
    with np.errstate(over="ignore"):  # beyond float32's range: kept as float64
        single_scores = np.ascontiguousarray(scores, dtype="<f4")
    single = finite & (single_scores.astype(np.float64) == scores)
    kind = np.where(single, _SINGLE, np.where(finite, _DOUBLE, _NO_SCORE)).astype(np.uint8)
    marks = (
        (columns.states[rows][:, order].astype(np.uint8) & 3)
        | (columns.flagged[rows][:, order].astype(np.uint8) * _FLAGGED)
        | (kind << 3)
    )
    bits = (present.astype(np.uint64) << by_code[order].astype(np.uint64)).sum(
        axis=1, dtype=np.uint64
    )
    head = np.empty((n, 9), dtype=np.uint8)
    head[:, 0] = COMPACT
    head[:, 1:] = bits.astype("<u8").view(np.uint8).reshape(n, 8)
    score_bytes = scores.view(np.uint8).reshape(n, d, 8).copy()
    score_bytes[single, :4] = single_scores.view(np.uint8).reshape(n, d, 4)[single]
    keep_scores = np.arange(8) < _SCORE_BYTES[kind][..., None]
    table = np.concatenate([head, marks, score_bytes.reshape(n, 8 * d)], axis=1)
    keep = np.concatenate(
        [np.ones((n, 9), dtype=bool), present, keep_scores.reshape(n, 8 * d)], axis=1
    )
    data = table[keep].tobytes()
    ends = np.cumsum(keep.sum(axis=1)).tolist()
    blobs = [data[start:end] for start, end in zip([0, *ends], ends, strict=False)]
    ordered = [versions[j] for j in order.tolist()]
    same = len(set(ordered)) == 1
    kept: list[Any] = []
    for k in range(n):
        if not known[k]:
            kept.append(None)
        elif same and present[k].any():
            kept.append(ordered[0])
        else:
            listed = [ordered[j] for j in np.flatnonzero(present[k]).tolist()]
            kept.append(listed[0] if len(set(listed)) == 1 else listed)
    return blobs, kept


def _earlier_entries(blob: bytes) -> list[tuple[int, int, float]]:
    """(code, mark, score) of each record of a history row, either layout."""
    if not blob or blob[0] != COMPACT:
        return [
            (int(entry["code"]), int(entry["mark"]), float(entry["score"]))
            for entry in np.frombuffer(blob, dtype=EARLIER)
        ]
    bits = int.from_bytes(blob[1:9], "little")
    present = [code for code in range(64) if bits >> code & 1]
    at = 9 + len(present)
    out = []
    for code, mark in zip(present, blob[9:at], strict=True):
        kind = mark >> 3
        if kind == _SINGLE:
            score = float(np.frombuffer(blob, dtype="<f4", count=1, offset=at)[0])
        elif kind == _DOUBLE:
            score = float(np.frombuffer(blob, dtype="<f8", count=1, offset=at)[0])
        else:
            score = float("nan")
        at += int(_SCORE_BYTES[kind])
        out.append((code, mark & 7, score))
    return out


def earlier_results(codes: DetectorCodes, row: Any) -> dict[str, dict[str, Any]]:
    """A screening history row's earlier results: detector name to its version, state
    label, score and flag."""
    if row.packed_results is None:
        return dict(row.results or {})
    versions = row.versions
    out = {}
    for i, (code, mark, score) in enumerate(_earlier_entries(row.packed_results)):
        version = versions if isinstance(versions, str) or versions is None else versions[i]
        out[codes.name(code) or f"detector {code}"] = {
            "version": version,
            "state": State(mark & 3).label,
            "score": _finite_one(score),
            "flagged": bool(mark & _FLAGGED),
        }
    return dict(sorted(out.items(), key=lambda item: _registry_order(item[0])))


def survey_counts(session: Session, survey_id: int) -> dict[str, Any]:
    """``store.report``'s counts of a survey, with each detector's tally (respondents by
    state, flagged) and the respondents each detector flagged per day of arrival."""
    counts = store.report(session, survey_id)
    pks = np.array(store.survey_pks(session, survey_id), dtype=np.int64)
    counts["detectors"] = {
        name: {
            "assessed": tally[State.ASSESSED],
            "flagged": tally["flagged"],
            "not_assessed": tally[State.NOT_ASSESSED],
            "not_applicable": tally[State.NOT_APPLICABLE],
        }
        for name, tally in detector_tallies(session, survey_id, pks).items()
    }
    by_day = flagged_by_day(session, survey_id)
    for day in counts["days"]:
        day["flagged"] = by_day.get(day["day"], {})
    return counts
