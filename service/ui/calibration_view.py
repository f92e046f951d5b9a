"""The calibration of a model version as the pages show it: Brier scores and the reliability curve.

The facts are the fitted decoding's own (:attr:`models.SleepModel.decoding_`, its ``info``), fitted on
the validation predictions of the training, never on the nights the held-out figures come from:

- ``brier_raw`` and ``brier_calibrated``: the Brier score (mean squared difference between P(sleep)
  and the 0/1 reference, Brier 1950; lower is better) of the model's probabilities before and after
  calibration;
- the reliability curve: per bin of predicted P(sleep), the mean prediction against the observed
  share of sleep epochs (DeGroot & Fienberg 1983); a calibrated model lies on the diagonal.

A version without decoding (trained before calibrated, decoded models) has no calibration facts.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
from matplotlib.figure import Figure
from sqlalchemy.orm import Session

from models import SleepModel

from ..store import versions
from ..store.snapshots import ParticipantInfo, StudyInfo
from ..store.versions import VersionInfo
from .figures import GREY, OKABE_ITO, inline_svg

__all__ = ["active_calibrations", "calibration_facts", "draw_reliability", "reliability_svg", "version_calibration"]

_COLOURS = (OKABE_ITO["blue"], OKABE_ITO["vermillion"], OKABE_ITO["bluish_green"], OKABE_ITO["orange"])


def calibration_facts(model: SleepModel) -> dict[str, Any] | None:
    """The calibration and decoder facts of a fitted model, JSON-able; None without decoding.

    Returns
    -------
    dict or None
        ``method`` (calibrator), ``brier_raw``, ``brier_calibrated``, ``reliability``
        (``predicted``, ``observed``, ``count`` per bin), ``decoder`` (its settings and tuning
        figures) and ``n_inner_nights``.
    """
    decoding = model.decoding_
    if decoding is None:
        return None
    info = decoding.info
    calibration = dict(info.get("calibration") or {})
    reliability = calibration.get("reliability") or {}
    return {"method": calibration.get("method"), "brier_raw": calibration.get("brier_raw"),
            "brier_calibrated": calibration.get("brier_calibrated"),
            "reliability": {k: list(reliability.get(k) or []) for k in ("predicted", "observed", "count")},
            "decoder": dict(info.get("decoder") or {}), "n_inner_nights": info.get("n_inner_nights")}


def version_calibration(session: Session, version: VersionInfo) -> dict[str, Any] | None:
    """:func:`calibration_facts` of a stored model version (None for a version without decoding)."""
    return calibration_facts(versions.load_model(session, version))


def active_calibrations(session: Session, *, study: StudyInfo,
                        participant: ParticipantInfo) -> dict[str, dict[str, Any]]:
    """:func:`version_calibration` of the participant's active personal model and the study's active pooled
    model, by label (``"personal v2"``, ``"pooled v1"``); models without decoding are left out."""
    found = [versions.active_version(session, study=study, participant=participant),
             versions.active_version(session, study=study, participant=None)]
    return {f"{v.kind} v{v.version}": facts for v in found
            if v is not None and (facts := version_calibration(session, v)) is not None}


def draw_reliability(fig: Figure, curves: Mapping[str, Mapping[str, Any]]) -> None:
    """Reliability curves: observed share of sleep against mean predicted P(sleep), one line per model.

    Parameters
    ----------
    curves : mapping of str to dict
        Label -> :func:`calibration_facts` (its ``reliability`` is drawn; bins without epochs are
        left out; marker area grows with the bin's epochs).
    """
    ax = fig.subplots()
    ax.plot([0, 1], [0, 1], color=GREY, linestyle=":", linewidth=0.9, label="perfect calibration")
    for k, (label, facts) in enumerate(curves.items()):
        curve = facts.get("reliability") or {}
        predicted = np.array([np.nan if v is None else v for v in curve.get("predicted", [])], dtype=np.float64)
        observed = np.array([np.nan if v is None else v for v in curve.get("observed", [])], dtype=np.float64)
        count = np.array([0 if v is None else v for v in curve.get("count", [])], dtype=np.float64)
        keep = np.isfinite(predicted) & np.isfinite(observed) & (count > 0)
        if not keep.any():
            continue
        size = 12 + 60 * count[keep] / count[keep].max()
        colour = _COLOURS[k % len(_COLOURS)]
        ax.plot(predicted[keep], observed[keep], color=colour, linewidth=1.0)
        ax.scatter(predicted[keep], observed[keep], s=size, color=colour, label=label, zorder=3)
    ax.set_xlim(0, 1)
    ax.set_ylim(0, 1)
    ax.set_aspect("equal")
    ax.set_xlabel("predicted P(sleep) (mean in bin)")
    ax.set_ylabel("observed share of sleep epochs")
    ax.legend(loc="upper left", frameon=False, fontsize=8)


def reliability_svg(curves: Mapping[str, Mapping[str, Any]], *, salt: str) -> str | None:
    """:func:`draw_reliability` as an inline ``<svg>`` element; None when no curve has points."""
    if not any(any(c > 0 for c in (f.get("reliability") or {}).get("count", []) if c is not None)
               for f in curves.values()):
        return None
    return inline_svg(draw_reliability, curves, size_in=(4.2, 4.2), salt=salt)
