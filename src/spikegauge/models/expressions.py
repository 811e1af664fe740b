"""Expressions of model files: parsed into sympy without evaluating user text.

A model file writes derivatives, thresholds and resets as Python-like
expressions. :func:`parse_expression` reads one with :mod:`ast` (which only
parses) and builds the sympy expression node by node from a closed set of
constructs: numbers, names the caller allows, ``+ - * / **``, unary minus and
the functions of :data:`FUNCTIONS`. Anything else is refused with a one-line
reason, so a model file can never run code.

``safe_ratio(x)`` is x / (1 - exp(-x)), the form of Hodgkin–Huxley rate
functions such as alpha_n = 0.01 (V + 55) / (1 - exp(-(V + 55)/10)) =
0.1 safe_ratio((V + 55)/10): it is finite (1 at x = 0) where the quotient
written out is 0/0. Its derivative is the function ``safe_ratio_slope``.
"""
from __future__ import annotations

import ast

import sympy


class ExpressionError(ValueError):
    """An expression that cannot be read; the message is one line, without the location."""


class safe_ratio(sympy.Function):  # noqa: N801 (a sympy function keeps its lower-case name)
    """x / (1 - exp(-x)), continued by its limit 1 at x = 0."""

    nargs = 1

    def fdiff(self, argindex=1):
        return safe_ratio_slope(self.args[0])


class safe_ratio_slope(sympy.Function):  # noqa: N801
    """d/dx [x / (1 - exp(-x))], continued by its limit 1/2 at x = 0."""

    nargs = 1


FUNCTIONS = {
    "exp": sympy.exp,
    "log": sympy.log,
    "sqrt": sympy.sqrt,
    "tanh": sympy.tanh,
    "abs": sympy.Abs,
    "min": sympy.Min,
    "max": sympy.Max,
    "safe_ratio": safe_ratio,
}
"""Functions a model file may call, by the name it uses."""

_ARITY = {"min": (2, None), "max": (2, None)}  # the others take exactly one argument
_BINARY = {ast.Add: sympy.Add, ast.Sub: lambda a, b: a - b, ast.Mult: sympy.Mul,
           ast.Div: lambda a, b: a / b, ast.Pow: sympy.Pow}
_MAX_LENGTH = 4000
_MAX_DEPTH = 60


def parse_expression(text, symbols: dict) -> sympy.Expr:
    """Read one expression of a model file.

    Parameters
    ----------
    text : str or int or float
        The expression as written (a bare TOML number is accepted too).
    symbols : dict of str -> sympy.Symbol
        The names the expression may use (parameters, states, ...).

    Returns
    -------
    sympy.Expr

    Raises
    ------
    ExpressionError
        Syntax error, an unknown name or function, a construct outside the
        allowed set, or an expression that is not a finite real number when
        it has no names.
    """
    if isinstance(text, bool) or not isinstance(text, (str, int, float)):
        raise ExpressionError(f"must be an expression in a string, got {type(text).__name__}")
    if not isinstance(text, str):
        return sympy.Float(text) if isinstance(text, float) else sympy.Integer(text)
    if len(text) > _MAX_LENGTH:
        raise ExpressionError(f"longer than {_MAX_LENGTH} characters")
    if not text.strip():
        raise ExpressionError("is empty")
    try:
        tree = ast.parse(text.strip(), mode="eval")
    except SyntaxError as exc:
        raise ExpressionError(f"syntax error in {text.strip()!r} ({exc.msg})") from None
    except (ValueError, MemoryError, RecursionError) as exc:
        raise ExpressionError(f"cannot be read ({type(exc).__name__})") from None
    try:
        result = _build(tree.body, symbols, 0)
    except RecursionError:
        raise ExpressionError("nested too deeply") from None
    if result.has(sympy.zoo, sympy.oo, -sympy.oo, sympy.nan, sympy.I):
        raise ExpressionError(f"{text.strip()!r} is not a finite real expression (a division by zero, "
                              "or the root or logarithm of a negative number)")
    return result


def _build(node, symbols: dict, depth: int) -> sympy.Expr:
    if depth > _MAX_DEPTH:
        raise ExpressionError("nested too deeply")
    if isinstance(node, ast.Constant):
        if isinstance(node.value, bool) or not isinstance(node.value, (int, float)):
            raise ExpressionError(f"{node.value!r} is not a number")
        return sympy.Float(node.value) if isinstance(node.value, float) else sympy.Integer(node.value)
    if isinstance(node, ast.Name):
        if node.id in symbols:
            return symbols[node.id]
        hint = " (a function: call it with an argument)" if node.id in FUNCTIONS else ""
        raise ExpressionError(f"unknown name {node.id!r}{hint}")
    if isinstance(node, ast.BinOp) and type(node.op) in _BINARY:
        left = _build(node.left, symbols, depth + 1)
        right = _build(node.right, symbols, depth + 1)
        if isinstance(node.op, ast.Pow) and right.is_number and abs(float(right)) > 64:
            raise ExpressionError("powers are limited to exponents of at most 64 in magnitude")
        return _BINARY[type(node.op)](left, right)
    if isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.USub, ast.UAdd)):
        inner = _build(node.operand, symbols, depth + 1)
        return -inner if isinstance(node.op, ast.USub) else inner
    if isinstance(node, ast.Call):
        if not isinstance(node.func, ast.Name) or node.func.id not in FUNCTIONS:
            name = node.func.id if isinstance(node.func, ast.Name) else ast.unparse(node.func)
            raise ExpressionError(f"unknown function {name!r}; allowed: {', '.join(FUNCTIONS)}")
        if node.keywords:
            raise ExpressionError(f"{node.func.id}() takes no keyword arguments")
        lo, hi = _ARITY.get(node.func.id, (1, 1))
        n = len(node.args)
        if n < lo or (hi is not None and n > hi):
            want = f"{lo}" if lo == hi else f"at least {lo}"
            raise ExpressionError(f"{node.func.id}() takes {want} argument{'s' if lo != 1 else ''}, got {n}")
        args = [_build(a, symbols, depth + 1) for a in node.args]
        return FUNCTIONS[node.func.id](*args)
    what = type(node).__name__
    if isinstance(node, ast.BinOp):
        what = f"operator {type(node.op).__name__}"
    elif isinstance(node, ast.Compare):
        what = "comparison"
    raise ExpressionError(f"{what} is not allowed; use numbers, names, + - * / ** and the functions "
                          f"{', '.join(FUNCTIONS)}")
