"""The basis schema: the fields a basis file may carry beyond its tables (dates, approval,
rounding, blends, an improvement scale), every problem of a file reported at once with its
line, and which version of an id is the default.

Rates are the invented Fernhollow Mutual test rates of test_registry (Fernhollow Mutual is an
invented insurer); the improvement scales here are invented for the tests too.
"""

import datetime
import re
import tomllib

import numpy as np
import pytest

from service.app import DEFAULT_TABLES
from service.bases import load_registry
from service.bases.schema import BasisSchema, BasisSpec
from service.cli import main as cli
from tests.bases.test_registry import (
    RATES,
    SOUND_ID,
    SOUND_VERSION,
    assert_refused_beside_sound,
    basis_text,
    csv_mortality,
    law_mortality,
    write,
)

#: What an approved or retired basis must say besides (invented for the tests).
APPROVED = ('effective_date = 2026-01-01\n'
            'approval = { by = "Fernhollow Mutual test committee", on = 2025-12-01 }\n')
#: A sex-distinct mortality section on the sound test rates (ages 60 to 70).
TWO_SEXES = csv_mortality("data/sound.csv", "female") + "\n" + \
    csv_mortality("data/sound.csv", "male")


def two_sex_text(sections: str = "", *, extra: str = "", basis_id: str = "fernhollow-bad",
                 **kwargs) -> str:
    return basis_text(basis_id, "2026.1", TWO_SEXES + "\n" + sections, extra=extra, **kwargs)


def scale_csv(ages=range(60, 71), years=range(2020, 2025), rate=lambda a, y: 0.01) -> str:
    """An invented by-age-and-year scale."""
    lines = ["# Invented improvement rates for the tests.",
             "age," + ",".join(str(y) for y in years)]
    lines += [f"{a}," + ",".join(f"{rate(a, y):.4f}" for y in years) for a in ages]
    return "\n".join(lines) + "\n"


def improvement(file="data/scale.csv", kind="by-age-and-year", **more) -> str:
    lines = ["[improvement]", f'file = "{file}"', f'kind = "{kind}"', "base_year = 2020",
             'source = "Invented test scale"']
    lines += [f"{k} = {v}" for k, v in more.items()]
    return "\n".join(lines) + "\n"


# ---- the shipped files ------------------------------------------------------------------------


@pytest.mark.parametrize("path", sorted(DEFAULT_TABLES.rglob("*.toml")), ids=lambda p: p.name)
def test_the_schema_accepts_every_shipped_file(path):
    doc = tomllib.loads(path.read_text(encoding="utf-8"))
    spec = BasisSchema().load(doc)
    assert isinstance(spec, BasisSpec)
    assert (spec.id, spec.version, spec.status) == (doc["id"], doc["version"], doc["status"])
    assert spec.sexes == tuple(s for s in ("female", "male", "unisex") if s in doc["mortality"])
    if doc["status"] == "approved":
        assert isinstance(spec.approval.on, datetime.date)
        assert spec.effective_date == doc["effective_date"]


def test_the_pensioners_demo_basis_has_typed_values():
    registry = load_registry(DEFAULT_TABLES)
    basis = registry.resolve("fernhollow-pensioners")
    assert basis.age_definition == "nearest-birthday"
    assert basis.effective_date == datetime.date(2026, 1, 1)
    assert basis.approval.on == datetime.date(2025, 12, 15)
    assert (basis.rounding.places, basis.rounding.rule) == (4, "half-up")
    assert basis.names == ("female", "male", "mixed-70-30")
    assert len(basis.tables) == 3
    assert basis.table_index("mixed-70-30") == 2 and basis.table_index("male") == 1
    assert basis.table_index("unisex") is None
    assert basis.blends[0].weights == (("female", 0.3), ("male", 0.7))
    assert basis.improvement.projection == "generational"
    assert basis.improvement.scale.base_year == 2020
    # The blend on q, from the definition: q(x) = 0.7 q_male(x) + 0.3 q_female(x), with the
    # rates read straight from the shipped CSV files.
    q = {}
    for sex in ("female", "male"):
        rows = [line.split(",") for line in
                (DEFAULT_TABLES / f"data/fernhollow-2026-1-{sex}.csv").read_text().splitlines()
                if line and not line.startswith("#")][1:]
        q[sex] = {int(r[0]): float(r[1]) for r in rows}
    blended = basis.tables[2]
    for age in (40, 65, 90, 119):
        expected = 0.7 * q["male"][age] + 0.3 * q["female"][age]
        assert blended.q[age - blended.first_age] == pytest.approx(expected, rel=1e-15)
    # The scale read from its CSV: the rate at age 60 in 2020 is the stated 0.025.
    scale = basis.improvement.scale
    assert scale.rates[list(scale.ages).index(60), 0] == pytest.approx(0.025, abs=0)


