"""A night from an Arrow table with time / counts / reference columns (CSV and Parquet share this)."""

from __future__ import annotations

from collections.abc import Mapping
from datetime import tzinfo
from pathlib import PurePath
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from ..errors import InvalidNightError, Problem
from ._days import text_of
from ._decoding import finish_night, metadata_fields
from .checks import MAX_LISTED, CodedLabels, NightOptions, validate_night_fields
from .columns import ColumnRoles
from .night import Night
from .profiles import ImportProfile
from .timestamps import (
    NAT,
    Quote,
    Rows,
    arrow_ns,
    date_time_ns,
    has_zone,
    index_ns,
    invalid_problem,
    iso_invalid,
    localize,
    offsets_of,
    parse_with_format,
    plausible_problems,
    settle_doubtful,
)

if TYPE_CHECKING:  # pyarrow has no type information: these names stand for what the values are
    import pyarrow as pa

__all__ = ["file_name", "night_from_table", "times_to_utc"]


def file_name(source: str | None) -> str | None:
    """The file name of a source path (None without a source)."""
    return (PurePath(source).name or None) if source else None


def times_to_utc(time_col: pa.Array, date_col: pa.Array | None, *, fmt: str | None, tz: str | None, row0: int,
                 field: str, problems: list[Problem]) -> tuple[NDArray[np.int64], tzinfo | None] | None:
    """Epoch times as (int64 UTC nanoseconds, zone they were placed in), or None with the problems recorded.

    ``date_col`` (a date column) is joined to ``time_col`` (then a time of day) with a blank; with a
    format that splits into a date and a time part they are read apart and added
    (:func:`~models.nights.timestamps.date_time_ns`), with the same result. The zone is None when
    the times carry their own offsets.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    quote: Quote | None = None
    if date_col is None and pa.types.is_timestamp(time_col.type) and time_col.null_count == 0:
        if time_col.type.tz is not None:
            return _plausible(arrow_ns(time_col), None, None, row0, field, problems)
        naive = arrow_ns(time_col)
    else:
        fast = date_time_ns(date_col, time_col, fmt) if fmt is not None and date_col is not None else None
        if fast is None or date_col is None:
            text = text_of(time_col if date_col is None else  # one trim after joining: blanks inside read
                           pc.binary_join_element_wise(_as_text(date_col), _as_text(time_col), " "))  # as one
            rows = _rows_of(text)
        else:  # joined only for the rows that are checked or quoted
            text, rows = None, _joined_rows(date_col, time_col)
        quote = lambda i: str(rows(np.array([i], dtype=np.intp))[0].as_py())  # noqa: E731
        if fmt is not None:
            ns = parse_with_format(text, fmt) if fast is None else \
                settle_doubtful(fast[0], fmt, rows, days_written=fast[1])
            invalid = ns == NAT
            if invalid.any():
                bad = np.flatnonzero(invalid)
                problems.append(invalid_problem(bad, [quote(int(i)) for i in bad[:MAX_LISTED]], row0, field, fmt))
                return None
            if has_zone(fmt):
                return _plausible(ns, None, quote, row0, field, problems)
            naive = ns
        else:
            series = pd.Series(text.to_pylist(), dtype=object)
            parsed = pd.to_datetime(series, format="ISO8601", errors="coerce", utc=True)
            bad = np.flatnonzero(iso_invalid(series) | parsed.isna().to_numpy())
            if bad.size:
                problems.append(invalid_problem(bad, series.iloc[bad[:MAX_LISTED]].tolist(), row0, field, None))
                return None
            has_offset = offsets_of(series)
            if has_offset.all():
                return _plausible(index_ns(pd.DatetimeIndex(parsed)), None, quote, row0, field, problems)
            if has_offset.any():
                i = int(np.flatnonzero(~has_offset)[0] if has_offset[0] else np.flatnonzero(has_offset)[0])
                problems.append(Problem("mixed_timezones", f"some times carry a UTC offset and others do not "
                                        f"(row {row0 + i})", {"field": field, "row": row0 + i, "epoch": i}))
                return None
            naive = index_ns(pd.DatetimeIndex(pd.to_datetime(series, format="ISO8601")))
    if tz is None:
        first = quote(0) if quote is not None else pd.Timestamp(int(naive[0])).isoformat()
        problems.append(Problem("missing_timezone", f"times have no UTC offset (first {first!r}); add offsets "
                                "or give the time zone (tz)", {"field": field, "row": row0, "epoch": 0}))
        return None
    placed = localize(naive, tz, quote, row0, field, problems)
    return None if placed is None else _plausible(*placed, quote, row0, field, problems)


def _rows_of(text: pa.Array) -> Rows:
    """The rows of a text column, by 0-based index."""
    import pyarrow as pa
    import pyarrow.compute as pc

    return lambda idx: text if idx.size == len(text) else pc.take(text, pa.array(idx))


def _joined_rows(date_col: pa.Array, time_col: pa.Array) -> Rows:
    """The trimmed ``date + " " + time`` texts of some rows, joined when asked for."""
    import pyarrow as pa
    import pyarrow.compute as pc

    def rows(idx: NDArray[np.intp]) -> pa.Array:
        at = pa.array(idx)
        return text_of(pc.binary_join_element_wise(_as_text(pc.take(date_col, at)), _as_text(pc.take(time_col, at)),
                                                   " "))
    return rows


def _as_text(col: pa.Array) -> pa.Array:
    """A column as text, nulls as empty text."""
    import pyarrow as pa
    import pyarrow.compute as pc

    if not pa.types.is_string(col.type):
        col = col.cast(pa.string())
    return pc.fill_null(col, "") if col.null_count else col


def _plausible(utc_ns: NDArray[np.int64], zone: tzinfo | None, quote: Quote | None, row0: int, field: str,
               problems: list[Problem]) -> tuple[NDArray[np.int64], tzinfo | None] | None:
    """The times and zone, or None when a time is implausible (the problem recorded)."""
    found = plausible_problems(utc_ns, quote, row0, field)
    problems.extend(found)
    return None if found else (utc_ns, zone)


def _shown(ns: int, zone: tzinfo | None) -> str:
    return pd.Timestamp(ns, tz="UTC").tz_convert(zone or "UTC").isoformat()


def regular_epochs(utc_ns: NDArray[np.int64], row0: int, fill_gaps: bool, zone: tzinfo | None, field: str,
                   problems: list[Problem]) -> tuple[int, NDArray[np.int64]] | None:
    """Epoch length (s) and each row's epoch index; records spacing problems (times shown in ``zone``)."""
    if utc_ns.size < 2:
        problems.append(Problem("too_short", "a CSV night needs at least two rows to infer the epoch length",
                                {"field": field, "row": row0}))
        return None
    step_ns = np.diff(utc_ns)
    regular = bool(step_ns[0] > 0 and (step_ns == step_ns[0]).all())  # the usual, regular file
    if regular:
        epoch_ns = int(step_ns[0])
    else:
        positive = step_ns[step_ns > 0]
        epoch_ns = int(np.median(positive)) if positive.size else 0
        regular = bool((step_ns == epoch_ns).all())
    ok = True
    for code, mask, what in () if regular else (("duplicate_timestamp", step_ns == 0, "repeats the previous time"),
                                                ("time_not_increasing", step_ns < 0, "goes back in time")):
        idx = np.flatnonzero(mask) + 1
        if idx.size:
            ok = False
            when = _shown(int(utc_ns[idx[0]]), zone)
            problems.append(Problem(code, f"{idx.size} row(s) where time {what}, first at row {row0 + idx[0]} "
                                    f"(epoch {idx[0]}, {when})",
                                    {"field": field, "row": int(row0 + idx[0]), "epoch": int(idx[0]), "time": when}))
    if not ok or epoch_ns == 0:
        return None
    if epoch_ns % 1_000_000_000 or (epoch_ns // 1_000_000_000) not in (15, 30, 60):
        problems.append(Problem("unsupported_epoch_length", f"rows are {epoch_ns / 1e9:g} s apart; epochs must be "
                                "15, 30 or 60 s", {"field": field, "row": row0 + 1}))
        return None
    irregular = np.zeros(0, dtype=np.intp) if regular else np.flatnonzero(step_ns != epoch_ns) + 1
    if irregular.size:
        steps = step_ns[irregular - 1]
        if not (fill_gaps and (steps % epoch_ns == 0).all()):
            i = int(irregular[0])
            when = _shown(int(utc_ns[i]), zone)
            problems.append(Problem("irregular_spacing",
                                    f"{irregular.size} gap(s) in the {epoch_ns // 1_000_000_000}-s epoch grid, first "
                                    f"of {step_ns[i - 1] / 1e9:g} s before row {row0 + i} ({when}); fill gaps to "
                                    "accept whole-epoch gaps as missing epochs",
                                    {"field": field, "row": row0 + i, "epoch": i, "time": when}))
            return None
    index = np.arange(utc_ns.size, dtype=np.int64) if regular else (utc_ns - utc_ns[0]) // epoch_ns
    return epoch_ns // 1_000_000_000, index


def _counts(col: pa.Array, row0: int, field: str, fill_gaps: bool, problems: list[Problem]) -> NDArray[np.float64]:
    """Counts as float64 (NaN where empty, accepted only with ``fill_gaps``); problems recorded."""
    import pyarrow as pa

    if pa.types.is_integer(col.type) or pa.types.is_floating(col.type):
        counts = col.cast(pa.float64()).to_numpy(zero_copy_only=False).copy()
    else:
        raw = pd.Series(col.to_pylist(), dtype=object)
        numeric = pd.to_numeric(raw, errors="coerce")
        bad = np.flatnonzero(numeric.isna().to_numpy() & raw.notna().to_numpy())
        if bad.size:
            problems.append(Problem("non_numeric_count", f"{bad.size} count value(s) are not numbers, first "
                                    f"{raw.iloc[bad[0]]!r} at row {row0 + bad[0]}",
                                    {"field": field, "row": int(row0 + bad[0]), "epoch": int(bad[0]),
                                     "values": raw.iloc[bad[:MAX_LISTED]].astype(str).tolist()}))
        counts = numeric.to_numpy(dtype=np.float64, na_value=np.nan).copy()
        counts[bad] = 0.0  # reported above; keep them out of the NaN check
    nan = np.isnan(counts)
    if not fill_gaps and nan.any():
        empty = np.flatnonzero(nan)
        problems.append(Problem("non_finite_count", f"{empty.size} count(s) are empty or NaN, first at row "
                                f"{row0 + empty[0]}", {"field": field, "row": int(row0 + empty[0]),
                                                       "epoch": int(empty[0])}))
        counts[empty] = 0.0
    return np.asarray(counts, dtype=np.float64)


def _reference(col: pa.Array, profile: ImportProfile | None) -> CodedLabels:
    """Reference labels, with the profile's ``stage_codes`` applied to the distinct values."""
    import pyarrow as pa

    if not pa.types.is_dictionary(col.type):
        col = col.cast(pa.string()).dictionary_encode()
    categories = col.dictionary.to_pylist()
    if profile is not None and profile.stage_codes:
        categories = [_mapped(profile, c) for c in categories]
    codes = col.indices.fill_null(-1) if col.null_count else col.indices
    return CodedLabels(codes.to_numpy(zero_copy_only=False), categories)


def _mapped(profile: ImportProfile, value: object) -> object:
    hit = profile.stage_code(value)
    if hit is None and isinstance(value, str):  # "1.0" written for the code 1
        try:
            number = float(value)
        except ValueError:
            return value
        hit = profile.stage_code(int(number)) if number.is_integer() else None
    return value if hit is None else hit


def _column(table: pa.Table, name: str) -> pa.Array:
    """One column of a table as one array."""
    col = table.column(name)
    return col.chunk(0) if col.num_chunks == 1 else col.combine_chunks()


def night_from_table(table: pa.Table, meta: Mapping[str, object], roles: ColumnRoles, *, participant_id: str,
                     options: NightOptions, profile: ImportProfile | None, source: str | None, row0: int,
                     first_tz: tzinfo | str | None, problems: list[Problem]) -> Night:
    """Night from an Arrow table whose columns ``roles`` names.

    ``row0`` is the file line of the first data row (0 for Parquet, which has no lines);
    ``first_tz`` is the UTC offset or zone of the first timestamp as written in the file;
    ``problems`` holds what the caller already found (they are reported together).
    """
    if table.num_rows == 0:
        raise InvalidNightError([*problems, Problem("empty_recording", "the file has a header but no rows",
                                                    {"row": row0})], source=source)
    if table.num_rows > options.max_epochs:
        raise InvalidNightError([Problem("too_many_epochs", f"{table.num_rows} rows exceed the limit of "
                                         f"{options.max_epochs} epochs", {"field": "counts"})], source=source)
    if roles.time is None or roles.counts is None:
        raise InvalidNightError(problems, source=source)
    tz = options.tz if options.tz is not None else (profile.tz if profile is not None else None)
    date_col = _column(table, roles.date) if roles.date is not None else None
    times = times_to_utc(_column(table, roles.time), date_col,
                         fmt=profile.datetime_format if profile is not None else None, tz=tz, row0=row0,
                         field=roles.time, problems=problems)
    zone = None if times is None else (times[1] or first_tz)
    grid = None if times is None else regular_epochs(times[0], row0, options.fill_gaps,
                                                     zone if isinstance(zone, tzinfo) else None, roles.time, problems)
    counts = _counts(_column(table, roles.counts), row0, roles.counts, options.fill_gaps, problems)
    reference: CodedLabels | list[object] | None = None
    if roles.reference is not None:
        reference = _reference(_column(table, roles.reference), profile)
    start = epoch_seconds = None
    if grid is not None and times is not None:
        epoch_seconds, index = grid
        start = pd.Timestamp(times[0][0], tz="UTC").tz_convert(zone or "UTC")
        if index[-1] + 1 != len(index):  # fill whole-epoch gaps with missing epochs (fill_gaps only)
            full = np.full(int(index[-1]) + 1, np.nan)
            full[index] = counts
            counts = full
            if reference is not None:
                ref_full = np.full(full.size, "?", dtype=object)
                ref_full[index] = list(reference)
                reference = ref_full.tolist()
    kwargs = metadata_fields(meta, tz, problems)
    night = validate_night_fields(participant_id=participant_id, start=start, epoch_seconds=epoch_seconds,
                                  counts=counts, reference=reference, options=options, problems=problems,
                                  source=source, unused_columns=roles.unused, source_name=file_name(source),
                                  **kwargs)
    return finish_night(night, options)
