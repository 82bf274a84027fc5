"""Hypothesis strategies for valid single-life items under the test mortality models."""

from dataclasses import dataclass, replace

from hypothesis import assume
from hypothesis import strategies as st

from service.engine.annuity import Item, Life, Payments, Valuation
from tests.reference import models

ASSUMPTIONS = ("udd", "constant-force", "balducci")
FREQUENCIES = (1, 2, 4, 12)
#: Test tables by name; the short one closes at 105 so that lives often reach its end.
TABLE_NAMES = ("susm", "susm_short")


@dataclass(frozen=True)
class Case:
    """One valuation: a table (by name), an item and the valuation settings."""

    table_name: str
    item: Item
    valuation: Valuation

    @property
    def table(self):
        return getattr(models, self.table_name)()

    @property
    def life(self) -> Life:
        return self.item.lives[0]

    @property
    def payments(self) -> Payments:
        return self.item.payments

    def with_payments(self, **changes) -> "Case":
        return replace(self, item=replace(self.item, payments=replace(self.payments, **changes)))

    def with_life(self, **changes) -> "Case":
        return replace(self, item=replace(self.item, lives=(replace(self.life, **changes),)))


def ages(table_name):
    """Exact ages from the first age to 30 years before the table's end, to 1/1000 year.

    Even three times the rate at such an age is below 1, so every life can be alive there.
    """
    last = 130 if table_name == "susm" else 105
    return st.integers(20_000, (last - 30) * 1000).map(lambda k: k / 1000)


def multipliers(low=0.5, high=3.0):
    return st.floats(low, high, allow_nan=False, allow_infinity=False)


def escalations():
    return st.floats(0.0, 0.05, allow_nan=False, allow_infinity=False)


def interest_rates():
    return st.floats(0.0, 0.08, allow_nan=False, allow_infinity=False)


@st.composite
def payments(draw, *, timing=None, whole_life=False, max_deferral=20):
    """Payments with term, deferral and guarantee multiples of 1/m and guarantee <= term."""
    timing = timing or draw(st.sampled_from(("advance", "arrears", "continuous")))
    m = 12 if timing == "continuous" else draw(st.sampled_from(FREQUENCIES))
    if whole_life:
        return Payments(timing=timing, frequency=m)
    term_steps = draw(st.one_of(st.none(), st.integers(1, 60 * m)))
    deferral_steps = draw(st.integers(0, max_deferral * m))
    max_guarantee = 30 * m if term_steps is None else term_steps
    guarantee_steps = draw(st.one_of(st.just(0), st.integers(0, max_guarantee)))
    return Payments(
        timing=timing,
        frequency=1 if timing == "continuous" else m,
        term=None if term_steps is None else term_steps / m,
        deferral=deferral_steps / m,
        guarantee=guarantee_steps / m,
        escalation=draw(st.one_of(st.just(0.0), escalations())),
    )


@st.composite
def cases(draw, *, table_names=TABLE_NAMES, timing=None, whole_life=False,
          approximations=("exact",), multiplier_range=(0.5, 3.0)):
    """A valid single-life Case; the life can be alive when the payment window opens."""
    table_name = draw(st.sampled_from(table_names))
    age = draw(ages(table_name))
    life = Life(age, mortality_multiplier=draw(multipliers(*multiplier_range)))
    pay = draw(payments(timing=timing, whole_life=whole_life))
    # The window must open while three times the table's rate is still below 1, or the life
    # may be dead for certain by then (a zero value is then right, not a failure).
    last = 130 if table_name == "susm" else 105
    assume(age + pay.deferral <= last - 30)
    valuation = Valuation(draw(interest_rates()), draw(st.sampled_from(ASSUMPTIONS)),
                          draw(st.sampled_from(approximations)))
    return Case(table_name, Item((life,), pay), valuation)


# ---- request bodies for the HTTP API ---------------------------------------------------------

