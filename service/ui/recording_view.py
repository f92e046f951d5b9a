"""The recording page: the day figure (SVG/PNG), the day table (CSV) and the recordings of a participant.

Anyone who may see the study sees the recording, its periods and non-wear; the day table scores
its nights and needs the analyst role, as the night pages' scorings do.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Annotated, Any

import pandas as pd
from fastapi import APIRouter, Path, Query, Request
from fastapi.responses import HTMLResponse, Response
from sqlalchemy.orm import Session, sessionmaker

from ..api.deps import FactoryDep
from ..errors import Unprocessable
from ..results import days as day_results
from ..results.recordings import nonwear_items, period_items
from ..store import recordings as store
from ..store.db import session_scope
from ..store.tokens import Role
from .access import UI_PREFIX, StudyPage
from .figures import FIGURE_FORMATS, render
from .pages import ParticipantPath, study_info
from .recording_figure import DAY_STARTS, RecordingPanels, day_windows, draw_recording, figure_height_in
from .templating import is_simulated, page

__all__ = ["RecordingView", "load_recording_view", "participant_recordings", "router"]

router = APIRouter()
RecordingIdPath = Annotated[str, Path(pattern=r"^[0-9a-f]{1,64}$", description="recording id")]
FormatPath = Annotated[str, Path(pattern=r"^(svg|png)$", description="figure format")]
DayStart = Annotated[str, Query(pattern=r"^(noon|midnight)$", description="where each row of the figure starts")]
Download = Annotated[bool, Query(description="send as an attachment")]


@dataclass(frozen=True, eq=False)
class RecordingView:
    """The recording page's content: the stored recording, what was found in it, and its day table."""

    info: store.RecordingInfo
    panels: RecordingPanels
    periods: list[dict[str, Any]]
    nonwear: list[dict[str, Any]]
    labelled: set[str]
    days: dict[str, Any] | None
    days_unavailable: str | None

    def alt_text(self) -> str:
        mains = sum(p["kind"] == "main" for p in self.periods)
        naps = len(self.periods) - mains
        off = sum(i["minutes"] for i in self.nonwear)
        n_days = len(day_windows(self.info.start, self.info.end, self.panels.day_start))
        return (f"Counts of participant {self.info.participant_id} over {n_days} days, one row per day, with "
                f"{mains} main sleep periods "
                f"({len(self.labelled)} PSG-labelled), {naps} naps and {off:.0f} min off the wrist marked.")

    def day_frame(self) -> pd.DataFrame:
        rows = [] if self.days is None else self.days["rows"]
        return pd.DataFrame(rows, columns=list(day_results.DAY_COLUMNS))


def _base(study_id: str, participant_id: str) -> str:
    return f"{UI_PREFIX}/studies/{study_id}/participants/{participant_id}"


def load_recording_view(factory: sessionmaker[Session], *, study_id: str, participant_id: str, recording_id: str,
                        analyse: bool, day_start: str = "noon") -> RecordingView:
    """Load a recording for its page; an analyst also gets the day table (scored nights)."""
    with session_scope(factory) as session:
        info, recording, diary = store.load_recording(session, study_id=study_id, participant_id=participant_id,
                                                      recording_id=recording_id)
        labelled = store.labelled_nights(session, info)
    base = _base(study_id, participant_id)
    panels = RecordingPanels(
        start=info.start, epoch_seconds=info.epoch_seconds, counts=recording.counts, day_start=day_start,
        periods=[(p["kind"], p["start_epoch"], p["end_epoch"],
                  f"{base}/nights/{p['night_id']}" if p.get("night_id") else None, p.get("night_id") in labelled)
                 for p in info.periods],
        nonwear=[(i["start_epoch"], i["end_epoch"]) for i in info.nonwear],
        diary=[(d.bed_time, d.rise_time) for d in diary or []])
    days, why = None, None
    if analyse:
        try:
            days = day_results.recording_days(factory, study_id=study_id, participant_id=participant_id,
                                              recording_id=recording_id)
        except Unprocessable as exc:
            why = str(exc)
    else:
        why = "The day table scores the nights and needs the analyst role."
    return RecordingView(info=info, panels=panels, periods=period_items(info), nonwear=nonwear_items(info),
                         labelled=labelled, days=days, days_unavailable=why)


