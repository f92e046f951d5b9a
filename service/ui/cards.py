"""Model cards: what a stored model version is, how it was validated and how (not) to use it.

One card per model version, built from the registry record (:class:`service.store.versions.VersionInfo`
and its :class:`~service.store.metadata.ModelMetadata`) as a plain dict (the JSON download) and
rendered from that dict as Markdown, so the two downloads always say the same thing. A version
trained on nights whose PSG reference was stored although it looked implausible (its
``flagged_nights``) gets a warning naming them, first among the card's ``warnings`` and at the top
of the Markdown; the participant and study pages repeat it beside the card's links. A version with
a calibrated, decoded model states its calibration (Brier score before and after, the reliability
curve as a table: :mod:`service.ui.calibration_view`) and its decoder.
"""

from __future__ import annotations

from typing import Any

from ..store.activation import selection_wording
from ..store.metadata import FlaggedNight, ModelMetadata
from ..store.versions import VersionInfo
from .templating import CAUTIONS, TEMPLATES

__all__ = ["CARD_METRICS", "model_card", "model_card_markdown", "training_warnings"]

#: Held-out metrics reported on a card, in order.
CARD_METRICS: tuple[str, ...] = ("balanced_accuracy", "sensitivity", "specificity", "ppv", "npv", "accuracy",
                                 "kappa", "mcc", "auc")

_VALIDATION = {
    "personal": ("Nested validation on the participant's own PSG-labelled nights. Outer loop: each labelled night "
                 "is held out once; the hyper-parameter search (forward-chained inner splits over the other "
                 "nights, early stopping and threshold) runs without it, and the refitted model scores it. The "
                 "figures below are the mean and SD over those held-out nights. The stored model repeats the "
                 "search on all labelled nights."),
    "pooled": ("Leave-participants-out validation: participants are split into folds; every participant's "
               "held-out figures come from a model that saw none of their nights (also not for early stopping "
               "or the threshold). The figures below are the mean and SD over the held-out nights of all "
               "participants. The stored model repeats the procedure on all participants; per-participant "
               "offsets are estimated from their labelled nights."),
}
_INTENDED = {
    "personal": ("Research scoring of sleep and wake per epoch from wrist-actigraphy activity counts of this one "
                 "participant, recorded the same way (device, wrist, epoch length) as the training nights."),
    "pooled": ("Research scoring of sleep and wake per epoch from wrist-actigraphy activity counts of this study's "
               "participants, with the participant offset where the participant has labelled nights; also the "
               "fallback for participants without enough labelled nights for a personal model."),
}


#: What each warning QC code of a training night means, in a card's warning.
_WARNING_MEANING = {"reference_implausible": "an implausible PSG reference (stored on purpose although it failed "
                                             "the plausibility checks)"}


def _night_name(night: FlaggedNight, *, with_participant: bool) -> str:
    name = f"night {night.night_id}" + (f" ({night.label})" if night.label else "")
    return f"{night.participant_id} {name}" if with_participant else name


def training_warnings(meta: ModelMetadata, *, pooled: bool = False) -> list[str]:
    """Warnings about a version's training nights: one sentence per warning QC code they carried.

    Parameters
    ----------
    meta : ModelMetadata
    pooled : bool, default=False
        Name each night with its participant (a pooled model's nights are of many).

    Returns
    -------
    list of str
        E.g. ``"Warning: 1 of 4 training night(s) had an implausible PSG reference (...): night
        3f2a... (n2). The model learned from that reference; ..."``; empty when none.
    """
    out = []
    codes = dict.fromkeys(code for night in meta.flagged_nights for code in night.codes)
    for code in codes:
        nights = [n for n in meta.flagged_nights if code in n.codes]
        names = ", ".join(_night_name(n, with_participant=pooled) for n in nights)
        out.append(f"Warning: {len(nights)} of {len(meta.training_nights)} training night(s) had "
                   f"{_WARNING_MEANING.get(code, f'the QC flag {code}')}: {names}. The model learned from that "
                   "reference; its held-out figures and scorings may be wrong.")
    return out


