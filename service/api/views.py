"""The HTTP routes. Views validate, ask the engine, and attach the audit block."""

import csv
import io
import json
import math
import secrets
import time
from dataclasses import dataclass

import numpy as np
from flask import Blueprint, Response, current_app, jsonify, request
from marshmallow import Schema, validate

from service.api import examples as ex
from service.api import fastload
from service.api.audit import (
    audit_block,
    improvement_block,
    interest_block,
    use_age_definition,
    use_basis,
    use_valuation_date,
)
from service.api.body import (
    RawItems,
    flatten_errors,
    json_body,
    load,
    media_type,
    validate_capped,
)
from service.api.contract import AUDIT_CSV, CsvBody, Reply, operation
from service.api.csv_input import CSV_DOC, column_of, csv_batch, options_schema, row_path
from service.api.dump import compact_encoder, dump, json_response
from service.api.fastload import load_batch, load_items
from service.api.metrics import count_factors
from service.api.problems import MAX_ERROR_PATHS, ProblemError
from service.api.schemas import (
    SEX_VALUES,
    BasisDetailSchema,
    BasisListSchema,
    BasisPathSchema,
    FactorRequestSchema,
    FactorResponseSchema,
    HealthSchema,
    InsuranceItemSchema,
    InsuranceRequestSchema,
    InsuranceResponseSchema,
    ItemSchema,
    LifeTableQuerySchema,
    LifeTableSchema,
    ProjectionItemSchema,
    ProjectionRequestSchema,
    ProjectionResponseSchema,
    ScheduleRequestSchema,
    ScheduleResponseSchema,
)
from service.api.state import current
from service.api.warnings import request_warnings
from service.bases import UnknownBasisError
from service.bases.cohorts import CohortError, RequestTables, cohort_of
from service.engine.ages import age_at
from service.engine.annuity import (
    Item,
    Life,
    Payments,
    Valuation,
    cash_flow_schedule,
    value_annuities,
)
from service.engine.columns import TIMING_CODES, Columns, ItemBatch
from service.engine.curves import Curve
from service.engine.errors import FieldError, ItemError, WorkLimitError
from service.engine.insurance import Assurance, Cover, insurance_values
from service.engine.lifetable import life_table_columns
from service.engine.projection import Projection, project
from service.engine.rounding import round_factor
from service.engine.spread import annuity_spread

bp = Blueprint("api", __name__)

_factor_request = FactorRequestSchema()
_insurance_request = InsuranceRequestSchema()
_item_schema = ItemSchema()
_projection_request = ProjectionRequestSchema()
_projection_item_schema = ProjectionItemSchema()
_insurance_item_schema = InsuranceItemSchema()
_schedule_request = ScheduleRequestSchema()
_life_table_query = LifeTableQuerySchema()


def _respond(schema, body: dict) -> Response:
    """A JSON answer, dumped through the schema the contract documents for it."""
    return json_response(dump(schema, body))


def _registry(app=None):
    return (current_app if app is None else app).extensions["registry"]


def _basis(ref: str, app=None):
    try:
        return _registry(app).resolve(ref)
    except UnknownBasisError:
        raise ProblemError(404, f"No loaded basis answers to '{ref}'. GET /v1/bases lists "
                                "them.", title="Unknown basis") from None


def _finite(values, path: str):
    values = np.asarray(values, dtype=float)
    if not np.isfinite(values).all():
        raise ProblemError(422, "The result is not a finite number for these inputs.",
                           errors={path: ["The value is not finite."]})


def _finite_items(values, places):
    """Refuse a batch whose value for some item is not finite, naming the first such item
    (``values``: an array, or a list of floats)."""
    if type(values) is list:
        if not all(map(math.isfinite, values)):
            first = next(n for n, v in enumerate(values) if not math.isfinite(v))
            _finite(values[first], f"items.{places[first]}")
        return
    if len(values) <= _FEW and all(map(math.isfinite, values.tolist())):
        return  # (a few values: checked as floats faster than as an array)
    bad = np.flatnonzero(~np.isfinite(values))
    if bad.size:
        _finite(values, f"items.{places[int(bad[0])]}")


#: Up to this many values are checked one by one rather than as an array.
_FEW = 16


def _summary(basis, registry) -> dict:
    return {"id": basis.id, "version": basis.version, "title": basis.title,
            "status": basis.status, "digest": basis.digest,
            "default": registry.is_default(basis)}


@bp.get("/v1/bases")
@operation("listBases", "List the loaded bases.", auth=True, problems=(401,),
           responses={200: Reply(BasisListSchema, "Every loaded basis version.")})
def list_bases():
    """List the loaded bases."""
    reg = _registry()
    return _respond(BasisListSchema, {"bases": [_summary(b, reg) for b in reg.listing()],
                    "audit": audit_block()})


@bp.get("/v1/bases/<ref>")
@operation("getBasis", "One basis in full.", auth=True, path=BasisPathSchema,
           parameter_examples=ex.BASIS_REF, problems=(401, 404),
           responses={200: Reply(BasisDetailSchema, "The basis.")})
def get_basis(ref: str):
    """One basis in full."""
    reg = _registry()
    basis = _basis(ref)
    use_basis(basis)
    mortality = []
    for sex in basis.sexes:
        spec = basis.mortality[sex]
        entry = {"sex": sex, "kind": "law" if "law" in spec else "file",
                 "first_age": spec["first_age"], "last_age": spec["last_age"],
                 "select_period": spec["select_period"], "source": spec["source"]}
        for key in ("law", "file"):
            if key in spec:
                entry[key] = spec[key]
        if "parameters" in spec:
            entry["parameters"] = dict(spec["parameters"])
        if "select_factors" in spec:
            entry["select_factors"] = list(spec["select_factors"])
        mortality.append(entry)
    body = _summary(basis, reg) | {
        "purpose": basis.purpose,
        "source": basis.source,
        "sex_distinct": basis.sex_distinct,
        "mortality": mortality,
        "blends": [{"name": b.name, "weights": dict(b.weights), "on": b.on}
                   for b in basis.blends],
        "tables": list(basis.names),
        "improvement": (None if basis.improvement is None
                        else improvement_block(basis.improvement)),
        "age_definition": basis.age_definition,
        "rounding": (None if basis.rounding is None else
                     {"places": basis.rounding.places, "rule": basis.rounding.rule}),
        "effective_date": _iso(basis.effective_date),
        "approval": (None if basis.approval is None else
                     {"by": basis.approval.by, "on": _iso(basis.approval.on)}),
        "superseded_by": basis.superseded_by,
        "defaults": {"interest": interest_block(basis.interest, "basis"),
                     "fractional_age": basis.fractional_age, "mthly": basis.approximation},
        "audit": audit_block(),
    }
    return _respond(BasisDetailSchema, body)


def _iso(date) -> str | None:
    return None if date is None else date.isoformat()


