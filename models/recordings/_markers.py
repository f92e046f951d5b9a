"""Event-marker columns of recording files (CSV, Parquet, JSON), read beside the night readers."""

from __future__ import annotations

import csv
import io
from collections.abc import Sequence
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from ..errors import Problem
from ..nights import ImportProfile, Night, NightOptions
from ..nights.columns import find_columns, header_key

if TYPE_CHECKING:  # pyarrow has no type information
    import pyarrow as pa

__all__ = ["MARKER_ALIASES", "csv_markers", "json_markers", "marker_values", "parquet_markers"]

#: header names of a marker column (compared as the night readers compare headers)
MARKER_ALIASES = ("marker", "markers", "event", "events", "event_marker", "button")
_TRUE = frozenset({"true", "yes", "y", "x", "*"})
_FALSE = frozenset({"", "false", "no", "n", "nan"})
_DELIMITERS = (",", ";", "\t", "|")


def _marker_header(names: Sequence[str], profile: ImportProfile | None, header_row: int,
                   problems: list[Problem]) -> str | None:
    named = profile.columns.get("marker") if profile is not None else None
    keys = {header_key(n): n for n in names}
    if named is not None and profile is not None:
        hit = keys.get(header_key(named))
        if hit is None:
            problems.append(Problem("missing_column", f"column {named!r} that profile {profile.name!r} names for "
                                    f"marker is not in the header {list(names)!r}",
                                    {"field": named, "row": header_row}))
        return hit
    return next((keys[a] for a in MARKER_ALIASES if a in keys), None)


def marker_values(col: pa.Array, row0: int, field: str, problems: list[Problem]) -> NDArray[np.bool_]:
    """Marker cells as booleans (positive number / true / yes / x: marked; blank / 0 / false / no: not)."""
    import pyarrow as pa

    if pa.types.is_boolean(col.type):
        return np.asarray(col.fill_null(False).to_numpy(zero_copy_only=False), dtype=bool)
    if pa.types.is_integer(col.type) or pa.types.is_floating(col.type):
        values = col.cast(pa.float64()).to_numpy(zero_copy_only=False)
        bad = np.flatnonzero(values < 0)
        if bad.size:
            problems.append(Problem("invalid_marker", f"{bad.size} marker value(s) are negative, first at row "
                                    f"{row0 + bad[0]}", {"field": field, "row": int(row0 + bad[0]),
                                                         "epoch": int(bad[0])}))
        return np.asarray(np.nan_to_num(values, nan=0.0) > 0, dtype=bool)
    import pyarrow.compute as pc

    text = pc.utf8_lower(pc.utf8_trim_whitespace(pc.fill_null(col.cast(pa.string()), "")))
    off = np.asarray(pc.is_in(text, value_set=pa.array(sorted(_FALSE | {"0"}))).to_numpy(zero_copy_only=False))
    on = np.asarray(pc.is_in(text, value_set=pa.array(sorted(_TRUE | {"1"}))).to_numpy(zero_copy_only=False))
    marked = on.copy()
    other = np.flatnonzero(~(on | off))  # numbers written otherwise (2, 1.0) and unknown words
    if other.size:
        words = np.asarray(text.take(pa.array(other)).to_pylist(), dtype=object)
        number = pd.to_numeric(pd.Series(words, dtype=object), errors="coerce").to_numpy(dtype=np.float64,
                                                                                          na_value=np.nan)
        marked[other] = number > 0
        bad = other[~(number >= 0)]
        if bad.size:
            first = str(words[np.searchsorted(other, bad[0])])
            problems.append(Problem("invalid_marker", f"{bad.size} marker value(s) are neither a non-negative "
                                    f"number nor true/false, first {first!r} at row {row0 + bad[0]}",
                                    {"field": field, "row": int(row0 + bad[0]), "epoch": int(bad[0]),
                                     "values": [str(words[np.searchsorted(other, i)]) for i in bad[:5]]}))
    return np.asarray(marked, dtype=bool)


