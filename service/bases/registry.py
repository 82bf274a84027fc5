"""Load every basis file under a tables folder, refusing any that cannot be verified.

A basis file is TOML, one file per basis version, anywhere under the folder (``*.toml``).
Mortality data are CSV files named relative to the basis file, or a law with parameters.
Every file read must lie inside the folder once symbolic links are resolved.

Each refused file gets a short reason, made only of fixed words, names the service chose
and line numbers (never text read from a file), which ``/readyz`` may show to anyone; the
detail, which may quote the file, goes to the log and to ``check-tables``. A bad file is
refused, never raised, whatever is in it; the others still load. Two files claiming the
same id and version are both refused.
"""

import datetime
import hashlib
import io
import json
import logging
import math
import os
import re
import stat
import tomllib
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType

import numpy as np
import pandas as pd
from marshmallow import ValidationError

from service.bases.schema import (
    INTEREST_FILE_COLUMNS,
    LAW_PARAMETERS,
    LAWS,
    MAX_ID_LENGTH,
    MAX_VERSION_LENGTH,
    SEXES,
    STATUSES,
    Approval,
    BasisSchema,
    BasisSpec,
    Blend,
    Improvement,
    ImprovementSpec,
    InterestSpec,
    Rounding,
    TableSpec,
)
from service.engine.curves import Curve, CurveError
from service.engine.errors import TableError
from service.engine.tables import MortalityTable, table_from_law

__all__ = ["LAWS", "LAW_PARAMETERS", "MAX_ID_LENGTH", "MAX_VERSION_LENGTH", "SEXES",
           "STATUSES", "Approval", "Basis", "BasisFileError", "Blend", "Improvement",
           "Problem", "Refusal", "Registry", "Rounding", "UnknownBasisError", "content_digest",
           "load_basis", "load_registry", "printable", "read_regular_file"]

log = logging.getLogger(__name__)

#: The largest basis or data file read (the shipped ones are a few kilobytes).
MAX_FILE_BYTES = 16 * 1024 * 1024
#: Nesting a basis file may have (the format itself needs four levels).
MAX_DEPTH = 8


@dataclass(frozen=True)
class Problem:
    """One problem found in a basis file: ``detail`` (file, line, may quote the file) for the
    log and check-tables, ``reason`` (fixed words, names and line numbers only) for anyone."""

    detail: str
    reason: str


class BasisFileError(Exception):
    """A basis file or its data cannot be accepted.

    The message (the detail) names where and why and may quote the file; ``reason`` says
    the same briefly with no text taken from any file. ``problems`` lists every problem
    found, one by one (a single problem when the file could not be read further).
    """

    def __init__(self, detail: str, *, reason: str, problems=()):
        super().__init__(detail)
        self.reason = reason
        self.problems = tuple(problems) or (Problem(detail, reason),)

    @classmethod
    def of(cls, problems) -> "BasisFileError":
        """One error for several problems: the first one's reason, counting the rest."""
        problems = tuple(problems)
        first, more = problems[0], len(problems) - 1
        if not more:
            return cls(first.detail, reason=first.reason, problems=problems)
        detail = f"{len(problems)} problems: " + "; ".join(p.detail for p in problems)
        reason = f"{first.reason} (and {more} more problem{'s' if more > 1 else ''})"
        return cls(detail, reason=reason, problems=problems)


class UnknownBasisError(LookupError):
    """No loaded basis answers to the reference."""


@dataclass(frozen=True, eq=False)
class Basis:
    """One approved (or demo, or retired) basis version, immutable after loading."""

    id: str
    version: str
    title: str
    status: str
    default: bool
    purpose: str
    source: str
    digest: str
    interest: Curve
    fractional_age: str
    approximation: str
    sexes: tuple[str, ...]
    tables: tuple[MortalityTable, ...]
    mortality: MappingProxyType = field(repr=False)  # per sex: how the table was given, source
    file: str = ""
    age_definition: str = "exact"
    effective_date: datetime.date | None = None
    approval: Approval | None = None
    superseded_by: str | None = None
    rounding: Rounding | None = None
    blends: tuple[Blend, ...] = ()
    improvement: Improvement | None = None
    #: The sexes, then the blend names; ``tables`` is aligned with it.
    names: tuple[str, ...] = ()

    def __post_init__(self):
        if self.names != self.sexes + tuple(b.name for b in self.blends):
            raise ValueError("a Basis names its tables: its sexes, then its blends")

    @property
    def ref(self) -> str:
        return f"{self.id}@{self.version}"

    @property
    def sex_distinct(self) -> bool:
        return self.sexes != ("unisex",)

    @property
    def interest_rate(self) -> float | None:
        """The basis' flat rate; None where its interest is a curve or bands."""
        return self.interest.rates[0] if self.interest.kind == "flat" else None

    def table_index(self, name: str | None) -> int | None:
        """Return which table a life of sex (or blend) ``name`` follows, or None when the
        basis has none; on a unisex basis every sex follows the one table."""
        if name in self.names:
            return self.names.index(name)
        return None if self.sex_distinct else 0