_LIFE_TABLE_COLUMNS = ("age", "q", "p", "l", "d", "e", "e_complete")
_COMMUTATION_COLUMNS = ("D", "N", "C", "M", "S", "R", "a_due")


@bp.get("/v1/bases/<ref>/life-table")
@operation("getLifeTable", "The basis' table as rows (age, q, p, l, d, curtate expectation) for "
                           "one life followed from from_age; with duration, a life selected "
                           "duration years before from_age.",
           auth=True, path=BasisPathSchema, query=LifeTableQuerySchema,
           parameter_examples=ex.LIFE_TABLE, problems=(401, 404, 406, 422),
           responses={200: Reply(LifeTableSchema, "The rows; as CSV with Accept: text/csv (the "
                                                  "audit block then travels in X- headers).",
                                 csv=(*AUDIT_CSV, "X-Radix", "X-Radix-Age"))})
def life_table(ref: str):
    """The basis' table as rows for one life followed from an age."""
    wants_csv = _wants_csv()
    basis = _basis(ref)
    query = load(_life_table_query, request.args.to_dict())
    commutation = query["columns"] == "commutation"
    rate = query["interest_rate"]
    use_basis(basis, None if rate is None else Curve.flat(rate))
    index = _table_of(basis, query["sex"])
    if index is None:
        raise ProblemError(422, "This basis has no such table." if query["sex"] else
                           "This basis is sex-distinct: give sex.",
                           errors={"sex": [_no_table(basis)]})
    table, cohort = _life_table_of(basis, index, query)
    # A table without select rates has no durations: the path is the ultimate one.
    duration = query["duration"] if table.select_period else None
    default_from = table.first_age
    if duration is not None:
        default_from = table.select_first_age + duration
    from_age = query["from_age"] if query["from_age"] is not None else default_from
    if commutation and rate is None:
        rate = basis.interest_rate
        if rate is None:
            raise ProblemError(422, "Commutation columns need a flat rate.", errors={
                "interest_rate": [f"This basis discounts on a {basis.interest.kind} "
                                  "structure: give a flat interest_rate."]})
    try:
        cols = life_table_columns(
            table, from_age, to_age=query["to_age"], duration=duration,
            assumption=basis.fractional_age, rate=rate if commutation else None)
    except FieldError as exc:
        raise ProblemError(422, "The ages asked for lie outside the table.",
                           errors={exc.field: [exc.message]}) from None
    columns = {name: getattr(cols, name) for name in _LIFE_TABLE_COLUMNS}
    if commutation:
        columns |= cols.commutation
    names = list(columns)
    lists = [np.asarray(columns[n]).tolist() for n in names]
    lists[0] = [int(a) for a in lists[0]]
    if wants_csv:
        return _csv_response(names, lists, {"X-Radix": repr(cols.radix),
                                            "X-Radix-Age": str(cols.radix_age)})
    rows = [dict(zip(names, values, strict=True)) for values in zip(*lists, strict=True)]
    cohort_fields = ({} if query["age"] is None else {"age": query["age"]}) | (
        {} if cohort is None else {"cohort": cohort})
    return _respond(LifeTableSchema, {"basis": basis.ref, "sex": basis.names[index],
                                      "duration": duration,
                    **cohort_fields, "radix": cols.radix, "radix_age": cols.radix_age,
                    "rows": rows, "audit": audit_block()})


def _life_table_of(basis, index: int, query: dict):
    """The table the life-table rows follow and, for a generational improvement scale, the
    cohort; the query's age is set from its date of birth where it gave one."""
    dated = query["valuation_date"]
    use_valuation_date(dated)
    improvement = basis.improvement
    if query["age"] is not None and query["date_of_birth"] is not None:
        raise ProblemError(422, "The query has invalid fields.", errors={
            "date_of_birth": ["Give age or date_of_birth, not both."]})
    if query["date_of_birth"] is not None:
        if dated is None:
            raise ProblemError(422, "A date of birth needs a valuation date.", errors={
                "valuation_date": ["Required with date_of_birth."]})
        use_age_definition(basis)
        try:
            query["age"] = age_at(query["date_of_birth"], dated, basis.age_definition)
        except ValueError as exc:
            raise ProblemError(422, "The query has invalid fields.", errors={
                "date_of_birth": [f"{str(exc).capitalize()}."]}) from None
    if query["age"] is not None and query["from_age"] is None:
        query["from_age"] = int(np.floor(query["age"] + 1e-9))
    if improvement is None or improvement.projection != "generational":
        return RequestTables(basis).tables[index], None
    if dated is None or query["age"] is None:
        raise ProblemError(422, "This basis projects mortality by cohort: give the life.",
                           errors={"valuation_date" if dated is None else "age": [
                               f"Required: {basis.ref} projects mortality generationally; "
                               "give valuation_date and age (or date_of_birth)."]})
    tables = RequestTables(basis, dated)
    try:
        table = tables.tables[tables.index(index, query["age"])]
    except CohortError as exc:
        raise ProblemError(422, "The query has invalid fields.", errors={
            "valuation_date": [f"{str(exc).capitalize()}."]}) from None
    return table, cohort_of(dated, query["age"])


def _wants_csv(http=None) -> bool:
    """Whether the client asked for CSV; 406 when it accepts neither JSON nor CSV (``http``:
    the request, where the caller holds it)."""
    if http is None:
        http = request._get_current_object()
    header = http.environ.get("HTTP_ACCEPT")
    if header is None:
        return False  # no Accept header: JSON
    best = _BEST_OF_ACCEPT.get(header, _UNSEEN)
    if best is _UNSEEN:
        if not http.accept_mimetypes:
            return False  # an empty Accept header: JSON
        best = http.accept_mimetypes.best_match(["application/json", "text/csv"])
        if len(header) <= 200:
            if len(_BEST_OF_ACCEPT) >= 256:
                _BEST_OF_ACCEPT.clear()
            _BEST_OF_ACCEPT[header] = best
    if best is None:
        raise ProblemError(406, "This answer is available as application/json or text/csv.")
    return best == "text/csv"


#: The best match of an Accept header seen before (it depends on the header alone); most
#: clients send one of a few.
_BEST_OF_ACCEPT: dict[str, str | None] = {}
_UNSEEN = object()


