"""Basis functions of a parameter-dependent Lyapunov matrix ``P(p) = sum_k f_k(p) P_k``.

The basis is a list of expressions of the scheduling variables (see
:mod:`schedule.analysis.expression`); the default is the constant and one
affine function per variable, ``("1", "p1", "p2", ...)``, the affine
parameter-dependent Lyapunov function of Gahinet, Apkarian and Chilali (1996)
and Wu, Yang, Packard and Becker (1996). Values and exact first derivatives
are returned stacked over points, ready for the LMIs of
:mod:`schedule.analysis.lmi`.

References
----------
P. Gahinet, P. Apkarian, M. Chilali, "Affine parameter-dependent Lyapunov
functions and real parametric uncertainty", IEEE Trans. Automatic Control
41(3), 1996, doi:10.1109/9.486637.
F. Wu, X. H. Yang, A. Packard, G. Becker, "Induced L2-norm control for LPV
systems with bounded parameter variation rates", Int. J. Robust Nonlinear
Control 6(9-10), 1996.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from .expression import Expression, parse_expression

__all__ = ["LyapunovBasis", "default_basis_texts", "parse_basis"]


def default_basis_texts(names: Sequence[str]) -> tuple[str, ...]:
    """The default basis: the constant and each variable (affine dependence)."""
    return ("1",) + tuple(names)


@dataclass(frozen=True)
class LyapunovBasis:
    """Checked basis functions f_k of the scheduling variables ``names``."""

    names: tuple[str, ...]
    expressions: tuple[Expression, ...]

    @property
    def texts(self) -> tuple[str, ...]:
        return tuple(e.text for e in self.expressions)

    def __len__(self) -> int:
        return len(self.expressions)

    def evaluate(self, points) -> tuple[np.ndarray, np.ndarray]:
        """``(F, dF)``: values (M, K) and derivatives dF[i, k, j] = d f_k / d p_j (M, K, d)."""
        p = np.asarray(points, dtype=float).reshape(-1, len(self.names))
        F = np.empty((p.shape[0], len(self)))
        dF = np.empty((p.shape[0], len(self), len(self.names)))
        for k, e in enumerate(self.expressions):
            F[:, k], dF[:, k, :] = e.value_and_gradient(p)
        return F, dF


def parse_basis(texts: Sequence[str] | None, names: Sequence[str]) -> LyapunovBasis:
    """Parse basis expressions (None: :func:`default_basis_texts`).

    Raises
    ------
    InputError
        An expression is refused (see :func:`parse_expression`), the list is
        empty, or an expression appears twice.
    """
    names = tuple(names)
    texts = default_basis_texts(names) if texts is None else tuple(texts)
    if not texts:
        raise InputError("the Lyapunov basis is empty; give at least \"1\" (constant P)")
    seen: set[str] = set()
    for t in texts:
        key = "".join(str(t).split())
        if key in seen:
            raise InputError(f"basis function {t!r} appears twice; list each function once")
        seen.add(key)
    return LyapunovBasis(names, tuple(parse_expression(t, names) for t in texts))