@dataclass(frozen=True)
class Refusal:
    """A refused basis file: ``reason`` is safe to show anyone, ``detail`` is for the log."""

    file: str
    reason: str
    detail: str = ""
    #: Each problem's detail, when the file had more than one.
    problems: tuple[str, ...] = ()


def printable(text: str) -> str:
    """Return ``text`` with everything but printable ASCII escaped (for logs and terminals)."""
    if text.isascii() and text.isprintable():
        return text
    return "".join(c if " " <= c <= "~" else c.encode("unicode_escape").decode("ascii")
                   for c in text)


def _refuse(refused: list, file: str, reason: str, detail: str, problems=()) -> None:
    problems = tuple(problems) if len(problems) > 1 else ()
    refused.append(Refusal(file, reason, detail, problems))
    log.warning("refused basis file %s: %s", printable(file), printable(detail))


@dataclass(frozen=True, eq=False)
class Registry:
    """Every loaded basis, by (id, version), and the default version of each id."""

    bases: MappingProxyType  # (id, version) -> Basis
    defaults: MappingProxyType  # id -> version
    refused: tuple[Refusal, ...] = ()

    def resolve(self, ref: str) -> Basis:
        """Return the basis for ``ID`` (its default version) or ``ID@VERSION``."""
        basis_id, at, version = ref.partition("@")
        if not at:
            version = self.defaults.get(basis_id, "")
        basis = self.bases.get((basis_id, version))
        if basis is None:
            raise UnknownBasisError(ref)
        return basis

    def listing(self) -> list[Basis]:
        return [self.bases[k] for k in sorted(self.bases)]

    def default_version(self, basis_id: str) -> str | None:
        """The version ``basis_id`` alone resolves to: the one marked ``default = true``, else
        the latest version that is not retired; None when there is none."""
        return self.defaults.get(basis_id)

    def is_default(self, basis: Basis) -> bool:
        """Whether ``basis`` is the default version of its id (the one its id resolves to)."""
        return self.bases.get((basis.id, basis.version)) is basis and \
            self.default_version(basis.id) == basis.version


def load_registry(directory) -> Registry:
    """Load every ``*.toml`` basis under ``directory``.

    Raises ``OSError`` (``NotADirectoryError``, ``PermissionError``) when the folder itself
    cannot be read; a bad basis file is refused and logged, never raised.
    """
    root = Path(directory)
    if not root.is_dir():
        raise NotADirectoryError(f"tables folder {root} is not a readable directory")
    real_root = root.resolve()
    files = sorted(_basis_files(root))
    loaded: list[Basis] = []
    refused: list[Refusal] = []
    for path in files:
        name = str(path.relative_to(root))
        try:
            loaded.append(load_basis(path, name, root=real_root))
        except BasisFileError as exc:
            _refuse(refused, name, exc.reason, str(exc), [p.detail for p in exc.problems])
        except Exception as exc:  # a bad file is refused, never raised
            _refuse(refused, name, "the file could not be loaded",
                    f"{name}: could not be loaded ({type(exc).__name__}: {exc})")
            log.debug("loading %s failed", printable(name), exc_info=True)
    claims: dict[tuple[str, str], list[Basis]] = {}
    for basis in loaded:
        claims.setdefault((basis.id, basis.version), []).append(basis)
    bases: dict[tuple[str, str], Basis] = {}
    for key, claimants in claims.items():
        if len(claimants) == 1:
            bases[key] = claimants[0]
            continue
        # Neither file can be trusted to be the one meant: refuse every claimant.
        names = [b.file for b in claimants]
        for basis in claimants:
            others = ", ".join(n for n in names if n != basis.file)
            _refuse(refused, basis.file, "another file defines the same id and version",
                    f"{basis.file}: {basis.ref} is also defined by {others}; every file "
                    f"defining it is refused ({', '.join(names)})")
    defaults, conflicts = _defaults(bases.values())
    for basis in conflicts:
        del bases[(basis.id, basis.version)]
        _refuse(refused, basis.file, "another version of this id is also marked default",
                f"{basis.file}: another version of {basis.id} is also marked default")
    defaults, _ = _defaults(bases.values())
    return Registry(MappingProxyType(bases), MappingProxyType(defaults), tuple(refused))


