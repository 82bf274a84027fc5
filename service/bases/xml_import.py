"""Import rate tables in the actuarial profession's open XML standard into a basis skeleton.

``import_xml(file, outdir, ...)`` reads one file in the open XML standard for mortality and
other rate tables (the ``XTbML`` format) and writes, under ``outdir``:

- ``<id>-<version>.toml``: a basis skeleton with ``status = "demo"``, whose ``source``
  names the file and its SHA-256, and whose tables quote the file's own metadata;
- ``data/<id>-<version>-<sex>.csv``: each mortality table in our CSV form (``age,q`` and, for
  a select table, ``q_select_0, q_select_1, ...``);
- ``data/<id>-<version>-improvement-<n>.csv``: each improvement scale (``age,rate``, or
  ``age,<year>,<year>...``), with comment lines naming where it came from, in the form a
  basis' ``[improvement]`` reads; the skeleton lists each with an ``[improvement]`` section,
  commented out, to complete (the file does not give the base year or the long-term rate).

Everything is parsed and checked first, written to a temporary folder beside ``outdir``, loaded
back with the registry's own loader, and only then moved into place: a refused file writes
nothing, and an existing file is replaced only with ``force``.

What is accepted
----------------
Element names are matched on their local part, exactly (case-sensitive). A namespace, present
or absent, is ignored; that is the only leniency about names. Element text is stripped of
surrounding white space; XML comments and processing instructions are skipped, and CDATA is
text like any other; any encoding XML allows is read. ``(ignored)`` means the element may be
there and is not read; anything else not listed below is refused where it appears.

::

    XTbML                             the root element
      ContentClassification           exactly one
        ContentType                   required: its text decides what every table holds:
                                      containing "improvement" or "projection" (any case):
                                      improvement scales; otherwise containing "mortality":
                                      mortality rates; anything else is refused. Its ``tc``
                                      attribute is not read.
        TableName                     optional: the basis title and sources quote it
        TableIdentity, ProviderName, ProviderDomain, TableReference, TableDescription
                                      optional: quoted in the basis source
        (anything else: ignored)
      Table                           one or more, numbered 1, 2, ... in file order
        MetaData                      exactly one
          ScalingFactor               optional; only 0 is accepted (values are the rates)
          TableDescription            optional: quoted in the table's source
          AxisDef                     one or two, in order: the first is the outer axis of
                                      Values, the second the inner one
            ScaleType                 required; its text (any case, white space, '-' and
                                      '_' alike) names the axis: "age", "attained age",
                                      "issue age", "age at issue", "age at selection",
                                      "selection age", "entry age" are ages; "duration",
                                      "policy year", "policy duration", "select duration",
                                      "duration since selection", "years since
                                      selection" are durations; "calendar year" and "year"
                                      are calendar years. Its ``tc`` attribute is not read.
            AxisName                  optional: quoted in messages
            MinScaleValue             required whole number
            MaxScaleValue             required whole number, not below MinScaleValue
            Increment                 required: 1
            (anything else: ignored)
          (anything else, such as DataType or Nation: ignored)
        Values                        exactly one
          one axis:   Axis            exactly one, without ``t``, holding only
                        Y t="20"      elements: one per axis value, ``t`` the value
          two axes:   Axis t="20"     one per value of the outer axis, holding either
                        Axis          exactly one inner Axis without ``t``, or directly
                          Y t="1"     the Y elements, one per value of the inner axis

Every axis holds each whole value from MinScaleValue to MaxScaleValue exactly once, in
increasing order (``t`` is a whole number; a missing, repeated, unordered or out-of-range
value, or a count that disagrees with the definition, is refused). A Y holds a decimal
number of at most 40 characters (``0.00123``, ``1.2e-3``; no ``NaN``, ``inf``, hexadecimal or
``_``): a probability in [0, 1] in a mortality table, a rate in [-0.5, 0.5] in an improvement
scale. Ages lie in 0 to 150, durations in 1 to 100, calendar years in 1700 to 2300.

How tables are read
-------------------
In a mortality file:

- one axis over age: an ultimate table, q by attained age;
- two axes over age at selection and duration (either order): a select table. Duration 1 is
  the first year after selection, so the rate at duration d goes to ``q_select_<d-1>``, and
  the duration axis must start at 1. A select table is paired with the table that comes right
  after it in the file, which must be an ultimate table (one axis over age): together they
  are one select-and-ultimate table. A select table with no such companion is refused;
- a table by age and calendar year (a generational table) is refused, unless ``improvement``
  names it as an improvement scale (so a mortality file may carry a scale).

Our tables put a select row beside the ultimate rate of the same age, from the first age on,
so the select ages must start where the ultimate ages start and end no later; when the file's
two parts start at different ages, ``first_age`` drops the rows before it from both. Every
mortality table must close with q = 1 at its last age: one that does not is refused, unless
``close_at`` is given, which must be the age after the last and appends q = 1 there.

In an improvement file every table is an improvement scale: one axis over age (``age,rate``),
or age and calendar year in either order (rows by age, a column per year).

Each mortality table becomes one table of the basis: a single one is ``unisex``; several
need ``tables`` ({sex: table number}, where a select-and-ultimate table is numbered by its
select part), naming either one ``unisex`` table or a ``female`` and a ``male`` one. An
improvement file makes no basis (a basis needs mortality): only its scales are written.

Hostile files
-------------
The file must be a regular file of at most ``MAX_FILE_BYTES`` (the registry's limit). It is
parsed with defusedxml: a document type declaration (DTD), and so any entity definition,
internal or external (``file://`` or network), is refused before anything is expanded or
fetched, as is a reference to an undefined entity. Elements may nest at most ``MAX_DEPTH``
deep and number at most ``MAX_ELEMENTS``. Every refusal is an :class:`ImportRefused` whose
message names the file, the line and the element path, with any quoted text escaped.
"""

