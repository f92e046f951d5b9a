"""Reports: per-participant and study-wide comparisons, and the parameter export.

Comparisons use the held-out predictions stored with the *active* model versions (so a model is
never judged on nights it was trained on), set next to the classical rules
(:data:`models.COMPARED_RULES`, default options), the always-sleep baseline and the PSG reference
on the same labelled nights by :func:`models.held_out_comparison`, the same comparison
:func:`models.compare_study` makes when it trains everything at once; its tables (epoch metrics,
parameters with the reference's unscored epochs masked on both sides, Bland-Altman statistics)
come from :func:`models.comparison_tables`, under the study protocol; ``auto`` gets its own
nested held-out predictions (:mod:`service.results.held_out`). Beside each rule as published stands
the rule calibrated to the study's counts leave-participants-out (``<rule>:calibrated``,
:func:`models.calibrate_rules` on every labelled night of the study, participants sharing a night
left out together), as :func:`models.compare_study` makes it; ``rule_calibrations`` says which
count scale (or threshold) each participant's nights were scored with. ``interval_coverage`` sets
the nominal level of the held-out per-night intervals of each model method against the share of
nights whose reference value lies inside (:func:`models.interval_coverage`). A comparison is kept
in memory until its nights, their exclusion, the active versions or the protocol change.
"""

from __future__ import annotations

import hashlib
import json
import threading
from typing import Any

import numpy as np
import pandas as pd
from cachetools import LRUCache
from sqlalchemy import select
from sqlalchemy.orm import Session, sessionmaker

from models import (
    AUTO,
    COMPARED_RULES,
    EPOCH_METRIC_NAMES,
    MODEL_METHODS,
    ComparisonTables,
    Night,
    NightRecord,
    RuleCalibration,
    ScoredNight,
    StudyProtocol,
    TrainingConfig,
    calibrate_rules,
    comparison_tables,
    held_out_comparison,
    interval_coverage,
    json_record,
    json_records,
    participant_groups,
)

from ..store import db
from ..store.protocols import study_protocol
from ..store.registry import StudyInfo, find_participant, find_study, load_nights, study_participants
from .agreement_stats import agreement_statistics
from .exports import EXPORT_METHODS, export_parameters
from .held_out import HeldOut, active_held_out, add_auto

__all__ = ["EXPORT_METHODS", "export_parameters", "participant_comparison", "study_comparison"]


def _fingerprint(session: Session, study: StudyInfo, participant_id: str | None, protocol: StudyProtocol) -> str:
    """Changes whenever the nights, their exclusion, the active versions or the protocol behind a comparison
    change (every labelled night of the study: the rules are calibrated on them all)."""
    query = (select(db.Participant.participant_id, db.Night.content_hash, db.Night.excluded)
             .join(db.Night, db.Night.participant_pk == db.Participant.pk)
             .where(db.Participant.study_pk == study.pk, db.Night.labelled))
    nights = sorted(f"{p}/{h}/{x}" for p, h, x in session.execute(query))
    active = sorted(session.scalars(select(db.ModelVersion.uid).where(db.ModelVersion.study_pk == study.pk,
                                                                      db.ModelVersion.is_active)))
    return hashlib.sha256(json.dumps([study.study_id, participant_id, nights, active,
                                      protocol.fingerprint()]).encode()).hexdigest()


def _participant_summaries(table: pd.DataFrame) -> dict[str, list[dict[str, Any]]]:
    """Per participant, per method (order of first appearance): nights compared and the mean and SD over
    nights of every epoch metric (one pass over the participant-level rows)."""
    rows = table[table["level"] == "participant"]
    found: dict[str, dict[Any, dict[str, dict[Any, Any]]]] = {}
    columns = ["participant_id", "method", "statistic", "n_nights", *EPOCH_METRIC_NAMES]
    for row in rows[columns].to_dict("records"):
        kinds = found.setdefault(str(row["participant_id"]), {}).setdefault(row["method"], {})
        kinds.setdefault(str(row["statistic"]), row)
    return {pid: [{"method": method, "n_nights": int(kinds["mean"]["n_nights"])}
                  | {m: json_record({"mean": float(kinds["mean"][m]), "sd": float(kinds["sd"][m])})
                     for m in EPOCH_METRIC_NAMES} for method, kinds in methods.items()]
            for pid, methods in found.items()}