def test_a_unisex_basis_answers_its_one_table_for_any_sex():
    basis = load_registry(DEFAULT_TABLES).resolve("standard-ultimate")
    assert basis.names == ("unisex",)
    assert [basis.table_index(s) for s in ("female", "male", "unisex", None)] == [0, 0, 0, 0]


def test_a_sound_file_with_every_new_field_loads(folder):
    write(folder, "data/scale.csv", scale_csv())
    write(folder, "full.toml", two_sex_text(
        '[blends.even]\nfemale = 0.5\nmale = 0.5\non = "survival"\n\n'
        '[rounding]\nplaces = 6\nrule = "half-even"\n\n'
        + improvement(long_term_rate=0.005, projection='"static"', year=2030),
        basis_id="fernhollow-full", extra='age_definition = "last-birthday"\n'
                                          'superseded_by = "2027.1"\n' + APPROVED))
    registry = load_registry(folder)
    assert registry.refused == ()
    basis = registry.resolve("fernhollow-full")
    assert basis.superseded_by == "2027.1" and basis.age_definition == "last-birthday"
    assert basis.improvement.year == 2030 and basis.improvement.kind == "by-age-and-year"
    assert basis.improvement.scale.long_term_rate == 0.005
    assert basis.names == ("female", "male", "even")
    # Blending a table with itself gives the same table, whatever the method (definition).
    np.testing.assert_allclose(basis.tables[2].q, list(RATES.values()), rtol=1e-15)


# ---- each new field's problems ----------------------------------------------------------------


@pytest.mark.parametrize("extra, sections, fragments", [
    ('age_definition = "birthday"\n', "", ("age_definition", "nearest-birthday", "birthday")),
    ('effective_date = "2026-01-01"\n', "", ("effective_date", "YYYY-MM-DD")),
    ("effective_date = 2026-01-01T09:00:00\n", "", ("effective_date", "no time")),
    ("", '[approval]\nby = "Committee"\non = "last week"\n', ("[approval].on", "YYYY-MM-DD")),
    ("", '[approval]\nby = " "\non = 2026-01-02\n', ("[approval].by", "empty")),
    ('superseded_by = "2026.1"\n', "", ("superseded_by", "another version")),
    ('superseded_by = "Next One"\n', "", ("superseded_by", "not allowed")),
    ("", "[rounding]\nplaces = 13\nrule = \"half-up\"\n", ("[rounding].places", "0 to 12")),
    ("", "[rounding]\nplaces = 4\nrule = \"up\"\n", ("[rounding].rule", "half-even")),
    ("", "[blends.mixed]\nfemale = 0.7\nmale = 0.2\n", ("[blends.mixed]", "sum to 1")),
    ("", "[blends.mixed]\nfemale = 1.2\nmale = -0.2\n", ("[blends.mixed].male", "negative")),
    ("", "[blends.mixed]\nfemale = 0.5\nunisex = 0.5\n",
     ("[blends.mixed].unisex", "no such sex table", "every sex table")),
    ("", "[blends.male]\nfemale = 0.5\nmale = 0.5\n", ("[blends.male]", "not a sex")),
    ("", "[blends.mixed]\nfemale = 0.5\nmale = 0.5\non = \"l\"\n", ("[blends.mixed].on",)),
    ("", "[methods.extra]\n", ("[methods].extra", "unknown key")),
    ("colour = \"green\"\n", "", ("colour", "unknown key")),
])
def test_bad_new_field_is_refused(folder, caplog, extra, sections, fragments):
    write(folder, "bad.toml", two_sex_text(sections, extra=extra))
    assert_refused_beside_sound(folder, caplog, "bad.toml", *fragments)


def test_a_blend_on_a_unisex_basis_is_refused(folder, caplog):
    write(folder, "bad.toml", basis_text("fernhollow-bad", "2026.1", law_mortality() +
                                         "\n[blends.mixed]\nfemale = 0.5\nmale = 0.5\n"))
    assert_refused_beside_sound(folder, caplog, "bad.toml", "[blends]", "sex-distinct")


@pytest.mark.parametrize("status", ("approved", "retired"))
def test_approved_or_retired_without_approval_is_refused(folder, caplog, status):
    write(folder, "bad.toml", two_sex_text(status=status))
    detail = assert_refused_beside_sound(folder, caplog, "bad.toml", "[approval]: is missing",
                                         "effective_date: is missing")
    assert f"status {status}" in detail


