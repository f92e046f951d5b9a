"""Settings: the README's Configuration table lists every field of ``Settings`` once, with its default."""

from __future__ import annotations

import re
from pathlib import Path

README = Path(__file__).resolve().parents[2] / "README.md"
_ROW = re.compile(r"^\|\s*`(NIGHTBANK_[A-Z0-9_]+)`\s*\|\s*([^|]*?)\s*\|\s*([^|]*?)\s*\|\s*$")


def _setting_rows(text: str) -> list[tuple[str, str, str]]:
    """(variable, default cell, meaning) of every table row that starts with a ``NIGHTBANK_*`` name."""
    return [m.groups() for line in text.splitlines() if (m := _ROW.match(line.strip()))]  # type: ignore[misc]


def _configuration_section(text: str) -> str:
    start = text.index("### Configuration")
    return text[start:text.index("\n#", start + 1)]


def test_readme_table_lists_every_setting_once_with_its_default() -> None:
    from pydantic import TypeAdapter

    from service.config import Settings

    text = README.read_text(encoding="utf-8")
    rows = _setting_rows(text)
    names = [name for name, _, _ in rows]
    assert len(names) == len(set(names)), sorted(n for n in names if names.count(n) > 1)  # once in the whole README
    table = {name: (default, meaning) for name, default, meaning in _setting_rows(_configuration_section(text))}
    fields = {f"NIGHTBANK_{name.upper()}": field for name, field in Settings.model_fields.items()}
    assert set(table) == set(fields) == set(names)
    for name, field in fields.items():
        default, meaning = table[name]
        assert meaning, name
        written = None if default in ("(none)", "—", "-") else default.strip("`")
        # the README's text read as the field's type, as pydantic reads the environment variable
        assert TypeAdapter(field.annotation).validate_python(written) == field.default, name


def test_every_setting_is_read_from_its_environment_variable(monkeypatch) -> None:
    from service.config import Settings

    monkeypatch.setenv("NIGHTBANK_MAX_ATTEMPTS", "7")
    monkeypatch.setenv("NIGHTBANK_EXECUTOR", "dask")
    monkeypatch.setenv("NIGHTBANK_DASK_SCHEDULER", "tcp://10.0.0.5:8786")
    settings = Settings()
    assert (settings.max_attempts, settings.executor, settings.dask_scheduler) == (7, "dask", "tcp://10.0.0.5:8786")
    assert all(field.description for field in Settings.model_fields.values())
