"""CSV and Parquet nights: one row per epoch (see :mod:`models.nights.formats` for the format rules).

An :class:`~models.nights.profiles.ImportProfile` describes a lab's own export: preamble lines, delimiter,
decimal mark, encoding, the header of each column role, the time format and zone, and the
reference's own stage codes. Without a profile the reader finds all of these itself.
"""

from __future__ import annotations

import codecs
import csv
import io
import json
import re
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from ..errors import InvalidNightError, Problem
from ._decoding import META_LINE, decode_text, load_json, parquet_bounds_problem
from ._table import night_from_table
from .checks import NightOptions
from .columns import ColumnRoles, find_columns
from .night import Night
from .profiles import ImportProfile

if TYPE_CHECKING:  # pyarrow has no type information: these names stand for what the values are
    import pyarrow as pa

_BLANK_LINE = re.compile(r"\n(?=\r?\n)")  # a line break followed by an empty line

__all__ = ["night_from_csv", "night_from_parquet", "night_to_csv", "night_to_parquet"]

_DELIMITERS = (",", ";", "\t", "|")


def _skip_lines(text: str, n: int, meta: dict[str, str]) -> int:
    """Position after the first ``n`` lines of ``text``; their ``# key: value`` lines go into ``meta``."""
    pos = 0
    for _ in range(n):
        nl = text.find("\n", pos)
        if text.startswith("#", pos):
            hit = META_LINE.match(text[pos: len(text) if nl < 0 else nl].rstrip("\r"))
            if hit:
                meta[hit.group(1).lower()] = hit.group(2)
        if nl < 0:
            return len(text)
        pos = nl + 1
    return pos


def _cells(line: str, sep: str) -> list[str]:
    """The fields of one line (quotes as the CSV reader takes them)."""
    try:
        return next(csv.reader([line], delimiter=sep), [])
    except csv.Error:  # a stray carriage return or NUL: Arrow will name the line
        return line.split(sep)


