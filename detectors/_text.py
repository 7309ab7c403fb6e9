"""Numbers and words as text for many respondents at once, for the evidence sentences.

Each function takes columns (one value per respondent: numpy arrays, or text columns made
here) and returns a text column holding exactly what Python's own formatting gives for each
value (``format(x, ".2f")``, ``format(x, "g")``, ``str(n)``), so a detector's bulk sentences
read the same as its one-respondent ones. Text columns are Arrow string arrays, the string
engine of pandas: joining many parts row by row is one pass over the data. Numbers are
rounded with integer arithmetic on the whole column; the few values too close to a rounding
tie for a float product to settle it, too large or not finite, are formatted by Python
itself, once per distinct value.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any, TypeAlias

import numpy as np

__all__ = [
    "TextColumn",
    "choose",
    "concat",
    "counted",
    "fixed",
    "general",
    "is_none",
    "joined",
    "lookup",
    "mapped",
    "names_at",
    "percent",
    "plain",
    "plural",
    "strings",
    "to_objects",
]

#: A column of text, one string per respondent: an Arrow string array (typed loosely so that
#: this module need not import pyarrow before it is used).
TextColumn: TypeAlias = Any

#: Above this magnitude a scaled float no longer holds every integer exactly.
_EXACT = float(2**52)


def _pa() -> Any:
    import pyarrow as pa

    return pa


def _pc() -> Any:
    import pyarrow.compute as pc

    return pc


def _text(part: Any) -> Any:
    """A part as Arrow: text columns pass, a string becomes a scalar, numpy text an array."""
    pa = _pa()
    if isinstance(part, str):
        return pa.scalar(part, pa.string())
    if isinstance(part, pa.Array | pa.Scalar):
        return part
    return pa.array(np.asarray(part, dtype=object), pa.string())


def strings(values: Any, n: int) -> Any:
    """A text column of n rows: a string repeated, or a column of strings."""
    pa = _pa()
    if isinstance(values, str):
        return pa.array(np.full(n, values, dtype=object), pa.string())
    return _text(values)


def to_objects(column: Any) -> np.ndarray:
    """A text column as a numpy array of Python strings."""
    return column.to_numpy(zero_copy_only=False).astype(object, copy=False)


def plain(values: np.ndarray) -> Any:
    """``str(x)`` of each value: integers written directly, anything else through Python."""
    values = np.asarray(values)
    if values.dtype.kind in "iu":
        return _pa().array(values.astype(np.int64)).cast(_pa().string())
    return mapped(values, str)


def concat(*parts: Any) -> Any:
    """Parts joined end to end, row by row; a part is a text column or one string for all."""
    return _pc().binary_join_element_wise(*(_text(part) for part in parts), "")


def choose(condition: np.ndarray, when_true: Any, when_false: Any) -> Any:
    """Row by row, ``when_true`` where ``condition`` holds, else ``when_false``."""
    mask = _pa().array(np.asarray(condition, dtype=bool))
    return _pc().if_else(mask, _text(when_true), _text(when_false))


def plural(count: np.ndarray, suffix: str = "s") -> Any:
    """``suffix`` where the count is not 1, else the empty string."""
    return choose(np.asarray(count) != 1, suffix, "")


def lookup(values: np.ndarray, function: Callable[[Any], Any]) -> np.ndarray:
    """``function`` of each value as a numpy array, called once per distinct value (floats
    told apart by their bits, so -0.0 is not 0.0; other values must be hashable; None is not
    NaN)."""
    import pandas as pd

    values = np.asarray(values)
    if values.dtype.kind == "f":
        codes, distinct = pd.factorize(values.astype(np.float64).view(np.int64))
        table = [function(float(x)) for x in np.asarray(distinct).view(np.float64)]
    else:
        values = values.astype(object)
        codes, distinct = pd.factorize(values)
        table = [function(value) for value in distinct]
        missing = codes < 0
        if missing.any():  # None and NaN: missing to pandas, different to Python
            codes = np.where(
                missing, np.where(is_none(values), len(table), len(table) + 1), codes
            )
            table += [function(None), function(float("nan"))]
    out = np.empty(len(table), dtype=object)
    out[:] = table
    return out[codes]


def mapped(values: np.ndarray, function: Callable[[Any], str]) -> Any:
    """``function`` of each value as a text column, called once per distinct value."""
    return _text(lookup(values, function))


def names_at(names: Sequence[str], positions: np.ndarray) -> Any:
    """The names at ``positions`` (valid indices), as a text column."""
    return _pa().array(list(names), _pa().string()).take(np.asarray(positions, dtype=np.int64))


def is_none(values: np.ndarray) -> np.ndarray:
    """Where each value is None (columns of objects)."""
    return np.asarray(np.asarray(values, dtype=object) == None)  # noqa: E711 (elementwise)


def counted(present: list[np.ndarray], n: int) -> np.ndarray:
    """Row by row, how many of the columns ``present`` hold True."""
    if not present:
        return np.zeros(n, dtype=np.int64)
    return np.asarray(np.sum(present, axis=0, dtype=np.int64))


def joined(parts: list[Any], present: list[np.ndarray], separator: str, n: int) -> Any:
    """Row by row, the parts present (in order) joined by ``separator``; parts and present
    are columns of n rows, one per position."""
    out = strings("", n)
    started = np.zeros(n, dtype=bool)
    for part, here in zip(parts, present, strict=True):
        here = np.asarray(here, dtype=bool)
        out = concat(out, choose(started & here, separator, ""), choose(here, part, ""))
        started |= here
    return out


def _with_python(column: Any, values: np.ndarray, unsure: np.ndarray, spec: str) -> Any:
    """``column`` with the ``unsure`` rows formatted by Python (``format(x, spec)``)."""
    if not unsure.any():
        return column
    pa = _pa()
    replacements = mapped(values[unsure], lambda x: format(x, spec))
    return _pc().replace_with_mask(column, pa.array(unsure), replacements)


def _digits(magnitude: np.ndarray, decimals: np.ndarray | int) -> Any:
    """Whole numbers ``magnitude`` (int64, >= 0) written with ``decimals`` digits after the
    point (one number for all rows, or per row; >= 0)."""
    pc = _pc()
    scale = 10 ** np.asarray(decimals, dtype=np.int64)
    whole = plain(magnitude // scale)
    if isinstance(decimals, int):
        if decimals == 0:
            return whole
        return concat(whole, ".", pc.utf8_lpad(plain(magnitude % scale), decimals, "0"))
    out = whole
    for width in np.unique(decimals[decimals > 0]).tolist():
        fraction = pc.utf8_lpad(plain(magnitude % scale), width, "0")
        out = choose(decimals == width, concat(whole, ".", fraction), out)
    return out


def _rounded(scaled: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Nearest whole number of each scaled value (ties to even, as Python rounds the exact
    value), and where the float product sits too near a tie or too high to be trusted."""
    nearest = np.rint(scaled)
    from_tie = np.abs(np.abs(scaled - np.floor(scaled)) - 0.5)
    unsure = (
        ~np.isfinite(scaled)
        | (np.abs(scaled) >= _EXACT)
        | (from_tie <= 4 * np.abs(np.spacing(scaled)))
    )
    return nearest, unsure


