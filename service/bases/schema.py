"""The basis file, described once: a marshmallow schema over the parsed TOML.

``BasisSchema().load(doc)`` checks every key of a basis file at once and returns a
:class:`BasisSpec` of typed values; on any problem it raises ``marshmallow.ValidationError``
whose ``messages`` name every problem by key path, and whose ``valid_data`` holds the
sections that were sound (so the loader can still check their data files).

What the schema cannot see (data files, the tables they make, digests) the loader checks.
Every message here is made of fixed words and names the service chose: none quotes the file,
so a message may go into a refusal's short reason.
"""

import datetime
import math
import re
from dataclasses import dataclass
from pathlib import PurePosixPath
from types import MappingProxyType
from typing import TYPE_CHECKING

from marshmallow import Schema, ValidationError, fields, post_load, validates_schema

from service.engine.annuity import APPROXIMATIONS
from service.engine.curves import Curve, CurveError
from service.engine.survival import ASSUMPTIONS

if TYPE_CHECKING:
    from service.engine.improvement import Scale

STATUSES = ("approved", "demo", "retired")
#: Statuses that need an [approval] and an effective_date.
GOVERNED = ("approved", "retired")
SEXES = ("female", "male", "unisex")
LAWS = ("makeham", "gompertz")
LAW_PARAMETERS = {"makeham": ("A", "B", "c"), "gompertz": ("B", "c")}
AGE_DEFINITIONS = ("exact", "last-birthday", "nearest-birthday")
ROUNDING_RULES = ("half-up", "half-even")
BLEND_ON = ("q", "survival")
SCALE_KINDS = ("by-age", "by-age-and-year")
PROJECTIONS = ("generational", "static")
#: Interest kinds that a data file may give, with the CSV columns of each.
INTEREST_FILE_COLUMNS = {"spot": ("term", "rate"), "segments": ("from", "rate"),
                         "forward": ("from", "rate")}
#: Basis ids, versions and blend names: lowercase ASCII letters, digits, '.' and '-',
#: starting and ending with a letter or digit (so no control characters, no look-alikes).
NAME = re.compile(r"[a-z0-9](?:[a-z0-9.-]*[a-z0-9])?")
MAX_ID_LENGTH = 64
MAX_VERSION_LENGTH = 32
#: Blend weights must sum to 1 within this.
WEIGHT_TOLERANCE = 1e-12
MAX_PLACES = 12


# ---- the typed values ---------------------------------------------------------------------


@dataclass(frozen=True)
class Approval:
    """Who approved a basis version (free text) and on which day."""

    by: str
    on: datetime.date


@dataclass(frozen=True)
class Rounding:
    """How final factors are rounded: to ``places`` decimals by ``rule``."""

    places: int
    rule: str


@dataclass(frozen=True)
class Blend:
    """A table blended from the basis' sex tables: ``weights`` as ((sex, weight), ...)."""

    name: str
    weights: tuple[tuple[str, float], ...]
    on: str


@dataclass(frozen=True, eq=False)
class Improvement:
    """A basis' mortality improvement scale, read and checked, and how it projects."""

    scale: "Scale"
    file: str
    kind: str
    projection: str
    year: int | None
    source: str


@dataclass(frozen=True)
class TableSpec:
    """One [mortality.SEX] section: a CSV ``file`` or a ``law`` with its parameters."""

    source: str
    file: str | None = None
    law: str | None = None
    parameters: MappingProxyType | None = None
    min_age: int | None = None
    select_factors: tuple[float, ...] = ()


@dataclass(frozen=True)
class InterestSpec:
    """The [interest] section: a ``curve`` given inline, or a ``kind`` read from ``file``."""

    kind: str
    curve: Curve | None = None
    file: str | None = None


@dataclass(frozen=True)
class ImprovementSpec:
    """The [improvement] section, before its scale file is read."""

    file: str
    kind: str
    base_year: int
    long_term_rate: float
    long_term_from: int | None
    projection: str
    year: int | None
    source: str


