"""Safe arithmetic expressions of the scheduling variables, with exact derivatives.

A design file may name basis functions of a parameter-dependent Lyapunov
function, for example ``"1/rope_length"`` or ``"log(rope_length)**2"``. They are
data, never code: the text is parsed with :func:`ast.parse` in ``eval`` mode and
every node is checked against a small whitelist before anything is computed.
Allowed are

- numbers (int or float literals),
- the scheduling-variable names given by the caller,
- ``+ - * /`` and ``**`` (the exponent must be a number, optionally negative),
- unary ``+`` and ``-``,
- calls of :data:`FUNCTIONS` (``log exp sqrt abs cos sin``) with one argument.

Anything else (attribute access, subscripts, other names, keyword arguments,
comparisons, lambdas, ``__import__``...) is refused with an
:class:`schedule.errors.InputError` naming the expression and the offending
piece. Nothing is ever passed to ``eval``/``exec``.

Evaluation is vectorized over points and carries the gradient along (forward
mode automatic differentiation on the tree: each node returns its value and
its partial derivatives with respect to every variable), so the derivatives
are exact to rounding - no finite-difference step to choose.
"""

from __future__ import annotations

import ast
import math
from dataclasses import dataclass

import numpy as np

from ..errors import InputError

__all__ = ["FUNCTIONS", "Expression", "parse_expression"]

#: The functions an expression may call, with their derivatives.
FUNCTIONS = {
    "log": (np.log, lambda x: 1.0 / x),
    "exp": (np.exp, np.exp),
    "sqrt": (np.sqrt, lambda x: 0.5 / np.sqrt(x)),
    "abs": (np.abs, np.sign),
    "cos": (np.cos, lambda x: -np.sin(x)),
    "sin": (np.sin, np.cos),
}

_BINARY = (ast.Add, ast.Sub, ast.Mult, ast.Div, ast.Pow)
_UNARY = (ast.UAdd, ast.USub)
MAX_LENGTH = 400  # characters; a basis function is a short formula


@dataclass(frozen=True)
class Expression:
    """A checked expression of the scheduling variables.

    Attributes
    ----------
    text : the expression as written.
    names : the variable names, in the column order of the points passed to
        :meth:`evaluate`.
    """

    text: str
    names: tuple[str, ...]
    tree: ast.Expression

    def evaluate(self, points) -> np.ndarray:
        """Values at the points (M, d) -> (M,)."""
        return self.value_and_gradient(points)[0]

    def gradient(self, points) -> np.ndarray:
        """Exact partial derivatives at the points (M, d) -> (M, d)."""
        return self.value_and_gradient(points)[1]

    def value_and_gradient(self, points) -> tuple[np.ndarray, np.ndarray]:
        """``(values (M,), gradient (M, d))`` at the points (M, d).

        Raises
        ------
        InputError
            If the points have the wrong shape, or the expression is not finite
            at some point (log of a non-positive number, division by zero...);
            the message names the expression and the point.
        """
        p = np.asarray(points, dtype=float)
        if p.ndim == 1 and p.size == len(self.names):
            p = p.reshape(1, -1)
        if p.ndim != 2 or p.shape[1] != len(self.names):
            raise InputError(f"points for expression {self.text!r} must have shape (M, "
                             f"{len(self.names)}), got {p.shape}")
        with np.errstate(all="ignore"):
            v, g = _walk(self.tree.body, p, self.names)
        v = np.broadcast_to(np.asarray(v, dtype=float), (p.shape[0],)).copy()
        g = np.broadcast_to(np.asarray(g, dtype=float), (p.shape[0], p.shape[1])).copy()
        bad = ~(np.isfinite(v) & np.all(np.isfinite(g), axis=1))
        if np.any(bad):
            i = int(np.flatnonzero(bad)[0])
            where = ", ".join(f"{n}={x:g}" for n, x in zip(self.names, p[i], strict=True))
            raise InputError(f"expression {self.text!r} (or its derivative) is not finite at "
                             f"({where}); choose a function defined over the whole envelope")
        return v, g


def parse_expression(text: str, names) -> Expression:
    """Parse and check ``text`` as an expression of the variables ``names``.

    Parameters
    ----------
    text : for example ``"log(rope_length)**2 / payload_mass"``.
    names : the allowed variable names (identifiers).

    Returns
    -------
    Expression

    Raises
    ------
    InputError
        The text is not a valid expression or uses anything outside the
        whitelist (see the module docstring); the message names the piece.

    Examples
    --------
    >>> e = parse_expression("1/L + log(m)", ("L", "m"))
    >>> v, g = e.value_and_gradient([[2.0, 1.0]])
    >>> float(v[0]), g[0].tolist()
    (0.5, [-0.25, 1.0])
    """
    names = tuple(names)
    if not isinstance(text, str) or not text.strip():
        raise InputError(f"expression {text!r} is empty or not a string; write a formula such "
                         "as \"1/rope_length\"")
    if len(text) > MAX_LENGTH:
        raise InputError(f"expression {text[:40]!r}... is longer than {MAX_LENGTH} characters; "
                         "basis functions are short formulas")
    try:
        tree = ast.parse(text.strip(), mode="eval")
    except SyntaxError as exc:
        raise InputError(f"expression {text!r} is not valid ({exc.msg}); write a formula of "
                         f"the variables {', '.join(names)} with + - * / ** and "
                         f"{', '.join(FUNCTIONS)}") from None
    _check(tree.body, text, names)
    return Expression(text=text, names=names, tree=tree)