def fixed(values: np.ndarray, decimals: int) -> Any:
    """``format(x, f".{decimals}f")`` of each value (``decimals`` from 0 to 15)."""
    values = np.asarray(values, dtype=np.float64)
    with np.errstate(invalid="ignore", over="ignore"):
        nearest, unsure = _rounded(values * 10.0**decimals)
    magnitude = np.abs(np.where(unsure, 0.0, nearest)).astype(np.int64)
    column = concat(choose(np.signbit(values), "-", ""), _digits(magnitude, decimals))
    return _with_python(column, values, unsure, f".{decimals}f")


def percent(values: np.ndarray, decimals: int = 0) -> Any:
    """``format(x, f".{decimals}%")`` of each value (Python multiplies by 100 as a float too)."""
    return concat(fixed(np.asarray(values, dtype=np.float64) * 100.0, decimals), "%")


def general(values: np.ndarray, precision: int = 6) -> Any:
    """``format(x, f".{precision}g")`` of each value (``format(x, "g")`` at the default 6).

    Python rounds to ``precision`` significant digits, then writes the number without an
    exponent when the rounded value's exponent lies in [-4, precision), trailing zeros
    dropped. Other values (exponent form, zero, not finite) are left to Python.
    """
    values = np.asarray(values, dtype=np.float64)
    magnitude = np.abs(values)
    usable = np.isfinite(values) & (magnitude > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        exponent = np.floor(np.log10(np.where(usable, magnitude, 1.0))).astype(np.int64)
    usable &= (exponent >= -4) & (exponent < precision)
    decimals = np.where(usable, precision - 1 - exponent, 0)
    with np.errstate(invalid="ignore", over="ignore"):
        nearest, unsure = _rounded(np.where(usable, magnitude, 0.0) * 10.0**decimals)
    whole = np.where(unsure, 0.0, nearest).astype(np.int64)
    # The digits must number ``precision``: a rounded-up 9.99.. gains one (one decimal less),
    # a misjudged logarithm loses one (left to Python).
    top = 10**precision
    carried = whole == top
    whole = np.where(carried, top // 10, whole)
    decimals = decimals - carried
    usable &= ~unsure & (whole >= top // 10) & (decimals >= 0)
    decimals = np.where(usable, decimals, 0)
    text = _digits(np.where(usable, whole, 0), decimals)
    pc = _pc()
    stripped = pc.utf8_rtrim(pc.utf8_rtrim(text, characters="0"), characters=".")
    column = concat(choose(np.signbit(values), "-", ""), choose(decimals > 0, stripped, text))
    return _with_python(column, values, ~usable, f".{precision}g")
