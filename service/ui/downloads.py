"""Downloads of the pages: figures (SVG, PNG), tables (CSV) and model cards (Markdown, JSON).

Each figure URL serves the image shown on the page (inline) and, with ``?download=1``, the same
bytes as an attachment. Access is the page's: the same sign-in, study scoping and roles.
"""

from __future__ import annotations

import json
import re
import unicodedata
from typing import Annotated, Any
from urllib.parse import quote

import pandas as pd
from fastapi import APIRouter, Path, Query
from fastapi.responses import Response

from ..api.deps import FactoryDep
from ..errors import NotFound, Unprocessable
from ..store import registry, versions
from ..store.db import session_scope
from ..store.tokens import Role
from .access import StudyPage
from .calibration_view import active_calibrations, draw_reliability, version_calibration
from .cards import model_card, model_card_markdown
from .curves import held_out_roc
from .figures import FIGURE_FORMATS, draw_bland_altman, draw_held_out_nights, draw_roc, render
from .night_figure import draw_night
from .night_view import AUTO, load_night_view
from .pages import NightIdPath, ParticipantPath
from .participant_view import held_out_table, load_participant_view, method_summary_table, nights_table, versions_table
from .report_page import build_report
from .study_view import bland_altman_pairs, bland_altman_stats, load_study_view, methods_with_pairs, participants_table

__all__ = ["content_disposition", "router"]

router = APIRouter()
FormatPath = Annotated[str, Path(pattern=r"^(svg|png)$", description="figure format")]
CardFormatPath = Annotated[str, Path(pattern=r"^(md|json)$", description="card format")]
VersionPath = Annotated[int, Path(ge=1, le=10**9, description="model version number")]
Download = Annotated[bool, Query(description="send as an attachment")]
MethodQuery = Annotated[str, Query(max_length=40, description="method shown")]

_NIGHT_SIZE_IN = {True: (7.0, 5.4), False: (7.0, 3.6)}


_UNSAFE_IN_NAME = re.compile(r'[\x00-\x1f\x7f/\\]+')  # control characters (line breaks too) and path separators
_NOT_PLAIN_ASCII = re.compile(r"[^A-Za-z0-9._ +-]+")


def content_disposition(disposition: str, filename: str) -> str:
    """A ``Content-Disposition`` value naming ``filename`` safely for every client.

    RFC 6266: ``filename="..."`` holds an ASCII fallback (accents dropped, anything but letters,
    digits and ``. _ - +`` and blanks replaced by ``_``, so no quote, ``;`` or line break can end
    the value), and ``filename*=UTF-8''...`` the full name percent-encoded as RFC 5987 says.
    Control characters and path separators are replaced by ``_`` in both forms.
    """
    name = _UNSAFE_IN_NAME.sub("_", filename).strip().lstrip(".") or "download"
    stem, dot, suffix = name.rpartition(".")
    if not dot or not suffix.isascii() or not suffix.isalnum():
        stem, suffix = name, ""
    folded = unicodedata.normalize("NFKD", stem).encode("ascii", "ignore").decode("ascii")
    fallback = (_NOT_PLAIN_ASCII.sub("_", folded).strip(" ._") or "download") + (f".{suffix}" if suffix else "")
    return f"{disposition}; filename=\"{fallback}\"; filename*=UTF-8''{quote(name, safe='')}"


def _file(body: bytes, *, media_type: str, filename: str, download: bool = True) -> Response:
    disposition = "attachment" if download else "inline"
    return Response(body, media_type=media_type,
                    headers={"Content-Disposition": content_disposition(disposition, filename)})


def _figure(body: bytes, fmt: str, stem: str, download: bool) -> Response:
    return _file(body, media_type=FIGURE_FORMATS[fmt], filename=f"{stem}.{fmt}", download=download)


def _csv(frame: pd.DataFrame, filename: str, *, index: bool = False) -> Response:
    return _file(frame.to_csv(index=index).encode(), media_type="text/csv; charset=utf-8", filename=filename)


