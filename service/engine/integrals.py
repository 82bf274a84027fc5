"""Closed-form integrals of discounted survival within one year of age.

Each function integrates over 0 <= h <= D (D <= 1) with the discount e^(-delta h);
``r`` is where the life stands in its year of age at h = 0, so that its survival from
the start of the year is g(r + h) under the fractional-age assumption.
"""



import math

import numpy as np
from scipy import special

#: Below this |delta D| the power series is used (cancellation-free), above it the closed form.
_SERIES_BELOW = 0.5
_SERIES_TERMS = 24


def _series_coefficients(n: int) -> np.ndarray:
    """(-1)^k / (k! (n + k + 1)), k = 0 .. _SERIES_TERMS - 1, highest first (for Horner)."""
    c = [(-1) ** k / (math.factorial(k) * (n + k + 1)) for k in range(_SERIES_TERMS)]
    return np.array(c[::-1])


_COEFFICIENTS = {n: _series_coefficients(n) for n in (0, 1, 2)}
#: _REACH[k]: the largest |x| for which the first k terms of the series leave out less
#: than 1e-19 (the alternating series' error is below its first omitted term,
#: |x|^k / (k! (n + k + 1)); phi_n is at least 0.2 for |x| < 1/2, n <= 2).
_REACH = [(1e-19 * math.factorial(k)) ** (1 / k) if k else 0.0
          for k in range(_SERIES_TERMS + 1)]


def phi(n: int, x):
    """Return phi_n(x) = integral_0^1 u^n e^(-x u) du, for n = 0, 1, 2.

    For n = 1, 2 where |x| < 1/2 the power series sum_k (-x)^k / (k! (n + k + 1)) (by
    Horner's rule, no cancellation); elsewhere, and for n = 0 everywhere (1 at 0), the
    closed form. Each is evaluated only where it is used.
    """
    if n not in _COEFFICIENTS:
        raise ValueError(n)
    x = np.asarray(x, dtype=float)
    if n == 0:
        # -expm1(-x) / x loses nothing as x goes to 0 (expm1 keeps its relative precision):
        # no series is needed but at 0 itself.
        with np.errstate(invalid="ignore", over="ignore"):
            return np.where(x == 0, 1.0, -np.expm1(-x) / np.where(x == 0, 1.0, x))
    out = np.empty(x.shape)
    small = np.abs(x) < _SERIES_BELOW
    xs = x[small]
    acc = np.zeros_like(xs)
    # As few terms as the largest |x| needs (all 24 only near |x| = 1/2).
    reach = float(np.abs(xs).max(initial=0.0))
    terms = next((k for k in range(1, _SERIES_TERMS) if _REACH[k] >= reach), _SERIES_TERMS)
    for c in _COEFFICIENTS[n][_SERIES_TERMS - terms:]:
        acc = acc * xs + c
    out[small] = acc
    xl = x[~small]
    with np.errstate(over="ignore", invalid="ignore"):
        e = np.exp(-xl)
        if n == 0:
            closed = -np.expm1(-xl) / xl
        elif n == 1:
            closed = (-np.expm1(-xl) - xl * e) / xl**2
        else:
            closed = (2.0 * -np.expm1(-xl) - e * xl * (xl + 2.0)) / xl**3
    out[~small] = closed
    return out


def moment(n: int, delta, length):
    """Return integral_0^D h^n e^(-delta h) dh for n = 0, 1, 2."""
    length = np.asarray(length, dtype=float)
    return length ** (n + 1) * phi(n, np.multiply(delta, length))


def udd(q, r, delta, length):
    """Integral of e^(-delta h) (1 - q (r + h)), h from 0 to D."""
    alpha = 1.0 - q * r
    return alpha * moment(0, delta, length) - q * moment(1, delta, length)


def udd_pair(q1, r1, q2, r2, delta, length):
    """Integral of e^(-delta h) (1 - q1 (r1 + h)) (1 - q2 (r2 + h)), h from 0 to D."""
    a1 = 1.0 - q1 * r1
    a2 = 1.0 - q2 * r2
    return (a1 * a2 * moment(0, delta, length)
            - (a1 * q2 + a2 * q1) * moment(1, delta, length)
            + q1 * q2 * moment(2, delta, length))


def constant_force(q, r, delta, length, q2=None, r2=None):
    """Integral of e^(-delta h) p^(r + h) [times p2^(r2 + h)], h from 0 to D."""
    p = 1.0 - np.asarray(q, dtype=float)
    alive = p > 0
    if q2 is not None:
        p2 = 1.0 - np.asarray(q2, dtype=float)
        alive = alive & (p2 > 0)
    ps = np.where(alive, p, 1.0)
    mu = -np.log(ps)
    level = np.power(ps, r)
    if q2 is not None:
        p2s = np.where(alive, p2, 1.0)
        mu = mu - np.log(p2s)
        level = level * np.power(p2s, r2)
    value = level * moment(0, np.add(delta, mu), length)
    # A life with q = 1 under a constant force is dead at once after the start of the year.
    return np.where(alive, value, 0.0)


def _gauss_legendre(nodes: int):
    x, w = np.polynomial.legendre.leggauss(nodes)
    return (x + 1.0) / 2.0, w / 2.0


_GL_X, _GL_W = _gauss_legendre(24)


