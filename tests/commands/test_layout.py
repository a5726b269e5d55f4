"""The package layout as a rule: which part of ``pipeline`` may import which.

The rule (DEVELOPERS.md, "Layout"): the kernel (errors, settings, config, geometry) imports nothing
else of the package; ``io`` only the kernel; ``inputs`` the kernel and ``io``; the stages
``volumes`` -> ``matching`` -> ``growth`` only the kernel and an earlier stage, never ``io``,
``inputs``, ``run`` or ``report``; ``report`` and ``demo`` only the kernel and ``io``; ``run`` may
use every part but ``cli``; ``cli`` imports ``run`` and the kernel. Every import counts, also one
inside a function. Reference: the rule itself (common practice for layered packages); the graph
is read with the standard library's ``ast``.
"""
from __future__ import annotations

import ast
import sys
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[2] / "pipeline"
KERNEL = {"errors", "settings", "config", "geometry", "voxels", "__init__"}

#: part -> parts it may import (itself always allowed)
ALLOWED = {
    "kernel": set(),
    "io": {"kernel"},
    "inputs": {"kernel", "io"},
    "volumes": {"kernel"},
    "matching": {"kernel", "volumes"},
    "growth": {"kernel"},
    "report": {"kernel", "io"},
    "demo": {"kernel", "io"},
    "run": {"kernel", "io", "inputs", "volumes", "matching", "growth", "report", "demo", "api"},
    "api": {"kernel", "volumes", "matching", "growth"},
    "cli": {"kernel", "run"},
    "__main__": {"cli"},
}
#: a stage's order, to say "a later stage" in a failure
STAGES = ["volumes", "matching", "growth"]


def part_of(module: str) -> str:
    """``pipeline.growth.laws`` -> ``growth``; kernel modules -> ``kernel``."""
    parts = module.split(".")
    if parts[0] != "pipeline":
        raise ValueError(module)
    if len(parts) == 1 or parts[1] in KERNEL:
        return "kernel"
    return parts[1]


def module_name(path: Path) -> str:
    rel = path.relative_to(PACKAGE.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__" and len(parts) > 1:
        parts = parts[:-1]
    return ".".join(parts)


def imports_of(path: Path) -> list[tuple[int, str]]:
    """Every ``pipeline`` module that ``path`` imports, with its line (relative ones resolved)."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    here = module_name(path).split(".")
    if path.name != "__init__.py":
        here = here[:-1]
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found += [(node.lineno, a.name) for a in node.names
                      if a.name.split(".")[0] == "pipeline"]
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                base = ".".join(here[: len(here) - node.level + 1] + ([base] if base else []))
            if base.split(".")[0] != "pipeline":
                continue
            for alias in node.names:
                full = f"{base}.{alias.name}"
                # `from pipeline.growth import laws` imports the module pipeline.growth.laws
                found.append((node.lineno, full if _is_module(full) else base))
    return found


def _is_module(dotted: str) -> bool:
    rel = Path(*dotted.split(".")[1:])
    return (PACKAGE / rel).with_suffix(".py").exists() or (PACKAGE / rel / "__init__.py").exists()


def graph() -> dict[str, set[str]]:
    edges: dict[str, set[str]] = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        edges[module_name(path)] = {target for _line, target in imports_of(path)}
    return edges


def violations() -> list[str]:
    bad = []
    for path in sorted(PACKAGE.rglob("*.py")):
        source = part_of(module_name(path))
        for line, target in imports_of(path):
            dest = part_of(target)
            if dest == source or dest in ALLOWED[source]:
                continue
            bad.append(f"{path.relative_to(PACKAGE.parent)}:{line} ({source}) imports {target} "
                       f"({dest})")
    return bad


def test_every_part_has_a_rule():
    parts = {part_of(module_name(p)) for p in PACKAGE.rglob("*.py")}
    assert parts <= set(ALLOWED), parts - set(ALLOWED)


def test_imports_follow_the_layout():
    assert violations() == []


def test_no_import_circle():
    # Reference: Tarjan-free check by depth-first search with colours (common practice).
    edges = graph()
    state: dict[str, int] = {}
    path: list[str] = []

    def visit(node: str) -> list[str] | None:
        state[node] = 1
        path.append(node)
        for nxt in sorted(edges.get(node, ())):
            if nxt not in edges:
                continue
            if state.get(nxt) == 1:
                return path[path.index(nxt):] + [nxt]
            if nxt not in state and (cycle := visit(nxt)):
                return cycle
        state[node] = 2
        path.pop()
        return None

    for start in sorted(edges):
        if start not in state and (cycle := visit(start)):
            pytest.fail("import circle: " + " -> ".join(cycle))


def test_stages_form_a_line():
    # No stage imports a later one (volumes -> matching -> growth).
    for i, stage in enumerate(STAGES):
        later = set(STAGES[i + 1:])
        assert not later & ALLOWED[stage]


def test_the_checker_sees_a_violation(tmp_path, monkeypatch):
    # The rule test must be able to fail: a stage module that imports the report is caught.
    fake = tmp_path / "pipeline"
    (fake / "volumes").mkdir(parents=True)
    (fake / "report").mkdir()
    (fake / "__init__.py").write_text("")
    (fake / "volumes" / "__init__.py").write_text("")
    (fake / "report" / "__init__.py").write_text("")
    (fake / "report" / "build.py").write_text("")
    (fake / "volumes" / "bad.py").write_text("def f():\n    from pipeline.report import build\n")
    monkeypatch.setattr(sys.modules[__name__], "PACKAGE", fake)
    assert [v.split(" imports ")[1] for v in violations()] == ["pipeline.report.build (report)"]
