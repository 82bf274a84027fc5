"""Interest conversions for a flat effective annual rate.

All functions take the effective annual rate ``i`` (``i > -1``) and use
``log1p``/``expm1`` so that rates near zero keep full precision.
"""

import numpy as np

from service.engine.integrals import phi


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
    a-due^(m)_n = (1 - v^n) / d^(m) and a^(m)_n = v^(1/m) a-due^(m)_n. With
    delta = ln(1 + i) and phi(x) = (1 - e^-x) / x this is n phi(n delta) / phi(delta / m),
    which keeps full precision as i goes to 0 (where it is n). ``advance`` may be an array.
    """
    delta = np.log1p(np.asarray(i, dtype=float))
    n = np.asarray(n, dtype=float)
    value = n * phi(0, n * delta) / phi(0, delta / m)
    return np.where(advance, value, value * np.exp(-delta / m))
