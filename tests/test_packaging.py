"""Layout and packaging guards (DESIGN.md section 2)."""
import ast
import tomllib
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
FOLDERS = {"core": "quakefolio.core", "fragility": "quakefolio.fragility", "pipeline": "quakefolio.pipeline"}
LAYER = {"quakefolio.core": 0, "quakefolio.fragility": 1, "quakefolio.pipeline": 2}


def _pyproject():
    return tomllib.loads((REPO / "pyproject.toml").read_text())


def test_every_subpackage_is_listed_and_mapped():
    tool = _pyproject()["tool"]["setuptools"]
    packages = set(tool["packages"])
    for folder, name in FOLDERS.items():
        assert tool["package-dir"][name] == folder
        for init in (REPO / folder).rglob("__init__.py"):
            rel = init.parent.relative_to(REPO / folder)
            dotted = ".".join((name,) + rel.parts) if rel.parts else name
            assert dotted in packages, f"{dotted} missing from [tool.setuptools] packages"


def _python_files():
    for folder in (*FOLDERS, "tests", "benchmarks", "demo_portfolio"):
        yield from (REPO / folder).rglob("*.py")


@pytest.mark.parametrize("path", sorted(_python_files()), ids=lambda p: str(p.relative_to(REPO)))
def test_imports_are_namespaced_and_point_downward(path):
    tree = ast.parse(path.read_text(encoding="utf-8"))
    own = None
    rel = path.relative_to(REPO)
    if rel.parts[0] in FOLDERS:
        own = FOLDERS[rel.parts[0]]
    for node in ast.walk(tree):
        names = []
        if isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            names = [node.module]
        elif isinstance(node, ast.ImportFrom) and node.level > 0:
            pytest.fail(f"{rel}:{node.lineno}: relative import; use quakefolio.* names")
        for name in names:
            top = name.split(".")[0]
            assert top not in FOLDERS, f"{rel}:{node.lineno}: bare import of {name!r}; use quakefolio.{name}"
            if own and name.startswith("quakefolio."):
                target = ".".join(name.split(".")[:2])
                assert LAYER[target] <= LAYER[own], f"{rel}:{node.lineno}: {own} must not import {target}"
            if own == "quakefolio.core":
                assert top not in ("pandas", "prefect", "pyarrow"), f"{rel}:{node.lineno}: core imports {top}"


def test_console_script_and_module_entry():
    scripts = _pyproject()["project"]["scripts"]
    assert scripts["quakefolio"] == "quakefolio.pipeline.cli:command"
    assert (REPO / "pipeline" / "__main__.py").exists()


def test_lock_file_pins_every_dependency():
    lock = {}
    for line in (REPO / "requirements.lock").read_text().splitlines():
        if line.strip() and not line.startswith("#"):
            name, _, version = line.partition("==")
            lock[name.lower().replace("_", "-")] = version
    deps = _pyproject()["project"]["dependencies"] + _pyproject()["project"]["optional-dependencies"]["test"]
    for dep in deps:
        name = dep.split(">")[0].split("<")[0].split("=")[0].split("[")[0].strip().lower().replace("_", "-")
        assert name in lock, f"{name} is not pinned in requirements.lock"
