"""The same content posted again under another label: 200, the stored label kept and said so."""

from __future__ import annotations

from typing import Any

from factories import night_json

NIGHTS = "/v1/studies/s1/participants/P01/nights"


def test_a_changed_label_on_a_repost_is_reported_as_ignored(http: Any, admin: dict[str, str], study: str) -> None:
    first = http.post(NIGHTS, json=night_json(240, label="night A"), headers=admin)
    assert first.status_code == 201
    assert first.json()["stored_label"] == "night A" and first.json()["label_ignored"] is False
    again = http.post(NIGHTS, json=night_json(240, label="night B"), headers=admin)
    assert again.status_code == 200, again.text
    assert again.json()["night_id"] == first.json()["night_id"]
    assert again.json()["label_ignored"] is True and again.json()["stored_label"] == "night A"
    stored = http.get(f"{NIGHTS}/{first.json()['night_id']}", headers=admin).json()
    assert stored["label"] == "night A"
    same = http.post(NIGHTS, json=night_json(240, label="night A"), headers=admin).json()
    unlabelled = http.post(NIGHTS, json=night_json(240), headers=admin).json()
    assert same["label_ignored"] is False and unlabelled["label_ignored"] is False
    assert unlabelled["stored_label"] == "night A"