def _column_items(basis, items, valuation_date):
    """As :func:`_engine_items` for annuity items, with the plain ones (one life, given by
    age or by a date of birth the valuation date follows; discrete or continuous payments,
    start_requires 'any', no measures or spread, a table the basis has for the life (its
    cohort's under a generational scale) and an age inside it) held as engine columns rather
    than objects; the others go through :func:`_engine_items` (which words any problem)."""
    if len(items) < 2:
        return None
    tables = RequestTables(basis, valuation_date)
    plain, rest, placed = [], [], []
    table_of: dict = {}
    for n, item in enumerate(items):
        lives = item["lives"]
        if len(lives) == 1 and item["timing"] in TIMING_CODES \
                and item["start_requires"] == "any" \
                and not item["measures"] and "spread" not in item \
                and "survivorship" not in item:
            life = lives[0]
            sex = life["sex"]
            if sex not in table_of:
                table_of[sex] = _table_of(basis, sex)
            base = table_of[sex]
            if base is not None:
                at = _plain_place(basis, tables, base, life, item, valuation_date)
                if at is not None:
                    plain.append(n)
                    placed.append(at)
                    continue
        rest.append(n)
    if not plain:
        return None
    lives = [items[n]["lives"][0] for n in plain]
    cols = {name: [life[name] for life in lives] for name in
            ("age", "duration", "age_adjustment", "mortality_multiplier", "flat_extra")}
    chosen = [items[n] for n in plain]
    cols |= {name: [item[name] for item in chosen] for name in
             ("timing", "frequency", "term", "deferral", "guarantee", "escalation")}
    cols["table"] = placed
    columns = Columns.from_dict(cols)
    rated = columns.age + columns.age_adjustment
    first = np.array([t.first_age for t in tables.tables], dtype=float)[columns.table]
    last = np.array([t.last_age for t in tables.tables], dtype=float)[columns.table]
    outside = ~((first - _SNAP <= rated) & (rated <= last + _SNAP))
    if outside.any():  # worded item by item
        keep = ~outside
        rest = sorted(rest + np.asarray(plain)[outside].tolist())
        plain = np.asarray(plain)[keep].tolist()
        columns = columns.take(keep)
    others, refused, _ = _engine_items(basis, [items[n] for n in rest], valuation_date,
                                       tables=tables)
    batch = ItemBatch(len(items), np.asarray(plain, dtype=np.intp), columns,
                      dict(zip(rest, others, strict=True)))
    return batch, {rest[k]: problems for k, problems in refused.items()}, tables.tables


def _plain_place(basis, tables, base, life, item, valuation_date) -> int | None:
    """The index in the request's ``tables`` of the table a plain life follows (its age from
    its date of birth first, recorded in the item's ``ages`` as :func:`_engine_items` does),
    or None where :func:`_engine_items` must word a problem with it."""
    if life["date_of_birth"] is not None and (
            valuation_date is None or _age_from_birth(basis, item, 0, valuation_date)):
        return None
    try:
        return tables.index(base, life["age"] + life["age_adjustment"])
    except CohortError:
        return None


def _age_from_birth(basis, item, k, valuation_date) -> str | None:
    """Give life ``k`` of ``item`` its age from its date of birth by the basis' age
    definition, recorded in the item's ``ages`` for the result; return the problem with the
    date (its age is then 0), or None."""
    life = item["lives"][k]
    problem = None
    try:
        life["age"] = age_at(life["date_of_birth"], valuation_date, basis.age_definition)
    except ValueError as exc:
        problem = f"{str(exc).capitalize()}."
        life["age"] = 0.0
    item.setdefault("ages", [None] * len(item["lives"]))[k] = life["age"]
    use_age_definition(basis)
    return problem


def _engine_items(basis, items, valuation_date, build=None, *, tables=None):
    """Turn loaded items into engine items; return them, ``{n: {path: messages}}`` for the
    items a basis cannot value as given (paths within the item), and the request's tables.

    A life given by date of birth gets its age by the basis' age definition (recorded in the
    item's ``ages`` for the result); under a generational improvement scale each life follows
    its cohort's table. ``build(item, lives)`` makes the engine item from a loaded item and
    its engine lives (default: an annuity item). ``tables``: the request's tables where some
    of its items are already placed in them (else new ones).
    """
    if tables is None:
        tables = RequestTables(basis, valuation_date)
    out = []
    refused: dict[int, dict[str, list[str]]] = {}
    for n, item in enumerate(items):
        lives = []
        problems = {}
        for k, life in enumerate(item["lives"]):
            index = _table_of(basis, life["sex"])
            if index is None:
                problems[f"lives.{k}.sex"] = [_no_table(basis)]
                index = 0
            if life["date_of_birth"] is not None:
                problem = _age_from_birth(basis, item, k, valuation_date)
                if problem is not None:
                    problems[f"lives.{k}.date_of_birth"] = [problem]
            rated = life["age"] + life["age_adjustment"]
            try:
                index = tables.index(index, rated)
            except CohortError as exc:
                problems[f"lives.{k}"] = [f"{str(exc).capitalize()}."]
                index = tables.placeholder()
            table = tables.tables[index]
            if not table.first_age - _SNAP <= rated <= table.last_age + _SNAP \
                    and not any(path.startswith(f"lives.{k}") for path in problems):
                # As the engine words it, so that both checks read alike.
                problems[f"lives.{k}.age"] = [f"age {rated:g} is outside the table's ages "
                                              f"{table.first_age} to {table.last_age}"]
            lives.append(Life(age=life["age"], table=index, duration=life["duration"],
                              age_adjustment=life["age_adjustment"],
                              mortality_multiplier=life["mortality_multiplier"],
                              flat_extra=life["flat_extra"]))
        if problems:
            refused[n] = problems
        out.append((build or _annuity_item)(item, tuple(lives)))
    return out, refused, tables.tables


#: An age within this of a whole age is that age (as the engine reads ages).
_SNAP = 1e-9


def _table_of(basis, name) -> int | None:
    """Which basis table a life named ``name`` follows (None: the basis has no such table).
    A unisex basis ignores a sex (with a warning), but not a name it does not know."""
    if not basis.sex_distinct:
        return 0 if name is None or name in SEX_VALUES else None
    return basis.table_index(name)


def _no_table(basis) -> str:
    if not basis.sex_distinct:
        return "This basis is unisex: give female, male or no sex."
    return f"This basis is sex-distinct: give one of {', '.join(basis.names)}."


def _dates_needed(basis, data: dict, items) -> None:
    """A 422 when the request lacks a valuation date that the basis or a life needs."""
    if data["valuation_date"] is not None:
        return
    improvement = basis.improvement
    if improvement is not None and improvement.projection == "generational":
        raise ProblemError(422, "This basis needs a valuation date.", errors={
            "valuation_date": [
                f"Required: {basis.ref} projects mortality generationally with the "
                f"improvement scale {improvement.file}, so the factors depend on the date."]})
    for n, item in enumerate(items):
        for k, life in enumerate(item["lives"]):
            if life["date_of_birth"] is not None:
                raise ProblemError(422, "A date of birth needs a valuation date.", errors={
                    "valuation_date": [f"Required: items.{n}.lives.{k} gives date_of_birth."]})


def _annuity_item(item, lives) -> Item:
    payments = Payments(timing=item["timing"], frequency=item["frequency"], term=item["term"],
                        deferral=item["deferral"], guarantee=item["guarantee"],
                        escalation=item["escalation"])
    survivorship = item.get("survivorship", (1.0, 1.0, 1.0))  # (one life: it is paid)
    return Item(lives, payments, survivorship, item["start_requires"])


