"""Parquet written as a stream: one row group per chunk of rows, each sent as soon as it is written.

The file is a single Parquet file (footer at the end, as every reader expects); its schema is fixed
before the first chunk (:func:`schema_of`), so a chunk whose column happens to be all missing is
written with the column's type, not an inferred one.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

__all__ = ["parquet_chunks", "schema_of"]


class _Drain:
    """A write-only sink whose bytes are taken away as they come (what ``ParquetWriter`` writes to)."""

    def __init__(self) -> None:
        self._parts: list[bytes] = []
        self._position = 0
        self.closed = False

    def write(self, data: bytes) -> int:
        part = bytes(data)
        self._parts.append(part)
        self._position += len(part)
        return len(part)

    def tell(self) -> int:
        return self._position

    def flush(self) -> None:
        pass

    def close(self) -> None:
        self.closed = True

    def take(self) -> bytes:
        out, self._parts = b"".join(self._parts), []
        return out


def schema_of(empty: pd.DataFrame) -> pa.Schema:
    """The Arrow schema of a typed frame (``empty``: the table's columns and dtypes, no rows needed).

    Columns of object dtype (text, or nothing yet) are strings; the pandas metadata is kept, so a reader
    gets the nullable integer and boolean dtypes back.
    """
    schema = pa.Schema.from_pandas(empty, preserve_index=False)
    for i, f in enumerate(schema):
        if pa.types.is_null(f.type):
            schema = schema.set(i, pa.field(f.name, pa.string()))
    return schema


def parquet_chunks(frames: Iterable[pd.DataFrame], *, schema: pa.Schema) -> Iterator[bytes]:
    """The bytes of one Parquet file holding ``frames`` in order, yielded a row group at a time.

    Parameters
    ----------
    frames : iterable of DataFrame
        Chunks with the schema's columns (typed alike); computed lazily, one at a time.
    schema : pyarrow.Schema
        From :func:`schema_of`.
    """
    sink = _Drain()
    with pq.ParquetWriter(sink, schema) as writer:
        for frame in frames:
            writer.write_table(pa.Table.from_pandas(frame, schema=schema, preserve_index=False))
            yield sink.take()
    yield sink.take()