@dataclass(frozen=True)
class BasisSpec:
    """A basis file's content, typed; the tables and the scale are still to be read."""

    id: str
    version: str
    title: str
    status: str
    default: bool
    digest: str | None
    purpose: str
    source: str
    interest: InterestSpec
    fractional_age: str
    approximation: str
    mortality: MappingProxyType  # sex -> TableSpec, in SEXES order
    age_definition: str = "exact"
    effective_date: datetime.date | None = None
    approval: Approval | None = None
    superseded_by: str | None = None
    rounding: Rounding | None = None
    blends: tuple[Blend, ...] = ()
    improvement: ImprovementSpec | None = None

    @property
    def sexes(self) -> tuple[str, ...]:
        return tuple(self.mortality)


# ---- fields that take TOML values as they are -----------------------------------------------

_MESSAGES = {"required": "is missing", "null": "must not be empty"}


class Text(fields.String):
    """A TOML string; ``blank=False`` refuses one that is empty or only spaces."""

    default_error_messages = _MESSAGES | {"invalid": "must be a string",
                                          "blank": "must not be empty"}

    def __init__(self, *, blank: bool = True, **kwargs):
        super().__init__(**kwargs)
        self.blank = blank

    def _deserialize(self, value, attr, data, **kwargs):
        text = super()._deserialize(value, attr, data, **kwargs)
        if not self.blank and not text.strip():
            raise self.make_error("blank")
        return text


class Choice(Text):
    """A TOML string, one of ``choices``."""

    default_error_messages = {"choice": "must be one of {choices}"}

    def __init__(self, choices, **kwargs):
        super().__init__(**kwargs)
        self.choices = tuple(choices)

    def _deserialize(self, value, attr, data, **kwargs):
        text = super()._deserialize(value, attr, data, **kwargs)
        if text not in self.choices:
            raise self.make_error("choice", choices=", ".join(self.choices))
        return text


class Name(Text):
    """An id, a version or a blend name: see ``NAME``."""

    default_error_messages = {
        "name": "not allowed: use 1 to {limit} lowercase letters, digits, '.' and '-', "
                "starting and ending with a letter or digit"}

    def __init__(self, limit: int, **kwargs):
        super().__init__(**kwargs)
        self.limit = limit

    def _deserialize(self, value, attr, data, **kwargs):
        text = super()._deserialize(value, attr, data, **kwargs)
        if not is_name(text, self.limit):
            raise self.make_error("name", limit=self.limit)
        return text


def is_name(text: str, limit: int) -> bool:
    return len(text) <= limit and NAME.fullmatch(text) is not None


class DataPath(Text):
    """A data file named relative to the basis file, never leaving the tables folder."""

    default_error_messages = {"outside": "must be a path inside the tables folder"}

    def _deserialize(self, value, attr, data, **kwargs):
        text = super()._deserialize(value, attr, data, **kwargs)
        path = PurePosixPath(text)
        if not text or path.is_absolute() or ".." in path.parts or "\\" in text \
                or "\x00" in text:
            raise self.make_error("outside")
        return text


class Flag(fields.Field):
    """A TOML boolean (true or false; no strings, no numbers)."""

    default_error_messages = _MESSAGES | {"invalid": "must be true or false"}

    def _deserialize(self, value, attr, data, **kwargs):
        if not isinstance(value, bool):
            raise self.make_error("invalid")
        return value


class Whole(fields.Field):
    """A TOML integer (not a boolean, not a float), within [minimum, maximum] if given."""

    default_error_messages = _MESSAGES | {"invalid": "must be a whole number",
                                          "range": "must be from {minimum} to {maximum}",
                                          "low": "must be at least {minimum}"}

    def __init__(self, minimum: int | None = None, maximum: int | None = None, **kwargs):
        super().__init__(**kwargs)
        self.minimum, self.maximum = minimum, maximum

    def _deserialize(self, value, attr, data, **kwargs):
        if isinstance(value, bool) or not isinstance(value, int):
            raise self.make_error("invalid")
        if self.minimum is not None and value < self.minimum or \
                self.maximum is not None and value > self.maximum:
            if self.maximum is None:
                raise self.make_error("low", minimum=self.minimum)
            raise self.make_error("range", minimum=self.minimum, maximum=self.maximum)
        return value