def _basis_files(root: Path):
    """Every ``*.toml`` under ``root``; a folder that cannot be listed raises OSError."""

    def fail(error: OSError):
        raise OSError(error.errno, f"cannot read tables folder {error.filename}: "
                                   f"{error.strerror}")

    os.listdir(root)  # the top folder itself must be listable
    for folder, _, names in os.walk(root, onerror=fail):
        for name in names:
            if name.endswith(".toml"):
                yield Path(folder) / name


def _version_key(version: str):
    """Order versions naturally: 2026.9 before 2026.10."""
    return [(0, int(part), "") if part.isdigit() else (1, 0, part)
            for part in re.split(r"(\d+)", version) if part]


def _defaults(bases):
    marked: dict[str, list[Basis]] = {}
    by_id: dict[str, list[Basis]] = {}
    for b in bases:
        by_id.setdefault(b.id, []).append(b)
        if b.default:
            marked.setdefault(b.id, []).append(b)
    defaults = {}
    conflicts = []
    for basis_id, versions in by_id.items():
        chosen = marked.get(basis_id, [])
        if len(chosen) > 1:
            conflicts.extend(chosen)
        elif chosen:
            defaults[basis_id] = chosen[0].version
        else:
            # No version is marked: the latest non-retired one is the default.
            live = sorted((b.version for b in versions if b.status != "retired"),
                          key=_version_key)
            if live:
                defaults[basis_id] = live[-1]
    return defaults, conflicts


class UnreadableFile(Exception):
    """A file that is not a readable regular file of at most MAX_FILE_BYTES; ``problem`` says
    which, in words that follow "the file"."""

    def __init__(self, problem: str, brief: str):
        self.problem = problem
        self.brief = brief
        super().__init__(problem)


def read_regular_file(path: Path) -> bytes:
    """Read a regular file of at most MAX_FILE_BYTES, never more than that from the disk."""
    try:
        info = path.stat()
        if not stat.S_ISREG(info.st_mode):
            raise UnreadableFile("is not a regular file", "is not a regular file")
        if info.st_size > MAX_FILE_BYTES:
            raise UnreadableFile(f"is larger than {MAX_FILE_BYTES} bytes", "is too large")
        with open(path, "rb") as handle:
            raw = handle.read(MAX_FILE_BYTES + 1)
    except OSError as exc:
        raise UnreadableFile(f"cannot be read ({exc.strerror})", "cannot be read") from exc
    if len(raw) > MAX_FILE_BYTES:  # it grew while being read
        raise UnreadableFile(f"is larger than {MAX_FILE_BYTES} bytes", "is too large")
    return raw


def _read_inside(path: Path, root: Path, label: str, what: str, brief: str = "") -> bytes:
    """Read a regular file that lies inside ``root`` once links are resolved.

    ``label`` starts the detail of a refusal and ``brief`` its short reason.
    """
    try:
        real = path.resolve(strict=True)
    except (OSError, RuntimeError) as exc:  # RuntimeError: a loop of symbolic links
        strerror = getattr(exc, "strerror", None) or str(exc)
        raise BasisFileError(f"{label}: cannot read the {what} ({strerror})",
                             reason=f"{brief}cannot read the {what}") from exc
    if not real.is_relative_to(root):
        raise BasisFileError(f"{label}: the {what} is a link to {real}, outside the tables "
                             "folder", reason=f"{brief}the {what} links outside the tables folder")
    try:
        return read_regular_file(real)
    except UnreadableFile as exc:
        raise BasisFileError(f"{label}: the {what} {exc.problem}",
                             reason=f"{brief}the {what} {exc.brief}") from exc


def _too_deep(value) -> bool:
    """Whether ``value`` nests tables or arrays more than MAX_DEPTH deep (no recursion)."""
    stack = [(value, 0)]
    while stack:
        item, depth = stack.pop()
        if isinstance(item, dict | list):
            if depth >= MAX_DEPTH:
                return True
            children = item.values() if isinstance(item, dict) else item
            stack.extend((child, depth + 1) for child in children)
    return False


def _toml_position(exc: tomllib.TOMLDecodeError) -> str:
    found = re.search(r"\(at (line \d+, column \d+|end of document)\)$", str(exc))
    return f" at {found.group(1)}" if found else ""