@router.get("/studies/{study}/participants/{pid}/nights/{night_id}/figure.{fmt}")
def night_figure(access: StudyPage, pid: ParticipantPath, night_id: NightIdPath, fmt: FormatPath,
                 factory: FactoryDep, method: MethodQuery = AUTO, download: Download = False) -> Response:
    """The night figure (counts, hypnogram, the method's output)."""
    view = load_night_view(factory, study_id=access.study_id, participant_id=pid, night_id=night_id, method=method,
                           analyse=access.can_analyse)
    panels = view.panels()
    size = _NIGHT_SIZE_IN[panels.p_sleep is not None or (panels.stages is not None and panels.method is not None)]
    body = render(draw_night, panels, fmt=fmt, size_in=size)
    stem = f"{access.study_id}-{pid}-{view.info.label or night_id}-{view.shown or 'night'}"
    return _figure(body, fmt, stem, download)


@router.get("/studies/{study}/participants/{pid}/nights/{night_id}/parameters.csv")
def night_parameters(access: StudyPage, pid: ParticipantPath, night_id: NightIdPath, factory: FactoryDep) -> Response:
    """Sleep parameters of the night, reference and each available method side by side."""
    view = load_night_view(factory, study_id=access.study_id, participant_id=pid, night_id=night_id, method=AUTO,
                           analyse=access.can_analyse)
    return _csv(view.parameter_table(), f"{access.study_id}-{pid}-{view.info.label or night_id}-parameters.csv",
                index=True)


@router.get("/studies/{study}/participants/{pid}/nights/{night_id}/agreement.csv")
def night_agreement(access: StudyPage, pid: ParticipantPath, night_id: NightIdPath, factory: FactoryDep) -> Response:
    """Epoch-by-epoch agreement of each available method with the night's reference (analyst)."""
    access.require(Role.analyst)
    view = load_night_view(factory, study_id=access.study_id, participant_id=pid, night_id=night_id, method=AUTO,
                           analyse=True)
    return _csv(view.agreement_table(), f"{access.study_id}-{pid}-{view.info.label or night_id}-agreement.csv",
                index=True)


def _comparison(factory: FactoryDep, access: StudyPage, pid: str) -> tuple[dict[str, Any], list[Any]]:
    access.require(Role.analyst)
    view = load_participant_view(factory, study_id=access.study_id, participant_id=pid, analyse=True)
    if view.comparison is None:
        raise Unprocessable(f"not available yet — train first ({view.comparison_unavailable})")
    return view.comparison, view.nights


@router.get("/studies/{study}/participants/{pid}/comparison-summary.csv")
def participant_summary(access: StudyPage, pid: ParticipantPath, factory: FactoryDep) -> Response:
    """Per method: held-out nights and mean/SD of each metric, for one participant."""
    comparison, _ = _comparison(factory, access, pid)
    return _csv(method_summary_table(comparison), f"{access.study_id}-{pid}-comparison-summary.csv")


@router.get("/studies/{study}/participants/{pid}/held-out.csv")
def participant_held_out(access: StudyPage, pid: ParticipantPath, factory: FactoryDep) -> Response:
    """One row per held-out night and method, for one participant."""
    comparison, nights = _comparison(factory, access, pid)
    return _csv(held_out_table(comparison, nights), f"{access.study_id}-{pid}-held-out-nights.csv")


@router.get("/studies/{study}/participants/{pid}/figures/held-out.{fmt}")
def participant_held_out_figure(access: StudyPage, pid: ParticipantPath, fmt: FormatPath, factory: FactoryDep,
                                download: Download = False) -> Response:
    """Balanced accuracy and specificity per held-out night and method."""
    comparison, nights = _comparison(factory, access, pid)
    table = held_out_table(comparison, nights)
    width = min(7.0, 3.0 + 0.9 * table["night_id"].nunique())
    body = render(draw_held_out_nights, table, fmt=fmt, size_in=(max(width, 5.5), 3.2))
    return _figure(body, fmt, f"{access.study_id}-{pid}-held-out-nights", download)


