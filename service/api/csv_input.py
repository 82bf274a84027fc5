"""Batches sent as CSV: one item per row, the basis and options in the query string.

A spreadsheet export can be sent with ``curl --data-binary @file.csv`` and
``Content-Type: text/csv``. The rows become the same items a JSON batch holds, so the same
checks, limits and errors apply; error paths name the CSV line and column
(``rows.3.age``: line 3 of the file, the header being line 1).

Columns (all optional but ``age`` and, for annuities, ``timing``; an empty cell is an absent
field): ``id``, the first life's ``age`` (or ``date_of_birth``, with ``valuation_date`` in
the query string), ``sex``, ``duration``, ``age_adjustment``,
``mortality_multiplier``, ``flat_extra``; a second life's the same with ``_2``
(``age_2``, ``sex_2``, ...); then the item's own fields by their JSON
names (``timing``, ``frequency``, ``term``, ``term_months``, ``deferral``, ``guarantee``,
``escalation``, ``survivorship`` as a shortcut name, ``start_requires``; for insurance
``cover``, ``benefit_timing``, ``on``), and ``both``, ``first_only``, ``second_only`` for
survivorship amounts.
"""

import copy
import csv
import io

from flask import request
from marshmallow import Schema, missing

from service.api.body import _read_body, media_type
from service.api.problems import ProblemError

LIFE_FIELDS = ("age", "date_of_birth", "sex", "duration", "age_adjustment",
               "mortality_multiplier", "flat_extra")
AMOUNTS = ("both", "first_only", "second_only")
#: Columns read as numbers (whole numbers where the field is an integer).
_INTEGERS = {"frequency", "duration", "term_months", "deferral_months", "guarantee_months"}
_NUMBERS = {"age", "age_adjustment", "mortality_multiplier", "flat_extra", "term", "deferral",
            "guarantee", "escalation", "amount", *AMOUNTS}
#: Query parameters that are request options, and how to read them.
OPTIONS = {"basis": str, "interest_rate": float, "on_error": str, "buckets": str,
           "valuation_date": str}

#: For the contract: what a CSV body is.
CSV_DOC = (
    "JSON, or CSV (Content-Type: text/csv) with one item per row and the basis and options "
    "in the query string. CSV columns: id; the first life's age, sex, duration, "
    "age_adjustment, mortality_multiplier; a second life's age_2, sex_2, duration_2, "
    "age_adjustment_2, mortality_multiplier_2; the item's own fields by their JSON names "
    "(timing, frequency, term, term_months, deferral, guarantee, escalation, survivorship as "
    "a shortcut, start_requires; for insurance cover, benefit_timing, on); both, first_only, "
    "second_only for survivorship amounts. An empty cell is an absent field. Errors name the "
    "row (the file's line, the header being line 1) and column: rows.3.age.")

_OPTION_SCHEMAS: dict[type, type[Schema]] = {}


def options_schema(request_schema: type[Schema]) -> type[Schema]:
    """The query parameters a CSV batch for ``request_schema`` may give: that schema's own
    fields of the names in OPTIONS (so the JSON field and the query option are one field),
    described as options of a CSV body, never required, and without examples or defaults (a
    query option sent with a JSON body is refused, so a client that fills parameters in from
    them must not send one). Only the contract reads it; csv_batch reads the query itself."""
    if request_schema not in _OPTION_SCHEMAS:
        chosen = {}
        for name, declared in request_schema._declared_fields.items():
            if name not in OPTIONS:
                continue
            option = copy.deepcopy(declared)
            meta = {k: v for k, v in option.metadata.items() if k != "example"}
            meta["description"] = "With a CSV body: " + meta.get("description", "as the "
                                                                               "JSON field.")
            option.metadata = meta
            option.required = False
            option.allow_none = False
            option.load_default = missing
            chosen[name] = option
        _OPTION_SCHEMAS[request_schema] = Schema.from_dict(
            chosen, name=f"{request_schema.__name__.removesuffix('Schema')}CsvOptions")
    return _OPTION_SCHEMAS[request_schema]


