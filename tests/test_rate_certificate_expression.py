"""Safe basis expressions: values and exact derivatives, and refusal of anything but arithmetic."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from schedule.analysis.basis import default_basis_texts, parse_basis
from schedule.analysis.expression import parse_expression
from schedule.errors import InputError

NAMES = ("L", "m")


def _complex_step(fun, point, j, h=1e-30):
    """d fun / d p_j by the complex step (Squire and Trapp 1998): Im f(p + i h e_j) / h,
    exact to rounding for analytic fun - an outside reference for the derivatives."""
    p = np.array(point, dtype=complex)
    p[j] += 1j * h
    return fun(*p).imag / h


CASES = [
    ("1/L", lambda L, m: 1 / L),
    ("log(L)**2", lambda L, m: np.log(L) ** 2),
    ("sqrt(L) * exp(-m / 10)", lambda L, m: np.sqrt(L) * np.exp(-m / 10)),
    ("L**-1.5 + 3*m - m/L", lambda L, m: L ** -1.5 + 3 * m - m / L),
    ("-(L - 2)**3 / (1 + m**2)", lambda L, m: -(L - 2) ** 3 / (1 + m ** 2)),
    ("cos(2*L) + sin(m)", lambda L, m: np.cos(2 * L) + np.sin(m)),
]


@pytest.mark.parametrize("text, fun", CASES)
def test_values_and_derivatives_match_the_formula_and_the_complex_step(text, fun):
    e = parse_expression(text, NAMES)
    pts = np.array([[3.0, 0.5], [7.5, 2.0], [30.0, 4.0]])
    v, g = e.value_and_gradient(pts)
    for i, p in enumerate(pts):
        assert v[i] == pytest.approx(fun(*p), rel=1e-14)
        for j in range(2):
            assert g[i, j] == pytest.approx(_complex_step(fun, p, j), rel=1e-12, abs=1e-14)


@settings(deadline=None, max_examples=25)
@given(L=st.floats(0.5, 50.0), m=st.floats(-3.0, 3.0))
def test_product_and_quotient_rules_hold_at_random_points(L, m):
    # d/dL (L^2 m / (1 + L)) = m (L^2 + 2 L) / (1 + L)^2 (closed form, quotient rule)
    e = parse_expression("L**2 * m / (1 + L)", NAMES)
    _, g = e.value_and_gradient([[L, m]])
    assert g[0, 0] == pytest.approx(m * (L * L + 2 * L) / (1 + L) ** 2, rel=1e-12, abs=1e-14)
    assert g[0, 1] == pytest.approx(L * L / (1 + L), rel=1e-12)


@pytest.mark.parametrize("text", [
    "__import__('os').system('true')",  # a call of an unknown name
    "L.__class__",                        # attribute access
    "np.log(L)",                          # attribute call
    "open('x')",                          # a call of an unknown name
    "eval('1')",
    "(lambda: 1)()",
    "[L, m][0]",                          # list and subscript
    "L if m else 1",                      # conditional
    "L < m",                              # comparison
    "log(L, 2)",                          # two arguments
    "log(x=L)",                           # keyword argument
    "'text'",                             # a string constant
    "True",                               # a boolean
    "2**L",                               # exponent that is not a number
    "q + 1",                              # a name that is not a variable
    "L; m",                               # two statements
    "",                                   # nothing
    "L @ m",                              # an operator outside the whitelist
])
def test_everything_but_arithmetic_is_refused(text):
    with pytest.raises(InputError, match="not allowed|not valid|empty"):
        parse_expression(text, NAMES)


def test_not_finite_at_a_point_names_it():
    e = parse_expression("log(m)", NAMES)
    with pytest.raises(InputError, match=r"not finite at \(L=1, m=-1\)"):
        e.evaluate([[1.0, -1.0]])


def test_basis_default_duplicates_and_shapes():
    b = parse_basis(None, NAMES)
    assert b.texts == default_basis_texts(NAMES) == ("1", "L", "m")
    F, dF = b.evaluate([[2.0, 3.0], [4.0, 5.0]])
    np.testing.assert_array_equal(F, [[1, 2, 3], [1, 4, 5]])
    np.testing.assert_array_equal(dF[0], [[0, 0], [1, 0], [0, 1]])
    with pytest.raises(InputError, match="appears twice"):
        parse_basis(["1/L", "1 / L"], NAMES)
    with pytest.raises(InputError, match="empty"):
        parse_basis([], NAMES)
