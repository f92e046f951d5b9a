"""Test data factories: small valid nights built from plain parameters."""

from __future__ import annotations

import numpy as np
import pandas as pd

from models import Night


def make_night(n_epochs: int = 240, *, seed: int = 0, epoch_seconds: int = 30, participant_id: str = "P01",
               start: str = "2031-03-02T22:41:00+01:00", stages: bool = True, label: str | None = None) -> Night:
    """A valid night with Poisson counts and (optionally) AASM stages; deterministic for a seed."""
    rng = np.random.default_rng(seed)
    counts = rng.poisson(4.0, n_epochs).astype(float)
    reference = rng.choice(np.array(["W", "N1", "N2", "N3", "R"]), n_epochs) if stages else None
    return Night(participant_id=participant_id, start=pd.Timestamp(start), epoch_seconds=epoch_seconds,
                 counts=counts, reference=reference, label=label)


def night_json(n_epochs: int = 240, *, seed: int = 0, **extra) -> dict:
    """nightbank JSON object for ``make_night`` (fields in ``extra`` override)."""
    from models import night_to_json

    return {**night_to_json(make_night(n_epochs, seed=seed)), **extra}


def problems_of(fn, *args, **kwargs) -> list:
    """The problems of the :class:`models.InvalidNightError` that ``fn(*args, **kwargs)`` must raise."""
    import pytest

    from models import InvalidNightError

    with pytest.raises(InvalidNightError) as info:
        fn(*args, **kwargs)
    return info.value.problems


def one_problem(problems, code):
    """The first problem with ``code`` (failing, with every code and message found, if there is none)."""
    hits = [p for p in problems if p.code == code]
    assert hits, f"expected {code}, got {[(p.code, p.message) for p in problems]}"
    return hits[0]
