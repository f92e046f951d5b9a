"""Import rules: models/ never imports service/ or web/database libraries; service/ uses models.__all__ only."""

from __future__ import annotations

import ast
from pathlib import Path

import models

ROOT = Path(__file__).resolve().parents[1]
FORBIDDEN_IN_MODELS = {"service", "fastapi", "starlette", "sqlalchemy", "alembic", "pydantic", "httpx", "uvicorn",
                       "typer", "rich"}


def _imports(path: Path):
    tree = ast.parse(path.read_text(), filename=str(path))
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                yield alias.name, None
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            yield node.module, [a.name for a in node.names]


def test_models_import_no_service_web_or_database() -> None:
    bad = [(p.name, mod) for p in (ROOT / "models").rglob("*.py") for mod, _ in _imports(p)
           if mod.split(".")[0] in FORBIDDEN_IN_MODELS]
    assert not bad


def test_service_imports_only_public_models_names() -> None:
    public = set(models.__all__)
    bad = []
    for p in (ROOT / "service").rglob("*.py"):
        for mod, names in _imports(p):
            if mod == "models":
                bad += [(p.name, n) for n in names if n not in public]
            elif mod.startswith("models."):
                bad.append((p.name, mod))
    assert not bad, bad


def test_all_names_exist() -> None:
    assert sorted(models.__all__) == sorted(set(models.__all__))
    for name in models.__all__:
        assert hasattr(models, name), name
