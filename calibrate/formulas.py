"""Safe metric formulas over measures (parsed with `ast`, never evaluated by Python).

A formula such as ``"clicks / impressions"`` or ``"(revenue - spend) / max(spend, 1)"``
may use numbers, measure names, ``+ - * /``, unary minus/plus, parentheses and the
functions in `FUNCTIONS`. Division by zero gives NaN (0/0 is undefined, and x/0 is
reported as undefined too rather than as an infinity). A formula is at most
`MAX_FORMULA_CHARS` characters and `MAX_FORMULA_DEPTH` operations deep.
"""

from __future__ import annotations

import ast
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from functools import reduce

import numpy as np

from calibrate.errors import InputError


@dataclass(frozen=True)
class Function:
    """A whitelisted formula function: numpy implementation and allowed argument counts."""

    apply: Callable[..., np.ndarray]
    min_args: int
    max_args: int | None  # None = any number


def _fold(op: Callable[[np.ndarray, np.ndarray], np.ndarray]) -> Callable[..., np.ndarray]:
    return lambda *args: reduce(op, args)


# The one registry of functions a formula may call (see DEVELOPERS.md to add one).
# np.maximum / np.minimum propagate NaN, so an undefined input stays undefined.
FUNCTIONS: dict[str, Function] = {
    "abs": Function(np.abs, 1, 1),
    "max": Function(_fold(np.maximum), 2, None),
    "min": Function(_fold(np.minimum), 2, None),
}

_BINARY = {ast.Add: "+", ast.Sub: "-", ast.Mult: "*", ast.Div: "/"}
# Caps that keep parsing and evaluation (both recursive) far from Python's limits; a
# sum of 100 terms or a 1,000-character formula is already beyond any KPI definition.
MAX_FORMULA_CHARS = 1000
MAX_FORMULA_DEPTH = 100


def divide(a: np.ndarray | float, b: np.ndarray | float) -> np.ndarray:
    """``a / b`` elementwise with NaN wherever ``b == 0``."""
    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.true_divide(a, b)
    return np.where(b == 0, np.nan, out)


@dataclass(frozen=True)
class Formula:
    """A parsed, checked formula.

    Attributes
    ----------
    text : str
        The formula as written.
    names : tuple of str
        Measures it uses, in order of first appearance.
    """

    text: str
    names: tuple[str, ...]
    tree: ast.expr

    def evaluate(self, values: Mapping[str, np.ndarray]) -> np.ndarray:
        """Evaluate on arrays of measures (all the same shape); float64 result, NaN if undefined."""
        with np.errstate(all="ignore"):
            out = _eval(self.tree, values)
        shape = np.shape(values[self.names[0]])
        return np.broadcast_to(np.asarray(out, dtype=np.float64), shape).copy()


def parse_formula(text: str, measures: Sequence[str], where: str) -> Formula:
    """Parse and check a metric formula.

    Parameters
    ----------
    text : str
        The formula, e.g. ``"clicks / impressions"``.
    measures : sequence of str
        Measure names the formula may use.
    where : str
        Location for error messages, e.g. ``"workspace.toml [metrics] key 'ctr'"``.

    Raises
    ------
    InputError
        Syntax errors, unknown names, forbidden syntax, wrong function arity.
    """
    if not isinstance(text, str) or not text.strip():
        raise InputError(where, f"must be a formula over measures, but got {text!r}")
    if len(text) > MAX_FORMULA_CHARS:
        raise InputError(
            where, f"formula is {len(text)} characters long; at most {MAX_FORMULA_CHARS} "
            "are allowed"
        )
    try:
        tree = ast.parse(text.strip(), mode="eval").body
    except SyntaxError as exc:
        raise InputError(where, f"cannot parse formula {text!r}: {exc.msg}") from None
    except (RecursionError, MemoryError):
        raise InputError(where, "formula is nested too deeply to parse") from None
    depth = _depth(tree)
    if depth > MAX_FORMULA_DEPTH:
        raise InputError(
            where, f"formula is {depth} operations deep; at most {MAX_FORMULA_DEPTH} are "
            "allowed (a sum of many terms counts one level per term)"
        )
    names: list[str] = []
    _check(tree, set(measures), names, text, where)
    if not names:
        raise InputError(where, f"formula {text!r} must use at least one measure")
    return Formula(text=text, names=tuple(names), tree=tree)


