"""The plain early-stopping loop against xgboost.train with early_stopping_rounds (the external reference)."""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
import xgboost as xgb

from models.learning._boosting import boost_early_stopped


def _data(seed: int, n_train: int = 1500, n_val: int = 600, n_features: int = 8) -> tuple[xgb.DMatrix, xgb.DMatrix]:
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n_train + n_val, n_features)).astype(np.float32)
    logit = 1.5 * X[:, 0] - X[:, 1] + 0.5 * X[:, 2] * X[:, 3]
    y = (rng.random(n_train + n_val) < 1.0 / (1.0 + np.exp(-logit))).astype(np.float64)
    dtrain = xgb.QuantileDMatrix(X[:n_train], y[:n_train], max_bin=32, nthread=1)
    w = np.where(y[n_train:] == 1, 0.6, 1.0)  # class-weighted validation metric, as the searches use
    return dtrain, xgb.DMatrix(X[n_train:], y[n_train:], weight=w, nthread=1)


def _params(**changes: Any) -> dict[str, Any]:
    return {"objective": "binary:logistic", "tree_method": "hist", "max_bin": 32, "nthread": 1, "seed": 7,
            "eval_metric": "logloss", "max_depth": 4, "eta": 0.3, "subsample": 0.8, "colsample_bytree": 0.7} | changes


@pytest.mark.parametrize("seed, changes, max_rounds", [
    (0, {}, 400),                                    # stops early
    (1, {"max_depth": 7, "eta": 0.05}, 400),         # slower learner, stops later
    (2, {"eta": 0.02, "max_depth": 2}, 25),          # still improving when the round cap ends it
    (3, {"eta": 0.0}, 400),                          # no round ever improves on the first: a tie throughout
    (4, {"min_child_weight": 40.0, "subsample": 0.5}, 400),
])
def test_same_model_as_xgboost_train_with_early_stopping(seed: int, changes: dict[str, Any], max_rounds: int) -> None:
    dtrain, dval = _data(seed)
    params = _params(**changes)
    reference = xgb.train(params, dtrain, max_rounds, evals=[(dval, "validation")], early_stopping_rounds=10,
                          verbose_eval=False)
    booster, best = boost_early_stopped(params, dtrain, dval, max_rounds=max_rounds, early_stopping_rounds=10)
    assert best == reference.best_iteration
    assert booster.best_score == reference.best_score
    assert booster.num_boosted_rounds() == reference.num_boosted_rounds()
    n = best + 1
    np.testing.assert_array_equal(booster.predict(dval, iteration_range=(0, n)),
                                  reference.predict(dval, iteration_range=(0, n)))
    np.testing.assert_array_equal(booster.predict(dval), reference.predict(dval))
    assert booster.save_raw("json") == reference.save_raw("json")  # trees, parameters and attributes
    if changes.get("eta") == 0.0:
        assert best == 0 and booster.num_boosted_rounds() == 11  # hand count: the first round, then 10 stale ones


def test_check_can_stop_a_fit() -> None:
    dtrain, dval = _data(5)
    calls: list[int] = []

    def check() -> None:
        calls.append(1)
        if len(calls) == 3:
            raise RuntimeError("stopped")

    with pytest.raises(RuntimeError, match="stopped"):
        boost_early_stopped(_params(), dtrain, dval, max_rounds=400, early_stopping_rounds=10, check=check)
    assert len(calls) == 3