def _on_epochs(marked: NDArray[np.bool_], table: pa.Table, roles_time: str | None, roles_date: str | None,
               night: Night, profile: ImportProfile | None, options: NightOptions) -> NDArray[np.bool_]:
    """Row markers placed on the night's epochs (rows and epochs differ only when gaps were filled)."""
    if marked.size == night.n_epochs:
        return marked
    assert roles_time is not None  # the night reader found it
    text = pd.Series(table.column(roles_time).to_pylist(), dtype=object).astype(str)
    if roles_date is not None:
        text = pd.Series(table.column(roles_date).to_pylist(), dtype=object).astype(str) + " " + text
    fmt = profile.datetime_format if profile is not None and profile.datetime_format else "ISO8601"
    aware = pd.to_datetime(text.iloc[:1], format=fmt).dt.tz is not None  # the reader refused mixed offsets
    times = pd.DatetimeIndex(pd.to_datetime(text, format=fmt, utc=aware))
    if times.tz is None:
        zone = options.tz or (profile.tz if profile is not None else None)
        times = times.tz_localize(zone, ambiguous="NaT", nonexistent="NaT")
    ok = ~np.asarray(times.isna(), dtype=bool)
    offset_s = (times[ok] - night.start).total_seconds().to_numpy()
    index = np.round(offset_s / night.epoch_seconds).astype(np.int64)
    out = np.zeros(night.n_epochs, dtype=bool)
    keep = (index >= 0) & (index < night.n_epochs)
    out[index[keep]] = marked[np.flatnonzero(ok)[keep]]
    return out


def _unused(night: Night, names: Sequence[str], marker: str | None, reference: str | None) -> tuple[str, ...]:
    left = [c for c in night.unused_columns if c != marker]
    if reference is not None and night.reference is not None:
        left.append(reference)
    return tuple(n for n in names if n in left)


def csv_markers(data: bytes, night: Night, options: NightOptions, profile: ImportProfile | None,
                source: str | None) -> tuple[NDArray[np.bool_], tuple[str, ...]]:
    """(markers per epoch, unused columns) of a CSV recording the night reader has accepted as ``night``.

    Raises
    ------
    InvalidNightError
        ``invalid_marker`` (with the row) or ``missing_column`` for a profile's marker column.
    """
    import pyarrow as pa
    import pyarrow.csv as pacsv

    from ..errors import InvalidNightError

    text = data.decode(profile.encoding if profile is not None else "utf-8").removeprefix("\ufeff")
    lines = io.StringIO(text)
    n_pre = profile.skip_rows if profile is not None else 0
    for _ in range(n_pre):
        lines.readline()
    header = lines.readline()
    while header.startswith("#"):
        n_pre += 1
        header = lines.readline()
    header = header.rstrip("\r\n")
    sep = profile.delimiter if profile is not None and profile.delimiter else max(_DELIMITERS, key=header.count)
    names = next(csv.reader([header], delimiter=sep), [])
    problems: list[Problem] = []
    roles = find_columns(names, options, profile, n_pre + 1, [])
    marker = _marker_header(names, profile, n_pre + 1, problems)
    if problems:
        raise InvalidNightError(problems, source=source)
    unused = _unused(night, names, marker, roles.reference)
    if marker is None:
        return np.zeros(night.n_epochs, dtype=bool), unused
    used = [c for c in (marker, roles.time, roles.date) if c is not None]
    body = "\n".join([header, lines.read()]).encode()
    try:  # every used column as text: a marker column's type is not inferred from its first rows
        table = pacsv.read_csv(pa.py_buffer(body), read_options=pacsv.ReadOptions(use_threads=False),
                               parse_options=pacsv.ParseOptions(delimiter=sep),
                               convert_options=pacsv.ConvertOptions(include_columns=used,
                                                                    column_types={c: pa.string() for c in used}))
    except pa.ArrowInvalid as exc:
        raise InvalidNightError([Problem("malformed_csv", f"the marker column {marker!r} cannot be read: "
                                         f"{str(exc).strip().splitlines()[0]}", {"field": marker})],
                                source=source) from None
    marked = marker_values(table.column(marker).combine_chunks(), n_pre + 2, marker, problems)
    if problems:
        raise InvalidNightError(problems, source=source)
    return _placed(marked, table, roles.time, roles.date, night, profile, options, source), unused


