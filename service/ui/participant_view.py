"""What the participant page shows: nights, model versions, the method choice, comparisons, jobs."""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any

import pandas as pd
from sqlalchemy import select
from sqlalchemy.orm import Session, sessionmaker

from models import ALWAYS_SLEEP, AUTO, COMPARED_RULES, MODEL_METHODS

from ..errors import Unprocessable
from ..jobs import queue as jobs
from ..jobs.queue import JobInfo
from ..jobs.training import check_trainable
from ..results import reports
from ..results.model_flags import auto_choice, model_flag
from ..store import db, registry, versions
from ..store.db import session_scope
from ..store.protocols import protocol_info
from ..store.registry import NightInfo
from ..store.versions import VersionInfo
from .calibration_view import active_calibrations

__all__ = ["AGREEMENT_PARAMETERS", "COMPARISON_METHODS", "COMPARISON_METRICS", "VERSION_METRICS", "ParticipantView",
           "held_out_table", "last_job", "load_participant_view", "method_summary_table", "nights_table",
           "parameter_agreement_rows", "participant_parameter_rows", "versions_table"]

#: Held-out metrics listed for every model version.
VERSION_METRICS: tuple[str, ...] = ("balanced_accuracy", "specificity", "sensitivity", "kappa", "auc")
#: Methods of the comparisons, in display order (the always-sleep baseline last).
COMPARISON_METHODS: tuple[str, ...] = (*MODEL_METHODS, AUTO, *COMPARED_RULES, ALWAYS_SLEEP)
#: Metrics of the comparison tables.
COMPARISON_METRICS: tuple[str, ...] = ("balanced_accuracy", "sensitivity", "specificity", "kappa", "auc")


def _method_order(methods: pd.Series) -> pd.Series:
    order = {m: i for i, m in enumerate(COMPARISON_METHODS)}
    return methods.map(lambda m: order.get(m, len(order)))


def method_summary_table(comparison: dict[str, Any]) -> pd.DataFrame:
    """Per method: held-out nights compared and mean/SD over nights of each comparison metric."""
    rows = [{"method": s["method"], "n_nights": s["n_nights"]}
            | {f"{m}_{stat}": (s.get(m) or {}).get(stat) for m in COMPARISON_METRICS for stat in ("mean", "sd")}
            for s in comparison.get("summary", [])]
    columns = ["method", "n_nights", *(f"{m}_{stat}" for m in COMPARISON_METRICS for stat in ("mean", "sd"))]
    frame = pd.DataFrame(rows, columns=columns)
    return frame.sort_values("method", key=_method_order, kind="stable", ignore_index=True)


def held_out_table(comparison: dict[str, Any], nights: list[NightInfo]) -> pd.DataFrame:
    """One row per held-out night and method: the night's name and the comparison metrics."""
    names = {n.night_id: n.label or n.night_id for n in nights}
    rows = [{"night": names.get(r["night_id"], r["night_id"]), "night_id": r["night_id"], "method": r["method"],
             "n_epochs": r.get("n_epochs")} | {m: r.get(m) for m in COMPARISON_METRICS}
            for r in comparison.get("nights", [])]
    frame = pd.DataFrame(rows, columns=["night", "night_id", "method", "n_epochs", *COMPARISON_METRICS])
    starts = {n.night_id: i for i, n in enumerate(nights)}
    return frame.assign(_night=frame["night_id"].map(starts), _method=_method_order(frame["method"])).sort_values(
        ["_night", "_method"], kind="stable", ignore_index=True).drop(columns=["_night", "_method"])


#: Parameters of the sleep-parameter agreement tables.
AGREEMENT_PARAMETERS: tuple[str, ...] = ("sol_min", "tst_min", "waso_min", "awakenings", "sleep_efficiency_pct")


