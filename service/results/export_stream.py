"""The parameter export as a stream: counts known at once, CSV rows sent as their nights are computed.

The bytes are those of :func:`service.results.exports.export_parameters` (same rows, same CSV).
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import pandas as pd
from sqlalchemy.orm import Session, sessionmaker

from models import PARAMETER_NAMES

from .exports import (
    _INTEGER_COLUMNS,
    EXPORT_COLUMNS,
    _check_format,
    _chunk_rows,
    _csv,
    _frame,
    _parquet,
    _prepare,
    _typed,
)

__all__ = ["ExportStream", "export_stream"]


@dataclass(frozen=True)
class ExportStream:
    """An export being made: its row and night counts (known before anything is computed) and its bytes.

    ``chunks`` computes :data:`~service.results.bulk_scoring.CHUNK_NIGHTS` nights at a time; for
    CSV each chunk's rows are sent as soon as they are made (the same bytes as
    :func:`export_parameters`), Parquet comes as one piece at the end.
    """

    n_rows: int
    n_nights: int
    chunks: Iterator[bytes]


def export_stream(factory: sessionmaker[Session], *, study_id: str, fmt: str = "csv",
                  interval_level: float | None = None) -> ExportStream:
    """:func:`export_parameters` as a stream; the study and format are checked now, the nights computed lazily.

    Raises
    ------
    NotFound, Unprocessable
        As :func:`export_parameters`, before the stream starts.
    """
    _check_format(fmt)
    export = _prepare(factory, study_id, interval_level)

    def csv_chunks() -> Iterator[bytes]:
        yield _csv(pd.DataFrame(columns=list(EXPORT_COLUMNS)), header=True)
        for rows in _chunk_rows(factory, export):
            yield _csv(_fixed(_typed(pd.DataFrame(rows, columns=list(EXPORT_COLUMNS)))), header=False)

    def parquet_chunks() -> Iterator[bytes]:
        yield _parquet(_frame(factory, export))

    return ExportStream(export.n_rows, len(export.targets), csv_chunks() if fmt == "csv" else parquet_chunks())


def _fixed(frame: pd.DataFrame) -> pd.DataFrame:
    """A chunk's parameter columns as float64, as the whole table has them (a chunk alone may infer another
    type from its few values: all missing, or all whole numbers)."""
    for column in PARAMETER_NAMES:
        if column not in _INTEGER_COLUMNS:
            frame[column] = frame[column].astype("float64")
    return frame
