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
    # foundations, and the atomic writes every output stage uses
    "errors": 0, "settings": 0, "formulas": 0, "outputs": 1,
    # 1-2 inputs: workspace, history and labels
    "inputs.workspace": 1, "inputs.sources": 2, "inputs.history": 2, "inputs.owners": 2,
    "inputs.incidents": 2, "inputs.checks": 2,
    # 3 decomposition
    "decomposition.loess": 3, "decomposition.stl_core": 3, "decomposition.stl_plan": 3,
    "decomposition.stl": 3, "decomposition.smoother": 3, "decomposition.decompose": 3,
    # 4 detection
    "detection.detectors": 4, "detection.episodes": 4,
    # 5 replay engine
    "engine.executors": 5, "engine.tasks": 5, "engine.replay": 5,
    # 6 scoring
    "scoring.matching": 6, "scoring.intervals": 6, "scoring.tables": 6, "scoring.figures": 6,
    "scoring.curves": 6, "scoring.tradeoffs": 6, "scoring.alerts_file": 6,
    # 7 the session layer: a loaded workspace, replays and figures over it
    "api": 7,
    # 8 tuning
    "tuning.studies": 8, "tuning.rolling": 8, "tuning.search_space": 8, "tuning.evaluate": 8,
    "tuning.search": 8, "tuning.summaries": 8,
    # 9 outputs: report, analysts' feedback, sample data, the workflows the CLI runs
    "reporting.report_data": 9, "reporting.formats": 9, "reporting.build": 9,
    "reporting.render": 9, "reporting.plots": 9, "reporting.settings_table": 9,
    "reporting.report": 9,
    "feedback.review": 9, "feedback.review_data": 9, "feedback.review_app": 9,
    "feedback.retune": 9, "sample": 9, "demo": 9, "commands": 9,
    # 10 command line
    "cli": 10, "__main__": 10, "__init__": 10,
}
# a subpackage's __init__ holds only its docstring: it has the stage of its modules
PACKAGES = {name.rpartition(".")[0] for name in STAGES if "." in name}


def _module(path: Path, root: Path) -> str:
    parts = path.relative_to(root).with_suffix("").parts
    if len(parts) > 1 and parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _stage(name: str) -> int:
    if name in PACKAGES:
        return min(s for m, s in STAGES.items() if m.startswith(name + "."))
    return STAGES[name]


def _imports(path: Path) -> set[str]:
    out = set()
    known = set(STAGES) | PACKAGES
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        names: list[str] = []
        if isinstance(node, ast.ImportFrom) and (node.module or "").startswith("calibrate"):
            mod = node.module or ""
            # `from calibrate.x import d` names the module x.d when there is one, else x
            names = [f"{mod}.{a.name}" if f"{mod}.{a.name}"[len("calibrate."):] in known
                     else mod for a in node.names]
        elif isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        for name in names:
            parts = name.split(".")
            if parts[0] != "calibrate":
                continue
            # the longest known module the dotted name starts with
            for n in range(len(parts), 1, -1):
                if ".".join(parts[1:n]) in known:
                    out.add(".".join(parts[1:n]))
                    break
    return out


def _graph() -> dict[str, set[str]]:
    graph = {}
    for p in PACKAGE.rglob("*.py"):
        name = _module(p, PACKAGE)
        graph[name] = _imports(p) - {name}
    return graph


def test_every_module_has_a_stage():
    missing = set(_graph()) - set(STAGES) - PACKAGES
    assert not missing, missing


def test_packages_hold_only_their_docstring():
    """Importing one module of a stage must not load the others (no hidden edges)."""
    for name in sorted(PACKAGES):
        tree = ast.parse((PACKAGE / name / "__init__.py").read_text(encoding="utf-8"))
        assert len(tree.body) == 1 and isinstance(tree.body[0], ast.Expr), name


def test_no_module_imports_a_later_stage():
    upward = sorted(f"{m} (stage {_stage(m)}) imports {t} (stage {_stage(t)})"
                    for m, deps in _graph().items() for t in deps if _stage(t) > _stage(m))
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


def test_the_checker_sees_a_cycle_inside_a_subpackage(tmp_path, monkeypatch):
    """Same inside a stage's folder, with `from calibrate.x import d` naming a module."""
    (tmp_path / "x").mkdir()
    (tmp_path / "x" / "__init__.py").write_text('"""x."""\n')
    (tmp_path / "x" / "c.py").write_text("from calibrate.x import d\n")
    (tmp_path / "x" / "d.py").write_text("def g():\n    import calibrate.x.c\n")
    monkeypatch.setattr(sys.modules[__name__], "PACKAGE", tmp_path)
    monkeypatch.setattr(sys.modules[__name__], "PACKAGES", {"x"})
    monkeypatch.setitem(STAGES, "x.c", 5)
    monkeypatch.setitem(STAGES, "x.d", 6)
    assert _graph() == {"x": set(), "x.c": {"x.d"}, "x.d": {"x.c"}}