class Number(fields.Field):
    """A finite TOML number (integer or float, not a boolean), as a float."""

    default_error_messages = _MESSAGES | {"invalid": "must be a number",
                                          "finite": "must be finite",
                                          "negative": "must not be negative",
                                          "below_one": "must be below 1"}

    def __init__(self, *, non_negative: bool = False, below_one: bool = False, **kwargs):
        super().__init__(**kwargs)
        self.non_negative, self.below_one = non_negative, below_one

    def _deserialize(self, value, attr, data, **kwargs):
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise self.make_error("invalid")
        try:
            number = float(value)
        except OverflowError:
            raise self.make_error("finite") from None
        if not math.isfinite(number):
            raise self.make_error("finite")
        if self.non_negative and number < 0:
            raise self.make_error("negative")
        if self.below_one and number >= 1:
            raise self.make_error("below_one")
        return number


class Day(fields.Field):
    """A TOML local date (YYYY-MM-DD, unquoted); not a date-time, not a string."""

    default_error_messages = _MESSAGES | {
        "invalid": "must be a date written as YYYY-MM-DD (unquoted, with no time)"}

    def _deserialize(self, value, attr, data, **kwargs):
        if not isinstance(value, datetime.date) or isinstance(value, datetime.datetime):
            raise self.make_error("invalid")
        return value


class Numbers(fields.Field):
    """A TOML array of finite numbers, as a tuple of floats."""

    default_error_messages = _MESSAGES | {"invalid": "must be a list of numbers"}

    def _deserialize(self, value, attr, data, **kwargs):
        if not isinstance(value, list):
            raise self.make_error("invalid")
        item = Number()
        errors, out = {}, []
        for n, v in enumerate(value):
            try:
                out.append(item.deserialize(v))
            except ValidationError as exc:
                errors[n] = exc.messages
        if errors:
            raise ValidationError(errors)
        return tuple(out)


class Section(fields.Nested):
    """A TOML table described by a nested schema."""

    default_error_messages = _MESSAGES


class BasisPart(Schema):
    """A part of a basis file: unknown keys are refused, a non-table is refused."""

    error_messages = {"unknown": "unknown key", "type": "must be a table"}


# ---- the sections ------------------------------------------------------------------------


class InterestField(fields.Field):
    """[interest]: a structure given inline, as a request's ``interest`` is, or a ``file``.

    An inline structure is checked by :meth:`Curve.from_mapping`, every problem at once.
    """

    default_error_messages = _MESSAGES | {
        "type": "must be a table",
        "file_kind": "a 'file' gives a spot curve, segments or forward bands: kind must be "
                     "one of spot, segments, forward"}

    def _deserialize(self, value, attr, data, **kwargs):
        if not isinstance(value, dict):
            raise self.make_error("type")
        if "file" in value:
            errors = {}
            kind = value.get("kind", "flat")
            if kind not in INTEREST_FILE_COLUMNS:
                errors["kind"] = [self.error_messages["file_kind"]]
            for key in value:
                if key not in ("kind", "file"):
                    errors[key] = ["unknown key beside 'file'"]
            try:
                file = DataPath().deserialize(value["file"])
            except ValidationError as exc:
                errors["file"] = exc.messages
            if errors:
                raise ValidationError(errors)
            return InterestSpec(kind=kind, file=file)
        mapping = dict(value)
        mapping.setdefault("kind", "flat")
        try:
            curve = Curve.from_mapping(mapping, path="")
        except CurveError as exc:
            raise ValidationError(_nested(exc.errors)) from None
        return InterestSpec(kind=curve.kind, curve=curve)


