"""Data flows one way through the pipeline stages: no import cycles, no upward imports.

Imports are read with `ast`, at module level and inside functions (a function-level
import is still a dependency). Each module has a stage (DEVELOPERS.md, "Architecture");
a module may import only modules of its own or an earlier stage.
"""

from __future__ import annotations

import ast
import sys
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "calibrate"

STAGES: dict[str, int] = {
    # foundations
    "errors": 0, "settings": 0, "formulas": 0,
    # 1 workspace, and the atomic writes every output stage uses
    "workspace": 1, "outputs": 1,
    # 2 history and labels
    "sources": 2, "history": 2, "owners": 2, "incidents": 2, "checks": 2,
    # 3 decompose
    "stl_kernel": 3, "decompose": 3,
    # 4 detectors
    "detectors": 4, "episodes": 4,
    # 5 replay
    "executors": 5, "replay": 5,
    # 6 scoring
    "scoring": 6,
    # 7 the session layer: a loaded workspace, replays and figures over it
    "api": 7,
    # 8 search
    "studies": 8, "rolling": 8, "search_space": 8, "evaluate": 8, "search": 8,
    # 9 outputs
    "report_data": 9, "plots": 9, "report": 9, "retune": 9, "review": 9, "review_data": 9,
    "review_app": 9, "sample": 9, "demo": 9, "commands": 9, "summaries": 9,
    # 10 command line
    "cli": 10, "__main__": 10, "__init__": 10,
}


def _imports(path: Path) -> set[str]:
    out = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        names: list[str] = []
        if isinstance(node, ast.ImportFrom) and (node.module or "").startswith("calibrate"):
            mod = node.module or ""
            names = [mod] + [f"{mod}.{a.name}" for a in node.names]
        elif isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        for name in names:
            parts = name.split(".")
            if parts[0] == "calibrate" and len(parts) > 1 and parts[1] in STAGES:
                out.add(parts[1])
    return out


def _graph() -> dict[str, set[str]]:
    return {p.stem: _imports(p) - {p.stem} for p in PACKAGE.glob("*.py")}


def test_every_module_has_a_stage():
    assert set(_graph()) <= set(STAGES), set(_graph()) - set(STAGES)


def test_no_module_imports_a_later_stage():
    upward = sorted(f"{m} (stage {STAGES[m]}) imports {t} (stage {STAGES[t]})"
                    for m, deps in _graph().items() for t in deps if STAGES[t] > STAGES[m])
    assert not upward, "\n".join(upward)


def test_no_import_cycles():
    graph = _graph()
    cycles = []

    def walk(node: str, stack: list[str]) -> None:
        for t in sorted(graph.get(node, ())):
            if t in stack:
                cycles.append(" -> ".join([*stack[stack.index(t):], t]))
            else:
                walk(t, [*stack, t])

    for m in sorted(graph):
        walk(m, [m])
    assert not cycles, "\n".join(sorted(set(cycles))[:10])


def test_the_checker_sees_a_cycle(tmp_path, monkeypatch):
    """The checker itself: two modules importing each other inside functions."""
    (tmp_path / "a.py").write_text("def f():\n    from calibrate import b\n")
    (tmp_path / "b.py").write_text("def g():\n    import calibrate.a\n")
    monkeypatch.setattr(sys.modules[__name__], "PACKAGE", tmp_path)
    monkeypatch.setitem(STAGES, "a", 5)
    monkeypatch.setitem(STAGES, "b", 6)
    graph = _graph()
    assert graph == {"a": {"b"}, "b": {"a"}}
