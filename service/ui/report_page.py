"""The study's validation report: one self-contained HTML page (inline CSS and inline SVG figures).

It gathers what a methods section and its supplement need: the participant/night/epoch flow with
what was left out and why, the study protocol, per method and parameter the repeated-measures
Bland-Altman agreement, ICC(A,1) and equivalence with their CIs, Bland-Altman plots with the
participants told apart, epoch-by-epoch figures at participant and group level, the paired
comparisons, the active models' cards, the software and library versions, and the research-use
caution. Everything comes from :func:`service.results.reports.study_comparison` (held-out figures
only) and the stored versions; nothing is fetched at view time.
"""

from __future__ import annotations

import platform
import re
from datetime import UTC, datetime
from importlib import metadata
from typing import Any

import pandas as pd
from sqlalchemy.orm import Session, sessionmaker

from models import EPOCH_METRIC_NAMES, REFERENCE

from ..results import reports
from ..results.agreement_stats import STATISTIC_PARAMETERS
from ..results.review_agreement import study_agreement
from ..store import protocols, registry, versions
from ..store.db import session_scope
from .cards import model_card
from .figures import render
from .participant_view import COMPARISON_METHODS
from .report_figures import draw_paired_differences, draw_participant_epochs, draw_repeated_bland_altman
from .templating import CAUTIONS, TEMPLATES, is_simulated, number

__all__ = ["LIBRARIES", "REPORT_METRICS", "bland_altman_inputs", "bound", "build_report", "report_methods",
           "software_versions"]

#: Libraries whose versions the report lists (those that compute or draw its figures, and the service's own).
LIBRARIES: tuple[str, ...] = ("nightbank", "numpy", "pandas", "scipy", "scikit-learn", "statsmodels", "xgboost-cpu",
                              "xgboost", "optuna", "matplotlib", "fastapi", "sqlalchemy", "pyarrow")
#: Epoch metrics of the participant-level figures and tables.
REPORT_METRICS: tuple[str, ...] = ("balanced_accuracy", "sensitivity", "specificity", "kappa")
_XML_HEAD = re.compile(r"^<\?xml[^>]*>\s*(<!DOCTYPE[^>]*>\s*)?", re.S)
_ID = re.compile(r'\b(id)="([^"]+)"')
_REF = re.compile(r'(url\(|href=")#([^)"]+)')


def software_versions() -> dict[str, str]:
    """Python and the installed versions of :data:`LIBRARIES` (those installed)."""
    out = {"python": platform.python_version()}
    for name in LIBRARIES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            continue
    return out


def _svg(draw: Any, *args: Any, size_in: tuple[float, float], salt: str, **kwargs: Any) -> str:
    """A figure as an inline ``<svg>`` element (its own id salt, so ids never collide in the page)."""
    text = _XML_HEAD.sub("", render(draw, *args, fmt="svg", size_in=size_in, salt=salt, **kwargs).decode())
    # matplotlib numbers its element ids per figure (figure_1, axes_1, ...): give each figure its own prefix
    text = _ID.sub(lambda m: f'{m.group(1)}="{salt}-{m.group(2)}"', text)
    return _REF.sub(lambda m: f"{m.group(1)}#{salt}-{m.group(2)}", text)


def report_methods(comparison: dict[str, Any]) -> list[str]:
    """The methods of a comparison's statistics, in display order."""
    found = {r["method"] for r in comparison.get("repeated_bland_altman", [])}
    ordered = [m for m in COMPARISON_METHODS if m in found]
    return ordered + sorted(found - set(ordered))


def bland_altman_inputs(comparison: dict[str, Any], methods: list[str]
                        ) -> list[tuple[str, dict[str, pd.DataFrame], dict[str, dict[str, Any]]]]:
    """Per method: its night values next to the reference's per parameter, and its repeated-measures entries."""
    frame = pd.DataFrame(comparison.get("parameters", []))
    if frame.empty:
        return []
    keys = ["participant_id", "night_id"]
    ref = frame[frame["method"] == REFERENCE].set_index(keys)
    out = []
    for method in (m for m in methods if m != "always-sleep"):
        own = frame[frame["method"] == method].set_index(keys).reindex(ref.index)
        pairs = {name: pd.DataFrame({"participant_id": ref.index.get_level_values(0), "method":
                                     own[name].to_numpy(dtype=float), "reference": ref[name].to_numpy(dtype=float)})
                 for name in STATISTIC_PARAMETERS}
        stats = {r["parameter"]: r for r in comparison["repeated_bland_altman"] if r["method"] == method}
        out.append((method, pairs, stats))
    return out