import hashlib
import math
import os
import re
import shutil
import tempfile
from dataclasses import dataclass
from pathlib import Path
from xml.etree.ElementTree import ParseError, TreeBuilder

import numpy as np
from defusedxml import DTDForbidden, EntitiesForbidden, ExternalReferenceForbidden
from defusedxml.ElementTree import DefusedXMLParser

from service.bases.registry import (
    MAX_ID_LENGTH,
    MAX_VERSION_LENGTH,
    UnreadableFile,
    load_basis,
    printable,
    read_regular_file,
)

#: Elements may nest this deep (the format needs six levels).
MAX_DEPTH = 16
#: Elements a file may hold: a select table of 151 ages by 100 durations has about 15,300,
#: a scale of 151 ages by 601 years about 91,000. A file at the limit takes about 100 MB more
#: memory to parse (measured: 199,900 Y elements, 2.7 s and 199 MB in all, 98 MB of it imports).
MAX_ELEMENTS = 200_000
#: Metadata text longer than this is cut (with "...") before it is quoted.
MAX_TEXT = 300
#: An improvement rate outside this range is refused (most likely given in percent).
MAX_IMPROVEMENT = 0.5
#: The interest rate of the skeleton unless another is given: a placeholder to review.
DEFAULT_INTEREST_RATE = 0.04

_NAME = re.compile(r"[a-z0-9](?:[a-z0-9.-]*[a-z0-9])?")
_NUMBER = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?")
_WHOLE = re.compile(r"[+-]?\d{1,6}")

_AGE, _DURATION, _YEAR = "age", "duration", "calendar year"
_SCALE_TYPES = {
    **dict.fromkeys(("age", "attained age", "issue age", "age at issue", "age at selection",
                     "selection age", "entry age"), _AGE),
    **dict.fromkeys(("duration", "policy year", "policy duration", "select duration",
                     "duration since selection", "years since selection"), _DURATION),
    **dict.fromkeys(("calendar year", "year"), _YEAR),
}
_RANGES = {_AGE: (0, 150), _DURATION: (0, 100), _YEAR: (1700, 2300)}  # durations: see _rates
_SEXES = ("female", "male", "unisex")


class ImportRefused(Exception):
    """The file cannot be imported; the message names the place and the reason."""


# ---- reading the XML ------------------------------------------------------------------------


class _Builder:
    """A tree builder that remembers each element's line and bounds depth and count."""

    def __init__(self, name: str):
        self.name = name
        self.tree = TreeBuilder()
        self.expat = None
        self.depth = 0
        self.count = 0
        self.lines: dict[int, int] = {}  # id(element) -> line; the tree keeps them alive

    def line(self) -> int:
        return self.expat.CurrentLineNumber if self.expat is not None else 0

    def start(self, tag, attrs):
        self.depth += 1
        self.count += 1
        if self.depth > MAX_DEPTH:
            raise ImportRefused(f"{self.name} line {self.line()}: elements nested more than "
                                f"{MAX_DEPTH} deep")
        if self.count > MAX_ELEMENTS:
            raise ImportRefused(f"{self.name} line {self.line()}: more than {MAX_ELEMENTS} "
                                "elements")
        element = self.tree.start(tag, attrs)
        self.lines[id(element)] = self.line()
        return element

    def end(self, tag):
        self.depth -= 1
        return self.tree.end(tag)

    def data(self, text):
        self.tree.data(text)

    def close(self):
        return self.tree.close()


def _parse(raw: bytes, name: str):
    """Parse ``raw`` safely; return the root element and the line of each element."""
    builder = _Builder(name)
    parser = DefusedXMLParser(target=builder, forbid_dtd=True, forbid_entities=True,
                              forbid_external=True)
    builder.expat = parser.parser
    try:
        parser.feed(raw)
        root = parser.close()
    except DTDForbidden as exc:
        raise ImportRefused(f"{name} line {builder.line()}: the file declares a document type "
                            "(DTD); DTDs are refused, since they can define entities that "
                            "expand or fetch other files") from exc
    except EntitiesForbidden as exc:
        raise ImportRefused(f"{name} line {builder.line()}: the file defines an entity; "
                            "entities are refused") from exc
    except ExternalReferenceForbidden as exc:
        raise ImportRefused(f"{name} line {builder.line()}: the file refers to an external "
                            "entity; nothing outside the file is read") from exc
    except ParseError as exc:
        line, column = getattr(exc, "position", (builder.line(), 0))
        reason = re.sub(r"^not well-formed \((.*)\)$", r"\1", str(exc).split(":")[0])
        raise ImportRefused(f"{name} line {line}, column {column}: not well-formed XML "
                            f"({printable(reason)})") from exc
    except LookupError as exc:  # an encoding Python does not know
        raise ImportRefused(f"{name} line 1: the declared encoding cannot be read "
                            f"({printable(str(exc))[:80]})") from exc
    return root, builder.lines


def _local(tag) -> str:
    """The local part of an element name: ``{namespace}Name`` and ``Name`` alike."""
    return tag.rpartition("}")[2] if isinstance(tag, str) else ""


def _quote(text: str, limit: int = 40) -> str:
    """Quote text from the file for a message: escaped, and cut when long."""
    text = text if len(text) <= limit else text[:limit] + "..."
    return f"'{printable(text)}'"