@router.get("/studies/{study}/participants/{pid}/figures/reliability.{fmt}")
def participant_reliability_figure(access: StudyPage, pid: ParticipantPath, fmt: FormatPath, factory: FactoryDep,
                                   download: Download = False) -> Response:
    """Reliability curves of the participant's active calibrated models."""
    access.require(Role.analyst)
    with session_scope(factory) as session:
        study = registry.find_study(session, access.study_id)
        curves = active_calibrations(session, study=study, participant=registry.find_participant(session, study, pid))
    if not curves:
        raise Unprocessable("not available — no active model with calibrated probabilities")
    body = render(draw_reliability, curves, fmt=fmt, size_in=(4.2, 4.2))
    return _figure(body, fmt, f"{access.study_id}-{pid}-reliability", download)


@router.get("/studies/{study}/participants/{pid}/figures/roc.{fmt}")
def participant_roc_figure(access: StudyPage, pid: ParticipantPath, fmt: FormatPath, factory: FactoryDep,
                           download: Download = False) -> Response:
    """Held-out ROC curves per method."""
    access.require(Role.analyst)
    curves = held_out_roc(factory, study_id=access.study_id, participant_id=pid)
    if not curves:
        raise Unprocessable("not available yet — train first")
    body = render(draw_roc, {c.method: (c.fpr, c.tpr, c.auc) for c in curves}, fmt=fmt,
                  size_in=(4.2, 4.2))
    return _figure(body, fmt, f"{access.study_id}-{pid}-held-out-roc", download)


def _study_comparison(factory: FactoryDep, access: StudyPage) -> dict[str, Any]:
    access.require(Role.analyst)
    view = load_study_view(factory, study_id=access.study_id, analyse=True)
    if view.comparison is None:
        raise Unprocessable(f"not available yet — train first ({view.comparison_unavailable})")
    return view.comparison


@router.get("/studies/{study}/comparison-summary.csv")
def study_summary(access: StudyPage, factory: FactoryDep) -> Response:
    """Per method over all held-out nights: nights and mean/SD of each metric."""
    return _csv(method_summary_table(_study_comparison(factory, access)), f"{access.study_id}-comparison-summary.csv")


@router.get("/studies/{study}/bland-altman.csv")
def study_bland_altman(access: StudyPage, factory: FactoryDep) -> Response:
    """Bland-Altman statistics per method and parameter (every parameter, with confidence intervals)."""
    rows = pd.DataFrame(_study_comparison(factory, access)["bland_altman"])
    return _csv(rows, f"{access.study_id}-bland-altman.csv")


@router.get("/studies/{study}/night-parameters.csv")
def study_night_parameters(access: StudyPage, factory: FactoryDep) -> Response:
    """Sleep parameters per labelled night and method (reference included): the Bland-Altman plots' data."""
    rows = pd.DataFrame(_study_comparison(factory, access)["parameters"])
    return _csv(rows, f"{access.study_id}-night-parameters.csv")


@router.get("/studies/{study}/figures/bland-altman-{method}.{fmt}")
def study_bland_altman_figure(access: StudyPage, method: Annotated[str, Path(max_length=40)], fmt: FormatPath,
                              factory: FactoryDep, download: Download = False) -> Response:
    """Bland-Altman plots of one method against PSG for SOL, TST, WASO, awakenings and efficiency."""
    comparison = _study_comparison(factory, access)
    if method not in methods_with_pairs(comparison):
        raise NotFound(f"no Bland-Altman figure for method {method!r}")
    body = render(draw_bland_altman, method, bland_altman_pairs(comparison, method),
                  bland_altman_stats(comparison, method), fmt=fmt, size_in=(7.0, 4.8))
    return _figure(body, fmt, f"{access.study_id}-bland-altman-{method}", download)


