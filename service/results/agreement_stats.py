"""The publication-grade statistics of a comparison: nights nested in participants.

Built from the comparison's tables (:func:`models.comparison_tables`) under the study protocol:

- ``repeated_bland_altman``: per method (the always-sleep baseline left out) and parameter,
  :func:`models.repeated_bland_altman` (variance components over participants and nights,
  participant-bootstrap CIs of the bias and the limits, proportional bias with a random
  intercept per participant);
- ``participant_epochs``: epoch-by-epoch figures per participant (their nights pooled) and the
  group mean with a participant-bootstrap CI (:func:`models.participant_epoch_figures`);
- ``paired_differences``: per-participant paired differences of an epoch metric: personal −
  pooled, personal − pooled+offset, and each model (auto included) − the best classical rule, the
  best among the rules as published and calibrated leave-participants-out (``<rule>:calibrated``),
  the entry naming it and saying which (``best_rule``, ``best_rule_kind``);
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
    ALWAYS_SLEEP,
    AUTO,
    CALIBRATED_SUFFIX,
    COMPARED_RULES,
    EQUIVALENCE_PARAMETERS,
    ScoredNight,
    StudyProtocol,
    json_record,
    parameter_agreement,
    participant_epoch_figures,
)

__all__ = ["DIFFERENCE_METRICS", "STATISTIC_PARAMETERS", "agreement_statistics", "best_rule"]

#: Parameters of the repeated-measures Bland-Altman, ICC and equivalence entries.
STATISTIC_PARAMETERS: tuple[str, ...] = EQUIVALENCE_PARAMETERS
#: Epoch metrics of the paired differences.
DIFFERENCE_METRICS: tuple[str, ...] = ("balanced_accuracy", "kappa")
_MODELS = ("personal", "pooled", "pooled+offset", AUTO)


#: The compared rules as published and calibrated.
_RULES = (*COMPARED_RULES, *(f"{m}{CALIBRATED_SUFFIX}" for m in COMPARED_RULES))


def best_rule(group: pd.DataFrame, metric: str = "balanced_accuracy") -> str | None:
    """The classical rule (as published or calibrated) with the highest group mean of ``metric``
    (participant level), or None."""
    rows = group[(group["metric"] == metric) & group["method"].isin(_RULES)]
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
            extra = ({"kind": "model - best rule", "best_rule": rule,
                      "best_rule_kind": "calibrated" if rule.endswith(CALIBRATED_SUFFIX) else "published"}
                     if b == rule and rule is not None else {"kind": "personal - pooled variant"})
            out.append(found | extra)
    return out


def _parameter_entries(parameters: pd.DataFrame, protocol: StudyProtocol) -> tuple[list[dict[str, Any]], ...]:
    """:func:`models.parameter_agreement` split into the Bland-Altman, ICC and equivalence lists."""
    # the always-sleep baseline is left out: its parameters are the in-bed time itself (no agreement to estimate)
    entries = parameter_agreement(parameters[parameters["method"] != ALWAYS_SLEEP],
                                  parameter_names=STATISTIC_PARAMETERS, protocol=protocol)
    repeated, icc, equivalence = [], [], []
    for entry in entries:
        ids = {"method": entry["method"], "parameter": entry["parameter"]}
        icc.append(ids | {"kind": "ICC(A,1)"} | (entry.pop("icc", None) or {}))
        found = entry.pop("equivalence", None)
        if found is not None:
            equivalence.append(found)
        repeated.append(entry)
    return repeated, icc, equivalence


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
    repeated, icc, equivalence = _parameter_entries(parameters, protocol)
    figures = participant_epoch_figures(scored, protocol=protocol)
    epochs = figures.to_dict()
    epochs.pop("protocol", None)
    methods = set(figures.participants["method"])
    return {"repeated_bland_altman": repeated, "participant_epochs": epochs,
            "paired_differences": [json_record(r) for r in _paired(figures, methods)],
            "icc": icc, "equivalence": equivalence}