def _assurance(item, lives) -> Assurance:
    return Assurance(lives, Cover(cover=item["cover"], term=item["term"],
                                  deferral=item["deferral"], escalation=item["escalation"],
                                  benefit_timing=item["benefit_timing"],
                                  frequency=item["frequency"],
                                  on=item.get("on", "first-death")))


def _valuation(basis, data, state=None):
    """The valuation settings of a request: the basis' methods, and its interest unless the
    request gives ``interest`` or ``interest_rate`` (recorded in the request's ``state``,
    where the caller holds it)."""
    given = curve = data.get("interest")
    if data["interest_rate"] is not None:
        if curve is not None:
            raise ProblemError(422, "The request has invalid fields.", errors={
                "interest": ["Give interest or interest_rate, not both."]})
        curve = _flat_curve(data["interest_rate"])
    if state is None:
        state = current()
    use_basis(basis, curve, state)
    use_valuation_date(data.get("valuation_date"), state)
    if given is not None:  # (a structure of the request's own: a new object each time)
        return Valuation(curve, basis.fractional_age, basis.approximation)
    return _valuation_of(basis.interest if curve is None else curve, basis.fractional_age,
                         basis.approximation)


#: Valuations made so far, by the id of their interest structure and their methods, with
#: the structure itself (so that its id is not reused while it is here). A Valuation is
#: immutable, and most requests use their basis' own or one of a few flat rates (a structure
#: given in the request is a new object each time: its Valuation is not kept).
_VALUATIONS: dict[tuple, tuple] = {}
_VALUATIONS_KEPT = 1024


def _valuation_of(curve: Curve, fractional_age: str, approximation: str) -> Valuation:
    key = (id(curve), fractional_age, approximation)
    found = _VALUATIONS.get(key)
    if found is None or found[0] is not curve:
        if len(_VALUATIONS) >= _VALUATIONS_KEPT:
            _VALUATIONS.clear()
        found = _VALUATIONS[key] = (curve, Valuation(curve, fractional_age, approximation))
    return found[1]


#: Flat request structures by the repr of their rate (a Curve is immutable, and equal reprs
#: are equal floats, signed zeros apart), so that a request giving interest_rate reuses one.
_FLAT_CURVES: dict[str, Curve] = {}
_FLAT_CURVES_KEPT = 512


def _flat_curve(rate: float) -> Curve:
    key = repr(rate)
    curve = _FLAT_CURVES.get(key)
    if curve is None:
        curve = Curve.flat(rate)
        if len(_FLAT_CURVES) >= _FLAT_CURVES_KEPT:
            _FLAT_CURVES.clear()
        _FLAT_CURVES[key] = curve
    return curve


def _item_problem(exc: ItemError, prefix: str) -> ProblemError:
    errors = {f"{prefix}{path}": msgs for path, msgs in exc.errors.items()}
    return ProblemError(422, "Some items are impossible under this basis.", errors=errors)


@dataclass
class _Request:
    """A batch request read and checked: the valid items (``items``, loaded, and ``engine``)
    with their places in the request, and the refused ones (on_error 'per-item')."""

    data: dict
    basis: object
    tables: list  # the tables the engine items' lives follow (by index)
    valuation: Valuation
    count: int
    places: list[int]
    items: list[dict]
    engine: list
    refused: dict[int, dict[str, list[str]]]
    raw_ids: dict[int, str]
    warnings: list[dict]
    limit: int
    deadline: float
    from_csv: bool = False
    state: object = None  # this request's state (service.api.state), None: look it up

    def drop(self, errors: dict[str, list[str]]) -> None:
        """Refuse the items named by engine error paths (``"3.lives.0.age"``, 3 counting the
        valid items), keeping the others."""
        bad: dict[int, dict[str, list[str]]] = {}
        for path, messages in errors.items():
            n, _, rest = path.partition(".")
            bad.setdefault(int(n), {})[rest] = messages
        for n, item_errors in bad.items():
            self.refused[self.places[n]] = item_errors
        keep = [n for n in range(len(self.places)) if n not in bad]
        self.places = [self.places[n] for n in keep]
        self.items = [self.items[n] for n in keep]
        self.engine = [self.engine[n] for n in keep]

    def answer(self, results: list[dict], wants_csv: bool, schema=FactorResponseSchema):
        """Results in request order (refusals in their places), as JSON or CSV."""
        placed: list[dict | None] = [None] * self.count
        for place, result in zip(self.places, results, strict=True):
            placed[place] = result
        budget = MAX_ERROR_PATHS  # error paths listed over all the refused items
        for place, errors in sorted(self.refused.items()):
            if self.from_csv:  # name the row's columns
                errors = {column_of(path): msgs for path, msgs in errors.items()}
            if len(errors) > budget:
                errors = dict(list(errors.items())[:budget]) or {"item": [
                    f"Not listed: the answer lists at most {MAX_ERROR_PATHS} error paths."]}
            budget = max(budget - len(errors), 0)
            refusal = {"problem": {"title": "This item was refused.", "errors": errors}}
            placed[place] = ({"id": self.raw_ids[place]} | refusal if place in self.raw_ids
                             else refusal)
        if wants_csv:
            return _results_csv(placed, self.warnings)
        return _results_json(dump(schema, {
            "results": placed, "valued": len(results), "refused": len(self.refused),
            "warnings": self.warnings, "audit": audit_block(self.state)}),
            self.state.app)


#: Results from which method blocks are encoded once (fewer encode faster as they are: about
#: 30 was the break-even measured, bench/README.md).
_SHARED_BLOCKS_FROM = 32


def _results_json(body: dict, app=None) -> Response:
    """``jsonify(body)``, byte for byte, with each distinct ``method`` block of the results
    (most items share one: the engine makes one per kind of valuation) encoded once.

    Each block is swapped for a placeholder string that no input can give (a per-response
    token, and every occurrence counted: if any placeholder appears more often than it was
    placed, the body is encoded plainly), the rest encoded as jsonify does, and the
    placeholders' JSON replaced by the blocks' JSON."""
    if len(body["results"]) < _SHARED_BLOCKS_FROM:
        # (a few blocks encode faster than their placeholders are swapped)
        return json_response(body, app)
    if app is None:
        app = current_app._get_current_object()
    encoder = compact_encoder(app)
    if encoder is None:
        return jsonify(body)  # indented: the blocks would need the indentation of their place
    token = secrets.token_hex(8)
    blocks: dict[tuple, list] = {}  # a method block's items -> [placeholder, the dict, uses]
    same: dict[int, tuple] = {}  # id of a block met -> (the block, its entry)
    swapped = []
    for result in body["results"]:
        method = result.get("method") if result is not None else None
        if method is None:
            swapped.append(result)
            continue
        met = same.get(id(method))
        if met is not None and met[0] is method:
            entry = met[1]
        else:
            try:
                key = tuple(method.items())  # equal blocks, not only the same dict
                entry = blocks.get(key)
            except TypeError:  # a block holding a list or object: encoded plainly
                return jsonify(body)
            if entry is None:
                entry = blocks[key] = [f"\x00{token}.{len(blocks)}", method, 0]
            same[id(method)] = (method, entry)
        entry[2] += 1
        swapped.append(result | {"method": entry[0]})
    text = encoder.encode(body | {"results": swapped})
    for placeholder, method, uses in blocks.values():
        quoted = encoder.encode(placeholder)
        if text.count(quoted) != uses:
            return jsonify(body)
        text = text.replace(quoted, encoder.encode(method))
    return app.response_class(f"{text}\n", mimetype=app.json.mimetype)


