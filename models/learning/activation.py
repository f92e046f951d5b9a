"""Activating a new model version is a selection: which of its held-out figures the choice did not use.

A service that keeps a new version only when its held-out balanced accuracy is not worse than the
active version's has *selected* it on those nights; the same nights' figure is then optimistic as
a figure of the activated version (the comparison favoured whichever version happened to do better
on them; Cawley & Talbot 2010, JMLR 11:2079). :func:`activation_evidence` makes the comparison on
the nights both versions hold out (paired, so neither gains from easier nights) and reports the
candidate's figure on its other held-out nights, which the comparison did not use, with a plain
flag saying whether such nights exist:

- ``selection_free`` True: ``fresh_value`` is the candidate's mean over ``fresh_nights``, nights
  the comparison never looked at (for example nights labelled after the active version was
  trained), and is an honest figure of the version as activated;
- ``selection_free`` False: every held-out night of the candidate was used to decide; its figure
  is a selection figure and should be shown as such (``note`` says so in words).

Without an active version nothing is compared and every candidate night is fresh.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

__all__ = ["ActivationEvidence", "activation_evidence"]


@dataclass(frozen=True)
class ActivationEvidence:
    """Result of :func:`activation_evidence`.

    Attributes
    ----------
    metric : str
        The compared held-out metric (higher is better).
    activate : bool
        The candidate's mean on the compared nights is not below the active version's (True
        without an active version or without shared nights).
    candidate_value, active_value : float
        Means over ``compared_nights`` (NaN without shared nights).
    compared_nights : tuple of str
        Nights the comparison used (held out by both versions).
    fresh_nights : tuple of str
        The candidate's other held-out nights.
    fresh_value : float
        The candidate's mean over ``fresh_nights`` (NaN without any): not used by the selection.
    selection_free : bool
        True when ``fresh_value`` rests on at least one night with a finite figure.
    note : str
        The above in words.
    """

    metric: str
    activate: bool
    candidate_value: float
    active_value: float
    compared_nights: tuple[str, ...]
    fresh_nights: tuple[str, ...]
    fresh_value: float
    selection_free: bool
    note: str

    def to_dict(self) -> dict[str, object]:
        """JSON-able form (NaN becomes None)."""
        def num(v: float) -> float | None:
            return float(v) if np.isfinite(v) else None
        return {"metric": self.metric, "activate": self.activate, "candidate_value": num(self.candidate_value),
                "active_value": num(self.active_value), "compared_nights": list(self.compared_nights),
                "fresh_nights": list(self.fresh_nights), "fresh_value": num(self.fresh_value),
                "selection_free": self.selection_free, "note": self.note}


def _per_night(table: pd.DataFrame | None, metric: str, method: str | None) -> pd.Series:
    if table is None or not len(table):
        return pd.Series(dtype=np.float64)
    if method is not None and "method" in table:
        table = table[table["method"] == method]
    key = "night_hash" if "night_hash" in table else "night_id"
    return table.groupby(key, sort=False)[metric].mean().astype(np.float64)


def activation_evidence(candidate: pd.DataFrame, active: pd.DataFrame | None, *,
                        metric: str = "balanced_accuracy", method: str | None = None) -> ActivationEvidence:
    """Compare a candidate version with the active one, and say which candidate figures are selection-free.

    Parameters
    ----------
    candidate, active : pandas.DataFrame
        Each version's held-out night metrics (one row per night and method, as the training
        results' ``night_metrics``): ``night_hash`` (or ``night_id``), ``method`` and ``metric``.
        ``active`` None: no active version.
    metric : str, default="balanced_accuracy"
    method : str, default=None
        Rows of this method only (e.g. ``"pooled"`` for pooled versions); None = all rows.

    Returns
    -------
    ActivationEvidence
    """
    new, old = _per_night(candidate, metric, method), _per_night(active, metric, method)
    shared = [n for n in new.index if n in old.index]
    fresh = [n for n in new.index if n not in old.index]
    cand = float(new[shared].mean()) if shared else float("nan")
    act = float(old[shared].mean()) if shared else float("nan")
    activate = not (np.isfinite(cand) and np.isfinite(act)) or cand >= act
    fresh_value = float(new[fresh].mean()) if fresh else float("nan")
    selection_free = bool(np.isfinite(fresh_value))
    if active is None or not len(old):
        note = f"no active version: nothing compared; {metric} {fresh_value:.3f} over {len(fresh)} night(s)"
    elif selection_free:
        note = (f"compared on {len(shared)} shared night(s) ({cand:.3f} vs {act:.3f}); {metric} on "
                f"{len(fresh)} night(s) the comparison did not use: {fresh_value:.3f}")
    else:
        note = (f"compared on all {len(shared)} held-out night(s) ({cand:.3f} vs {act:.3f}); no night is left "
                f"that the comparison did not use, so the candidate's {metric} is a selection figure (optimistic)")
    return ActivationEvidence(metric=metric, activate=bool(activate), candidate_value=cand, active_value=act,
                              compared_nights=tuple(str(n) for n in shared), fresh_nights=tuple(str(n) for n in fresh),
                              fresh_value=fresh_value, selection_free=selection_free, note=note)
