"""Marshmallow schemas: the request and response shapes of the HTTP interface."""

import datetime
import math

import numpy as np
from marshmallow import (
    RAISE,
    Schema,
    ValidationError,
    fields,
    missing,
    post_load,
    validate,
    validates_schema,
)

from service.engine.annuity import (
    MAX_FREQUENCY,
    START_REQUIREMENTS,
    TIMINGS,
    whole_periods_problem,
)
from service.engine.curves import KINDS, MAX_POINTS, Curve, CurveError
from service.engine.insurance import BENEFIT_TIMINGS, COVERS, STATUSES

#: Named survivorship patterns: amounts while (both alive, only first alive, only second alive).
SURVIVORSHIP_SHORTCUTS = {
    "joint-life": (1.0, 0.0, 0.0),
    "last-survivor": (1.0, 1.0, 1.0),
    "reversionary": (0.0, 0.0, 1.0),
}
SEX_VALUES = ("female", "male")
#: A table a life follows: a sex, or a blended table's name (as basis ids are spelt).
TABLE_NAME = r"^[a-z0-9](?:[a-z0-9.-]*[a-z0-9])?$"
MAX_YEARS = 200.0
#: Sensitivities an item may ask for.
MEASURES = ("duration", "convexity", "key_rate_durations")
#: Periods that may be given in years or in whole months.
_MONTHS = ("term", "deferral", "guarantee")


def _months_checked(data: dict, original, names) -> tuple[dict, dict]:
    """Refuse a period given both in years and in months; return (errors, years by name)."""
    errors = {}
    given = original if isinstance(original, dict) else {}
    pairs = _MONTH_KEYS.get(names)
    if pairs is None:
        pairs = _MONTH_KEYS[names] = tuple((name, f"{name}_months") for name in names)
    for name, months in pairs:
        if name in given and months in given:
            errors[months] = [f"Give {name} or {months}, not both."]
    years = {name: data[months] / 12 if months in data else data.get(name)
             for name, months in pairs}
    return errors, years


#: (name, its months key) for each tuple of names met.
_MONTH_KEYS: dict[tuple, tuple] = {}


def _months_to_years(data: dict, names) -> dict:
    """Turn whole months into years, so that only years travel on."""
    for name in names:
        months = data.pop(f"{name}_months", None)
        if months is not None:
            data[name] = months / 12
    return data


class StrictFloat(fields.Float):
    """A JSON number only: no strings, no booleans, nothing that is not finite."""

    def __init__(self, **kwargs):
        kwargs.setdefault("allow_nan", False)
        super().__init__(**kwargs)

    def _deserialize(self, value, attr, data, **kwargs):
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise ValidationError("Not a valid number.")
        try:
            number = float(value)
        except OverflowError:
            raise ValidationError("Number is out of range.") from None
        if not math.isfinite(number):
            raise ValidationError("Special numeric values (nan or infinity) are not permitted.")
        return number


class _Strict(Schema):
    class Meta:
        unknown = RAISE


class LifeSchema(_Strict):
    age = StrictFloat(load_default=None, validate=validate.Range(0, 200), metadata={
        "description": "Exact age in years, a real number: 65.25 is 65 years and 3 months. "
                       "The life's integer age is its floor (an age within 1e-9 of a whole "
                       "age is that age). After age_adjustment it must lie between the "
                       "table's first and last ages. Give age or date_of_birth, not both.",
        "example": 65.25})
    date_of_birth = fields.Date(load_default=None, metadata={
        "description": "Instead of age: the life's date of birth (ISO 8601, 1958-03-14). The "
                       "request's valuation_date is then required, and the age is derived "
                       "by the basis' age_definition (see GET /v1/bases/{ref}): exact age "
                       "counts whole years to the last birthday plus the days since it over "
                       "the days from that birthday to the next; last-birthday takes the "
                       "whole years; nearest-birthday rounds the exact age, half a year "
                       "rounding up. A birthday on 29 February falls on 28 February in other "
                       "years. The result echoes the ages used in `ages`."})
    sex = fields.String(validate=[validate.Length(1, 64), validate.Regexp(
                            TABLE_NAME, error="Must be female, male or the name of a table "
                                              "the basis defines.")],
                        load_default=None, metadata={
                            "description": "female or male where the basis is sex-distinct, "
                                           "or the name of a blended table the basis defines "
                                           "(GET /v1/bases/{ref} lists its tables). Ignored "
                                           "by a unisex basis (with a warning)."})
    duration = fields.Integer(strict=True, allow_none=True, load_default=None,
                              validate=validate.Range(0, 200), metadata={
                                  "description": (
                                      "Whole years since selection for a select table, counted "
                                      "from the life's integer age: a life aged 65.5 with "
                                      "duration 0 was selected at 65. The age at selection "
                                      "must lie within the select table's ages (422 "
                                      "otherwise). Omitted or null means ultimate; ignored "
                                      "(with a warning) by a basis without select rates.")})
    age_adjustment = StrictFloat(load_default=0.0, validate=validate.Range(-50, 50),
                                 metadata={"description": "Years added to the age (an age "
                                                          "rating); may be negative."})
    mortality_multiplier = StrictFloat(load_default=1.0, validate=validate.Range(0, 100),
                                       metadata={"description": (
                                           "Every q is multiplied by this, then capped at 1. "
                                           "The table's last age keeps q = 1 under any "
                                           "multiplier (no one outlives the table), so 0 pays "
                                           "to the end of the table's last year. Above 10 a "
                                           "warning asks whether a percentage was meant.")})
    flat_extra = StrictFloat(load_default=0.0, validate=validate.Range(0, 1), metadata={
        "description": "Added to every q after the multiplier, then capped at 1: the usual "
                       "flat extra of an impaired life (0.005 is 5 per mille). Above 0.1 a "
                       "warning asks whether per mille was meant."})

    @validates_schema
    def _age_or_date(self, data, **kwargs):
        age, born = data.get("age"), data.get("date_of_birth")
        if age is None and born is None:
            raise ValidationError("Missing: give age, or date_of_birth with the request's "
                                  "valuation_date.", "age")
        if age is not None and born is not None:
            raise ValidationError("Give age or date_of_birth, not both.", "date_of_birth")

    @staticmethod
    def _age_or_date_suspects(columns: dict, size: int):
        """For a batch loaded as columns: the lives ``_age_or_date`` refuses (neither an age
        nor a date of birth, or both)."""
        ages = columns.get("age", [None] * size)
        born = columns.get("date_of_birth", [None] * size)
        return [(a is None) == (b is None) for a, b in zip(ages, born, strict=True)]

    _age_or_date.batch_suspects = _age_or_date_suspects


