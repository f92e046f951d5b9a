"""Typed metadata of a stored model version, and the one place that knows its JSON form.

A version's metadata is written when the version is stored; it changes only by the edits of
:mod:`service.store.version_edits` (a participant rename, a deleted night's held-out rows). It lives as
JSON in the ``model_versions.info`` column; :meth:`ModelMetadata.to_json` and
:meth:`ModelMetadata.from_json` are the only code that writes or reads that form, with the JSON
keys named like the attributes. Reading is tolerant: keys missing from a stored row take their
defaults and unknown keys are ignored, so rows of earlier releases read without a migration.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from pydantic import BaseModel, ConfigDict, Field, model_serializer, model_validator

__all__ = ["ActivationRecord", "FlaggedNight", "HeldOutFigures", "MetricSummary", "ModelMetadata", "Selection",
           "TrainingNight"]


class _Record(BaseModel):
    model_config = ConfigDict(frozen=True, extra="ignore")


class MetricSummary(_Record):
    """Mean and SD (ddof=1) over held-out nights of one epoch metric; None where undefined."""

    mean: float | None = None
    sd: float | None = None


class HeldOutFigures(_Record):
    """Held-out validation figures: the nights compared and every epoch metric's mean and SD.

    Stored flat, ``{"n_nights": 5, "balanced_accuracy": {"mean": 0.81, "sd": 0.04}, ...}``, which
    is also the form of :meth:`as_dict` (the API's ``metrics``).
    """

    n_nights: int = 0
    by_metric: dict[str, MetricSummary] = Field(default_factory=dict)

    @model_validator(mode="before")
    @classmethod
    def _unflatten(cls, data: Any) -> Any:
        if isinstance(data, Mapping) and "by_metric" not in data:
            return {"n_nights": data.get("n_nights") or 0,
                    "by_metric": {k: v for k, v in data.items() if k != "n_nights" and isinstance(v, Mapping)}}
        return data

    @model_serializer(mode="plain")
    def _flatten(self) -> dict[str, Any]:
        return {"n_nights": self.n_nights, **{k: {"mean": v.mean, "sd": v.sd} for k, v in self.by_metric.items()}}

    def mean(self, metric: str) -> float | None:
        """Mean over held-out nights of ``metric`` (None if not computed)."""
        found = self.by_metric.get(metric)
        return None if found is None else found.mean

    def as_dict(self) -> dict[str, Any]:
        """The flat JSON form (a new dict)."""
        return self._flatten()


class Selection(_Record):
    """The held-out figure that decides promotion ("higher is better") and its value."""

    metric: str
    value: float | None = None


class ActivationRecord(_Record):
    """How a version's activation was decided, and which of its held-out figures the decision did not use.

    The JSON form of :class:`models.ActivationEvidence`, taken when the version was stored.

    Attributes
    ----------
    metric : str
        The compared held-out metric (higher is better).
    method : str
        Held-out rows compared (``personal`` or ``pooled``).
    activate : bool
        Whether the version became active when stored.
    against_version : int or None
        The version active then (None: none was).
    candidate_value, active_value : float or None
        Means over ``compared_nights`` (None without shared nights).
    compared_nights : tuple of str
        Content hashes of the nights both versions held out (the comparison used them).
    fresh_nights : tuple of str
        Content hashes of the version's other held-out nights.
    fresh_value : float or None
        The version's mean over ``fresh_nights``: not used by the selection.
    selection_free : bool
        ``fresh_value`` rests on at least one night; False: every held-out figure is a selection figure.
    note : str
    """

    metric: str
    method: str = "personal"
    activate: bool = True
    against_version: int | None = None
    candidate_value: float | None = None
    active_value: float | None = None
    compared_nights: tuple[str, ...] = ()
    fresh_nights: tuple[str, ...] = ()
    fresh_value: float | None = None
    selection_free: bool = False
    note: str = ""


class TrainingNight(_Record):
    """A night a model was trained on."""

    participant_id: str
    night_id: str
    content_hash: str = ""
    label: str | None = None


class FlaggedNight(_Record):
    """A training night that carried QC flags a model's users must hear about (a doubtful reference).

    Attributes
    ----------
    participant_id : str
    night_id : str
    codes : tuple of str
        The QC codes the night carried when the model was trained (e.g. ``reference_implausible``).
    label : str or None
        The lab's label of the night then.
    """

    participant_id: str
    night_id: str
    codes: tuple[str, ...] = ()
    label: str | None = None


class ModelMetadata(_Record):
    """What the registry records about a model version besides its bytes.

    Attributes
    ----------
    metrics : HeldOutFigures
        Held-out validation figures of the model (pooled models: without participant offset).
    selection : Selection or None
        The figure the promotion rule compares.
    training_nights : tuple of TrainingNight
    training_hashes : tuple of str
        Content hashes of the training nights.
    flagged_nights : tuple of FlaggedNight
        Training nights carrying a warning QC code (``service.jobs.training.TRAINING_WARNING_CODES``),
        with the codes; empty for versions stored before this was recorded.
    feature_set_version : str or None
    hyperparameters : dict
    threshold : float or None
        Sleep probability at or above which an epoch is called sleep.
    library_versions : dict of str to str
    config : dict
        The training options that shaped the model (trials, seed, choice policy, ...).
    night_metrics : tuple of dict
        One record per held-out night and method: ids, ``method`` and every epoch metric.
    offset : float or None
        Log-odds offset built into the model (None: none).
    metrics_with_offset : HeldOutFigures or None
        Pooled models: held-out figures with each participant's offset.
    participants : tuple of str
        Pooled models: participants whose nights the model was trained on.
    offsets : dict of str to float
        Pooled models: shrunken log-odds offset per participant.
    offset_shrinkage : float or None
        Pooled models: shrinkage applied to the offsets.
    descriptors : dict of str to dict
        Pooled models: the participant descriptors used in training, per participant.
    offset_rule : str or None
        Pooled models: how the offsets of participants the model trained on were estimated
        (:data:`models.OFFSET_RULE`); None for versions stored before this was recorded.
    activation : ActivationRecord or None
        The comparison with the version active when this one was stored (None for versions stored
        without held-out night rows, or before this was recorded).
    corrected_nights : int
        Nights without PSG whose adjudicated corrected labels the final model was also fitted on
        (never held out); 0 for versions stored before this was recorded.
    correction_weight : float or None
        The sample weight those nights' rows had (PSG rows weigh 1); None without corrected nights.
    removed_held_out_nights : tuple of str
        Ids of nights deleted after the version was stored whose held-out predictions and night
        metrics were removed from it; ``metrics``, ``metrics_with_offset`` and ``selection`` were
        computed again without them (:mod:`service.store.version_edits`).
    """

    metrics: HeldOutFigures = Field(default_factory=HeldOutFigures)
    selection: Selection | None = None
    training_nights: tuple[TrainingNight, ...] = ()
    training_hashes: tuple[str, ...] = ()
    flagged_nights: tuple[FlaggedNight, ...] = ()
    feature_set_version: str | None = None
    hyperparameters: dict[str, Any] = Field(default_factory=dict)
    threshold: float | None = None
    library_versions: dict[str, str] = Field(default_factory=dict)
    config: dict[str, Any] = Field(default_factory=dict)
    night_metrics: tuple[dict[str, Any], ...] = ()
    offset: float | None = None
    metrics_with_offset: HeldOutFigures | None = None
    participants: tuple[str, ...] = ()
    offsets: dict[str, float] = Field(default_factory=dict)
    offset_shrinkage: float | None = None
    descriptors: dict[str, dict[str, float | None]] = Field(default_factory=dict)
    offset_rule: str | None = None
    activation: ActivationRecord | None = None
    corrected_nights: int = 0
    correction_weight: float | None = None
    removed_held_out_nights: tuple[str, ...] = ()

    @property
    def selection_score(self) -> float | None:
        """The value the promotion rule compares (None if there is none)."""
        return None if self.selection is None else self.selection.value

    def offset_of(self, participant_id: str) -> float:
        """A participant's offset, log-odds (0 for a participant the model has none for)."""
        return float(self.offsets.get(participant_id, 0.0))

    def to_json(self) -> dict[str, Any]:
        """The stored JSON form."""
        return self.model_dump(mode="json")

    @classmethod
    def from_json(cls, data: Mapping[str, Any] | None) -> ModelMetadata:
        """Read the stored JSON form (missing keys take their defaults, unknown keys are ignored)."""
        return cls.model_validate(dict(data or {}))
