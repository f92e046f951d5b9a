"""The parameter export: one row per night and method, honest about where each value comes from.

- **Labelled nights**: model rows (``personal``, ``pooled``, ``pooled+offset``, ``auto``) are the
  *held-out* predictions stored with the active versions, so the night was left out of the model
  that scored it (``held_out`` true; ``auto`` by nested choice, ``scored_as`` naming the model
  chosen without the night). A model without a held-out prediction of the night (nights added
  after training) is scored by the deployed version, ``held_out`` false. Every side of the night
  and the reference are computed by one :func:`models.compare_night`, so reference and methods
  are masked alike (the reference's unscored epochs and the epochs without counts).
- **Unlabelled nights**: the deployed models (the cached scorings of
  :func:`service.results.scoring.score_night`), ``held_out`` false.

Model rows carry the night's parameter intervals (``<parameter>_low`` / ``<parameter>_high`` for
:data:`~service.results.night_intervals.INTERVAL_PARAMETERS`) at ``interval_level`` (the column
says it) and its review score ``uncertainty_min``: for held-out rows those of the held-out
prediction (:attr:`models.HeldOutNight.intervals`, at the protocol's level when the version was
trained), for deployed rows those of the scoring body (at the protocol's level now); empty for
the reference, the rules and models without decoding. An export asked for at a level
(``interval_level``) has deployed rows at that level and keeps held-out intervals only where they
were computed at it (the held-out models are not stored to compute them again).

Every row states the study protocol it was computed under (``protocol``, its JSON form), the
model version, the epoch length, the in-bed interval (``lights_off``, ``lights_on``), the unscored
epochs and the night's QC flags. Columns are typed (timestamps in UTC, counts as integers); in CSV
a text cell a spreadsheet would run as a formula is neutralised with a leading apostrophe
(OWASP, "CSV Injection").
"""

from __future__ import annotations

import io
import json
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy import select
from sqlalchemy.orm import Session, sessionmaker

from models import (
    AUTO,
    METHOD_IDS,
    MODEL_METHODS,
    PARAMETER_NAMES,
    HeldOutNight,
    Night,
    StudyProtocol,
    TrainingConfig,
    compare_night,
    json_record,
    score_with_rule,
)

from ..errors import Unprocessable
from ..store import db, versions
from ..store.codec import night_from_row
from ..store.protocols import study_protocol
from ..store.registry import find_study, study_participants
from .bulk_scoring import CHUNK_NIGHTS, bulk_scorings
from .held_out import active_held_out as _active_held_out
from .held_out import add_auto, version_of
from .night_intervals import INTERVAL_PARAMETERS, at_level

__all__ = ["EXPORT_COLUMNS", "EXPORT_METHODS", "INTERVAL_COLUMNS", "export_frame", "export_parameters",
           "neutralise_formulas"]

#: Methods of the parameter export besides the reference (model methods only when trained).
EXPORT_METHODS: tuple[str, ...] = (*METHOD_IDS, *MODEL_METHODS, AUTO)
#: Interval ends of every parameter of :data:`INTERVAL_PARAMETERS`, then the review score (minutes).
INTERVAL_COLUMNS: tuple[str, ...] = (*(f"{name}_{end}" for name in INTERVAL_PARAMETERS for end in ("low", "high")),
                                     "uncertainty_min", "interval_level")
EXPORT_COLUMNS: tuple[str, ...] = (
    "study_id", "participant_id", "night_id", "label", "start", "lights_off", "lights_on", "epoch_seconds",
    "method", "scored_as", "model_version", "held_out", "protocol", "qc_flags", *PARAMETER_NAMES,
    *INTERVAL_COLUMNS)
_INTEGER_COLUMNS = ("epoch_seconds", "model_version", "unscored_epochs", "awakenings", "awakenings_low",
                    "awakenings_high")
_FLOAT_COLUMNS = tuple(c for c in INTERVAL_COLUMNS if c not in _INTEGER_COLUMNS)
_TIME_COLUMNS = ("start", "lights_off", "lights_on")
#: first characters that make a spreadsheet read a cell as a formula (OWASP, "CSV Injection")
_FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


@dataclass(frozen=True)
class _Target:
    participant_id: str
    night: Night
    night_id: str
    label: str | None
    qc: str
    has_personal: bool


