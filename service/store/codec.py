"""Compact storage of a night's arrays, and of the held-out predictions kept with a model version.

Counts are stored as zlib-compressed little-endian float64 bytes (NaN kept for filled gaps), so
the rebuilt :class:`models.Night` has the same content hash as the one posted; reference labels
as zlib-compressed text, one canonical code per epoch separated by ``\\x1f``. Held-out
predictions (:class:`models.HeldOutNight`) are a compressed NumPy archive read without pickle:
one JSON entry with the scalar fields (and the night's parameter intervals, NaN as null), and the
arrays of each night.
"""

from __future__ import annotations

import io
import json
import re
import zipfile
import zlib
from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd

from models import HeldOutNight, Night, NightIntervals, json_record

from . import db

__all__ = ["decode_counts", "decode_held_out", "decode_reference", "encode_counts", "encode_held_out",
           "encode_reference", "night_columns", "night_from_row"]

_SEP = "\x1f"


def encode_counts(counts: np.ndarray) -> bytes:
    """Counts of shape (n_epochs,) -> compressed bytes."""
    return zlib.compress(np.ascontiguousarray(counts, dtype="<f8").tobytes(), 1)


def decode_counts(blob: bytes) -> np.ndarray:
    """Compressed bytes -> counts, float64 of shape (n_epochs,)."""
    return np.frombuffer(zlib.decompress(blob), dtype="<f8").astype(np.float64)


def encode_reference(reference: np.ndarray) -> bytes:
    """Canonical stage codes of shape (n_epochs,) -> compressed bytes."""
    return zlib.compress(_SEP.join(reference.tolist()).encode(), 1)


def decode_reference(blob: bytes) -> np.ndarray:
    """Compressed bytes -> canonical stage codes of shape (n_epochs,)."""
    return np.array(zlib.decompress(blob).decode().split(_SEP), dtype="<U3")


def _iso(ts: pd.Timestamp | None) -> str | None:
    return None if ts is None else pd.Timestamp(ts).isoformat()


def night_columns(night: Night) -> dict[str, Any]:
    """Column values of a ``nights`` row for ``night`` (arrays encoded)."""
    return {
        "content_hash": night.content_hash,
        "night_id": night.night_id,
        "label": night.label,
        "start": _iso(night.start),
        "start_utc": night.start.tz_convert("UTC").to_pydatetime(),
        "end_utc": night.end.tz_convert("UTC").to_pydatetime(),
        "epoch_seconds": int(night.epoch_seconds),
        "n_epochs": night.n_epochs,
        "lights_off": _iso(night.lights_off),
        "lights_on": _iso(night.lights_on),
        "labelled": night.has_reference,
        "counts": encode_counts(night.counts),
        "reference": None if night.reference is None else encode_reference(night.reference),
    }


def night_from_row(row: db.Night, *, participant_id: str) -> Night:
    """Rebuild the :class:`models.Night` stored in ``row`` (a night of a recording from the recording's epochs)."""
    def ts(text: str | None) -> pd.Timestamp | None:
        return None if text is None else pd.Timestamp(text)

    reference = None if row.reference is None else decode_reference(row.reference)
    if row.recording_pk is not None:
        from .recording_codec import view_night

        return view_night(row, participant_id=participant_id, reference=reference)
    return Night(participant_id=participant_id, start=pd.Timestamp(row.start), epoch_seconds=row.epoch_seconds,
                 counts=decode_counts(row.counts), reference=reference,
                 lights_off=ts(row.lights_off), lights_on=ts(row.lights_on), label=row.label)


_ARRAYS = ("p_sleep", "sleep", "reference", "margin")


def encode_held_out(nights: Sequence[HeldOutNight]) -> bytes:
    """Held-out predictions -> bytes (``np.savez_compressed``, no object arrays)."""
    meta = [{"participant_id": h.participant_id, "night_hash": h.night_hash, "label": h.label, "method": h.method,
             "in_bed": [int(h.in_bed[0]), int(h.in_bed[1])], "threshold": float(h.threshold),
             "offset": float(h.offset),
             "intervals": None if h.intervals is None else json_record(h.intervals.to_dict())} for h in nights]
    arrays: dict[str, np.ndarray] = {"meta": np.frombuffer(json.dumps(meta).encode(), dtype=np.uint8)}
    for i, h in enumerate(nights):
        for name in _ARRAYS:
            value = getattr(h, name)
            if value is not None:
                arrays[f"{i}.{name}"] = np.asarray(value)
    buffer = io.BytesIO()
    np.savez_compressed(buffer, **arrays)  # type: ignore[arg-type]  # the stub reads the names as options
    return buffer.getvalue()


def _nan(value: Any) -> float:
    return float("nan") if value is None else float(value)


def _intervals(stored: dict[str, Any] | None) -> NightIntervals | None:
    """The :class:`models.NightIntervals` of a held-out entry (None for models without decoding)."""
    if stored is None:
        return None
    return NightIntervals(level=float(stored["level"]),
                          intervals={k: [_nan(v[0]), _nan(v[1])] for k, v in stored["intervals"].items()},
                          median={k: _nan(v) for k, v in stored["median"].items()},
                          expected_abs_error={k: _nan(v) for k, v in stored["expected_abs_error"].items()},
                          uncertainty_min=_nan(stored["uncertainty_min"]), n_paths=int(stored["n_paths"]))


_NPY_HEADER = re.compile(r"\{'descr': '([<>|=][a-z]\d+|\|b1)', 'fortran_order': False, 'shape': \(([0-9, ]*)\), \} *\n")


def _npy(data: bytes) -> np.ndarray:
    """One ``.npy`` member: the plain headers ``np.save`` writes are read with a pattern (no ``ast``
    evaluation per array); anything else goes through :func:`numpy.lib.format.read_array`."""
    if data[:6] == b"\x93NUMPY" and data[6] in (1, 2, 3):
        start = 10 if data[6] == 1 else 12
        size = int.from_bytes(data[8:start], "little")
        found = _NPY_HEADER.fullmatch(data[start:start + size].decode("latin1"))
        if found is not None:
            shape = tuple(int(v) for v in found.group(2).replace(" ", "").split(",") if v)
            dtype = np.dtype(found.group(1))
            if dtype.kind in "biuf":
                count = int(np.prod(shape)) if shape else 1
                return np.frombuffer(data, dtype=dtype, count=count, offset=start + size).reshape(shape).copy()
    return np.lib.format.read_array(io.BytesIO(data), allow_pickle=False)  # type: ignore[no-any-return]


def _npz(blob: bytes) -> dict[str, np.ndarray]:
    """Every array of an ``np.savez`` archive by name (what ``np.load(...)[name]`` gives)."""
    with zipfile.ZipFile(io.BytesIO(blob)) as archive:
        return {name.removesuffix(".npy"): _npy(archive.read(name)) for name in archive.namelist()}


def decode_held_out(blob: bytes) -> list[HeldOutNight]:
    """Bytes from :func:`encode_held_out` -> held-out predictions."""
    archive = _npz(blob)
    meta = json.loads(archive["meta"].tobytes())
    out = []
    for i, m in enumerate(meta):
        arrays: dict[str, Any] = {name: archive.get(f"{i}.{name}") for name in _ARRAYS}
        out.append(HeldOutNight(participant_id=m["participant_id"], night_hash=m["night_hash"], label=m["label"],
                                method=m["method"], in_bed=(m["in_bed"][0], m["in_bed"][1]),
                                threshold=m["threshold"], offset=m["offset"],
                                intervals=_intervals(m.get("intervals")), **arrays))
    return out