def parameter_agreement_rows(comparison: dict[str, Any]) -> list[dict[str, Any]]:
    """The repeated-measures Bland-Altman entries (bias, limits and their CIs, n nights) of the agreement
    parameters, by method (display order, ``auto`` after the models) then parameter."""
    order = {m: i for i, m in enumerate(COMPARISON_METHODS)}
    params = {p: i for i, p in enumerate(AGREEMENT_PARAMETERS)}
    rows = [r for r in comparison.get("repeated_bland_altman", []) if r["parameter"] in params]
    return sorted(rows, key=lambda r: (order.get(r["method"], len(order)), params[r["parameter"]]))


def participant_parameter_rows(comparison: dict[str, Any]) -> list[dict[str, Any]]:
    """One participant's agreement per method and parameter across their nights (Bland & Altman 1986: bias and
    limits with their t-based CIs), in the shape of :func:`parameter_agreement_rows`; with one participant the
    nested analysis has no between-participant part, so the across-nights one is the informative one."""
    rows = [r | {"n_nights": r.get("n"), "bias_ci": [r.get("bias_ci_lower"), r.get("bias_ci_upper")],
                 "loa_lower_ci": [r.get("loa_lower_ci_lower"), r.get("loa_lower_ci_upper")],
                 "loa_upper_ci": [r.get("loa_upper_ci_lower"), r.get("loa_upper_ci_upper")]}
            for r in comparison.get("bland_altman", []) if r["method"] != ALWAYS_SLEEP]
    return parameter_agreement_rows({"repeated_bland_altman": rows})


def last_job(session: Session, *, study: registry.StudyInfo,
             participant: registry.ParticipantInfo | None) -> JobInfo | None:
    """The newest training job of a participant (or of the study's pooled model), if any."""
    query = select(db.Job.job_id).where(db.Job.study_pk == study.pk)
    query = query.where(db.Job.participant_pk.is_(None) if participant is None
                        else db.Job.participant_pk == participant.pk)
    job_id = session.scalar(query.order_by(db.Job.created_at.desc(), db.Job.pk.desc()).limit(1))
    return None if job_id is None else jobs.get_job(session, job_id)


@dataclass(frozen=True, eq=False)
class ParticipantView:
    """The participant page's content.

    Attributes
    ----------
    nights : list of NightInfo
        In start order.
    versions : list of VersionInfo
        Personal model versions, newest first.
    pooled : VersionInfo or None
        The study's active pooled model.
    chosen_method : str or None
        ``"personal"`` or ``"pooled"`` once a personal model was trained and compared.
    choice : dict or None
        The stored choice record (method, reason, figures it was based on).
    trainable : str or None
        None if a personal model can be trained, else why not.
    comparison : dict or None
        :func:`service.results.reports.participant_comparison`, or None (``comparison_unavailable`` says why).
    job : JobInfo or None
        The newest personal training job.
    """

    study_id: str
    participant_id: str
    nights: list[NightInfo]
    versions: list[VersionInfo]
    pooled: VersionInfo | None
    chosen_method: str | None
    choice: dict[str, Any] | None
    trainable: str | None
    comparison: dict[str, Any] | None = None
    comparison_unavailable: str | None = None
    job: JobInfo | None = None
    #: what ``auto`` scores with now, and the models it passed over with why (flagged: no better than
    #: always-sleep, or below the study's floor)
    auto_method: str | None = None
    passed_over: dict[str, str] = field(default_factory=dict)
    #: why a version must not be chosen by ``auto``, by version number (personal) or "pooled"
    flags: dict[str, str] = field(default_factory=dict)
    #: calibration facts of the active models with decoding (:func:`service.ui.calibration_view.calibration_facts`),
    #: by label ("personal v2", "pooled v1")
    calibrations: dict[str, dict[str, Any]] = field(default_factory=dict)

    @property
    def n_labelled(self) -> int:
        return sum(n.labelled for n in self.nights)

    @property
    def active(self) -> VersionInfo | None:
        return next((v for v in self.versions if v.active), None)

    @property
    def scored_with(self) -> str | None:
        """The method ``auto`` scoring uses (:func:`service.results.model_flags.auto_choice`); None before any
        model exists."""
        return self.auto_method


