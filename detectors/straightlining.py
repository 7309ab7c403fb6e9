"""Straightlining: the same answer to every item of a block (a grid or page)."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ._base import Detector, DetectorResult, Interval, State, mark, new_states, row_slices
from ._text import TextColumn, choose, concat, lookup, mapped, plain, plural
from .instrument import Instrument
from .responses import MISSING, ResponseMatrix

__all__ = ["Straightlining"]

#: The name instrument.blocks gives the single block of an instrument without blocks.
_WHOLE_QUESTIONNAIRE = "(whole questionnaire)"



class Straightlining(Detector):
    """Straightlining: the share of blocks in which every answered item got the same answer.

    A block is a grid or page of items (the instrument's ``block`` of each item; an instrument
    without blocks is one block). A block is judged for a respondent who answered at least
    ``min_items`` of its items, attention checks left out; it is *straightlined* when all those
    **raw** answers are identical. Reverse keying ((lowest + highest) - x) is not applied: the
    index is about the option ticked, and one raw answer to items keyed in opposite directions
    contradicts itself, which is stronger evidence of not reading. The evidence lists such
    blocks (those straightlined blocks whose answered items include both positively and
    reverse-keyed ones), and the sentence says so. The score is the share of judged blocks that
    are straightlined.

    Parameters
    ----------
    share_cutoff : float in (0, 1], default 0.5
        Flag a respondent who straightlined at least this share of the judged blocks. Heedful's
        choice; no published cut-off exists. An attentive respondent can honestly give one
        answer to a short block of similar statements, so one block among several is not
        enough; half of them is. An instrument that is a single block is straightlined or not
        (score 1 or 0), so there the flag is simply "straightlined".
    min_items : int >= 2, default 4
        Only blocks with at least this many answered items are judged. Under uniformly random
        answering a block of k items on p points is straightlined with probability p^(1-k):
        1/125 = 0.8% for 4 items on 5 points, against 4% for 3 items; and a summed scale wants
        at least 4 items (common practice, no source).

    Notes
    -----
    Straightlining is a pattern of invariance, like a long string of identical answers, but
    judged per block: respondents tend to straightline a whole grid at once.

    Not applicable: no block has ``min_items`` items other than attention checks. Not
    assessed: no block has ``min_items`` answered items.

    References
    ----------
    Herzog, A. R., & Bachman, J. G. (1981). Effects of questionnaire length on response quality.
    Public Opinion Quarterly, 45(4), 549-559.

    Examples
    --------
    >>> import numpy as np
    >>> from detectors import ResponseMatrix, parse_instrument
    >>> instrument = parse_instrument({
    ...     "survey": "example", "response_format": {"points": 5},
    ...     "items": [{"id": f"a{i}", "block": "grid-a", "keyed": (-1) ** i} for i in range(4)]
    ...     + [{"id": f"b{i}", "block": "grid-b"} for i in range(4)]})
    >>> answers = np.array([[4, 4, 4, 4, 2, 3, 2, 5], [4, 4, 4, 4, 4, 4, 4, np.nan]])
    >>> matrix = ResponseMatrix.from_arrays(instrument, answers)
    >>> result = Straightlining().screen(instrument, matrix)
    >>> result.scores.tolist(), result.flags.tolist()
    ([0.5, 1.0], [True, True])
    >>> result.sentence_for(0)
    "same answer, 4, on all 4 answered items of block 'grid-a' (1 of 2 blocks), although the \
block mixes positively and reverse-keyed items"
    """

    name = "straightlining"
    family = "invariance"
    summary = "Share of blocks (grids, pages) answered with one answer throughout."
    reference = (
        "Herzog, A. R., & Bachman, J. G. (1981). Effects of questionnaire length on response "
        "quality. Public Opinion Quarterly, 45(4), 549-559."
    )
    parameter_constraints = {
        "share_cutoff": Interval(float, 0, 1, closed="right"),
        "min_items": Interval(int, 2, None),
    }

    def __init__(self, *, share_cutoff: float = 0.5, min_items: int = 4):
        self.share_cutoff = share_cutoff
        self.min_items = min_items

    def _screen(
        self, instrument: Instrument, matrix: ResponseMatrix, reference: Mapping[str, Any] | None
    ) -> DetectorResult:
        n = matrix.n_respondents
        states, reasons = new_states(n)
        blocks = {
            name: columns
            for name, columns in instrument.blocks.items()
            if len(columns) >= self.min_items
        }
        names = list(blocks)
        # Per block and respondent: answered items, highest answer, straightlined, mixed keying.
        count = np.zeros((len(names), n), dtype=np.int32)
        answer = np.zeros((len(names), n), dtype=np.int8)
        straight = np.zeros((len(names), n), dtype=bool)
        mixed = np.zeros((len(names), n), dtype=bool)
        if names:
            order = np.concatenate(list(blocks.values()))
            ends = np.cumsum([len(columns) for columns in blocks.values()])
            bounds = list(zip([0, *ends[:-1].tolist()], ends.tolist(), strict=True))
            positive = instrument.keyed[order] == 1
            for rows in row_slices(n):
                by_item = matrix.answers[rows][:, order].T  # (items, respondents)
                for b, (first, stop) in enumerate(bounds):
                    block = by_item[first:stop]
                    answered = block != MISSING
                    counted = answered.sum(axis=0, dtype=np.int32)
                    # MISSING lies below every valid code: the maximum is the highest answer.
                    highest = block.max(axis=0)
                    same = (block == highest).sum(axis=0, dtype=np.int32)
                    flat = (counted >= self.min_items) & (same == counted)
                    count[b, rows], answer[b, rows], straight[b, rows] = counted, highest, flat
                    keyed_up = positive[first:stop]
                    if keyed_up.any() and not keyed_up.all():
                        mixed[b, rows] = (
                            flat & answered[keyed_up].any(axis=0) & answered[~keyed_up].any(axis=0)
                        )
        judged = (count >= self.min_items).sum(axis=0)
        straightlined = straight.sum(axis=0)
        # The straightlined block with the most answered items (the first on ties) is described.
        main_block = np.full(n, None, dtype=object)
        main_answer = np.full(n, None, dtype=object)
        main_items = np.zeros(n, dtype=np.int64)
        for b, name in enumerate(names):
            larger = straight[b] & (count[b] > main_items)
            main_block[larger] = name
            main_answer[larger] = answer[b, larger]
            main_items[larger] = count[b, larger]
        if not names:
            mark(
                states, reasons, slice(None), State.NOT_APPLICABLE,
                f"no block has {self.min_items} or more items",
            )
        else:
            mark(
                states, reasons, judged == 0, State.NOT_ASSESSED,
                f"no block has {self.min_items} or more answered items",
            )
        share = np.divide(straightlined, judged, out=np.full(n, np.nan), where=judged > 0)
        return self._result(
            instrument,
            scores=share,
            cutoffs=float(self.share_cutoff),
            states=states,
            reasons=reasons,
            evidence={
                "blocks_judged": judged.astype(np.int64),
                "blocks_straightlined": straightlined.astype(np.int64),
                "straightlined_blocks": _names_where(straight, names),
                "mixed_keying_blocks": _names_where(mixed, names),
                "block": main_block,
                "answer": main_answer,
                "items_answered": main_items,
                "share_cutoff": np.full(n, float(self.share_cutoff)),
            },
        )

    @staticmethod
    def _sentence(evidence: Mapping[str, Any], item_ids: tuple[str, ...]) -> str:
        judged, count = evidence["blocks_judged"], evidence["blocks_straightlined"]
        of_blocks = f"{count} of {judged} block{'s' if judged != 1 else ''}"
        if count == 0:
            return f"no block answered with one answer throughout ({of_blocks})"
        main = _block_phrase(evidence["block"])
        if count == 1:
            text = (
                f"same answer, {evidence['answer']}, on all {evidence['items_answered']} "
                f"answered items of {main} ({of_blocks})"
            )
        else:
            listed = ", ".join(repr(name) for name in evidence["straightlined_blocks"])
            text = (
                f"same answer on every answered item of {of_blocks} ({listed}), e.g. "
                f"{evidence['answer']} on all {evidence['items_answered']} answered items of "
                f"{main}"
            )
        mixed = evidence["mixed_keying_blocks"]
        if len(mixed) == 1 and count == 1:
            return text + _ONE_BLOCK_MIXED
        return text + _mixed_phrase(mixed)

    @staticmethod
    def _sentences(evidence: Mapping[str, np.ndarray], item_ids: tuple[str, ...]) -> TextColumn:
        judged, count = evidence["blocks_judged"], evidence["blocks_straightlined"]
        of_blocks = concat(plain(count), " of ", plain(judged), " block", plural(judged))
        main = mapped(evidence["block"], _block_phrase)
        answer, items = plain(evidence["answer"]), plain(evidence["items_answered"])
        listed = mapped(
            evidence["straightlined_blocks"], lambda names: ", ".join(repr(b) for b in names)
        )
        mixed = evidence["mixed_keying_blocks"]
        text = choose(
            count == 1,
            concat("same answer, ", answer, ", on all ", items, " answered items of ", main, " (",
                   of_blocks, ")"),
            concat("same answer on every answered item of ", of_blocks, " (", listed, "), e.g. ",
                   answer, " on all ", items, " answered items of ", main),
        )
        many_mixed = mapped(mixed, _mixed_phrase)
        text = concat(text, choose(
            (count == 1) & (lookup(mixed, len) == 1),
            _ONE_BLOCK_MIXED, many_mixed,
        ))
        return choose(
            count == 0,
            concat("no block answered with one answer throughout (", of_blocks, ")"), text,
        )


_ONE_BLOCK_MIXED = ", although the block mixes positively and reverse-keyed items"


def _block_phrase(name: str) -> str:
    return "the whole questionnaire" if name == _WHOLE_QUESTIONNAIRE else f"block {name!r}"


def _mixed_phrase(names: tuple[str, ...]) -> str:
    """What the sentence adds about blocks of mixed keying (when not the one block named)."""
    if len(names) == 1:
        return f", although {_block_phrase(names[0])} mixes positively and reverse-keyed items"
    if names:
        listed = ", ".join(repr(name) for name in names)
        return f", although blocks {listed} mix positively and reverse-keyed items"
    return ""


def _names_where(selected: np.ndarray, names: list[str]) -> np.ndarray:
    """Per respondent, the tuple of names whose row of ``selected`` (blocks, n) is True.

    Built once per distinct pattern of selected blocks, not once per respondent.
    """
    out = np.empty(selected.shape[1], dtype=object)
    out.fill(())
    respondents = np.flatnonzero(selected.any(axis=0))
    if len(respondents):
        patterns, which = np.unique(selected[:, respondents].T, axis=0, return_inverse=True)
        lookup = np.empty(len(patterns), dtype=object)
        for p, pattern in enumerate(patterns):
            lookup[p] = tuple(name for name, chosen in zip(names, pattern, strict=True) if chosen)
        out[respondents] = lookup[which.reshape(-1)]
    return out
