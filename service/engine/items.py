"""The item model: lives, payment streams, items and the basis-level valuation settings,
with the method blocks that describe each way the engine values an item.

Conventions (all times in years from the valuation date):

- The payment window opens at the deferral u and lasts ``term`` years (for life when None).
- Discrete payments: m per year of 1/m each. The j-th payment covers the period that starts
  at u + j/m; it is paid at the start of that period (``advance``) or at its end (``arrears``).
  Its amount is (1 + r)^k / m with k = floor(j / m) the year of the window it falls in.
- ``continuous``: payment at rate (1 + r)^floor(t - u) per annum throughout the window.
- A guarantee of g years makes the payments for periods starting before u + g certain,
  provided that some life is alive at u; later payments depend on who is alive.
- Survivorship (both, first_only, second_only) gives the amount payable in each state of the
  two lives; a single life is paid while it is alive.

The value is computed as sum(payment x discount factor x probability of payment), or for
continuous payments as the exact integral of the same product within each year of age.
"""

import math
import numbers
from collections.abc import Mapping
from dataclasses import dataclass
from functools import cached_property, lru_cache
from types import MappingProxyType

from service.engine.curves import Curve, method_words
from service.engine.survival import ASSUMPTIONS

TIMINGS = ("advance", "arrears", "continuous")
APPROXIMATIONS = ("exact", "woolhouse-2", "woolhouse-3")
#: Who must be alive at the end of the deferral for payments (and the guarantee) to start.
START_REQUIREMENTS = ("any", "first", "both")
MAX_FREQUENCY = 365
#: Tolerance on whole numbers of periods and years.
_EPS = 1e-9


@dataclass(frozen=True)
class Life:
    """One life: exact age, the table it follows, and its underwriting adjustments."""

    age: float
    table: int = 0
    duration: int | None = None
    age_adjustment: float = 0.0
    mortality_multiplier: float = 1.0
    flat_extra: float = 0.0  # added to every q after the multiplier (capped at 1)


@dataclass(frozen=True)
class Payments:
    """The shape of the payment stream (per annum amounts of 1 before escalation)."""

    timing: str = "advance"
    frequency: int = 1
    term: float | None = None
    deferral: float = 0.0
    guarantee: float = 0.0
    escalation: float = 0.0


#: Amounts payable while (both alive, only the first alive, only the second alive).
LAST_SURVIVOR = (1.0, 1.0, 1.0)


@dataclass(frozen=True)
class Item:
    """One annuity: one or two lives, a payment stream and the survivorship amounts."""

    lives: tuple[Life, ...]
    payments: Payments = Payments()
    survivorship: tuple[float, float, float] = LAST_SURVIVOR
    start_requires: str = "any"


@dataclass(frozen=True)
class Valuation:
    """Basis-level settings: interest (a flat effective annual rate or a :class:`Curve`) and
    methods."""

    interest: float | Curve
    fractional_age: str = "udd"
    approximation: str = "exact"

    def __post_init__(self):
        if not isinstance(self.interest, Curve) and not (
                isinstance(self.interest, numbers.Real) and math.isfinite(self.interest)
                and self.interest > -1):
            raise ValueError("interest must be a Curve or a finite rate above -1")
        if self.fractional_age not in ASSUMPTIONS:
            raise ValueError(f"unknown fractional-age assumption {self.fractional_age!r}")
        if self.approximation not in APPROXIMATIONS:
            raise ValueError(f"unknown m-thly approximation {self.approximation!r}")

    @cached_property
    def curve(self) -> Curve:
        """The interest structure (a flat rate is a flat :class:`Curve`)."""
        if isinstance(self.interest, Curve):
            return self.interest
        return Curve.flat(float(self.interest))


#: What each kind of valuation did; ``Values.method_code`` indexes these.
EXACT_SUM, WOOLHOUSE_SUM, INTEGRAL, INTEGRAL_BY_RULE = 0, 1, 2, 3

_FORCE_ESTIMATE = (
    "the law's own force A + B c^x where the life follows the basis' law; otherwise at a "
    "whole age -(ln p(x-1) + ln p(x)) / 2 on the life's own rates (-ln p(x) where it has no "
    "rate for the year before), and between whole ages the fractional-age assumption's force")


def methods(valuation: Valuation) -> tuple[Mapping, ...]:
    """Return the method blocks of exact sums, Woolhouse sums, closed-form integrals and
    integrals by a Gauss-Legendre rule (items valued with their sensitivities).

    The engine decides per item which one it used (``Values.method_code``); these describe
    them for the audit trail. They are read-only mappings, made once per kind of valuation
    (assumption, approximation, kind of interest structure) and shared.
    """
    curve = valuation.curve
    return _methods(valuation.fractional_age, valuation.approximation, curve.kind, curve.curved)


@lru_cache(maxsize=64)
def _methods(frac: str, approximation: str, kind: str, curved: bool) -> tuple[Mapping, ...]:
    words = method_words(kind, curved)
    exact = {"evaluation": "sum of payment x discount factor x probability of payment",
             "fractional_age": frac, "approximation": "exact",
             "discounting": words["discounting"]}
    woolhouse = {
        "evaluation": (
            "sum of payment x discount factor x probability of payment, with each whole "
            "life-contingent year of the window by Woolhouse's formula; the guarantee, part "
            "years and any year whose Woolhouse value falls outside 0 and the value of its "
            "payments made for certain (or across which segment rates change) are summed "
            "exactly"),
        "fractional_age": frac, "approximation": approximation,
        "discounting": words["discounting"]}
    if approximation == "woolhouse-3":
        woolhouse["force_of_mortality"] = _FORCE_ESTIMATE
    if frac == "balducci":
        # Balducci's curve has a pole; see integrals.balducci and integrals.balducci_pair.
        evaluation = ("integral of payment rate x discount x survival per year of age: "
                      "exponential-integral closed form, or Gauss-Legendre exact to "
                      "rounding where the pole is far")
    else:
        evaluation = ("integral of payment rate x discount x survival, closed form per "
                      "year of age")
    integral = {"evaluation": evaluation + "; discounting: " + words["continuous"],
                "fractional_age": frac, "approximation": "exact",
                "discounting": words["discounting"]}
    by_rule = integral | {"evaluation": (
        "integral of payment rate x discount x survival per segment of age by a "
        "Gauss-Legendre rule exact to rounding (the same points give the sensitivities)")}
    return tuple(map(MappingProxyType, (exact, woolhouse, integral, by_rule)))
