"""The package stays readable: no module over 400 lines, no function over 60 lines, over 8
parameters or over cyclomatic complexity 15 (radon's measure, McCabe 1976)."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "scripts" / "plateloom"
MODULES = sorted(PACKAGE.rglob("*.py"))


def _functions(path: Path):
    tree = ast.parse(path.read_text(encoding="utf-8"))
    return [node for node in ast.walk(tree) if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef))]


def _parameters(node: ast.FunctionDef) -> int:
    arguments = node.args
    names = [a.arg for a in arguments.posonlyargs + arguments.args + arguments.kwonlyargs]
    names += [a.arg for a in (arguments.vararg, arguments.kwarg) if a is not None]
    return len([n for n in names if n not in ("self", "cls")])


def test_the_package_has_modules():
    assert len(MODULES) > 40


@pytest.mark.parametrize("path", MODULES, ids=lambda p: str(p.relative_to(PACKAGE)))
def test_module_and_function_sizes(path):
    assert len(path.read_text(encoding="utf-8").splitlines()) <= 400
    too_long = [f.name for f in _functions(path) if f.end_lineno - f.lineno + 1 > 60]
    too_many = [f.name for f in _functions(path) if _parameters(f) > 8]
    assert too_long == [] and too_many == []


def test_cyclomatic_complexity_at_most_15():
    radon = pytest.importorskip("radon.complexity")
    complex_ = [
        f"{path.relative_to(PACKAGE)}:{block.name} ({block.complexity})"
        for path in MODULES
        for block in radon.cc_visit(path.read_text(encoding="utf-8"))
        if block.complexity > 15
    ]
    assert complex_ == []