def _cell(column: str, text: str):
    """The cell's value: a number where the field is one (left as text if it is not a number,
    so that the schema names the problem), else the text."""
    base = column.removesuffix("_2")
    if base in _INTEGERS:
        try:
            return int(text)
        except ValueError:
            pass
    if base in _NUMBERS or base in _INTEGERS:
        try:
            return float(text)
        except ValueError:
            return text
    return text


def csv_batch(max_rows: int) -> tuple[dict, list[str]]:
    """Return the request body a CSV batch stands for, and the CSV columns of each row.

    Raises a 400 for a body that is not UTF-8, a 422 for one that is not CSV with a header
    and rows, 413 beyond ``max_rows``.
    """
    charset = media_type()[1].get("charset", "utf-8").lower()
    if charset not in ("utf-8", "utf8"):
        raise ProblemError(415, f"Send the CSV as UTF-8, not {charset}.")
    try:
        text = _read_body().decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise ProblemError(400, f"The body is not valid UTF-8 (byte {exc.start}).") from None
    reader = csv.reader(io.StringIO(text))
    try:
        rows = list(reader)
    except csv.Error as exc:
        raise ProblemError(422, "The body is not readable CSV.", errors={
            "body": [str(exc)]}) from None
    rows = [row for row in rows if any(cell.strip() for cell in row)]
    if len(rows) < 2:
        raise ProblemError(422, "The CSV needs a header row and at least one item row.",
                           errors={"body": ["A header row, then one row per item."]})
    header = [name.strip() for name in rows[0]]
    if len(set(header)) != len(header):
        raise ProblemError(422, "The CSV header names a column twice.", errors={
            "body": ["Each column once."]})
    body_rows = rows[1:]
    if len(body_rows) > max_rows:
        raise ProblemError(413, f"A request may hold at most {max_rows} items; this CSV has "
                                f"{len(body_rows)} rows.", errors={"rows": [
                                    f"At most {max_rows} rows."]})
    long = {f"rows.{line}": ["More cells than the header has columns."]
            for line, row in enumerate(body_rows, start=2) if len(row) > len(header)}
    if long:
        raise ProblemError(422, "Some CSV rows are longer than the header.", errors=long)
    items = [_item({name: value.strip() for name, value in zip(header, row, strict=False)
                    if value.strip()}) for row in body_rows]
    body: dict = {"items": items}
    for name, kind in OPTIONS.items():
        if name in request.args:
            value = request.args[name]
            try:
                body[name] = kind(value)
            except ValueError:
                body[name] = value  # the schema names it
    unknown = set(request.args) - set(OPTIONS)
    if unknown:
        raise ProblemError(422, "The query string has unknown parameters.", errors={
            name: ["Unknown field."] for name in sorted(unknown)})
    return body, header


def _item(cells: dict) -> dict:
    """One row as an item: the lives gathered, amounts as survivorship, the rest as is."""
    item: dict = {}
    lives = [{}, {}]
    amounts = {}
    for column, text in cells.items():
        value = _cell(column, text)
        base, second = column.removesuffix("_2"), column.endswith("_2")
        if base in LIFE_FIELDS:
            lives[int(second)][base] = value
        elif column in AMOUNTS:
            amounts[column] = value
        else:
            item[column] = value
    item["lives"] = [life for life in lives if life]
    if amounts:
        item["survivorship"] = amounts
    return item


def row_path(path: str) -> str:
    """An item's error path in the CSV's terms: ``items.2.lives.1.age`` -> ``rows.4.age_2``
    (the header is line 1, so item n is on line n + 2)."""
    head, _, rest = path.partition(".")
    if head != "items" or not rest:
        return path
    n, _, field = rest.partition(".")
    if not n.isdigit():
        return path
    return f"rows.{int(n) + 2}" + (f".{column_of(field)}" if field else "")


def column_of(field: str) -> str:
    """The CSV column an item's field path comes from (``lives.1.age`` -> ``age_2``)."""
    parts = field.split(".")
    if parts[0] == "lives" and len(parts) >= 3 and parts[1] in ("0", "1"):
        return parts[2] + ("_2" if parts[1] == "1" else "")
    if parts[0] == "survivorship" and len(parts) == 2 and parts[1] in AMOUNTS:
        return parts[1]
    return field