def test_retired_version_marked_default_is_refused(folder, caplog):
    write(folder, "bad.toml", two_sex_text(status="retired", default=True, extra=APPROVED))
    detail = assert_refused_beside_sound(folder, caplog, "bad.toml", "default",
                                         "never the default")
    assert "retired" in detail


@pytest.mark.parametrize("scale, sections, fragments", [
    # Columns wrong for the kind.
    ("age,rate\n60,0.01\n", improvement(),
     ("data/scale.csv", "age then calendar years", "line 1")),
    ("age,2020\n60,0.01\n", improvement(kind="by-age"), ("columns must be age,rate",)),
    # Years not consecutive: 2022 follows 2020 (the header is line 2).
    (scale_csv(years=(2020, 2022, 2023)), improvement(),
     ("line 2", "year 2022 follows year 2020", "consecutive")),
    # The scale stops at 68 but the tables run to 70.
    (scale_csv(ages=range(60, 69)), improvement(),
     ("covers ages 60 to 68", "ages 69 to 70 have no rate")),
    (scale_csv(ages=range(62, 71)), improvement(), ("ages 60 to 61 have no rate",)),
    # A rate of 1 or more, and one that is not a number (line 3 is age 60).
    (scale_csv(rate=lambda a, y: 1.0 if (a, y) == (61, 2021) else 0.01), improvement(),
     ("line 4", "age 61", "below 1")),
    (scale_csv().replace("60,0.0100", "60,nan"), improvement(), ("line 3", "nan")),
    # Static without its year; a year on a generational projection.
    (scale_csv(), improvement(projection='"static"'), ("[improvement].year", "static")),
    (scale_csv(), improvement(year=2030), ("[improvement].year", "only a static")),
    # long_term_from belongs to a by-age scale.
    (scale_csv(), improvement(long_term_from=2040), ("[improvement].long_term_from", "by-age")),
    (scale_csv(), improvement(long_term_rate=1.5), ("[improvement].long_term_rate", "below 1")),
    (scale_csv(), improvement(kind="by-year"), ("[improvement].kind", "by-age-and-year")),
    (scale_csv(), improvement().replace('source = "Invented test scale"\n', ""),
     ("[improvement].source", "missing")),
    (None, improvement(file="data/absent.csv"), ("data/absent.csv", "cannot read")),
])
def test_bad_improvement_scale_is_refused(folder, caplog, scale, sections, fragments):
    if scale is not None:
        write(folder, "data/scale.csv", scale)
    write(folder, "bad.toml", two_sex_text(sections))
    assert_refused_beside_sound(folder, caplog, "bad.toml", *fragments)


def test_a_by_age_scale_with_long_term_from_loads(folder):
    write(folder, "data/scale.csv", "age,rate\n" + "".join(f"{a},0.02\n" for a in range(50, 81)))
    write(folder, "ok.toml", two_sex_text(
        improvement(kind="by-age", long_term_rate=0.01, long_term_from=2040),
        basis_id="fernhollow-ok"))
    basis = load_registry(folder).resolve("fernhollow-ok")
    assert basis.improvement.scale.long_term_from == 2040
    assert basis.improvement.scale.years is None


def test_the_scale_file_is_in_the_digest(folder):
    write(folder, "data/scale.csv", scale_csv())
    write(folder, "ok.toml", two_sex_text(improvement(), basis_id="fernhollow-ok"))
    before = load_registry(folder).resolve("fernhollow-ok").digest
    write(folder, "data/scale.csv", scale_csv(rate=lambda a, y: 0.0101 if a == 65 else 0.01))
    assert load_registry(folder).resolve("fernhollow-ok").digest != before


# ---- every problem of a file at once ----------------------------------------------------------


def line_of(text: str, start: str, after: str | None = None) -> int:
    """The 1-based number of the first line starting with ``start`` (below ``after``)."""
    lines = text.splitlines()
    first = 0 if after is None else lines.index(after)
    return next(n for n, line in enumerate(lines[first:], start=first + 1)
                if line.startswith(start))