def never_negative(text: str) -> bool:
    """True when formula `text` (already checked by `parse_formula`) cannot be negative
    while its measures are not: measures and numbers >= 0 joined by ``+``, ``*``, ``/``,
    and ``max``/``min`` of such terms, or ``abs`` of anything. Used to draw fences no
    lower than 0 for such metrics."""
    def ok(node: ast.AST) -> bool:
        if isinstance(node, ast.Constant):
            return node.value >= 0
        if isinstance(node, ast.Name):
            return True
        if isinstance(node, ast.BinOp):
            return _BINARY.get(type(node.op)) in ("+", "*", "/") and ok(node.left) \
                and ok(node.right)
        if isinstance(node, ast.UnaryOp):
            return isinstance(node.op, ast.UAdd) and ok(node.operand)
        if isinstance(node, ast.Call) and isinstance(node.func, ast.Name):
            return node.func.id == "abs" or (node.func.id in ("max", "min")
                                              and all(ok(a) for a in node.args))
        return False

    return ok(ast.parse(text.strip(), mode="eval").body)


def _depth(tree: ast.AST) -> int:
    """Operations on the longest path from the root to a leaf (iterative: the tree may
    be deeper than the stack)."""
    deepest, stack = 0, [(tree, 0)]
    while stack:
        node, d = stack.pop()
        deepest = max(deepest, d)
        stack.extend((child, d + 1) for child in ast.iter_child_nodes(node)
                     if isinstance(child, ast.expr))
    return deepest


def _check(node: ast.AST, measures: set[str], names: list[str], text: str, where: str) -> None:
    def bad(what: str) -> InputError:
        return InputError(where, f"formula {text!r}: {what}")

    if isinstance(node, ast.Constant):
        if isinstance(node.value, bool) or not isinstance(node.value, int | float):
            raise bad(f"only numbers may appear as constants, but got {node.value!r}")
        if not math.isfinite(node.value):  # e.g. 1e400, which Python reads as inf
            raise bad(f"constant {ast.get_source_segment(text.strip(), node) or node.value!r} is "
                      "not a finite number")
    elif isinstance(node, ast.Name):
        if node.id not in measures:
            known = ", ".join(sorted(measures)) or "none"
            raise bad(f"unknown measure '{node.id}' (measures: {known})")
        if node.id not in names:
            names.append(node.id)
    elif isinstance(node, ast.BinOp):
        if type(node.op) not in _BINARY:
            raise bad(f"operator {type(node.op).__name__} is not allowed (use + - * /)")
        _check(node.left, measures, names, text, where)
        _check(node.right, measures, names, text, where)
    elif isinstance(node, ast.UnaryOp):
        if not isinstance(node.op, ast.USub | ast.UAdd):
            raise bad(f"operator {type(node.op).__name__} is not allowed")
        _check(node.operand, measures, names, text, where)
    elif isinstance(node, ast.Call):
        if not isinstance(node.func, ast.Name) or node.func.id not in FUNCTIONS:
            label = node.func.id if isinstance(node.func, ast.Name) else ast.unparse(node.func)
            raise bad(f"function '{label}' is not allowed (allowed: {', '.join(FUNCTIONS)})")
        if node.keywords or any(isinstance(a, ast.Starred) for a in node.args):
            raise bad(f"function '{node.func.id}' takes plain arguments only")
        fn = FUNCTIONS[node.func.id]
        n = len(node.args)
        if n < fn.min_args or (fn.max_args is not None and n > fn.max_args):
            want = str(fn.min_args) if fn.max_args == fn.min_args else f"at least {fn.min_args}"
            raise bad(f"function '{node.func.id}' takes {want} argument(s), but got {n}")
        for arg in node.args:
            _check(arg, measures, names, text, where)
    elif isinstance(node, ast.Attribute):
        raise bad("attribute access is not allowed")
    elif isinstance(node, ast.Subscript):
        raise bad("indexing is not allowed")
    else:
        raise bad(f"{type(node).__name__} is not allowed (numbers, measures, + - * /, "
                  f"parentheses and {', '.join(FUNCTIONS)} only)")


def _eval(node: ast.expr, values: Mapping[str, np.ndarray]) -> np.ndarray | float:
    if isinstance(node, ast.Constant):
        return float(node.value)
    if isinstance(node, ast.Name):
        return np.asarray(values[node.id], dtype=np.float64)
    if isinstance(node, ast.UnaryOp):
        v = _eval(node.operand, values)
        return -v if isinstance(node.op, ast.USub) else v
    if isinstance(node, ast.BinOp):
        a = _eval(node.left, values)
        b = _eval(node.right, values)
        op = _BINARY[type(node.op)]
        if op == "+":
            return np.add(a, b)
        if op == "-":
            return np.subtract(a, b)
        if op == "*":
            return np.multiply(a, b)
        return divide(a, b)
    if isinstance(node, ast.Call):
        args = [_eval(a, values) for a in node.args]
        return FUNCTIONS[node.func.id].apply(*args)  # type: ignore[union-attr]
    raise AssertionError(f"unchecked node {type(node).__name__}")  # parse_formula rejects it
