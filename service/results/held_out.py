"""The held-out predictions behind the comparisons and exports, and ``auto``'s nested predictions.

A model is only ever judged on nights it did not see: the predictions stored with the *active*
personal and pooled versions (the nested validation of their training). ``auto`` (the method a
participant is scored with) gets its own held-out predictions by nested choice
(:func:`models.nested_choice`): for each labelled night the choice among personal, pooled and
pooled+offset is made from the participant's *other* nights (its overlapping copies left out
with it), and auto's prediction of the night is the chosen model's held-out prediction.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence

import pandas as pd
from sqlalchemy.orm import Session

from models import AUTO, MODEL_METHODS, HeldOutNight, MethodChoice, Night, compare_night, fold_groups, nested_choice

from ..store import versions
from ..store.registry import StudyInfo, study_participants

__all__ = ["HeldOut", "active_held_out", "add_auto", "version_of"]

#: participant -> night content hash -> method -> held-out prediction
HeldOut = dict[str, dict[str, dict[str, HeldOutNight]]]


def active_held_out(session: Session, study: StudyInfo) -> tuple[HeldOut, dict[str, int | None]]:
    """Held-out predictions of the active versions, and the versions used (``pooled``, ``personal:<id>``)."""
    out: HeldOut = {}
    pooled = versions.active_version(session, study=study, participant=None)
    used: dict[str, int | None] = {"pooled": None if pooled is None else pooled.version}
    found = [] if pooled is None else versions.load_held_out(session, pooled)
    for participant in study_participants(session, study=study):
        personal = versions.active_version(session, study=study, participant=participant)
        if personal is not None:
            used[f"personal:{participant.participant_id}"] = personal.version
            found += versions.load_held_out(session, personal)
    for h in found:
        out.setdefault(h.participant_id, {}).setdefault(h.night_hash, {})[h.method] = h
    return out, used


def version_of(method: str, participant_id: str, used: dict[str, int | None]) -> int | None:
    """The version number behind a model method's held-out prediction (None for rules)."""
    if method == "personal":
        return used.get(f"personal:{participant_id}")
    return used.get("pooled") if method in MODEL_METHODS else None


def add_auto(by_hash: dict[str, dict[str, HeldOutNight]], labelled: Sequence[Night], *, policy: str,
             movement_time: str = "wake") -> MethodChoice | None:
    """Add ``auto``'s nested held-out prediction to every labelled night that has model predictions.

    Parameters
    ----------
    by_hash : dict
        One participant's held-out predictions (night hash -> method -> prediction); changed in place.
    labelled : sequence of Night
        The participant's labelled nights.
    policy : str
        Epoch metric the choice compares (higher is better).

    Returns
    -------
    MethodChoice or None
        None when no labelled night has a model prediction.
    """
    groups = dict(zip((n.night_id for n in labelled), fold_groups(list(labelled)), strict=True)) if labelled else {}
    rows = []
    for night in labelled:
        held = {m: h for m, h in by_hash.get(night.content_hash, {}).items() if m in MODEL_METHODS}
        reference = night.reference_sleep(movement_time=movement_time)  # type: ignore[arg-type]
        if not held or reference is None:
            continue
        compared = compare_night(reference, {m: (h.sleep, h.p_sleep) for m, h in held.items()},
                                 epoch_seconds=night.epoch_seconds, lights_off_idx=night.in_bed[0],
                                 lights_on_idx=night.in_bed[1], night_id=night.night_id, missing=night.missing)
        rows += [{"night_id": night.night_id, "method": m} | metrics for m, metrics in compared.epoch_metrics.items()]
    if not rows:
        return None
    choice = nested_choice(pd.DataFrame(rows), policy=policy, night_groups=groups)
    by_id = {n.night_id: n for n in labelled}
    for night_id, chosen in zip(choice.per_night["night_id"], choice.per_night["chosen"], strict=True):
        held = by_hash[by_id[night_id].content_hash]
        held[AUTO] = dataclasses.replace(held[chosen], method=AUTO)
    return choice
