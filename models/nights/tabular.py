"""CSV and Parquet nights: one row per epoch (see :mod:`models.nights.formats` for the format rules)."""

from __future__ import annotations

import io
import json
import re
from collections.abc import Mapping
from datetime import tzinfo
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from ..errors import InvalidNightError, Problem
from ._decoding import META_LINE, decode_text, finish_night, metadata_fields
from .checks import MAX_LISTED, CodedLabels, NightOptions, validate_night_fields
from .night import Night

if TYPE_CHECKING:  # pyarrow has no type information: these names stand for what the values are
    import pyarrow as pa

__all__ = ["COLUMN_ALIASES", "night_from_csv", "night_from_parquet", "night_to_csv", "night_to_parquet"]

#: accepted header names per role, compared case-insensitively after stripping blanks
COLUMN_ALIASES: dict[str, tuple[str, ...]] = {
    "time": ("time", "timestamp", "datetime", "date_time", "epoch_start", "start"),
    "counts": ("counts", "count", "activity", "activity_counts", "movement"),
    "reference": ("reference", "stage", "stages", "sleep_stage", "psg", "psg_stage", "label"),
}

_DELIMITERS = (",", ";", "\t")


def _find_columns(columns: list[str], options: NightOptions, problems: list[Problem]) -> dict[str, str | None]:
    lower = {str(c).strip().lower(): c for c in columns}
    found: dict[str, str | None] = {}
    explicit = {"time": options.time_column, "counts": options.counts_column, "reference": options.reference_column}
    for role, aliases in COLUMN_ALIASES.items():
        name = explicit[role]
        if name is not None:
            hit = lower.get(name.strip().lower())
            if hit is None:
                problems.append(Problem("missing_column", f"column {name!r} named for {role} is not in the header "
                                        f"{list(map(str, columns))!r}", {"field": name, "row": 1}))
        else:
            hit = next((lower[a] for a in aliases if a in lower), None)
            if hit is None and role != "reference":
                problems.append(Problem("missing_column", f"no {role} column: the header {list(map(str, columns))!r} "
                                        f"has none of {list(aliases)!r}", {"field": role, "row": 1}))
        found[role] = hit
    return found


def _times_to_utc(col: pa.Array, tz: str | None, row0: int,
                  problems: list[Problem]) -> tuple[NDArray[np.int64], tzinfo | None] | None:
    """Time column (Arrow) -> (int64 UTC nanoseconds, tzinfo of the first epoch)."""
    import pyarrow as pa

    if pa.types.is_timestamp(col.type) and col.type.tz is not None and col.null_count == 0:
        utc = col.cast(pa.timestamp("ns", tz="UTC")).to_numpy().view("int64")
        return utc, None
    text = pd.Series(col.to_pandas(), dtype=object).astype(str).str.strip()
    if pa.types.is_timestamp(col.type) and col.type.tz is None and col.null_count == 0:
        text = pd.Series(pd.DatetimeIndex(col.to_pandas()).strftime("%Y-%m-%dT%H:%M:%S"))
    parsed = pd.to_datetime(text, format="ISO8601", errors="coerce", utc=True)
    bad = np.flatnonzero(parsed.isna().to_numpy())
    if bad.size:
        problems.append(Problem("invalid_timestamp", f"{bad.size} time value(s) are not ISO 8601 times, first "
                                f"{text.iloc[bad[0]]!r} at row {row0 + bad[0]}",
                                {"field": "time", "row": int(row0 + bad[0]), "epoch": int(bad[0]),
                                 "values": text.iloc[bad[:MAX_LISTED]].tolist()}))
        return None
    has_offset = text.str.contains(r"(?:Z|[+-]\d\d:?\d\d)$", regex=True).to_numpy()
    if has_offset.all():
        return pd.DatetimeIndex(parsed).as_unit("ns").asi8, None
    if has_offset.any():
        i = int(np.flatnonzero(~has_offset)[0] if has_offset[0] else np.flatnonzero(has_offset)[0])
        problems.append(Problem("mixed_timezones", f"some times carry a UTC offset and others do not (row {row0 + i})",
                                {"field": "time", "row": row0 + i, "epoch": i}))
        return None
    if tz is None:
        problems.append(Problem("missing_timezone", f"times have no UTC offset (first {text.iloc[0]!r}); add offsets "
                                "or give the time zone (tz)", {"field": "time", "row": row0, "epoch": 0}))
        return None
    naive = pd.to_datetime(text, format="ISO8601")
    try:
        local = pd.DatetimeIndex(naive).tz_localize(tz, ambiguous="infer", nonexistent="raise")
    except Exception as exc:  # zoneinfo / pytz errors for DST gaps and unknown zones
        problems.append(Problem("daylight_saving", f"times cannot be placed in time zone {tz!r}: {exc}",
                                {"field": "time", "row": row0}))
        return None
    return local.tz_convert("UTC").as_unit("ns").asi8, local[0].tzinfo