class SurvivorshipAmountsSchema(_Strict):
    both = StrictFloat(required=True, validate=validate.Range(0, 1))
    first_only = StrictFloat(required=True, validate=validate.Range(0, 1))
    second_only = StrictFloat(required=True, validate=validate.Range(0, 1))


class SurvivorshipField(fields.Field):
    """Either a named shortcut or an object of three amounts."""

    def _deserialize(self, value, attr, data, **kwargs):
        if isinstance(value, str):
            if value not in SURVIVORSHIP_SHORTCUTS:
                raise ValidationError(
                    f"Must be one of {', '.join(SURVIVORSHIP_SHORTCUTS)} or an object of "
                    "amounts.")
            return SURVIVORSHIP_SHORTCUTS[value]
        if isinstance(value, dict):
            loaded = SurvivorshipAmountsSchema().load(value)
            return (loaded["both"], loaded["first_only"], loaded["second_only"])
        raise ValidationError("Must be a shortcut name or an object of amounts.")


SURVIVORSHIP_DOC = {
    "description": (
        "Amounts per annum payable while both lives are alive, while only the first is "
        "alive, and while only the second is alive. Shortcuts: 'joint-life' = (1, 0, 0), paid "
        "while both live; 'last-survivor' = (1, 1, 1), paid until the second death; "
        "'reversionary' = (0, 0, 1), paid to the second life after the first dies. A "
        "joint-and-two-thirds-survivor pension is {\"both\": 1, \"first_only\": 1, "
        "\"second_only\": 0.6667}. Required for two lives, refused for one."),
    "oneOf": [
        {"type": "string", "enum": list(SURVIVORSHIP_SHORTCUTS)},
        {"$ref": "#/components/schemas/SurvivorshipAmounts"},
    ],
}


class SpreadRequestSchema(_Strict):
    percentiles = fields.List(StrictFloat(validate=validate.Range(0, 100, min_inclusive=False)),
                              required=True, validate=validate.Length(1, 20),
                              metadata={"example": [5, 50, 95]})


class _ItemBase(_Strict):
    """What every item of a batch has: the caller's id and one or two lives."""

    id = fields.String(validate=validate.Length(1, 64), metadata={
        "description": "The caller's own reference for the item (at most 64 characters), "
                       "echoed in its result.", "example": "policy-104233"})
    lives = fields.List(fields.Nested(LifeSchema), required=True,
                        validate=validate.Length(1, 2),
                        metadata={"description": "One life, or two for a joint benefit."})


