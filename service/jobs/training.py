"""Training jobs: load nights from the registry, call :mod:`models` training, store a version.

The worker calls :func:`run_training_job`; the science (tuning, nested validation, offsets, the
personal-versus-pooled choice) is all in :mod:`models`. This module only moves data between the
database and those functions and writes the registry record of the new version.

Nights excluded from training (``nights.excluded``, set through the API) are not loaded for
either training; every version records the nights it was trained on (``training_nights`` with
their content hashes), which is what marks a version when one of them is deleted later, and
those of them that carry a QC code of :data:`TRAINING_WARNING_CODES` (``flagged_nights``: a
reference stored although it looked implausible), which its answer and card then warn about.

Training gets its night features from the database (:mod:`service.store.features`): the stored
matrices are loaded in bulk and the missing ones computed here and stored, before the training
call, which receives them as a :class:`models.PrecomputedFeatures` source and computes none.

The training call itself goes through a :data:`Compute` function: :func:`compute_here` runs it in
this process; an executor may run it elsewhere (a Dask cluster, where the features travel with
the nights in the call's arguments). The version is stored only if
the job is still held by the same claim (``attempts`` unchanged), so a worker whose lease was
taken over never adds a version; the version row holds its bytes, written in one transaction.
A job that already stored its version (its worker died before recording the outcome) returns
that version when claimed again instead of training twice.

A pooled version is stored with its fold models. A personal training starts from the study's
active pooled version (:mod:`service.store.pooled_bases`: the deployed model continues its final
model, the held-out nights the fold model that left the participant out), or from scratch without
one (or with another feature set); the version's hyperparameters and ``info_["start_note"]`` say which.

After storing a version the job prepares the study's review queue (:mod:`service.jobs.queue_warm`:
the nights without PSG scored with the models now active), so the reviewer's first queue page is
read from stored scorings (``Settings.prepare_review_queue``, on by default).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from typing import Any

import pandas as pd
from sqlalchemy import func, select
from sqlalchemy.orm import Session, sessionmaker

from models import (
    EPOCH_METRIC_NAMES,
    Night,
    Progress,
    TrainingConfig,
    choose_method,
    model_to_bytes,
    personal_studies,
    train_personal,
    train_pooled,
)

from ..config import Settings
from ..errors import Conflict, NotFound, Unprocessable
from ..store import db, pooled_bases, versions
from ..store.codec import encode_held_out
from ..store.db import session_scope
from ..store.metadata import FlaggedNight, HeldOutFigures, MetricSummary, ModelMetadata, Selection, TrainingNight
from ..store.protocols import protocol_info
from ..store.registry import (
    ParticipantInfo,
    StudyInfo,
    find_participant,
    find_study,
    load_nights,
    record_choice,
    study_participants,
)
from ..store.reviews import corrections_by_participant, participant_corrections
from .queue import JobInfo, enqueue_job
from .queue_warm import warm_review_queue
from .training_inputs import night_pks_of as _night_pks
from .training_inputs import training_features as _training_features

__all__ = ["TRAINING_WARNING_CODES", "Compute", "check_trainable", "compute_here", "queue_training",
           "refresh_choices", "run_training_job"]

#: QC codes of a night that a model trained on it carries into its version (``flagged_nights``)
#: and its card warns about: the night's reference was stored although it looked implausible.
TRAINING_WARNING_CODES: tuple[str, ...] = ("reference_implausible",)

#: compute(function, kwargs, progress) -> function(**kwargs) computed here or elsewhere; ``progress``
#: must be called as work advances (it raises to stop the job)
Compute = Callable[[Callable[..., Any], dict[str, Any], Progress], Any]


def compute_here(function: Callable[..., Any], kwargs: dict[str, Any], progress: Progress) -> Any:
    """Run ``function(**kwargs, progress=progress)`` in this process."""
    return function(**kwargs, progress=progress)


def _check_claim(session: Session, job: JobInfo) -> None:
    """Lock the job row and make sure this claim of it is still the current one.

    Raises
    ------
    Conflict
        With code ``lease_lost`` if the job finished or was claimed again meanwhile.
    """
    row = session.scalar(select(db.Job).where(db.Job.job_id == job.job_id).with_for_update())
    if row is None or row.state != "running" or row.attempts != job.attempts:
        raise Conflict("the lease of this training ran out and another worker took the job over; this result "
                       "was discarded", code="lease_lost")


def _config(job: JobInfo, settings: Settings, *, interval_level: float) -> TrainingConfig:
    """The job's training options; held-out intervals at the study protocol's ``interval_level``."""
    return TrainingConfig(n_trials=int(job.params.get("n_trials", settings.n_trials)),
                          seed=int(job.params.get("seed", 0)), n_jobs=settings.training_threads,
                          interval_level=interval_level)


def check_trainable(session: Session, *, participant: ParticipantInfo) -> None:
    """Refuse a personal training that cannot succeed (too few labelled nights).

    Nights are counted as training counts them (:func:`models.personal_studies`): labelled, not
    excluded, and overlapping copies of a night once. A count of the stored rows comes first; only
    when it reaches the minimum are the labelled nights loaded to count their groups.

    Raises
    ------
    Unprocessable
        With code ``too_few_labelled_nights``.
    """
    config = TrainingConfig()
    needed = config.min_personal_nights
    have = rows = session.scalar(select(func.count()).select_from(db.Night).where(
        db.Night.participant_pk == participant.pk, db.Night.labelled, db.Night.excluded.is_(False))) or 0
    if rows >= needed:
        have = personal_studies(load_nights(session, participant=participant, labelled_only=True,
                                            include_excluded=False), config)
    if have < needed:
        copies = (f" (of {rows} stored: overlapping copies of a night count once, a night without a scored "
                  "in-bed reference epoch not at all)" if have < rows else "")
        raise Unprocessable(f"a personal model needs {needed} labelled nights not excluded from training; "
                            f"participant {participant.participant_id!r} has {have}{copies}",
                            code="too_few_labelled_nights")


def queue_training(factory: sessionmaker[Session], *, study_id: str, participant_id: str | None,
                   params: dict[str, Any], actor: str) -> tuple[JobInfo, bool]:
    """Queue a personal (``participant_id`` given) or pooled training; the one way the API and pages do it.

    Returns the job and whether it was created (False: the one already queued or running).

    Raises
    ------
    NotFound
        If the study or participant does not exist.
    Unprocessable
        If a personal training has too few labelled nights (:func:`check_trainable`).
    """
    with session_scope(factory) as session:
        study = find_study(session, study_id)
        participant_pk = None
        if participant_id is not None:
            participant = find_participant(session, study, participant_id)
            check_trainable(session, participant=participant)
            participant_pk = participant.pk
        study_pk = study.pk
    return enqueue_job(factory, kind="pooled" if participant_id is None else "personal", study_pk=study_pk,
                       participant_pk=participant_pk, params=params, actor=actor, study_id=study_id,
                       subject=participant_id or "pooled")


def _finite(value: Any) -> float | None:
    try:
        value = float(value)
    except (TypeError, ValueError):
        return None
    return value if math.isfinite(value) else None


def _summary(table: pd.DataFrame) -> HeldOutFigures:
    """Held-out figures of a models summary table (index: metric; columns ``mean``, ``sd``, ``n_nights``)."""
    by_metric = {}
    for name in EPOCH_METRIC_NAMES:
        row = table.loc[name] if name in table.index else {"mean": None, "sd": None}
        by_metric[name] = MetricSummary(mean=_finite(row["mean"]), sd=_finite(row["sd"]))
    return HeldOutFigures(n_nights=int(table["n_nights"].max()) if len(table) else 0, by_metric=by_metric)


def _records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    return [{str(k): (_finite(v) if isinstance(v, float) else v) for k, v in row.items()}
            for row in frame.to_dict(orient="records")]


def _night_refs(nights: Sequence[Night], hashes: Sequence[str]) -> tuple[TrainingNight, ...]:
    wanted = set(hashes)
    return tuple(TrainingNight(participant_id=n.participant_id, night_id=n.content_hash[:20],
                               content_hash=n.content_hash, label=n.label) for n in nights if n.content_hash in wanted)


def _metadata(model: Any, nights: Sequence[Night], config: TrainingConfig, metrics: HeldOutFigures, *,
              flags: Mapping[tuple[str, str], FlaggedNight], **pooled: Any) -> ModelMetadata:
    trained = set(model.training_nights_)
    return ModelMetadata(
        metrics=metrics,
        selection=Selection(metric=versions.SELECTION_METRIC, value=metrics.mean(versions.SELECTION_METRIC)),
        training_nights=_night_refs(nights, model.training_nights_),
        training_hashes=tuple(model.training_nights_),
        flagged_nights=tuple(flag for n in nights if n.content_hash in trained
                             and (flag := flags.get((n.participant_id, n.content_hash))) is not None),
        feature_set_version=model.feature_version_,
        hyperparameters=dict(model.params_),
        threshold=float(model.threshold_),
        library_versions=dict(model.info_.get("libraries", {})),
        config={k: v for k, v in config.to_dict().items() if k in ("n_trials", "seed", "min_personal_nights",
                                                                    "choice_policy", "movement_time",
                                                                    "interval_level")},
        **pooled,
    )


def _run_personal(job: JobInfo, factory: sessionmaker[Session], settings: Settings,
                  progress: Progress, compute: Compute) -> dict[str, Any]:
    assert job.participant_id is not None
    with db.session_scope(factory) as session:
        study = find_study(session, job.study_id)
        participant = find_participant(session, study, job.participant_id)
        nights = load_nights(session, participant=participant, labelled_only=True, include_excluded=False)
        protocol = protocol_info(session, study)
        weight = protocol.correction_weight
        config = _config(job, settings, interval_level=protocol.protocol.interval_level)
        corrected = [] if weight <= 0 else participant_corrections(
            session, participant_pk=participant.pk, participant_id=participant.participant_id)
        night_pks = _night_pks(session, study_pk=study.pk, nights=[*nights, *(n for n, _ in corrected)])
        flags = versions.night_flags(session, study_pk=study.pk, participant_pk=participant.pk,
                                      codes=TRAINING_WARNING_CODES)
        start = pooled_bases.pooled_base(session, study=study, participant_id=job.participant_id,
                                         nights=load_nights(session, participant=participant, include_excluded=False))
    progress(0, 1, "personal: loading nights")
    features = _training_features(factory, [*nights, *(n for n, _ in corrected)], night_pks, config=config.features,
                                  n_jobs=config.n_jobs, progress=progress, stage="personal: night features")
    start = pooled_bases.usable_start(start, features=features, nights=nights, config=config.features)
    result = compute(train_personal, {"nights": nights, "config": config, "feature_cache": features,
                                      "base": start.base, "corrected": corrected, "correction_weight": weight},
                     progress)
    model = result.model
    model.info_["start_note"] = start.note
    booster, meta = model_to_bytes(model)
    n_corrected = int(model.info_.get("corrected_nights", 0))
    metadata = _metadata(model, [*nights, *(n for n, _ in corrected)], config, _summary(result.summary),
                         flags=flags, night_metrics=tuple(_records(result.night_metrics)),
                         corrected_nights=n_corrected, correction_weight=weight if n_corrected else None)
    metadata = metadata.model_copy(update=start.metadata(model, participant_id=job.participant_id,
                                                         hyperparameters=metadata.hyperparameters))
    with db.session_scope(factory, write=True) as session:
        _check_claim(session, job)
        study = find_study(session, job.study_id)
        participant = find_participant(session, study, job.participant_id)
        version = versions.add_version(session, study=study, participant=participant, booster=booster,
                                       model_meta=meta, metadata=metadata, job_id=job.job_id,
                                       actor=_actor(session, job), held_out=encode_held_out(result.outer))
        refresh_choices(session, study=study, participants=[participant], policy=config.choice_policy)
        chosen = find_participant(session, study, job.participant_id).chosen_method
    if settings.prepare_review_queue:
        warm_review_queue(factory, study_id=job.study_id, n_jobs=config.n_jobs)
    return {"model_version": version.version, "active": version.active, "chosen_method": chosen}


def _run_pooled(job: JobInfo, factory: sessionmaker[Session], settings: Settings,
                progress: Progress, compute: Compute) -> dict[str, Any]:
    with db.session_scope(factory) as session:
        study = find_study(session, job.study_id)
        loaded = {p.participant_id: load_nights(session, participant=p, include_excluded=False)
                  for p in study_participants(session, study=study)}
        by_participant = {pid: nights for pid, nights in loaded.items() if nights}
        labelled = [n for nights in by_participant.values() for n in nights if n.reference is not None]
        protocol = protocol_info(session, study)
        weight = protocol.correction_weight
        config = _config(job, settings, interval_level=protocol.protocol.interval_level)
        corrected = {} if weight <= 0 else corrections_by_participant(session, study_participants(session, study=study))
        corrected_nights = [n for pairs in corrected.values() for n, _ in pairs]
        night_pks = _night_pks(session, study_pk=study.pk, nights=[*labelled, *corrected_nights])
        flags = versions.night_flags(session, study_pk=study.pk, codes=TRAINING_WARNING_CODES)
    progress(0, 1, "pooled: loading nights")
    features = _training_features(factory, [*labelled, *corrected_nights], night_pks, config=config.features,
                                  n_jobs=config.n_jobs, progress=progress, stage="pooled: night features")
    result = compute(train_pooled, {"nights": by_participant, "config": config, "feature_cache": features,
                                    "corrected": corrected, "correction_weight": weight}, progress)
    booster, meta = model_to_bytes(result.model)
    all_nights = [n for nights in by_participant.values() for n in nights]
    n_corrected = int(result.model.info_.get("corrected_nights", 0))
    held = result.night_metrics
    by_method = set(result.summary.index.get_level_values(0))
    metadata = _metadata(
        result.model, all_nights, config, _summary(result.summary.loc["pooled"]), flags=flags,
        metrics_with_offset=_summary(result.summary.loc["pooled+offset"]) if "pooled+offset" in by_method else None,
        participants=tuple(sorted({n.participant_id for n in _night_refs(all_nights, result.model.training_nights_)})),
        offsets={pid: float(v) for pid, v in result.offsets.items()}, offset_shrinkage=float(result.shrinkage),
        offset_rule=result.offset_rule,
        descriptors={pid: {k: _finite(v) for k, v in d.items()} for pid, d in result.descriptors.items()},
        night_metrics=tuple(_records(held)), corrected_nights=n_corrected,
        correction_weight=weight if n_corrected else None)
    held_out = [h for rows in result.held_out.values() for h in rows]
    held_out += [h for rows in result.offset_held_out.values() for h in rows]
    with db.session_scope(factory, write=True) as session:
        _check_claim(session, job)
        study = find_study(session, job.study_id)
        present = set(session.scalars(select(db.Participant.participant_id).where(
            db.Participant.study_pk == study.pk)))
        if missing := set(metadata.participants) - present:
            raise NotFound(f"{len(missing)} participant(s) were withdrawn while the pooled model trained; train "
                           "it again", code="participant_withdrawn")
        version = versions.add_version(session, study=study, participant=None, booster=booster, model_meta=meta,
                                       metadata=metadata, job_id=job.job_id, actor=_actor(session, job),
                                       held_out=encode_held_out(held_out))
        pooled_bases.add_fold_models(session, version=version, fold_models=result.fold_models, folds=result.folds)
        refresh_choices(session, study=study, policy=config.choice_policy)
    if settings.prepare_review_queue:
        warm_review_queue(factory, study_id=job.study_id, n_jobs=config.n_jobs)
    return {"model_version": version.version, "active": version.active}


def _metrics_frame(records: Sequence[dict[str, Any]]) -> pd.DataFrame:
    """Stored night-metric records as a frame with numeric metric columns (None -> NaN)."""
    frame = pd.DataFrame(list(records))
    for name in EPOCH_METRIC_NAMES:
        if name in frame:
            frame[name] = pd.to_numeric(frame[name])
    return frame


def refresh_choices(session: Session, *, study: StudyInfo, participants: Sequence[ParticipantInfo] | None = None,
                    policy: str | None = None) -> None:
    """Re-decide personal versus pooled for participants from the active versions' held-out figures.

    Called when a version is stored or activated. A participant without an active personal
    version has no choice (``auto`` uses the pooled model with offset).
    """
    policy = policy or TrainingConfig().choice_policy
    pooled = versions.active_version(session, study=study, participant=None)
    pooled_rows = _metrics_frame(pooled.metadata.night_metrics if pooled is not None else [])
    if participants is None:
        participants = study_participants(session, study=study)
    for participant in participants:
        personal = versions.active_version(session, study=study, participant=participant)
        if personal is None:
            record_choice(session, participant=participant, method=None, choice=None)
            continue
        mine = pooled_rows[pooled_rows["participant_id"] == participant.participant_id] if len(pooled_rows) else None
        table = pd.concat([_metrics_frame(personal.metadata.night_metrics), mine])
        method, reason = choose_method(table, policy=policy)
        record_choice(session, participant=participant, method=method,
                      choice={"method": method, "reason": reason, "personal_version": personal.version,
                              "pooled_version": None if pooled is None else pooled.version, "policy": policy})


def _actor(session: Session, job: JobInfo) -> str:
    return session.scalar(select(db.Job.created_by).where(db.Job.job_id == job.job_id)) or "worker"


def _stored_result(factory: sessionmaker[Session], job: JobInfo) -> dict[str, Any] | None:
    """Result of the version this job already stored, None if it stored none."""
    with db.session_scope(factory) as session:
        row = session.scalar(select(db.ModelVersion).where(db.ModelVersion.job_id == job.job_id))
        if row is None:
            return None
        out: dict[str, Any] = {"model_version": row.version, "active": row.is_active}
        if row.participant_pk is not None:
            out["chosen_method"] = session.scalar(select(db.Participant.chosen_method).where(
                db.Participant.pk == row.participant_pk))
        return out


def run_training_job(job: JobInfo, *, factory: sessionmaker[Session], settings: Settings,
                     progress: Progress, compute: Compute = compute_here) -> dict[str, Any]:
    """Run a claimed training job and return its result (``model_version``, ``active``, ...).

    ``compute`` runs the :mod:`models` training call (default :func:`compute_here`).

    Raises
    ------
    NightbankError
        Training errors from :mod:`models` (too few nights, mixed epoch lengths), or
        :class:`~service.errors.NotFound` if the participant was withdrawn meanwhile,
        :class:`~service.errors.Conflict` (``lease_lost``) if another worker took the job over.
    """
    if (stored := _stored_result(factory, job)) is not None:
        return stored
    run = {"personal": _run_personal, "pooled": _run_pooled}[job.kind]
    return run(job, factory, settings, progress, compute)
