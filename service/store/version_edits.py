"""Edits to model versions after they were stored: a participant rename carried into their records,
and a deleted night taken out of them.

Both run in the caller's write transaction and raise the ``revision`` of every version they
rewrite, so each process's caches of the version's metadata and model (keyed by ``uid`` and
``revision``) read the new records. The model bytes (the booster) never change.

- :func:`rename_in_versions`: every record of the study's versions that names a participant id
  (training, flagged and held-out night lists, night metrics, pooled participants, offsets and
  descriptors, the model's own metadata, the fold models' left-out participants) names the new id.
  In a merge the target keeps its own pooled offset and descriptors where it has them.
- :func:`forget_deleted_night`: the deleted night's held-out predictions (its epochs' P(sleep),
  calls, reference, parameter intervals) and night-metric rows leave every version that held
  them; the held-out figures (``metrics``, ``metrics_with_offset``, ``selection``) are computed
  again over the nights left (mean and SD, ddof=1, as at training) and the night id is listed in
  ``removed_held_out_nights``. Versions trained on a content no night of the study has any more
  list the night in ``trained_on_deleted_nights``. The activation record stays as decided.
"""

from __future__ import annotations

import math
import statistics
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session, undefer

from models import HeldOutNight

from . import db
from .codec import decode_held_out, encode_held_out
from .snapshots import StudyInfo
from .versions import row_metadata, stored_hashes

__all__ = ["forget_deleted_night", "rename_in_versions"]


def _study_rows(session: Session, study: StudyInfo) -> list[db.ModelVersion]:
    """The study's versions with the records edited here, locked until the transaction ends (PostgreSQL:
    two deletions in one study rewrite a pooled version one after the other, neither undoing the other)."""
    return list(session.scalars(select(db.ModelVersion).where(db.ModelVersion.study_pk == study.pk)
                                .options(undefer(db.ModelVersion.info), undefer(db.ModelVersion.model_meta),
                                         undefer(db.ModelVersion.held_out))
                                .order_by(db.ModelVersion.pk).with_for_update()
                                .execution_options(populate_existing=True)))  # rows read before: as locked


def _renamed_keys(values: Mapping[str, Any], old: str, new: str) -> dict[str, Any]:
    """``values`` with key ``old`` as ``new`` (an existing ``new`` keeps its value)."""
    out = {k: v for k, v in values.items() if k != old}
    out.setdefault(new, values[old])
    return out


def _renamed_info(info: Mapping[str, Any], old: str, new: str) -> dict[str, Any] | None:
    """A version's metadata JSON with participant ``old`` named ``new``; None if it never names ``old``."""
    out, changed = dict(info), False
    for key in ("training_nights", "flagged_nights", "night_metrics"):
        items = list(out.get(key) or ())
        if any(isinstance(i, Mapping) and i.get("participant_id") == old for i in items):
            out[key] = [dict(i, participant_id=new) if isinstance(i, Mapping) and i.get("participant_id") == old
                        else i for i in items]
            changed = True
    if old in (out.get("participants") or ()):
        out["participants"] = sorted({new if p == old else p for p in out["participants"]})
        changed = True
    for key in ("offsets", "descriptors"):
        if isinstance(found := out.get(key), Mapping) and old in found:
            out[key] = _renamed_keys(found, old, new)
            changed = True
    return out if changed else None


def _renamed_model_meta(meta: Mapping[str, Any], old: str, new: str) -> dict[str, Any] | None:
    """A model's JSON metadata (:func:`models.model_to_bytes`) naming ``new`` for ``old``; None if unchanged."""
    out, changed = dict(meta), False
    if out.get("participant_id") == old:
        out["participant_id"], changed = new, True
    info = out.get("info")
    if isinstance(info, Mapping) and old in (info.get("validation_participants") or ()):
        ids = [new if p == old else p for p in info["validation_participants"]]
        out["info"], changed = dict(info, validation_participants=list(dict.fromkeys(ids))), True
    return out if changed else None


def _rewritten_held_out(blob: bytes | None, keep: Callable[[HeldOutNight], HeldOutNight | None]) -> bytes | None:
    """``blob`` re-encoded with ``keep(h)`` for each held-out night (None drops it); None if unchanged."""
    if blob is None:
        return None
    held = decode_held_out(blob)
    kept = [k for h in held if (k := keep(h)) is not None]
    if len(kept) == len(held) and all(k is h for k, h in zip(kept, held, strict=True)):
        return None
    return encode_held_out(kept)


def rename_in_versions(session: Session, *, study: StudyInfo, previous_id: str, to: str) -> int:
    """Carry the rename of participant ``previous_id`` to ``to`` into every stored version of the study.

    Returns
    -------
    int
        Versions rewritten (each one's ``revision`` raised once).
    """
    n = 0
    for row in _study_rows(session, study):
        changed = False
        if (info := _renamed_info(row.info or {}, previous_id, to)) is not None:
            row.info, changed = info, True
        if (meta := _renamed_model_meta(row.model_meta or {}, previous_id, to)) is not None:
            row.model_meta, changed = meta, True
        held = _rewritten_held_out(row.held_out, lambda h: replace(h, participant_id=to)
                                   if h.participant_id == previous_id else h)
        if held is not None:
            row.held_out, changed = held, True
        for fold in session.scalars(select(db.PooledFoldModel).where(db.PooledFoldModel.version_pk == row.pk)):
            if previous_id in fold.participants:
                fold.participants = sorted({to if p == previous_id else p for p in fold.participants})
                changed = True
            if (meta := _renamed_model_meta(fold.model_meta or {}, previous_id, to)) is not None:
                fold.model_meta, changed = meta, True
        if changed:
            row.revision = (row.revision or 0) + 1
            n += 1
    session.flush()
    return n


