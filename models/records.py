"""JSON-safe records of tables and mappings.

JSON has no NaN or infinity: every non-finite number becomes None (``null``), numpy scalars
become plain Python numbers, and everything else is kept as it is. Floats stay floats (a count
held as ``480.0`` is written as ``480.0``).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd

__all__ = ["json_record", "json_records", "json_value"]


def json_value(value: Any) -> Any:
    """One value made JSON-safe.

    Parameters
    ----------
    value : object

    Returns
    -------
    object
        None for a NaN or infinite float, a Python ``float``/``int``/``bool`` for a numpy
        scalar, else ``value`` itself.

    Examples
    --------
    >>> json_value(float("nan")), json_value(np.int64(3)), json_value(2.5), json_value("a")
    (None, 3, 2.5, 'a')
    """
    if isinstance(value, float | np.floating):
        return float(value) if math.isfinite(value) else None
    if isinstance(value, np.bool_):
        return bool(value)
    if isinstance(value, np.integer):
        return int(value)
    return value


def json_record(values: Mapping[str, Any]) -> dict[str, Any]:
    """A mapping with every value made JSON-safe by :func:`json_value` (keys and order kept)."""
    return {key: json_value(value) for key, value in values.items()}


def json_records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    """Rows of a table as JSON-safe records.

    Parameters
    ----------
    frame : pandas.DataFrame of shape (n_rows, n_columns)

    Returns
    -------
    records : list of dict, length n_rows
        One dict per row, keys in column order; missing values (NaN, None, ``pd.NA``) and
        infinities are None.
    """
    rows = frame.astype(object).where(frame.notna(), None).to_dict(orient="records")
    return [json_record(row) for row in rows]  # type: ignore[arg-type]
