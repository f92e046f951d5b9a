"""Jinja2 templates of the pages, their number formats and the context every page shares."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any, cast

import pandas as pd
from fastapi import Request
from fastapi.responses import HTMLResponse
from fastapi.templating import Jinja2Templates

from models import DEMO_STUDY_ID

from ..store.tokens import Principal
from .access import RENDERING, UI_PREFIX, csrf_token
from .figures import PARAMETER_LABELS, PARAMETER_UNITS, style_of

__all__ = ["CAUTIONS", "TEMPLATES", "is_simulated", "method_label", "number", "page", "parameter_label", "records"]

TEMPLATES = Jinja2Templates(directory=Path(__file__).parent / "templates")

#: Shown in every page footer and in every model card.
CAUTIONS: tuple[str, ...] = (
    "Research software, not a medical device.",
    "Not for diagnosis or for treatment decisions.",
    "Agreement figures describe the nights shown; they do not promise the same on other people or devices.",
    "The demo study contains simulated data (invented participants), labelled SIMULATED.",
)


def number(value: Any, digits: int = 1) -> str:
    """A number for a table cell: fixed ``digits``, an en dash for missing or non-finite values."""
    if value is None or isinstance(value, bool):
        return "–" if value is None else str(value)
    try:
        x = float(value)
    except (TypeError, ValueError):
        return str(value)
    if not math.isfinite(x):
        return "–"
    return f"{x:.{digits}f}"


def parameter_label(name: str) -> str:
    """``"TST (min)"`` for ``"tst_min"``."""
    unit = PARAMETER_UNITS.get(name)
    label = PARAMETER_LABELS.get(name, name.replace("_", " "))
    return f"{label} ({unit})" if unit else label


def method_label(method: str) -> str:
    """Readable method name (``"Cole-Kripke"`` for ``"cole-kripke"``)."""
    return style_of(method).label


TEMPLATES.env.filters["number"] = number
TEMPLATES.env.filters["parameter_label"] = parameter_label
TEMPLATES.env.filters["method_label"] = method_label
TEMPLATES.env.globals["CAUTIONS"] = CAUTIONS
TEMPLATES.env.globals["ui"] = UI_PREFIX
TEMPLATES.env.globals["csrf_token"] = csrf_token


def records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    """Table rows for a template, missing values as None."""
    return cast(list[dict[str, Any]], frame.astype(object).where(frame.notna(), None).to_dict(orient="records"))


def is_simulated(study_id: str | None, name: str | None = None) -> bool:
    """Whether a study holds simulated data (the demo study, or a name that says so)."""
    return study_id == DEMO_STUDY_ID or "simulated" in (name or "").lower()


def page(request: Request, template: str, *, principal: Principal | None, status_code: int = 200,
         **context: Any) -> HTMLResponse:
    """Render ``template`` with the shared context (viewer, role, cautions)."""
    shared = {"principal": principal, "role": None if principal is None else principal.role.name}
    rendering = RENDERING.set(request)  # the forms' token field reads it, also inside imported macros
    try:
        return TEMPLATES.TemplateResponse(request, template, shared | context, status_code=status_code)
    finally:
        RENDERING.reset(rendering)
