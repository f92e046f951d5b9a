"""Package rules of models/ and service/, read from the source with ``ast`` (deferred imports included).

- models/ never imports service/ or web/database libraries; service/ imports models only through
  names in ``models.__all__``.
- Inside models/ the sub-packages are layers (:data:`LAYERS`): a module imports only its own or
  lower layers.
- No import cycles between the modules of models/ and service/.
- Package surfaces: each package's ``__all__`` is sorted and its names exist. A models/ package
  lists exactly the union of its modules' ``__all__``; modules whose name starts with ``_`` hold
  what the package's modules share among themselves and are left out.
- Size: at most :data:`MAX_TOP_LEVEL_MODULES` modules directly in models/ (besides ``__init__``
  and ``errors``), none of models/ or service/ over :data:`MAX_MODULE_LINES` lines; each
  sub-package says in a one-line docstring summary what it holds.
"""

from __future__ import annotations

import ast
import importlib
from collections.abc import Iterator
from dataclasses import dataclass
from graphlib import CycleError, TopologicalSorter
from pathlib import Path

import pytest

import models

ROOT = Path(__file__).resolve().parents[1]
PROJECT = ("models", "service")
FORBIDDEN_IN_MODELS = {"service", "fastapi", "starlette", "sqlalchemy", "alembic", "pydantic", "httpx", "uvicorn",
                       "typer", "rich"}
#: models/ sub-packages (and models/errors.py) from the bottom layer up; the ``models`` facade sits above all
LAYERS = ("errors", "nights", "scoring", "agreement", "recordings", "decoding", "features", "learning", "review",
          "simulation")
#: modules directly in models/ that hold plain definitions (errors, JSON-safe records) usable by every layer
TOP_LEVEL_FOUNDATION = ("errors", "records")
MAX_TOP_LEVEL_MODULES = 8
MAX_MODULE_LINES = 400


@dataclass(frozen=True)
class _Import:
    """One import statement of a project module, resolved to absolute names."""

    module: str  # the imported module or package, absolute
    names: tuple[str, ...]  # the names of a ``from`` import, empty for ``import x``
    line: int


def _module_name(path: Path) -> str:
    parts = path.relative_to(ROOT).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _files() -> dict[str, Path]:
    """Every module of models/ and service/ by dotted name."""
    return {_module_name(p): p for top in PROJECT for p in sorted((ROOT / top).rglob("*.py"))}


FILES = _files()


def _imports(path: Path) -> Iterator[_Import]:
    """All imports of a file, at any depth (functions, ``TYPE_CHECKING`` blocks), relative ones resolved."""
    tree = ast.parse(path.read_text(), filename=str(path))
    name = _module_name(path)
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                yield _Import(alias.name, (), node.lineno)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[:len(package.split(".")) - (node.level - 1)]
                module = ".".join(base + ([node.module] if node.module else []))
            else:
                module = node.module or ""
            yield _Import(module, tuple(a.name for a in node.names), node.lineno)


def _targets(imp: _Import) -> set[str]:
    """Project modules an import loads: ``from pkg import mod`` names the module ``pkg.mod``."""
    if imp.module not in FILES:
        return set()
    subs = {f"{imp.module}.{n}" for n in imp.names if f"{imp.module}.{n}" in FILES}
    return subs | ({imp.module} if len(subs) < len(imp.names) or not imp.names else set())


def _graph() -> dict[str, set[str]]:
    """module -> project modules it imports."""
    return {name: set().union(*(_targets(i) for i in _imports(path))) - {name} for name, path in FILES.items()}


def _layer(module: str) -> int:
    parts = module.split(".")
    if parts == ["models"]:
        return len(LAYERS)
    if len(parts) == 2 and parts[1] in TOP_LEVEL_FOUNDATION:
        return 0  # errors and records: plain definitions every layer may use
    assert parts[1] in LAYERS, f"{module} is in no layer; add models/{parts[1]} to LAYERS"
    return LAYERS.index(parts[1])


def _static_all(path: Path) -> list[str] | None:
    for node in ast.parse(path.read_text()).body:
        target = node.targets[0] if isinstance(node, ast.Assign) else getattr(node, "target", None)
        if isinstance(target, ast.Name) and target.id == "__all__":
            return list(ast.literal_eval(node.value))
    return None


