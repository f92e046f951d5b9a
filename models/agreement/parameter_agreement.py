"""All agreement figures of the night-level parameters of a study, under one protocol.

For every method and parameter of a parameter table (one row per night and method, the reference
among them), one JSON-safe entry holds:

- the repeated-measures Bland-Altman analysis (:func:`repeated_bland_altman`; bias, limits,
  participant-bootstrap intervals, proportional bias, regression limits);
- ``icc``: ICC(A,1) of method and reference over the nights (:func:`icc_a1`; nights of one
  participant are not independent, so its interval is optimistic when participants have several
  nights; ``icc["targets"]`` says what was rated);
- ``equivalence``: the two one-sided tests on participant means against the protocol's margin
  (:func:`parameter_equivalence`), or None for a parameter without a margin.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd

from ..scoring.protocol import DEFAULT_PROTOCOL, StudyProtocol
from .bland_altman import BLAND_ALTMAN_PARAMETERS, REFERENCE, matched_nights
from .equivalence import parameter_equivalence
from .reliability import icc_a1
from .repeated_bland_altman import repeated_bland_altman

__all__ = ["parameter_agreement"]


def parameter_agreement(parameters: pd.DataFrame, *, reference_method: str = REFERENCE,
                        parameter_names: Sequence[str] = BLAND_ALTMAN_PARAMETERS,
                        protocol: StudyProtocol = DEFAULT_PROTOCOL, against: str = "mean") -> list[dict[str, Any]]:
    """Bland-Altman, ICC(A,1) and equivalence of every method and parameter against the reference.

    Parameters
    ----------
    parameters, reference_method, parameter_names, against
        As :func:`models.agreement.repeated_bland_altman.repeated_bland_altman_table`.
    protocol : StudyProtocol, default=DEFAULT_PROTOCOL
        Margins, CI level, bootstrap resamples and seed.

    Returns
    -------
    list of dict
        One JSON-safe entry per method (order of first appearance) and parameter: the keys of
        :meth:`RepeatedBlandAltman.to_dict` plus ``icc`` and ``equivalence``.

    Raises
    ------
    InvalidAgreementInputError
        If the table lacks a needed column.
    """
    out = []
    for name, own, ref in matched_nights(parameters, reference_method=reference_method,
                                         parameter_names=parameter_names):
        participants = ref.index.get_level_values("participant_id").to_numpy(dtype=object)
        for parameter in parameter_names:
            x, r = own[parameter].to_numpy(dtype=np.float64), ref[parameter].to_numpy(dtype=np.float64)
            entry = repeated_bland_altman(x, r, participants, method_name=name, parameter=parameter,
                                          protocol=protocol, against=against).to_dict()
            entry["icc"] = icc_a1(np.column_stack([x, r]), ci_level=protocol.ci_level).to_dict() | {
                "targets": "nights"}
            entry["equivalence"] = parameter_equivalence(
                x, r, participants, parameter=parameter, method_name=name,
                protocol=protocol) if parameter in protocol.equivalence_margins else None
            out.append(entry)
    return out
