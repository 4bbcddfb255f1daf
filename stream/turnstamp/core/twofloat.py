"""Double-double arithmetic on numpy arrays, and exact conversions to it.

Theory of operation
-------------------
A double-double number is an unevaluated sum ``hi + lo`` of two float64 values
with ``|lo| <= ulp(hi)/2``; it carries about 32 significant digits. The
error-free transformations below (Knuth's two-sum, Dekker's split and two-product,
as presented by Shewchuk 1997, "Adaptive precision floating-point arithmetic and
fast robust geometric predicates", Discrete Comput. Geom. 18, 305) are exact for
finite inputs of magnitude below ~1e300, which covers every quantity turnstamp
meets. They are plain numpy expressions, so they vectorise.

Phase needs this: a 700 Hz pulsar accumulates 2e11 turns in ten years, and a
float64 phase of that size is only good to 5e-5 cycles.
"""

from __future__ import annotations

from decimal import Decimal, localcontext

import numpy as np

__all__ = [
    "two_sum",
    "two_prod",
    "dd_add",
    "dd_mul",
    "dd_from_decimal",
    "dd_to_decimal",
    "floor_and_fraction",
]

_SPLITTER = 134217729.0  # 2**27 + 1 (Dekker's split of a 53-bit significand)


def two_sum(a, b):
    """Return ``(s, e)`` with ``s = fl(a + b)`` and ``a + b = s + e`` exactly."""
    s = a + b
    bb = s - a
    e = (a - (s - bb)) + (b - bb)
    return s, e


def _quick_two_sum(a, b):
    """Like two_sum, assuming ``|a| >= |b|`` (or a == 0)."""
    s = a + b
    return s, b - (s - a)


def _split(a):
    t = _SPLITTER * a
    hi = t - (t - a)
    return hi, a - hi


def two_prod(a, b):
    """Return ``(p, e)`` with ``p = fl(a * b)`` and ``a * b = p + e`` exactly."""
    p = a * b
    ah, al = _split(a)
    bh, bl = _split(b)
    e = ((ah * bh - p) + ah * bl + al * bh) + al * bl
    return p, e


def dd_add(ah, al, bh, bl):
    """Sum of two double-doubles, renormalised (relative error ~1e-32)."""
    s, e = two_sum(ah, bh)
    e = e + (al + bl)
    return _quick_two_sum(s, e)


def dd_mul(ah, al, bh, bl):
    """Product of two double-doubles, renormalised (relative error ~1e-32)."""
    p, e = two_prod(ah, bh)
    e = e + (ah * bl + al * bh)
    return _quick_two_sum(p, e)


def dd_from_decimal(value: Decimal | str | int) -> tuple[float, float]:
    """The double-double nearest to an exact decimal value."""
    with localcontext() as ctx:
        ctx.prec = 60
        exact = Decimal(value)
        hi = float(exact)
        lo = float(exact - Decimal(hi))
    return hi, lo


def dd_to_decimal(hi: float, lo: float) -> Decimal:
    """The exact decimal value of a double-double (for tests and reports)."""
    with localcontext() as ctx:
        ctx.prec = 60
        return Decimal(hi) + Decimal(lo)


def floor_and_fraction(hi, lo):
    """Split a double-double into an integer (int64) and a fraction in [0, 1).

    ``hi - floor(hi)`` is exact, so the fraction is good to one ulp of 1.
    """
    whole = np.floor(hi)
    frac = (hi - whole) + lo
    carry = np.floor(frac)
    frac = frac - carry
    whole = whole + carry
    # frac can round up to exactly 1.0 when it is within half an ulp below it.
    wrap = frac >= 1.0
    if wrap.any():
        frac = np.where(wrap, 0.0, frac)
        whole = np.where(wrap, whole + 1.0, whole)
    return whole.astype(np.int64), frac
