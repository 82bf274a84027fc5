"""Load every basis file under a tables folder, refusing any that cannot be verified.

A basis file is TOML, one file per basis version, anywhere under the folder (``*.toml``).
Mortality data are CSV files named relative to the basis file, or a law with parameters.
Each refused file is logged with its reason; the others still load.
"""

import hashlib
import io
import json
import logging
import math
import os
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType

import numpy as np
import pandas as pd

from service.engine.annuity import APPROXIMATIONS
from service.engine.errors import TableError
from service.engine.survival import ASSUMPTIONS
from service.engine.tables import MortalityTable, table_from_law

log = logging.getLogger(__name__)

STATUSES = ("approved", "demo", "retired")
SEXES = ("female", "male", "unisex")
LAWS = ("makeham", "gompertz")
_LAW_PARAMETERS = {"makeham": ("A", "B", "c"), "gompertz": ("B", "c")}


class BasisFileError(Exception):
    """A basis file or its data cannot be accepted; the message names where and why."""


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
    interest_rate: float
    fractional_age: str
    approximation: str
    sexes: tuple[str, ...]
    tables: tuple[MortalityTable, ...]
    mortality: MappingProxyType = field(repr=False)  # per sex: how the table was given, source
    file: str = ""

    @property
    def ref(self) -> str:
        return f"{self.id}@{self.version}"

    @property
    def sex_distinct(self) -> bool:
        return self.sexes != ("unisex",)

    def table_index(self, sex: str | None) -> int | None:
        """Return which table a life of ``sex`` follows, or None when the basis has none."""
        if not self.sex_distinct:
            return 0
        return self.sexes.index(sex) if sex in self.sexes else None


@dataclass(frozen=True)
class Refusal:
    file: str
    reason: str


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
    files = sorted(_basis_files(root))
    loaded: list[Basis] = []
    refused: list[Refusal] = []
    for path in files:
        name = str(path.relative_to(root))
        try:
            loaded.append(load_basis(path, name))
        except BasisFileError as exc:
            refused.append(Refusal(name, str(exc)))
            log.warning("refused basis file %s: %s", name, exc)
    bases: dict[tuple[str, str], Basis] = {}
    for basis in loaded:
        key = (basis.id, basis.version)
        if key in bases:
            reason = f"{basis.ref} is already defined by {bases[key].file}"
            refused.append(Refusal(basis.file, reason))
            log.warning("refused basis file %s: %s", basis.file, reason)
            continue
        bases[key] = basis
    defaults, conflicts = _defaults(bases.values())
    for basis in conflicts:
        del bases[(basis.id, basis.version)]
        reason = f"another version of {basis.id} is also marked default"
        refused.append(Refusal(basis.file, reason))
        log.warning("refused basis file %s: %s", basis.file, reason)
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


def _require(doc: dict, key: str, kind, where: str):
    if key not in doc:
        raise BasisFileError(f"{where}: missing '{key}'")
    value = doc[key]
    if kind is float and isinstance(value, int) and not isinstance(value, bool):
        value = float(value)
    if not isinstance(value, kind) or isinstance(value, bool) and kind is not bool:
        raise BasisFileError(f"{where}: '{key}' must be {kind.__name__}")
    return value