def test_check_tables_lists_every_problem_of_a_file_with_its_line(folder, capsys):
    write(folder, "data/bad.csv", "# Invented.\nage,q\n60,0.5\n61,1.5\n62,1\n")
    text = two_sex_text(
        '[blends.mixed]\nfemale = 0.6\nmale = 0.6\n\n[rounding]\nplaces = 4\nrule = "up"\n',
        extra='age_definition = "birthday"\neffective_date = "2026-01-01"\n')
    text = text.replace('[mortality.male]\nfile = "data/sound.csv"',
                        '[mortality.male]\nfile = "data/bad.csv"')
    write(folder, "bad.toml", text)
    code = cli(["check-tables", str(folder)])
    lines = capsys.readouterr().out.splitlines()
    assert code == 1
    assert "REFUSED  bad.toml: 5 problems" in lines
    listed = [line for line in lines if line.startswith("  - ")]
    expected = [
        (line_of(text, "age_definition"), "age_definition: must be one of"),
        (line_of(text, "effective_date"), "effective_date: must be a date"),
        (line_of(text, "rule", "[rounding]"), "[rounding].rule: must be one of"),
        (line_of(text, "[blends.mixed]"), "[blends.mixed]: the weights must sum to 1"),
        # The data file's own line: age 61 is on line 4 of data/bad.csv.
        (4, "[mortality.male] data/bad.csv line 4: q at age 61 is 1.5"),
    ]
    assert len(listed) == len(expected), listed
    for line, fragment in expected:
        if fragment.startswith("[mortality"):
            assert any(fragment in item for item in listed), (fragment, listed)
        else:
            assert any(f"bad.toml line {line}: {fragment}" in item for item in listed), \
                (line, fragment, listed)
    # The short reason names the first problem and counts the rest, quoting nothing.
    refusal = load_registry(folder).refused[0]
    assert refusal.reason == (f"line {line_of(text, 'age_definition')}: age_definition: must "
                              "be one of exact, last-birthday, nearest-birthday (and 4 more "
                              "problems)")
    assert "birthday\"" not in refusal.reason


def test_a_reason_never_quotes_a_key_from_the_file(folder):
    write(folder, "bad.toml", two_sex_text('[blends."secret\\u001b"]\nfemale = 1.0\nmale = 0\n'))
    refusal = load_registry(folder).refused[0]
    assert "secret" not in refusal.reason and "[blends.*]" in refusal.reason
    assert "secret" in refusal.detail


# ---- the default version ----------------------------------------------------------------------


def with_digest(folder, name: str, text: str) -> None:
    """Write a basis file with the digest of its content recorded (as an operator would, after
    reading it from the refusal)."""
    write(folder, name, text)
    detail = next(r.detail for r in load_registry(folder).refused if r.file == name)
    digest = re.search(r'digest = "(sha256:[0-9a-f]{64})"', detail).group(1)
    write(folder, name, text.replace('purpose =', f'digest = "{digest}"\npurpose =', 1))


def test_the_latest_retired_version_is_never_the_default(folder):
    versions = "fernhollow-versions"
    for version, status in (("2025.1", "demo"), ("2026.1", "demo"), ("2027.1", "retired")):
        text = basis_text(versions, version, law_mortality(), status=status,
                          extra=APPROVED if status == "retired" else "")
        if status == "retired":
            with_digest(folder, f"{version}.toml", text)
        else:
            write(folder, f"{version}.toml", text)
    registry = load_registry(folder)
    assert registry.refused == ()
    assert registry.default_version(versions) == "2026.1"
    assert registry.resolve(versions).version == "2026.1"
    flags = {v: registry.is_default(registry.resolve(f"{versions}@{v}"))
             for v in ("2025.1", "2026.1", "2027.1")}
    assert flags == {"2025.1": False, "2026.1": True, "2027.1": False}
    # The retired version is still served when pinned.
    assert registry.resolve(f"{versions}@2027.1").status == "retired"
    assert registry.default_version("fernhollow-unknown") is None
    assert registry.is_default(registry.resolve(SOUND_ID))
    assert registry.default_version(SOUND_ID) == SOUND_VERSION


def test_only_retired_versions_leave_an_id_without_a_default(folder):
    with_digest(folder, "old.toml", basis_text("fernhollow-old", "2020.1", law_mortality(),
                                               status="retired", extra=APPROVED))
    registry = load_registry(folder)
    assert registry.refused == ()
    assert registry.default_version("fernhollow-old") is None
    assert not registry.is_default(registry.resolve("fernhollow-old@2020.1"))


def test_a_marked_default_wins_over_the_latest(folder):
    write(folder, "a.toml", basis_text("fernhollow-marked", "2025.1", law_mortality(),
                                       default=True))
    write(folder, "b.toml", basis_text("fernhollow-marked", "2026.1", law_mortality()))
    registry = load_registry(folder)
    assert registry.default_version("fernhollow-marked") == "2025.1"
    assert not registry.is_default(registry.resolve("fernhollow-marked@2026.1"))