def load_basis(path: Path, name: str, *, root: Path | None = None) -> Basis:
    """Read, validate and hash one basis file; raise BasisFileError naming every problem.

    The file is described by :class:`~service.bases.schema.BasisSchema`; every problem the
    schema finds is reported at once, with the line of the key where it can be found, and
    so is every problem in the data files of the sections that were sound. Every file read
    (the basis file and its data) must lie inside ``root`` (by default the basis file's
    folder) once symbolic links are resolved.
    """
    root = Path(root).resolve() if root is not None else path.parent.resolve()
    raw = _read_inside(path, root, name, "file")
    text, doc = _parse(raw, name)
    found = _Problems(name, text)
    spec: BasisSpec | None = None
    try:
        spec = BasisSchema().load(doc)
        valid = {}
    except ValidationError as exc:
        found.schema(exc.messages, doc)
        valid = exc.valid_data or {}
    part = (lambda key, kind: getattr(spec, key)) if spec is not None else \
        (lambda key, kind: valid.get(key) if isinstance(valid.get(key), kind) else None)

    folder = path.parent
    digests: dict[str, str] = {}  # every data file read: {file as named: SHA-256}
    expected: set[str] = set()  # every data file named by a sound section
    interest = None
    interest_spec = part("interest", InterestSpec)
    if interest_spec is not None:
        if interest_spec.file:
            expected.add(interest_spec.file)
        with found.collect():
            interest = _load_interest(folder, root, interest_spec, name, digests)

    mortality = part("mortality", (dict, MappingProxyType)) or {}
    tables: dict[str, MortalityTable] = {}
    for sex in SEXES:
        table_spec = mortality.get(sex)
        if not isinstance(table_spec, TableSpec):
            continue
        if table_spec.file:
            expected.add(table_spec.file)
        with found.collect():
            tables[sex] = _load_table(folder, root, table_spec, name, f"[mortality.{sex}]",
                                      digests)

    improvement = None
    improvement_spec = part("improvement", ImprovementSpec)
    if improvement_spec is not None:
        expected.add(improvement_spec.file)
        with found.collect():
            improvement = _load_improvement(folder, root, improvement_spec, name, digests,
                                            tables)

    blended: list[MortalityTable] = []
    if spec is not None and len(tables) == len(spec.sexes):
        for blend in spec.blends:
            with found.collect():
                blended.append(_blend(blend, spec.sexes, tables, name, found))

    digest = None
    # The digest is checked once the content is sound: that of a broken file means nothing.
    if not found.problems and expected <= set(digests):
        digest = content_digest(doc, {k: digests[k] for k in sorted(expected)})
        status = doc.get("status") if doc.get("status") in STATUSES else None
        recorded = doc.get("digest")
        if recorded is None and status not in (None, "demo"):
            found.add(f"{name}: a basis with status '{status}' must record its digest; add "
                      f'digest = "{digest}" after checking the content',
                      f"a basis with status '{status}' must record its digest")
        if isinstance(recorded, str) and recorded != digest:
            found.add(f"{name}: recorded digest {recorded} does not match the content "
                      f"({digest}); the basis or its data changed",
                      "the recorded digest does not match the content")
    found.raise_any()
    assert spec is not None and interest is not None and digest is not None
    sexes = spec.sexes
    return Basis(
        id=spec.id, version=spec.version, title=spec.title, status=spec.status,
        default=spec.default, purpose=spec.purpose, source=spec.source, digest=digest,
        interest=interest, fractional_age=spec.fractional_age,
        approximation=spec.approximation, sexes=sexes,
        tables=tuple(tables[s] for s in sexes) + tuple(blended),
        mortality=_frozen({s: _describe(doc["mortality"][s], tables[s]) for s in sexes}),
        file=name, age_definition=spec.age_definition, effective_date=spec.effective_date,
        approval=spec.approval, superseded_by=spec.superseded_by, rounding=spec.rounding,
        blends=spec.blends, improvement=improvement,
        names=sexes + tuple(b.name for b in spec.blends),
    )


def _parse(raw: bytes, name: str) -> tuple[str, dict]:
    """Decode and parse a basis file; raise BasisFileError when it is not TOML to read."""
    try:
        text = raw.decode("utf-8")
        doc = tomllib.loads(text)
    except UnicodeDecodeError as exc:
        raise BasisFileError(f"{name}: not valid TOML: {exc}",
                             reason="not valid TOML (not UTF-8)") from exc
    except tomllib.TOMLDecodeError as exc:
        raise BasisFileError(f"{name}: not valid TOML: {exc}",
                             reason=f"not valid TOML{_toml_position(exc)}") from exc
    except RecursionError as exc:
        raise BasisFileError(f"{name}: not valid TOML: nested too deeply to read",
                             reason="not valid TOML: nested too deeply") from exc
    if _too_deep(doc):
        raise BasisFileError(f"{name}: tables or arrays nested more than {MAX_DEPTH} deep",
                             reason="nested too deeply")
    return text, doc