class _Doc:
    """Navigation over the parsed file that names the place of every refusal."""

    def __init__(self, name: str, lines: dict[int, int]):
        self.name = name
        self.lines = lines

    def refuse(self, where, path: str, message: str) -> ImportRefused:
        """A refusal at ``where``: an element, a line number, or None."""
        if where is None or isinstance(where, int):
            line = where or 0
        else:
            line = self.lines.get(id(where), 0)
        at = f" line {line}" if line else ""
        where = f", {path}" if path else ""
        return ImportRefused(f"{self.name}{at}{where}: {message}")

    def children(self, element, name: str) -> list:
        return [c for c in element if _local(c.tag) == name]

    def one(self, element, name: str, path: str, *, required: bool = True):
        found = self.children(element, name)
        if len(found) > 1:
            raise self.refuse(found[1], path, f"{name} appears more than once")
        if not found:
            if required:
                raise self.refuse(element, path, f"{name} is missing")
            return None
        return found[0]

    def text(self, element, name: str, path: str, *, required: bool = True) -> str | None:
        child = self.one(element, name, path, required=required)
        if child is None:
            return None
        if len(child):
            raise self.refuse(child, f"{path} > {name}", "must hold text, not elements")
        value = (child.text or "").strip()
        if required and not value:
            raise self.refuse(child, f"{path} > {name}", "is empty")
        return value

    def whole(self, element, name: str, path: str) -> int:
        text = self.text(element, name, path)
        return self.whole_text(text, self.one(element, name, path), f"{path} > {name}")

    def whole_text(self, text: str, element, path: str) -> int:
        if not _WHOLE.fullmatch(text):
            raise self.refuse(element, path, f"{_quote(text)} is not a whole number")
        return int(text)


def _metadata_text(text: str | None) -> str:
    """Collapse white space and cut metadata text to MAX_TEXT characters."""
    text = " ".join((text or "").split())
    return text if len(text) <= MAX_TEXT else text[:MAX_TEXT].rstrip() + "..."


# ---- the tables --------------------------------------------------------------------------


@dataclass(frozen=True)
class _Axis:
    kind: str  # _AGE, _DURATION or _YEAR
    first: int
    last: int
    label: str  # for messages: "AxisDef 1 (Age)"

    @property
    def size(self) -> int:
        return self.last - self.first + 1

    def values(self) -> np.ndarray:
        return np.arange(self.first, self.last + 1)


@dataclass(frozen=True)
class _Table:
    number: int
    axes: tuple[_Axis, ...]
    values: np.ndarray  # one value per axis point: shape (n,) or (n_outer, n_inner)
    description: str
    line: int

    @property
    def kinds(self) -> tuple[str, ...]:
        return tuple(a.kind for a in self.axes)

    def by(self, outer: str) -> tuple[_Axis, _Axis, np.ndarray]:
        """A two-axis table as (axis ``outer``, the other axis, values with rows by ``outer``)."""
        if self.axes[0].kind == outer:
            return self.axes[0], self.axes[1], self.values
        return self.axes[1], self.axes[0], self.values.T


@dataclass(frozen=True)
class _Content:
    kind: str  # "mortality" or "improvement"
    content_type: str
    title: str
    source_parts: tuple[str, ...]


def _content(doc: _Doc, root) -> _Content:
    path = "ContentClassification"
    section = doc.one(root, "ContentClassification", "XTbML")
    content_type = doc.text(section, "ContentType", path)
    lowered = content_type.lower()
    if "improvement" in lowered or "projection" in lowered:
        kind = "improvement"
    elif "mortality" in lowered:
        kind = "mortality"
    else:
        raise doc.refuse(doc.one(section, "ContentType", path), f"{path} > ContentType",
                         f"content type {_quote(content_type)} is neither mortality rates nor "
                         "an improvement scale")
    fields = {}
    for name in ("TableName", "ProviderName", "TableIdentity", "ProviderDomain",
                 "TableReference", "TableDescription"):
        fields[name] = _metadata_text(doc.text(section, name, path, required=False))
    parts = [fields["TableName"], fields["TableDescription"]]
    if fields["ProviderName"] or fields["ProviderDomain"]:
        parts.append("provider " + " ".join(p for p in (fields["ProviderName"],
                                                         fields["ProviderDomain"]) if p))
    if fields["TableIdentity"]:
        parts.append(f"table identity {fields['TableIdentity']}")
    if fields["TableReference"]:
        parts.append(f"reference {fields['TableReference']}")
    return _Content(kind, _metadata_text(content_type), fields["TableName"],
                    tuple(p for p in parts if p))


def _axis(doc: _Doc, definition, path: str, n: int) -> _Axis:
    scale = doc.text(definition, "ScaleType", path)
    kind = _SCALE_TYPES.get(" ".join(re.split(r"[\s_-]+", scale.lower())).strip())
    if kind is None:
        raise doc.refuse(doc.one(definition, "ScaleType", path), f"{path} > ScaleType",
                         f"scale type {_quote(scale)} is not one of age, duration or calendar "
                         "year (see the accepted names)")
    name = _metadata_text(doc.text(definition, "AxisName", path, required=False))
    label = f"AxisDef {n} ({printable(name or scale)[:40]})"
    first = doc.whole(definition, "MinScaleValue", path)
    last = doc.whole(definition, "MaxScaleValue", path)
    step = doc.whole(definition, "Increment", path)
    if step != 1:
        raise doc.refuse(doc.one(definition, "Increment", path), f"{path} > Increment",
                         f"the increment is {step}; only 1 is accepted (our tables run by "
                         "whole years)")
    low, high = _RANGES[kind]
    if not low <= first <= last <= high:
        raise doc.refuse(definition, path,
                         f"a {kind} axis must run from MinScaleValue to a MaxScaleValue no "
                         f"smaller, within {low} to {high}; got {first} to {last}")
    return _Axis(kind, first, last, label)