def _regular_epochs(utc_ns: NDArray[np.int64], row0: int, fill_gaps: bool,
                    problems: list[Problem]) -> tuple[int, NDArray[np.int64]] | None:
    """Epoch length (s) and each row's epoch index; records spacing problems."""
    if utc_ns.size < 2:
        problems.append(Problem("too_short", "a CSV night needs at least two rows to infer the epoch length",
                                {"field": "time", "row": row0}))
        return None
    step_ns = np.diff(utc_ns)
    if (step_ns == step_ns[0]).all() and step_ns[0] > 0:  # the usual, regular file
        epoch_ns = int(step_ns[0])
    else:
        positive = step_ns[step_ns > 0]
        epoch_ns = int(np.median(positive)) if positive.size else 0
    ok = True
    for code, mask, what in (("duplicate_timestamp", step_ns == 0, "repeats the previous time"),
                             ("time_not_increasing", step_ns < 0, "goes back in time")):
        idx = np.flatnonzero(mask) + 1
        if idx.size:
            ok = False
            problems.append(Problem(code, f"{idx.size} row(s) where time {what}, first at row {row0 + idx[0]} "
                                    f"(epoch {idx[0]}, {pd.Timestamp(utc_ns[idx[0]], tz='UTC').isoformat()})",
                                    {"field": "time", "row": int(row0 + idx[0]), "epoch": int(idx[0]),
                                     "time": pd.Timestamp(utc_ns[idx[0]], tz="UTC").isoformat()}))
    if not ok or epoch_ns == 0:
        return None
    if epoch_ns % 1_000_000_000 or (epoch_ns // 1_000_000_000) not in (15, 30, 60):
        problems.append(Problem("unsupported_epoch_length", f"rows are {epoch_ns / 1e9:g} s apart; epochs must be "
                                "15, 30 or 60 s", {"field": "time", "row": row0 + 1}))
        return None
    irregular = np.flatnonzero(step_ns != epoch_ns) + 1
    if irregular.size:
        steps = step_ns[irregular - 1]
        whole = (steps % epoch_ns == 0)
        if not (fill_gaps and whole.all()):
            i = int(irregular[0])
            problems.append(Problem("irregular_spacing",
                                    f"{irregular.size} gap(s) in the {epoch_ns // 1_000_000_000}-s epoch grid, first "
                                    f"of {step_ns[i - 1] / 1e9:g} s before row {row0 + i} "
                                    f"({pd.Timestamp(utc_ns[i], tz='UTC').isoformat()}); fill gaps to accept "
                                    "whole-epoch gaps as missing epochs",
                                    {"field": "time", "row": row0 + i, "epoch": i,
                                     "time": pd.Timestamp(utc_ns[i], tz="UTC").isoformat()}))
            return None
    return epoch_ns // 1_000_000_000, (utc_ns - utc_ns[0]) // epoch_ns


def _night_from_table(table: pa.Table, meta: Mapping[str, object], *, participant_id: str, options: NightOptions,
                      source: str | None, row0: int, first_tz: tzinfo | str | None) -> Night:
    """Night from an Arrow table with time / counts / reference columns.

    ``row0`` is the file line of the first data row (0 for Parquet, which has no lines);
    ``first_tz`` is the UTC offset or zone of the first timestamp as written in the file.
    """
    import pyarrow as pa

    problems: list[Problem] = []
    if table.num_rows == 0:
        raise InvalidNightError([Problem("empty_recording", "the file has a header but no rows", {"row": row0})],
                                source=source)
    if table.num_rows > options.max_epochs:
        raise InvalidNightError([Problem("too_many_epochs", f"{table.num_rows} rows exceed the limit of "
                                         f"{options.max_epochs} epochs", {"field": "counts"})], source=source)
    cols = _find_columns(table.column_names, options, problems)
    if cols["time"] is None or cols["counts"] is None:
        raise InvalidNightError(problems, source=source)
    time_col = table.column(cols["time"]).combine_chunks()
    times = _times_to_utc(time_col, options.tz, row0, problems)
    grid = None if times is None else _regular_epochs(times[0], row0, options.fill_gaps, problems)
    counts_col = table.column(cols["counts"]).combine_chunks()
    if pa.types.is_integer(counts_col.type) or pa.types.is_floating(counts_col.type):
        counts = counts_col.cast(pa.float64()).to_numpy(zero_copy_only=False).copy()
    else:
        raw = pd.Series(counts_col.to_pandas(), dtype=object)
        numeric = pd.to_numeric(raw, errors="coerce")
        bad = np.flatnonzero(numeric.isna().to_numpy() & raw.notna().to_numpy())
        if bad.size:
            problems.append(Problem("non_numeric_count", f"{bad.size} count value(s) are not numbers, first "
                                    f"{raw.iloc[bad[0]]!r} at row {row0 + bad[0]}",
                                    {"field": cols["counts"], "row": int(row0 + bad[0]), "epoch": int(bad[0]),
                                     "values": raw.iloc[bad[:MAX_LISTED]].astype(str).tolist()}))
        counts = numeric.to_numpy(dtype=np.float64, na_value=np.nan).copy()
        counts[bad] = 0.0  # reported above; keep them out of the NaN check
    empty = np.flatnonzero(np.isnan(counts))
    if empty.size and not options.fill_gaps:
        problems.append(Problem("non_finite_count", f"{empty.size} count(s) are empty or NaN, first at row "
                                f"{row0 + empty[0]}", {"field": cols["counts"], "row": int(row0 + empty[0]),
                                                       "epoch": int(empty[0])}))
        counts[empty] = 0.0
    reference: CodedLabels | list[object] | None = None
    if cols["reference"] is not None:
        ref_col = table.column(cols["reference"]).combine_chunks()
        if not pa.types.is_dictionary(ref_col.type):
            ref_col = ref_col.cast(pa.string()).dictionary_encode()
        reference = CodedLabels(ref_col.indices.fill_null(-1).to_numpy(zero_copy_only=False),
                                ref_col.dictionary.to_pylist())
    start = epoch_seconds = None
    if grid is not None and times is not None:
        epoch_seconds, index = grid
        start = pd.Timestamp(times[0][0], tz="UTC").tz_convert(times[1] or first_tz or "UTC")
        if index[-1] + 1 != len(index):  # fill whole-epoch gaps with missing epochs (fill_gaps only)
            full = np.full(int(index[-1]) + 1, np.nan)
            full[index] = counts
            counts = full
            if reference is not None:
                ref_full = np.full(full.size, "?", dtype=object)
                ref_full[index] = list(reference)
                reference = ref_full.tolist()
    kwargs = metadata_fields(meta, options.tz, problems)
    night = validate_night_fields(participant_id=participant_id, start=start, epoch_seconds=epoch_seconds,
                                  counts=counts, reference=reference, options=options, problems=problems,
                                  source=source, **kwargs)
    return finish_night(night, options)


def night_from_csv(data: bytes | str, *, participant_id: str = "", options: NightOptions = NightOptions(),
                   source: str | None = None) -> Night:
    """Night from CSV text (see :mod:`models.nights.formats`); parsed by Arrow's C++ CSV reader."""
    import pyarrow as pa

    text = decode_text(data, source)
    meta: dict[str, str] = {}
    pos = 0
    n_meta = 0
    while text.startswith("#", pos):
        nl = text.find("\n", pos)
        line = text[pos: len(text) if nl < 0 else nl]
        hit = META_LINE.match(line.rstrip("\r"))
        if hit:
            meta[hit.group(1).lower()] = hit.group(2)
        n_meta += 1
        pos = len(text) if nl < 0 else nl + 1
    body = text[pos:]
    header_end = body.find("\n")
    header = (body if header_end < 0 else body[:header_end]).rstrip("\r")
    if not header.strip():
        raise InvalidNightError([Problem("empty_file", "the file has no header row", {"row": n_meta + 1})],
                                source=source)
    sep = max(_DELIMITERS, key=header.count)
    if header.count(sep) == 0:
        raise InvalidNightError([Problem("missing_column", f"the header {header[:80]!r} has a single column; expected "
                                         "time and counts separated by comma, semicolon or tab",
                                         {"row": n_meta + 1})], source=source)
    second_end = body.find("\n", header_end + 1)
    first_row = body[header_end + 1: len(body) if second_end < 0 else second_end].rstrip("\r")
    decimal = "," if sep != "," and "," in first_row else "."
    first_tz = None
    names = [h.strip().lower() for h in header.split(sep)]
    cells = first_row.split(sep)
    for alias in (options.time_column or "",) + COLUMN_ALIASES["time"]:
        if alias.lower() in names and names.index(alias.lower()) < len(cells):
            try:
                first_tz = pd.Timestamp(cells[names.index(alias.lower())].strip()).tzinfo
            except (ValueError, TypeError):
                pass
            break
    buffer = pa.py_buffer(body.encode())
    roles = {n: role for n in header.split(sep) for role, aliases in COLUMN_ALIASES.items()
             if n.strip().lower() in aliases}
    fast_types = {"time": pa.timestamp("s", tz="UTC"), "counts": pa.float64(),
                  "reference": pa.dictionary(pa.int32(), pa.string())}
    slow_types = {"reference": pa.string()}
    try:
        try:  # typed read first: the usual file converts without type inference
            table = _read_arrow_csv(buffer, sep, decimal, {n: fast_types[r] for n, r in roles.items()})
        except pa.ArrowInvalid:  # something does not convert: read as found, so the checks can locate it
            table = _read_arrow_csv(buffer, sep, decimal, {n: slow_types[r] for n, r in roles.items()
                                                           if r in slow_types})
    except pa.ArrowInvalid as exc:
        msg = str(exc).strip().splitlines()[0]
        hit = re.search(r"Row #(\d+)", msg)
        row = n_meta + (int(hit.group(1)) if hit else 1)
        raise InvalidNightError([Problem("malformed_csv", f"line {row} does not match the {sep!r}-delimited header: "
                                         f"{msg}", {"row": row})], source=source) from None
    try:
        return _night_from_table(table, meta, participant_id=participant_id, options=options, source=source,
                                 row0=n_meta + 2, first_tz=first_tz)
    except InvalidNightError as exc:  # give file lines for problems located by epoch
        for i, p in enumerate(exc.problems):
            if "epoch" in p.location and "row" not in p.location:
                exc.problems[i] = Problem(p.code, p.message, {**p.location, "row": n_meta + 2 + p.location["epoch"]})
        raise


def _read_arrow_csv(buffer: pa.Buffer, sep: str, decimal: str, column_types: dict[str, pa.DataType]) -> pa.Table:
    import pyarrow.csv as pacsv

    return pacsv.read_csv(
        buffer,
        read_options=pacsv.ReadOptions(use_threads=False),
        parse_options=pacsv.ParseOptions(delimiter=sep),
        convert_options=pacsv.ConvertOptions(decimal_point=decimal, strings_can_be_null=True,
                                             column_types=column_types),
    )


def night_to_csv(night: Night) -> str:
    """CSV text: metadata lines, then ``time,counts[,reference]`` rows with UTC offsets."""
    head = [f"# {k}: {v.isoformat()}" for k, v in (("lights_off", night.lights_off), ("lights_on", night.lights_on))
            if v is not None]
    if night.label is not None:
        head.append(f"# label: {night.label}")
    frame = pd.DataFrame({"time": night.epoch_times().map(lambda t: t.isoformat()), "counts": night.counts})
    if np.all(np.isnan(night.counts) | (night.counts == np.round(night.counts))):
        frame["counts"] = frame["counts"].astype("Int64")
    if night.reference is not None:
        frame["reference"] = night.reference
    return "\n".join(head + [frame.to_csv(index=False, lineterminator="\n").rstrip("\n")]) + "\n"


def night_from_parquet(data: bytes, *, participant_id: str = "", options: NightOptions = NightOptions(),
                       source: str | None = None) -> Night:
    """Night from Parquet bytes (columns as CSV; lights/label in metadata key ``nightbank``)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        table = pq.read_table(io.BytesIO(data))
    except (pa.ArrowException, OSError) as exc:
        raise InvalidNightError([Problem("malformed_parquet", f"not a readable Parquet file: {exc}", {})],
                                source=source) from None
    raw_meta = (table.schema.metadata or {}).get(b"nightbank", b"{}")
    try:
        meta = json.loads(raw_meta)
    except json.JSONDecodeError:
        meta = {}
    time_type = next((f.type for f in table.schema if f.name.strip().lower() in COLUMN_ALIASES["time"]), None)
    first_tz = getattr(time_type, "tz", None)
    return _night_from_table(table, meta if isinstance(meta, dict) else {}, participant_id=participant_id,
                             options=options, source=source, row0=0, first_tz=first_tz)


def night_to_parquet(night: Night) -> bytes:
    """Parquet bytes of a night (time as UTC-offset timestamps, counts float64, reference text)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    cols: dict[str, Any] = {"time": night.epoch_times(), "counts": night.counts}
    if night.reference is not None:
        cols["reference"] = night.reference.astype(object)
    table = pa.Table.from_pandas(pd.DataFrame(cols), preserve_index=False)
    meta = {k: getattr(night, k).isoformat() for k in ("lights_off", "lights_on") if getattr(night, k) is not None}
    if night.label is not None:
        meta["label"] = night.label
    table = table.replace_schema_metadata({**(table.schema.metadata or {}), b"nightbank": json.dumps(meta).encode()})
    buf = io.BytesIO()
    pq.write_table(table, buf)
    return buf.getvalue()