# ---- problems, with the line of the key where it can be found --------------------------------

#: Sections of a basis file whose tables are named by a second key ([mortality.female]).
_NAMED_SECTIONS = ("mortality", "blends")
#: Every key name the schema knows: only these (and list positions) may appear in a reason.
_KNOWN_KEYS = frozenset(
    {"id", "version", "title", "status", "default", "digest", "purpose", "source", "interest",
     "methods", "mortality", "age_definition", "effective_date", "superseded_by", "approval",
     "rounding", "blends", "improvement", "fractional_age", "mthly", "file", "law",
     "parameters", "min_age", "select_factors", "by", "on", "places", "rule", "kind",
     "base_year", "long_term_rate", "long_term_from", "projection", "year", "rate", "rates",
     "terms", "edges"} | set(SEXES) | {p for ps in LAW_PARAMETERS.values() for p in ps})
_HEADER = re.compile(r"\s*\[\s*([^\[\]]+?)\s*\]\s*(?:#.*)?")


def _where(path: tuple) -> str:
    """``[section].key.index`` (or a top-level ``key``) for a key path."""
    if not path:
        return ""
    parts = [str(p) for p in path]
    if parts[0] in _NAMED_SECTIONS and len(parts) > 1:
        section, rest = parts[:2], parts[2:]
    elif parts[0] in _NAMED_SECTIONS or parts[0] in (
            "interest", "methods", "approval", "rounding", "improvement"):
        section, rest = parts[:1], parts[1:]
    else:
        return ".".join(parts)
    return f"[{'.'.join(section)}]" + "".join(f".{p}" for p in rest)


def _safe(path: tuple) -> tuple:
    """The path with every name the schema does not know (so: text from the file) hidden."""
    return tuple(p if isinstance(p, int) or p in _KNOWN_KEYS else "*" for p in path)


def _value_at(doc, path: tuple):
    node = doc
    for part in path:
        if isinstance(node, dict) and part in node:
            node = node[part]
        elif isinstance(node, list) and isinstance(part, int) and 0 <= part < len(node):
            node = node[part]
        else:
            return None
    return node


def find_line(text: str, path) -> int | None:
    """Best effort: the 1-based line of the key at ``path`` in a basis file's text.

    TOML readers give no positions, so the text is scanned: for the ``[section]`` header
    that holds the key (the longest part of the path that is a header), then for ``key =``
    below it; a key outside any section is looked for above the first header. Inline
    tables, dotted keys and arrays are found only as far as the key that holds them.
    """
    lines = text.splitlines()
    headers = []
    for n, line in enumerate(lines):
        match = _HEADER.fullmatch(line)
        if match and not line.lstrip().startswith("[["):
            name = ".".join(p.strip().strip("\"'") for p in match.group(1).split("."))
            headers.append((n, name))
    parts = [str(p) for p in path]

    def key_line(key: str, start: int, stop: int) -> int | None:
        pattern = re.compile(rf"\s*(?:{re.escape(key)}|\"{re.escape(key)}\"|"
                             rf"'{re.escape(key)}')\s*=")
        for n in range(start, stop):
            if pattern.match(lines[n]):
                return n + 1
        return None

    for depth in range(len(parts), 0, -1):
        section = ".".join(parts[:depth])
        for i, (n, name) in enumerate(headers):
            if name != section:
                continue
            if depth == len(parts):
                return n + 1
            stop = headers[i + 1][0] if i + 1 < len(headers) else len(lines)
            return key_line(parts[depth], n + 1, stop) or n + 1
    first_header = headers[0][0] if headers else len(lines)
    if parts:
        top = key_line(parts[0], 0, first_header)
        if top:
            return top
        prefix = parts[0] + "."
        for n, name in headers:
            if name.startswith(prefix):
                return n + 1
    return None


