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

import hashlib
import io
import json
import logging
import math
import os
import re
import stat
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType

import numpy as np
import pandas as pd

from service.engine.annuity import APPROXIMATIONS
from service.engine.curves import Curve, CurveError
from service.engine.errors import TableError
from service.engine.survival import ASSUMPTIONS
from service.engine.tables import MortalityTable, table_from_law

log = logging.getLogger(__name__)

STATUSES = ("approved", "demo", "retired")
SEXES = ("female", "male", "unisex")
LAWS = ("makeham", "gompertz")
_LAW_PARAMETERS = {"makeham": ("A", "B", "c"), "gompertz": ("B", "c")}
#: Basis ids and versions: lowercase ASCII letters, digits, '.' and '-', starting and ending
#: with a letter or digit (so no control characters and no look-alike letters).
_NAME = re.compile(r"[a-z0-9](?:[a-z0-9.-]*[a-z0-9])?")
MAX_ID_LENGTH = 64
MAX_VERSION_LENGTH = 32
#: The largest basis or data file read (the shipped ones are a few kilobytes).
MAX_FILE_BYTES = 16 * 1024 * 1024
#: Nesting a basis file may have (the format itself needs four levels).
MAX_DEPTH = 8


class BasisFileError(Exception):
    """A basis file or its data cannot be accepted.

    The message (the detail) names where and why and may quote the file; ``reason`` says
    the same briefly with no text taken from any file.
    """

    def __init__(self, detail: str, *, reason: str):
        super().__init__(detail)
        self.reason = reason


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
    effective_date: object = None
    approval: object = None
    superseded_by: str | None = None
    rounding: object = None
    blends: tuple = ()
    improvement: object = None

    @property
    def names(self) -> tuple[str, ...]:
        return self.sexes + tuple(b.name for b in self.blends)

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

    def table_index(self, sex: str | None) -> int | None:
        """Return which table a life of ``sex`` follows, or None when the basis has none."""
        if not self.sex_distinct:
            return 0
        return self.names.index(sex) if sex in self.names else None


@dataclass(frozen=True)
class Refusal:
    """A refused basis file: ``reason`` is safe to show anyone, ``detail`` is for the log."""

    file: str
    reason: str
    detail: str = ""


def printable(text: str) -> str:
    """Return ``text`` with everything but printable ASCII escaped (for logs and terminals)."""
    if text.isascii() and text.isprintable():
        return text
    return "".join(c if " " <= c <= "~" else c.encode("unicode_escape").decode("ascii")
                   for c in text)


def _refuse(refused: list, file: str, reason: str, detail: str) -> None:
    refused.append(Refusal(file, reason, detail))
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
            _refuse(refused, name, exc.reason, str(exc))
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


def _require(doc: dict, key: str, kind, name: str, section: str = ""):
    where = f"{name} {section}" if section else name
    brief = f"{section} " if section else ""
    if key not in doc:
        raise BasisFileError(f"{where}: missing '{key}'", reason=f"{brief}'{key}' is missing")
    value = doc[key]
    if kind is float and isinstance(value, int) and not isinstance(value, bool):
        value = float(value)
    if not isinstance(value, kind) or isinstance(value, bool) and kind is not bool:
        raise BasisFileError(f"{where}: '{key}' must be {kind.__name__}",
                             reason=f"{brief}'{key}' must be {kind.__name__}")
    return value


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


def _check_name(value: str, what: str, limit: int, name: str) -> None:
    if len(value) <= limit and _NAME.fullmatch(value):
        return
    raise BasisFileError(
        f"{name}: {what} {ascii(value)} is not allowed: use 1 to {limit} lowercase letters, "
        "digits, '.' and '-', starting and ending with a letter or digit",
        reason=f"{what} not allowed (lowercase letters, digits, '.' and '-' only)")


def _toml_position(exc: tomllib.TOMLDecodeError) -> str:
    found = re.search(r"\(at (line \d+, column \d+|end of document)\)$", str(exc))
    return f" at {found.group(1)}" if found else ""