def _balducci_exact_tail(p, beta, q, delta, length):
    """Exponential-integral form of integral_0^D e^(-delta h) p / (beta + q h) dh."""
    # With u = beta + q h: (p / q) e^(a beta) [E1(a beta) - E1(a (beta + q D))], a = delta / q.
    a = delta / q
    u1 = beta
    u2 = beta + q * length
    # Where |a| u2 is small the two E1 values nearly cancel (and E1(0) is infinite): use
    # E1(x) = -gamma - ln x - sum_k (-x)^k / (k k!) (Abramowitz and Stegun 5.1.11), so that
    # E1(a u1) - E1(a u2) = ln(u2/u1) + sum_k (-a u1)^k ((u2/u1)^k - 1) / (k k!).
    small = np.abs(a) * u2 < _SERIES_BELOW
    log_ratio = np.log1p(q * length / u1)
    x = np.where(small, -a * u1, 0.0)
    series = log_ratio.copy()
    term = np.ones_like(x)
    for k in range(1, _SERIES_TERMS + 1):
        term = term * x / k
        series = series + term * np.expm1(k * log_ratio) / k
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        pos = (special.exp1(a * u1) - special.exp1(a * u2))
        neg = (special.expi(-a * u2) - special.expi(-a * u1))
        large = np.where(a > 0, pos, neg)
        return (p / q) * np.exp(a * u1) * np.where(small, series, large)


def balducci(q, r, delta, length):
    """Integral of e^(-delta h) p / (p + q (r + h)), h from 0 to D (D <= 1).

    Notes
    -----
    Where q/p <= 1/2 the integrand is analytic on a disc far beyond the interval and a
    24-point Gauss-Legendre rule reproduces it to rounding (the Bernstein-ellipse bound is
    below 1e-40). Where the rate is larger the exponential-integral closed form is used,
    which has no cancellation there.
    """
    q = np.asarray(q, dtype=float)
    r = np.asarray(r, dtype=float)
    length = np.asarray(length, dtype=float)
    delta = np.broadcast_to(np.asarray(delta, dtype=float), np.broadcast(q, r, length).shape)
    q, r, length = np.broadcast_arrays(q, r, length)
    p = 1.0 - q
    alive = p > 0
    beta = p + q * r
    gentle = q <= p / 2.0
    h = length[..., None] * _GL_X
    with np.errstate(divide="ignore", invalid="ignore"):
        f = np.exp(-delta[..., None] * h) * p[..., None] / (beta[..., None] + q[..., None] * h)
        quad = length * np.sum(f * _GL_W, axis=-1)
        steep = _balducci_exact_tail(p, np.where(alive, beta, 1.0),
                                     np.where(gentle, 1.0, q), delta, length)
    value = np.where(gentle, quad, steep)
    return np.where(alive & (length > 0), value, 0.0)


def balducci_pair(q1, r1, q2, r2, delta, length):
    """Integral of e^(-delta h) [p1/(p1 + q1 (r1 + h))] [p2/(p2 + q2 (r2 + h))], h in [0, D].

    Each factor is a Balducci survival curve within its year. The product is integrated by
    splitting [0, D] into pieces so short that each factor's pole lies at least four piece
    lengths away, then a 24-point Gauss-Legendre rule on each piece; the rule is then exact to
    rounding (Bernstein-ellipse bound), so the result is the exact integral in double precision.
    """
    q1, r1, q2, r2, length = np.broadcast_arrays(*(np.asarray(a, dtype=float)
                                                   for a in (q1, r1, q2, r2, length)))
    delta = np.broadcast_to(np.asarray(delta, dtype=float), q1.shape)
    p1, p2 = 1.0 - q1, 1.0 - q2
    alive = (p1 > 0) & (p2 > 0) & (length > 0)
    b1 = np.where(alive, p1 + q1 * r1, 1.0)
    b2 = np.where(alive, p2 + q2 * r2, 1.0)
    # Distance of the nearest pole from h = 0 in units of the interval: b / q.
    with np.errstate(divide="ignore"):
        reach = np.minimum(np.where(q1 > 0, b1 / q1, np.inf), np.where(q2 > 0, b2 / q2, np.inf))
    shape = q1.shape
    flat = [np.ravel(a) for a in (q1, p1, b1, q2, p2, b2, delta, length, reach)]
    q1f, p1f, b1f, q2f, p2f, b2f, df, lf, rf = flat
    total = np.zeros(lf.size)
    lo = np.zeros(lf.size)
    active = np.flatnonzero(np.ravel(alive))
    # Geometric pieces: each is a quarter of its distance to the nearest pole, so they grow
    # by a quarter each step and 400 steps cover a pole 1e-30 away. Only unfinished
    # segments are evaluated in each step.
    for _ in range(400):
        if active.size == 0:
            break
        remaining = lf[active] - lo[active]
        piece = np.minimum(remaining, np.maximum((rf[active] + lo[active]) / 4.0, 1e-300))
        h = lo[active, None] + piece[:, None] * _GL_X
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            f = (np.exp(-df[active, None] * h)
                 * (p1f[active, None] / (b1f[active, None] + q1f[active, None] * h))
                 * (p2f[active, None] / (b2f[active, None] + q2f[active, None] * h)))
        total[active] += piece * np.sum(f * _GL_W, axis=-1)
        lo[active] += piece
        active = active[piece < remaining]
    total = total.reshape(shape)
    return np.where(alive, total, 0.0)


def certain(delta, length):
    """Integral of e^(-delta h), h from 0 to D."""
    return moment(0, delta, length)
