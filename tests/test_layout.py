"""The code's layout: one import name (demaudit.*), every package installed, size limits kept."""

from __future__ import annotations

import ast
import tomllib
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
SOURCE_ROOTS = ("service", "workers")


def python_files(*roots: str) -> list[Path]:
    return sorted(p for root in roots for p in (ROOT / root).rglob("*.py"))


def test_every_package_folder_is_installed_under_the_demaudit_name() -> None:
    config = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
    on_disk = {
        "demaudit." + ".".join(init.parent.relative_to(ROOT).parts)
        for root in SOURCE_ROOTS
        for init in (ROOT / root).rglob("__init__.py")
    }
    assert set(config["packages"]) == on_disk
    assert config["package-dir"] == {f"demaudit.{root}": root for root in SOURCE_ROOTS}


def imported_modules(path: Path) -> list[str]:
    names = []
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            names += [alias.name for alias in node.names]
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            names.append(node.module)
    return names


@pytest.mark.parametrize("root", ["service", "workers", "tests", "benchmarks"])
def test_nothing_imports_the_folders_by_their_bare_names(root: str) -> None:
    # a bare `import workers` would load a second copy of every module (and its errors' classes)
    bare = [
        f"{path.relative_to(ROOT)}: {name}"
        for path in python_files(root)
        for name in imported_modules(path)
        if name.split(".")[0] in SOURCE_ROOTS
    ]
    assert bare == []


MAX_MODULE_LINES = 400  # issue 14: a module a newcomer reads in one sitting
MAX_FUNCTION_LINES = 60


def test_no_module_is_longer_than_the_limit() -> None:
    long = {
        str(path.relative_to(ROOT)): n
        for path in python_files(*SOURCE_ROOTS)
        if (n := len(path.read_text().splitlines())) > MAX_MODULE_LINES
    }
    assert long == {}


def test_no_function_is_longer_than_the_limit() -> None:
    long = {
        f"{path.relative_to(ROOT)}::{node.name}": node.end_lineno - node.lineno + 1
        for path in python_files(*SOURCE_ROOTS)
        for node in ast.walk(ast.parse(path.read_text()))
        if isinstance(node, ast.FunctionDef | ast.AsyncFunctionDef)
        and node.end_lineno is not None
        and node.end_lineno - node.lineno + 1 > MAX_FUNCTION_LINES
    }
    assert long == {}