class _Problems:
    """The problems found in one basis file, in the order found."""

    def __init__(self, name: str, text: str):
        self.name, self.text = name, text
        self.problems: list[Problem] = []

    def add(self, detail: str, reason: str) -> None:
        self.problems.append(Problem(detail, reason))

    @contextmanager
    def collect(self):
        """Record a BasisFileError raised inside the block and carry on."""
        try:
            yield
        except BasisFileError as exc:
            self.problems.extend(exc.problems)

    def at(self, path: tuple, message: str, value=None) -> None:
        """Record a problem at a key path, with its line where it can be found."""
        line = find_line(self.text, path)
        where, safe = _where(path), _where(_safe(path))
        at = f" line {line}" if line else ""
        got = ""
        if isinstance(value, str | int | float | datetime.date):
            shown = ascii(value)
            got = f" (got {shown if len(shown) <= 80 else shown[:77] + '...'})"
        place = f"{where}: " if where else ""
        self.add(f"{self.name}{at}: {place}{message}{got}",
                 f"{'line ' + str(line) + ': ' if line else ''}{safe + ': ' if safe else ''}"
                 f"{message}")

    def schema(self, messages, doc: dict) -> None:
        """Record every problem in a marshmallow error tree, by key path."""

        def walk(node, path):
            if isinstance(node, dict):
                for key, child in node.items():
                    walk(child, path if key == "_schema" else path + (key,))
            elif isinstance(node, list | tuple):
                for message in node:
                    walk(message, path)
            else:
                self.at(path, str(node), _value_at(doc, path))

        walk(messages, ())

    def raise_any(self) -> None:
        if self.problems:
            raise BasisFileError.of(self.problems)


def content_digest(doc: dict, data_digests: dict[str, str]) -> str:
    """Return 'sha256:...' over the canonical basis content and its data files' digests.

    The canonical content is the parsed TOML without its ``digest`` key, as JSON with sorted
    keys, plus the SHA-256 of each data file (line endings normalised), so that neither a
    changed parameter nor a changed table can pass for the old version.
    """
    body = {k: v for k, v in doc.items() if k != "digest"}
    canonical = json.dumps({"basis": body, "data": data_digests}, sort_keys=True,
                           separators=(",", ":"), ensure_ascii=True, default=str)
    return "sha256:" + hashlib.sha256(canonical.encode("ascii")).hexdigest()


def _frozen(value):
    """Return a read-only copy: mappings become mapping proxies and lists tuples."""
    if isinstance(value, dict):
        return MappingProxyType({k: _frozen(v) for k, v in value.items()})
    if isinstance(value, list | tuple):
        return tuple(_frozen(v) for v in value)
    return value


def _describe(spec: dict, table: MortalityTable) -> dict:
    out = {k: v for k, v in spec.items()}
    out["first_age"] = table.first_age
    out["last_age"] = table.last_age
    out["select_period"] = table.select_period
    return out


def _load_table(folder: Path, root: Path, spec: TableSpec, name: str, section: str,
                digests: dict) -> MortalityTable:
    if spec.law is None:
        return _csv_table(folder, root, spec.file, name, section, digests)
    try:
        return table_from_law(spec.law, dict(spec.parameters), spec.min_age,
                              select_factors=list(spec.select_factors))
    except (TableError, ValueError, TypeError, OverflowError) as exc:
        raise BasisFileError(f"{name} {section}: {exc}",
                             reason=f"{section} the law's parameters give no valid table") \
            from exc


class _Data:
    """Where in a data file a problem lies, for the detail and for the brief reason."""

    def __init__(self, name: str, section: str, rel: str):
        self.label = f"{name} {section} {rel}"
        self.brief = f"{section} {ascii(rel)[1:-1]}"

    def error(self, line: int | None, detail: str, reason: str) -> BasisFileError:
        at = f" line {line}" if line else ""
        return BasisFileError(f"{self.label}{at}: {detail}",
                              reason=f"{self.brief}{at}: {reason}")


def _read_csv(folder: Path, root: Path, rel: str, name: str, section: str, digests: dict):
    """Read, hash and parse a data file; return ``(frame, where, line numbers)``: the line
    of each data row, after that of the header.

    The file's SHA-256 (line endings normalised) goes into ``digests`` once it is read,
    whatever its content.
    """
    at = _Data(name, section, rel)
    raw = _read_inside(folder / rel, root, at.label, "data file", f"{at.brief}: ")
    normalised = raw.replace(b"\r\n", b"\n")
    digests[rel] = hashlib.sha256(normalised).hexdigest()
    try:
        # Parse the very bytes that were hashed.
        frame = pd.read_csv(io.BytesIO(normalised), dtype=str, keep_default_na=False,
                            comment="#")
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError,
            ValueError) as exc:
        raise at.error(None, f"not a readable CSV ({exc})", "not a readable CSV") from exc
    return frame, at, _data_line_numbers(normalised, len(frame), header=True)


