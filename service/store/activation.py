"""A version's activation evidence: the paired held-out comparison with the active version.

Keeping a new version because its held-out figure is not worse than the active version's is a
selection on those nights (:func:`models.activation_evidence`); the record says which nights the
comparison used and the version's figure on the others, so pages and JSON can say plainly when a
held-out figure is a selection figure.
"""

from __future__ import annotations

import pandas as pd

from models import activation_evidence

from .metadata import ActivationRecord, ModelMetadata

__all__ = ["activation_record", "selection_wording"]


def activation_record(metadata: ModelMetadata, active: ModelMetadata | None, *, kind: str,
                      selection_metric: str = "balanced_accuracy") -> ActivationRecord | None:
    """The activation evidence of a candidate against the active version.

    Parameters
    ----------
    metadata : ModelMetadata
        The candidate's; its ``night_metrics`` are the held-out rows compared.
    active : ModelMetadata or None
        The active version's (None: no version is active).
    kind : str
        ``personal`` or ``pooled``: which held-out rows are compared (pooled: without offsets).
    selection_metric : str, default="balanced_accuracy"
        Metric compared when ``metadata.selection`` names none.

    Returns
    -------
    ActivationRecord or None
        None when the candidate has no held-out night rows.
    """
    if not metadata.night_metrics:
        return None
    method = "pooled" if kind == "pooled" else "personal"
    metric = metadata.selection.metric if metadata.selection is not None else selection_metric
    old = pd.DataFrame(list(active.night_metrics)) if active is not None and active.night_metrics else None
    if old is not None and metric not in old:
        old = None
    found = activation_evidence(pd.DataFrame(list(metadata.night_metrics)), old, metric=metric, method=method)
    return ActivationRecord.model_validate(found.to_dict() | {"method": method})


def selection_wording(record: ActivationRecord | None) -> str:
    """One sentence saying whether a version's held-out figures are selection figures."""
    if record is None:
        return "activation evidence not recorded (stored before it was kept)"
    if record.against_version is None:
        return "no version was active: nothing compared, the held-out figures are not selection figures"
    if record.selection_free:
        return (f"selection figures: activation compared with version {record.against_version} on "
                f"{len(record.compared_nights)} shared held-out night(s); {record.metric} on the "
                f"{len(record.fresh_nights)} night(s) the comparison did not use: {record.fresh_value:.3f}")
    return (f"selection figures: every held-out night was used to compare with version {record.against_version}; "
            f"the held-out figures are optimistic for the version as activated")
