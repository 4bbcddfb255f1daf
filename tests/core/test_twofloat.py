"""Double-double arithmetic against exact rational arithmetic (Python's Fraction)."""

from decimal import Decimal, localcontext
from fractions import Fraction

import numpy as np
from hypothesis import given
from hypothesis import strategies as st

from turnstamp.core.twofloat import (
    dd_add,
    dd_from_decimal,
    dd_mul,
    dd_to_decimal,
    floor_and_fraction,
    two_prod,
    two_sum,
)

# error-free transformations hold away from underflow (Shewchuk 1997 assumes no underflow)
finite = st.floats(min_value=-1e15, max_value=1e15, allow_nan=False,
                   allow_infinity=False).filter(lambda x: x == 0 or abs(x) > 1e-100)


@given(finite, finite)
def test_two_sum_and_two_prod_are_error_free(a, b):
    # Shewchuk 1997: s + e equals a + b exactly; p + e equals a * b exactly
    s, e = two_sum(np.float64(a), np.float64(b))
    assert Fraction(float(s)) + Fraction(float(e)) == Fraction(a) + Fraction(b)
    p, e = two_prod(np.float64(a), np.float64(b))
    assert Fraction(float(p)) + Fraction(float(e)) == Fraction(a) * Fraction(b)


@given(finite, finite, finite, finite)
def test_double_double_add_and_mul_keep_32_digits(a, b, c, d):
    with localcontext() as ctx:
        ctx.prec = 100  # the default 28 digits would round the reference itself
        _check_add_and_mul(a, b, c, d)


def _check_add_and_mul(a, b, c, d):
    x = dd_from_decimal(Decimal(a) + Decimal(b) * Decimal("1e-17"))
    y = dd_from_decimal(Decimal(c) + Decimal(d) * Decimal("1e-17"))
    exact_x, exact_y = dd_to_decimal(*x), dd_to_decimal(*y)
    total = dd_to_decimal(*map(float, dd_add(*x, *y)))
    product = dd_to_decimal(*map(float, dd_mul(*x, *y)))
    scale_sum = abs(exact_x) + abs(exact_y) + Decimal("1e-300")
    scale_product = abs(exact_x * exact_y) + Decimal("1e-300")
    assert abs(total - (exact_x + exact_y)) <= scale_sum * Decimal("1e-30")
    assert abs(product - exact_x * exact_y) <= scale_product * Decimal("1e-30")


def test_decimal_round_trip_keeps_every_digit_of_a_frequency():
    text = "716.355556701234567891"  # 21 significant digits
    hi, lo = dd_from_decimal(text)
    assert abs(dd_to_decimal(hi, lo) - Decimal(text)) < Decimal("1e-28")


def test_floor_and_fraction_wraps_into_unit_interval():
    hi = np.array([5.0, -0.25, 1e12 + 0.5, 3.0])
    lo = np.array([-1e-20, 0.0, 1e-6, 2e-17])
    whole, frac = floor_and_fraction(hi, lo)
    # 5 - 1e-20 rounds to (5, 0.0): the fraction 1 - 1e-20 is not representable
    assert list(whole) == [5, -1, 10**12, 3] and frac[0] == 0.0
    assert np.all((frac >= 0) & (frac < 1))
    assert frac[1] == 0.75 and abs(frac[2] - 0.500001) < 1e-12