def _load_interest(folder: Path, root: Path, spec: InterestSpec, name: str,
                   digests: dict) -> Curve:
    """Return the basis' interest structure, given inline or read from its data file.

    A data file holds ``term,rate`` rows for a spot curve, or ``from,rate`` rows for
    segments and forward bands (the first band from 0).
    """
    if spec.curve is not None:
        return spec.curve
    section = "[interest]"
    kind = spec.kind
    frame, at, (_, *lines) = _read_csv(folder, root, spec.file, name, section, digests)
    columns = list(INTEREST_FILE_COLUMNS[kind])
    if [str(c) for c in frame.columns] != columns:
        raise at.error(None, f"columns must be {','.join(columns)}",
                       f"the columns must be {','.join(columns)}")
    knots = _numbers(frame[columns[0]], lines, at, columns[0]).tolist()
    rates = _numbers(frame["rate"], lines, at, "rate").tolist()
    if kind != "spot":
        if not knots or knots[0] != 0:
            raise at.error(lines[0] if lines else None, "the first band must start at 0",
                           "the first band must start at 0")
        knots = knots[1:]
    mapping = {"kind": kind, "terms" if kind == "spot" else "edges": knots, "rates": rates}
    try:
        return Curve.from_mapping(mapping, path=section)
    except CurveError as exc:
        raise BasisFileError.of(
            Problem(f"{at.label}: {where}: {messages[0]}", f"{at.brief}: {where}: {messages[0]}")
            for where, messages in exc.errors.items()) from exc


def _whole_ages(frame, lines, at: _Data) -> np.ndarray:
    """The ``age`` column: whole numbers running up by one, without gaps."""
    ages = _numbers(frame["age"], lines, at, "age")
    if len(ages) == 0:
        raise at.error(None, "no rows", "no rows")
    if not np.all(ages == np.round(ages)):
        bad = int(np.flatnonzero(ages != np.round(ages))[0])
        raise at.error(lines[bad], f"age {ages[bad]} is not whole", "an age is not whole")
    ages = ages.astype(np.int64)
    steps = np.diff(ages)
    if (steps != 1).any():
        bad = int(np.flatnonzero(steps != 1)[0]) + 1
        raise at.error(lines[bad], f"age {ages[bad]} follows age {ages[bad - 1]}; ages must "
                                   "run without gaps", "ages must run up by one, without gaps")
    return ages


def _csv_table(folder: Path, root: Path, rel: str, name: str, section: str, digests: dict):
    frame, at, (_, *lines) = _read_csv(folder, root, rel, name, section, digests)
    columns = [str(c) for c in frame.columns]
    select_cols = [c for c in columns if c.startswith("q_select_")]
    expected = ["age", "q"] + [f"q_select_{s}" for s in range(len(select_cols))]
    if columns != expected:
        raise at.error(None, f"columns must be {','.join(expected)} (got {','.join(columns)})",
                       "the columns must be age,q then q_select_0, q_select_1, ...")
    ages = _whole_ages(frame, lines, at)
    q = _rates(frame["q"], lines, ages, at, "q")
    if q[-1] != 1.0:
        raise at.error(lines[-1], f"the table must close with q = 1 at its last age "
                                  f"({ages[-1]})", "the table must close with q = 1")
    first_age = int(ages[0])
    if not select_cols:
        return MortalityTable.of(first_age, q)
    filled = np.array([all(frame[c].iloc[r].strip() for c in select_cols)
                       for r in range(len(frame))])
    n_sel = int(np.argmin(filled)) if not filled.all() else len(frame)
    if filled[n_sel:].any():
        bad = n_sel + int(np.argmax(filled[n_sel:]))
        raise at.error(lines[bad], "select rates resume after a blank row; blanks are allowed "
                                   "only at the end", "select rates resume after a blank row")
    if n_sel == 0:
        raise at.error(None, "select columns are present but empty",
                       "select columns are present but empty")
    select = np.column_stack([_rates(frame[c].iloc[:n_sel], lines, ages, at, c)
                              for c in select_cols])
    try:
        return MortalityTable.of(first_age, q, first_age, select)
    except TableError as exc:
        raise at.error(None, str(exc), "the select rates do not make a valid table") from exc


# ---- improvement scales and blends ------------------------------------------------------------