#: the pages show a version's warnings beside its card's links, in the card's words
TEMPLATES.env.globals["training_warnings"] = training_warnings


def model_card(version: VersionInfo, *, study_id: str, participant_id: str | None,
               choice: dict[str, Any] | None = None, calibration: dict[str, Any] | None = None) -> dict[str, Any]:
    """The card of one model version as a JSON-able dict.

    Parameters
    ----------
    version : VersionInfo
    study_id : str
    participant_id : str or None
        Owner of a personal model; None for a pooled model.
    choice : dict, optional
        The participant's choice of method made with this version (``method``, ``reason``), if
        any; shown as the card's method choice.
    calibration : dict, optional
        :func:`service.ui.calibration_view.calibration_facts` of the version's model; None (a
        model without decoding) gives ``calibration: null``.
    """
    meta = version.metadata
    metrics = meta.metrics.as_dict()
    nights = meta.training_nights
    flagged = {(n.participant_id, n.night_id): list(n.codes) for n in meta.flagged_nights}
    return {
        "title": (f"Personal model v{version.version} of participant {participant_id}" if participant_id
                  else f"Pooled model v{version.version}") + f", study {study_id}",
        "model": {"kind": version.kind, "version": version.version, "status": version.status,
                  "created_at": version.created_at.isoformat(timespec="seconds"), "training_job": version.job_id,
                  "study_id": study_id, "participant_id": participant_id},
        "warnings": training_warnings(meta, pooled=participant_id is None),
        "intended_use": _INTENDED.get(version.kind, ""),
        "data": {
            "training_nights": len(nights),
            "participants": sorted({n.participant_id for n in nights}),
            "nights": [{"participant_id": n.participant_id, "night_id": n.night_id, "label": n.label,
                        "qc_warnings": flagged.get((n.participant_id, n.night_id), [])} for n in nights],
            "flagged_nights": [n.model_dump(mode="json") for n in meta.flagged_nights],
            "feature_set_version": meta.feature_set_version,
            "corrected_nights": meta.corrected_nights,
            "correction_weight": meta.correction_weight,
        },
        "validation": {"scheme": _VALIDATION.get(version.kind, ""), "held_out_nights": meta.metrics.n_nights,
                       "removed_held_out_nights": list(meta.removed_held_out_nights),
                       "metrics": {name: metrics[name] for name in CARD_METRICS if name in metrics},
                       "selection_metric": None if meta.selection is None else meta.selection.metric,
                       "activation": None if meta.activation is None else meta.activation.model_dump(mode="json"),
                       "selection_figures": selection_wording(meta.activation)},
        "threshold": {"p_sleep": meta.threshold,
                      "meaning": "an epoch is called sleep when the model's sleep probability is at least this"},
        "calibration": calibration,
        "method_choice": choice,
        "hyperparameters": dict(meta.hyperparameters),
        "library_versions": dict(meta.library_versions),
        "cautions": [*CAUTIONS,
                     f"Validated on {meta.metrics.n_nights or 'few'} held-out night(s); figures on other people, "
                     "devices, wear positions or epoch lengths may be worse.",
                     "Sleep is the positive class throughout (1 = sleep, 0 = wake)."],
    }


def _fmt(value: Any) -> str:
    return "–" if value is None else f"{value:.3f}" if isinstance(value, float) else str(value)


def _calibration_lines(calibration: dict[str, Any] | None) -> list[str]:
    """The card's calibration section in Markdown."""
    lines = ["## Calibration", ""]
    if calibration is None:
        return lines + ["No calibration: the model's raw P(sleep) is thresholded (trained before calibrated, "
                        "decoded models).", ""]
    lines += [f"Calibrator: {calibration.get('method') or '–'}, fitted on the validation predictions of "
              f"{calibration.get('n_inner_nights') or '–'} night(s) of the training.", "",
              "| Brier score (lower is better) | value |", "|---|---|",
              f"| raw P(sleep) | {_fmt(calibration.get('brier_raw'))} |",
              f"| calibrated P(sleep) | {_fmt(calibration.get('brier_calibrated'))} |", "",
              "Reliability curve (mean predicted P(sleep) against the observed share of sleep epochs per bin):", "",
              "| predicted | observed | epochs |", "|---|---|---|"]
    curve = calibration.get("reliability") or {}
    for p, o, n in zip(curve.get("predicted", []), curve.get("observed", []), curve.get("count", []), strict=False):
        lines.append(f"| {_fmt(p)} | {_fmt(o)} | {_fmt(n)} |")
    decoder = calibration.get("decoder") or {}
    if decoder:
        lines += ["", "Decoder: " + ", ".join(f"{k} {_fmt(v)}" for k, v in decoder.items())]
    return lines + [""]