def _nested(errors: dict[str, list[str]]) -> dict:
    """Turn Curve's dotted paths (".rates.0") into nested errors ({"rates": {0: [...]}})."""
    out: dict = {}
    for key, messages in errors.items():
        parts = [int(p) if p.isdigit() else p for p in key.strip(".").split(".") if p]
        node = out
        for part in parts[:-1]:
            node = node.setdefault(part, {})
        if parts:
            node.setdefault(parts[-1], []).extend(messages)
        else:
            out.setdefault("_schema", []).extend(messages)
    return out


class MethodsSchema(BasisPart):
    fractional_age = Choice(ASSUMPTIONS, load_default="udd")
    mthly = Choice(APPROXIMATIONS, load_default="exact")


class ParametersField(fields.Field):
    """A law's parameters: an inline table of numbers; the names are checked with the law."""

    default_error_messages = _MESSAGES | {"type": "must be a table"}

    def _deserialize(self, value, attr, data, **kwargs):
        if not isinstance(value, dict):
            raise self.make_error("type")
        errors, out = {}, {}
        for key, v in value.items():
            try:
                out[key] = Number().deserialize(v)
            except ValidationError as exc:
                errors[key] = exc.messages
        if errors:
            raise ValidationError(errors)
        return out


class TableSchema(BasisPart):
    """[mortality.SEX]: ``file`` (a CSV of age,q[,q_select_0,...]) or ``law`` with parameters."""

    source = Text(required=True, blank=False,
                  error_messages={"required": "is missing: every table must name its source"})
    file = DataPath()
    law = Choice(LAWS)
    parameters = ParametersField()
    min_age = Whole(minimum=0, maximum=150)
    select_factors = Numbers()

    @validates_schema(skip_on_field_errors=False, pass_original=True)
    def _law_or_file(self, data, original_data=None, **kwargs):
        given = original_data if isinstance(original_data, dict) else {}
        if ("law" in given) == ("file" in given):
            raise ValidationError("give exactly one of 'law' or 'file'")
        errors: dict = {}
        if "file" in given:
            for key in ("parameters", "min_age", "select_factors"):
                if key in given:
                    errors[key] = ["only a 'law' takes this"]
        elif "law" in data:
            wanted = LAW_PARAMETERS[data["law"]]
            for key in ("parameters", "min_age"):
                if key not in given:
                    errors[key] = ["is missing"]
            parameters = data.get("parameters")
            if parameters is not None:
                problems = {k: ["is missing"] for k in wanted if k not in parameters}
                problems |= {k: [f"is not a parameter of {data['law']}"]
                             for k in parameters if k not in wanted}
                if problems:
                    errors["parameters"] = problems
        if errors:
            raise ValidationError(errors)

    @post_load
    def _typed(self, data, **kwargs):
        parameters = data.get("parameters")
        return TableSpec(source=data["source"], file=data.get("file"), law=data.get("law"),
                         parameters=None if parameters is None else MappingProxyType(parameters),
                         min_age=data.get("min_age"),
                         select_factors=data.get("select_factors", ()))


class MortalitySchema(BasisPart):
    """[mortality]: a unisex table, or a female and a male table."""

    error_messages = {"unknown": "is not a sex table: use unisex, or female and male",
                      "type": "must be a table"}
    female = Section(TableSchema)
    male = Section(TableSchema)
    unisex = Section(TableSchema)

    @validates_schema(skip_on_field_errors=False, pass_original=True)
    def _sexes(self, data, original_data=None, **kwargs):
        given = original_data if isinstance(original_data, dict) else {}
        sexes = tuple(s for s in SEXES if s in given)
        if sexes not in (("unisex",), ("female", "male")):
            raise ValidationError("give either 'unisex' or both 'female' and 'male'")

    @post_load
    def _typed(self, data, **kwargs):
        return MappingProxyType({s: data[s] for s in SEXES if s in data})