def _figures(rows: list[Mapping[str, Any]], template: Mapping[str, Any] | None) -> dict[str, Any] | None:
    """Held-out figures (the flat :class:`~service.store.metadata.HeldOutFigures` form) of night-metric
    rows, for the metrics ``template`` has: mean and SD (ddof=1) over the nights with a value."""
    if template is None:
        return None
    out: dict[str, Any] = {"n_nights": 0}
    for name in (k for k, v in template.items() if k != "n_nights" and isinstance(v, Mapping)):
        values = [float(v) for r in rows if isinstance(v := r.get(name), int | float) and math.isfinite(v)]
        out["n_nights"] = max(out["n_nights"], len(values))
        out[name] = {"mean": statistics.fmean(values) if values else None,
                     "sd": statistics.stdev(values) if len(values) > 1 else None}
    return out


def _info_without(info: Mapping[str, Any], *, kind: str, gone: Callable[[Any], bool],
                  night_id: str) -> dict[str, Any]:
    """A version's metadata JSON without the night's metric rows, its held-out figures computed again."""
    rows = [r for r in info.get("night_metrics") or () if isinstance(r, Mapping) and not gone(r)]
    out = dict(info, night_metrics=rows)
    if kind == "pooled":
        out["metrics"] = _figures([r for r in rows if r.get("method") == "pooled"], info.get("metrics") or {})
        out["metrics_with_offset"] = _figures([r for r in rows if r.get("method") == "pooled+offset"],
                                              info.get("metrics_with_offset"))
    else:
        out["metrics"] = _figures(rows, info.get("metrics") or {})
    if isinstance(selection := info.get("selection"), Mapping):
        found = (out["metrics"] or {}).get(str(selection.get("metric")))
        out["selection"] = dict(selection, value=None if found is None else found["mean"])
    out["removed_held_out_nights"] = [*(info.get("removed_held_out_nights") or ()), night_id]
    return out


@dataclass(frozen=True)
class _NightMatch:
    """Whether a held-out row is of the deleted night: its content (rows stored without ``night_hash``:
    its label or short hash as ``night_id``), and of ``participant_id`` unless that is None."""

    content_hash: str
    label: str | None
    participant_id: str | None

    def __call__(self, participant_id: Any, night_hash: Any, night_id: Any = None) -> bool:
        same = night_hash == self.content_hash or (
            night_hash is None and night_id in (self.label, self.content_hash[:12]))
        return same and self.participant_id in (None, participant_id)

    def keep(self, held: HeldOutNight) -> HeldOutNight | None:
        """``held`` unless it is of the night."""
        return None if self(held.participant_id, held.night_hash) else held

    def row(self, record: Any) -> bool:
        """For a night-metric record (a dict)."""
        return isinstance(record, Mapping) and self(record.get("participant_id"), record.get("night_hash"),
                                                    record.get("night_id"))


def forget_deleted_night(session: Session, *, study: StudyInfo, participant_pk: int, participant_id: str,
                         content_hash: str, night_id: str, label: str | None) -> list[dict[str, Any]]:
    """Take a deleted night out of the study's stored versions (call after deleting its row).

    A version of the participant loses its held-out rows of this content; a pooled version those
    of this participant and content. A version is marked trained on the deleted night only if no
    night of the study has the content any more (another participant's copy keeps it stored).

    Returns
    -------
    changed : list of dict
        ``kind``, ``version``, ``participant_pk`` (None for pooled), ``marked`` (listed in
        ``trained_on_deleted_nights``) and ``held_out_removed`` of each version changed.
    """
    still_stored = bool(stored_hashes(session, study.pk, {content_hash}))
    changed = []
    for row in _study_rows(session, study):
        marked = not still_stored and content_hash in row_metadata(row).training_hashes
        removed = False
        if row.participant_pk in (participant_pk, None):  # only these held the participant's nights out
            gone = _NightMatch(content_hash, label, None if row.participant_pk == participant_pk else participant_id)
            held = _rewritten_held_out(row.held_out, gone.keep)
            info = row.info or {}
            removed = held is not None or any(gone.row(r) for r in info.get("night_metrics") or ())
            if removed:
                row.held_out = row.held_out if held is None else held
                row.info = _info_without(info, kind=row.kind, night_id=night_id, gone=gone.row)
                row.revision = (row.revision or 0) + 1
        if marked and night_id not in (listed := list(row.trained_on_deleted_nights or [])):
            row.trained_on_deleted_nights = [*listed, night_id]
        if marked or removed:
            changed.append({"kind": row.kind, "version": row.version, "participant_pk": row.participant_pk,
                            "marked": marked, "held_out_removed": removed})
    session.flush()
    return changed