def _check_points(doc: _Doc, container, elements, axis: _Axis, path: str, what: str) -> None:
    """Check that ``elements`` carry ``t`` = each value of ``axis`` once, in order."""
    seen: dict[int, object] = {}
    previous = None
    for element in elements:
        raw = element.get("t")
        here = f"{path} > {what}" + (f" t={_quote(raw, 12)}" if raw is not None else "")
        if raw is None:
            raise doc.refuse(element, here, f"{what} has no 't' attribute naming its "
                                            f"{axis.kind}")
        t = doc.whole_text(raw.strip(), element, here)
        if t in seen:
            line = doc.lines.get(id(seen[t]), 0)
            raise doc.refuse(element, here, f"{axis.kind} {t} appears twice (also on line "
                                            f"{line})")
        if not axis.first <= t <= axis.last:
            raise doc.refuse(element, here, f"{axis.kind} {t} lies outside {axis.first} to "
                                            f"{axis.last}, the range of {axis.label}")
        if previous is not None and t < previous:
            raise doc.refuse(element, here, f"{axis.kind} {t} follows {previous}: values must "
                                            "be in increasing order")
        seen[t] = element
        previous = t
    if len(seen) != axis.size:
        missing = next(v for v in range(axis.first, axis.last + 1) if v not in seen)
        raise doc.refuse(elements[-1] if elements else container, path,
                         f"{axis.label} declares {axis.size} values ({axis.first} to "
                         f"{axis.last}) but {len(seen)} are given; {axis.kind} {missing} "
                         "is missing")


def _number(doc: _Doc, element, path: str, low: float, high: float, what: str) -> float:
    if len(element):
        raise doc.refuse(element, path, "Y must hold a number, not elements")
    text = (element.text or "").strip()
    if len(text) > 40:  # no rate needs more; and the pattern never meets megabytes of digits
        raise doc.refuse(element, path, f"{_quote(text)} is too long to be a rate")
    if not _NUMBER.fullmatch(text):
        raise doc.refuse(element, path, f"{_quote(text)} is not a number" if text else
                         "the value is empty")
    value = float(text)
    if not math.isfinite(value):
        raise doc.refuse(element, path, f"{_quote(text)} is not a finite number")
    if not low <= value <= high:
        raise doc.refuse(element, path, f"{what} {_quote(text)} lies outside [{low}, {high}]")
    return value


def _row(doc: _Doc, container, axis: _Axis, path: str, bounds, what: str) -> np.ndarray:
    """The Y values directly inside ``container``, one per value of ``axis``."""
    for child in container:
        if _local(child.tag) != "Y":
            raise doc.refuse(child, path, f"unexpected element {_quote(_local(child.tag))}: "
                                          "only Y elements hold values here")
    points = list(container)
    _check_points(doc, container, points, axis, path, "Y")
    return np.array([_number(doc, y, f"{path} > Y t={_quote(y.get('t'), 12)}", *bounds, what)
                     for y in points])


def _values(doc: _Doc, values, axes: tuple[_Axis, ...], path: str, bounds, what: str):
    axis_children = list(values)
    for child in axis_children:
        if _local(child.tag) != "Axis":
            raise doc.refuse(child, path, f"unexpected element {_quote(_local(child.tag))}: "
                                          "only Axis elements belong here")
    if len(axes) == 1:
        if len(axis_children) != 1:
            raise doc.refuse(values, path, f"a table with one axis has exactly one Axis in "
                                           f"Values; found {len(axis_children)}")
        axis = axis_children[0]
        if axis.get("t") is not None:
            raise doc.refuse(axis, f"{path} > Axis", "the Axis of a one-axis table has no "
                                                     "'t' attribute")
        return _row(doc, axis, axes[0], f"{path} > Axis", bounds, what)
    outer, inner = axes
    _check_points(doc, values, axis_children, outer, path, "Axis")
    rows = []
    for element in axis_children:
        here = f"{path} > Axis t={_quote(element.get('t'), 12)}"
        nested = doc.children(element, "Axis")
        if nested:
            if len(element) != 1:
                raise doc.refuse(element, here, "holds either one inner Axis or Y elements, "
                                                "not both nor several Axis")
            if nested[0].get("t") is not None:
                raise doc.refuse(nested[0], f"{here} > Axis", "an inner Axis has no 't' "
                                                              "attribute")
            element, here = nested[0], f"{here} > Axis"
        rows.append(_row(doc, element, inner, here, bounds, what))
    return np.vstack(rows)


def _table(doc: _Doc, element, number: int, kind: str) -> _Table:
    path = f"Table {number}"
    meta = doc.one(element, "MetaData", path)
    meta_path = f"{path} > MetaData"
    scaling = doc.text(meta, "ScalingFactor", meta_path, required=False)
    if scaling:
        if doc.whole_text(scaling, doc.one(meta, "ScalingFactor", meta_path),
                          f"{meta_path} > ScalingFactor") != 0:
            raise doc.refuse(doc.one(meta, "ScalingFactor", meta_path),
                             f"{meta_path} > ScalingFactor",
                             f"scaling factor {_quote(scaling)}: only 0 is accepted (values "
                             "given as the rates themselves)")
    description = _metadata_text(doc.text(meta, "TableDescription", meta_path, required=False))
    definitions = doc.children(meta, "AxisDef")
    if not definitions:
        raise doc.refuse(meta, meta_path, "AxisDef is missing: a table has one or two axes")
    if len(definitions) > 2:
        raise doc.refuse(definitions[2], meta_path, f"{len(definitions)} AxisDef elements; "
                                                    "only tables of one or two axes are read")
    axes = tuple(_axis(doc, d, f"{meta_path} > AxisDef {n}", n)
                 for n, d in enumerate(definitions, start=1))
    if len(axes) == 2 and axes[0].kind == axes[1].kind:
        raise doc.refuse(definitions[1], meta_path, f"both axes are {axes[0].kind} axes")
    if kind == "mortality":
        bounds, what = (0.0, 1.0), "q"
    else:
        bounds, what = (-MAX_IMPROVEMENT, MAX_IMPROVEMENT), "improvement rate"
    values_element = doc.one(element, "Values", path)
    values = _values(doc, values_element, axes, f"{path} > Values", bounds, what)
    for child in element:
        if _local(child.tag) not in ("MetaData", "Values"):
            raise doc.refuse(child, path, f"unexpected element {_quote(_local(child.tag))} "
                                          "in a Table")
    return _Table(number, axes, values, description, doc.lines.get(id(element), 0))