@router.get("/studies/{study}/participants/{pid}/nights.csv")
def participant_nights(access: StudyPage, pid: ParticipantPath, factory: FactoryDep) -> Response:
    """The participant's nights with labelled status and QC flags."""
    view = load_participant_view(factory, study_id=access.study_id, participant_id=pid, analyse=False)
    return _csv(nights_table(view.nights), f"{access.study_id}-{pid}-nights.csv")


@router.get("/studies/{study}/participants/{pid}/versions.csv")
def participant_versions(access: StudyPage, pid: ParticipantPath, factory: FactoryDep) -> Response:
    """The participant's personal model versions with held-out figures."""
    access.require(Role.analyst)
    with session_scope(factory) as session:
        study = registry.find_study(session, access.study_id)
        found = versions.list_versions(session, study=study,
                                       participant=registry.find_participant(session, study, pid))
    return _csv(versions_table(found), f"{access.study_id}-{pid}-model-versions.csv")


@router.get("/studies/{study}/participants.csv")
def study_participants(access: StudyPage, factory: FactoryDep) -> Response:
    """One row per participant of the study (held-out figures for an analyst)."""
    view = load_study_view(factory, study_id=access.study_id, analyse=access.can_analyse)
    return _csv(participants_table(view), f"{access.study_id}-participants.csv")


@router.get("/studies/{study}/pooled/versions.csv")
def pooled_versions(access: StudyPage, factory: FactoryDep) -> Response:
    """The study's pooled model versions with held-out figures."""
    access.require(Role.analyst)
    with session_scope(factory) as session:
        found = versions.list_versions(session, study=registry.find_study(session, access.study_id), participant=None)
    return _csv(versions_table(found), f"{access.study_id}-pooled-model-versions.csv")


def _card(access: StudyPage, factory: FactoryDep, pid: str | None, version: int, fmt: str) -> Response:
    access.require(Role.analyst)
    with session_scope(factory) as session:
        study = registry.find_study(session, access.study_id)
        owner = None if pid is None else registry.find_participant(session, study, pid)
        found = versions.get_version(session, study=study, participant=owner, version=version)
        calibration = version_calibration(session, found)
    choice = None if owner is None or (owner.choice or {}).get("personal_version") != version else owner.choice
    card = model_card(found, study_id=access.study_id, participant_id=pid, choice=choice, calibration=calibration)
    stem = f"{access.study_id}-{pid or 'pooled'}-v{version}-model-card"
    if fmt == "json":
        return _file(json.dumps(card, indent=1).encode(), media_type="application/json", filename=f"{stem}.json")
    return _file(model_card_markdown(card).encode(), media_type="text/markdown; charset=utf-8", filename=f"{stem}.md")


@router.get("/studies/{study}/participants/{pid}/models/{version}/card.{fmt}")
def personal_card(access: StudyPage, pid: ParticipantPath, version: VersionPath, fmt: CardFormatPath,
                  factory: FactoryDep) -> Response:
    """Model card of a personal model version (Markdown or JSON)."""
    return _card(access, factory, pid, version, fmt)


@router.get("/studies/{study}/pooled/models/{version}/card.{fmt}")
def pooled_card(access: StudyPage, version: VersionPath, fmt: CardFormatPath, factory: FactoryDep) -> Response:
    """Model card of a pooled model version (Markdown or JSON)."""
    return _card(access, factory, None, version, fmt)


@router.get("/studies/{study}/report")
def study_report(access: StudyPage, factory: FactoryDep) -> Response:
    """The study's validation report (one self-contained HTML page), as a download."""
    access.require(Role.analyst)
    body = build_report(factory, study_id=access.study_id).encode()
    return _file(body, media_type="text/html; charset=utf-8", filename=f"{access.study_id}-report.html")