def _night_summary(night_rows: pd.DataFrame) -> list[dict[str, Any]]:
    """Per method: nights compared and the mean and SD (ddof=1) over all those nights of every metric."""
    out = []
    for method, rows in night_rows.groupby("method", sort=False):
        values = rows[list(EPOCH_METRIC_NAMES)].astype(float)
        out.append({"method": method, "n_nights": int(len(rows))}
                   | {m: json_record({"mean": float(values[m].mean()), "sd": float(values[m].std(ddof=1))})
                      for m in EPOCH_METRIC_NAMES})
    return out


def _pooled_summary(table: pd.DataFrame) -> list[dict[str, Any]]:
    """Per method: nights compared and every epoch metric over all their epochs together."""
    rows = table[table["level"] == "pooled"]
    return [{"method": r["method"], "n_nights": int(r["n_nights"]), "n_epochs": int(r["n_epochs"])}
            | json_record({m: float(r[m]) for m in EPOCH_METRIC_NAMES}) for _, r in rows.iterrows()]


def _flow(pid: str, labelled: list[Night], held: dict[str, dict[str, Any]], counts: tuple[int, int],
          movement_time: str) -> dict[str, Any]:
    """A participant's nights and epochs: how many were compared, and how many were left out and why."""
    in_bed = unscored = no_counts = left_out = 0
    for night in labelled:
        bed = slice(*night.in_bed)
        reference = night.reference_sleep(movement_time=movement_time)  # type: ignore[arg-type]
        ref_nan = np.isnan(reference[bed]) if reference is not None else np.zeros(0, dtype=bool)
        missing = np.asarray(night.missing, dtype=bool)[bed]
        in_bed += int(missing.size)
        unscored += int(ref_nan.sum())
        no_counts += int(missing.sum())
        left_out += int((ref_nan | missing).sum())
    without = {m: sum(m not in held.get(n.content_hash, {}) for n in labelled) for m in (*MODEL_METHODS, AUTO)}
    return {"participant_id": pid, "n_nights": counts[0], "n_labelled_nights": len(labelled),
            "n_unlabelled_nights": counts[0] - len(labelled), "n_excluded_from_training": counts[1],
            "labelled_nights_without_held_out": without, "in_bed_epochs": in_bed,
            "reference_unscored_epochs": unscored, "epochs_without_counts": no_counts,
            "epochs_left_out": left_out, "epochs_compared": in_bed - left_out}


def _calibrations(every: dict[str, list[Night]]) -> dict[str, RuleCalibration]:
    """The compared rules calibrated leave-participants-out on every labelled night of the study."""
    movement_time = TrainingConfig().movement_time
    labelled = {pid: nights for pid, nights in every.items() if nights}
    records = [NightRecord.from_night(n, movement_time=movement_time) for nights in labelled.values() for n in nights]
    return calibrate_rules(records, COMPARED_RULES, groups=participant_groups(labelled)) if records else {}


#: (method, interval level) -> per night: the held-out intervals and the reference's parameters
_CoverageInputs = dict[tuple[str, float], list[tuple[dict[str, list[float]], dict[str, float]]]]


def _coverage_records(inputs: _CoverageInputs) -> list[dict[str, Any]]:
    """Per method and parameter: ``level`` (nominal), ``coverage`` (observed share of nights whose reference
    value lies in the interval), ``n_nights`` (nights with a defined interval and reference value) and
    ``median_width`` (over the nights' defined intervals, the parameter's unit), as
    :attr:`models.StudyComparison.interval_coverage` has them."""
    out = []
    order = {m: i for i, m in enumerate((*MODEL_METHODS, AUTO))}
    for (method, level), pairs in sorted(inputs.items(), key=lambda item: (order.get(item[0][0], len(order)),
                                                                           item[0][0], item[0][1])):
        found = interval_coverage([iv for iv, _ in pairs], [truth for _, truth in pairs], level=level)
        for name, figures in found.items():
            widths = [float(iv[name][1]) - float(iv[name][0]) for iv, _ in pairs if np.isfinite(iv[name]).all()]
            out.append(json_record({"method": method, "parameter": name, "level": figures["nominal"],
                                    "coverage": figures["observed"], "n_nights": int(figures["n_nights"]),
                                    "median_width": float(np.median(widths)) if widths else float("nan")}))
    return out