class ApprovalSchema(BasisPart):
    """[approval]: who approved the version (free text) and on which day."""

    by = Text(required=True, blank=False)
    on = Day(required=True)

    @post_load
    def _typed(self, data, **kwargs):
        return Approval(by=data["by"], on=data["on"])


class RoundingSchema(BasisPart):
    """[rounding]: final factors to ``places`` decimals by ``rule``."""

    places = Whole(minimum=0, maximum=MAX_PLACES, required=True)
    rule = Choice(ROUNDING_RULES, required=True)

    @post_load
    def _typed(self, data, **kwargs):
        return Rounding(places=data["places"], rule=data["rule"])


class BlendSchema(BasisPart):
    """[blends.NAME]: a weight per sex table and what is blended (q or survival)."""

    error_messages = {"unknown": "unknown key: give a weight per sex table and 'on'",
                      "type": "must be a table"}
    female = Number(non_negative=True)
    male = Number(non_negative=True)
    unisex = Number(non_negative=True)
    on = Choice(BLEND_ON, load_default="q")

    @validates_schema
    def _sum(self, data, **kwargs):
        weights = [data[s] for s in SEXES if s in data]
        if not weights:
            raise ValidationError("give a weight for each sex table")
        if abs(math.fsum(weights) - 1.0) > WEIGHT_TOLERANCE:
            raise ValidationError("the weights must sum to 1")

    @post_load
    def _typed(self, data, **kwargs):
        return {"weights": tuple((s, data[s]) for s in SEXES if s in data), "on": data["on"]}


class BlendsField(fields.Field):
    """[blends]: blended tables by name (a name like an id, not a sex)."""

    default_error_messages = _MESSAGES | {
        "type": "must be a table of blends",
        "name": "blend name not allowed: use 1 to 64 lowercase letters, digits, '.' and '-', "
                "and not a sex"}

    def _deserialize(self, value, attr, data, **kwargs):
        if not isinstance(value, dict):
            raise self.make_error("type")
        errors, out = {}, []
        for name, spec in value.items():
            if not is_name(name, MAX_ID_LENGTH) or name in SEXES:
                errors[name] = [self.error_messages["name"]]
                continue
            try:
                blend = BlendSchema().load(spec)
            except ValidationError as exc:
                errors[name] = exc.messages
                continue
            out.append(Blend(name=name, weights=blend["weights"], on=blend["on"]))
        if errors:
            raise ValidationError(errors)
        return tuple(out)


class ImprovementSchema(BasisPart):
    """[improvement]: a mortality improvement scale read from a CSV file."""

    file = DataPath(required=True)
    kind = Choice(SCALE_KINDS, required=True)
    base_year = Whole(minimum=1700, maximum=2300, required=True)
    long_term_rate = Number(below_one=True, load_default=0.0)
    long_term_from = Whole(minimum=1700, maximum=2300)
    projection = Choice(PROJECTIONS, load_default="generational")
    year = Whole(minimum=1700, maximum=2300)
    source = Text(required=True, blank=False)

    @validates_schema(skip_on_field_errors=False, pass_original=True)
    def _consistent(self, data, original_data=None, **kwargs):
        given = original_data if isinstance(original_data, dict) else {}
        errors = {}
        if "long_term_from" in given and data.get("kind") == "by-age-and-year":
            errors["long_term_from"] = ["only a by-age scale takes this: a by-age-and-year "
                                        "scale's long-term rate applies after its last year"]
        projection = data.get("projection")
        if projection == "static" and "year" not in given:
            errors["year"] = ["is missing: a static projection needs the year it projects to"]
        if projection == "generational" and "year" in given:
            errors["year"] = ["only a static projection takes this"]
        base_year = data.get("base_year")
        if base_year is not None and data.get("year") is not None and data["year"] < base_year:
            errors["year"] = ["must not be before base_year"]
        if base_year is not None and data.get("long_term_from") is not None \
                and data["long_term_from"] <= base_year:
            errors["long_term_from"] = ["must be after base_year"]
        if errors:
            raise ValidationError(errors)

    @post_load
    def _typed(self, data, **kwargs):
        return ImprovementSpec(file=data["file"], kind=data["kind"],
                               base_year=data["base_year"],
                               long_term_rate=data["long_term_rate"],
                               long_term_from=data.get("long_term_from"),
                               projection=data["projection"], year=data.get("year"),
                               source=data["source"])