def load_basis(path: Path, name: str, *, root: Path | None = None) -> Basis:
    """Read, validate and hash one basis file; raise BasisFileError naming the problem.

    Every file read (the basis file and its data) must lie inside ``root`` (by default the
    basis file's folder) once symbolic links are resolved.
    """
    root = Path(root).resolve() if root is not None else path.parent.resolve()
    raw = _read_inside(path, root, name, "file")
    try:
        doc = tomllib.loads(raw.decode("utf-8"))
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

    basis_id = _require(doc, "id", str, name)
    version = _require(doc, "version", str, name)
    _check_name(basis_id, "id", MAX_ID_LENGTH, name)
    _check_name(version, "version", MAX_VERSION_LENGTH, name)
    source = _require(doc, "source", str, name)
    if not source.strip():
        raise BasisFileError(f"{name}: 'source' must say where the basis comes from",
                             reason="'source' must say where the basis comes from")
    status = _require(doc, "status", str, name)
    if status not in STATUSES:
        raise BasisFileError(f"{name}: status '{status}' is not one of {', '.join(STATUSES)}",
                             reason=f"status is not one of {', '.join(STATUSES)}")
    interest, interest_data = _load_interest(path.parent, root,
                                             _require(doc, "interest", dict, name), name)
    methods = doc.get("methods", {})
    if not isinstance(methods, dict):
        raise BasisFileError(f"{name}: [methods] must be a table",
                             reason="[methods] must be a table")
    fractional_age = methods.get("fractional_age", "udd")
    approximation = methods.get("mthly", "exact")
    if fractional_age not in ASSUMPTIONS:
        raise BasisFileError(f"{name} [methods]: fractional_age '{fractional_age}' is not one "
                             f"of {', '.join(ASSUMPTIONS)}",
                             reason=f"[methods] fractional_age is not one of "
                                    f"{', '.join(ASSUMPTIONS)}")
    if approximation not in APPROXIMATIONS:
        raise BasisFileError(f"{name} [methods]: mthly '{approximation}' is not one of "
                             f"{', '.join(APPROXIMATIONS)}",
                             reason=f"[methods] mthly is not one of {', '.join(APPROXIMATIONS)}")

    mortality = _require(doc, "mortality", dict, name)
    sexes = tuple(s for s in SEXES if s in mortality)
    unknown = set(mortality) - set(SEXES)
    if unknown:
        raise BasisFileError(f"{name} [mortality]: unknown sex {ascii(sorted(unknown)[0])}",
                             reason="[mortality] unknown sex")
    if sexes not in (("unisex",), ("female", "male")):
        message = "give either 'unisex' or both 'female' and 'male'"
        raise BasisFileError(f"{name} [mortality]: {message}", reason=f"[mortality] {message}")
    tables = []
    data_digests = dict(interest_data)
    for sex in sexes:
        spec = mortality[sex]
        section = f"[mortality.{sex}]"
        if not isinstance(spec, dict):
            raise BasisFileError(f"{name} {section}: must be a table",
                                 reason=f"{section} must be a table")
        table, digest_part = _load_table(path.parent, root, spec, name, section)
        tables.append(table)
        if digest_part:
            data_digests[spec["file"]] = digest_part

    digest = content_digest(doc, data_digests)
    recorded = doc.get("digest")
    if recorded is None and status != "demo":
        raise BasisFileError(f"{name}: a basis with status '{status}' must record its "
                             f'digest; add digest = "{digest}" after checking the content',
                             reason=f"a basis with status '{status}' must record its digest")
    if recorded is not None and recorded != digest:
        raise BasisFileError(f"{name}: recorded digest {recorded} does not match the content "
                             f"({digest}); the basis or its data changed",
                             reason="the recorded digest does not match the content")
    return Basis(
        id=basis_id, version=version, title=str(doc.get("title", basis_id)), status=status,
        default=bool(doc.get("default", False)), purpose=str(doc.get("purpose", "")),
        source=source, digest=digest, interest=interest,
        fractional_age=fractional_age, approximation=approximation, sexes=sexes,
        tables=tuple(tables),
        mortality=_frozen({s: _describe(mortality[s], t)
                           for s, t in zip(sexes, tables, strict=True)}),
        file=name,
    )


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


def _load_table(folder: Path, root: Path, spec: dict, name: str, section: str):
    where = f"{name} {section}"
    if "source" not in spec or not isinstance(spec["source"], str) or not spec["source"].strip():
        raise BasisFileError(f"{where}: every table must name its 'source'",
                             reason=f"{section} every table must name its 'source'")
    if ("law" in spec) == ("file" in spec):
        raise BasisFileError(f"{where}: give exactly one of 'law' or 'file'",
                             reason=f"{section} give exactly one of 'law' or 'file'")
    if "law" in spec:
        return _law_table(spec, name, section), ""
    return _csv_table(folder, root, spec, name, section)


