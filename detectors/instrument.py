"""The instrument model: a questionnaire's items, answer formats, keying and screening settings.

An instrument is a JSON document of Heedful's own format::

    {
      "survey": "staff-pulse-2027",
      "title": "Staff pulse",
      "response_format": {"points": 5, "lowest": 1, "labels": ["Strongly disagree", ...]},
      "items": [
        {"id": "q01", "text": "...", "scale": "workload", "keyed": 1, "block": "grid-a"},
        {"id": "q02", "text": "...", "scale": "workload", "keyed": -1, "block": "grid-a"},
        {"id": "chk1", "text": "Please answer 'Agree'", "instructed_answer": 4}
      ],
      "opposite_pairs": [["q01", "q02"]],
      "screening": {"long_string": {"run_cutoff": 12}}
    }

``Instrument.model_validate`` (or :func:`detectors.load_instrument`) checks it and raises
:class:`~detectors.errors.InstrumentError` naming every offending field or item.
Derived per-item arrays (lowest and highest answer, midpoint, keying) are computed once and
cached, so detectors can work on whole response matrices.
"""

from __future__ import annotations

from functools import cached_property
from itertools import product
from typing import Annotated, Any, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, model_validator

__all__ = [
    "Instrument",
    "Item",
    "ResponseFormat",
    "VerdictPolicy",
]

#: Likert items have 2 to 10 points (common practice, no source).
MIN_POINTS, MAX_POINTS = 2, 10
#: Answers are stored as 8-bit integers, so codes must stay well inside -128..127.
MIN_LOWEST, MAX_LOWEST = -50, 50

ItemId = Annotated[str, Field(min_length=1, max_length=64, pattern=r"^[A-Za-z0-9_.\-]+$")]


class ResponseFormat(BaseModel):
    """The answer options of an item: ``points`` consecutive integer codes from ``lowest``."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    points: int = Field(ge=MIN_POINTS, le=MAX_POINTS, description="Number of answer options.")
    lowest: int = Field(default=1, ge=MIN_LOWEST, le=MAX_LOWEST, description="Code of the first option.")
    labels: list[str] | None = Field(default=None, description="One label per option, lowest first.")

    @model_validator(mode="after")
    def _labels_match_points(self) -> ResponseFormat:
        if self.labels is not None and len(self.labels) != self.points:
            raise ValueError(
                f"labels has {len(self.labels)} entries but points is {self.points}; "
                "give one label per answer option"
            )
        return self

    @property
    def highest(self) -> int:
        return self.lowest + self.points - 1

    @property
    def midpoint(self) -> float:
        return (self.lowest + self.highest) / 2

    @property
    def has_midpoint(self) -> bool:
        """An even number of points has no neutral midpoint (common practice, no source)."""
        return self.points % 2 == 1


class Item(BaseModel):
    """One Likert item, in presentation order."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    id: ItemId
    text: str = ""
    scale: str | None = Field(default=None, min_length=1, description="Summed scale of the item.")
    keyed: Literal[1, -1] = Field(default=1, description="1 for positively, -1 for reverse keyed.")
    block: str | None = Field(default=None, min_length=1, description="Grid or page the item is shown on.")
    instructed_answer: int | None = Field(
        default=None, description="For an attention-check item: the answer it asks for."
    )
    response_format: ResponseFormat | None = None


Family = Literal["invariance", "inconsistency", "misfit", "outlier", "effort", "style"]

#: Families of evidence that count towards carelessness by default (``style`` does not: a response
#: style distorts scale scores but does not make a record invalid).
CARELESS_FAMILIES: tuple[Family, ...] = ("invariance", "inconsistency", "misfit", "outlier", "effort")