class ItemSchema(_ItemBase):
    timing = fields.String(required=True, validate=validate.OneOf(TIMINGS),
                           metadata={"description": "advance (annuity-due), arrears "
                                                    "(annuity-immediate) or continuous."})
    frequency = fields.Integer(strict=True, load_default=1,
                               validate=validate.Range(1, MAX_FREQUENCY),
                               metadata={"description": "Payments per year for discrete "
                                                        "timings; each is 1/frequency."})
    term = StrictFloat(allow_none=True, load_default=None,
                       validate=validate.Range(0, MAX_YEARS, min_inclusive=False),
                       metadata={"description": "Years of the payment window after the "
                                                "deferral; null means for life. For discrete "
                                                "timings a whole number of payment periods."})
    deferral = StrictFloat(load_default=0.0, validate=validate.Range(0, MAX_YEARS),
                           metadata={"description": "Years from now until the window opens; "
                                                    "for discrete timings a whole number of "
                                                    "payment periods."})
    guarantee = StrictFloat(load_default=0.0, validate=validate.Range(0, MAX_YEARS),
                            metadata={"description": "Years from the start of the window "
                                                     "paid whether or not the lives survive "
                                                     "(provided start_requires is met)."})
    term_months = fields.Integer(strict=True, validate=validate.Range(1, 12 * int(MAX_YEARS)),
                                 metadata={"description": "The term in whole months, instead "
                                                          "of term."})
    deferral_months = fields.Integer(strict=True, validate=validate.Range(0, 12 * int(MAX_YEARS)),
                                     metadata={"description": "The deferral in whole months, "
                                                              "instead of deferral."})
    guarantee_months = fields.Integer(strict=True,
                                      validate=validate.Range(0, 12 * int(MAX_YEARS)),
                                      metadata={"description": "The guarantee in whole months, "
                                                               "instead of guarantee."})
    escalation = StrictFloat(load_default=0.0, validate=validate.Range(-0.5, 1.0),
                             metadata={"description": "Compound annual rate of increase."})
    survivorship = SurvivorshipField(metadata=SURVIVORSHIP_DOC)
    measures = fields.List(
        fields.String(validate=validate.OneOf(MEASURES)), load_default=list,
        validate=validate.Length(max=len(MEASURES)), metadata={
            "description": (
                "Sensitivities to the interest structure, computed from the expected "
                "payments: 'duration' -(1/V) dV/dy and 'convexity' (1/V) d2V/dy2 for a "
                "parallel shift y of the continuously compounded rates, "
                "'key_rate_durations' the duration for each spot term (triangular bump) or "
                "band. Discrete payments are taken date by date (exact summation, also "
                "under a Woolhouse basis).")})
    spread = fields.Nested(SpreadRequestSchema, metadata={
        "description": (
            "Ask for the standard deviation and percentiles of the present value of the "
            "payments as a random variable, enumerated exactly from the distribution of the "
            "lives' future lifetimes for advance and arrears payments, and for continuous "
            "payments on blocks of at most 1/12 of a year, each outcome within 1/24 of a "
            "year's discounted payment. The p-th percentile is the smallest value whose "
            "cumulative probability is at least p/100.")})
    start_requires = fields.String(
        load_default="any", validate=validate.OneOf(START_REQUIREMENTS), metadata={
            "description": (
                "Who must be alive at the end of the deferral for payments, and the "
                "guarantee, to start: 'any' life (the default), the 'first' life (a deferred "
                "member whose spouse's pension is payable only if the member reaches "
                "retirement), or 'both'. One life: all three mean that life.")})

    @validates_schema(pass_original=True)
    def _consistent(self, data, original, **kwargs):
        errors, years = _months_checked(data, original, _MONTHS)
        m = data.get("frequency", 1)
        if data.get("timing") in ("advance", "arrears"):
            # Discrete payments need whole payment periods; the error names the field sent.
            for name, value in years.items():
                problem = None if value is None else whole_periods_problem(
                    value, m, least=int(name == "term"))
                if problem:
                    errors.setdefault(f"{name}_months" if f"{name}_months" in data else name,
                                      []).append(problem)
        term, guarantee = years["term"], years["guarantee"] or 0.0
        if term is not None and guarantee > term:
            errors["guarantee"] = [f"A guarantee of {guarantee:g} years is longer than the "
                                   f"term of {term:g} years."]
        lives = data.get("lives") or []
        if data.get("survivorship") is not None and len(lives) != 2:
            errors["survivorship"] = ["Survivorship applies to two lives; this item has one."]
        if data.get("survivorship") is None and len(lives) == 2:
            errors["survivorship"] = [
                "Two lives need survivorship: 'joint-life', 'last-survivor', 'reversionary' "
                "or the amounts payable while both, only the first and only the second are "
                "alive (for example {\"both\": 1, \"first_only\": 1, \"second_only\": 0.5})."]
        if errors:
            raise ValidationError(errors)

    @staticmethod
    def _consistent_suspects(columns: dict, size: int):
        """For a batch loaded as columns: a superset of the items ``_consistent`` could
        refuse (periods in months, a guarantee longer than the term, lives and survivorship
        not matching, or a period within twice the rounding tolerance of not being whole)."""
        suspect = _months_given(columns, size)
        blank = [None] * size
        lives = columns.get("lives", blank)
        survivorship = columns.get("survivorship", blank)
        suspect |= np.array([type(v) is not list or len(v) != 1 or s not in (None, missing)
                             for v, s in zip(lives, survivorship, strict=True)], dtype=bool)
        discrete = np.array([t in ("advance", "arrears") for t in columns.get("timing", blank)],
                            dtype=bool)
        m = np.array([f if type(f) is int else 1 for f in columns.get("frequency", blank)],
                     dtype=float)
        years = {name: np.array([v if type(v) is float else np.nan
                                 for v in columns.get(name, blank)], dtype=float)
                 for name in _MONTHS}
        with np.errstate(invalid="ignore"):
            for value in years.values():
                scaled = value * m
                whole = np.abs(scaled - np.round(scaled)) <= 0.5e-9 * np.maximum(
                    1.0, np.abs(scaled))
                suspect |= discrete & ~np.isnan(value) & ~whole
            guarantee = np.nan_to_num(years["guarantee"], nan=0.0)
            suspect |= ~np.isnan(years["term"]) & (guarantee > years["term"])
        return suspect

    _consistent.batch_suspects = _consistent_suspects

    @post_load
    def _years(self, data, **kwargs):
        return _months_to_years(data, _MONTHS)

    _years.batch_suspects = lambda columns, size: _months_given(columns, size)


def _months_given(columns: dict, size: int):
    """The items of a batch loaded as columns that give some period in months."""
    given = np.zeros(size, dtype=bool)
    for name in _MONTHS:
        values = columns.get(f"{name}_months")
        if values is not None:
            given |= np.array([v is not missing for v in values], dtype=bool)
    return given