def load_basis(path: Path, name: str) -> Basis:
    """Read, validate and hash one basis file; raise BasisFileError naming the problem."""
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise BasisFileError(f"cannot read the file ({exc.strerror})") from exc
    try:
        doc = tomllib.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise BasisFileError(f"not valid TOML: {exc}") from exc

    basis_id = _require(doc, "id", str, name)
    version = _require(doc, "version", str, name)
    if not basis_id or "@" in basis_id or "/" in basis_id or not version or "@" in version:
        raise BasisFileError(f"{name}: id and version must be non-empty and free of '@' and '/'")
    source = _require(doc, "source", str, name)
    if not source.strip():
        raise BasisFileError(f"{name}: 'source' must say where the basis comes from")
    status = _require(doc, "status", str, name)
    if status not in STATUSES:
        raise BasisFileError(f"{name}: status '{status}' is not one of {', '.join(STATUSES)}")
    interest = _require(doc, "interest", dict, name)
    if interest.get("kind", "flat") != "flat":
        raise BasisFileError(f"{name}: interest kind '{interest.get('kind')}' is not supported")
    rate = _require(interest, "rate", float, f"{name} [interest]")
    if not (math.isfinite(rate) and rate > -1):
        raise BasisFileError(f"{name} [interest]: rate {rate} must be finite and above -1")
    methods = doc.get("methods", {})
    fractional_age = methods.get("fractional_age", "udd")
    approximation = methods.get("mthly", "exact")
    if fractional_age not in ASSUMPTIONS:
        raise BasisFileError(f"{name} [methods]: fractional_age '{fractional_age}' is not one "
                             f"of {', '.join(ASSUMPTIONS)}")
    if approximation not in APPROXIMATIONS:
        raise BasisFileError(f"{name} [methods]: mthly '{approximation}' is not one of "
                             f"{', '.join(APPROXIMATIONS)}")

    mortality = _require(doc, "mortality", dict, name)
    sexes = tuple(s for s in SEXES if s in mortality)
    unknown = set(mortality) - set(SEXES)
    if unknown:
        raise BasisFileError(f"{name} [mortality]: unknown sex '{sorted(unknown)[0]}'")
    if sexes not in (("unisex",), ("female", "male")):
        raise BasisFileError(f"{name} [mortality]: give either 'unisex' or both 'female' and "
                             "'male'")
    tables = []
    data_digests = {}
    for sex in sexes:
        spec = mortality[sex]
        where = f"{name} [mortality.{sex}]"
        if not isinstance(spec, dict):
            raise BasisFileError(f"{where}: must be a table")
        table, digest_part = _load_table(path.parent, spec, where)
        tables.append(table)
        if digest_part:
            data_digests[spec["file"]] = digest_part

    digest = content_digest(doc, data_digests)
    recorded = doc.get("digest")
    if recorded is None and status != "demo":
        raise BasisFileError(f"{name}: a basis with status '{status}' must record its digest; add "
                             f'digest = "{digest}" after checking the content')
    if recorded is not None and recorded != digest:
        raise BasisFileError(f"{name}: recorded digest {recorded} does not match the content "
                             f"({digest}); the basis or its data changed")
    return Basis(
        id=basis_id, version=version, title=str(doc.get("title", basis_id)), status=status,
        default=bool(doc.get("default", False)), purpose=str(doc.get("purpose", "")),
        source=source, digest=digest, interest_rate=rate,
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


def _load_table(folder: Path, spec: dict, where: str):
    if "source" not in spec or not isinstance(spec["source"], str) or not spec["source"].strip():
        raise BasisFileError(f"{where}: every table must name its 'source'")
    if ("law" in spec) == ("file" in spec):
        raise BasisFileError(f"{where}: give exactly one of 'law' or 'file'")
    if "law" in spec:
        return _law_table(spec, where), ""
    return _csv_table(folder, spec, where)


def _law_table(spec: dict, where: str) -> MortalityTable:
    law = spec["law"]
    if law not in LAWS:
        raise BasisFileError(f"{where}: unknown law '{law}'; known: {', '.join(LAWS)}")
    params = _require(spec, "parameters", dict, where)
    values = {}
    for key in _LAW_PARAMETERS[law]:
        values[key] = _require(params, key, float, f"{where} parameters")
    extra = set(params) - set(_LAW_PARAMETERS[law])
    if extra:
        raise BasisFileError(f"{where}: unexpected parameter '{sorted(extra)[0]}' for {law}")
    first_age = _require(spec, "min_age", int, where)
    factors = spec.get("select_factors", [])
    try:
        return table_from_law(law, values, first_age, select_factors=factors)
    except (TableError, ValueError) as exc:
        raise BasisFileError(f"{where}: {exc}") from exc


def _csv_table(folder: Path, spec: dict, where: str):
    rel = spec["file"]
    if not isinstance(rel, str) or Path(rel).is_absolute() or ".." in Path(rel).parts:
        raise BasisFileError(f"{where}: 'file' must be a path inside the tables folder")
    path = folder / rel
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise BasisFileError(f"{where}: cannot read data file {rel} ({exc.strerror})") from exc
    normalised = raw.replace(b"\r\n", b"\n")
    digest = hashlib.sha256(normalised).hexdigest()
    label = f"{where} {rel}"
    try:
        # Parse the very bytes that were hashed.
        frame = pd.read_csv(io.BytesIO(normalised), dtype=str, keep_default_na=False,
                            comment="#")
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise BasisFileError(f"{label}: not a readable CSV ({exc})") from exc
    columns = list(frame.columns)
    select_cols = [c for c in columns if c.startswith("q_select_")]
    expected = ["age", "q"] + [f"q_select_{s}" for s in range(len(select_cols))]
    if columns != expected:
        raise BasisFileError(f"{label}: columns must be {','.join(expected)} "
                             f"(got {','.join(columns)})")
    lines = _data_line_numbers(normalised, len(frame))
    ages = _numbers(frame["age"], lines, label, "age")
    if not np.all(ages == np.round(ages)):
        bad = int(np.flatnonzero(ages != np.round(ages))[0])
        raise BasisFileError(f"{label} line {lines[bad]}: age {ages[bad]} is not whole")
    ages = ages.astype(np.int64)
    steps = np.diff(ages)
    if len(ages) == 0:
        raise BasisFileError(f"{label}: no rows")
    if (steps != 1).any():
        bad = int(np.flatnonzero(steps != 1)[0]) + 1
        raise BasisFileError(f"{label} line {lines[bad]}: age {ages[bad]} follows age "
                             f"{ages[bad - 1]}; ages must run without gaps")
    q = _rates(frame["q"], lines, ages, label, "q")
    if q[-1] != 1.0:
        raise BasisFileError(f"{label} line {lines[-1]}: the table must close with q = 1 at its "
                             f"last age ({ages[-1]})")
    first_age = int(ages[0])
    if not select_cols:
        return MortalityTable(first_age, q), digest
    filled = np.array([all(frame[c].iloc[r].strip() for c in select_cols)
                       for r in range(len(frame))])
    n_sel = int(np.argmin(filled)) if not filled.all() else len(frame)
    if filled[n_sel:].any():
        bad = n_sel + int(np.argmax(filled[n_sel:]))
        raise BasisFileError(f"{label} line {lines[bad]}: select rates resume after a blank "
                             "row; blanks are allowed only at the end")
    if n_sel == 0:
        raise BasisFileError(f"{label}: select columns are present but empty")
    select = np.column_stack([_rates(frame[c].iloc[:n_sel], lines, ages, label, c)
                              for c in select_cols])
    try:
        return MortalityTable(first_age, q, first_age, select), digest
    except TableError as exc:
        raise BasisFileError(f"{label}: {exc}") from exc


def _data_line_numbers(text: bytes, rows: int) -> list[int]:
    """Return the 1-based file line of each data row (after the header, skipping comments)."""
    numbers = []
    for n, line in enumerate(text.split(b"\n"), start=1):
        stripped = line.strip()
        if not stripped or stripped.startswith(b"#"):
            continue
        numbers.append(n)
    return numbers[1:rows + 1] + [0] * max(0, rows + 1 - len(numbers))


def _numbers(column, lines, label, what) -> np.ndarray:
    values = np.empty(len(column))
    for r, text in enumerate(column):
        try:
            values[r] = float(text)
        except ValueError:
            raise BasisFileError(f"{label} line {lines[r]}: {what} '{text}' is not a number") \
                from None
        if not math.isfinite(values[r]):
            raise BasisFileError(f"{label} line {lines[r]}: {what} is {text}")
    return values


def _rates(column, lines, ages, label, what) -> np.ndarray:
    q = _numbers(column, lines, label, what)
    bad = (q < 0) | (q > 1)
    if bad.any():
        r = int(np.flatnonzero(bad)[0])
        raise BasisFileError(f"{label} line {lines[r]}: {what} at age {ages[r]} is {q[r]}, "
                             "outside [0, 1]")
    return q
