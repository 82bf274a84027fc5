"""Reference computations written for the tests, independently of the engine's code.

Everything here works one payment date (or one year of age) at a time in plain Python, from
the definitions:

- annual survival under Makeham's law, p(x) = exp(-A - B c^x (c - 1) / ln c);
- a life's chain of annual rates from its integer age (select rates first, then ultimate,
  each multiplied by the mortality multiplier and capped at 1);
- survival within a year of age under the three fractional-age assumptions;
- present values as sums of amount x v^t x probability, or integrals of rate x v^t x t_p_x
  evaluated with scipy.integrate.quad on pieces where the integrand is smooth.

Only the tables' rates (the input data) are shared with the engine.
"""

import math

import numpy as np
from scipy import integrate

#: Absolute and relative error requested from quad on each smooth piece.
QUAD_OPTIONS = {"epsabs": 1e-15, "epsrel": 1e-13, "limit": 200}


def makeham_p(a: float, b: float, c: float, age: float) -> float:
    """Return the one-year survival probability at ``age`` under mu(x) = A + B c^x."""
    return math.exp(-a - b * c**age * (c - 1.0) / math.log(c))


def makeham_survival(a: float, b: float, c: float, age: float, t: float) -> float:
    """Return t_p_x under Makeham's law (exact, any real t)."""
    return math.exp(-a * t - b * c**age * (c**t - 1.0) / math.log(c))


def rate_chain(ultimate_q, first_age: int, integer_age: int, *, select_factors=(),
               duration=None, multiplier: float = 1.0) -> list[float]:
    """Return the annual rates q_k, k = 0, 1, ..., of a life at ``integer_age``.

    ``ultimate_q[j]`` is q at age ``first_age + j``; the last one must be 1. A life ``duration``
    whole years after selection (None for ultimate) follows q[x]+s = select_factors[s] q(x + s)
    while s is below the select period.
    """
    rates = [float(q) for q in ultimate_q[integer_age - first_age:]]
    if duration is not None:
        for k, s in enumerate(range(duration, len(select_factors))):
            rates[k] = min(select_factors[s] * rates[k], 1.0)
    return [min(multiplier * q, 1.0) for q in rates]


def within_year_survival(q: float, r: float, assumption: str) -> float:
    """Return r_p_y for 0 <= r <= 1 within a year of rate q."""
    if r == 0.0:
        return 1.0
    p = 1.0 - q
    if assumption == "udd":
        return 1.0 - r * q
    if assumption == "constant-force":
        return p**r
    if assumption == "balducci":
        return p / (1.0 - (1.0 - r) * q)
    raise ValueError(assumption)


def within_year_density(q: float, r: float, assumption: str) -> float:
    """Return -d/dr r_p_y, the density of death at r within the year (0 < r < 1)."""
    p = 1.0 - q
    if assumption == "udd":
        return q
    if assumption == "constant-force":
        return 0.0 if p == 0.0 else -math.log(p) * p**r
    if assumption == "balducci":
        return 0.0 if p == 0.0 else p * q / (1.0 - (1.0 - r) * q) ** 2
    raise ValueError(assumption)


def point_mass_at_start(q: float, assumption: str) -> bool:
    """True when a year with rate q kills every life at once at its start.

    With q = 1, constant force and Balducci put the whole year's deaths at its first instant.
    """
    return q == 1.0 and assumption in ("constant-force", "balducci")


class DirectLife:
    """One life: survival from its exact age, built from a chain of annual rates."""

    def __init__(self, rates, frac: float, assumption: str):
        self.rates = list(rates)
        self.frac = float(frac)
        self.assumption = assumption
        self.cum = [1.0]
        for q in self.rates:
            self.cum.append(self.cum[-1] * (1.0 - q))
        self.start = self._s(self.frac)
        assert self.start > 0

    @classmethod
    def of(cls, ultimate_q, first_age, age, assumption, **chain_options):
        integer_age = math.floor(age)
        rates = rate_chain(ultimate_q, first_age, integer_age, **chain_options)
        return cls(rates, age - integer_age, assumption)

    def _s(self, s: float) -> float:
        """Survival from the integer age to s years after it."""
        k = math.floor(s)
        if k >= len(self.rates):
            return 0.0
        return self.cum[k] * within_year_survival(self.rates[k], s - k, self.assumption)

    def survival(self, t: float) -> float:
        """Return t_p_x."""
        return self._s(self.frac + t) / self.start

    def density(self, t: float) -> float:
        """Return t_p_x mu_(x+t) at a t that is not an integer age of the life."""
        s = self.frac + t
        k = math.floor(s)
        if k >= len(self.rates):
            return 0.0
        return self.cum[k] * within_year_density(self.rates[k], s - k, self.assumption) \
            / self.start

    def integer_age_times(self, t0: float, t1: float) -> list[float]:
        """Times in (t0, t1) at which the life reaches an integer age."""
        first = math.floor(self.frac + t0) + 1
        return [k - self.frac for k in range(first, math.ceil(self.frac + t1))
                if t0 < k - self.frac < t1]

    def death_masses(self):
        """(time, probability) of deaths concentrated at an instant (years with q = 1)."""
        out = []
        for k, q in enumerate(self.rates):
            if point_mass_at_start(q, self.assumption) and k - self.frac >= 0:
                out.append((k - self.frac, self.cum[k] / self.start))
                break
        return out

    @property
    def horizon(self) -> float:
        """A time after which the life is dead for certain."""
        return len(self.rates) - self.frac