def _batch(schema, item_schema, build=None, columns: bool = False, state=None) -> _Request:
    """Read a batch request; with on_error 'per-item' keep the valid items and set aside the
    others, else refuse the whole batch at the first problem found (all of them listed).
    ``state``: the request's state, where the caller holds it."""
    if state is None:
        state = current()
    media = media_type(state.http.environ)
    from_csv = media[0] == "text/csv"
    try:
        return _read_batch(schema, item_schema, build, state, media, columns)
    except ProblemError as exc:
        if from_csv and exc.errors:
            exc.errors = {row_path(path): msgs for path, msgs in exc.errors.items()}
        raise


def _read_batch(schema, item_schema, build, state, media: tuple,
                columns: bool) -> "_Request":
    config = state.app.config
    limit = config["MAX_ITEMS"]
    from_csv = media[0] == "text/csv"
    http = state.http
    if not from_csv and http.environ.get("QUERY_STRING") and http.args:
        raise ProblemError(422, "Query parameters are options of a CSV body.", errors={
            name: ["Not read with a JSON body: give it in the body."]
            for name in sorted(http.args)[:MAX_ERROR_PATHS]})
    body = csv_batch(limit)[0] if from_csv else json_body(media, http)
    count = len(body["items"]) if isinstance(body, dict) and isinstance(
        body.get("items"), list) else 0
    if count > limit:
        raise ProblemError(413, f"A request may hold at most {limit} items; this one has "
                                f"{count}.", errors={"items": [f"At most {limit} items."]})
    per_item = isinstance(body, dict) and body.get("on_error") == "per-item"
    refused: dict[int, dict[str, list[str]]] = {}
    if per_item:
        data = _load_top(schema, body)
        raw = data["items"]
        data["items"], places, errors = load_batch(item_schema, raw)
        refused = {n: flatten_errors(messages) for n, messages in errors.items()}
    else:
        data = _load_whole(schema, item_schema, body, build)
        raw = data["items"]
        places = list(range(len(raw)))
    state.item_count = len(raw)
    basis = _basis(data["basis"], state.app)
    valuation = _valuation(basis, data, state)
    _dates_needed(basis, data, data["items"])
    held = _column_items(basis, data["items"], data["valuation_date"]) if columns else None
    engine, unknown, tables = held or _engine_items(basis, data["items"],
                                                    data["valuation_date"], build)
    if unknown and not per_item:
        raise ProblemError(422, "The request has invalid fields.", errors={
            f"items.{places[n]}.{path}": msgs for n, item in unknown.items()
            for path, msgs in item.items()})
    raw_ids = {n: item["id"] for n, item in enumerate(raw)
               if isinstance(item, dict) and isinstance(item.get("id"), str)}
    req = _Request(data, basis, tables, valuation, len(raw), places, data["items"], engine,
                   refused, raw_ids, [], config["MAX_EVALUATION_POINTS"],
                   time.monotonic() + config["DEADLINE_SECONDS"], from_csv, state)
    if unknown:
        req.drop({f"{n}.{path}": msgs for n, item in unknown.items()
                  for path, msgs in item.items()})
    req.warnings = request_warnings(basis, data, [(f"items.{place}", item) for place, item
                                                  in zip(req.places, req.items, strict=True)])
    return req


def _load_whole(schema, item_schema, body, build) -> dict:
    """Load a batch whose first problem refuses it: the request's own fields by the schema
    with the items left raw, then the items one by one (fast where the fast loader vouches
    for them). At the first item refused, the whole body goes through ``load(schema, ...)``
    as before, which words every problem (and the basis adds its own)."""
    if isinstance(body, dict):
        top = _fast_top(schema, body)
        if top is None:
            top, _, _, _ = validate_capped(_top_schema(schema), body)
        if top is not None:
            items, _, errors = load_batch(item_schema, top["items"], stop_at_first=True)
            if not errors:
                top["items"] = items
                return top
    try:
        return load(schema, body)
    except ProblemError as exc:
        raise _with_basis_errors(exc, schema, item_schema, body, build) from None


def _with_basis_errors(exc: ProblemError, schema, item_schema, body, build) -> ProblemError:
    """The schema's 422 for a batch, with the basis' objections to the items the schema
    passed added in item order, so that one answer lists every problem (up to the cap).

    Only items up to the last one the schema check reached are checked against the basis; a
    request whose own fields (basis, interest, dates) are invalid keeps the schema's answer.
    """
    errors = exc.errors or {}
    if exc.status != 422 or not errors or any(not p.startswith("items.") for p in errors):
        return exc
    try:
        data = load(_top_schema(schema), body)
        basis = _basis(data["basis"])
        _valuation(basis, data)
        _dates_needed(basis, data, [])
    except ProblemError:
        return exc
    named = {int(path.split(".")[1]) for path in errors}
    reach = len(data["items"]) if len(errors) < MAX_ERROR_PATHS else max(named) + 1
    unnamed = [n for n in range(reach) if n not in named]
    items, kept, _ = load_items(item_schema, [data["items"][n] for n in unnamed])
    places = [unnamed[k] for k in kept]
    if not any(life["date_of_birth"] is not None for item in items for life in item["lives"]) \
            or data["valuation_date"] is not None:
        _, refused, _ = _engine_items(basis, items, data["valuation_date"], build)
    else:
        refused = {}
    found = [(n, path, msgs) for path, msgs in errors.items()
             for n in [int(path.split(".")[1])]]
    found += [(places[k], f"items.{places[k]}.{path}", msgs)
              for k, item_errors in refused.items() for path, msgs in item_errors.items()]
    found.sort(key=lambda entry: entry[0])  # stable: each item's paths keep their order
    merged = dict((path, msgs) for _, path, msgs in found[:MAX_ERROR_PATHS])
    exc.errors_omitted = (exc.errors_omitted or 0) + max(len(found) - MAX_ERROR_PATHS, 0)
    exc.errors = merged
    return exc


