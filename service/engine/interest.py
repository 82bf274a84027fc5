"""Interest conversions for a flat effective annual rate.

All functions take the effective annual rate ``i`` (``i > -1``) and use
``log1p``/``expm1`` so that rates near zero keep full precision.
"""

import numpy as np


def force_of_interest(i):
    """Return delta = ln(1 + i)."""
    return np.log1p(i)


def discount_factor(i, t):
    """Return v**t = (1 + i)**(-t)."""
    return np.exp(-np.multiply(t, np.log1p(i)))


def nominal_interest(i, m):
    """Return i^(m) = m((1 + i)^(1/m) - 1), the nominal rate convertible m-thly."""
    return m * np.expm1(np.log1p(i) / m)


def nominal_discount(i, m):
    """Return d^(m) = m(1 - (1 + i)^(-1/m)), the nominal discount rate convertible m-thly."""
    return -m * np.expm1(-np.log1p(i) / m)


def annuity_certain(i, n, *, m=1, advance=True):
    """Return the present value of 1 p.a. paid m-thly for n years, certain.

    Notes
    -----
    a-due^(m)_n = (1 - v^n) / d^(m) and a^(m)_n = (1 - v^n) / i^(m); at i = 0 both are n.
    """
    i = np.asarray(i, dtype=float)
    n = np.asarray(n, dtype=float)
    zero = i == 0
    safe_i = np.where(zero, 0.5, i)
    # ``advance`` may be an array (one flag per annuity).
    denom = np.where(advance, nominal_discount(safe_i, m), nominal_interest(safe_i, m))
    value = -np.expm1(-n * np.log1p(safe_i)) / denom
    return np.where(zero, n, value)