#: Request rates (a flat interest_rate or each rate of an interest structure) lie here.
RATE_RANGE = (-0.5, 1.0)


class InterestField(fields.Field):
    """An interest structure: flat, spot, segments or forward (service.engine.curves)."""

    def _deserialize(self, value, attr, data, **kwargs):
        try:
            curve = Curve.from_mapping(value, path="")
        except CurveError as exc:
            raise ValidationError({path.lstrip(".") or "_schema": msgs
                                   for path, msgs in exc.errors.items()}) from None
        lo, hi = RATE_RANGE
        bad = {str(k): [f"Must be between {lo} and {hi}."]
               for k, r in enumerate(curve.rates) if not lo <= r <= hi}
        if bad:
            raise ValidationError({"rate": bad["0"]} if curve.kind == "flat" else {"rates": bad})
        return curve


_RATES = {"type": "array", "minItems": 1, "maxItems": MAX_POINTS,
          "items": {"type": "number", "minimum": RATE_RANGE[0], "maximum": RATE_RANGE[1]}}
_KNOTS = {"type": "array", "maxItems": MAX_POINTS, "items": {"type": "number",
                                                             "exclusiveMinimum": 0}}
INTEREST_DOC = {
    "description": (
        "Interest as a structure, instead of interest_rate (never both). Annual effective "
        "rates. 'flat': one rate. 'spot': spot rates by term in years, interpolated linearly "
        "in the continuously compounded rate and held flat outside the terms; discount "
        "exp(-t r(t)). 'segments': each payment discounted at the rate of the band its time "
        "falls in (bands split at the increasing edges), as a spot rate for that time. "
        "'forward': forward rates by band, compounded through the bands. One more rate than "
        "edges; at most 200 points; terms and edges increasing."),
    "oneOf": [
        {"type": "object", "additionalProperties": False, "required": ["kind", "rate"],
         "properties": {"kind": {"const": "flat"}, "rate": _RATES["items"]}},
        {"type": "object", "additionalProperties": False, "required": ["kind", "terms", "rates"],
         "properties": {"kind": {"const": "spot"}, "terms": _KNOTS | {"minItems": 1},
                        "rates": _RATES}},
        *({"type": "object", "additionalProperties": False,
           "required": ["kind", "edges", "rates"],
           "properties": {"kind": {"const": kind}, "edges": _KNOTS, "rates": _RATES}}
          for kind in ("segments", "forward")),
    ],
    "example": {"kind": "spot", "terms": [1, 5, 10, 30], "rates": [0.031, 0.036, 0.04, 0.042]},
}
assert {o["properties"]["kind"]["const"] for o in INTEREST_DOC["oneOf"]} == set(KINDS)


#: The dates a request may name.
MIN_DATE, MAX_DATE = datetime.date(1900, 1, 1), datetime.date(2199, 12, 31)
VALUATION_DATE_DOC = {"description": (
    "The date the factors are valued at (ISO 8601, 2026-12-31). Required where the basis "
    "projects mortality generationally with an improvement scale (a life aged x then follows "
    "the rates of calendar year valuation year + t at age x + t) and where a life gives "
    "date_of_birth; otherwise not used. The audit block echoes it."),
    "example": "2026-12-31"}


class _Priced(_Strict):
    """A request under a basis, with the basis' interest or the request's own."""

    basis = fields.String(required=True, validate=validate.Length(1, 200),
                          metadata={"description": "ID (default version) or ID@VERSION.",
                                    "example": "fernhollow-annuitants@2026.1"})
    interest_rate = StrictFloat(load_default=None, allow_none=True,
                                validate=validate.Range(*RATE_RANGE),
                                metadata={"description": "Flat effective annual rate that "
                                                         "replaces the basis' interest."})
    interest = InterestField(metadata=INTEREST_DOC)
    valuation_date = fields.Date(load_default=None, validate=validate.Range(
        MIN_DATE, MAX_DATE, error="Must be a date from 1900-01-01 to 2199-12-31."),
        metadata=VALUATION_DATE_DOC)


ON_ERROR_DOC = {"description": (
    "'reject' (the default): one invalid or impossible item refuses the whole batch with a "
    "422 listing every problem. 'per-item': every valid item is valued, and each invalid one "
    "gets, in its place in results, its id and a problem with its field paths (relative to "
    "the item) and messages; the answer counts the items valued and refused.")}


class _Batch(_Priced):
    on_error = fields.String(load_default="reject",
                             validate=validate.OneOf(["reject", "per-item"]),
                             metadata=ON_ERROR_DOC)


class FactorRequestSchema(_Batch):
    items = fields.List(fields.Nested(ItemSchema), required=True,
                        validate=validate.Length(min=1))


class ScheduleRequestSchema(_Priced):
    item = fields.Nested(ItemSchema, required=True)
    amount = StrictFloat(load_default=1.0, validate=validate.Range(0, 1e12),
                         metadata={"description": "Annual amount; every row is scaled by it."})


