"""Decoders: from one night's per-epoch sleep probabilities to sleep/wake calls.

Every decoder has ``decode(p_sleep) -> calls`` (:class:`Decoder`); :data:`DECODERS` lists the
back-ends by name and :func:`make_decoder` builds one from a name and keyword settings, so a tuning
loop or a stored model can name its decoder in JSON.

- ``"threshold"`` (:class:`ThresholdDecoder`): each epoch on its own, sleep when
  ``p_sleep >= threshold``;
- ``"hmm"`` (:class:`HmmDecoder`): the two-state chain of :mod:`models.decoding.hmm`, decoded by
  the Viterbi path (``method="viterbi"``) or by thresholding the forward-backward marginals
  (``method="marginal"``), with the chain's ``stickiness`` and the ``emission_weight`` as settings.

Calls are float64 of shape (n_epochs,): 1 = sleep, 0 = wake, and NaN wherever ``p_sleep`` is NaN
(unscored epochs stay unscored, as :func:`models.scoring.parameters.sleep_parameters` expects).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, Literal, Protocol

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .hmm import InvalidHmmError, SleepWakeHmm, forward_backward, viterbi

__all__ = ["DECODERS", "Decoder", "HmmDecoder", "ThresholdDecoder", "make_decoder"]

DecodeMethod = Literal["viterbi", "marginal"]


class Decoder(Protocol):
    """Turns per-epoch P(sleep) of one night into calls (1 = sleep, 0 = wake, NaN = unscored)."""

    def decode(self, p_sleep: ArrayLike) -> NDArray[np.float64]: ...

    def settings(self) -> dict[str, Any]: ...


def _p(p_sleep: ArrayLike) -> NDArray[np.float64]:
    p = np.asarray(p_sleep, dtype=np.float64)
    if p.ndim != 1 or np.any(~np.isnan(p) & ((p < 0) | (p > 1))):
        raise InvalidHmmError("p_sleep must be 1-D with values in [0, 1] or NaN")
    return p


def _check_threshold(threshold: float) -> None:
    if not 0.0 < threshold < 1.0:
        raise InvalidHmmError(f"threshold must lie in (0, 1), got {threshold!r}")


@dataclass(frozen=True)
class ThresholdDecoder:
    """Epoch by epoch: sleep when ``p_sleep >= threshold``.

    Parameters
    ----------
    threshold : float, default=0.5
        In (0, 1).
    """

    threshold: float = 0.5

    def __post_init__(self) -> None:
        _check_threshold(self.threshold)

    def decode(self, p_sleep: ArrayLike) -> NDArray[np.float64]:
        """Calls of shape (n_epochs,)."""
        p = _p(p_sleep)
        return np.where(np.isnan(p), np.nan, (p >= self.threshold).astype(np.float64))

    def settings(self) -> dict[str, Any]:
        """The decoder's name and settings, JSON-safe."""
        return {"decoder": "threshold", "threshold": self.threshold}


@dataclass(frozen=True)
class HmmDecoder:
    """Decoding with a fitted sleep/wake chain.

    Parameters
    ----------
    hmm : SleepWakeHmm
        Fitted on training labels (:func:`models.decoding.hmm.fit_sleep_wake_hmm`).
    method : {"viterbi", "marginal"}, default="viterbi"
        The most probable path, or each epoch's posterior P(sleep) against ``threshold``.
    threshold : float, default=0.5
        Decision threshold on the marginals (ignored by ``"viterbi"``), in (0, 1).
    stickiness : float, default=1.0
        Divides the chain's switching probabilities (> 1: fewer, longer bouts).
    emission_weight : float, default=1.0
        Exponent on the scaled likelihoods (< 1 trusts the chain more than the classifier).
    """

    hmm: SleepWakeHmm = field(repr=False)
    method: DecodeMethod = "viterbi"
    threshold: float = 0.5
    stickiness: float = 1.0
    emission_weight: float = 1.0

    def __post_init__(self) -> None:
        if self.method not in ("viterbi", "marginal"):
            raise InvalidHmmError(f"method must be 'viterbi' or 'marginal', got {self.method!r}")
        _check_threshold(self.threshold)
        object.__setattr__(self, "_chain", self.hmm.with_stickiness(self.stickiness))
        self.hmm.emissions(np.zeros(0), emission_weight=self.emission_weight)  # validates the weight

    @property
    def chain(self) -> SleepWakeHmm:
        """The fitted chain with ``stickiness`` applied."""
        chain: SleepWakeHmm = self.__dict__["_chain"]
        return chain

    def marginals(self, p_sleep: ArrayLike) -> NDArray[np.float64]:
        """Posterior P(sleep) of each epoch, shape (n_epochs,) (defined for unscored epochs too)."""
        chain = self.chain
        post, _ = forward_backward(chain.emissions(_p(p_sleep), emission_weight=self.emission_weight),
                                   chain.transition, chain.initial)
        return post[:, 1]

    def decode(self, p_sleep: ArrayLike) -> NDArray[np.float64]:
        """Calls of shape (n_epochs,); NaN where ``p_sleep`` is NaN."""
        p = _p(p_sleep)
        chain = self.chain
        if self.method == "viterbi":
            calls = viterbi(chain.emissions(p, emission_weight=self.emission_weight), chain.transition,
                            chain.initial).astype(np.float64)
        else:
            calls = (self.marginals(p) >= self.threshold).astype(np.float64)
        return np.where(np.isnan(p), np.nan, calls)

    def settings(self) -> dict[str, Any]:
        """The decoder's name and settings (the chain itself via ``hmm.to_dict()``), JSON-safe."""
        return {"decoder": "hmm", "method": self.method, "threshold": self.threshold,
                "stickiness": self.stickiness, "emission_weight": self.emission_weight}


#: Decoder back-ends by name.
DECODERS: Mapping[str, type[ThresholdDecoder] | type[HmmDecoder]] = {"hmm": HmmDecoder, "threshold": ThresholdDecoder}


def make_decoder(name: str, *, hmm: SleepWakeHmm | None = None, **settings: Any) -> ThresholdDecoder | HmmDecoder:
    """A decoder by name (a key of :data:`DECODERS`) with keyword settings.

    Parameters
    ----------
    name : str
    hmm : SleepWakeHmm or None, default=None
        Required by ``"hmm"``.
    **settings
        The decoder's keyword options.

    Raises
    ------
    InvalidHmmError
        For an unknown name, an unknown setting, a missing chain or an invalid value.
    """
    if name not in DECODERS:
        raise InvalidHmmError(f"decoder must be one of {sorted(DECODERS)}, got {name!r}")
    if name == "threshold":
        unknown = sorted(set(settings) - {"threshold"})
        if unknown:
            raise InvalidHmmError(f"unknown threshold-decoder settings: {', '.join(unknown)}")
        return ThresholdDecoder(**settings)
    unknown = sorted(set(settings) - {"method", "threshold", "stickiness", "emission_weight"})
    if unknown or hmm is None:
        raise InvalidHmmError(f"the hmm decoder needs a fitted chain (hmm=) and known settings; unknown: {unknown}")
    return HmmDecoder(hmm, **settings)
