"""The study-protocol options shared by ``protocol set``, ``score`` and ``agree`` (``--interval-level``
also by ``export`` and ``compare``).

Each option left out keeps the value of the protocol it is applied to (the study's protocol for
``protocol set``, the default protocol for the commands that read files).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Annotated, Any

import typer

from models import StudyProtocol

from ..errors import BadRequest

__all__ = ["BootstrapOption", "CiLevelOption", "IntervalLevelOption", "MarginOption", "MinAwakeningOption",
           "PersistentSleepOption", "ProtocolSeedOption", "SolOption", "UnscoredBreaksOption", "WasoEndOption",
           "apply_protocol_options", "protocol_line"]

WasoEndOption = Annotated[str | None, typer.Option(
    "--waso-end", help="Where WASO and the awakening count stop: lights-on or final-awakening.")]
MinAwakeningOption = Annotated[int | None, typer.Option(
    "--min-awakening-epochs", min=1, help="Shortest wake bout (epochs) counted as an awakening.")]
PersistentSleepOption = Annotated[float | None, typer.Option(
    "--persistent-sleep-min", help="Length of the sleep run that makes sleep persistent, minutes.")]
SolOption = Annotated[str | None, typer.Option(
    "--sol", help="Sleep-onset latency to the first-sleep epoch or to persistent-sleep.")]
UnscoredBreaksOption = Annotated[bool | None, typer.Option(
    "--unscored-breaks-bouts/--unscored-keeps-bouts", help="Whether an unscored epoch ends a sleep or wake bout.",
    show_default=False)]
MarginOption = Annotated[list[str] | None, typer.Option(
    "--margin", help="Equivalence margin PARAMETER=VALUE (e.g. tst_min=15); repeatable.")]
CiLevelOption = Annotated[float | None, typer.Option("--ci-level", help="Level of every confidence interval.")]
BootstrapOption = Annotated[int | None, typer.Option(
    "--bootstrap-resamples", help="Participant-bootstrap resamples.")]
ProtocolSeedOption = Annotated[int | None, typer.Option("--protocol-seed", help="Seed of the participant bootstrap.")]


def _level(value: float | None) -> float | None:
    if value is not None and not 0.0 < value < 1.0:
        raise typer.BadParameter(f"{value:g} is not in (0, 1); write e.g. 0.8 for 80% intervals")
    return value


IntervalLevelOption = Annotated[float | None, typer.Option(
    "--interval-level", callback=_level, help="Level of the per-night parameter intervals of the model methods, "
    "in (0, 1) (default: the study protocol's, 0.9 unless set).")]


def _margins(items: list[str]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for item in items:
        name, sep, value = item.partition("=")
        try:
            out[name.strip()] = float(value)
        except ValueError:
            sep = ""
        if not sep:
            raise BadRequest(f"--margin {item!r}: write PARAMETER=NUMBER, e.g. tst_min=15", code="invalid_option")
    return out


def apply_protocol_options(base: Mapping[str, Any], *, waso_end: str | None = None,
                           min_awakening_epochs: int | None = None, persistent_sleep_min: float | None = None,
                           sol: str | None = None, unscored_breaks_bouts: bool | None = None,
                           margin: list[str] | None = None, ci_level: float | None = None,
                           bootstrap_resamples: int | None = None, seed: int | None = None,
                           interval_level: float | None = None) -> StudyProtocol:
    """``base`` (a protocol's JSON form) with the given options changed, validated.

    Option values may use ``-`` for ``_`` (``final-awakening``).

    Raises
    ------
    InvalidProtocolError
        Naming every bad field.
    BadRequest
        If a ``--margin`` is not ``PARAMETER=NUMBER``.
    """
    body = dict(base)
    given: dict[str, Any] = {"waso_end": waso_end, "min_awakening_epochs": min_awakening_epochs,
                             "persistent_sleep_min": persistent_sleep_min, "sol": sol,
                             "unscored_breaks_bouts": unscored_breaks_bouts, "ci_level": ci_level,
                             "bootstrap_resamples": bootstrap_resamples, "seed": seed, "interval_level": interval_level}
    for name, value in given.items():
        if value is not None:
            body[name] = value.replace("-", "_") if isinstance(value, str) else value
    if margin:
        body["equivalence_margins"] = dict(body.get("equivalence_margins") or {}) | _margins(margin)
    return StudyProtocol.from_dict(body)


def protocol_line(protocol: StudyProtocol) -> str:
    """One line naming the parameter definitions of ``protocol`` (printed under the tables)."""
    return (f"protocol {protocol.fingerprint()}: WASO to {protocol.waso_end.replace('_', ' ')}, awakenings of "
            f">= {protocol.min_awakening_epochs} epoch(s), SOL to {protocol.sol.replace('_', ' ')} "
            f"(persistent sleep {protocol.persistent_sleep_min:g} min), unscored epochs "
            f"{'break' if protocol.unscored_breaks_bouts else 'keep'} bouts")
