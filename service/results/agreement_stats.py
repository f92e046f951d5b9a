"""The publication-grade statistics of a comparison: nights nested in participants.

Built from the comparison's tables (:func:`models.comparison_tables`) under the study protocol:

- ``repeated_bland_altman``: per method and parameter, :func:`models.repeated_bland_altman`
  (variance components over participants and nights, participant-bootstrap CIs of the bias and
  the limits, proportional bias with a random intercept per participant);
- ``participant_epochs``: epoch-by-epoch figures per participant (their nights pooled) and the
  group mean with a participant-bootstrap CI (:func:`models.participant_epoch_figures`);
- ``paired_differences``: per-participant paired differences of an epoch metric: personal −
  pooled, personal − pooled+offset, and each model (auto included) − the best classical rule;
- ``icc``: ICC(A,1) of each method and the reference per parameter (:func:`models.icc_a1`);
- ``equivalence``: two one-sided tests on participant means against the protocol's margins
  (:func:`models.parameter_equivalence`).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd

from models import (
    AUTO,
    COMPARED_RULES,
    EQUIVALENCE_PARAMETERS,
    REFERENCE,
    ScoredNight,
    StudyProtocol,
    icc_a1,
    json_record,
    parameter_equivalence,
    participant_epoch_figures,
    repeated_bland_altman,
)

__all__ = ["DIFFERENCE_METRICS", "STATISTIC_PARAMETERS", "agreement_statistics", "best_rule"]

#: Parameters of the repeated-measures Bland-Altman, ICC and equivalence entries.
STATISTIC_PARAMETERS: tuple[str, ...] = EQUIVALENCE_PARAMETERS
#: Epoch metrics of the paired differences.
DIFFERENCE_METRICS: tuple[str, ...] = ("balanced_accuracy", "kappa")
_MODELS = ("personal", "pooled", "pooled+offset", AUTO)


def best_rule(group: pd.DataFrame, metric: str = "balanced_accuracy") -> str | None:
    """The classical rule with the highest group mean of ``metric`` (participant level), or None."""
    rows = group[(group["metric"] == metric) & group["method"].isin(COMPARED_RULES)]
    rows = rows[np.isfinite(rows["mean"].astype(float))].reset_index(drop=True)
    return None if rows.empty else str(rows["method"].iloc[int(np.argmax(rows["mean"].to_numpy(dtype=float)))])


def _paired(figures: Any, methods: set[str]) -> list[dict[str, Any]]:
    rule = best_rule(figures.group)
    pairs = [("personal", "pooled"), ("personal", "pooled+offset")]
    pairs += [(m, rule) for m in _MODELS if rule is not None]
    out = []
    for a, b in pairs:
        if a not in methods or b not in methods:
            continue
        for metric in DIFFERENCE_METRICS:
            found = figures.difference(a, b, metric).to_dict()
            found.pop("per_participant", None)
            out.append(found | {"kind": "model - best rule" if b == rule else "personal - pooled variant"})
    return out


def _sides(parameters: pd.DataFrame) -> tuple[pd.DataFrame, np.ndarray, list[tuple[str, pd.DataFrame]]]:
    """The reference's rows, their participant ids and each method's rows matched to them by night."""
    keys = ["participant_id", "night_id"]
    ref = parameters[parameters["method"] == REFERENCE].set_index(keys)
    pids = ref.index.get_level_values("participant_id").to_numpy(dtype=object)
    methods = [(str(m), parameters[parameters["method"] == m].set_index(keys).reindex(ref.index))
               for m in dict.fromkeys(parameters["method"]) if m != REFERENCE]
    return ref, pids, methods


def _repeated(parameters: pd.DataFrame, protocol: StudyProtocol) -> list[dict[str, Any]]:
    """:func:`models.repeated_bland_altman` per method and parameter; where the proportional-bias model cannot
    be fitted (e.g. constant differences), the limits without it, saying so."""
    ref, pids, methods = _sides(parameters)
    out = []
    for method, own in methods:
        for name in STATISTIC_PARAMETERS:
            x, r = own[name].to_numpy(dtype=float), ref[name].to_numpy(dtype=float)
            try:
                found = repeated_bland_altman(x, r, pids, method_name=method, parameter=name, protocol=protocol)
            except (np.linalg.LinAlgError, ValueError) as exc:
                found = repeated_bland_altman(x - r, None, pids, method_name=method, parameter=name,
                                              protocol=protocol)
                entry = found.to_dict()
                entry["proportional_bias"] = {"model": f"not estimable ({type(exc).__name__}: {exc})"}
                out.append(entry)
                continue
            out.append(found.to_dict())
    return out


def _icc(parameters: pd.DataFrame, protocol: StudyProtocol) -> list[dict[str, Any]]:
    ref, _, methods = _sides(parameters)
    out = []
    for method, own in methods:
        for name in STATISTIC_PARAMETERS:
            pairs = np.column_stack([own[name].to_numpy(dtype=float), ref[name].to_numpy(dtype=float)])
            pairs = pairs[np.isfinite(pairs).all(axis=1)]
            result = icc_a1(pairs, ci_level=protocol.ci_level).to_dict() if len(pairs) else {"icc": None}
            out.append({"method": method, "parameter": name, "kind": "ICC(A,1)"} | result)
    return out


def _equivalence(parameters: pd.DataFrame, protocol: StudyProtocol) -> list[dict[str, Any]]:
    ref, pids, methods = _sides(parameters)
    out = []
    for method, own in methods:
        for name in STATISTIC_PARAMETERS:
            out.append(parameter_equivalence(own[name].to_numpy(dtype=float), ref[name].to_numpy(dtype=float),
                                             pids, parameter=name, method_name=method, protocol=protocol))
    return out


def agreement_statistics(parameters: pd.DataFrame, scored: Sequence[ScoredNight], *,
                         protocol: StudyProtocol) -> dict[str, Any]:
    """The statistics entries of a comparison (see the module docstring).

    Parameters
    ----------
    parameters : pandas.DataFrame
        One row per night and method, the reference included (``ComparisonTables.parameters``).
    scored : sequence of ScoredNight
        The in-bed calls of every method and night (``NightComparison.scored``).
    protocol : StudyProtocol
        Gives the CI level, bootstrap resamples, seed and equivalence margins.

    Returns
    -------
    dict
        ``repeated_bland_altman``, ``participant_epochs`` (``participants``, ``group``),
        ``paired_differences``, ``icc`` and ``equivalence``; JSON-safe.
    """
    if parameters.empty or not scored:
        return {"repeated_bland_altman": [], "participant_epochs": {"participants": [], "group": []},
                "paired_differences": [], "icc": [], "equivalence": []}
    repeated = _repeated(parameters, protocol)
    figures = participant_epoch_figures(scored, protocol=protocol)
    epochs = figures.to_dict()
    epochs.pop("protocol", None)
    methods = set(figures.participants["method"])
    return {"repeated_bland_altman": repeated, "participant_epochs": epochs,
            "paired_differences": [json_record(r) for r in _paired(figures, methods)],
            "icc": [json_record(r) for r in _icc(parameters, protocol)],
            "equivalence": _equivalence(parameters, protocol)}