def neutralise_formulas(frame: pd.DataFrame) -> pd.DataFrame:
    """A copy of ``frame`` whose text cells starting like a formula (=, +, -, @, tab, CR) begin with ``'``."""
    out = frame.copy()
    for column in out.columns:
        if out[column].dtype == object:
            out[column] = out[column].map(
                lambda v: "'" + v if isinstance(v, str) and v.startswith(_FORMULA_STARTS) else v)
    return out


def _targets(session: Session, study_id: str) -> tuple[list[_Target], bool, dict[str, str]]:
    study = find_study(session, study_id)
    pooled = versions.active_version(session, study=study, participant=None) is not None
    targets, policies = [], {}
    for participant in study_participants(session, study=study):
        personal = versions.active_version(session, study=study, participant=participant) is not None
        policies[participant.participant_id] = (participant.choice or {}).get("policy") or "balanced_accuracy"
        for row in session.scalars(select(db.Night).where(db.Night.participant_pk == participant.pk)
                                   .order_by(db.Night.start_utc)):
            targets.append(_Target(participant.participant_id, night_from_row(row, participant_id=participant.
                                                                               participant_id),
                                   row.night_id, row.label, " ".join(f["code"] for f in row.qc), personal))
    return targets, pooled, policies


def _interval_cells(intervals: Any, uncertainty_min: Any, level: Any = None) -> dict[str, Any]:
    """The interval columns of a row from ``{name: [low, high]}`` (None: no intervals) at ``level``, and the
    review score."""
    out: dict[str, Any] = {"uncertainty_min": uncertainty_min, "interval_level": None if intervals is None else level}
    for name in INTERVAL_PARAMETERS:
        low, high = (None, None) if intervals is None else intervals.get(name, (None, None))
        out |= {f"{name}_low": low, f"{name}_high": high}
    return json_record(out)


def _held_out_cells(held: HeldOutNight, level: float | None) -> dict[str, Any]:
    """Interval columns of a held-out row (at the level they were computed at): empty unless that is
    ``level`` (None: any level)."""
    found = held.intervals
    if found is None or (level is not None and not np.isclose(found.level, level)):
        return _interval_cells(None, None)
    return _interval_cells(found.intervals, found.uncertainty_min, found.level)


def _body_cells(body: dict[str, Any]) -> dict[str, Any]:
    return _interval_cells(body.get("intervals"), body.get("uncertainty_min"), body.get("interval_level"))


#: (participant id, night id, method) -> the deployed scoring's body
_Bodies = dict[tuple[str, str, str], dict[str, Any]]


def _deployed(bodies: _Bodies, t: _Target, method: str) -> dict[str, Any]:
    return bodies[(t.participant_id, t.night_id, method)]


def _labelled_rows(bodies: _Bodies, t: _Target, methods: list[str],
                   held: dict[str, HeldOutNight], used: dict[str, int | None], protocol: StudyProtocol,
                   auto_chosen: dict[str, str], asked_level: float | None) -> list[dict[str, Any]]:
    """Reference and every method of a labelled night, from one comparison (masked alike); held-out intervals
    only at ``asked_level`` when one was asked for."""
    night = t.night
    sides: dict[str, tuple[Any, Any]] = {}
    info: dict[str, tuple[str | None, int | None, bool | None]] = {}  # scored_as, version, held_out
    cells: dict[str, dict[str, Any]] = {}  # interval columns
    for method in methods:
        if method in METHOD_IDS:
            scored = score_with_rule(night.counts, night.epoch_seconds, method)
            sides[method], info[method] = (scored.sleep, scored.score), (None, None, None)
        elif method in held:
            chosen = method if method != AUTO else auto_chosen.get(t.night_id, "pooled+offset")
            sides[method] = (held[method].sleep, held[method].p_sleep)
            info[method] = (chosen, version_of(chosen, t.participant_id, used), True)
            cells[method] = _held_out_cells(held[method], asked_level)
        else:
            body = _deployed(bodies, t, method)
            sleep = np.array([np.nan if v is None else v for v in body["sleep"]], dtype=np.float64)
            sides[method], info[method] = (sleep, None), (body["method"], body["model_version"], False)
            cells[method] = _body_cells(body)
    reference = night.reference_sleep(movement_time=TrainingConfig().movement_time)
    assert reference is not None  # a labelled night
    first, stop = night.in_bed
    compared = compare_night(reference, sides, epoch_seconds=night.epoch_seconds, lights_off_idx=first,
                             lights_on_idx=stop, missing=night.missing, parameter_options={"protocol": protocol})
    rows = [{"method": "reference", "scored_as": None, "model_version": None, "held_out": None}
            | _params(compared.reference_parameters.as_dict())]
    for method in methods:
        scored_as, version, held_out = info[method]
        rows.append({"method": method, "scored_as": scored_as, "model_version": version, "held_out": held_out}
                    | _params(compared.parameters[method].as_dict()) | cells.get(method, {}))
    return rows


