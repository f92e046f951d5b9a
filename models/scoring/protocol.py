"""The study protocol: how a study defines its sleep parameters and its agreement statistics.

A :class:`StudyProtocol` is fixed before the data are looked at and travels with every figure
computed under it (``to_dict`` in the results, ``fingerprint`` in cache keys), so two numbers
computed under different definitions are never mixed up.

Parameter definitions (see :func:`models.scoring.parameters.sleep_parameters`):

- ``waso_end``: ``"lights_on"`` (AASM PSG convention, from memory: WASO runs to lights-on and
  the final wake bout is an awakening) or ``"final_awakening"`` (WASO stops at the final
  awakening; the final wake bout is not an awakening; common in actigraphy, Fekedulegn et al.
  2020);
- ``min_awakening_epochs``: shortest wake bout counted as an awakening (PSG: 1 epoch; common
  practice in actigraphy: 1 or 2 epochs);
- ``sol``: ``"first_sleep"`` (lights-off to the first sleep epoch, AASM) or
  ``"persistent_sleep"`` (lights-off to the first run of ``persistent_sleep_min`` of sleep,
  latency to persistent sleep; from memory, standard in insomnia trials). Sleep onset, where
  WASO, SPT and the awakenings start, follows the same definition;
- ``persistent_sleep_min``: length of that run (10 min, from memory);
- ``unscored_breaks_bouts``: False (default) forms bouts from the scored epochs in order, so an
  unscored epoch neither ends nor splits a bout; True ends a sleep or wake bout at every unscored
  epoch (wake, unscored, wake are two bouts of one epoch).

Per-night intervals of the model methods: ``interval_level`` (the level of every per-night
parameter interval, in (0, 1); 0.9 by default, common practice).

Agreement statistics: ``equivalence_margins`` (per parameter, for two one-sided tests; the
defaults are common practice, not a published standard, and a study should set its own in
advance), ``ci_level``, ``bootstrap_resamples`` and ``seed`` (participant bootstrap).

:data:`DEFAULT_PROTOCOL` gives the parameter values nightbank computed before protocols existed.
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any

from ..errors import NightbankError, Problem

__all__ = ["DEFAULT_EQUIVALENCE_MARGINS", "DEFAULT_PROTOCOL", "EQUIVALENCE_PARAMETERS", "InvalidProtocolError",
           "SOL_DEFINITIONS", "StudyProtocol", "WASO_ENDS"]

#: Allowed values of :attr:`StudyProtocol.waso_end`.
WASO_ENDS: tuple[str, ...] = ("lights_on", "final_awakening")
#: Allowed values of :attr:`StudyProtocol.sol`.
SOL_DEFINITIONS: tuple[str, ...] = ("first_sleep", "persistent_sleep")
#: Parameters that carry an equivalence margin, in table order.
EQUIVALENCE_PARAMETERS: tuple[str, ...] = ("sol_min", "tst_min", "waso_min", "awakenings", "sleep_efficiency_pct")
#: Default equivalence margins (+/- the value, in the parameter's unit). Common practice, no single
#: source: +/-15 min TST and WASO, +/-10 min SOL, +/-3 awakenings, +/-5 percentage points efficiency.
DEFAULT_EQUIVALENCE_MARGINS: Mapping[str, float] = {
    "sol_min": 10.0, "tst_min": 15.0, "waso_min": 15.0, "awakenings": 3.0, "sleep_efficiency_pct": 5.0}
_FIELDS = ("waso_end", "min_awakening_epochs", "persistent_sleep_min", "sol", "unscored_breaks_bouts",
           "equivalence_margins", "ci_level", "bootstrap_resamples", "seed", "interval_level")
MIN_BOOTSTRAP_RESAMPLES = 100


class InvalidProtocolError(NightbankError):
    """A study protocol is invalid; ``problems`` names every bad field (``location["field"]``)."""

    code = "invalid_protocol"

    def __init__(self, problems: list[Problem]) -> None:
        self.problems = list(problems)
        super().__init__("invalid study protocol: " + "; ".join(p.message for p in self.problems))


def _is_int(value: object) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def _is_number(value: object) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool) and math.isfinite(value)


def _problem(name: str, message: str, value: object) -> Problem:
    return Problem(code="invalid_protocol_field", message=f"{name}: {message}, got {value!r}",
                   location={"field": name})


def _margin_problems(margins: object) -> list[Problem]:
    if not isinstance(margins, Mapping):
        return [_problem("equivalence_margins", "must be an object of parameter -> margin", margins)]
    problems = []
    for name, value in margins.items():
        where = f"equivalence_margins.{name}"
        if name not in EQUIVALENCE_PARAMETERS:
            problems.append(_problem(where, f"unknown parameter (known: {', '.join(EQUIVALENCE_PARAMETERS)})",
                                     name))
        elif not _is_number(value) or value <= 0:
            problems.append(_problem(where, "must be a finite number > 0", value))
    return problems


def _field_problems(values: Mapping[str, Any]) -> list[Problem]:
    """Every defect of the field values (all fields present)."""
    checks: list[tuple[str, bool, str]] = [
        ("waso_end", values["waso_end"] in WASO_ENDS, f"must be one of {', '.join(WASO_ENDS)}"),
        ("min_awakening_epochs", _is_int(values["min_awakening_epochs"]) and values["min_awakening_epochs"] >= 1,
         "must be an integer >= 1"),
        ("persistent_sleep_min", _is_number(values["persistent_sleep_min"]) and values["persistent_sleep_min"] > 0,
         "must be a finite number of minutes > 0"),
        ("sol", values["sol"] in SOL_DEFINITIONS, f"must be one of {', '.join(SOL_DEFINITIONS)}"),
        ("unscored_breaks_bouts", isinstance(values["unscored_breaks_bouts"], bool), "must be true or false"),
        ("ci_level", _is_number(values["ci_level"]) and 0.5 < values["ci_level"] < 1,
         "must be a number in (0.5, 1)"),
        ("bootstrap_resamples", _is_int(values["bootstrap_resamples"])
         and values["bootstrap_resamples"] >= MIN_BOOTSTRAP_RESAMPLES,
         f"must be an integer >= {MIN_BOOTSTRAP_RESAMPLES}"),
        ("seed", _is_int(values["seed"]) and values["seed"] >= 0, "must be an integer >= 0"),
        ("interval_level", _is_number(values["interval_level"]) and 0 < values["interval_level"] < 1,
         "must be a number in (0, 1)"),
    ]
    problems = [_problem(name, message, values[name]) for name, ok, message in checks if not ok]
    return problems + _margin_problems(values["equivalence_margins"])


@dataclass(frozen=True)
class StudyProtocol:
    """The definitions of one study (see the module docstring for each field).

    Parameters
    ----------
    waso_end : {"lights_on", "final_awakening"}, default="lights_on"
    min_awakening_epochs : int, default=1
        Epochs.
    persistent_sleep_min : float, default=10.0
        Minutes, rounded up to whole epochs.
    sol : {"first_sleep", "persistent_sleep"}, default="first_sleep"
    unscored_breaks_bouts : bool, default=False
    equivalence_margins : mapping of str to float, default=DEFAULT_EQUIVALENCE_MARGINS
        Margin (+/-, parameter unit) per name of :data:`EQUIVALENCE_PARAMETERS`; missing names
        take the default. Stored read-only, in table order.
    ci_level : float, default=0.95
        Level of every confidence interval, in (0.5, 1) (two one-sided tests use
        alpha = 1 - ci_level each).
    bootstrap_resamples : int, default=2000
        Participant-bootstrap resamples (>= 100; >= 2,000 is common practice).
    seed : int, default=0
        Seed of the participant bootstrap.
    interval_level : float, default=0.9
        Level of the per-night parameter intervals of the model methods, in (0, 1).

    Raises
    ------
    InvalidProtocolError
        If any field is invalid (every bad field is listed).
    """

    waso_end: str = "lights_on"
    min_awakening_epochs: int = 1
    persistent_sleep_min: float = 10.0
    sol: str = "first_sleep"
    unscored_breaks_bouts: bool = False
    equivalence_margins: Mapping[str, float] = field(default_factory=lambda: dict(DEFAULT_EQUIVALENCE_MARGINS))
    ci_level: float = 0.95
    bootstrap_resamples: int = 2000
    seed: int = 0
    interval_level: float = 0.9

    def __post_init__(self) -> None:
        problems = _field_problems({name: getattr(self, name) for name in _FIELDS})
        if problems:
            raise InvalidProtocolError(problems)
        margins = dict(DEFAULT_EQUIVALENCE_MARGINS) | {k: float(v) for k, v in self.equivalence_margins.items()}
        object.__setattr__(self, "equivalence_margins",
                           MappingProxyType({k: margins[k] for k in EQUIVALENCE_PARAMETERS}))  # read-only
        object.__setattr__(self, "persistent_sleep_min", float(self.persistent_sleep_min))
        object.__setattr__(self, "ci_level", float(self.ci_level))
        object.__setattr__(self, "interval_level", float(self.interval_level))

    def __hash__(self) -> int:
        return hash(self.fingerprint())

    def to_dict(self) -> dict[str, Any]:
        """Every field as a JSON-safe dict (margins as a nested dict, in table order)."""
        out = {name: getattr(self, name) for name in _FIELDS}
        out["equivalence_margins"] = dict(self.equivalence_margins)
        return out

    @classmethod
    def from_dict(cls, values: Mapping[str, Any]) -> StudyProtocol:
        """A protocol from a dict such as :meth:`to_dict` gives; missing fields take their default.

        Raises
        ------
        InvalidProtocolError
            For unknown fields and every invalid value, each named in ``problems``.
        """
        if not isinstance(values, Mapping):
            raise InvalidProtocolError([_problem("protocol", "must be an object", values)])
        unknown = [Problem(code="unknown_protocol_field", message=f"{name}: unknown field",
                           location={"field": str(name)}) for name in values if name not in _FIELDS]
        defaults = DEFAULT_PROTOCOL.to_dict()
        merged = {name: values.get(name, defaults[name]) for name in _FIELDS}
        problems = unknown + _field_problems(merged)
        if problems:
            raise InvalidProtocolError(problems)
        return cls(**merged)

    def fingerprint(self) -> str:
        """Short stable hash of the definitions (16 hex digits of SHA-256 of the sorted JSON)."""
        text = json.dumps(self.to_dict(), sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(text.encode()).hexdigest()[:16]


#: The protocol that reproduces the parameter values computed before protocols existed.
DEFAULT_PROTOCOL = StudyProtocol()