def _assemble(nights: dict[str, list[Night]], held_out: HeldOut, policies: dict[str, str],
              protocol: StudyProtocol, calibrations: dict[str, RuleCalibration],
              ) -> tuple[ComparisonTables, list[ScoredNight], list[str], list[dict[str, Any]]]:
    """The comparison tables of the labelled nights (:func:`models.comparison_tables`), their in-bed calls,
    notes and the interval coverage; ``auto``'s nested predictions are added to ``held_out``."""
    movement_time = TrainingConfig().movement_time
    compared = []
    coverage: _CoverageInputs = {}
    notes: list[str] = []
    for pid, labelled in nights.items():
        add_auto(held_out.setdefault(pid, {}), labelled, policy=policies[pid], movement_time=movement_time)
        missing: set[str] = set()
        for night in labelled:
            models_here = held_out.get(pid, {}).get(night.content_hash, {})
            missing |= set(MODEL_METHODS) - set(models_here)
            compared.append(held_out_comparison(night, models_here, participant_id=pid, movement_time=movement_time,
                                                parameter_options={"protocol": protocol},
                                                calibrations=calibrations))
            reference = {k: float("nan") if v is None else float(v)
                         for k, v in compared[-1].reference_parameters.as_dict().items()}
            for method, held in models_here.items():
                found = held.intervals
                if found is not None:
                    coverage.setdefault((method, float(found.level)), []).append((found.intervals, reference))
        if missing:
            notes.append(f"{pid}: no held-out {', '.join(sorted(missing))} figures for some or all labelled nights "
                         "(model not trained, too few labelled nights, or nights added after training)")
    return (comparison_tables(compared), [s for c in compared for s in c.scored], notes,
            _coverage_records(coverage))


def _compare(factory: sessionmaker[Session], study_id: str, participant_id: str | None) -> dict[str, Any]:
    with db.session_scope(factory) as session:
        study = find_study(session, study_id)
        everyone = study_participants(session, study=study)
        participants = everyone if participant_id is None else [find_participant(session, study, participant_id)]
        protocol = study_protocol(session, study)
        key = _fingerprint(session, study, participant_id, protocol)
        with _CACHE_LOCK:
            if key in _CACHE:
                return _CACHE[key]
        held_out, used = active_held_out(session, study)
        every = {p.participant_id: load_nights(session, participant=p, labelled_only=True) for p in everyone}
        nights = {p.participant_id: every[p.participant_id] for p in participants}
        choices = {p.participant_id: (p.chosen_method, (p.choice or {}).get("reason")) for p in participants}
        policies = {p.participant_id: (p.choice or {}).get("policy") or TrainingConfig().choice_policy
                    for p in participants}
        counts = _night_counts(session, [p.pk for p in participants])
    calibrations = _calibrations(every)
    tables, scored, notes, coverage = _assemble(nights, held_out, policies, protocol, calibrations)
    if not calibrations:
        notes.append("rules not calibrated: leave-participants-out calibration needs labelled nights of at least "
                     "two participants not sharing a night")
    movement_time = TrainingConfig().movement_time
    epoch_metrics = tables.epoch_metrics
    night_rows = epoch_metrics[epoch_metrics["level"] == "night"]
    summaries = _participant_summaries(epoch_metrics)
    result = {
        "study_id": study_id,
        "model_versions": used,
        "summary": _night_summary(night_rows),
        "pooled_epochs": _pooled_summary(epoch_metrics),
        "participants": [{"participant_id": pid, "n_labelled_nights": len(nights[pid]),
                          "chosen_method": choices[pid][0], "choice_reason": choices[pid][1],
                          "summary": summaries.get(pid, [])} for pid in nights],
        "nights": json_records(night_rows.drop(columns=["level", "statistic", "n_nights"])),
        "parameters": json_records(tables.parameters.drop(columns=["label"])),  # nights are named by night_id
        "bland_altman": json_records(tables.bland_altman),
        "flow": [_flow(p.participant_id, nights[p.participant_id], held_out.get(p.participant_id, {}),
                       counts.get(p.pk, (0, 0)), movement_time) for p in participants],
        "protocol": protocol.to_dict(),
        "rule_calibrations": [_calibration_entry(c, list(nights)) for c in calibrations.values()],
        "interval_coverage": coverage,
        "notes": notes,
    } | agreement_statistics(tables.parameters, scored, protocol=protocol)
    with _CACHE_LOCK:
        _CACHE[key] = result
    return result