def _fast_top(schema, body: dict) -> dict | None:
    """The request's own fields (items left raw) as the schema loads them, by the fast loader
    (which gives marshmallow's answer or declines); None when it declines."""
    loader = fastload.fast_loader(_top_schema(schema))
    return None if loader is None else loader.load(body)


def _load_fast(schema, body) -> dict:
    """``load(schema, body)``: the same answer (by the fast loader where it vouches for the
    body) or the same problem (marshmallow's)."""
    loader = fastload.fast_loader(schema) if isinstance(body, dict) else None
    data = None if loader is None else loader.load(body)
    return data if data is not None else load(schema, body)


def _load_top(schema, body) -> dict:
    """``load(_top_schema(schema), body)``: the same answer or the same problem."""
    top = _fast_top(schema, body) if isinstance(body, dict) else None
    return top if top is not None else load(_top_schema(schema), body)


_TOP_SCHEMAS: dict[type, Schema] = {}


def _top_schema(schema: Schema) -> Schema:
    """The request schema with its items left unchecked (each is loaded on its own)."""
    cls = type(schema)
    if cls not in _TOP_SCHEMAS:
        _TOP_SCHEMAS[cls] = cls.from_dict({"items": RawItems(
            required=True, validate=validate.Length(min=1))})()
    return _TOP_SCHEMAS[cls]


def _value_batch(req: _Request, value, what: str = "Valuing this batch"):
    """Run ``value(engine items)``; None when every item was refused. With on_error
    'per-item' the items the engine finds impossible are set aside and the rest valued."""
    if not req.engine:
        return None
    try:
        return _valued(req, value, req.data["on_error"] == "per-item")
    except WorkLimitError as exc:
        raise _too_much(exc, what) from None


def _valued(req: _Request, value, per_item: bool):
    try:
        return value(req.engine)
    except ItemError as exc:
        if not per_item:
            problem = _item_problem(_placed(exc, req), "items.")
            if req.from_csv:
                problem.errors = {row_path(path): msgs for path, msgs in problem.errors.items()}
            raise problem from None
        req.drop(exc.errors)
    if not req.engine:
        return None
    return value(req.engine)


def _placed(exc: ItemError, req: _Request) -> ItemError:
    """The engine's paths renumbered by the items' places in the request."""
    return ItemError({f"{req.places[int(path.partition('.')[0])]}.{path.partition('.')[2]}":
                      msgs for path, msgs in exc.errors.items()})


@bp.post("/v1/annuity-factors")
@operation("annuityFactors", "One or many annuity factors under one basis (at most {max_items} "
                             "items).",
           auth=True, body=FactorRequestSchema, examples=ex.ANNUITY_FACTORS,
           csv_body=CsvBody(CSV_DOC, ex.CSV_ANNUITIES, options_schema(FactorRequestSchema)),
           problems=(400, 401, 404, 406, 413, 415, 422, 503),
           responses={200: Reply(FactorResponseSchema, "results[i] answers items[i]. With "
                                 "Accept: text/csv one row per item (id, value, the measures "
                                 "and spread asked for, the method), the audit block in X- "
                                 "headers.", csv=(*AUDIT_CSV, "X-Warnings"))})
def annuity_factors():
    """One or many annuity factors under one basis."""
    state = current()
    wants_csv = _wants_csv(state.http)
    req = _batch(_factor_request, _item_schema, columns=True, state=state)
    valuation = req.valuation
    asked = [item["measures"] for item in req.items]
    key_rates = sum("key_rate_durations" in measures for measures in asked)
    entries, cap = key_rates * valuation.curve.size, state.app.config["MAX_KEY_RATE_ENTRIES"]
    if entries > cap:
        raise ProblemError(413, f"{key_rates} items ask for key-rate durations on "
                                f"{valuation.curve.size} factors: {entries} entries, more "
                                f"than the {cap} one answer may hold. Split the batch.",
                           title="Batch too large to value")

    def value(engine):
        asked_now = [bool(item["measures"]) for item in req.items]
        # (no item asking for measures: the engine's default, "none", without a mask to scan)
        return value_annuities(req.tables, engine, valuation, max_work=req.limit,
                               deadline=req.deadline,
                               measure=asked_now if any(asked_now) else None,
                               key_rates=key_rates > 0, listed=True)

    valued = _value_batch(req, value)
    if valued is None:
        return req.answer([], wants_csv)
    _finite_items(valued.value, req.places)
    count_factors(req.basis.ref, "factor", len(req.engine))
    results = [_with_id(item, {"value": v, "method": valued.methods[code]}, req.basis)
               for item, v, code in zip(req.items, valued.value, valued.method_code,
                                        strict=True)]
    if valued.measures is not None:
        _add_measures(results, [item["measures"] for item in req.items], valued.measures,
                      valuation.curve.factors())
    _add_spread(results, req.tables, req.engine, [item.get("spread") for item in req.items],
                valuation, req.limit, req.deadline)
    return req.answer(results, wants_csv)


def _add_spread(results, tables, items, asked, valuation, limit, deadline):
    """Add the standard deviation and percentiles that items asked for to their results."""
    which = [n for n, spread in enumerate(asked) if spread]
    if not which:
        return
    levels = [asked[n]["percentiles"] for n in which]
    try:
        got = annuity_spread(tables, [items[n] for n in which], valuation, levels,
                             max_work=limit, deadline=deadline)
    except WorkLimitError as exc:
        raise _too_much(exc, "The spread asked for") from None
    for row, n in enumerate(which):
        results[n]["standard_deviation"] = float(got.standard_deviation[row])
        results[n]["percentiles"] = [
            {"percentile": p, "value": float(v)}
            for p, v in zip(levels[row], got.percentiles[row], strict=True)]


@bp.post("/v1/insurance-factors")
@operation("insuranceFactors", "One or many insurance factors under one basis (at most "
                               "{max_items} items), each with its second moment.",
           auth=True, body=InsuranceRequestSchema, examples=ex.INSURANCE_FACTORS,
           csv_body=CsvBody(CSV_DOC, ex.CSV_INSURANCE, options_schema(InsuranceRequestSchema)),
           problems=(400, 401, 404, 406, 413, 415, 422, 503),
           responses={200: Reply(InsuranceResponseSchema, "results[i] answers items[i]; as CSV "
                                 "(one row per item) with Accept: text/csv.",
                                 csv=(*AUDIT_CSV, "X-Warnings"))})
def insurance_factors():
    """One or many insurance factors, with their second moments, under one basis."""
    wants_csv = _wants_csv()
    req = _batch(_insurance_request, _insurance_item_schema, _assurance)

    def value(engine):
        return insurance_values(req.tables, engine, req.valuation, max_work=req.limit,
                                deadline=req.deadline)

    valued = _value_batch(req, value)
    if valued is None:
        return req.answer([], wants_csv, InsuranceResponseSchema)
    _finite_items(valued.value, req.places)
    _finite_items(valued.second_moment, req.places)
    count_factors(req.basis.ref, "insurance", len(req.engine))
    results = [_with_id(item, {"value": v, "second_moment": v2, "method": valued.methods[code]},
                        req.basis)
               for item, v, v2, code in zip(req.items, valued.value.tolist(),
                                            valued.second_moment.tolist(),
                                            valued.method_code.tolist(), strict=True)]
    return req.answer(results, wants_csv, InsuranceResponseSchema)


