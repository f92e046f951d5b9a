"""Reading and writing nights: nightbank JSON, CSV and Parquet.

JSON (nightbank's own format, also the HTTP body)::

    {"epoch_seconds": 30, "start": "2031-03-02T22:41:00+01:00", "counts": [0, 12, ...],
     "reference": ["W", "N1", ...], "lights_off": "...", "lights_on": "...", "label": "night-07"}

``reference``, ``lights_off``, ``lights_on`` and ``label`` are optional.

CSV: a header row, then one row per epoch with a time column, a counts column and an optional
reference column. The delimiter (comma, semicolon, tab or bar) is sniffed from the header and a
decimal comma is accepted with semicolon or tab delimiters. Columns are found by the aliases in
:data:`~models.nights.columns.COLUMN_ALIASES` (case-insensitive, a trailing unit such as
``[counts]`` ignored) or named explicitly. Every other column is kept by name in
``Night.unused_columns``; one that looks like a second reference is refused
(:mod:`models.nights.columns`). The epoch length is inferred from the timestamps, which must be
regular. Timestamps are strict ISO 8601 (:mod:`models.nights.timestamps`) and carry their UTC offset
or are localised with ``NightOptions.tz``; dates must lie in the plausible range. Optional leading
lines ``# key: value`` carry ``lights_off``, ``lights_on`` and ``label``.

An :class:`~models.nights.profiles.ImportProfile` (keyword ``profile`` of every reader) describes a
lab's own export instead: preamble lines, delimiter, decimal mark, encoding, the header of each
role (a date column and a time-of-day column may be given apart), a ``strftime`` time format, the
zone of naive times, the reference's own stage codes and the columns to ignore.
:func:`~models.nights.profile_guess.guess_profile` proposes one from a sample.

Parquet: the same columns; lights and label in the file's key-value metadata under ``nightbank``.

Every reader returns a valid :class:`~models.nights.night.Night` or raises
:class:`~models.errors.InvalidNightError` listing every problem.
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

from .checks import NightOptions
from .json_io import night_from_json
from .night import Night
from .profiles import ImportProfile
from .tabular import night_from_csv, night_from_parquet

__all__ = ["FORMATS", "detect_format", "read_night"]

#: formats a night file may have
FORMATS = ("json", "csv", "parquet")


def detect_format(name: str | None, data: bytes) -> str:
    """Format from a file name's suffix, else from the first bytes."""
    suffix = Path(name).suffix.lower().lstrip(".") if name else ""
    if suffix in FORMATS:
        return suffix
    if data[:4] == b"PAR1":
        return "parquet"
    head = data.lstrip(b"\xef\xbb\xbf \t\r\n")[:1]
    return "json" if head in (b"{", b"[") else "csv"


def read_night(path: str | Path, *, participant_id: str = "", options: NightOptions = NightOptions(),
               fmt: str | None = None, profile: ImportProfile | None = None) -> Night:
    """Read one night file (format from ``fmt`` or the suffix/content).

    Parameters
    ----------
    path : str or Path
    participant_id : str, default=""
    options : NightOptions
    fmt : {"json", "csv", "parquet"}, optional
        Format; by default from the suffix, else the content.
    profile : ImportProfile, optional
        The export's layout, passed to the reader (see each reader for the fields that apply).

    Returns
    -------
    Night
        With :attr:`~models.nights.night.Night.source_name` the file's name and, when the file
        gives no label, the file's stem as :attr:`~models.nights.night.Night.label`.
    """
    path = Path(path)
    data = path.read_bytes()
    fmt = fmt or detect_format(path.name, data)
    reader = {"json": night_from_json, "csv": night_from_csv, "parquet": night_from_parquet}[fmt]
    night = reader(data, participant_id=participant_id, options=options, source=str(path), profile=profile)
    return night if night.label is not None else replace(night, label=path.stem)