def _refuse(text: str, what: str, names) -> InputError:
    return InputError(f"expression {text!r}: {what} is not allowed; use numbers, the variables "
                      f"{', '.join(names)}, + - * / ** and the functions "
                      f"{', '.join(FUNCTIONS)}")


def _check(node: ast.AST, text: str, names) -> None:
    """Walk the tree and refuse every node outside the whitelist."""
    if isinstance(node, ast.Constant):
        if isinstance(node.value, bool) or not isinstance(node.value, (int, float)):
            raise _refuse(text, f"the constant {node.value!r}", names)
        if not math.isfinite(float(node.value)):
            raise _refuse(text, "a non-finite number", names)
        return
    if isinstance(node, ast.Name):
        if node.id not in names:
            raise _refuse(text, f"the name '{node.id}'", names)
        return
    if isinstance(node, ast.BinOp):
        if not isinstance(node.op, _BINARY):
            raise _refuse(text, f"the operator {type(node.op).__name__}", names)
        if isinstance(node.op, ast.Pow) and _number(node.right) is None:
            raise _refuse(text, "an exponent that is not a number", names)
        _check(node.left, text, names)
        _check(node.right, text, names)
        return
    if isinstance(node, ast.UnaryOp):
        if not isinstance(node.op, _UNARY):
            raise _refuse(text, f"the operator {type(node.op).__name__}", names)
        _check(node.operand, text, names)
        return
    if isinstance(node, ast.Call):
        func = node.func
        if not isinstance(func, ast.Name) or func.id not in FUNCTIONS:
            what = (f"a call of '{func.id}'" if isinstance(func, ast.Name)
                    else "a call of something that is not a plain function name")
            raise _refuse(text, what, names)
        if node.keywords or len(node.args) != 1 or isinstance(node.args[0], ast.Starred):
            raise _refuse(text, f"'{func.id}' with other than one plain argument", names)
        _check(node.args[0], text, names)
        return
    raise _refuse(text, f"a {type(node).__name__} ({ast.unparse(node)!r})", names)


def _number(node: ast.AST) -> float | None:
    """The value of a numeric literal, possibly with unary signs; else None."""
    sign = 1.0
    while isinstance(node, ast.UnaryOp) and isinstance(node.op, _UNARY):
        if isinstance(node.op, ast.USub):
            sign = -sign
        node = node.operand
    if (isinstance(node, ast.Constant) and isinstance(node.value, (int, float))
            and not isinstance(node.value, bool)):
        return sign * float(node.value)
    return None


def _walk(node: ast.AST, p: np.ndarray, names) -> tuple[np.ndarray, np.ndarray]:
    """Value (M,) or scalar and gradient (M, d) or (d,) of a checked node."""
    d = p.shape[1]
    if isinstance(node, ast.Constant):
        return np.float64(node.value), np.zeros(d)
    if isinstance(node, ast.Name):
        j = names.index(node.id)
        g = np.zeros((p.shape[0], d))
        g[:, j] = 1.0
        return p[:, j], g
    if isinstance(node, ast.UnaryOp):
        v, g = _walk(node.operand, p, names)
        return (-v, -g) if isinstance(node.op, ast.USub) else (v, g)
    if isinstance(node, ast.Call):
        fun, der = FUNCTIONS[node.func.id]
        v, g = _walk(node.args[0], p, names)
        return fun(v), np.asarray(der(v))[..., None] * g
    # binary operators
    a, ga = _walk(node.left, p, names)
    if isinstance(node.op, ast.Pow):
        k = _number(node.right)
        return a ** k, (k * a ** (k - 1.0))[..., None] * ga if k != 0 else 0.0 * ga
    b, gb = _walk(node.right, p, names)
    a_, b_ = np.asarray(a)[..., None], np.asarray(b)[..., None]
    if isinstance(node.op, ast.Add):
        return a + b, ga + gb
    if isinstance(node.op, ast.Sub):
        return a - b, ga - gb
    if isinstance(node.op, ast.Mult):
        return a * b, ga * b_ + a_ * gb
    return a / b, (ga * b_ - a_ * gb) / (b_ * b_)  # ast.Div