def _params(values: dict[str, Any]) -> dict[str, Any]:
    return json_record({k: values[k] for k in PARAMETER_NAMES})


@dataclass(frozen=True)
class _Export:
    """What every night's rows need: the nights, the held-out predictions and auto's choices, the protocol."""

    study_id: str
    targets: list[_Target]
    pooled: bool
    protocol: StudyProtocol
    protocol_text: str
    held_out: Any
    used: dict[str, int | None]
    policies: dict[str, str]
    #: the interval level asked for (None: the protocol's, already in ``protocol``)
    asked_level: float | None = None
    #: participant -> night id -> the model auto chose without the night (filled as participants come up)
    auto_chosen: dict[str, dict[str, str]] = field(default_factory=dict)
    auto_done: set[str] = field(default_factory=set)

    def add_auto(self, participant_id: str) -> None:
        """``auto``'s nested held-out predictions of a participant's labelled nights (once, when first needed)."""
        if participant_id in self.auto_done:
            return
        labelled = [t.night for t in self.targets if t.participant_id == participant_id and t.night.has_reference]
        choice = add_auto(self.held_out.setdefault(participant_id, {}), labelled,
                          policy=self.policies[participant_id])
        if choice is not None:
            self.auto_chosen[participant_id] = dict(zip(choice.per_night["night_id"], choice.per_night["chosen"],
                                                        strict=True))
        self.auto_done.add(participant_id)

    def methods(self, t: _Target) -> list[str]:
        return [m for m in EXPORT_METHODS if not ((m == "personal" and not t.has_personal)
                                                  or (m in MODEL_METHODS + (AUTO,) and m != "personal"
                                                      and not self.pooled))]

    def deployed_needed(self, t: _Target) -> list[str]:
        """The methods of a night answered by the deployed scoring (not held out, not computed here)."""
        if not t.night.has_reference:
            return self.methods(t)
        held = self.held_out.get(t.participant_id, {}).get(t.night.content_hash, {})
        return [m for m in self.methods(t) if m not in METHOD_IDS and m not in held]

    @property
    def n_rows(self) -> int:
        return sum(len(self.methods(t)) + t.night.has_reference for t in self.targets)


def _prepare(factory: sessionmaker[Session], study_id: str, interval_level: float | None) -> _Export:
    with db.session_scope(factory) as session:
        targets, pooled, policies = _targets(session, study_id)
        protocol = at_level(study_protocol(session, study_id), interval_level)
        held_out, used = _active_held_out(session, find_study(session, study_id))
    protocol_text = json.dumps(protocol.to_dict(), sort_keys=True, separators=(",", ":"))
    return _Export(study_id, targets, pooled, protocol, protocol_text, held_out, used, policies, interval_level)


def _deployed_bodies(factory: sessionmaker[Session], export: _Export, targets: list[_Target]) -> _Bodies:
    """The deployed scorings these nights' rows need, per method in bulk (:func:`bulk_scorings`)."""
    wanted: dict[str, list[tuple[str, str]]] = {}
    for t in targets:
        for method in export.deployed_needed(t):
            wanted.setdefault(method, []).append((t.participant_id, t.night_id))
    out: _Bodies = {}
    for method, nights in wanted.items():
        for chunk in bulk_scorings(factory, study_id=export.study_id, method=method, nights=nights,
                                   chunk=len(nights), interval_level=export.protocol.interval_level):
            for pid, night_id, body in chunk:
                if isinstance(body, Exception):
                    raise body
                out[(pid, night_id, method)] = json.loads(body)
    return out


