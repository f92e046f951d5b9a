"""What the study page shows: one row per participant, pooled model versions and study-wide agreement."""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy.orm import Session, sessionmaker

from models import ALWAYS_SLEEP, REFERENCE

from ..errors import Unprocessable
from ..jobs.queue import JobInfo
from ..results import reports
from ..results.model_flags import model_flag
from ..store import registry, versions
from ..store.db import session_scope
from ..store.protocols import protocol_info
from ..store.registry import ParticipantSummary
from ..store.versions import VersionInfo
from .participant_view import COMPARISON_METHODS, last_job

__all__ = ["BLAND_ALTMAN_FIGURE_PARAMETERS", "TABLE_METHODS", "StudyView", "bland_altman_pairs",
           "bland_altman_rows", "bland_altman_stats", "load_study_view", "methods_with_pairs", "participants_table"]

#: Parameters of the Bland-Altman figures, one panel each.
BLAND_ALTMAN_FIGURE_PARAMETERS: tuple[str, ...] = ("sol_min", "tst_min", "waso_min", "awakenings",
                                                   "sleep_efficiency_pct")
#: Methods with per-participant columns and Bland-Altman figures (the always-sleep baseline is only
#: in the study summary and the Bland-Altman table).
TABLE_METHODS: tuple[str, ...] = tuple(m for m in COMPARISON_METHODS if m != ALWAYS_SLEEP)
_GAIN_METRIC = "balanced_accuracy"


@dataclass(frozen=True, eq=False)
class StudyView:
    """The study page's content.

    Attributes
    ----------
    participants : list of ParticipantSummary
        Every participant, by id.
    pooled_versions : list of VersionInfo
        The study's pooled model versions, newest first.
    comparison : dict or None
        :func:`service.results.reports.study_comparison`, or None (``comparison_unavailable`` says why).
    job : JobInfo or None
        The newest pooled training job.
    """

    study_id: str
    participants: list[ParticipantSummary]
    pooled_versions: list[VersionInfo]
    comparison: dict[str, Any] | None = None
    comparison_unavailable: str | None = None
    job: JobInfo | None = None
    #: why a pooled version must not be chosen by ``auto`` (no better than always-sleep, or below the study's
    #: floor), by version number
    flags: dict[int, str] = field(default_factory=dict)


def _mean(summary: list[dict[str, Any]], method: str, metric: str) -> float | None:
    found = next((s for s in summary if s["method"] == method), None)
    return None if found is None else (found.get(metric) or {}).get("mean")


def _gain(a: float | None, b: float | None) -> float | None:
    return None if a is None or b is None else a - b


def participants_table(view: StudyView) -> pd.DataFrame:
    """One row per participant: nights, labelled nights, chosen method, held-out balanced accuracy and
    specificity (mean over held-out nights) per method, and the gain of the personal model's balanced
    accuracy over the pooled model without and with offset (empty before any comparison)."""
    compared = {p["participant_id"]: p["summary"] for p in (view.comparison or {}).get("participants", [])}
    rows = []
    for p in view.participants:
        summary = compared.get(p.participant_id, [])
        row: dict[str, Any] = {"participant_id": p.participant_id, "nights": p.n_nights,
                               "labelled_nights": p.n_labelled_nights, "chosen_method": p.chosen_method,
                               "personal_version": p.active_personal_version}
        for method in TABLE_METHODS:
            for metric in ("balanced_accuracy", "specificity"):
                row[f"{method}_{metric}"] = _mean(summary, method, metric)
        personal = _mean(summary, "personal", _GAIN_METRIC)
        row["gain_over_pooled"] = _gain(personal, _mean(summary, "pooled", _GAIN_METRIC))
        row["gain_over_pooled_offset"] = _gain(personal, _mean(summary, "pooled+offset", _GAIN_METRIC))
        rows.append(row)
    columns = ["participant_id", "nights", "labelled_nights", "chosen_method", "personal_version",
               *(f"{m}_{k}" for m in TABLE_METHODS for k in ("balanced_accuracy", "specificity")),
               "gain_over_pooled", "gain_over_pooled_offset"]
    return pd.DataFrame(rows, columns=columns)