def nights_table(nights: list[NightInfo]) -> pd.DataFrame:
    """One row per night: ids, start, epochs, whether labelled and its QC flag codes."""
    return pd.DataFrame([{"night_id": n.night_id, "label": n.label, "start": n.start, "epoch_seconds": n.epoch_seconds,
                          "n_epochs": n.n_epochs, "hours": round(n.n_epochs * n.epoch_seconds / 3600, 2),
                          "labelled": n.labelled, "qc_flags": " ".join(f["code"] for f in n.qc)} for n in nights],
                        columns=["night_id", "label", "start", "epoch_seconds", "n_epochs", "hours", "labelled",
                                 "qc_flags"])


def versions_table(model_versions: list[VersionInfo]) -> pd.DataFrame:
    """One row per model version: status, training nights, threshold and held-out mean/SD of each metric."""
    rows = []
    for v in model_versions:
        metrics = v.metadata.metrics
        row: dict[str, Any] = {"version": v.version, "kind": v.kind, "status": v.status,
                               "created_at": v.created_at.isoformat(timespec="seconds"),
                               "n_training_nights": len(v.metadata.training_nights),
                               "n_held_out_nights": metrics.n_nights, "threshold": v.metadata.threshold}
        for name in VERSION_METRICS:
            stats = metrics.by_metric.get(name)
            row[f"{name}_mean"] = None if stats is None else stats.mean
            row[f"{name}_sd"] = None if stats is None else stats.sd
        rows.append(row)
    columns = ["version", "kind", "status", "created_at", "n_training_nights", "n_held_out_nights", "threshold",
               *(f"{m}_{s}" for m in VERSION_METRICS for s in ("mean", "sd"))]
    return pd.DataFrame(rows, columns=columns)


def load_participant_view(factory: sessionmaker[Session], *, study_id: str, participant_id: str,
                          analyse: bool) -> ParticipantView:
    """Load the participant page's content (model and comparison parts only when ``analyse``).

    Raises
    ------
    NotFound
        If the study or participant does not exist.
    """
    with session_scope(factory) as session:
        study = registry.find_study(session, study_id)
        participant = registry.find_participant(session, study, participant_id)
        nights, _ = registry.list_nights(session, study_id=study_id, participant_id=participant_id, limit=500)
        if not analyse:
            return ParticipantView(study_id=study_id, participant_id=participant_id, nights=nights, versions=[],
                                   pooled=None, chosen_method=None, choice=None, trainable=None)
        try:
            check_trainable(session, participant=participant)
            trainable = None
        except Unprocessable as exc:
            trainable = exc.message
        floor = protocol_info(session, study).model_floor
        personal_versions = versions.list_versions(session, study=study, participant=participant)
        pooled = versions.active_version(session, study=study, participant=None)
        flags = {str(v.version): reason for v in personal_versions if (reason := model_flag(v, floor=floor))}
        if pooled is not None and (reason := model_flag(pooled, floor=floor)):
            flags["pooled"] = reason
        auto = auto_choice(session, study=study, participant=participant)
        calibrations = active_calibrations(session, study=study, participant=participant)
        view = ParticipantView(
            study_id=study_id, participant_id=participant_id, nights=nights, versions=personal_versions,
            pooled=pooled, chosen_method=participant.chosen_method, choice=participant.choice, trainable=trainable,
            job=last_job(session, study=study, participant=participant),
            auto_method=None if auto is None else auto.method, passed_over={} if auto is None else auto.passed_over,
            flags=flags, calibrations=calibrations)
    try:
        return replace(view, comparison=reports.participant_comparison(factory, study_id=study_id,
                                                                        participant_id=participant_id))
    except Unprocessable as exc:
        return replace(view, comparison_unavailable=exc.message)
