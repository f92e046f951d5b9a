"""Pieces of the web pages that need no browser: redirects, figures and model cards."""

from __future__ import annotations

import xml.etree.ElementTree as ET
from datetime import UTC, datetime

import numpy as np
import pytest


@pytest.mark.parametrize("target", ["https://elsewhere.example/ui/studies", "//elsewhere.example/ui/", "/v1/studies",
                                    "/ui", "/ui\\..\\v1", "", None])
def test_safe_next_refuses_addresses_outside_the_pages(target) -> None:
    from service.ui.access import safe_next

    assert safe_next(target, "/ui/studies") == "/ui/studies"


def test_safe_next_keeps_a_page_address() -> None:
    from service.ui.access import safe_next

    page = "/ui/studies/s1/participants/P-01?job=1"
    assert safe_next(page, "/ui/studies") == page


def _svg_texts(data: bytes) -> list[str]:
    root = ET.fromstring(data)
    return [el.text.strip() for el in root.iter() if el.text and el.text.strip()]


def test_bland_altman_figure_prints_the_given_bias_and_limits_as_text() -> None:
    from service.ui.figures import draw_bland_altman, render

    rng = np.random.default_rng(3)
    reference = rng.normal(400.0, 30.0, 12)
    method = reference + rng.normal(-20.0, 10.0, 12)
    d = method - reference
    # Bland & Altman 1986: bias = mean difference, limits = bias -/+ 1.96 SD (n - 1)
    bias, sd = d.mean(), d.std(ddof=1)
    stats = {"tst_min": {"bias": bias, "loa_lower": bias - 1.96 * sd, "loa_upper": bias + 1.96 * sd, "n": 12}}
    svg = render(draw_bland_altman, "sadeh", {"tst_min": (method, reference)}, stats, fmt="svg", size_in=(7, 4))
    texts = _svg_texts(svg)
    assert f"bias {bias:.1f}" in texts
    assert f"+1.96 SD {bias + 1.96 * sd:.1f}" in texts and f"-1.96 SD {bias - 1.96 * sd:.1f}" in texts
    assert "method − PSG (min)" in texts and "TST (n = 12)" in texts


def test_figures_are_reproducible_byte_for_byte() -> None:
    from service.ui.figures import draw_roc, render

    x = np.linspace(0.0, 1.0, 30)
    curves = {"personal": (x, np.sqrt(x), 0.667), "sadeh": (x, x**0.8, 0.556)}
    for fmt in ("svg", "png"):
        assert render(draw_roc, curves, fmt=fmt, size_in=(4, 4)) == render(draw_roc, curves, fmt=fmt, size_in=(4, 4))


def test_model_card_markdown_says_what_the_json_says() -> None:
    from service.store.metadata import ModelMetadata
    from service.store.versions import VersionInfo
    from service.ui.cards import model_card, model_card_markdown

    info = {"metrics": {"n_nights": 3, "balanced_accuracy": {"mean": 0.8123, "sd": 0.0456},
                        "specificity": {"mean": 0.7011, "sd": None}},
            "threshold": 0.4321, "training_nights": [{"participant_id": "P-01", "night_id": "ab12", "label": "n1"}],
            "feature_set_version": "f1", "hyperparameters": {"max_depth": 3}, "library_versions": {"xgboost": "3"}}
    version = VersionInfo(pk=1, uid="u", kind="personal", version=2, active=True,
                          created_at=datetime(2031, 3, 2, tzinfo=UTC), job_id="j",
                          metadata=ModelMetadata.from_json(info))
    card = model_card(version, study_id="s1", participant_id="P-01",
                      choice={"method": "personal", "reason": "higher held-out balanced accuracy"})
    text = model_card_markdown(card)
    assert card["threshold"]["p_sleep"] == 0.4321 and "P(sleep) ≥ 0.432" in text
    assert "| balanced accuracy | 0.812 | 0.046 |" in text and "| specificity | 0.701 | – |" in text
    assert "higher held-out balanced accuracy" in text and "P-01 night ab12 (n1)" in text
    assert all(f"- {caution}" in text for caution in card["cautions"])
    assert any("not a medical device" in c for c in card["cautions"])