def _tables(doc: _Doc, root, kind: str) -> list[_Table]:
    elements = doc.children(root, "Table")
    if not elements:
        raise doc.refuse(root, "XTbML", "the file holds no Table")
    return [_table(doc, e, n, kind) for n, e in enumerate(elements, start=1)]


# ---- from tables to our form ---------------------------------------------------------------


@dataclass(frozen=True)
class _Mortality:
    """One table of the basis: an ultimate table, and the select table paired with it."""

    ultimate: _Table
    select: _Table | None = None

    @property
    def number(self) -> int:
        return self.select.number if self.select else self.ultimate.number

    def describe(self) -> str:
        if self.select:
            return (f"table {self.select.number} (select) with table {self.ultimate.number} "
                    "(ultimate)")
        return f"table {self.ultimate.number} (ultimate)"


@dataclass(frozen=True)
class _Rates:
    """A mortality table in our CSV form."""

    ages: np.ndarray
    q: np.ndarray
    select: np.ndarray  # rows from ages[0]; shape (rows, period), (0, 0) without select
    closed: bool  # whether q = 1 was appended


def _classify(doc: _Doc, tables: list[_Table], kind: str, improvement: set[int]):
    """Split the tables into mortality tables (select ones paired) and improvement scales."""
    unknown = sorted(improvement - {t.number for t in tables})
    if unknown:
        raise ImportRefused(f"{doc.name}: --improvement {unknown[0]}: there is no table "
                            f"{unknown[0]} (the file holds {len(tables)})")
    mortality: list[_Mortality] = []
    scales: list[_Table] = []
    i = 0
    while i < len(tables):
        table = tables[i]
        place = f"Table {table.number}"
        runs_by = " and ".join(table.kinds)
        if kind == "improvement" or table.number in improvement:
            if table.kinds not in ((_AGE,), (_AGE, _YEAR), (_YEAR, _AGE)):
                raise doc.refuse(table.line, place, "an improvement scale runs by age, or by "
                                                    f"age and calendar year, not by {runs_by}")
            scales.append(table)
            i += 1
        elif table.kinds == (_AGE,):
            mortality.append(_Mortality(table))
            i += 1
        elif set(table.kinds) == {_AGE, _DURATION}:
            companion = tables[i + 1] if i + 1 < len(tables) else None
            if (companion is None or companion.kinds != (_AGE,)
                    or companion.number in improvement):
                raise doc.refuse(table.line, place, "a select table (age by duration) must be "
                                                    "followed in the file by its ultimate "
                                                    "table (one axis over age)")
            mortality.append(_Mortality(companion, table))
            i += 2
        elif set(table.kinds) == {_AGE, _YEAR}:
            raise doc.refuse(table.line, place, "rates by age and calendar year (a "
                                                "generational table) are not imported as "
                                                "mortality; if this is an improvement scale, "
                                                f"name it as one (--improvement {table.number})")
        else:
            raise doc.refuse(table.line, place, "a mortality table runs by age, or by age and "
                                                f"duration, not by {runs_by}")
    return mortality, scales


def _rates(doc: _Doc, table: _Mortality, *, first_age: int | None,
           close_at: int | None) -> _Rates:
    """The table in our form: trimmed to ``first_age``, closed at ``close_at``, checked."""
    ult = table.ultimate
    ages = ult.axes[0].values()
    q = ult.values

    def refuse_ultimate(message: str) -> ImportRefused:
        return doc.refuse(ult.line, f"Table {ult.number}", message)

    def refuse_select(message: str) -> ImportRefused:
        return doc.refuse(table.select.line, f"Table {table.select.number}", message)

    select = np.empty((0, 0))
    select_first = int(ages[0])
    if table.select is not None:
        age_axis, duration_axis, select = table.select.by(_AGE)
        select_first = age_axis.first
        if duration_axis.first != 1:
            raise refuse_select(f"the duration axis starts at {duration_axis.first}; "
                                "durations count years since selection from 1")
    if first_age is not None:
        if not ages[0] <= first_age <= ages[-1]:
            raise refuse_ultimate(f"--first-age {first_age} lies outside the ultimate ages "
                                  f"{ages[0]} to {ages[-1]}")
        if table.select is not None:
            last_select = select_first + len(select) - 1
            if not select_first <= first_age <= last_select:
                raise refuse_select(f"--first-age {first_age} lies outside the select ages "
                                    f"{select_first} to {last_select}")
            select = select[first_age - select_first:]
            select_first = first_age
        q = q[first_age - ages[0]:]
        ages = ages[first_age - ages[0]:]
    if table.select is not None and select_first != ages[0]:
        raise refuse_select(f"the select ages start at {select_first} and the ultimate ages "
                            f"(table {ult.number}) at {ages[0]}; our tables need both from "
                            f"the same first age: give --first-age "
                            f"{max(select_first, ages[0])} to start both there")
    closed = False
    if q[-1] != 1.0:
        last = int(ages[-1])
        if close_at is None:
            raise refuse_ultimate(f"the table ends at age {last} with q = {float(q[-1])!r}, "
                                  "not 1; our tables close with q = 1 at the last age: give "
                                  f"--close-at {last + 1} to append q = 1 at age {last + 1}")
        if close_at != last + 1:
            raise refuse_ultimate(f"--close-at {close_at}: the table ends at age {last}, so "
                                  f"q = 1 can be appended only at age {last + 1}")
        ages = np.append(ages, close_at)
        q = np.append(q, 1.0)
        closed = True
    if table.select is not None and select_first + len(select) - 1 > ages[-1]:
        raise refuse_select(f"the select ages run to {select_first + len(select) - 1}, past "
                            f"the ultimate table's last age {ages[-1]}")
    return _Rates(ages, q, select, closed)