@bp.post("/v1/cash-flow-projections")
@operation("cashFlowProjections", "The expected payments of a portfolio of annuities (at most "
                                  "{max_items} items, each with its annual amount), aggregated "
                                  "by month, year or payment time, with their present values; "
                                  "as CSV with Accept: text/csv.",
           auth=True, body=ProjectionRequestSchema, examples=ex.CASH_FLOW_PROJECTIONS,
           csv_body=CsvBody(CSV_DOC + " A CSV projection adds an amount column.",
                            ex.CSV_PROJECTIONS, options_schema(ProjectionRequestSchema)),
           problems=(400, 401, 404, 406, 413, 415, 422, 503),
           responses={200: Reply(ProjectionResponseSchema, "One row per period with a payment.",
                                 csv=(*AUDIT_CSV, "X-Total-Payment", "X-Total-Present-Value",
                                      "X-Items-Valued", "X-Items-Refused", "X-Warnings"))})
def cash_flow_projections():
    """The expected payments of a portfolio of annuities, aggregated by period."""
    wants_csv = _wants_csv()
    req = _batch(_projection_request, _projection_item_schema)
    buckets = req.data["buckets"]

    def value(engine):
        return project(req.tables, engine, [item["amount"] for item in req.items],
                       req.valuation, buckets, max_work=req.limit, deadline=req.deadline)

    projected = _value_batch(req, value, "Projecting this portfolio")
    if projected is None:
        projected = Projection(*(np.zeros(0),) * 4)
    columns = {"start": projected.start, "end": projected.end,
               "payment": projected.expected, "present_value": projected.present_value}
    for name, values in columns.items():
        _finite(values, f"rows.{name}")
    count_factors(req.basis.ref, "projection", len(req.engine))
    totals = {"payment": float(projected.expected.sum()),
              "present_value": float(projected.present_value.sum())}
    names = list(columns)
    lists = [columns[n].tolist() for n in names]
    if wants_csv:
        return _csv_response(names, lists, {
            "X-Total-Payment": repr(totals["payment"]),
            "X-Total-Present-Value": repr(totals["present_value"]),
            "X-Items-Valued": str(len(req.engine)), "X-Items-Refused": str(len(req.refused))},
            req.warnings)
    refused = [{"item": place, **({"id": req.raw_ids[place]} if place in req.raw_ids else {}),
                "problem": {"title": "This item was refused.", "errors": errors}}
               for place, errors in sorted(req.refused.items())]
    return _respond(ProjectionResponseSchema, {"rows": [dict(zip(names, row, strict=True))
                             for row in zip(*lists, strict=True)],
                    "totals": totals, "valued": len(req.engine), "refused": len(refused),
                    "refused_items": refused, "warnings": req.warnings,
                    "audit": audit_block()})


_SCALARS = ("second_moment", "duration", "convexity", "standard_deviation")
_METHOD_COLUMNS = ("approximation", "fractional_age", "evaluation")


def _key_rate_label(factor: dict) -> str:
    if "term" in factor:
        return f"key_rate_{factor['term']:g}"
    end = "" if factor["to"] is None else format(factor["to"], "g")
    return f"key_rate_{factor['from']:g}_{end}"


def _results_csv(results: list[dict], warnings) -> Response:
    """One row per item: id, value (and second moment), the measures and spread asked for,
    and the method; the audit block travels in headers. Cells not asked for are empty."""
    rows = []
    for r in results:
        row = {"id": r.get("id"), "value": r.get("value")}
        if "rounded" in r:
            row["rounded"] = r["rounded"]
        row |= {f"age{'' if k == 0 else f'_{k + 1}'}": a
                for k, a in enumerate(r.get("ages", ())) if a is not None}
        row |= {k: r[k] for k in _SCALARS if k in r}
        row |= {_key_rate_label(k): k["duration"] for k in r.get("key_rate_durations", ())}
        row |= {f"percentile_{p['percentile']:g}": p["value"] for p in r.get("percentiles", ())}
        row |= {k: r["method"][k] for k in _METHOD_COLUMNS if "method" in r}
        if "problem" in r:
            row["problem"] = "; ".join(f"{path}: {' '.join(msgs)}"
                                       for path, msgs in r["problem"]["errors"].items())
        rows.append(row)
    names = list(dict.fromkeys(k for row in rows for k in row))
    # The method columns (and any problem) last, whatever the first row held.
    tail = [*_METHOD_COLUMNS, *(["problem"] if "problem" in names else [])]
    names = [n for n in names if n not in tail] + tail
    lists = [["" if row.get(n) is None else row[n] for row in rows] for n in names]
    return _csv_response(names, lists, {}, warnings)


def _with_id(item: dict, result: dict, basis=None) -> dict:
    """The result, headed by the item's id where it gave one, with the value rounded by the
    basis' rule (if it has one) beside it and the ages derived from dates of birth."""
    head = {"id": item["id"]} if "id" in item else {}
    rounding = basis.rounding if basis is not None else None
    if rounding is not None:
        head["value"] = result["value"]
        head["rounded"] = round_factor(result["value"], rounding.places, rounding.rule)
    if "ages" in item:
        result = result | {"ages": item["ages"]}
    return head | result


def _too_much(exc: WorkLimitError, what: str) -> ProblemError:
    return ProblemError(413, f"{what} needs {exc.work} units of work (about one per payment "
                             f"date or continuous segment, weighted by cost); one request may "
                             f"need at most {exc.limit}. Split the batch.",
                        title="Batch too large to value")


def _add_measures(results, asked, got, factors):
    """Add the sensitivities that items asked for to their results (null where undefined:
    a value of 0)."""

    def number(x):
        return float(x) if np.isfinite(x) else None

    for n, measures in enumerate(asked):
        result = results[n]
        if "duration" in measures:
            result["duration"] = number(got.duration[n])
        if "convexity" in measures:
            result["convexity"] = number(got.convexity[n])
        if "key_rate_durations" in measures:
            result["key_rate_durations"] = [
                factor | {"duration": number(d)}
                for factor, d in zip(factors, got.key_rate_durations[n], strict=True)]


