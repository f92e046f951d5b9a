"""nightbank JSON nights: reading (with full validation) and writing (format in :mod:`models.nights.formats`)."""

from __future__ import annotations

from typing import Any, cast

import numpy as np

from ..errors import InvalidNightError, Problem
from ._decoding import decode_json, finish_night, metadata_fields, parse_time
from ._table import file_name
from .checks import NightOptions, validate_night_fields
from .night import Night
from .profiles import ImportProfile

__all__ = ["night_from_json", "night_to_json"]

_JSON_FIELDS = {"epoch_seconds", "start", "counts", "reference", "lights_off", "lights_on", "label"}


def night_from_json(data: bytes | str | dict[str, object], *, participant_id: str = "",
                    options: NightOptions = NightOptions(), source: str | None = None,
                    profile: ImportProfile | None = None) -> Night:
    """Night from nightbank JSON (bytes, text or an already decoded object).

    Of a ``profile`` only ``stage_codes`` (applied to the reference labels) and ``tz`` (for times
    without an offset; ``options.tz`` overrides it) apply. The file name of ``source`` is kept as
    :attr:`Night.source_name <models.nights.night.Night.source_name>`.
    """
    obj = data if isinstance(data, dict) else decode_json(data, source)
    if not isinstance(obj, dict):
        raise InvalidNightError([Problem("malformed_json", f"the top level must be an object, got "
                                         f"{type(obj).__name__}", {"field": "$"})], source=source)
    obj = cast(dict[str, object], obj)  # JSON object keys are text
    problems: list[Problem] = []
    for key in sorted(set(obj) - _JSON_FIELDS):
        problems.append(Problem("unknown_field", f"unknown field {key!r}; allowed: {sorted(_JSON_FIELDS)}",
                                {"field": key}))
    for key in ("epoch_seconds", "start", "counts"):
        if key not in obj:
            problems.append(Problem("missing_field", f"required field {key!r} is missing", {"field": key}))
    counts = obj.get("counts")
    if counts is not None and not isinstance(counts, list):
        problems.append(Problem("invalid_field", f"counts must be a list of numbers, got {type(counts).__name__}",
                                {"field": "counts"}))
        counts = None
    if counts is not None and options.fill_gaps and any(c is None for c in counts):
        counts = [np.nan if c is None else c for c in counts]
    reference = obj.get("reference")
    if reference is not None and not isinstance(reference, list):
        problems.append(Problem("invalid_field", f"reference must be a list of labels, got "
                                f"{type(reference).__name__}", {"field": "reference"}))
        reference = None
    if reference is not None and profile is not None and profile.stage_codes:
        reference = [_mapped(profile, label) for label in reference]
    tz = options.tz if options.tz is not None else (profile.tz if profile is not None else None)
    start = parse_time(obj["start"], "start", tz, problems) if "start" in obj else None
    meta = metadata_fields(obj, tz, problems)
    night = validate_night_fields(participant_id=participant_id, start=start,
                                  epoch_seconds=obj.get("epoch_seconds", 30), counts=counts, reference=reference,
                                  options=options, problems=problems, source=source, source_name=file_name(source),
                                  **meta)
    return finish_night(night, options)


def _mapped(profile: ImportProfile, label: object) -> object:
    if label is None or isinstance(label, (bool, dict, list)):
        return label
    hit = profile.stage_code(label)
    if hit is None and isinstance(label, float) and label.is_integer():  # 1.0 written for the code 1
        hit = profile.stage_code(int(label))
    return label if hit is None else hit


def night_to_json(night: Night) -> dict[str, Any]:
    """nightbank JSON object of a night (missing epochs as ``null`` counts)."""
    counts = night.counts
    as_int = np.all(np.isnan(counts) | (counts == np.round(counts)))
    values = [None if np.isnan(c) else (int(c) if as_int else float(c)) for c in counts.tolist()]
    out: dict[str, Any] = {"epoch_seconds": night.epoch_seconds, "start": night.start.isoformat(), "counts": values}
    if night.reference is not None:
        out["reference"] = night.reference.tolist()
    for key in ("lights_off", "lights_on"):
        if getattr(night, key) is not None:
            out[key] = getattr(night, key).isoformat()
    if night.label is not None:
        out["label"] = night.label
    return out