def _placed(marked: NDArray[np.bool_], table: pa.Table, roles_time: str | None, roles_date: str | None,
            night: Night, profile: ImportProfile | None, options: NightOptions,
            source: str | None) -> NDArray[np.bool_]:
    """:func:`_on_epochs`, with a time it cannot place reported as a problem."""
    from ..errors import InvalidNightError

    try:
        return _on_epochs(marked, table, roles_time, roles_date, night, profile, options)
    except (ValueError, TypeError) as exc:
        raise InvalidNightError([Problem("marker_times", f"the markers cannot be placed on the epochs: {exc}",
                                         {"field": roles_time or "time"})], source=source) from None


def parquet_markers(data: bytes, night: Night, options: NightOptions, profile: ImportProfile | None,
                    source: str | None) -> tuple[NDArray[np.bool_], tuple[str, ...]]:
    """(markers per epoch, unused columns) of a Parquet recording (rows located from 0)."""
    import pyarrow.parquet as pq

    from ..errors import InvalidNightError

    file = pq.ParquetFile(io.BytesIO(data))
    names = list(file.schema_arrow.names)
    problems: list[Problem] = []
    roles = find_columns(names, options, profile, 0, [])
    marker = _marker_header(names, profile, 0, problems)
    if problems:
        raise InvalidNightError(problems, source=source)
    unused = _unused(night, names, marker, roles.reference)
    if marker is None:
        return np.zeros(night.n_epochs, dtype=bool), unused
    table = file.read(columns=[c for c in (marker, roles.time, roles.date) if c is not None])
    marked = marker_values(table.column(marker).combine_chunks(), 0, marker, problems)
    if problems:
        raise InvalidNightError(problems, source=source)
    if marked.size != night.n_epochs and roles.time is not None:
        import pyarrow as pa

        if pa.types.is_timestamp(table.schema.field(roles.time).type):  # times as instants
            times = pd.DatetimeIndex(table.column(roles.time).to_pandas())
            times = times.tz_localize(options.tz or "UTC") if times.tz is None else times
            index = np.round((times - night.start).total_seconds().to_numpy() / night.epoch_seconds).astype(int)
            out = np.zeros(night.n_epochs, dtype=bool)
            keep = (index >= 0) & (index < night.n_epochs)
            out[index[keep]] = marked[keep]
            return out, unused
    return _placed(marked, table, roles.time, roles.date, night, profile, options, source), unused


def json_markers(value: object, n_epochs: int, problems: list[Problem]) -> NDArray[np.bool_]:
    """Markers of a JSON recording: a list of epoch indexes or one boolean per epoch (absent: none)."""
    out = np.zeros(n_epochs, dtype=bool)
    if value is None:
        return out
    if not isinstance(value, list):
        problems.append(Problem("invalid_field", "markers must be a list of epoch indexes or of booleans",
                                {"field": "markers"}))
        return out
    if value and all(isinstance(v, bool) for v in value):
        if len(value) != n_epochs:
            problems.append(Problem("markers_length", f"markers give {len(value)} booleans for {n_epochs} epochs",
                                    {"field": "markers", "values": [len(value), n_epochs]}))
            return out
        return np.asarray(value, dtype=bool)
    bad = [i for i, v in enumerate(value) if isinstance(v, bool) or not isinstance(v, int) or not 0 <= v < n_epochs]
    if bad:
        problems.append(Problem("invalid_marker", f"{len(bad)} marker(s) are not epoch indexes 0..{n_epochs - 1}, "
                                f"first {value[bad[0]]!r} at position {bad[0]}",
                                {"field": "markers", "values": [repr(value[i]) for i in bad[:5]]}))
        return out
    out[np.asarray(value, dtype=np.int64)] = True
    return out