#: Shipped bases and the age range over which every generated life can be alive.
API_BASES = {
    "standard-ultimate": (20.0, 95.0, False),
    "standard-select@2026.1": (22.0, 95.0, False),
    "illustrative": (13.0, 95.0, False),
    "fernhollow-annuitants": (41.0, 90.0, True),
    "fernhollow-annuitants@2025.1": (40.0, 90.0, True),
}


@st.composite
def api_lives(draw, low: float, high: float, sexed: bool) -> dict:
    life = {"age": draw(st.integers(int(low * 100), int(high * 100)).map(lambda k: k / 100))}
    if sexed:
        life["sex"] = draw(st.sampled_from(("female", "male")))
    if draw(st.booleans()):
        life["mortality_multiplier"] = draw(st.floats(0.0, 2.0))
    if draw(st.booleans()):
        life["age_adjustment"] = draw(st.floats(-1.0, 3.0))
    if draw(st.booleans()):
        life["duration"] = draw(st.integers(0, 1))
    return life


@st.composite
def api_items(draw, low: float, high: float, sexed: bool) -> dict:
    timing = draw(st.sampled_from(("advance", "arrears", "continuous")))
    m = 1 if timing == "continuous" else draw(st.sampled_from((1, 2, 4, 12, 52)))
    term_steps = draw(st.one_of(st.none(), st.integers(1, 40 * m)))
    item = {"lives": [draw(api_lives(low, high, sexed))
                      for _ in range(draw(st.integers(1, 2)))],
            "timing": timing, "frequency": m,
            "term": None if term_steps is None else term_steps / m,
            "deferral": draw(st.integers(0, 10 * m)) / m,
            "guarantee": draw(st.integers(0, term_steps or 20 * m)) / m,
            "escalation": draw(st.floats(-0.02, 0.08))}
    if len(item["lives"]) == 2:
        item["survivorship"] = draw(st.one_of(
            st.sampled_from(("joint-life", "last-survivor", "reversionary")),
            st.fixed_dictionaries({k: st.floats(0.0, 1.0)
                                   for k in ("both", "first_only", "second_only")})))
        item["start_requires"] = draw(st.sampled_from(("any", "first", "both")))
    return item


@st.composite
def factor_requests(draw) -> dict:
    basis = draw(st.sampled_from(sorted(API_BASES)))
    low, high, sexed = API_BASES[basis]
    body = {"basis": basis,
            "items": draw(st.lists(api_items(low, high, sexed), min_size=1, max_size=4))}
    if draw(st.booleans()):
        body["interest_rate"] = draw(st.floats(-0.02, 0.12))
    return body


# ---- interest structures (service.engine.curves) ---------------------------------------------

CURVE_KINDS = ("flat", "spot", "segments", "forward")


def curve_rates(size):
    return st.lists(st.floats(-0.02, 0.12, allow_nan=False, allow_infinity=False),
                    min_size=size, max_size=size)


@st.composite
def curve_mappings(draw, kinds=CURVE_KINDS):
    """A valid interest structure as the mapping a basis or a request gives."""
    kind = draw(st.sampled_from(kinds))
    if kind == "flat":
        return {"kind": "flat", "rate": draw(curve_rates(1))[0]}
    count = draw(st.integers(0 if kind != "spot" else 1, 8))
    # Distinct knots in quarter years up to 60 years, sorted.
    steps = draw(st.lists(st.integers(1, 240), min_size=count, max_size=count, unique=True))
    knots = [k / 4 for k in sorted(steps)]
    rates = draw(curve_rates(count if kind == "spot" else count + 1))
    return {"kind": kind, "terms" if kind == "spot" else "edges": knots, "rates": rates}


@st.composite
def cash_flows(draw, max_size=30):
    """Payment times (years, > 0) and positive amounts."""
    size = draw(st.integers(1, max_size))
    times = draw(st.lists(st.floats(0.01, 80.0), min_size=size, max_size=size))
    amounts = draw(st.lists(st.floats(0.01, 10.0), min_size=size, max_size=size))
    return times, amounts