class InsuranceItemSchema(_ItemBase):
    cover = fields.String(required=True, validate=validate.OneOf(COVERS), metadata={
        "description": "whole-life; term (pays on death within the term); endowment (on death "
                       "within the term or on survival to its end); pure-endowment (on "
                       "survival to the end of the term only)."})
    term = StrictFloat(allow_none=True, load_default=None,
                       validate=validate.Range(0, MAX_YEARS, min_inclusive=False),
                       metadata={"description": "Years of cover after the deferral; needed "
                                                "by every cover but whole-life."})
    deferral = StrictFloat(load_default=0.0, validate=validate.Range(0, MAX_YEARS),
                           metadata={"description": "Years before cover starts."})
    term_months = fields.Integer(strict=True, validate=validate.Range(1, 12 * int(MAX_YEARS)),
                                 metadata={"description": "The term in whole months."})
    deferral_months = fields.Integer(strict=True,
                                     validate=validate.Range(0, 12 * int(MAX_YEARS)),
                                     metadata={"description": "The deferral in whole months."})
    escalation = StrictFloat(load_default=0.0, validate=validate.Range(-0.5, 1.0), metadata={
        "description": "Compound annual growth of the benefit by policy year: (1 + r)^k on "
                       "death in the k-th year after the deferral (k = 0, 1, ...); a survival "
                       "benefit is that of the last policy year."})
    benefit_timing = fields.String(load_default="end-of-year",
                                   validate=validate.OneOf(BENEFIT_TIMINGS), metadata={
        "description": "end-of-year (of the policy year of death), end-of-period (of the "
                       "1/frequency of a year in which death occurs) or moment-of-death."})
    frequency = fields.Integer(strict=True, load_default=1,
                               validate=validate.Range(1, MAX_FREQUENCY),
                               metadata={"description": "Periods a year for end-of-period."})
    on = fields.String(validate=validate.OneOf(STATUSES), metadata={
        "description": "Two lives (required): pay on the first-death or the second-death."})

    @validates_schema(pass_original=True)
    def _consistent(self, data, original, **kwargs):
        errors, years = _months_checked(data, original, ("term", "deferral"))
        if data.get("cover") not in (None, "whole-life") and years["term"] is None:
            errors["term"] = [f"A {data['cover']} cover needs a term (or term_months)."]
        lives = data.get("lives") or []
        if len(lives) == 2 and "on" not in data:
            errors["on"] = ["Two lives need on: first-death or second-death."]
        if len(lives) == 1 and "on" in data:
            errors["on"] = ["on applies to two lives; this item has one."]
        if errors:
            raise ValidationError(errors)

    @post_load
    def _years(self, data, **kwargs):
        return _months_to_years(data, ("term", "deferral"))


class ProjectionItemSchema(ItemSchema):
    amount = StrictFloat(required=True, validate=validate.Range(0, 1e12), metadata={
        "description": "The item's annual amount: every payment is scaled by it."})


class ProjectionRequestSchema(_Batch):
    buckets = fields.String(load_default="monthly",
                            validate=validate.OneOf(["monthly", "annual", "exact"]), metadata={
        "description": "Periods of the answer: months or years from the valuation date, or "
                       "every distinct payment time (discrete payments only)."})
    items = fields.List(fields.Nested(ProjectionItemSchema), required=True,
                        validate=validate.Length(min=1))


class InsuranceRequestSchema(_Batch):
    items = fields.List(fields.Nested(InsuranceItemSchema), required=True,
                        validate=validate.Length(min=1))


# ---- responses (for the contract and for tests) -------------------------------------------


class ImprovementSchema(Schema):
    scale = fields.String(required=True, metadata={
        "description": "The scale's data file (covered by the basis digest)."})
    kind = fields.String(required=True, validate=validate.OneOf(["by-age", "by-age-and-year"]))
    projection = fields.String(required=True,
                               validate=validate.OneOf(["generational", "static"]))
    base_year = fields.Integer(required=True, metadata={
        "description": "The calendar year of the tables' rates."})
    year = fields.Integer(allow_none=True, metadata={
        "description": "static: the year the tables are projected to."})
    long_term_rate = fields.Float(required=True)
    long_term_from = fields.Integer(allow_none=True, metadata={
        "description": "by-age: the first year at the long-term rate."})
    source = fields.String(required=True)


class BasisRefSchema(Schema):
    id = fields.String(required=True)
    version = fields.String(required=True)
    digest = fields.String(required=True)
    status = fields.String(required=True, validate=validate.OneOf(["approved", "demo",
                                                                   "retired"]))
    age_definition = fields.String(validate=validate.OneOf(
        ["exact", "last-birthday", "nearest-birthday"]), metadata={
        "description": "Where a life gave date_of_birth: how its age was derived."})
    improvement = fields.Nested(ImprovementSchema, metadata={
        "description": "Present where the basis projects mortality with an improvement "
                       "scale."})


class InterestSchema(Schema):
    kind = fields.String(required=True, validate=validate.OneOf(KINDS))
    rate = fields.Float(metadata={"description": "flat: the rate."})
    terms = fields.List(fields.Float(), metadata={"description": "spot: the terms."})
    edges = fields.List(fields.Float(), metadata={"description": "segments, forward: edges."})
    rates = fields.List(fields.Float(), metadata={"description": "spot, segments, forward."})
    digest = fields.String(required=True, metadata={
        "description": "sha256 over the canonical structure (kind, terms or edges, rates), "
                       "to match a quote to the curve of its day."})
    source = fields.String(required=True, validate=validate.OneOf(["basis", "request"]))


class ServiceInfoSchema(Schema):
    name = fields.String(required=True)
    version = fields.String(required=True)


