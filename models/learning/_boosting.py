"""Early-stopped boosting without XGBoost's Python callback machinery.

:func:`boost_early_stopped` is ``xgboost.train(params, dtrain, max_rounds, evals=[(dval,
"validation")], early_stopping_rounds=rounds, verbose_eval=False)`` written as a plain loop over
``Booster.update`` and ``Booster.eval_set``, with the same stopping rule as XGBoost's
``EarlyStopping`` callback for a minimised metric:

- the score of a round is the last metric of the evaluation string XGBoost prints for it (the
  same string ``xgboost.train`` parses, so the same rounding);
- a round improves when its score is strictly below the best so far; the best iteration is the
  first round reaching the minimum;
- training stops after ``early_stopping_rounds`` rounds in a row without improvement, or after
  ``max_rounds`` rounds.

The booster keeps every round fitted (not only the best ones) and carries the ``best_iteration``
and ``best_score`` attributes ``xgboost.train`` sets: the same model. Unlike ``xgboost.train`` it
does not call ``Booster.reset`` at the end (about 2 ms per fit, a fifth of a fit on the smallest
training sets); its prediction caches go with the booster. The per-round Python
work is one update, one evaluation string and one comparison, without the callback container's
history bookkeeping.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

import xgboost as xgb

__all__ = ["boost_early_stopped"]


def _score(evaluation: str) -> float:
    """Last metric value of an evaluation string such as ``"[3]\\tvalidation-logloss:0.41"``."""
    return float(evaluation.split()[-1].rsplit(":", 1)[1])


def boost_early_stopped(params: Mapping[str, Any], dtrain: xgb.DMatrix, dval: xgb.DMatrix, *, max_rounds: int,
                        early_stopping_rounds: int, check: Callable[[], None] | None = None) -> tuple[xgb.Booster, int]:
    """Boost on ``dtrain`` until the validation metric on ``dval`` stops improving (module docstring).

    Parameters
    ----------
    params : mapping
        XGBoost parameters; the last ``eval_metric`` is the one stopped on and must be one that
        is minimised (e.g. ``"logloss"``).
    dtrain : xgboost.DMatrix
        Training matrix (a ``QuantileDMatrix`` is fine).
    dval : xgboost.DMatrix
        Validation matrix, with the weights its metric should use.
    max_rounds : int
        Upper bound on boosting rounds (>= 1).
    early_stopping_rounds : int
        Rounds without improvement that stop the fit (>= 1).
    check : callable, default=None
        Called after every round; raising inside it stops the fit (how a cancelled training
        ends a long fit). None = no check.

    Returns
    -------
    booster : xgboost.Booster
        Every fitted round (slice or use ``iteration_range`` for the best ones); it still holds
        its prediction caches of ``dtrain`` and ``dval`` (drop it, or slice it, when done).
    best_iteration : int
        0-based round with the lowest validation score (the first one on ties).
    """
    booster = xgb.Booster(dict(params), [dtrain, dval])
    evals = [(dval, "validation")]
    best_score, best_iteration, stale = float("inf"), 0, 0
    for i in range(max_rounds):
        booster.update(dtrain, iteration=i)
        score = _score(booster.eval_set(evals, i))
        if check is not None:
            check()
        if i == 0 or best_score > score:
            best_score, best_iteration, stale = score, i, 0
        else:
            stale += 1
            if stale >= early_stopping_rounds:
                break
    booster.set_attr(best_score=str(best_score), best_iteration=str(best_iteration))
    return booster, best_iteration