def _fmt(value: float) -> str:
    """The shortest text that reads back as the same double."""
    return repr(float(value))


def _comment(text: str) -> str:
    """One CSV comment line: escaped, so that nothing read from the file starts a new line."""
    return "# " + printable(text)


def _mortality_csv(rates: _Rates, header: list[str]) -> bytes:
    period = rates.select.shape[1] if rates.select.size else 0
    columns = ["age", "q"] + [f"q_select_{s}" for s in range(period)]
    lines = [_comment(h) for h in header] + [",".join(columns)]
    for r, (age, q) in enumerate(zip(rates.ages, rates.q, strict=True)):
        cells = [str(int(age)), _fmt(q)]
        if period:
            cells += ([_fmt(v) for v in rates.select[r]] if r < len(rates.select)
                      else [""] * period)
        lines.append(",".join(cells))
    return ("\n".join(lines) + "\n").encode("ascii")


def _scale_csv(table: _Table, header: list[str]) -> bytes:
    lines = [_comment(h) for h in header]
    if len(table.axes) == 1:
        lines.append("age,rate")
        lines += [f"{age},{_fmt(v)}" for age, v in zip(table.axes[0].values(), table.values,
                                                       strict=True)]
    else:
        ages, years, values = table.by(_AGE)
        lines.append(",".join(["age"] + [str(y) for y in years.values()]))
        lines += [",".join([str(age)] + [_fmt(v) for v in row])
                  for age, row in zip(ages.values(), values, strict=True)]
    return ("\n".join(lines) + "\n").encode("ascii")


def toml_string(text: str) -> str:
    """Return ``text`` as a TOML basic string, printable ASCII only.

    Quotes and backslashes are escaped; every other character outside printable ASCII
    (new lines, control characters, look-alike letters, direction marks) becomes a
    ``\\uXXXX`` or ``\\UXXXXXXXX`` escape, so the value reads back exactly and can neither end
    the string nor start a new key.
    """
    out = ['"']
    for ch in text:
        code = ord(ch)
        if ch in '"\\':
            out.append("\\" + ch)
        elif 0x20 <= code <= 0x7E:
            out.append(ch)
        else:
            if 0xD800 <= code <= 0xDFFF:  # not a scalar value: TOML cannot hold it
                code = 0xFFFD
            out.append(f"\\u{code:04X}" if code <= 0xFFFF else f"\\U{code:08X}")
    out.append('"')
    return "".join(out)


# ---- names ---------------------------------------------------------------------------------


def default_names(file_name: str) -> tuple[str | None, str]:
    """Derive ``(id, version)`` from a file name.

    The name without ``.xml`` is lowercased and every run of characters other than letters,
    digits and '.' becomes '-'. A final ``-<digits and dots>`` (``...-2026.1``) is the
    version, else the version is "1". The id is None when nothing usable is left.
    """
    stem = Path(file_name).name
    if stem.lower().endswith(".xml"):
        stem = stem[:-4]
    stem = re.sub(r"[^a-z0-9.]+", "-", stem.lower()).strip(".-")
    found = re.fullmatch(r"(.+?)-(\d+(?:\.\d+)*)", stem)
    basis_id, version = (found.group(1), found.group(2)) if found else (stem, "1")
    basis_id = basis_id[:MAX_ID_LENGTH].strip(".-")
    if len(version) > MAX_VERSION_LENGTH:
        version = "1"
    return (basis_id if _NAME.fullmatch(basis_id) else None), version


def _check_name(value: str, what: str, limit: int) -> None:
    if len(value) > limit or not _NAME.fullmatch(value):
        raise ImportRefused(f"{what} {ascii(value)} is not allowed: use 1 to {limit} lowercase "
                            "letters, digits, '.' and '-', starting and ending with a letter "
                            "or digit")


# ---- the import ----------------------------------------------------------------------------


@dataclass(frozen=True)
class Imported:
    """What an import wrote (or, with ``dry_run``, would write), relative to ``outdir``."""

    basis_file: str | None  # None for an improvement file: no basis is made
    data_files: tuple[str, ...]
    scale_files: tuple[str, ...]
    sha256: str
    digest: str | None  # the basis' content digest, as the registry computes it


def read_source(path) -> bytes:
    """Read the file to import: a regular file of at most MAX_FILE_BYTES."""
    path = Path(path)
    try:
        return read_regular_file(path)
    except UnreadableFile as exc:
        raise ImportRefused(f"{printable(str(path))}: the file {exc.problem}; refused") from exc


