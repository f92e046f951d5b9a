"""What the night page shows: the night, every method's scoring, the parameter table, the figure data.

Scorings come from :func:`service.results.scoring.score_night` (cached in the database after the first
request), so the page, its figure and its CSV show the same numbers as the API's scoring route. A model
with calibrated, decoded probabilities also brings its per-night intervals (shown beside the parameter
values and as whiskers, with the reference value where the night has one) and, for the HMM decoder, the
posterior P(sleep) drawn in the figure.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy.orm import Session, sessionmaker

from models import COMPARED_RULES, MODEL_METHODS, PARAMETER_NAMES, Night, compare_night

from ..errors import BadRequest, Unprocessable
from ..results.night_intervals import INTERVAL_PARAMETERS
from ..results.scoring import SCORING_METHODS, score_night
from ..store import registry, versions
from ..store.db import session_scope
from ..store.registry import NightInfo
from .figures import style_of
from .night_figure import NightPanels

__all__ = ["AGREEMENT_METRICS", "AUTO", "NIGHT_METHODS", "TABLE_PARAMETERS", "MethodOutcome", "NightView",
           "load_night_view"]

AUTO = "auto"
#: Methods offered by the selector and compared in the parameter table.
NIGHT_METHODS: tuple[str, ...] = (*COMPARED_RULES, *MODEL_METHODS)
#: Rows of the parameter table (unscored epochs are reported beside it).
TABLE_PARAMETERS: tuple[str, ...] = tuple(p for p in PARAMETER_NAMES if p != "unscored_epochs")
#: Columns of the night's agreement table.
AGREEMENT_METRICS: tuple[str, ...] = ("sensitivity", "specificity", "balanced_accuracy", "accuracy", "kappa", "auc")
_FALLBACK = "cole-kripke"


@dataclass(frozen=True)
class MethodOutcome:
    """A method's scoring body (the API's JSON), or why it is not available.

    ``threshold`` is the model's probability threshold and ``trained_on_night`` whether the model
    saw this night in training (its agreement here is then not a held-out figure); both None for
    a rule.
    """

    method: str
    body: dict[str, Any] | None
    unavailable: str | None = None
    threshold: float | None = None
    trained_on_night: bool | None = None


def _version_facts(factory: sessionmaker[Session], study_id: str, participant_id: str, night_hash: str,
                   body: dict[str, Any]) -> tuple[float | None, bool | None]:
    """Threshold of the model version behind a scoring body, and whether it was trained on the night."""
    if body.get("model_version") is None:
        return None, None
    with session_scope(factory) as session:
        study = registry.find_study(session, study_id)
        owner = registry.find_participant(session, study, participant_id) if body["method"] == "personal" else None
        version = versions.get_version(session, study=study, participant=owner, version=int(body["model_version"]))
    return version.metadata.threshold, night_hash in set(version.metadata.training_hashes)


def _score(factory: sessionmaker[Session], study_id: str, participant_id: str, night: NightInfo,
           method: str) -> MethodOutcome:
    try:
        body = json.loads(score_night(factory, study_id=study_id, participant_id=participant_id,
                                      night_id=night.night_id, method=method))
    except Unprocessable as exc:
        if exc.code != "no_model":
            raise
        return MethodOutcome(method, None, "not trained yet — train a model first")
    threshold, trained_on = _version_facts(factory, study_id, participant_id, night.content_hash, body)
    return MethodOutcome(method, body, threshold=threshold, trained_on_night=trained_on)


@dataclass(frozen=True, eq=False)
class NightView:
    """The night page's content.

    Attributes
    ----------
    info : NightInfo
        Stored metadata and QC flags.
    night : Night
    requested : str
        The selector's value (``"auto"`` or a method).
    shown : str or None
        Concrete method drawn and highlighted; None when no method is shown.
    outcomes : dict of str to MethodOutcome
        Every method of :data:`NIGHT_METHODS` (empty for a viewer without the analyst role).
    notice : str or None
        Why the shown method differs from the requested one.
    """

    info: NightInfo
    night: Night
    requested: str
    shown: str | None
    outcomes: dict[str, MethodOutcome] = field(default_factory=dict)
    notice: str | None = None

    @property
    def shown_body(self) -> dict[str, Any] | None:
        if self.shown is None:
            return None
        outcome = self.outcomes.get(self.shown)
        return None if outcome is None else outcome.body

    @property
    def reference_sleep(self) -> np.ndarray | None:
        """Reference as 1 = sleep, 0 = wake, NaN = unscored; None for an unlabelled night."""
        return self.night.reference_sleep() if self.night.has_reference else None

    def disagreement(self) -> np.ndarray | None:
        """In-bed, scored epochs where the shown method's call differs from the reference."""
        body, ref = self.shown_body, self.reference_sleep
        if body is None or ref is None:
            return None
        first, stop = self.night.in_bed
        in_bed = np.zeros(self.night.n_epochs, dtype=bool)
        in_bed[first:stop] = True
        calls = _calls(body["sleep"])
        return in_bed & np.isfinite(ref) & np.isfinite(calls) & (calls != np.nan_to_num(ref, nan=-1))

    def panels(self) -> NightPanels:
        """Data of the night figure."""
        body = self.shown_body
        threshold = None if self.shown is None else self.outcomes[self.shown].threshold
        return NightPanels(
            times=self.night.epoch_times(), epoch_seconds=self.night.epoch_seconds, counts=self.night.counts,
            in_bed=self.night.in_bed, stages=self.night.reference if self.night.has_reference else None,
            method=self.shown if body is not None else None,
            sleep=None if body is None else _calls(body["sleep"]),
            p_sleep=None if body is None or body.get("p_sleep") is None else _floats(body["p_sleep"]),
            p_posterior=None if body is None or body.get("p_sleep_posterior") is None
            else _floats(body["p_sleep_posterior"]),
            threshold=threshold, disagree=self.disagreement(),
            qc=[(int(a), int(b), flag["code"]) for flag in self.info.qc for a, b in flag["ranges"]])

    def reference_parameters(self) -> dict[str, Any] | None:
        """Sleep parameters of the reference labels over the in-bed epochs (None if unlabelled), as in
        every comparison (:func:`models.compare_night`)."""
        ref = self.reference_sleep
        if ref is None:
            return None
        first, stop = self.night.in_bed
        return compare_night(ref, {}, epoch_seconds=self.night.epoch_seconds, lights_off_idx=first,
                             lights_on_idx=stop, missing=self.night.missing).reference_parameters.as_dict()

    def parameter_table(self) -> pd.DataFrame:
        """Parameters side by side: one row per parameter, one column for the reference and each method."""
        columns: dict[str, dict[str, Any]] = {}
        reference = self.reference_parameters()
        if reference is not None:
            columns["reference"] = reference
        for method, outcome in self.outcomes.items():
            if outcome.body is not None:
                columns[method] = outcome.body["parameters"]
        table = pd.DataFrame({name: [values.get(p) for p in TABLE_PARAMETERS] for name, values in columns.items()},
                             index=pd.Index(TABLE_PARAMETERS, name="parameter"))
        return table.astype("float64")

    def interval_cells(self) -> dict[tuple[str, str], tuple[float | None, float | None]]:
        """``(method, parameter) -> (low, high)`` of every available method with per-night intervals."""
        return {(method, name): (_number(ends[0]), _number(ends[1]))
                for method, outcome in self.outcomes.items() if outcome.body and outcome.body.get("intervals")
                for name, ends in outcome.body["intervals"].items()}

    def interval_rows(self) -> list[dict[str, Any]]:
        """The shown method's intervals, one row per parameter of :data:`INTERVAL_PARAMETERS` (empty without).

        Each row: ``parameter``, ``value`` (the method's), ``low``, ``high``, ``reference`` (None
        when unlabelled), ``inside`` (whether the reference lies in the interval, None without both)
        and the whisker positions ``x_low``, ``x_high``, ``x_value``, ``x_reference`` in percent of
        the row's own range (smallest to largest of those values).
        """
        body = self.shown_body
        if body is None or not body.get("intervals"):
            return []
        reference = self.reference_parameters() or {}
        rows = []
        for name in INTERVAL_PARAMETERS:
            low, high = (_number(v) for v in body["intervals"].get(name, (None, None)))
            value, ref = _number(body["parameters"].get(name)), _number(reference.get(name))
            finite = [v for v in (low, high, value, ref) if v is not None]
            start = min(finite) if finite else 0.0
            width = (max(finite) - start) if finite and max(finite) > start else 1.0

            def at(v: float | None, start: float = start, width: float = width) -> float | None:
                return None if v is None else 100.0 * (v - start) / width

            inside = None if low is None or high is None or ref is None else bool(low <= ref <= high)
            rows.append({"parameter": name, "value": value, "low": low, "high": high, "reference": ref,
                         "inside": inside, "x_low": at(low), "x_high": at(high), "x_value": at(value),
                         "x_reference": at(ref)})
        return rows

    def agreement_table(self) -> pd.DataFrame:
        """Epoch-by-epoch agreement with the reference: one row per available method (empty if unlabelled)."""
        rows = {m: o for m, o in self.outcomes.items() if o.body is not None and o.body.get("agreement")}
        epochs = [(o.body or {})["agreement"]["epochs"] for o in rows.values()]
        columns = ["n_epochs", *AGREEMENT_METRICS]
        frame = pd.DataFrame([[e.get(c) for c in columns] for e in epochs], columns=columns,
                             index=pd.Index(list(rows), name="method"))
        frame = frame.astype("float64")
        frame.insert(0, "trained_on_night", [bool(o.trained_on_night) for o in rows.values()])
        return frame

    def summary(self) -> dict[str, Any]:
        """Key numbers for the caption and the figure's text alternative."""
        first, stop = self.night.in_bed
        out: dict[str, Any] = {"n_epochs": self.night.n_epochs, "in_bed_epochs": stop - first,
                               "hours": self.night.n_epochs * self.night.epoch_seconds / 3600,
                               "qc": [f"{f['code']} ({f['n_epochs']} epochs)" for f in self.info.qc],
                               "unscored": None}
        reference = self.reference_parameters()
        if reference is not None:
            out["unscored"] = reference.get("unscored_epochs")
            out["reference_tst_min"] = reference.get("tst_min")
        disagree = self.disagreement()
        body, ref = self.shown_body, self.reference_sleep
        if body is not None:
            out["method_tst_min"] = body["parameters"].get("tst_min")
        if disagree is not None and body is not None and ref is not None:
            scored = int(np.isfinite(ref[first:stop]).sum())
            out["disagree"] = int(disagree.sum())
            out["scored_in_bed"] = scored
            out["disagree_pct"] = 100.0 * out["disagree"] / scored if scored else None
            epochs = (body.get("agreement") or {}).get("epochs") or {}
            out["agreement"] = {k: epochs.get(k) for k in ("sensitivity", "specificity", "balanced_accuracy",
                                                           "kappa")}
        return out

    def caption(self) -> str:
        """Printed under the night figure."""
        s = self.summary()
        parts = ["Activity counts (symmetric log scale) with lights-off and lights-on (dashed lines)"]
        if self.night.has_reference:
            parts.append("the PSG hypnogram")
        if self.shown is not None and "disagree" in s:
            parts.append(f"{style_of(self.shown).label} calls; {s['disagree']} of {s['scored_in_bed']} scored "
                         "in-bed epochs disagree with the reference (shaded)")
        elif self.shown is not None and self.shown_body is not None:
            parts.append(f"{style_of(self.shown).label} calls")
        if self.shown_body is not None and self.shown_body.get("p_sleep_posterior") is not None:
            parts.append("the decoder's posterior P(sleep) dashed")
        return "; ".join(parts) + "; QC flags hatched grey."

    def alt_text(self) -> str:
        """Text alternative of the night figure, with its key numbers."""
        s = self.summary()
        parts = [f"Activity counts of {s['hours']:.1f} hours ({s['n_epochs']} epochs of {self.night.epoch_seconds} s) "
                 f"on a logarithmic scale over clock time, with lights-off and lights-on marked "
                 f"({s['in_bed_epochs']} in-bed epochs)."]
        if self.night.has_reference:
            parts.append(f"Below, the PSG hypnogram; reference TST {_fmt(s.get('reference_tst_min'))} min.")
        else:
            parts.append("The night has no PSG reference.")
        if self.shown is not None and self.shown_body is not None:
            parts.append(f"Bottom: {style_of(self.shown).label} sleep/wake calls"
                         + (" and sleep probability" if self.shown_body.get("p_sleep") else "")
                         + (" with the decoder's posterior sleep probability"
                            if self.shown_body.get("p_sleep_posterior") else "")
                         + f"; TST {_fmt(s.get('method_tst_min'))} min.")
            if "disagree" in s:
                parts.append(f"{s['disagree']} of {s['scored_in_bed']} scored in-bed epochs "
                             f"({_fmt(s['disagree_pct'])}%) differ from the reference and are highlighted.")
        parts.append("QC flags shaded: " + (", ".join(s["qc"]) if s["qc"] else "none") + ".")
        return " ".join(parts)


