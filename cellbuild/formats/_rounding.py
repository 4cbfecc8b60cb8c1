"""Exact decimal rounding for the format writers: floats rounded to a fixed
number of decimals exactly as Python's ``'%.<d>f' % x`` rounds them (correct
rounding of the binary value, ties to even), as whole arrays of int64 fixed-point
magnitudes (:func:`fixed_point`, for :mod:`._text`'s rows) or as strings for the
few header numbers (:func:`format_fixed`). A value that rounds to zero is
written without a minus sign.
"""
from __future__ import annotations

import math

import numpy as np

#: Largest number of digits of an int64 fixed-point value (< 9.2e18).
_MAX_DIGITS = 18



def fixed_point(values: np.ndarray, decimals: int) -> tuple[np.ndarray, np.ndarray]:
    """Round ``values`` (1-D) to ``decimals`` places exactly as ``'%.<d>f'`` does.

    Returns ``(magnitude, negative)``: ``magnitude`` is ``|x| * 10**d`` rounded
    to an int64 (correctly, from the exact binary value, ties to even) and
    ``negative`` marks values that are negative and do not round to zero.

    Raises ValueError for nan/inf or magnitudes of ``10**(18 - d)`` and more.
    """
    values = np.asarray(values, dtype=np.float64)
    a = np.abs(values)
    top = float(a.max()) if a.size else 0.0
    if not np.isfinite(top):
        raise ValueError("cannot format non-finite values (nan or inf)")
    if top >= 10.0 ** (_MAX_DIGITS - decimals):
        raise ValueError(f"{top:g} is too large to format with {decimals} decimals")
    scale = 10 ** decimals
    # Rounding a*scale is exact where the product stays below 2**52: there
    # float64 holds every half-integer, so rint sees the true distance to the
    # nearest integers (up to the product's error, handled at exact ties).
    # Larger magnitudes first split off their integer part (exact).
    whole = None if top * scale < 2.0 ** 52 else np.floor(a)
    part = a if whole is None else a - whole  # a - floor(a) is exact
    scaled = part * float(scale)
    near = np.rint(scaled)  # ties to even, as '%f' does for exact ties
    _fix_half_ties(part, float(scale), scaled, near)
    magnitude = near.astype(np.int64)
    if whole is not None:
        magnitude += whole.astype(np.int64) * scale
    negative = np.signbit(values) & (magnitude != 0)
    return magnitude, negative


def _fix_half_ties(part: np.ndarray, scale: float, scaled: np.ndarray,
                   near: np.ndarray) -> None:
    """Correct ``near = rint(part * scale)`` in place where the float product is
    a half-integer but the exact product is not.

    ``scaled - near`` is exact; away from +-0.5 it decides the rounding alone,
    because the product's rounding error is below half an ulp. Only at exactly
    +-0.5 does that error (computed exactly with Dekker's product, on these
    few values only) break the tie.
    """
    rest = scaled - near
    at_half = np.flatnonzero(np.abs(rest) == 0.5)
    if at_half.size == 0:
        return
    f, p, r = part[at_half], scaled[at_half], rest[at_half]
    error = _product_error(f, scale, p)  # exact product = p + error
    near[at_half] += np.where(error * r > 0, np.sign(r), 0.0)


def _split(x):
    """Veltkamp split: ``x = hi + lo`` with 26-bit halves, exact."""
    c = 134217729.0 * x  # 2**27 + 1
    hi = c - (c - x)
    return hi, x - hi


def _product_error(a: np.ndarray, b: float, p: np.ndarray) -> np.ndarray:
    """Exact rounding error of ``p = fl(a * b)`` (Dekker's two-product)."""
    a_hi, a_lo = _split(a)
    b_hi, b_lo = _split(b)
    return ((a_hi * b_hi - p) + a_hi * b_lo + a_lo * b_hi) + a_lo * b_lo


def format_fixed(values, decimals: int) -> list[str]:
    """Floats as ``'%.<d>f'`` strings without ``-0``: for the few header numbers.

    Python's own formatting, which rounds the exact binary value as
    :func:`fixed_point` does; the same ValueError for nan, inf and values of
    ``10**(18 - d)`` and more."""
    text = []
    for x in np.atleast_1d(np.asarray(values, dtype=np.float64)).ravel().tolist():
        digits = "%.*f" % (decimals, _formattable(x, decimals))
        text.append(digits[1:] if digits[0] == "-" and not digits.strip("-0.") else digits)
    return text


def _formattable(x: float, decimals: int) -> float:
    """``x``, or the ValueError :func:`fixed_point` raises for it."""
    if not math.isfinite(x):
        raise ValueError("cannot format non-finite values (nan or inf)")
    if abs(x) >= 10.0 ** (_MAX_DIGITS - decimals):
        raise ValueError(f"{abs(x):g} is too large to format with {decimals} decimals")
    return x


def int_digits_for(max_abs: float, decimals: int) -> int:
    """Integer digits that magnitudes up to ``max_abs`` need at ``decimals``
    places, including a carry from rounding (9.99999999999 -> 10.0000000000)."""
    return len(("%.*f" % (decimals, abs(_formattable(float(max_abs), decimals)))).split(".")[0])


def wrap_unit(frac: np.ndarray, decimals: int) -> np.ndarray:
    """Fractional coordinates wrapped into [0, 1) so that none prints as 1.000...

    Values within 0.6 units of the last printed decimal below 1 become 0: the
    same point by periodicity, moved by less than the printed precision.
    """
    wrapped = frac - np.floor(frac)
    wrapped[wrapped >= 1.0 - 0.6 * 10.0 ** -decimals] = 0.0
    return wrapped