def night_from_csv(data: bytes | str, *, participant_id: str = "", options: NightOptions = NightOptions(),
                   source: str | None = None, profile: ImportProfile | None = None) -> Night:
    """Night from CSV text (see :mod:`models.nights.formats`); parsed by Arrow's C++ CSV reader.

    Parameters
    ----------
    data : bytes or str
        The file's content.
    participant_id : str, default=""
    options : NightOptions
        Reading and validation options; ``options.tz`` overrides the profile's ``tz``.
    source : str, optional
        Where the data came from (a path or file name): named in errors, its file name kept as
        :attr:`Night.source_name <models.nights.night.Night.source_name>`.
    profile : ImportProfile, optional
        The export's layout. Without one, the delimiter is sniffed from the header, a decimal comma
        is accepted with semicolon or tab delimiters, columns are found by their aliases and times
        must be ISO 8601.

    Raises
    ------
    InvalidNightError
        Listing every problem, each located by field (column), row (1-based file line, preamble and
        header included) and epoch where that applies.
    """
    import pyarrow as pa

    text = decode_text(data, source, profile.encoding if profile is not None else "utf-8")
    skip = profile.skip_rows if profile is not None else 0
    meta: dict[str, str] = {}
    pos = _skip_lines(text, skip, meta)
    n_pre = skip
    while text.startswith("#", pos):
        nl = text.find("\n", pos)
        line = text[pos: len(text) if nl < 0 else nl]
        hit = META_LINE.match(line.rstrip("\r"))
        if hit:
            meta[hit.group(1).lower()] = hit.group(2)
        n_pre += 1
        pos = len(text) if nl < 0 else nl + 1
    body = text[pos:]
    header_end = body.find("\n")
    header = (body if header_end < 0 else body[:header_end]).rstrip("\r")
    if not header.strip():
        raise InvalidNightError([Problem("empty_file", "the file has no header row", {"row": n_pre + 1})],
                                source=source)
    sep = profile.delimiter if profile is not None and profile.delimiter else max(_DELIMITERS, key=header.count)
    if header.count(sep) == 0:
        raise InvalidNightError([Problem("missing_column", f"the header {header[:80]!r} has a single column; expected "
                                         f"time and counts separated by {sep!r}" if profile is not None and
                                         profile.delimiter else f"the header {header[:80]!r} has a single column; "
                                         "expected time and counts separated by comma, semicolon or tab",
                                         {"row": n_pre + 1})], source=source)
    second_end = body.find("\n", header_end + 1)
    first_row = body[header_end + 1: len(body) if second_end < 0 else second_end].rstrip("\r")
    decimal = profile.decimal if profile is not None else ("," if sep != "," and "," in first_row else ".")
    names = _cells(header, sep)
    problems: list[Problem] = []
    roles = find_columns(names, options, profile, n_pre + 1, problems)
    if roles.time is None or roles.counts is None:
        raise InvalidNightError(problems, source=source)
    fmt = profile.datetime_format if profile is not None else None
    as_text = fmt is not None or roles.date is not None
    first_tz = None
    if not as_text:
        cells = _cells(first_row, sep)
        at = names.index(roles.time)
        if at < len(cells):
            try:
                first_tz = pd.Timestamp(cells[at].strip()).tzinfo
            except (ValueError, TypeError):
                pass
    tz = options.tz if options.tz is not None else (profile.tz if profile is not None else None)
    rest = body[header_end + 1:].rstrip()
    n_rows = rest.count("\n") + 1 if rest else 0
    if n_rows > options.max_epochs:  # blank lines are not rows: counted only when the bound is passed
        n_rows -= sum(1 for _ in _BLANK_LINE.finditer(rest))
    if n_rows > options.max_epochs:  # counted before any cell is parsed
        raise InvalidNightError([Problem("too_many_epochs", f"the file has {n_rows} rows (lines counted before "
                                         f"reading); the limit is {options.max_epochs} epochs",
                                         {"field": "counts", "values": [n_rows, options.max_epochs]})], source=source)
    try:
        table = _read_table(_body_buffer(data, text, pos, profile), sep, decimal, roles, as_text, tz)
    except pa.ArrowInvalid as exc:
        msg = str(exc).strip().splitlines()[0]
        hit = re.search(r"Row #(\d+)", msg)
        row = n_pre + (int(hit.group(1)) if hit else 1)
        raise InvalidNightError([*problems, Problem("malformed_csv", f"line {row} does not match the {sep!r}-"
                                                    f"delimited header: {msg}", {"row": row})],
                                source=source) from None
    try:
        return night_from_table(table, meta, roles, participant_id=participant_id, options=options, profile=profile,
                                source=source, row0=n_pre + 2, first_tz=first_tz, problems=problems)
    except InvalidNightError as exc:  # give file lines for problems located by epoch
        for i, p in enumerate(exc.problems):
            if "epoch" in p.location and "row" not in p.location:
                exc.problems[i] = Problem(p.code, p.message, {**p.location, "row": n_pre + 2 + p.location["epoch"]})
        raise


def _body_buffer(data: bytes | str, text: str, pos: int, profile: ImportProfile | None) -> pa.Buffer:
    """The file from ``text[pos:]`` on as UTF-8 for Arrow: a view of ``data`` when that is UTF-8 bytes, else encoded."""
    import pyarrow as pa

    if isinstance(data, bytes) and codecs.lookup(profile.encoding if profile is not None else "utf-8").name \
            in ("utf-8", "utf-8-sig"):  # decode_text checked the bytes and dropped one byte-order mark
        start = len(text[:pos].encode()) + (len(codecs.BOM_UTF8) if data.startswith(codecs.BOM_UTF8) else 0)
        return pa.py_buffer(memoryview(data)[start:])
    return pa.py_buffer(text[pos:].encode())