def _law_table(spec: dict, name: str, section: str) -> MortalityTable:
    where = f"{name} {section}"
    law = spec["law"]
    if law not in LAWS:
        raise BasisFileError(f"{where}: unknown law {ascii(law)}; known: {', '.join(LAWS)}",
                             reason=f"{section} unknown law; known: {', '.join(LAWS)}")
    params = _require(spec, "parameters", dict, name, section)
    values = {}
    for key in _LAW_PARAMETERS[law]:
        values[key] = _require(params, key, float, name, f"{section} parameters")
    extra = set(params) - set(_LAW_PARAMETERS[law])
    if extra:
        raise BasisFileError(f"{where}: unexpected parameter {ascii(sorted(extra)[0])} for "
                             f"{law}", reason=f"{section} unexpected parameter for {law}")
    first_age = _require(spec, "min_age", int, name, section)
    factors = spec.get("select_factors", [])
    try:
        return table_from_law(law, values, first_age, select_factors=factors)
    except (TableError, ValueError, TypeError, OverflowError) as exc:
        raise BasisFileError(f"{where}: {exc}",
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


def _read_csv(folder: Path, root: Path, rel, name: str, section: str):
    """Read, hash and parse a data file; return ``(frame, digest, where, line numbers)``."""
    if not isinstance(rel, str) or Path(rel).is_absolute() or ".." in Path(rel).parts:
        raise BasisFileError(f"{name} {section}: 'file' must be a path inside the tables "
                             "folder",
                             reason=f"{section} 'file' must be a path inside the tables folder")
    at = _Data(name, section, rel)
    raw = _read_inside(folder / rel, root, at.label, "data file", f"{at.brief}: ")
    normalised = raw.replace(b"\r\n", b"\n")
    digest = hashlib.sha256(normalised).hexdigest()
    try:
        # Parse the very bytes that were hashed.
        frame = pd.read_csv(io.BytesIO(normalised), dtype=str, keep_default_na=False,
                            comment="#")
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError,
            ValueError) as exc:
        raise at.error(None, f"not a readable CSV ({exc})", "not a readable CSV") from exc
    return frame, digest, at, _data_line_numbers(normalised, len(frame))


#: The columns of an interest data file, by kind: spot terms, or the start of each band.
_INTEREST_COLUMNS = {"spot": ("term", "rate"), "segments": ("from", "rate"),
                     "forward": ("from", "rate")}


def _load_interest(folder: Path, root: Path, spec: dict, name: str):
    """Return the basis' interest structure and ``{file: digest}`` of its data file, if any.

    ``[interest]`` holds a structure as a request's ``interest`` does (kind with rate, or
    terms or edges with rates), or a kind and a ``file``: a CSV of ``term,rate`` rows for a
    spot curve, or ``from,rate`` rows for segments and forward bands (the first band from 0).
    """
    section = "[interest]"
    data = {}
    mapping = {k: v for k, v in spec.items()}
    mapping.setdefault("kind", "flat")
    if "file" in spec:
        kind = mapping["kind"]
        if kind not in _INTEREST_COLUMNS:
            raise BasisFileError(f"{name} {section}: a 'file' gives a spot curve, segments or "
                                 "forward bands", reason=f"{section} 'file' needs a curve kind")
        frame, digest, at, lines = _read_csv(folder, root, spec["file"], name, section)
        columns = list(_INTEREST_COLUMNS[kind])
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
        data[spec["file"]] = digest
    try:
        return Curve.from_mapping(mapping, path=section), data
    except CurveError as exc:
        where, messages = next(iter(exc.errors.items()))
        raise BasisFileError(f"{name} {where}: {messages[0]}",
                             reason=f"{where}: {messages[0]}") from exc


def _csv_table(folder: Path, root: Path, spec: dict, name: str, section: str):
    frame, digest, at, lines = _read_csv(folder, root, spec["file"], name, section)
    columns = [str(c) for c in frame.columns]
    select_cols = [c for c in columns if c.startswith("q_select_")]
    expected = ["age", "q"] + [f"q_select_{s}" for s in range(len(select_cols))]
    if columns != expected:
        raise at.error(None, f"columns must be {','.join(expected)} (got {','.join(columns)})",
                       "the columns must be age,q then q_select_0, q_select_1, ...")
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
    q = _rates(frame["q"], lines, ages, at, "q")
    if q[-1] != 1.0:
        raise at.error(lines[-1], f"the table must close with q = 1 at its last age "
                                  f"({ages[-1]})", "the table must close with q = 1")
    first_age = int(ages[0])
    if not select_cols:
        return MortalityTable(first_age, q), digest
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
        return MortalityTable(first_age, q, first_age, select), digest
    except TableError as exc:
        raise at.error(None, str(exc), "the select rates do not make a valid table") from exc


def _data_line_numbers(text: bytes, rows: int) -> list[int]:
    """Return the 1-based file line of each data row (after the header, skipping comments)."""
    numbers = []
    for n, line in enumerate(text.split(b"\n"), start=1):
        stripped = line.strip()
        if not stripped or stripped.startswith(b"#"):
            continue
        numbers.append(n)
    return numbers[1:rows + 1] + [0] * max(0, rows + 1 - len(numbers))


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
