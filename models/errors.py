"""Errors raised by the science package.

Hierarchy::

    NightbankError(ValueError)          every error carries a stable ``code``
    ├── InvalidNightError               a night failed validation; ``problems`` lists every defect
    ├── NotFittedError                  a model was used before ``fit``
    └── (module-level subclasses in rules, features, training)

Each error has a machine-readable ``code`` (snake_case, stable across releases) and a human
message. The service maps them to problem responses; the CLI prints them. Neither shows a
traceback to the user.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

__all__ = ["InvalidNightError", "NightbankError", "NotFittedError", "Problem"]


class NightbankError(ValueError):
    """Base class: an error with a stable machine-readable ``code``."""

    code: str = "nightbank_error"

    def __init__(self, message: str, *, code: str | None = None) -> None:
        super().__init__(message)
        if code is not None:
            self.code = code

    @property
    def message(self) -> str:
        return str(self.args[0]) if self.args else ""


@dataclass(frozen=True)
class Problem:
    """One defect of an input night.

    Parameters
    ----------
    code : str
        Stable identifier of the rule that failed (``negative_count``, ``irregular_spacing``, ...).
    message : str
        Sentence naming the rule and where it failed.
    location : dict
        Where the defect is: any of ``field`` (input field or column), ``epoch`` (0-based epoch
        index), ``row`` (1-based line number in a text file, header included), ``time``
        (ISO 8601 timestamp), ``values`` (first offending values).
    """

    code: str
    message: str
    location: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        return {"code": self.code, "message": self.message, "location": dict(self.location)}


class InvalidNightError(NightbankError):
    """A night failed validation. ``problems`` holds every defect found, not only the first."""

    code = "invalid_night"

    def __init__(self, problems: list[Problem], *, source: str | None = None) -> None:
        self.problems = list(problems)
        self.source = source
        where = f"{source}: " if source else ""
        head = "; ".join(p.message for p in self.problems[:3])
        more = f" (+{len(self.problems) - 3} more)" if len(self.problems) > 3 else ""
        super().__init__(f"{where}{len(self.problems)} problem(s): {head}{more}")


class NotFittedError(NightbankError):
    """A model was asked to predict before it was fitted."""

    code = "not_fitted"