class BasisSchema(BasisPart):
    """A basis file, one version of one basis."""

    id = Name(MAX_ID_LENGTH, required=True)
    version = Name(MAX_VERSION_LENGTH, required=True)
    title = Text()
    status = Choice(STATUSES, required=True)
    default = Flag(load_default=False)
    digest = Text()
    purpose = Text(load_default="")
    source = Text(required=True, blank=False,
                  error_messages={"blank": "must say where the basis comes from"})
    interest = InterestField(required=True)
    methods = Section(MethodsSchema, load_default=lambda: {"fractional_age": "udd",
                                                          "mthly": "exact"})
    mortality = Section(MortalitySchema, required=True)
    age_definition = Choice(AGE_DEFINITIONS, load_default="exact")
    effective_date = Day()
    superseded_by = Name(MAX_VERSION_LENGTH)
    approval = Section(ApprovalSchema)
    rounding = Section(RoundingSchema)
    blends = BlendsField(load_default=())
    improvement = Section(ImprovementSchema)

    @validates_schema(skip_on_field_errors=False, pass_original=True)
    def _governance(self, data, original_data=None, **kwargs):
        given = original_data if isinstance(original_data, dict) else {}
        errors = {}
        status = data.get("status")
        if status in GOVERNED:
            for key in ("approval", "effective_date"):
                if key not in given:
                    errors[key] = [f"is missing: a basis with status {status} needs "
                                   "[approval] and effective_date"]
        if status == "retired" and data.get("default") is True:
            errors["default"] = ["a retired version is never the default: remove "
                                 "default = true"]
        if data.get("superseded_by") is not None and \
                data.get("superseded_by") == data.get("version"):
            errors["superseded_by"] = ["must name another version"]
        if errors:
            raise ValidationError(errors)

    @validates_schema(skip_on_field_errors=False, pass_original=True)
    def _blends(self, data, original_data=None, **kwargs):
        blends, mortality = data.get("blends") or (), data.get("mortality")
        if not blends or mortality is None:
            return
        sexes = tuple(mortality)
        if sexes == ("unisex",):
            raise ValidationError({"blends": ["blends need a sex-distinct basis (female and "
                                              "male tables)"]})
        errors = {}
        for blend in blends:
            named = {s for s, _ in blend.weights}
            problems = {s: ["the basis has no such sex table"] for s in sorted(named)
                        if s not in sexes}
            missing = [s for s in sexes if s not in named]
            if missing:
                problems["_schema"] = [f"give a weight for every sex table of the basis "
                                       f"({', '.join(sexes)})"]
            if problems:
                errors[blend.name] = problems
        if errors:
            raise ValidationError({"blends": errors})

    @post_load
    def _typed(self, data, **kwargs):
        methods = data["methods"]
        return BasisSpec(
            id=data["id"], version=data["version"], title=data.get("title", data["id"]),
            status=data["status"], default=data["default"], digest=data.get("digest"),
            purpose=data["purpose"], source=data["source"], interest=data["interest"],
            fractional_age=methods["fractional_age"], approximation=methods["mthly"],
            mortality=data["mortality"], age_definition=data["age_definition"],
            effective_date=data.get("effective_date"), approval=data.get("approval"),
            superseded_by=data.get("superseded_by"), rounding=data.get("rounding"),
            blends=tuple(data["blends"]), improvement=data.get("improvement"))
