"""Times of day written at a fixed width (``22:41:30``), read by arithmetic on the text's bytes.

A lab export usually writes every time of day as two digits for hours, minutes and seconds with
one separator between them. Such a column is read here from the bytes of the Arrow text array:
the offsets show that every row has the same width, each field is checked to be two ASCII digits
and in range (hours 00-23, minutes and seconds 00-59), and each separator to be the one the
format writes. Anything else (another width in any row, a missing digit, a blank, a second 60 or
an hour 24) answers None, and the caller reads the column with Arrow's ``strptime`` as before:
where this reader answers, it gives what ``strptime`` gives.
"""

from __future__ import annotations

import re
from functools import lru_cache
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray

if TYPE_CHECKING:  # pyarrow has no type information: this name stands for what the values are
    import pyarrow as pa

__all__: list[str] = []

#: ``%H<sep>%M`` optionally followed by ``<sep>%S``, with one literal character per separator
_FIXED_CLOCK = re.compile(r"%H([^%\w\s])%M(?:([^%\w\s])%S)?")
_NS_PER_S = 1_000_000_000


@lru_cache(maxsize=16)
def _layout(separators: tuple[str, ...],
            n_rows: int) -> tuple[NDArray[np.uint8], NDArray[np.uint8], NDArray[np.float64]]:
    """Lowest and highest byte of each character of ``n_rows`` rows ``HH<sep>MM[<sep>SS]`` laid end to end,
    and the weight in seconds of each column of one row."""
    low, high, weight = [48, 48], [57, 57], [36_000, 3_600]
    for sep, (tens, ones) in zip(separators, ((600, 60), (10, 1)), strict=False):
        low += [ord(sep), 48, 48]
        high += [ord(sep), 53, 57]  # tens of minutes or seconds: 0-5
        weight += [0, tens, ones]
    return (np.tile(np.array(low, dtype=np.uint8), n_rows), np.tile(np.array(high, dtype=np.uint8), n_rows),
            np.array(weight, dtype=np.float64))


def fixed_clock_ns(time_col: pa.Array, time_fmt: str) -> NDArray[np.int64] | None:
    """Nanoseconds since midnight of each time of day, or None unless every row is written strictly.

    Parameters
    ----------
    time_col : pyarrow.StringArray, shape (n,)
        The times of day as written (untrimmed), without nulls.
    time_fmt : str
        Their format; only ``%H:%M:%S`` and ``%H:%M`` shapes (any one-character separators) are read.

    Returns
    -------
    ndarray of int64, shape (n,), or None
        ``(3600 * H + 60 * M + S) * 1e9`` per row; None when the format has another shape or any
        row is not written as two-digit in-range fields with the format's separators.
    """
    import pyarrow as pa

    shape = _FIXED_CLOCK.fullmatch(time_fmt)
    if shape is None or time_col.null_count or not pa.types.is_string(time_col.type):
        return None
    separators = [s for s in shape.groups() if s is not None]
    width = 2 + 3 * len(separators)
    n = len(time_col)
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    offsets_buf, data_buf = time_col.buffers()[1:3]
    offsets = np.frombuffer(offsets_buf, dtype=np.int32, count=n + 1, offset=time_col.offset * 4)
    first = int(offsets[0])
    if int(offsets[-1]) - first != n * width or not (np.diff(offsets) == width).all():
        return None
    text = np.frombuffer(data_buf, dtype=np.uint8, count=n * width, offset=first)
    low, high, weight = _layout(tuple(separators), n)
    # every byte within its column's bounds: ASCII digits, the tens of minutes and seconds 0-5,
    # the separators themselves; then hours 00-23 is the same as a total below one day
    if not ((text >= low).all() and (text <= high).all()):
        return None
    seconds = (text - low).reshape(n, width).astype(np.float64) @ weight  # whole numbers, exact; separators weigh 0
    if not (seconds < 86_400).all():
        return None
    return seconds.astype(np.int64) * _NS_PER_S