def convert(raw: bytes, file_name: str, *, basis_id: str, version: str,
            tables: dict[str, int] | None = None, improvement=(), first_age: int | None = None,
            close_at: int | None = None,
            interest_rate: float = DEFAULT_INTEREST_RATE) -> dict[str, bytes]:
    """Return the files an import writes, ``{path relative to the output folder: bytes}``.

    ``file_name`` names the file in messages and sources (its last part only). Raises
    :class:`ImportRefused`. The basis file, when there is one, comes last.
    """
    _check_name(basis_id, "id", MAX_ID_LENGTH)
    _check_name(version, "version", MAX_VERSION_LENGTH)
    if not math.isfinite(interest_rate):
        raise ImportRefused("the interest rate must be a finite number")
    name = printable(Path(file_name).name)
    sha = hashlib.sha256(raw).hexdigest()
    root, lines = _parse(raw, name)
    doc = _Doc(name, lines)
    if _local(root.tag) != "XTbML":
        raise doc.refuse(root, "", f"the root element is {_quote(_local(root.tag))}, not XTbML")
    for child in root:
        if _local(child.tag) not in ("ContentClassification", "Table"):
            raise doc.refuse(child, "XTbML", f"unexpected element {_quote(_local(child.tag))}")
    content = _content(doc, root)
    parsed = _tables(doc, root, content.kind)
    mortality, scales = _classify(doc, parsed, content.kind, set(improvement))
    origin = f"{Path(file_name).name} (SHA-256 {sha})"
    stem = f"{basis_id}-{version}"
    files: dict[str, bytes] = {}

    scale_notes = []
    for table in scales:
        rel = f"data/{stem}-improvement-{table.number}.csv"
        shape = ("by age" if len(table.axes) == 1 else "by age (rows) and calendar year "
                 "(columns)")
        header = [f"Improvement scale imported from {origin}, table {table.number}.",
                  f"{content.title or content.content_type}"
                  + (f": {table.description}" if table.description else ""),
                  f"Annual rates of mortality improvement {shape}."]
        files[rel] = _scale_csv(table, header)
        scale_notes.append((rel, table.number, shape))

    if content.kind == "improvement" or not mortality:
        if tables:
            raise ImportRefused(f"{name}: the file holds no mortality table for --table")
        if close_at is not None or first_age is not None:
            raise ImportRefused(f"{name}: --close-at and --first-age apply to mortality "
                                "tables; the file holds none")
        return files

    chosen = _assign(doc, mortality, tables)
    needed_close = False
    sections = []
    for sex, table in chosen.items():
        rates = _rates(doc, table, first_age=first_age, close_at=close_at)
        needed_close |= rates.closed
        rel = f"data/{stem}-{sex}.csv"
        parts = [table.select.description if table.select else "",
                 table.ultimate.description]
        meta = " / ".join(dict.fromkeys(p for p in parts if p)) or content.title
        header = [f"Mortality imported from {origin}, {table.describe()}.",
                  meta or content.content_type]
        if rates.closed:
            header.append(f"q = 1 at age {int(rates.ages[-1])} was appended at import "
                          "(--close-at); the file's table ends a year earlier.")
        files[rel] = _mortality_csv(rates, header)
        source = f"{Path(file_name).name}, {table.describe()}" + (f": {meta}" if meta else "")
        if rates.closed:
            source += f"; q = 1 appended at age {int(rates.ages[-1])} at import"
        if first_age is not None:
            source += f"; ages from {first_age} only"
        sections.append((sex, rel, source))
    if close_at is not None and not needed_close:
        raise ImportRefused(f"{name}: --close-at {close_at} was given but every table already "
                            "closes with q = 1")
    files[f"{stem}.toml"] = _basis_toml(basis_id, version, content, origin, sections,
                                        scale_notes, interest_rate).encode("ascii")
    return files


def _assign(doc: _Doc, mortality: list[_Mortality], tables: dict[str, int] | None):
    """Which mortality table each sex follows: {sex: table}, in the registry's order."""
    listing = "; ".join(m.describe() for m in mortality)
    if not tables:
        if len(mortality) == 1:
            return {"unisex": mortality[0]}
        raise ImportRefused(f"{doc.name}: the file holds {len(mortality)} mortality tables "
                            f"({listing}); say which is which with --table female=N --table "
                            "male=N (or --table unisex=N)")
    by_number = {m.number: m for m in mortality}
    for sex, number in tables.items():
        if sex not in _SEXES:
            raise ImportRefused(f"--table {ascii(sex)}: the sex must be one of "
                                f"{', '.join(_SEXES)}")
        if number not in by_number:
            raise ImportRefused(f"{doc.name}: --table {sex}={number}: no mortality table is "
                                f"numbered {number} (the file holds: {listing}; a select "
                                "table with its ultimate is numbered by the select table)")
    if sorted(tables) not in (["unisex"], ["female", "male"]):
        raise ImportRefused("--table: name either one unisex table or a female and a male one")
    if len(set(tables.values())) != len(tables):
        raise ImportRefused("--table: the female and male tables must be different tables")
    return {sex: by_number[tables[sex]] for sex in _SEXES if sex in tables}


def _basis_toml(basis_id: str, version: str, content: _Content, origin: str, sections,
                scale_notes, interest_rate: float) -> str:
    title = content.title or f"Imported {content.content_type}"
    source = origin + "".join(f"; {p}" for p in content.source_parts)
    lines = [
        f"# Basis skeleton written by annuity-service import-xml from {printable(origin)}.",
        "# Review it before use: the file gives the mortality only. The interest rate (from",
        "# --interest-rate) and the methods are placeholders to settle. Status stays \"demo\"",
        "# until an actuary approves the basis; then record its digest (check-tables prints it).",
        f"id = {toml_string(basis_id)}",
        f"version = {toml_string(version)}",
        f"title = {toml_string(title)}",
        'status = "demo"',
        f"purpose = {toml_string('Imported for review; not approved for any use.')}",
        f"source = {toml_string(source)}",
        "",
        "[interest]",
        'kind = "flat"',
        f"rate = {_fmt(interest_rate)}",
        "",
        "[methods]",
        'fractional_age = "udd"',
        'mthly = "exact"',
    ]
    for sex, rel, table_source in sections:
        lines += ["", f"[mortality.{sex}]", f"file = {toml_string(rel)}",
                  f"source = {toml_string(table_source)}"]
    if scale_notes:
        lines += ["", "# Improvement scales from the same file. This basis values without",
                  "# improvement until one is named: uncomment a section, then settle the base",
                  "# year (the calendar year of the tables' rates), the long-term rate and the",
                  "# projection (the file gives none of them)."]
        for rel, number, shape in scale_notes:
            kind = "by-age" if shape == "by age" else "by-age-and-year"
            lines += ["#", f"# [improvement]  # table {number}, {shape}",
                      f"# file = {toml_string(rel)}", f"# kind = {toml_string(kind)}",
                      "# base_year = 2020", "# long_term_rate = 0.0",
                      '# projection = "generational"',
                      f"# source = {toml_string(f'{origin}, table {number}')}"]
    return "\n".join(lines) + "\n"