class AuditSchema(Schema):
    basis = fields.Nested(BasisRefSchema, allow_none=True, required=True)
    interest = fields.Nested(InterestSchema, allow_none=True, required=True)
    valuation_date = fields.Date(metadata={
        "description": "The request's valuation_date, where it gave one."})
    service = fields.Nested(ServiceInfoSchema, required=True)
    request_id = fields.String(required=True)
    computed_at = fields.String(required=True, metadata={"format": "date-time"})


class MethodSchema(Schema):
    evaluation = fields.String(required=True)
    fractional_age = fields.String(required=True)
    approximation = fields.String(required=True, metadata={
        "description": "exact, or the Woolhouse form that valued some year of this item."})
    force_of_mortality = fields.String(metadata={
        "description": "Three-term Woolhouse only: how the force of mortality was estimated."})
    discounting = fields.String(required=True, metadata={
        "description": "How each payment's discount factor was computed."})
    second_moment = fields.String(metadata={"description": "Insurance: how it was computed."})


class WarningSchema(Schema):
    path = fields.String(required=True, metadata={"description": "The input concerned."})
    message = fields.String(required=True)


WARNINGS_DOC = {"description": (
    "Inputs the basis ignores, values that look like a percentage given as a number, and a "
    "demo or retired basis. Warnings never change a number. At most 100 are listed; a last "
    "entry says how many more there were.")}


class KeyRateSchema(Schema):
    term = fields.Float(metadata={"description": "spot: the term bumped."})
    start = fields.Float(data_key="from", metadata={"description": "band: where it starts."})
    to = fields.Float(allow_none=True, metadata={"description": "band: where it ends (null: "
                                                                 "open)."})
    duration = fields.Float(allow_none=True, required=True)


class PercentileSchema(Schema):
    percentile = fields.Float(required=True)
    value = fields.Float(required=True)


class ItemProblemSchema(Schema):
    title = fields.String(required=True)
    errors = fields.Dict(keys=fields.String(), values=fields.List(fields.String()),
                         required=True, metadata={
                             "description": "Field paths within the item, to messages."})


ITEM_PROBLEM_DOC = {"description": "on_error 'per-item': why this item was refused (it then "
                                   "has no value)."}


ROUNDED_DOC = {"description": (
    "Where the basis prescribes rounding: the value rounded by its rule (decimal places, "
    "half-up or half-even, applied to the shortest decimal form of value). Nothing inside "
    "the calculation is rounded.")}
AGES_DOC = {"description": "Where a life gave date_of_birth: the age used for each life (null "
                           "for a life that gave its age)."}


class FactorResultSchema(Schema):
    id = fields.String(metadata={"description": "The item's id, where it gave one."})
    value = fields.Float(metadata={"description": "Always, unless the item was refused."})
    rounded = fields.Float(metadata=ROUNDED_DOC)
    ages = fields.List(fields.Float(allow_none=True), metadata=AGES_DOC)
    method = fields.Nested(MethodSchema)
    problem = fields.Nested(ItemProblemSchema, metadata=ITEM_PROBLEM_DOC)
    standard_deviation = fields.Float(metadata={
        "description": "With spread: of the present value of the payments."})
    percentiles = fields.List(fields.Nested(PercentileSchema), metadata={
        "description": "With spread: the percentiles asked for, in their order."})
    duration = fields.Float(allow_none=True, metadata={
        "description": "With measures: -(1/V) dV/dy (null where the value is 0)."})
    convexity = fields.Float(allow_none=True, metadata={
        "description": "With measures: (1/V) d2V/dy2."})
    key_rate_durations = fields.List(fields.Nested(KeyRateSchema), metadata={
        "description": "With measures: one per spot term or band; they sum to the duration."})


class InsuranceResultSchema(Schema):
    id = fields.String(metadata={"description": "The item's id, where it gave one."})
    problem = fields.Nested(ItemProblemSchema, metadata=ITEM_PROBLEM_DOC)
    value = fields.Float(metadata={"description": "E[Z], Z the present value."})
    second_moment = fields.Float(metadata={
        "description": "E[Z^2]: the benefit squared at double the force of interest; the "
                       "variance of the present value is second_moment - value^2."})
    rounded = fields.Float(metadata=ROUNDED_DOC)
    ages = fields.List(fields.Float(allow_none=True), metadata=AGES_DOC)
    method = fields.Nested(MethodSchema)


COUNTS_DOC = {"valued": {"description": "Items valued."},
              "refused": {"description": "Items refused (on_error 'per-item'; else 0)."}}


class _BatchResponse(Schema):
    """What every batch answer holds besides its results."""

    valued = fields.Integer(required=True, metadata=COUNTS_DOC["valued"])
    refused = fields.Integer(required=True, metadata=COUNTS_DOC["refused"])
    warnings = fields.List(fields.Nested(WarningSchema), required=True, metadata=WARNINGS_DOC)
    audit = fields.Nested(AuditSchema, required=True)


class InsuranceResponseSchema(_BatchResponse):
    results = fields.List(fields.Nested(InsuranceResultSchema), required=True)


class ProjectionRowSchema(Schema):
    start = fields.Float(required=True, metadata={"description": "Years from now."})
    end = fields.Float(required=True, metadata={
        "description": "End of the period (equal to start for a payment time)."})
    payment = fields.Float(required=True, metadata={
        "description": "Expected payments of the portfolio in the period (undiscounted)."})
    present_value = fields.Float(required=True)