class VerdictPolicy(BaseModel):
    """How flags become a respondent's verdict, and how the careless score is combined.

    The defaults follow the advice to act only where independent kinds of evidence agree
    (Curran 2016; Meade & Craig 2012): one family flagging asks for a look, two make careless
    answering likely. A failed instructed item is direct evidence, so together with any other
    flag it is enough.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    families: tuple[Family, ...] = Field(
        default=CARELESS_FAMILIES,
        min_length=1,
        description="Families whose flags count towards the verdict and the careless score.",
    )
    review_from: int = Field(
        default=1, ge=1, description="Flagging families from which the verdict is 'review'."
    )
    likely_careless_from: int = Field(
        default=2, ge=1,
        description="Flagging families from which the verdict is 'likely_careless'.",
    )
    failed_check_escalates: bool = Field(
        default=True,
        description="A failed attention check together with any other counted flag (of any "
        "family, its own included) makes the verdict 'likely_careless'.",
    )
    score_families: int = Field(
        default=5, ge=1,
        description="The careless score adds the surprise of this many most surprising "
        "families (default: every careless family).",
    )
    review_rate: float = Field(
        default=0.10, gt=0, lt=0.5,
        description="Share of ordinary respondents the policy means to send to review. It is "
        "split evenly over the counted families that hold an index calibrated from the "
        "reference sample; each such index gets its cut-off from that share "
        "(detectors.calibration).",
    )

    score_review_share: float = Field(
        default=0.75, ge=0, lt=1,
        description="Part of review_rate given to the careless score's own hurdle: a "
        "respondent whose careless score lies in that upper share of the reference's unflagged "
        "respondents goes to review even without a flag (random answering lowers many indices "
        "a little and may pass every single cut-off). The rest is split over the families.",
    )

    @model_validator(mode="after")
    def _ordered(self) -> VerdictPolicy:
        if self.likely_careless_from < self.review_from:
            raise ValueError(
                f"likely_careless_from ({self.likely_careless_from}) must be at least "
                f"review_from ({self.review_from})"
            )
        if len(set(self.families)) != len(self.families):
            raise ValueError("families lists a family twice")
        return self


class Instrument(BaseModel):
    """A questionnaire as Heedful screens it."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    survey: ItemId = Field(description="Survey id.")
    title: str = ""
    response_format: ResponseFormat
    items: list[Item] = Field(min_length=1)
    opposite_pairs: list[tuple[ItemId, ItemId]] | None = Field(
        default=None,
        description="Pairs of items that state opposite things. When absent, every pairing of a "
        "+1-keyed with a -1-keyed item within a scale.",
    )
    screening: dict[str, dict[str, Any]] = Field(
        default_factory=dict, description="Per-detector settings overriding the defaults."
    )
    verdict: VerdictPolicy = Field(
        default_factory=VerdictPolicy,
        description="How flags of several detectors combine into a verdict.",
    )

    @model_validator(mode="after")
    def _check_items(self) -> Instrument:
        problems: list[str] = []
        seen: dict[str, int] = {}
        for position, item in enumerate(self.items):
            if item.id in seen:
                problems.append(
                    f"items[{position}].id: duplicate item id {item.id!r} "
                    f"(first used at items[{seen[item.id]}])"
                )
            else:
                seen[item.id] = position
            fmt = item.response_format or self.response_format
            if item.instructed_answer is not None and not (
                fmt.lowest <= item.instructed_answer <= fmt.highest
            ):
                problems.append(
                    f"items[{position}].instructed_answer: {item.instructed_answer} is outside "
                    f"the item's answer range {fmt.lowest}..{fmt.highest}"
                )
        for number, pair in enumerate(self.opposite_pairs or []):
            first, second = pair
            for side, item_id in enumerate(pair):
                if item_id not in seen:
                    problems.append(f"opposite_pairs[{number}][{side}]: unknown item id {item_id!r}")
            if first == second:
                problems.append(f"opposite_pairs[{number}]: pairs an item ({first!r}) with itself")
            elif first in seen and second in seen:
                a, b = self.items[seen[first]], self.items[seen[second]]
                if a.keyed == b.keyed:
                    problems.append(
                        f"opposite_pairs[{number}]: {first!r} and {second!r} are both keyed "
                        f"{a.keyed:+d}; opposite items must be keyed in opposite directions"
                    )
                if a.instructed_answer is not None or b.instructed_answer is not None:
                    problems.append(
                        f"opposite_pairs[{number}]: attention-check items cannot be paired"
                    )
        if problems:
            raise ValueError("\n".join(problems))
        return self

    # Derived structure, computed once per instrument -------------------------------------------

    @cached_property
    def item_ids(self) -> tuple[str, ...]:
        return tuple(item.id for item in self.items)

    @cached_property
    def item_index(self) -> dict[str, int]:
        return {item_id: i for i, item_id in enumerate(self.item_ids)}

    def format_of(self, item: Item) -> ResponseFormat:
        return item.response_format or self.response_format

    @cached_property
    def lowest(self) -> np.ndarray:
        """Lowest answer code per item (int8)."""
        return np.array([self.format_of(i).lowest for i in self.items], dtype=np.int8)

    @cached_property
    def highest(self) -> np.ndarray:
        """Highest answer code per item (int8)."""
        return np.array([self.format_of(i).highest for i in self.items], dtype=np.int8)

    @cached_property
    def points(self) -> np.ndarray:
        return np.array([self.format_of(i).points for i in self.items], dtype=np.int8)

    @cached_property
    def midpoint(self) -> np.ndarray:
        """(lowest + highest) / 2 per item; not an answer code when points is even."""
        return (self.lowest.astype(np.float64) + self.highest) / 2

    @cached_property
    def keyed(self) -> np.ndarray:
        return np.array([i.keyed for i in self.items], dtype=np.int8)

    @cached_property
    def is_instructed(self) -> np.ndarray:
        """True for attention-check items (left out of the style and pattern indices)."""
        return np.array([i.instructed_answer is not None for i in self.items], dtype=bool)

    @cached_property
    def content_items(self) -> np.ndarray:
        """Column indices of the items that are not attention checks, in presentation order."""
        return np.flatnonzero(~self.is_instructed)

    @cached_property
    def scales(self) -> dict[str, np.ndarray]:
        """Scale name to its column indices, in order of first appearance."""
        out: dict[str, list[int]] = {}
        for i, item in enumerate(self.items):
            if item.scale is not None and item.instructed_answer is None:
                out.setdefault(item.scale, []).append(i)
        return {name: np.array(cols, dtype=np.intp) for name, cols in out.items()}

    @cached_property
    def blocks(self) -> dict[str, np.ndarray]:
        """Block name to its content-item columns; one block of all items when none is defined."""
        if all(item.block is None for item in self.items):
            return {"(whole questionnaire)": self.content_items}
        out: dict[str, list[int]] = {}
        for i, item in enumerate(self.items):
            if item.block is not None and item.instructed_answer is None:
                out.setdefault(item.block, []).append(i)
        return {name: np.array(cols, dtype=np.intp) for name, cols in out.items()}

    @cached_property
    def pairs(self) -> np.ndarray:
        """Opposite pairs as an (m, 2) array of column indices (given or derived)."""
        if self.opposite_pairs is not None:
            rows = [(self.item_index[a], self.item_index[b]) for a, b in self.opposite_pairs]
        else:
            rows = []
            for cols in self.scales.values():
                positive = [c for c in cols if self.items[c].keyed == 1]
                negative = [c for c in cols if self.items[c].keyed == -1]
                rows.extend(product(positive, negative))
        return np.array(rows, dtype=np.intp).reshape(-1, 2)

    def settings_for(self, detector: str) -> dict[str, Any]:
        """The instrument's own settings for one detector (empty when none)."""
        return dict(self.screening.get(detector, {}))