def model_card_markdown(card: dict[str, Any]) -> str:
    """The card as Markdown (same content as the dict)."""
    m, data, validation = card["model"], card["data"], card["validation"]
    lines = [f"# Model card: {card['title']}", "",
             f"- Kind: {m['kind']}; version {m['version']} ({m['status']}); created {m['created_at']} UTC",
             f"- Training job: {m['training_job'] or '–'}", ""]
    warnings = card.get("warnings", [])
    if warnings:
        lines += ["## Warnings", "", *(f"- **{w}**" for w in warnings), ""]
    lines += ["## Intended use", "", card["intended_use"], "",
             "## Data used", "",
             f"- Training nights: {data['training_nights']} "
             f"(participants: {', '.join(data['participants']) or '–'})",
             f"- Corrected nights (reviewed labels, not PSG; final fit only, never held out): "
             f"{data.get('corrected_nights', 0)}"
             + (f" at weight {data['correction_weight']:g}" if data.get("correction_weight") is not None else ""),
             f"- Feature set version: {data['feature_set_version'] or '–'}", ""]
    for n in data["nights"]:
        lines.append(f"  - {n['participant_id']} night {n['night_id']}" + (f" ({n['label']})" if n["label"] else "")
                     + (f" — flagged: {', '.join(n['qc_warnings'])}" if n.get("qc_warnings") else ""))
    lines += ["", "## Validation", "", validation["scheme"], "",
              f"Held-out nights: {validation['held_out_nights'] or '–'}"
              + (f" (figures computed again without {len(removed)} night(s) deleted since: {', '.join(removed)})"
                 if (removed := validation.get("removed_held_out_nights")) else ""), "",
              "| metric | mean | SD |", "|---|---|---|"]
    for name, stats in validation["metrics"].items():
        lines.append(f"| {name.replace('_', ' ')} | {_fmt(stats.get('mean'))} | {_fmt(stats.get('sd'))} |")
    if "selection_figures" in validation:
        lines += ["", "### Activation", "", f"{validation['selection_figures'].capitalize()}."]
        if (act := validation.get("activation")) and act["against_version"] is not None:
            lines += ["", f"| {act['metric'].replace('_', ' ')} | nights | this version | version "
                      f"{act['against_version']} |", "|---|---|---|---|",
                      f"| compared (used to decide) | {len(act['compared_nights'])} | {_fmt(act['candidate_value'])} "
                      f"| {_fmt(act['active_value'])} |",
                      f"| not used to decide | {len(act['fresh_nights'])} | {_fmt(act['fresh_value'])} | – |"]
    lines += ["", "## Threshold", "", f"P(sleep) ≥ {_fmt(card['threshold']['p_sleep'])}: "
              f"{card['threshold']['meaning']}.", ""]
    lines += _calibration_lines(card.get("calibration"))
    if card["method_choice"]:
        choice = card["method_choice"]
        lines += ["## Method choice", "", f"Chosen: {choice.get('method', '–')}. {choice.get('reason', '')}", ""]
    lines += ["## Hyperparameters", ""]
    lines += [f"- {k}: {v}" for k, v in card["hyperparameters"].items()] or ["- –"]
    lines += ["", "## Library versions", ""]
    lines += [f"- {k}: {v}" for k, v in card["library_versions"].items()] or ["- –"]
    lines += ["", "## Cautions", ""] + [f"- {c}" for c in card["cautions"]] + [""]
    return "\n".join(lines)