def import_xml(path, outdir, *, basis_id: str | None = None, version: str | None = None,
               tables: dict[str, int] | None = None, improvement=(),
               first_age: int | None = None, close_at: int | None = None,
               interest_rate: float = DEFAULT_INTEREST_RATE, force: bool = False) -> Imported:
    """Import the file at ``path`` into the folder ``outdir``; see the module docstring.

    ``basis_id`` and ``version`` default to names derived from the file name
    (:func:`default_names`). Raises :class:`ImportRefused`, having written nothing.
    """
    path = Path(path)
    derived_id, derived_version = default_names(path.name)
    basis_id = basis_id if basis_id is not None else derived_id
    if basis_id is None:
        raise ImportRefused(f"cannot derive an id from the file name {ascii(path.name)}; "
                            "give --id")
    version = version if version is not None else derived_version
    raw = read_source(path)
    files = convert(raw, path.name, basis_id=basis_id, version=version, tables=tables,
                    improvement=improvement, first_age=first_age, close_at=close_at,
                    interest_rate=interest_rate)
    digest = _place(files, Path(outdir), force=force)
    scale = re.compile(re.escape(f"data/{basis_id}-{version}-improvement-") + r"\d+\.csv")
    return Imported(
        basis_file=next((rel for rel in files if rel.endswith(".toml")), None),
        data_files=tuple(rel for rel in files
                         if rel.endswith(".csv") and not scale.fullmatch(rel)),
        scale_files=tuple(rel for rel in files if scale.fullmatch(rel)),
        sha256=hashlib.sha256(raw).hexdigest(), digest=digest)


def _place(files: dict[str, bytes], outdir: Path, *, force: bool) -> str | None:
    """Write ``files`` under ``outdir`` all at once or not at all; return the basis digest.

    The files are written to a temporary folder beside ``outdir`` (inside it when its parent
    cannot be written), loaded back, then moved into place: the whole folder at once when
    ``outdir`` is new, else file by file (data first, the basis last), undone on failure.
    """
    shown = printable(str(outdir))
    exists = outdir.exists()
    if exists and not outdir.is_dir():
        raise ImportRefused(f"{shown} exists and is not a folder")
    parent = outdir.resolve().parent
    if not parent.is_dir():
        raise ImportRefused(f"{printable(str(parent))}: the folder that would hold {shown} "
                            "does not exist")
    data_dir = outdir / "data"
    if data_dir.exists() and not data_dir.is_dir():
        raise ImportRefused(f"{printable(str(data_dir))} exists and is not a folder")
    for rel in files:
        target = outdir / rel
        if target.exists() or target.is_symlink():
            if not force:
                raise ImportRefused(f"{printable(str(target))} already exists; nothing was "
                                    "written (give --force to replace it)")
            if target.is_symlink() or not target.is_file():
                raise ImportRefused(f"{printable(str(target))} is not a regular file; it is "
                                    "never replaced")
    staging = None
    for place in (parent, outdir) if exists else (parent,):
        try:
            staging = Path(tempfile.mkdtemp(prefix=".import-xml-", dir=place))
            break
        except OSError as exc:
            problem = exc.strerror or str(exc)
    if staging is None:
        raise ImportRefused(f"cannot write beside {shown} ({problem}); nothing was written")
    try:
        built = staging / "out"
        (built / "data").mkdir(parents=True)
        for rel, content in files.items():
            (built / rel).write_bytes(content)
        digest = _self_check(built, files)
        if exists:
            _move_in(built, outdir, files, staging / "replaced", force=force)
        else:
            os.rename(built, outdir)
        return digest
    except OSError as exc:
        raise ImportRefused(f"cannot write under {shown} ({exc.strerror or exc}); nothing "
                            "was written") from exc
    finally:
        shutil.rmtree(staging, ignore_errors=True)


def _self_check(built: Path, files: dict[str, bytes]) -> str | None:
    """Load the written basis with the registry's own loader; refuse what it would refuse."""
    basis = next((rel for rel in files if rel.endswith(".toml")), None)
    if basis is None:
        return None
    try:
        return load_basis(built / basis, basis, root=built).digest
    except Exception as exc:  # BasisFileError, or anything the registry would refuse
        raise ImportRefused(f"the registry would refuse the imported basis: "
                            f"{printable(str(exc))}; nothing was written") from exc


def _move_in(built: Path, outdir: Path, files: dict[str, bytes], backup: Path, *,
             force: bool) -> None:
    """Move the files into ``outdir`` (data first, the basis last); undo it all on failure."""
    data_dir = outdir / "data"
    made_data = not data_dir.exists()
    moved: list[Path] = []
    replaced: list[tuple[Path, Path]] = []
    order = sorted(files, key=lambda rel: rel.endswith(".toml"))
    try:
        data_dir.mkdir(exist_ok=True)
        for n, rel in enumerate(order):
            target = outdir / rel
            if target.exists() or target.is_symlink():
                if not force:  # it appeared after the check
                    raise FileExistsError(17, "appeared during the import", str(target))
                keep = backup / str(n)
                keep.parent.mkdir(parents=True, exist_ok=True)
                os.replace(target, keep)
                replaced.append((keep, target))
            _move_new(built / rel, target)
            moved.append(target)
    except OSError:
        for target in moved:
            target.unlink(missing_ok=True)
        for keep, target in replaced:
            os.replace(keep, target)
        if made_data:
            try:
                data_dir.rmdir()
            except OSError:
                pass
        raise


def _move_new(source: Path, target: Path) -> None:
    """Move ``source`` to ``target``, never replacing a file already there."""
    try:
        os.link(source, target)  # fails if target exists, even if it appeared just now
    except FileExistsError:
        raise
    except OSError:  # no hard links here (or across devices): check, then move
        if target.exists() or target.is_symlink():
            raise FileExistsError(17, "appeared during the import", str(target)) from None
        shutil.move(source, target)