def _load_improvement(folder: Path, root: Path, spec: ImprovementSpec, name: str,
                      digests: dict, tables: dict) -> Improvement:
    """Read an improvement scale: ``age,rate`` (by-age) or ``age,<year>,<year>,...`` with
    consecutive calendar years (by-age-and-year); every rate finite and below 1.

    The scale must cover every age of every table read (``tables``, by sex).
    """
    from service.engine.improvement import Scale

    section = "[improvement]"
    frame, at, (header, *lines) = _read_csv(folder, root, spec.file, name, section, digests)
    columns = [str(c).strip() for c in frame.columns]
    header = header or None
    years = None
    if spec.kind == "by-age":
        if columns != ["age", "rate"]:
            raise at.error(header, f"columns must be age,rate for a by-age scale (got "
                                   f"{','.join(columns)})", "the columns must be age,rate")
        value_columns = ["rate"]
    else:
        if len(columns) < 2 or columns[0] != "age" or \
                not all(re.fullmatch(r"\d{4}", c) for c in columns[1:]):
            raise at.error(header, "columns must be age then calendar years (age,2020,2021,"
                                   f"...) for a by-age-and-year scale (got {','.join(columns)})",
                           "the columns must be age then calendar years")
        years = np.array([int(c) for c in columns[1:]], dtype=np.int64)
        if (np.diff(years) != 1).any():
            bad = int(np.flatnonzero(np.diff(years) != 1)[0]) + 1
            raise at.error(header, f"year {years[bad]} follows year {years[bad - 1]}; the year "
                                   "columns must be consecutive",
                           "the year columns must be consecutive")
        value_columns = list(frame.columns[1:])
    ages = _whole_ages(frame, lines, at)
    rates = np.column_stack([_improvement_rates(frame[c], lines, ages, at, str(c).strip())
                             for c in value_columns])
    first, last = int(ages[0]), int(ages[-1])
    for sex, table in tables.items():
        if table.first_age < first or table.last_age > last:
            missing = [f"{a} to {b}" if a != b else str(a) for a, b in
                       ((table.first_age, first - 1), (last + 1, table.last_age)) if a <= b]
            raise at.error(None, f"the scale covers ages {first} to {last} but the {sex} table "
                                 f"runs from {table.first_age} to {table.last_age}: ages "
                                 f"{' and '.join(missing)} have no rate",
                           f"the scale does not cover ages {' and '.join(missing)} of the "
                           f"{sex} table")
    try:
        scale = Scale.of(ages, rates[:, 0] if years is None else rates, spec.base_year,
                      years=years, long_term_rate=spec.long_term_rate,
                      long_term_from=spec.long_term_from)
    except TableError as exc:
        raise at.error(None, str(exc), "the scale is not valid") from exc
    return Improvement(scale=scale, file=spec.file, kind=spec.kind,
                       projection=spec.projection, year=spec.year, source=spec.source)


def _improvement_rates(column, lines, ages, at: _Data, what: str) -> np.ndarray:
    rates = _numbers(column, lines, at, f"rate {what}" if what != "rate" else "rate")
    bad = rates >= 1
    if bad.any():
        r = int(np.flatnonzero(bad)[0])
        raise at.error(lines[r], f"the rate ({what}) at age {ages[r]} is {rates[r]}; an "
                                 "improvement rate must be below 1",
                       "an improvement rate is not below 1")
    return rates


def _blend(blend: Blend, sexes, tables: dict, name: str, found) -> MortalityTable:
    """The blended table of a basis' sex tables."""
    from service.engine.tables import blend_tables

    section = f"[blends.{blend.name}]"
    weights = dict(blend.weights)
    try:
        return blend_tables(tuple(tables[s] for s in sexes), [weights[s] for s in sexes],
                            blend.on)
    except TableError as exc:
        raise BasisFileError(f"{name} {section}: {exc}",
                             reason=f"{section} the blend gives no valid table") from exc


def _data_line_numbers(text: bytes, rows: int, *, header: bool = False) -> list[int]:
    """Return the 1-based file line of each data row (after the header, skipping comments);
    with ``header``, that of the header first (0 where a line is not known)."""
    numbers = []
    for n, line in enumerate(text.split(b"\n"), start=1):
        stripped = line.strip()
        if not stripped or stripped.startswith(b"#"):
            continue
        numbers.append(n)
    numbers = numbers[:rows + 1] + [0] * max(0, rows + 1 - len(numbers))
    return numbers if header else numbers[1:]


def _numbers(column, lines, at: _Data, what) -> np.ndarray:
    values = np.empty(len(column))
    for r, text in enumerate(column):
        try:
            values[r] = float(text)
        except ValueError:
            raise at.error(lines[r], f"{what} {ascii(text)} is not a number",
                           f"{what} is not a number") from None
        if not math.isfinite(values[r]):
            raise at.error(lines[r], f"{what} is {ascii(text)}", f"{what} is not finite")
    return values


def _rates(column, lines, ages, at: _Data, what) -> np.ndarray:
    q = _numbers(column, lines, at, what)
    bad = (q < 0) | (q > 1)
    if bad.any():
        r = int(np.flatnonzero(bad)[0])
        raise at.error(lines[r], f"{what} at age {ages[r]} is {q[r]}, outside [0, 1]",
                       f"{what} outside [0, 1]")
    return q