def _pieces(t0, t1, cuts):
    points = sorted({t0, t1, *[c for c in cuts if t0 < c < t1]})
    return list(zip(points[:-1], points[1:], strict=False))


def integrate_pieces(f, t0: float, t1: float, cuts) -> float:
    """Integral of a function that is smooth between the cut points, piece by piece."""
    total = 0.0
    for a, b in _pieces(t0, t1, cuts):
        if b - a > 1e-14:
            total += integrate.quad(f, a, b, **QUAD_OPTIONS)[0]
    return total


# ---------------------------------------------------------------------------------------------
# Present values from the definitions


def discrete_value(lives, i: float, *, frequency: int = 1, timing: str = "advance", term=None,
                   deferral: float = 0.0, guarantee: float = 0.0, escalation: float = 0.0,
                   amounts=(1.0, 1.0, 1.0), discount=None) -> float:
    """Sum of amount x v^t x probability over the payment dates of m-thly payments.

    ``lives`` holds one or two DirectLife objects; ``amounts`` are paid while (both, only the
    first, only the second) are alive. Payments for periods that start before
    deferral + guarantee are certain if some life is alive at the deferral; the certain amount
    is the one payable while both are alive. ``discount(t)``, where given, replaces v^t (and
    ``i`` is then ignored).
    """
    m = frequency
    v = 1.0 / (1.0 + i)
    if discount is None:
        def discount(t):
            return v**t
    horizon = max(life.horizon for life in lives)
    n_term = math.inf if term is None else round(term * m)
    n_certain = round(guarantee * m)
    certain_weight = amounts[0] * _any_alive(lives, deferral)
    total = 0.0
    j = 0
    while j < n_term:
        t = deferral + (j + (timing == "arrears")) / m
        if t > horizon + 1 and j >= n_certain:
            break
        prob = certain_weight if j < n_certain else _state_weight(lives, t, amounts)
        total += (1.0 + escalation) ** (j // m) / m * discount(t) * prob
        j += 1
    return total


def _any_alive(lives, t):
    dead = 1.0
    for life in lives:
        dead *= 1.0 - life.survival(t)
    return 1.0 - dead


def _state_weight(lives, t, amounts):
    if len(lives) == 1:
        return lives[0].survival(t)
    p1, p2 = lives[0].survival(t), lives[1].survival(t)
    return amounts[0] * p1 * p2 + amounts[1] * p1 * (1 - p2) + amounts[2] * (1 - p1) * p2


def continuous_value(lives, i: float, *, term=None, deferral: float = 0.0,
                     guarantee: float = 0.0, escalation: float = 0.0,
                     amounts=(1.0, 1.0, 1.0), discount=None, nodes=()) -> float:
    """Integral of rate(t) v^t x (expected fraction payable at t) over the payment window.

    The rate is (1 + escalation)^floor(t - deferral); the first ``guarantee`` years of the
    window are certain if some life is alive at the deferral. ``discount(t)``, where given,
    replaces v^t; ``nodes`` are times where it is not smooth (quad integrates between them).
    """
    delta = math.log1p(i)
    if discount is None:
        def discount(t):
            return math.exp(-delta * t)
    horizon = max(life.horizon for life in lives)
    end = deferral + (math.inf if term is None else term)
    life_end = min(end, max(deferral + guarantee, horizon))
    certain_weight = amounts[0] * _any_alive(lives, deferral)

    def rate(t):
        return (1.0 + escalation) ** math.floor(t - deferral + 1e-12)

    cuts = [deferral + k for k in range(0, math.ceil(life_end - deferral) + 1)]
    cuts.append(deferral + guarantee)
    cuts.extend(nodes)
    for life in lives:
        cuts.extend(life.integer_age_times(deferral, life_end))
    total = 0.0
    for a, b in _pieces(deferral, life_end, cuts):
        if b - a <= 1e-14:
            continue
        mid = (a + b) / 2
        if mid < deferral + guarantee:
            level = rate(mid) * certain_weight
            total += level * integrate.quad(discount, a, b, **QUAD_OPTIONS)[0]
        else:
            level = rate(mid)
            total += level * integrate.quad(
                lambda t: discount(t) * _state_weight(lives, t, amounts), a, b,
                **QUAD_OPTIONS)[0]
    return total


def survival_array(life: DirectLife, times) -> np.ndarray:
    return np.array([life.survival(float(t)) for t in times])
