"""Design notes on an instrument: what limits screening before any response arrives."""

from __future__ import annotations

from dataclasses import dataclass

from .instrument import Instrument

__all__ = ["LintNote", "lint", "MIN_SCALE_ITEMS", "PREFERRED_SCALE_ITEMS", "MIN_BLOCK_ITEMS"]

#: A summed scale wants at least 4 and preferably 8 items (common practice, no source).
MIN_SCALE_ITEMS, PREFERRED_SCALE_ITEMS = 4, 8
#: Straightlining is judged on blocks of at least 4 answered items (the detector's default).
MIN_BLOCK_ITEMS = 4


@dataclass(frozen=True)
class LintNote:
    """One design warning: a stable ``code``, where (``location``), and what it limits."""

    code: str
    location: str
    message: str

    def __str__(self) -> str:
        return f"{self.location}: {self.message} [{self.code}]"


def lint(instrument: Instrument) -> list[LintNote]:
    """Warnings about an instrument's design that limit what screening can tell.

    None of these makes the instrument invalid; each names what it costs.
    """
    notes: list[LintNote] = []
    for name, columns in instrument.scales.items():
        where = f"scale {name!r}"
        count = len(columns)
        if count < MIN_SCALE_ITEMS:
            notes.append(
                LintNote(
                    "short_scale",
                    where,
                    f"has {count} item(s); a summed scale needs at least {MIN_SCALE_ITEMS} "
                    f"({PREFERRED_SCALE_ITEMS} preferred) to support a score",
                )
            )
        elif count < PREFERRED_SCALE_ITEMS:
            notes.append(
                LintNote(
                    "short_scale",
                    where,
                    f"has {count} items; {PREFERRED_SCALE_ITEMS} or more make a steadier summed "
                    "score",
                )
            )
        keyed = instrument.keyed[columns]
        positive, negative = int((keyed == 1).sum()), int((keyed == -1).sum())
        if positive != negative:
            notes.append(
                LintNote(
                    "unbalanced_keying",
                    where,
                    f"has {positive} positively and {negative} reverse-keyed item(s); with "
                    "unbalanced keying agreement with everything cannot be told apart from the "
                    "trait itself",
                )
            )
    if len(instrument.pairs) == 0:
        notes.append(
            LintNote(
                "no_opposite_pairs",
                "opposite_pairs",
                "no pair of opposite items is given or can be derived (no scale mixes keying), so "
                "acquiescence cannot be assessed",
            )
        )
    content = instrument.content_items
    if len(content) and not (instrument.points[content] % 2 == 1).any():
        notes.append(
            LintNote(
                "no_midpoint",
                "response_format.points",
                f"every item has an even number of points ({int(instrument.points[content][0])}); "
                "there is no neutral midpoint, so midpoint_style does not apply",
            )
        )
    for name, columns in instrument.blocks.items():
        if len(columns) < MIN_BLOCK_ITEMS:
            notes.append(
                LintNote(
                    "short_block",
                    f"block {name!r}",
                    f"has {len(columns)} item(s); blocks of fewer than {MIN_BLOCK_ITEMS} are too "
                    "short for straightlining to mean anything",
                )
            )
    return notes