def _bland_altman_figures(comparison: dict[str, Any], methods: list[str],
                          participants: list[str]) -> list[dict[str, Any]]:
    return [{"method": method, "svg": _svg(draw_repeated_bland_altman, method, pairs, stats, participants,
                                           size_in=(8.0, 5.2), salt=f"ba-{k}")}
            for k, (method, pairs, stats) in enumerate(bland_altman_inputs(comparison, methods))]


def _epoch_figures(comparison: dict[str, Any], methods: list[str], participants: list[str]) -> list[dict[str, Any]]:
    epochs = comparison.get("participant_epochs") or {}
    per, group = pd.DataFrame(epochs.get("participants", [])), pd.DataFrame(epochs.get("group", []))
    if per.empty or group.empty:
        return []
    shown = [m for m in methods if m in set(per["method"])]
    return [{"metric": metric, "svg": _svg(draw_participant_epochs, per, group, methods=shown, metric=metric,
                                           participant_ids=participants, size_in=(7.0, 0.45 * len(shown) + 1.4),
                                           salt=f"ep-{k}")}
            for k, metric in enumerate(REPORT_METRICS) if metric in EPOCH_METRIC_NAMES]


def _cards(session: Session, study: registry.StudyInfo) -> list[dict[str, Any]]:
    cards = []
    pooled = versions.active_version(session, study=study, participant=None)
    if pooled is not None:
        cards.append(model_card(pooled, study_id=study.study_id, participant_id=None))
    for participant in registry.study_participants(session, study=study):
        personal = versions.active_version(session, study=study, participant=participant)
        if personal is not None:
            choice = participant.choice if (participant.choice or {}).get("personal_version") == personal.version \
                else None
            cards.append(model_card(personal, study_id=study.study_id, participant_id=participant.participant_id,
                                    choice=choice))
    return cards


def bound(value: Any) -> str:
    """A CI bound for the report's tables: one decimal, "unbounded" beyond +/-1e6, an en dash when missing."""
    if isinstance(value, int | float) and not isinstance(value, bool) and abs(value) > 1e6:
        return "unbounded"
    return number(value, 1)


TEMPLATES.env.filters["bound"] = bound


def build_report(factory: sessionmaker[Session], *, study_id: str) -> str:
    """The validation report of a study as one HTML document (UTF-8 text, no external assets).

    Raises
    ------
    NotFound
        If the study does not exist.
    """
    with session_scope(factory) as session:
        study = registry.find_study(session, study_id)
        protocol = protocols.protocol_info(session, study)
        cards = _cards(session, study)
        listed = registry.study_participants(session, study=study)
        participants = [p.participant_id for p in listed]
        choices = {p.participant_id: p.choice for p in listed}
    comparison = reports.study_comparison(factory, study_id=study_id)
    reviews = study_agreement(factory, study_id=study_id)
    methods = report_methods(comparison)
    flow = comparison.get("flow", [])
    totals = {k: sum(f[k] for f in flow) for k in ("n_nights", "n_labelled_nights", "n_unlabelled_nights",
                                                   "n_excluded_from_training", "in_bed_epochs",
                                                   "reference_unscored_epochs", "epochs_without_counts",
                                                   "epochs_left_out", "epochs_compared")}
    template = TEMPLATES.env.get_template("report.html")
    return template.render(
        study=study, protocol=protocol.to_dict(), comparison=comparison, methods=methods, flow=flow, totals=totals,
        parameters=STATISTIC_PARAMETERS, metrics=REPORT_METRICS, cards=cards, choices=choices,
        software=software_versions(), cautions=CAUTIONS, simulated=is_simulated(study.study_id, study.name),
        generated_at=datetime.now(UTC).isoformat(timespec="seconds"),
        bland_altman=_bland_altman_figures(comparison, methods, participants),
        epoch_figures=_epoch_figures(comparison, methods, participants),
        paired_svg=_svg(draw_paired_differences, comparison["paired_differences"],
                        size_in=(7.0, 0.5 * len(comparison["paired_differences"]) + 1.0), salt="paired")
        if comparison.get("paired_differences") else None,
        by_key=_index(comparison), reviews=reviews)


def _index(comparison: dict[str, Any]) -> dict[str, dict[tuple[str, str], dict[str, Any]]]:
    """The statistics entries keyed by (method, parameter), for the tables."""
    return {name: {(r["method"], r["parameter"]): r for r in comparison.get(name, [])}
            for name in ("repeated_bland_altman", "icc", "equivalence")}
