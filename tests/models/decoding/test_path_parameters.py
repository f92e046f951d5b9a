"""The path-batch parameters equal sleep_parameters (models.scoring, whose definitions are checked by
hand in tests/models/scoring/test_parameters.py) on every path, under every protocol variant."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from models.decoding.path_parameters import PATH_PARAMETER_NAMES, path_parameters
from models.scoring.parameters import sleep_parameters
from models.scoring.protocol import StudyProtocol

PROTOCOLS = [
    StudyProtocol(),
    StudyProtocol(waso_end="final_awakening"),
    StudyProtocol(min_awakening_epochs=2),
    StudyProtocol(min_awakening_epochs=3, waso_end="final_awakening"),
    StudyProtocol(sol="persistent_sleep", persistent_sleep_min=2.0),  # per-path fallback
    StudyProtocol(unscored_breaks_bouts=True),  # per-path fallback
]


def _one_by_one(paths, unscored, off, on, protocol):
    out = {n: [] for n in PATH_PARAMETER_NAMES}
    for path in paths:
        sleep = np.where(unscored, np.nan, path.astype(float))
        p = sleep_parameters(sleep, 60, lights_off_idx=off, lights_on_idx=on, protocol=protocol).as_dict()
        for n in PATH_PARAMETER_NAMES:
            out[n].append(p[n])
    return {n: np.array(v, dtype=float) for n, v in out.items()}


@pytest.mark.parametrize("protocol", PROTOCOLS, ids=lambda p: p.fingerprint())
@pytest.mark.parametrize("seed", [0, 1])
def test_batch_equals_sleep_parameters_on_each_path(protocol: StudyProtocol, seed: int) -> None:
    rng = np.random.default_rng(seed)
    n = 40
    stay = rng.uniform(0.6, 0.9)
    paths = np.empty((300, n), dtype=np.int8)  # bouty paths, some all-wake and all-sleep
    paths[:, 0] = rng.random(300) < 0.5
    for t in range(1, n):
        flip = rng.random(300) > stay
        paths[:, t] = np.where(flip, 1 - paths[:, t - 1], paths[:, t - 1])
    paths[0], paths[1] = 0, 1
    unscored = rng.random(n) < 0.15
    for off, on in ((0, n), (3, 35)):
        got = path_parameters(paths, 60, lights_off_idx=off, lights_on_idx=on, unscored=unscored, protocol=protocol)
        want = _one_by_one(paths, unscored, off, on, protocol)
        for name in PATH_PARAMETER_NAMES:
            np.testing.assert_allclose(got[name], want[name], err_msg=name, equal_nan=True)


@settings(max_examples=150, deadline=None)
@given(st.lists(st.sampled_from("SW?"), min_size=1, max_size=25), st.integers(1, 3),
       st.sampled_from(["lights_on", "final_awakening"]))
def test_batch_equals_sleep_parameters_on_any_sequence(text: list[str], min_awake: int, waso_end: str) -> None:
    path = np.array([[c == "S" for c in text]], dtype=np.int8)
    unscored = np.array([c == "?" for c in text])
    protocol = StudyProtocol(min_awakening_epochs=min_awake, waso_end=waso_end)
    got = path_parameters(path, 60, unscored=unscored, protocol=protocol)
    want = _one_by_one(path, unscored, 0, len(text), protocol)
    for name in PATH_PARAMETER_NAMES:
        np.testing.assert_allclose(got[name], want[name], err_msg=name, equal_nan=True)


def test_worked_example_and_bad_input() -> None:
    # W W S S W S W: SOL 2 min, TST 3 min, WASO to lights-on 2 min, 2 awakenings (the example of sleep_parameters)
    got = path_parameters(np.array([[0, 0, 1, 1, 0, 1, 0]]), 60)
    assert [got[n][0] for n in ("sol_min", "tst_min", "waso_min", "awakenings")] == [2.0, 3.0, 2.0, 2.0]
    with pytest.raises(ValueError, match="0 and 1"):
        path_parameters(np.array([[0, 2]]), 60)
