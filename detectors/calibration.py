"""Cut-offs calibrated to a stated false-alarm rate, read from a cleaned reference sample.

Why
    Many indices have no null distribution that holds on every questionnaire: how much two
    halves of a scale agree within a person, how far an ordinary answer pattern lies from the
    sample's, how well a person fits a model, all depend on the number of items, scales and
    points and on the sample. A fixed cut-off then flags 0.1% of one survey's ordinary
    respondents and 13% of another's. For such an index (``Detector.calibration ==
    "reference"``) the screen sets the cut-off from the reference sample so that a stated share
    of ordinary respondents is flagged.

The budget
    The verdict policy states ``review_rate``, the share of ordinary respondents it means to
    send to review. ``score_review_share`` of it is the careless score's own review hurdle
    (``detectors.verdict.score_cutoff``); the rest, B = ``review_rate x (1 -
    score_review_share)``, is split evenly over the counted families that hold a calibrated
    index (Bonferroni): each family may flag B / F of ordinary respondents, so the share
    flagged by any family is at most B. Within a family the indices are calibrated jointly,
    by the distribution of their *smallest* upper-tail share (the min-p or max-T adjustment of
    Westfall & Young 1993): every index of the family gets the same upper-tail share ``t_f``,
    chosen so that B / F of the cleaned reference lies beyond the cut-off of at least one of
    them. An index's stated rate is its share among the reference respondents no other
    family flags. Correlated indices (several person-fit indices
    react to the same random answering) then cost the budget once, not once each.

Cleaning the reference
    The reference sample holds careless respondents too (often about one in ten), and a
    careless kind that one index catches sits exactly in that index's upper tail: a plain
    quantile would put the cut-off among them and miss them. Following the iterated cleaning
    of Patton, Cheng, Hong & Diao (2019), the cut-offs are estimated, the respondents they
    flag are set aside, and the cut-offs are estimated again (``CLEANING_ROUNDS`` times). To
    keep the cleaning from eating an index's own tail (removing the respondents an index
    flags and re-reading its quantile would lower its cut-off round after round), the
    sample for family f leaves out only the respondents flagged by the *other* families:
    careless respondents caught by other kinds of evidence leave the sample, while family f's
    own ordinary tail stays (as long as families are not strongly related among ordinary
    respondents; the false-alarm check in the tests measures what remains). Families whose
    tails go together among ordinary respondents (``RELATED``: ``misfit`` and ``outlier``)
    do not clean each other. The first round starts from the detectors' own cut-offs, so that
    two families that each see a kind only once the other has set it aside get going.

    A careless kind that only one family can see stays in that family's sample. For such an
    index a detector may state ``calibration == "reference_within_own"``: its cut-off is the
    lower of the calibrated one and its own (an exact chance model, e.g. long runs), so the
    sample's tail can tighten the cut-off but a contaminated tail cannot loosen it beyond what
    chance explains.

Percentile tables
    The careless score reads each index's percentile from quantile tables; they are taken
    from the same cleaned samples, so that a careless respondent of a kind present in the
    reference still ranks above every ordinary one.

References
----------
Westfall, P. H., & Young, S. S. (1993). Resampling-based multiple testing: Examples and
methods for p-value adjustment. New York: Wiley.

Patton, J. M., Cheng, Y., Hong, M., & Diao, Q. (2019). Detection and treatment of careless
responses to improve item parameter estimation. Journal of Educational and Behavioral
Statistics, 44(3), 309-341.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, replace
from typing import Any, TypeVar

import numpy as np

from ._base import DetectorResult, State
from .instrument import VerdictPolicy

__all__ = [
    "CALIBRATION_KEY",
    "CLEANING_ROUNDS",
    "Calibration",
    "apply",
    "calibrate",
    "upper_cutoff",
]

#: A detector's result, or None where a detector gave none: ``apply`` returns what it is given.
_Result = TypeVar("_Result", DetectorResult, DetectorResult | None)

#: Families that never clean each other's sample. ``misfit`` and ``outlier`` both compare a
#: respondent's answers with the sample's pattern (its item ordering and model; its means and
#: covariances), so among ordinary respondents their upper tails go together: on simulated
#: ordinary answers, setting aside the respondents one flags made the other flag 2 to 3.4
#: times its share (``tests/detectors/test_calibration.py`` keeps the null check).
RELATED: tuple[frozenset[str], ...] = (frozenset({"misfit", "outlier"}),)
#: Key of the calibrated cut-offs inside a stored reference.
CALIBRATION_KEY = "calibration"
#: Rounds of estimating cut-offs and setting flagged respondents aside (three rounds settle
#: the cut-offs on the bfi data with planted careless respondents; more change nothing there).
CLEANING_ROUNDS = 3


@dataclass(frozen=True)
class Calibration:
    """Calibrated cut-offs of one reference sample.

    ``cutoffs`` maps a detector to its score cut-off; ``rates`` to the upper-tail share of the
    cleaned reference beyond that cut-off (the index's own expected false-alarm rate);
    ``family_rates`` maps a family to its share of the review budget; ``unflagged`` marks the reference respondents no counted family flags at the calibrated
    cut-offs (the sample the careless score's percentile tables are read from).
    """

    cutoffs: dict[str, float]
    rates: dict[str, float]
    family_rates: dict[str, float]
    unflagged: np.ndarray | None = None

    def to_json(self) -> dict[str, Any]:
        return {
            name: {"cutoff": self.cutoffs[name], "rate": self.rates[name]}
            for name in self.cutoffs
        } | {"(families)": dict(self.family_rates)}

    def only(self, names: Any) -> Calibration:
        """The same calibration restricted to the detectors in ``names``."""
        return Calibration(
            {k: v for k, v in self.cutoffs.items() if k in names},
            {k: v for k, v in self.rates.items() if k in names},
            self.family_rates,
            self.unflagged,
        )

    @classmethod
    def from_json(cls, document: Mapping[str, Any]) -> Calibration:
        families = dict(document.get("(families)", {}))
        entries = {k: v for k, v in document.items() if k != "(families)"}
        return cls(
            cutoffs={k: float(v["cutoff"]) for k, v in entries.items()},
            rates={k: float(v["rate"]) for k, v in entries.items()},
            family_rates={k: float(v) for k, v in families.items()},
        )


def upper_cutoff(values: np.ndarray, share: float) -> float:
    """The smallest cut-off c with ``mean(values >= c) <= share`` among sample values and the
    values just above them (ties are never split: a cut-off between tied values would flag
    all or none of them). Beyond the largest value when even it is too common."""
    values = np.sort(values[np.isfinite(values)])
    n = len(values)
    if n == 0:
        return float("inf")
    allowed = int(np.floor(share * n + 1e-9))
    if allowed <= 0:
        return float(np.nextafter(values[-1], np.inf))
    candidate = values[n - allowed]
    # values equal to the candidate below position n - allowed would also be flagged
    if np.searchsorted(values, candidate, side="left") < n - allowed:
        above = values[values > candidate]
        return float(above[0]) if len(above) else float(np.nextafter(candidate, np.inf))
    return float(candidate)


def _upper_shares(scores: np.ndarray, sample: np.ndarray) -> np.ndarray:
    """Per respondent, the share of ``sample`` scoring at or above the respondent's score
    (the empirical upper-tail p-value); NaN for a NaN score."""
    ordered = np.sort(sample)
    at_or_above = len(ordered) - np.searchsorted(ordered, scores, side="left")
    out = at_or_above / max(len(ordered), 1)
    return np.where(np.isfinite(scores), out, np.nan)


def calibrate(
    policy: VerdictPolicy,
    results: Mapping[str, DetectorResult | None],
    kinds: Mapping[str, str],
    models: Mapping[str, Any] | None = None,
) -> Calibration:
    """Calibrate the cut-offs of the detectors named in ``kinds`` on a reference sample.

    Parameters
    ----------
    policy : VerdictPolicy
        Gives ``review_rate`` and the counted families.
    results : mapping of detector name to DetectorResult
        Every detector's result on the reference sample itself.
    kinds : mapping of detector name to its calibration (``"reference"`` or
        ``"reference_within_own"``): the detectors to calibrate.
    models : mapping of detector name to its class, optional
        For a ``"reference_within_own"`` detector, its ``model_cutoff`` (a chance model fitted
        to the cleaned sample) caps the empirical cut-off: a careless kind that fills the
        index's upper tail cannot raise the cut-off beyond what the model allows.
    """
    counted = tuple(policy.families)
    calibrated = {
        name: result for name, result in results.items()
        if name in kinds and result is not None and result.family in counted
        and (result.states == State.ASSESSED).any()
    }
    n = next((len(r) for r in results.values() if r is not None), 0)
    families = sorted({r.family for r in calibrated.values()}, key=counted.index)
    family_budget = policy.review_rate * (1.0 - policy.score_review_share)
    family_rates = {f: family_budget / len(families) for f in families} if families else {}
    family_of = {name: result.family for name, result in results.items() if result is not None}
    # flags of detectors with fixed cut-offs count towards cleaning as they are
    fixed = {
        name: result.flags for name, result in results.items()
        if result is not None and result.family in counted and name not in calibrated
    }
    # The first round sets aside what the detectors' own cut-offs flag: without a start, two
    # families that each see a careless kind only through the other's cleaning would never see
    # it (each one's tail holds the kind, so neither flags it, so neither sample loses it).
    own_by_family = {f: np.zeros(n, dtype=bool) for f in counted}
    for result in results.values():
        if result is not None and result.family in counted:
            own_by_family[result.family] |= result.flags
    keep = {
        f: ~np.logical_or.reduce(
            [own_by_family[g] for g in counted if g != f and not _related(f, g)]
            + [np.zeros(n, dtype=bool)]
        )
        for f in families
    }
    cutoffs: dict[str, float] = {}
    rates: dict[str, float] = {}
    for _ in range(CLEANING_ROUNDS):
        flags_by_family: dict[str, np.ndarray] = {f: np.zeros(n, dtype=bool) for f in counted}
        for name, flag in fixed.items():
            flags_by_family[family_of[name]] |= flag
        for family in families:
            members = {k: r for k, r in calibrated.items() if r.family == family}
            sample = keep[family]
            shares = []
            for result in members.values():
                assessed = result.states == State.ASSESSED
                reference = result.scores[sample & assessed]
                shares.append(_upper_shares(result.scores, reference))
            smallest = np.fmin.reduce(shares) if len(shares) > 1 else shares[0]
            judged = sample & np.isfinite(smallest)
            tail = _family_tail(smallest[judged], family_rates[family])
            for name, result in members.items():
                assessed = result.states == State.ASSESSED
                reference = result.scores[sample & assessed]
                cutoff = upper_cutoff(reference, tail)
                highest = getattr(models.get(name), "score_maximum", None) if models else None
                if highest is not None:
                    cutoff = min(cutoff, highest)
                if kinds[name] == "reference_within_own" and models and name in models:
                    modelled = models[name].model_cutoff(result, sample & assessed, tail)
                    if modelled is not None:
                        cutoff = min(cutoff, modelled)
                cutoffs[name] = cutoff
                rates[name] = float(np.mean(reference >= cutoff)) if len(reference) else 0.0
                flags_by_family[family] |= assessed & (result.scores >= cutoff)
        keep = {
            f: ~np.logical_or.reduce(
                [flags_by_family[g] for g in counted if g != f and not _related(f, g)]
                + [np.zeros(n, dtype=bool)]
            )
            for f in families
        }
    unflagged = ~np.logical_or.reduce([flags_by_family[g] for g in counted])
    return Calibration(cutoffs, rates, family_rates, unflagged)


def _related(family: str, other: str) -> bool:
    """Whether two families' tails go together among ordinary respondents (``RELATED``)."""
    return any({family, other} <= pair for pair in RELATED)


def _family_tail(smallest: np.ndarray, rate: float) -> float:
    """The largest per-index upper-tail share t with ``mean(smallest <= t) <= rate``."""
    if len(smallest) == 0:
        return rate
    ordered = np.sort(smallest)
    allowed = int(np.floor(rate * len(ordered) + 1e-9))
    if allowed <= 0:
        return float(ordered[0]) / 2
    if allowed >= len(ordered):
        return 1.0
    # t just below the (allowed+1)-th smallest value keeps at most `allowed` at or below t
    return float(np.nextafter(ordered[allowed], -np.inf))


def apply(
    results: Mapping[str, _Result],
    calibration: Calibration,
    detectors: Mapping[str, Any],
) -> dict[str, _Result]:
    """Results with the calibrated cut-offs in place of the detectors' own (flags and the
    cut-off stated in the evidence follow)."""
    out = dict(results)
    for name, cutoff in calibration.cutoffs.items():
        result = results.get(name)
        detector = detectors.get(name)
        if result is None or detector is None:
            continue
        own = result.cutoffs
        cutoffs = np.full(len(result), cutoff)
        if detector.calibration == "reference_within_own":
            cutoffs = np.fmin(cutoffs, own)
        assessed = result.states == State.ASSESSED
        flags = np.zeros(len(result), dtype=bool)
        np.greater_equal(result.scores, cutoffs, out=flags, where=assessed)
        evidence = dict(result.evidence)
        key = detector.cutoff_evidence
        if key is not None and key in evidence:
            evidence[key] = detector.cutoff_in_evidence(cutoffs, result.params)
        evidence["false_alarm_rate"] = np.full(len(result), calibration.rates[name])
        out[name] = replace(result, cutoffs=cutoffs, flags=flags, evidence=evidence)
    return out