class ProjectionTotalsSchema(Schema):
    payment = fields.Float(required=True)
    present_value = fields.Float(required=True, metadata={
        "description": "The sum over the items of amount x factor (exact summation)."})


class RefusedItemSchema(Schema):
    item = fields.Integer(required=True, metadata={"description": "Its place in items."})
    id = fields.String()
    problem = fields.Nested(ItemProblemSchema, required=True)


class ProjectionResponseSchema(_BatchResponse):
    rows = fields.List(fields.Nested(ProjectionRowSchema), required=True)
    totals = fields.Nested(ProjectionTotalsSchema, required=True)
    refused_items = fields.List(fields.Nested(RefusedItemSchema), required=True)


class FactorResponseSchema(_BatchResponse):
    results = fields.List(fields.Nested(FactorResultSchema), required=True)


class ScheduleRowSchema(Schema):
    class Meta:
        description = (
            "Discrete timings: one row per possible payment date. Continuous timing: one row "
            "per year of the window, where time is the start of the year, payment the amount "
            "payable over it if every payment is made, probability the expected amount paid "
            "divided by payment, discount the year's exact present value divided by its "
            "expected amount, and present_value that exact present value; the state "
            "probabilities are those at the start of the year.")

    time = fields.Float(required=True, metadata={"description": "Years from now."})
    payment = fields.Float(required=True, metadata={
        "description": "The instalment (times the amount) if it is made; escalation included."})
    probability = fields.Float(required=True, metadata={
        "description": "Probability that it is made; for two lives the expected fraction "
                       "of the full instalment paid, from the survivorship amounts."})
    discount = fields.Float(required=True, metadata={"description": "v^time."})
    present_value = fields.Float(required=True, metadata={
        "description": "payment x probability x discount."})
    both_alive = fields.Float(metadata={"description": "Two lives: probability both alive."})
    first_only = fields.Float(metadata={
        "description": "Two lives: probability only the first is alive (and start_requires "
                       "was met at the end of the deferral)."})
    second_only = fields.Float(metadata={
        "description": "Two lives: probability only the second is alive (and start_requires "
                       "was met at the end of the deferral)."})


class ScheduleTotalsSchema(Schema):
    present_value = fields.Float(required=True)
    factor = fields.Float(required=True)
    amount = fields.Float(required=True)


class ScheduleResponseSchema(Schema):
    rows = fields.List(fields.Nested(ScheduleRowSchema), required=True)
    totals = fields.Nested(ScheduleTotalsSchema, required=True)
    method = fields.Nested(MethodSchema, required=True)
    warnings = fields.List(fields.Nested(WarningSchema), required=True, metadata=WARNINGS_DOC)
    audit = fields.Nested(AuditSchema, required=True)


class BasisSummarySchema(Schema):
    id = fields.String(required=True)
    version = fields.String(required=True)
    title = fields.String(required=True)
    status = fields.String(required=True, validate=validate.OneOf(["approved", "demo",
                                                                   "retired"]))
    digest = fields.String(required=True)
    default = fields.Boolean(required=True)


class BasisListSchema(Schema):
    bases = fields.List(fields.Nested(BasisSummarySchema), required=True)
    audit = fields.Nested(AuditSchema, required=True)


class TableSourceSchema(Schema):
    sex = fields.String(required=True)
    kind = fields.String(required=True, validate=validate.OneOf(["law", "file"]))
    law = fields.String()
    parameters = fields.Dict(keys=fields.String(), values=fields.Float())
    file = fields.String()
    select_factors = fields.List(fields.Float())
    first_age = fields.Integer(required=True)
    last_age = fields.Integer(required=True)
    select_period = fields.Integer(required=True)
    source = fields.String(required=True)


class BasisDefaultsSchema(Schema):
    interest = fields.Nested(InterestSchema, required=True)
    fractional_age = fields.String(required=True)
    mthly = fields.String(required=True)


class BlendSchema(Schema):
    name = fields.String(required=True, metadata={
        "description": "Give it as a life's sex to follow the blended table."})
    weights = fields.Dict(keys=fields.String(), values=fields.Float(), required=True,
                          metadata={"description": "Weight of each sex table; they sum to 1."})
    on = fields.String(required=True, validate=validate.OneOf(["q", "survival"]), metadata={
        "description": "q: the weighted mean of the rates at each age; survival: the "
                       "weighted mean of the survivors from a common radix at the first age."})


class RoundingSchema(Schema):
    places = fields.Integer(required=True)
    rule = fields.String(required=True, validate=validate.OneOf(["half-up", "half-even"]))


class ApprovalSchema(Schema):
    by = fields.String(required=True, metadata={"description": "Who approved (a role or "
                                                               "reference)."})
    on = fields.Date(required=True)