def _rows(factory: sessionmaker[Session], export: _Export, targets: list[_Target]) -> list[dict[str, Any]]:
    """The export's rows of ``targets`` (a slice of ``export.targets``)."""
    for pid in dict.fromkeys(t.participant_id for t in targets):
        export.add_auto(pid)
    bodies = _deployed_bodies(factory, export, targets)
    rows: list[dict[str, Any]] = []
    for t in targets:
        methods = export.methods(t)
        night = t.night
        first, stop = night.in_bed
        step = pd.Timedelta(seconds=night.epoch_seconds)
        ids = {"study_id": export.study_id, "participant_id": t.participant_id, "night_id": t.night_id,
               "label": t.label, "start": night.start.tz_convert("UTC"),
               "lights_off": (night.start + first * step).tz_convert("UTC"),
               "lights_on": (night.start + stop * step).tz_convert("UTC"), "epoch_seconds": night.epoch_seconds,
               "protocol": export.protocol_text, "qc_flags": t.qc}
        if night.has_reference:
            found = _labelled_rows(bodies, t, methods, export.held_out.get(t.participant_id, {})
                                   .get(night.content_hash, {}), export.used, export.protocol,
                                   export.auto_chosen.get(t.participant_id, {}), export.asked_level)
        else:
            found = []
            for method in methods:
                body = _deployed(bodies, t, method)
                found.append({"method": method, "scored_as": None if method in METHOD_IDS else body["method"],
                              "model_version": body["model_version"],
                              "held_out": None if method in METHOD_IDS else False}
                             | {k: body["parameters"].get(k) for k in PARAMETER_NAMES} | _body_cells(body))
        rows += [ids | r for r in found]
    return rows


def export_frame(factory: sessionmaker[Session], *, study_id: str, interval_level: float | None = None) -> pd.DataFrame:
    """The export as a typed table (:data:`EXPORT_COLUMNS`); see the module docstring.

    ``interval_level`` (in (0, 1); None: the protocol's) is the level of the exported intervals.

    Raises
    ------
    NotFound
        If the study does not exist.
    """
    return _frame(factory, _prepare(factory, study_id, interval_level))


def _chunk_rows(factory: sessionmaker[Session], export: _Export) -> Iterator[list[dict[str, Any]]]:
    """The export's rows, :data:`~service.results.bulk_scoring.CHUNK_NIGHTS` nights at a time."""
    for start in range(0, len(export.targets), CHUNK_NIGHTS):
        yield _rows(factory, export, export.targets[start:start + CHUNK_NIGHTS])


def _frame(factory: sessionmaker[Session], export: _Export) -> pd.DataFrame:
    rows = [row for chunk in _chunk_rows(factory, export) for row in chunk]
    return _typed(pd.DataFrame(rows, columns=list(EXPORT_COLUMNS)))


def _typed(frame: pd.DataFrame) -> pd.DataFrame:
    for column in _TIME_COLUMNS:
        frame[column] = pd.to_datetime(frame[column], utc=True)
    for column in _INTEGER_COLUMNS:
        frame[column] = pd.array(frame[column].to_numpy(dtype=np.float64), dtype="Int64")
    for column in _FLOAT_COLUMNS:
        frame[column] = frame[column].astype("float64")
    frame["held_out"] = frame["held_out"].astype("boolean")
    for column in ("label", "scored_as", "qc_flags"):
        frame[column] = frame[column].astype(object)
    return frame


def _check_format(fmt: str) -> None:
    if fmt not in ("csv", "parquet"):
        raise Unprocessable(f"format {fmt!r}: choose csv or parquet", code="unknown_format")


def _csv(frame: pd.DataFrame, *, header: bool) -> bytes:
    return neutralise_formulas(frame).to_csv(index=False, header=header,
                                             date_format="%Y-%m-%dT%H:%M:%SZ").encode()


def _parquet(frame: pd.DataFrame) -> bytes:
    buffer = io.BytesIO()
    frame.to_parquet(buffer, index=False)
    return buffer.getvalue()


def export_parameters(factory: sessionmaker[Session], *, study_id: str, fmt: str = "csv",
                      interval_level: float | None = None) -> bytes:
    """The export as CSV (formulas neutralised) or Parquet (typed) bytes (intervals at ``interval_level``,
    None: the protocol's).

    Raises
    ------
    NotFound
        If the study does not exist.
    Unprocessable
        If ``fmt`` is neither ``csv`` nor ``parquet``.
    """
    _check_format(fmt)
    frame = export_frame(factory, study_id=study_id, interval_level=interval_level)
    return _csv(frame, header=True) if fmt == "csv" else _parquet(frame)