def participant_recordings(factory: sessionmaker[Session], *, study_id: str,
                           participant_id: str) -> list[store.RecordingInfo]:
    """The participant's recordings, for the participant page."""
    with session_scope(factory) as session:
        return store.list_recordings(session, study_id=study_id, participant_id=participant_id, limit=500)[0]


@router.get("/studies/{study}/participants/{pid}/recordings/{recording_id}", response_class=HTMLResponse)
def recording_page(request: Request, access: StudyPage, pid: ParticipantPath, recording_id: RecordingIdPath,
                   factory: FactoryDep, day_start: DayStart = "noon") -> Response:
    """One row per day: counts, sleep periods, naps, non-wear, PSG nights and diary; the day table."""
    study = study_info(factory, access.study_id)
    view = load_recording_view(factory, study_id=access.study_id, participant_id=pid, recording_id=recording_id,
                               analyse=access.can_analyse, day_start=day_start)
    base = f"{_base(access.study_id, pid)}/recordings/{recording_id}"
    frame = view.day_frame()
    return page(request, "recording.html", principal=access.principal, study=study, pid=pid, view=view,
                simulated=is_simulated(study.study_id, study.name), analyse=access.can_analyse, base=base,
                participant_base=_base(access.study_id, pid), day_start=day_start, day_starts=list(DAY_STARTS),
                figure_query=f"?day_start={day_start}", day_rows=frame.astype(object).where(frame.notna(), None)
                .to_dict(orient="records"), summary=None if view.days is None else view.days["summary"],
                definitions=None if view.days is None else view.days["definitions"],
                caption=("Each row is one day. Blue: main sleep periods (each a night; click through from the day "
                         "table); orange: naps; green band: PSG-labelled night; hatched grey: off the wrist; "
                         "triangles: diary bed and rise times. Counts share one scale across all days."))


@router.get("/studies/{study}/participants/{pid}/recordings/{recording_id}/figure.{fmt}")
def recording_figure(access: StudyPage, pid: ParticipantPath, recording_id: RecordingIdPath, fmt: FormatPath,
                     factory: FactoryDep, day_start: DayStart = "noon", download: Download = False) -> Response:
    """The recording figure, inline or (``download=1``) as an attachment."""
    view = load_recording_view(factory, study_id=access.study_id, participant_id=pid, recording_id=recording_id,
                               analyse=False, day_start=day_start)
    n_days = len(day_windows(view.info.start, view.info.end, day_start))
    body = render(draw_recording, view.panels, fmt=fmt, size_in=(7.0, figure_height_in(n_days)))
    disposition = "attachment" if download else "inline"
    name = f"{access.study_id}-{pid}-recording-{recording_id[:8]}.{fmt}"
    return Response(body, media_type=FIGURE_FORMATS[fmt],
                    headers={"Content-Disposition": f'{disposition}; filename="{name}"'})


@router.get("/studies/{study}/participants/{pid}/recordings/{recording_id}/days.csv")
def recording_days_csv(access: StudyPage, pid: ParticipantPath, recording_id: RecordingIdPath,
                       factory: FactoryDep) -> Response:
    """The day table of the recording (analyst)."""
    access.require(Role.analyst)
    found = day_results.recording_days(factory, study_id=access.study_id, participant_id=pid,
                                       recording_id=recording_id)
    frame = pd.DataFrame(found["rows"], columns=list(day_results.DAY_COLUMNS))
    name = f"{access.study_id}-{pid}-recording-{recording_id[:8]}-days.csv"
    return Response(frame.to_csv(index=False).encode(), media_type="text/csv; charset=utf-8",
                    headers={"Content-Disposition": f'attachment; filename="{name}"'})