def _calibration_entry(calibration: RuleCalibration, participant_ids: list[str]) -> dict[str, Any]:
    """A rule's calibration, with the value each compared participant's nights were scored with."""
    found = calibration.to_dict()
    per = found.get("per_participant", {})
    return json_record(found | {"method": calibration.name, "rule": calibration.method,
                                "per_participant": {pid: per[pid] for pid in participant_ids if pid in per}})


def _night_counts(session: Session, participant_pks: list[int]) -> dict[int, tuple[int, int]]:
    """Per participant row: nights stored and nights excluded from training."""
    rows = session.execute(select(db.Night.participant_pk, db.Night.excluded)
                           .where(db.Night.participant_pk.in_(participant_pks)))
    out: dict[int, tuple[int, int]] = {}
    for pk, excluded in rows:
        total, left = out.get(pk, (0, 0))
        out[pk] = (total + 1, left + bool(excluded))
    return out


#: entries of the study comparison that a participant's comparison has too (computed on their nights only)
_SHARED_ENTRIES = ("parameters", "flow", "protocol", "repeated_bland_altman", "participant_epochs",
                   "paired_differences", "icc", "equivalence", "interval_coverage")
_CACHE: LRUCache[str, dict[str, Any]] = LRUCache(maxsize=64)
_CACHE_LOCK = threading.Lock()


def participant_comparison(factory: sessionmaker[Session], *, study_id: str, participant_id: str) -> dict[str, Any]:
    """Held-out comparison of one participant's methods on their labelled nights.

    Returns
    -------
    comparison : dict
        ``participant_id``, ``chosen_method`` and ``choice_reason``, ``n_labelled_nights``,
        ``model_versions`` (active versions used), ``summary`` (per method: nights compared and
        mean/SD over nights of every epoch metric), ``nights`` (per night and method),
        ``bland_altman`` (this participant's nights only), ``notes``, and, on this participant's
        nights, the entries of :func:`study_comparison` named in ``_SHARED_ENTRIES``.
    """
    out = _compare(factory, study_id, participant_id)
    mine = out["participants"][0]
    return {"participant_id": participant_id, "chosen_method": mine["chosen_method"],
            "choice_reason": mine["choice_reason"], "n_labelled_nights": mine["n_labelled_nights"],
            "model_versions": {k: v for k, v in out["model_versions"].items()
                               if k == "pooled" or k == f"personal:{participant_id}"},
            "summary": mine["summary"], "nights": out["nights"], "bland_altman": out["bland_altman"],
            "rule_calibrations": out["rule_calibrations"], "notes": out["notes"]} | {k: out[k] for k in _SHARED_ENTRIES}


def study_comparison(factory: sessionmaker[Session], *, study_id: str) -> dict[str, Any]:
    """Study-wide held-out comparison per method and participant; Bland-Altman per method and parameter.

    Returns
    -------
    comparison : dict
        ``summary`` (per method: mean/SD over all held-out nights of every epoch metric),
        ``pooled_epochs`` (per method, every metric over all held-out epochs together),
        ``participants`` (per participant: chosen method and the mean/SD over nights per
        method), ``nights`` (epoch metrics per night and method), ``parameters`` (sleep
        parameters per night and method), ``bland_altman`` (one row per method and parameter:
        n, bias, limits of agreement and their CIs, ...), ``model_versions``, ``notes``, ``protocol``
        (the definitions applied), ``flow`` (per participant: nights and epochs compared and left
        out, and why) and the entries of :func:`service.results.agreement_stats.agreement_statistics`
        (``repeated_bland_altman``, ``participant_epochs``, ``paired_differences``, ``icc``,
        ``equivalence``), ``rule_calibrations`` (per compared rule: its calibrated parameter, the
        published value, the value chosen without each participant, the grid and its mean balanced
        accuracies), ``interval_coverage`` (per model method and parameter: nominal ``level``, observed
        ``coverage``, ``n_nights``, ``median_width``; empty for models without decoding). Every method
        includes ``auto`` with its own nested held-out figures and each
        rule's ``<rule>:calibrated`` variant (leave-participants-out).
    """
    return _compare(factory, study_id, None)