def _fmt(value: Any) -> str:
    return "–" if value is None or not np.isfinite(value) else f"{value:.1f}"


def load_night_view(factory: sessionmaker[Session], *, study_id: str, participant_id: str, night_id: str,
                    method: str, analyse: bool) -> NightView:
    """Load a night and, for an analyst, score it with every method.

    Parameters
    ----------
    method : str
        ``"auto"`` (the participant's chosen method) or a method of :data:`NIGHT_METHODS` or
        :data:`service.results.scoring.SCORING_METHODS`.
    analyse : bool
        Whether to score (analyst role); without it only the night itself is shown.

    Raises
    ------
    NotFound
        If the study, participant or night does not exist.
    BadRequest
        If ``method`` is unknown.
    """
    if method not in SCORING_METHODS:
        raise BadRequest(f"unknown method {method!r}; choose one of {', '.join(SCORING_METHODS)}")
    with session_scope(factory) as session:
        info, night = registry.load_night(session, study_id=study_id, participant_id=participant_id,
                                          night_id=night_id)
    if not analyse:
        return NightView(info=info, night=night, requested=method, shown=None)
    wanted = [*NIGHT_METHODS, *([method] if method not in NIGHT_METHODS and method != AUTO else [])]
    outcomes = {m: _score(factory, study_id, participant_id, info, m) for m in wanted}
    notice = None
    if method == AUTO:
        auto = _score(factory, study_id, participant_id, info, AUTO)
        shown = auto.body["method"] if auto.body is not None else _FALLBACK
        if auto.body is None:
            notice = (f"No trained model yet: showing {style_of(_FALLBACK).label}. Train a model first to see the "
                      "chosen method.")
    else:
        shown = method
        if outcomes[method].body is None:
            notice = f"{style_of(method).label}: not available — {outcomes[method].unavailable}."
    return NightView(info=info, night=night, requested=method, shown=shown, outcomes=outcomes, notice=notice)


def _number(value: Any) -> float | None:
    """A finite float, else None."""
    return None if value is None or not np.isfinite(float(value)) else float(value)


def _floats(values: list[float | None]) -> np.ndarray:
    """A body's per-epoch values as floats, None -> NaN."""
    return np.array([np.nan if v is None else v for v in values], dtype=np.float64)


def _calls(sleep: list[int | None]) -> np.ndarray:
    """Per-epoch calls of a scoring body as floats: 1 sleep, 0 wake, NaN unscored (no counts)."""
    return np.array([np.nan if v is None else v for v in sleep], dtype=np.float64)
