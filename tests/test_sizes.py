"""Modules of at most 400 lines and classes of at most 250 lines outside the tests (the house rule): a file or a
class that grows past them is split along its seams instead."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = ("assistant", "drivers", "simulated_stage")
MAX_MODULE_LINES = 400
MAX_CLASS_LINES = 250


def _sources() -> list[Path]:
    return sorted(p for pkg in PACKAGES for p in (ROOT / pkg).rglob("*.py"))


def oversized(path: Path, root: Path = ROOT) -> list[str]:
    """``what (lines)`` for the module itself and every class in it above the limits."""
    text = path.read_text(encoding="utf-8")
    name = path.relative_to(root)
    out = []
    lines = text.count("\n")  # as wc -l counts
    if lines > MAX_MODULE_LINES:
        out.append(f"{name} ({lines} lines)")
    for node in ast.walk(ast.parse(text)):
        if isinstance(node, ast.ClassDef):
            length = node.end_lineno - min([node.lineno, *(d.lineno for d in node.decorator_list)]) + 1
            if length > MAX_CLASS_LINES:
                out.append(f"{name}:{node.name} ({length} lines)")
    return out


def test_the_check_sees_the_sources_and_measures_them(tmp_path):
    assert len(_sources()) > 80
    big = tmp_path / "big.py"
    big.write_text("class A:\n" + "    x = 1\n" * 260 + "\n" * 150)
    assert oversized(big, tmp_path) == ["big.py (411 lines)", "big.py:A (261 lines)"]


@pytest.mark.parametrize("package", PACKAGES)
def test_no_module_or_class_over_the_limits(package):
    found = [s for p in _sources() if p.relative_to(ROOT).parts[0] == package for s in oversized(p)]
    assert found == []