@bp.post("/v1/cash-flow-schedules")
@operation("cashFlowSchedules", "The expected payment schedule behind one factor, as JSON or as "
                                "CSV (Accept: text/csv; the audit block then travels in X- "
                                "headers).",
           auth=True, body=ScheduleRequestSchema, examples=ex.CASH_FLOW_SCHEDULES,
           problems=(400, 401, 404, 406, 413, 415, 422),
           responses={200: Reply(ScheduleResponseSchema, "One row per possible payment date "
                                 "(one per year of the window for continuous payments).",
                                 csv=(*AUDIT_CSV, "X-Method-Evaluation",
                                      "X-Method-Fractional-Age", "X-Method-Approximation",
                                      "X-Total-Present-Value", "X-Factor", "X-Amount",
                                      "X-Warnings"))})
def cash_flow_schedules():
    """The expected payment schedule behind one factor."""
    wants_csv = _wants_csv()
    body = json_body()
    data = _load_fast(_schedule_request, body)
    current().item_count = 1
    basis = _basis(data["basis"])
    valuation = _valuation(basis, data)
    _dates_needed(basis, data, [data["item"]])
    (item,), unknown, tables = _engine_items(basis, [data["item"]], data["valuation_date"])
    if unknown:
        raise ProblemError(422, "The request has invalid fields.", errors={
            f"item.{path}": msgs for path, msgs in unknown[0].items()})
    warnings = request_warnings(basis, data, [("item", data["item"])])
    try:
        sched = cash_flow_schedule(tables, item, valuation,
                                   max_work=current_app.config["MAX_SCHEDULE_ROWS"])
    except WorkLimitError as exc:
        raise ProblemError(413, f"This schedule would have {exc.work} rows; one schedule may "
                                f"have at most {exc.limit}. Ask for fewer payments a year or a "
                                "shorter term.", title="Schedule too large") from None
    except ItemError as exc:
        raise ProblemError(422, "The item is impossible under this basis.", errors={
            "item." + path.partition(".")[2]: msgs for path, msgs in exc.errors.items()}) \
            from None
    count_factors(basis.ref, "schedule")
    amount = data["amount"]
    columns = {"time": sched.time, "payment": sched.payment * amount,
               "probability": sched.probability, "discount": sched.discount,
               "present_value": sched.present_value * amount}
    two = len(item.lives) == 2
    if two:
        columns |= {"both_alive": sched.both, "first_only": sched.first_only,
                    "second_only": sched.second_only}
    for name, values in columns.items():
        _finite(values, f"rows.{name}")
    factor = float(np.sum(sched.present_value))
    total = factor * amount
    method = sched.method
    names = list(columns)
    lists = [columns[n].tolist() for n in names]
    if wants_csv:
        return _csv_response(names, lists, {
            "X-Method-Evaluation": method["evaluation"],
            "X-Method-Fractional-Age": method["fractional_age"],
            "X-Method-Approximation": method["approximation"],
            "X-Total-Present-Value": repr(total), "X-Factor": repr(factor),
            "X-Amount": repr(amount)}, warnings)
    rows = [dict(zip(names, values, strict=True)) for values in zip(*lists, strict=True)]
    return _respond(ScheduleResponseSchema, {"rows": rows,
                    "totals": {"present_value": total, "factor": factor, "amount": amount},
                    "method": method, "warnings": warnings, "audit": audit_block()})


def _csv_response(names, lists, extra: dict, warnings=()):
    """Answer columns as CSV, with the audit block (and ``extra``) in response headers."""
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(names)
    writer.writerows(zip(*[[repr(v) if isinstance(v, float) else v for v in col]
                           for col in lists], strict=True))
    response = Response(out.getvalue(), mimetype="text/csv")
    audit = audit_block()
    headers = {
        "X-Basis-Id": audit["basis"]["id"],
        "X-Basis-Version": audit["basis"]["version"],
        "X-Basis-Digest": audit["basis"]["digest"],
        "X-Basis-Status": audit["basis"]["status"],
        **({"X-Valuation-Date": audit["valuation_date"]} if "valuation_date" in audit else {}),
        **({"X-Improvement": _improvement_header(audit["basis"]["improvement"])}
           if "improvement" in audit["basis"] else {}),
        "X-Interest-Kind": audit["interest"]["kind"],
        **({"X-Interest-Rate": repr(audit["interest"]["rate"])}
           if "rate" in audit["interest"] else {}),
        **_structure_header(audit["interest"]),
        "X-Interest-Digest": audit["interest"]["digest"],
        "X-Interest-Source": audit["interest"]["source"],
        **extra,
        "X-Service": f"{audit['service']['name']}/{audit['service']['version']}",
        "X-Computed-At": audit["computed_at"],
    }
    if warnings:
        listed = warnings[:_HEADER_WARNINGS]
        text = " | ".join(f"{w['path']}: {w['message']}" for w in listed)
        if len(warnings) > len(listed):
            text += f" | and {len(warnings) - len(listed)} more (ask for JSON to see them)"
        headers["X-Warnings"] = text
    response.headers.update(headers)
    return response


def _improvement_header(block: dict) -> str:
    """X-Improvement: the scale file, its projection and base year (and static year)."""
    year = f"; year={block['year']}" if block["year"] is not None else ""
    return (f"{block['scale']}; projection={block['projection']}; "
            f"base_year={block['base_year']}{year}")


#: Response headers stay well inside a proxy's header buffer (32 KiB in deploy/nginx).
_HEADER_WARNINGS = 5
_HEADER_STRUCTURE_LIMIT = 2000


def _structure_header(interest: dict) -> dict:
    """X-Interest-Structure for a curve or bands: the structure as compact JSON, unless it is
    too long for a header (its digest, always sent, then names it)."""
    if "rate" in interest:
        return {}
    text = json.dumps({k: v for k, v in interest.items() if k not in ("digest", "source")},
                      separators=(",", ":"))
    return {"X-Interest-Structure": text} if len(text) <= _HEADER_STRUCTURE_LIMIT else {}


@bp.get("/livez")
@operation("livez", "Liveness: the process answers.",
           responses={200: Reply(HealthSchema, "Alive.", example=ex.LIVE)})
def livez():
    """Liveness: the process answers."""
    return _respond(HealthSchema, {"status": "ok"})


@bp.get("/readyz")
@operation("readyz", "Readiness: 200 when every required basis is loaded and verified, else 503.",
           responses={200: Reply(HealthSchema, "Ready."),
                      503: Reply(HealthSchema, "Not ready: a required basis is missing or "
                                               "refused.")})
def readyz():
    """Readiness: every required basis is loaded and verified, and at least one basis is."""
    reg = _registry()
    missing = []
    for ref in current_app.config["REQUIRED_BASES"]:
        try:
            reg.resolve(ref)
        except UnknownBasisError:
            missing.append(ref)
    ready = not missing and bool(reg.bases)
    body = {"status": "ready" if ready else "not ready", "bases": len(reg.bases),
            "refused": [f"{r.file}: {r.reason}" for r in reg.refused], "missing": missing}
    response = _respond(HealthSchema, body)
    response.status_code = 200 if ready else 503
    return response


