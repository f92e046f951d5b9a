"""The fold models of pooled versions, and the pooled models a personal training starts from.

A pooled version stores, beside its final model, the model of each leave-participants-out fold
(``pooled_fold_models``: XGBoost UBJSON bytes plus JSON metadata, as the version's own model; no
pickle) with the ids of the participants it never saw. A personal training starts from the
study's *active* pooled version (:func:`pooled_base`): the deployed personal model continues its
final model, the held-out evaluation the fold model that left the participant out. A participant
the final model never saw (none of their nights among its training nights) is evaluated from the
final model too. Without an active pooled version, or when none of its models is free of the
participant (a version stored before fold models were kept), the training starts from scratch
and the returned note says why.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from models import (
    FeatureConfig,
    FeatureSource,
    Night,
    PooledBase,
    SleepModel,
    model_from_bytes,
    model_to_bytes,
    participant_descriptors,
)

from . import db
from .snapshots import StudyInfo
from .versions import VersionInfo, active_version, load_model

__all__ = ["PooledStart", "add_fold_models", "load_fold_models", "pooled_base", "usable_start"]


@dataclass(frozen=True)
class PooledStart:
    """Where a personal training starts: ``base`` (None = from scratch) and a JSON-able note.

    ``note`` holds ``start_from`` (``"pooled"`` or ``"scratch"``), ``pooled_version`` (or None),
    ``held_out_from`` (``"fold <k>"`` or ``"final"``, or None) and ``reason``.
    """

    base: PooledBase | None
    note: dict[str, Any]

    def metadata(self, model: SleepModel, *, participant_id: str,
                 hyperparameters: Mapping[str, Any]) -> dict[str, Any]:
        """``ModelMetadata`` fields of a personal version trained from here: the hyperparameters plus
        ``start`` (the model's own: ``pooled`` or ``scratch``, as its inner loop chose), ``added_rounds``,
        ``start_from``, ``pooled_version``, ``held_out_from``, ``start_reason``; and the descriptors a
        pooled-start model reads (scoring passes them)."""
        def finite(v: float) -> float | None:
            return None if math.isnan(v) else float(v)
        extra = {"start": model.info_.get("start", "scratch"), "added_rounds": model.info_.get("added_rounds"),
                 "start_from": self.note["start_from"], "pooled_version": self.note["pooled_version"],
                 "held_out_from": self.note["held_out_from"], "start_reason": self.note["reason"]}
        descriptors = ({participant_id: {k: finite(v) for k, v in self.base.descriptors.items()}}
                       if self.base is not None and model.descriptor_names_ else {})
        return {"hyperparameters": dict(hyperparameters) | extra, "descriptors": descriptors}


def add_fold_models(session: Session, *, version: VersionInfo, fold_models: Mapping[int, SleepModel],
                    folds: Mapping[str, int]) -> None:
    """Store the fold models of a pooled version (in the caller's transaction).

    Parameters
    ----------
    version : VersionInfo
        The pooled version just stored.
    fold_models : mapping of int to SleepModel
        ``PooledResult.fold_models``.
    folds : mapping of str to int
        ``PooledResult.folds``: each participant's fold.
    """
    for fold, model in sorted(fold_models.items()):
        booster, meta = model_to_bytes(model)
        left_out = sorted(pid for pid, k in folds.items() if k == fold)
        session.add(db.PooledFoldModel(version_pk=version.pk, fold=fold, participants=left_out, booster=booster,
                                       model_meta=meta))
    session.flush()


def load_fold_models(session: Session, version: VersionInfo) -> list[tuple[int, list[str], SleepModel]]:
    """The stored fold models of a version: (fold, participants left out, model), by fold."""
    rows = session.scalars(select(db.PooledFoldModel).where(db.PooledFoldModel.version_pk == version.pk)
                           .order_by(db.PooledFoldModel.fold))
    return [(row.fold, list(row.participants), model_from_bytes(row.booster, row.model_meta)) for row in rows]


def pooled_base(session: Session, *, study: StudyInfo, participant_id: str,
                nights: Sequence[Night]) -> PooledStart:
    """The pooled models a personal training of ``participant_id`` starts from.

    Parameters
    ----------
    study : StudyInfo
    participant_id : str
    nights : sequence of Night
        All the participant's stored nights (descriptors of a participant the version has none of,
        and the check that the held-out model never trained on any of them).

    Returns
    -------
    PooledStart
    """
    version = active_version(session, study=study, participant=None)
    if version is None:
        return PooledStart(None, {"start_from": "scratch", "pooled_version": None, "held_out_from": None,
                                  "reason": "the study has no active pooled version"})
    final = load_model(session, version)
    mine = {n.content_hash for n in nights}
    candidates: list[tuple[str, SleepModel]] = []
    for fold, left_out, model in load_fold_models(session, version):
        if participant_id in left_out:
            candidates.insert(0, (f"fold {fold}", model))
    candidates.append(("final", final))
    held_from, held_out = next(((name, m) for name, m in candidates if not mine & set(m.training_nights_)),
                               (None, None))
    if held_out is None:
        return PooledStart(None, {"start_from": "scratch", "pooled_version": version.version, "held_out_from": None,
                                  "reason": f"pooled version {version.version} has no stored model that never saw "
                                            "this participant (stored before fold models were kept)"})
    stored = version.metadata.descriptors.get(participant_id)
    descriptors = ({k: float("nan") if v is None else float(v) for k, v in stored.items()} if stored
                   else participant_descriptors(list(nights)))
    return PooledStart(PooledBase(final=final, held_out=held_out, descriptors=descriptors),
                       {"start_from": "pooled", "pooled_version": version.version, "held_out_from": held_from,
                        "reason": f"started from active pooled version {version.version}; held-out nights from its "
                                  f"{held_from} model, which never saw this participant"})


def usable_start(start: PooledStart, *, features: FeatureSource, nights: Sequence[Night],
                 config: FeatureConfig) -> PooledStart:
    """``start``, or from scratch (with the reason) when its pooled models read another feature set.

    Parameters
    ----------
    start : PooledStart
    features : FeatureSource
        The training's night features.
    nights : sequence of Night
        The training nights.
    config : FeatureConfig
        The training's feature set.
    """
    if start.base is None or not nights:
        return start
    matrix = features.lookup(nights[0], config)
    final = start.base.final
    if final.feature_config_ == config and matrix is not None and matrix.version == final.feature_version_:
        return start
    return PooledStart(None, start.note | {
        "start_from": "scratch", "held_out_from": None,
        "reason": f"pooled version {start.note['pooled_version']} reads feature set {final.feature_version_}, "
                  "not this training's; train the pooled model again to start from it"})