PACKAGES = sorted(name for name, path in FILES.items() if path.name == "__init__.py")
SUBPACKAGES = [p for p in PACKAGES if p.count(".") == 1]


def test_models_import_no_service_web_or_database() -> None:
    bad = [(name, imp.module) for name, path in FILES.items() if name.startswith("models")
           for imp in _imports(path) if imp.module.split(".")[0] in FORBIDDEN_IN_MODELS]
    assert not bad


def test_service_imports_only_public_models_names() -> None:
    public = set(models.__all__)
    bad = []
    for name, path in FILES.items():
        if not name.startswith("service"):
            continue
        for imp in _imports(path):
            if imp.module == "models":
                bad += [(name, n) for n in imp.names if n not in public]
            elif imp.module.startswith("models."):
                bad.append((name, imp.module))
    assert not bad, bad


def test_models_layers_import_downwards_only() -> None:
    # simulation needs only nights; features use the rule scores of scoring as inputs
    upward = [f"{name}:{imp.line} imports {target} ({LAYERS[_layer(target)]} is above {LAYERS[_layer(name)]})"
              for name, path in FILES.items() if name.startswith("models.")
              for imp in _imports(path) for target in _targets(imp)
              if target.split(".")[0] == "models" and _layer(target) > _layer(name)]
    assert not upward, "\n".join(upward)


def test_no_import_cycles() -> None:
    graph = _graph()
    cycles = []
    while True:  # report every cycle: drop one edge of each found and search again
        try:
            TopologicalSorter(graph).prepare()
            break
        except CycleError as exc:
            path = exc.args[1][::-1]  # graphlib lists predecessors first; reversed, each entry imports the next
            cycles.append(" -> ".join(path))
            graph[path[0]].discard(path[1])
    assert not cycles, "import cycles:\n" + "\n".join(cycles)


@pytest.mark.parametrize("package", [p for p in PACKAGES if _static_all(FILES[p]) is not None])
def test_package_all_sorted_and_names_exist(package: str) -> None:
    names = _static_all(FILES[package])
    assert names == sorted(names)
    assert len(names) == len(set(names))
    module = importlib.import_module(package)
    assert [n for n in names if not hasattr(module, n)] == []


@pytest.mark.parametrize("package", [p for p in PACKAGES if p.startswith("models.")])
def test_models_package_all_is_its_modules_all(package: str) -> None:
    modules = [n for n in FILES if n.rpartition(".")[0] == package]
    assert [m for m in modules if _static_all(FILES[m]) is None] == []
    public = set().union(*(_static_all(FILES[m]) or [] for m in modules if not m.rpartition(".")[2].startswith("_")))
    listed = set(_static_all(FILES[package]) or [])
    assert sorted(public - listed) == [], "in a module's __all__ but not re-exported"
    assert sorted(listed - public) == [], "re-exported but in no public module's __all__"


def test_models_all_comes_from_the_subpackages() -> None:
    # one place per definition: the facade re-exports sub-package names, it defines nothing itself
    offered = set().union(*(_static_all(FILES[p]) or [] for p in SUBPACKAGES if p.startswith("models.")),
                          *(_static_all(FILES[f"models.{m}"]) or [] for m in TOP_LEVEL_FOUNDATION))
    assert sorted(set(models.__all__) - offered) == []


def test_at_most_eight_modules_directly_in_models() -> None:
    top = sorted(p.name for p in (ROOT / "models").glob("*.py") if p.name not in ("__init__.py", "errors.py"))
    assert len(top) <= MAX_TOP_LEVEL_MODULES, top




@pytest.mark.parametrize("module", [
m for m in FILES])
def test_module_at_most_400_lines(module: str) -> None:
    n_lines = len(FILES[module].read_text().splitlines())
    assert n_lines <= MAX_MODULE_LINES, f"{FILES[module].relative_to(ROOT)} has {n_lines} lines; split it"




@pytest.mark.parametrize("package", [
p for p in SUBPACKAGES])
def test_subpackage_has_one_line_summary(package: str) -> None:
    doc = ast.get_docstring(ast.parse(FILES[package].read_text())) or ""
    summary, _, rest = doc.partition("\n")
    assert summary.endswith(".") and len(summary.split()) >= 3, f"{package}: {summary!r}"
    assert rest == "" or rest.startswith("\n"), f"{package}: the summary runs over one line"
