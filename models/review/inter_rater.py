"""Agreement between raters over several nights: epoch-by-epoch Cohen's kappa and parameter differences."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from ..scoring.protocol import DEFAULT_PROTOCOL, StudyProtocol
from .corrections import review_discrepancy

__all__ = ["INTER_RATER_PARAMETERS", "inter_rater_summary"]

#: Parameters whose rater-to-rater differences are summarised.
INTER_RATER_PARAMETERS: tuple[str, ...] = ("sol_min", "tst_min", "waso_min", "awakenings", "sleep_efficiency_pct")


def _summary(values: list[float]) -> dict[str, float]:
    v = np.asarray(values, dtype=np.float64)
    v = v[np.isfinite(v)]
    nan = float("nan")
    return {"mean": float(v.mean()) if v.size else nan, "sd": float(v.std(ddof=1)) if v.size > 1 else nan,
            "mean_abs": float(np.abs(v).mean()) if v.size else nan, "n_nights": int(v.size)}


def inter_rater_summary(pairs: Sequence[tuple[ArrayLike, ArrayLike]], *, epoch_seconds: int,
                        protocol: StudyProtocol = DEFAULT_PROTOCOL) -> dict[str, Any]:
    """Agreement of two raters (or a rater and a model) over nights.

    Parameters
    ----------
    pairs : sequence of (labels_a, labels_b)
        Per night, two label vectors of shape (n_epochs,): 1 sleep, 0 wake, NaN not judged.
    epoch_seconds : {15, 30, 60}
    protocol : StudyProtocol, default=DEFAULT_PROTOCOL
        The study's parameter definitions.

    Returns
    -------
    dict
        ``n_nights``; ``kappa_per_night`` (Cohen's kappa over the epochs both judged, NaN where
        undefined, see :func:`models.review.corrections.review_discrepancy`); ``kappa_mean`` (mean
        of the defined ones, NaN without any); ``parameter_differences``: per name of
        :data:`INTER_RATER_PARAMETERS`, ``mean``, ``sd`` (ddof=1) and ``mean_abs`` of b - a over
        the nights where both define it, and their ``n_nights``.

    Raises
    ------
    InvalidReviewError
        If a pair's vectors differ in length or hold other values.
    """
    kappas: list[float] = []
    diffs: dict[str, list[float]] = {name: [] for name in INTER_RATER_PARAMETERS}
    for a, b in pairs:
        d = review_discrepancy(a, b, epoch_seconds=epoch_seconds, protocol=protocol)
        kappas.append(float(d["kappa"]))
        for name in INTER_RATER_PARAMETERS:
            diffs[name].append(float(d["parameter_differences"].get(name, float("nan"))))
    defined = [k for k in kappas if np.isfinite(k)]
    return {"n_nights": len(kappas), "kappa_mean": float(np.mean(defined)) if defined else float("nan"),
            "kappa_per_night": kappas, "parameter_differences": {n: _summary(v) for n, v in diffs.items()}}