def _read_table(buffer: pa.Buffer, sep: str, decimal: str, roles: ColumnRoles, as_text: bool,
                tz: str | None) -> pa.Table:
    """The used columns of a CSV body, typed when they convert, else as found (for the checks to locate).

    ``as_text``: the times are read as text (a format or a date column is given).

    Raises
    ------
    pyarrow.ArrowInvalid
        When a line does not fit the header.
    """
    import pyarrow as pa

    time_type = pa.string() if as_text else pa.timestamp("s") if tz is not None else pa.timestamp("s", tz="UTC")
    coded = pa.dictionary(pa.int32(), pa.string())  # a reference or date column holds few distinct values
    fast = {roles.time: time_type, roles.counts: pa.float64(), roles.reference: coded, roles.date: coded}
    used = roles.used()
    try:  # typed read first: the usual file converts without type inference
        return _read_arrow_csv(buffer, sep, decimal, {n: fast[n] for n in used}, used, stream=True)
    except pa.ArrowInvalid:  # something does not convert: read as found, so the checks can locate it
        slow = {roles.time: pa.string(), roles.reference: pa.string(), roles.date: pa.string()}
        return _read_arrow_csv(buffer, sep, decimal, {n: t for n, t in slow.items() if n is not None}, used)


def _read_arrow_csv(buffer: pa.Buffer, sep: str, decimal: str, column_types: dict[str, pa.DataType],
                    columns: list[str], *, stream: bool = False) -> pa.Table:
    """The ``columns`` of a CSV body (header first), with the given types and the rest inferred.

    ``stream`` reads with Arrow's streaming reader, a little faster when every column's type is
    given (it infers types from the first block only, so it is not used to infer them).
    """
    import pyarrow.csv as pacsv

    # one block for the whole body: Arrow's default 1 MB block costs a night more in set-up than in parsing
    read_options = pacsv.ReadOptions(use_threads=False, block_size=max(buffer.size + 1, 1 << 14))
    parse_options = pacsv.ParseOptions(delimiter=sep)
    convert_options = pacsv.ConvertOptions(decimal_point=decimal, strings_can_be_null=True, check_utf8=False,
                                           column_types=column_types, include_columns=columns)  # UTF-8 already
    if stream:
        return pacsv.open_csv(buffer, read_options=read_options, parse_options=parse_options,
                              convert_options=convert_options).read_all()
    return pacsv.read_csv(buffer, read_options=read_options, parse_options=parse_options,
                          convert_options=convert_options)


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
                       source: str | None = None, profile: ImportProfile | None = None) -> Night:
    """Night from Parquet bytes (columns as CSV; lights/label in metadata key ``nightbank``).

    Of a ``profile`` the columns, ``datetime_format`` (for times stored as text), ``tz``,
    ``stage_codes`` and ``ignore_columns`` apply; the other fields describe text files.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        parquet = pq.ParquetFile(io.BytesIO(data))
        too_large = parquet_bounds_problem(parquet.metadata, options.max_epochs)
        if too_large is not None:
            raise InvalidNightError([too_large], source=source)
        table = parquet.read()
    except (pa.ArrowException, OSError) as exc:
        raise InvalidNightError([Problem("malformed_parquet", f"not a readable Parquet file: {exc}", {})],
                                source=source) from None
    raw_meta = (table.schema.metadata or {}).get(b"nightbank", b"{}")
    meta, _ = load_json(raw_meta.decode("utf-8", "replace"))  # unreadable metadata: no lights, no label
    problems: list[Problem] = []
    roles = find_columns(table.column_names, options, profile, 0, problems)
    first_tz = getattr(table.schema.field(roles.time).type, "tz", None) if roles.time is not None else None
    return night_from_table(table, meta if isinstance(meta, dict) else {}, roles, participant_id=participant_id,
                            options=options, profile=profile, source=source, row0=0, first_tz=first_tz,
                            problems=problems)


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