def bland_altman_stats(comparison: dict[str, Any], method: str) -> dict[str, dict[str, Any]]:
    """Per figure parameter, the repeated-measures Bland-Altman entry of ``method`` (bias, limits and their CIs,
    ``n`` nights, ``k`` participants; Bland & Altman 2007), else the across-nights row (bias, limits, n)."""
    rows = {r["parameter"]: r for r in comparison.get("bland_altman", []) if r["method"] == method}
    repeated = {r["parameter"]: r | {"n": r.get("n_nights", 0), "k": r.get("n_participants", 0)}
                for r in comparison.get("repeated_bland_altman", []) if r["method"] == method}
    return {name: repeated.get(name) or rows.get(name, {"n": 0}) for name in BLAND_ALTMAN_FIGURE_PARAMETERS}


def bland_altman_pairs(comparison: dict[str, Any], method: str) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Per figure parameter, the method's and the reference's night values, matched by night."""
    frame = pd.DataFrame(comparison.get("parameters", []))
    if frame.empty:
        return {name: (np.empty(0), np.empty(0)) for name in BLAND_ALTMAN_FIGURE_PARAMETERS}
    keys = ["participant_id", "night_id"]
    reference = frame[frame["method"] == REFERENCE].set_index(keys)
    own = frame[frame["method"] == method].set_index(keys).reindex(reference.index)
    return {name: (own[name].to_numpy(dtype=float), reference[name].to_numpy(dtype=float))
            for name in BLAND_ALTMAN_FIGURE_PARAMETERS}


def bland_altman_rows(comparison: dict[str, Any]) -> list[dict[str, Any]]:
    """The Bland-Altman rows of the figure parameters, by method (display order) then parameter."""
    methods = {m: i for i, m in enumerate(COMPARISON_METHODS)}
    parameters = {p: i for i, p in enumerate(BLAND_ALTMAN_FIGURE_PARAMETERS)}
    rows = [r for r in comparison.get("bland_altman", []) if r["parameter"] in parameters]
    return sorted(rows, key=lambda r: (methods.get(r["method"], len(methods)), parameters[r["parameter"]]))


def methods_with_pairs(comparison: dict[str, Any] | None) -> list[str]:
    """Methods of :data:`TABLE_METHODS` with at least one night compared in the Bland-Altman table."""
    counts = {(r["method"], r["parameter"]): r.get("n") or 0 for r in (comparison or {}).get("bland_altman", [])}
    return [m for m in TABLE_METHODS if counts.get((m, "tst_min"), 0) > 0]


def _all_participants(session: Session, study_id: str) -> list[ParticipantSummary]:
    out: list[ParticipantSummary] = []
    while True:
        page, total = registry.list_participants(session, study_id=study_id, limit=500, offset=len(out))
        out += page
        if not page or len(out) >= total:
            return out


def load_study_view(factory: sessionmaker[Session], *, study_id: str, analyse: bool) -> StudyView:
    """Load the study page's content (models and comparisons only when ``analyse``).

    Raises
    ------
    NotFound
        If the study does not exist.
    """
    with session_scope(factory) as session:
        participants = _all_participants(session, study_id)
        if not analyse:
            return StudyView(study_id=study_id, participants=participants, pooled_versions=[])
        study = registry.find_study(session, study_id)
        pooled = versions.list_versions(session, study=study, participant=None)
        floor = protocol_info(session, study).model_floor
        view = StudyView(study_id=study_id, participants=participants, pooled_versions=pooled,
                         job=last_job(session, study=study, participant=None),
                         flags={v.version: reason for v in pooled if (reason := model_flag(v, floor=floor))})
    try:
        return replace(view, comparison=reports.study_comparison(factory, study_id=study_id))
    except Unprocessable as exc:
        return replace(view, comparison_unavailable=exc.message)
