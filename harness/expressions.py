"""Safe arithmetic expressions: an `ast` whitelist, then a direct translation to SymPy.

A case file from a colleague must never run code, so the text is parsed by Python's `ast`, every node is
checked against a whitelist, and the SymPy expression is built from the checked tree. SymPy never parses
the string itself.
"""

from __future__ import annotations

import ast
from collections.abc import Mapping

__all__ = ["FUNCTIONS", "ExpressionError", "parse_expression"]


class ExpressionError(ValueError):
    """An expression outside the allowed arithmetic; the message says what was found."""


def _functions() -> dict[str, object]:
    import sympy as sp

    return {
        "exp": sp.exp, "log": sp.log, "sqrt": sp.sqrt, "tanh": sp.tanh, "sin": sp.sin,
        "cos": sp.cos, "abs": sp.Abs, "min": sp.Min, "max": sp.Max,
    }


FUNCTIONS = ("exp", "log", "sqrt", "tanh", "sin", "cos", "abs", "min", "max")
_OPS = {ast.Add: "+", ast.Sub: "-", ast.Mult: "*", ast.Div: "/", ast.Pow: "**", ast.USub: "-", ast.UAdd: "+"}
_MAX_CONSTANT_POWER = 64


def _describe(node: ast.AST) -> str:
    if isinstance(node, (ast.operator, ast.unaryop)):
        return {ast.FloorDiv: "//", ast.Mod: "%", ast.MatMult: "@", ast.BitAnd: "&", ast.BitOr: "|",
                ast.BitXor: "^", ast.LShift: "<<", ast.RShift: ">>", ast.Invert: "~",
                ast.Not: "not"}.get(type(node), type(node).__name__)
    try:
        return ast.unparse(node)
    except Exception:  # noqa: BLE001 - a description only
        return type(node).__name__


def _refuse(what: str) -> ExpressionError:
    allowed = ", ".join(FUNCTIONS)
    return ExpressionError(f"`{what}` is not allowed (only numbers, names, + - * / ** and {allowed})")


def _check_node(node: ast.AST, names: set[str]) -> None:
    """Refuse one node that is outside the whitelist."""
    if isinstance(node, (ast.Expression, ast.Load)) or type(node) in _OPS:
        return
    if isinstance(node, (ast.BinOp, ast.UnaryOp)):
        return
    if isinstance(node, ast.Constant):
        value = node.value
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            msg = f"constant {value!r} is not a real number"
            raise ExpressionError(msg)
        return
    if isinstance(node, ast.Name):
        if node.id not in names and node.id not in FUNCTIONS:
            msg = f"unknown symbol `{node.id}` (not a species, a parameter or an allowed function)"
            raise ExpressionError(msg)
        return
    if isinstance(node, ast.Call):
        _check_call(node)
        return
    raise _refuse(_describe(node))


def _check_call(node: ast.Call) -> None:
    if not isinstance(node.func, ast.Name) or node.func.id not in FUNCTIONS:
        name = node.func.id if isinstance(node.func, ast.Name) else _describe(node.func)
        msg = f"call of `{name}` is not allowed (allowed functions: {', '.join(FUNCTIONS)})"
        raise ExpressionError(msg)
    name, nargs = node.func.id, len(node.args)
    if node.keywords or any(isinstance(a, ast.Starred) for a in node.args):
        msg = f"`{name}` takes plain positional arguments only"
        raise ExpressionError(msg)
    if name in ("min", "max") and nargs < 2:
        msg = f"`{name}` needs at least two arguments"
        raise ExpressionError(msg)
    if name not in ("min", "max") and nargs != 1:
        msg = f"`{name}` takes exactly one argument, got {nargs}"
        raise ExpressionError(msg)


def _check(tree: ast.AST, names: set[str]) -> None:
    """Walk the whole tree first: a forbidden node anywhere is refused before SymPy sees anything."""
    called = {id(n.func) for n in ast.walk(tree) if isinstance(n, ast.Call)}
    for node in ast.walk(tree):
        _check_node(node, names)
        bare = isinstance(node, ast.Name) and node.id in FUNCTIONS and id(node) not in called
        if bare and node.id not in names:
            msg = f"function `{node.id}` must be called, as `{node.id}(...)`"
            raise ExpressionError(msg)


def _translate(node: ast.AST, symbols: Mapping[str, object], funcs: Mapping[str, object]):
    """Build the SymPy expression from a tree that `_check` accepted."""
    import sympy as sp

    if isinstance(node, ast.Expression):
        return _translate(node.body, symbols, funcs)
    if isinstance(node, ast.Constant):
        return sp.Integer(node.value) if isinstance(node.value, int) else sp.Float(node.value)
    if isinstance(node, ast.Name):
        return symbols[node.id]
    if isinstance(node, ast.UnaryOp):
        operand = _translate(node.operand, symbols, funcs)
        return -operand if isinstance(node.op, ast.USub) else operand
    if isinstance(node, ast.Call):
        return funcs[node.func.id](*(_translate(a, symbols, funcs) for a in node.args))
    left, right = _translate(node.left, symbols, funcs), _translate(node.right, symbols, funcs)
    op = type(node.op)
    if op is ast.Pow and left.is_Number and right.is_Number and abs(right) > _MAX_CONSTANT_POWER:
        msg = f"constant power `{ast.unparse(node)}` is too large"
        raise ExpressionError(msg)
    if op is ast.Add:
        return left + right
    if op is ast.Sub:
        return left - right
    if op is ast.Mult:
        return left * right
    if op is ast.Div:
        return left / right
    return left**right


def parse_expression(text: str | int | float, symbols: Mapping[str, object]):
    """Parse arithmetic ``text`` into a SymPy expression over ``symbols`` (name -> SymPy symbol).

    Raises
    ------
    ExpressionError
        For anything outside numbers, the given names, ``+ - * / **``, unary signs and calls to
        ``exp log sqrt tanh sin cos abs min max``; nothing is evaluated before the whole tree is checked.
    """
    import sympy as sp

    if isinstance(text, bool):
        msg = "expected a number or an expression, got a boolean"
        raise ExpressionError(msg)
    if isinstance(text, (int, float)):
        text = repr(text)
    if not isinstance(text, str):
        msg = f"expected a number or an expression string, got {type(text).__name__}"
        raise ExpressionError(msg)
    if len(text) > 10_000:
        msg = "expression longer than 10000 characters"
        raise ExpressionError(msg)
    try:
        tree = ast.parse(text.strip(), mode="eval")
    except SyntaxError as exc:
        msg = f"not a valid expression ({exc.msg})"
        raise ExpressionError(msg) from None
    _check(tree, set(symbols))
    return sp.sympify(_translate(tree, symbols, _functions()))

