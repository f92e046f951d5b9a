"""The parameter export as a stream: counts known at once, CSV rows or Parquet row groups sent as their nights are
computed.

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
    _prepare,
    _typed,
)
from .parquet_stream import parquet_chunks, schema_of

__all__ = ["ExportStream", "export_stream"]


@dataclass(frozen=True)
class ExportStream:
    """An export being made: its row and night counts (known before anything is computed) and its bytes.

    ``chunks`` computes :data:`~service.results.bulk_scoring.CHUNK_NIGHTS` nights at a time; for
    CSV each chunk's rows are sent as soon as they are made (the same bytes as
    :func:`export_parameters`), for Parquet each chunk is a row group of one file
    (:func:`~service.results.parquet_stream.parquet_chunks`; the same table when read).
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
        for frame in frames():
            yield _csv(frame, header=False)

    def frames() -> Iterator[pd.DataFrame]:
        for rows in _chunk_rows(factory, export):
            yield _fixed(_typed(pd.DataFrame(rows, columns=list(EXPORT_COLUMNS))))

    if fmt == "csv":
        return ExportStream(export.n_rows, len(export.targets), csv_chunks())
    empty = _fixed(_typed(pd.DataFrame(columns=list(EXPORT_COLUMNS))))
    return ExportStream(export.n_rows, len(export.targets), parquet_chunks(frames(), schema=schema_of(empty)))


def _fixed(frame: pd.DataFrame) -> pd.DataFrame:
    """A chunk's parameter columns as float64, as the whole table has them (a chunk alone may infer another
    type from its few values: all missing, or all whole numbers)."""
    for column in PARAMETER_NAMES:
        if column not in _INTEGER_COLUMNS:
            frame[column] = frame[column].astype("float64")
    return frame