class BasisDetailSchema(BasisSummarySchema):
    purpose = fields.String(required=True)
    source = fields.String(required=True)
    sex_distinct = fields.Boolean(required=True)
    mortality = fields.List(fields.Nested(TableSourceSchema), required=True)
    blends = fields.List(fields.Nested(BlendSchema), required=True)
    tables = fields.List(fields.String(), required=True, metadata={
        "description": "Every name a life's sex may give under this basis."})
    improvement = fields.Nested(ImprovementSchema, allow_none=True, required=True)
    age_definition = fields.String(required=True, validate=validate.OneOf(
        ["exact", "last-birthday", "nearest-birthday"]))
    rounding = fields.Nested(RoundingSchema, allow_none=True, required=True, metadata={
        "description": "Rounding of final factors: results then carry rounded beside value."})
    effective_date = fields.Date(allow_none=True, required=True)
    approval = fields.Nested(ApprovalSchema, allow_none=True, required=True)
    superseded_by = fields.String(allow_none=True, required=True, metadata={
        "description": "The version that replaced this one, if any."})
    defaults = fields.Nested(BasisDefaultsSchema, required=True)
    audit = fields.Nested(AuditSchema, required=True)


class LifeTableRowSchema(Schema):
    age = fields.Integer(required=True)
    q = fields.Float(required=True)
    p = fields.Float(required=True)
    l = fields.Float(required=True)  # noqa: E741 - the actuarial symbol
    d = fields.Float(required=True)
    e = fields.Float(required=True, metadata={"description": "Curtate expectation of life."})
    e_complete = fields.Float(required=True, metadata={
        "description": "Complete expectation of life, survival within each year of age under "
                       "the basis' fractional-age assumption."})
    D = fields.Float(metadata={"description": "v^x l (columns=commutation)."})
    N = fields.Float(metadata={"description": "Sum of D from this age on."})
    C = fields.Float(metadata={"description": "v^(x+1) d."})
    M = fields.Float(metadata={"description": "Sum of C from this age on."})
    S = fields.Float(metadata={"description": "Sum of N from this age on."})
    R = fields.Float(metadata={"description": "Sum of M from this age on."})
    a_due = fields.Float(metadata={"description": "Whole-life annuity-due N / D at the rate."})


class BasisPathSchema(Schema):
    """The basis named in a path (/v1/bases/{ref}); a ref never holds a slash."""

    ref = fields.String(required=True, validate=validate.Regexp(r"^[^/]+$"), metadata={
        "description": "ID (the default version) or ID@VERSION."})


class LifeTableQuerySchema(_Strict):
    from_age = fields.Integer(load_default=None, validate=validate.Range(0, 200))
    to_age = fields.Integer(load_default=None, validate=validate.Range(0, 200))
    sex = fields.String(load_default=None, validate=[validate.Length(1, 64),
                                                     validate.Regexp(TABLE_NAME)],
                        metadata={"description": "female, male or a blended table's name."})
    duration = fields.Integer(load_default=None, validate=validate.Range(0, 200))
    valuation_date = fields.Date(load_default=None, validate=validate.Range(MIN_DATE, MAX_DATE),
                                 metadata={"description": (
                                     "For a basis with a generational improvement scale "
                                     "(required there): the date at which the life has its "
                                     "age; the rows show its cohort's projected rates.")})
    age = fields.Float(load_default=None, allow_nan=False, validate=validate.Range(0, 200),
                       metadata={"description": "With valuation_date: the life's age then "
                                                "(or give date_of_birth)."})
    date_of_birth = fields.Date(load_default=None, metadata={
        "description": "With valuation_date: the life's date of birth, its age derived by "
                       "the basis' age definition."})
    columns = fields.String(load_default="basic", validate=validate.OneOf(["basic",
                                                                          "commutation"]),
                            metadata={"description": "'commutation' adds D, N, C, M, S, R and "
                                                     "the annuity-due N/D at a flat rate."})
    interest_rate = fields.Float(load_default=None, allow_nan=False,
                                 validate=validate.Range(-0.5, 1.0),
                                 metadata={"description": "Flat effective annual rate for the "
                                                          "commutation columns; default the "
                                                          "basis' rate."})


class LifeTableSchema(Schema):
    basis = fields.String(required=True)
    sex = fields.String(required=True)
    duration = fields.Integer(allow_none=True, required=True)
    age = fields.Float(metadata={"description": "Improved basis: the life's age at the "
                                                "valuation date (derived from date_of_birth "
                                                "where given)."})
    cohort = fields.Integer(metadata={
        "description": "Generational improvement: the cohort whose projected rates the rows "
                       "show (valuation year minus the integer age)."})
    radix = fields.Float(required=True, metadata={"description": "l at radix_age."})
    radix_age = fields.Integer(required=True, metadata={
        "description": "The table's first age for the ultimate table, as published tables "
                       "print l; for a select life (duration given), its age at selection. "
                       "from_age and to_age only choose the rows shown."})
    rows = fields.List(fields.Nested(LifeTableRowSchema), required=True)
    audit = fields.Nested(AuditSchema, required=True)


class ProblemSchema(Schema):
    type = fields.String(required=True)
    title = fields.String(required=True)
    status = fields.Integer(required=True)
    detail = fields.String(required=True)
    request_id = fields.String(required=True)
    errors = fields.Dict(keys=fields.String(), values=fields.List(fields.String()), metadata={
        "description": "Field path to messages, for invalid input; at most 100 paths."})
    errors_omitted = fields.Integer(metadata={
        "description": "Further error paths found but not listed (present only when some "
                       "were left out). Checking stops once 100 paths are found, so the "
                       "detail may also say how many list elements were not checked."})
    audit = fields.Nested(AuditSchema, required=True)


class HealthSchema(Schema):
    status = fields.String(required=True)
    bases = fields.Integer()
    refused = fields.List(fields.String())
    missing = fields.List(fields.String())
