"""Importing rate tables in the open XML standard (service/bases/xml_import.py).

Every file is built here. Rates are invented for the invented insurer Fernhollow Mutual, or
generated from the Standard Ultimate Survival Model's Makeham law (A = 0.00022, B = 2.7e-6,
c = 1.124; Dickson, Hardy and Waters, Actuarial Mathematics for Life Contingent Risks) and its
select model (q[x]+s = 0.9^(2-s) q(x+s), same book) for the round trips, which check an
imported table against the same rates written as CSV by the test and against the shipped
law-based bases.
"""

import hashlib
import math
import os
import re
import socket
import tomllib

import numpy as np
import pytest
from numpy.testing import assert_allclose

from service.app import DEFAULT_TABLES
from service.bases import load_registry, xml_import
from service.bases.registry import MAX_FILE_BYTES
from service.bases.xml_import import ImportRefused, default_names, import_xml, toml_string
from service.cli import main as cli
from service.engine.annuity import Item, Life, Payments, Valuation, value_annuities

# ---- building files ------------------------------------------------------------------------

#: Invented Fernhollow Mutual ultimate rates, ages 60 to 70, closing with q = 1.
FERNHOLLOW = {60: 0.0100, 61: 0.0112, 62: 0.0125, 63: 0.0140, 64: 0.0157, 65: 0.0176,
              66: 0.0198, 67: 0.0222, 68: 0.0250, 69: 0.0281, 70: 1.0}
#: Invented select rates for lives selected at 60 to 66: 70% then 85% of the ultimate rate
#: at the attained age.
FERNHOLLOW_SELECT = {x: {1: round(0.70 * FERNHOLLOW[x], 6), 2: round(0.85 * FERNHOLLOW[x + 1], 6)}
                     for x in range(60, 67)}
#: Invented improvement rates by age and calendar year.
IMPROVEMENT = {age: {year: round(0.02 - 0.0002 * (age - 60) - 0.001 * (year - 2025), 6)
                     for year in range(2025, 2029)} for age in range(60, 64)}


def axis_def(scale: str, first, last, increment=1, name: str | None = None) -> str:
    name_part = f"<AxisName>{name}</AxisName>" if name else ""
    return (f"<AxisDef><ScaleType tc=\"1\">{scale}</ScaleType>{name_part}"
            f"<MinScaleValue>{first}</MinScaleValue><MaxScaleValue>{last}</MaxScaleValue>"
            f"<Increment>{increment}</Increment></AxisDef>")


def ys(values: dict) -> str:
    return "".join(f'<Y t="{t}">{v}</Y>' for t, v in values.items())


def one_axis(values: dict, *, scale="Age", description="Fernhollow ultimate",
             axis: str | None = None, meta_extra="") -> str:
    ages = list(values)
    axis = axis if axis is not None else axis_def(scale, ages[0], ages[-1])
    return (f"<Table><MetaData><ScalingFactor>0</ScalingFactor>"
            f"<DataType tc=\"1\">Floating Point</DataType>"
            f"<TableDescription>{description}</TableDescription>{meta_extra}{axis}</MetaData>"
            f"<Values><Axis>{ys(values)}</Axis></Values></Table>")


def two_axes(values: dict, scales=("Issue Age", "Duration"), *, nested=True,
             description="Fernhollow select", axes: str | None = None) -> str:
    outer = list(values)
    inner = list(next(iter(values.values())))
    if axes is None:
        axes = (axis_def(scales[0], outer[0], outer[-1])
                + axis_def(scales[1], inner[0], inner[-1]))
    rows = "".join(
        f'<Axis t="{t}"><Axis>{ys(row)}</Axis></Axis>' if nested
        else f'<Axis t="{t}">{ys(row)}</Axis>'
        for t, row in values.items())
    return (f"<Table><MetaData><TableDescription>{description}</TableDescription>{axes}"
            f"</MetaData><Values>{rows}</Values></Table>")


def document(*tables: str, content_type="Annuitant Mortality",
             name="Fernhollow Mutual annuitants (invented)", namespace: str | None = "default",
             classification_extra="", prolog="") -> str:
    ns = {"default": ' xmlns="http://tables.example.invalid/rates"', None: ""}.get(
        namespace, namespace)
    return (f'<?xml version="1.0" encoding="utf-8"?>\n{prolog}<XTbML{ns}>\n'
            f"<ContentClassification><TableIdentity>17</TableIdentity>"
            f"<ProviderName>Fernhollow Mutual</ProviderName>"
            f"<ContentType tc=\"5\">{content_type}</ContentType>"
            f"<TableName>{name}</TableName>{classification_extra}</ContentClassification>\n"
            + "\n".join(tables) + "\n</XTbML>\n")


def ultimate_file(rates=None, **kwargs) -> str:
    return document(one_axis(FERNHOLLOW if rates is None else rates), **kwargs)


def write_xml(folder, text, name="fernhollow-annuitants-2026.1.xml"):
    path = folder / name
    path.write_bytes(text.encode("utf-8") if isinstance(text, str) else text)
    return path


def snapshot(folder) -> dict:
    """Every file under ``folder`` (names and bytes), to show that nothing changed."""
    if not folder.exists():
        return {}
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*"))
            if p.is_file()}


def refused(tmp_path, text, *fragments, name="fernhollow-annuitants-2026.1.xml",
            **options) -> str:
    """Import ``text``; check it is refused, names every fragment, and wrote nothing."""
    path = write_xml(tmp_path, text, name)
    out = tmp_path / "out"
    before = sorted(os.listdir(tmp_path))
    with pytest.raises(ImportRefused) as caught:
        import_xml(path, out, **options)
    message = str(caught.value)
    for fragment in fragments:
        assert fragment in message, (fragment, message)
    assert message.isascii() and message.isprintable(), message
    assert not out.exists()
    assert sorted(os.listdir(tmp_path)) == before  # no staging folder left behind
    return message


def imported(tmp_path, text, name="fernhollow-annuitants-2026.1.xml", out=None, **options):
    path = write_xml(tmp_path, text, name)
    out = out or tmp_path / "out"
    done = import_xml(path, out, **options)
    return done, out


def loaded(out):
    """The registry over ``out``: nothing refused; returns the registry."""
    registry = load_registry(out)
    assert registry.refused == ()
    return registry


def check_tables(folder, capsys) -> tuple[int, str]:
    code = cli(["check-tables", str(folder)])
    out = capsys.readouterr()
    return code, out.out + out.err


# ---- structures: ultimate, select and ultimate, several tables, improvement ----------------


class TestUltimate:
    def test_one_age_axis_becomes_age_q_with_the_rates_read_exactly(self, tmp_path, capsys):
        text = ultimate_file()
        done, out = imported(tmp_path, text)
        assert done.basis_file == "fernhollow-annuitants-2026.1.toml"
        assert done.data_files == ("data/fernhollow-annuitants-2026.1-unisex.csv",)
        basis = loaded(out).resolve("fernhollow-annuitants@2026.1")
        table = basis.tables[0]
        assert (table.first_age, table.last_age, table.select_period) == (60, 70, 0)
        # Each rate reads back as the very double written in the XML.
        assert_allclose(table.q, list(FERNHOLLOW.values()), rtol=0, atol=0)
        code, printed = check_tables(out, capsys)
        assert code == 0, printed
        assert f"ok       fernhollow-annuitants@2026.1 (default)  demo  {basis.digest}" in printed
        assert done.digest == basis.digest

    def test_basis_records_demo_status_and_the_files_sha256_and_metadata(self, tmp_path):
        text = ultimate_file()
        done, out = imported(tmp_path, text)
        sha = hashlib.sha256(text.encode("utf-8")).hexdigest()
        assert done.sha256 == sha
        doc = tomllib.loads((out / done.basis_file).read_text())
        assert doc["status"] == "demo"
        assert "digest" not in doc
        assert doc["source"].startswith(f"fernhollow-annuitants-2026.1.xml (SHA-256 {sha})")
        assert "Fernhollow Mutual annuitants (invented)" in doc["source"]
        assert "table identity 17" in doc["source"]
        assert doc["title"] == "Fernhollow Mutual annuitants (invented)"
        assert doc["mortality"]["unisex"]["source"] == (
            "fernhollow-annuitants-2026.1.xml, table 1 (ultimate): Fernhollow ultimate")
        csv = (out / "data/fernhollow-annuitants-2026.1-unisex.csv").read_text()
        assert csv.splitlines()[0] == (f"# Mortality imported from fernhollow-annuitants-2026.1"
                                       f".xml (SHA-256 {sha}), table 1 (ultimate).")

    @pytest.mark.parametrize("namespace", ["none", "default", "prefixed"])
    def test_namespaces_present_or_absent_read_alike(self, tmp_path, namespace):
        text = ultimate_file(namespace=None if namespace != "default" else "default")
        if namespace == "prefixed":  # every element as r:Name
            declaration, body = text.split("\n", 1)
            body = re.sub(r"<(/?)([A-Za-z]+)", r"<\1r:\2", body)
            body = body.replace("<r:XTbML", '<r:XTbML xmlns:r="urn:example:rates"', 1)
            text = declaration + "\n" + body
            assert "<r:Y t=" in text
        _, out = imported(tmp_path, text)
        table = loaded(out).resolve("fernhollow-annuitants").tables[0]
        assert_allclose(table.q, list(FERNHOLLOW.values()), rtol=0, atol=0)

    def test_names_come_from_the_options(self, tmp_path):
        done, out = imported(tmp_path, ultimate_file(), basis_id="fm-import",
                             version="2027.2")
        assert done.basis_file == "fm-import-2027.2.toml"
        assert loaded(out).resolve("fm-import").version == "2027.2"


class TestSelectAndUltimate:
    def test_select_table_pairs_with_the_ultimate_table_after_it(self, tmp_path):
        text = document(two_axes(FERNHOLLOW_SELECT), one_axis(FERNHOLLOW))
        done, out = imported(tmp_path, text)
        table = loaded(out).resolve("fernhollow-annuitants").tables[0]
        assert (table.first_age, table.last_age, table.select_period) == (60, 70, 2)
        assert (table.select_first_age, table.select_last_age) == (60, 66)
        # Duration 1 (the first year after selection) is q_select_0.
        expected = [[row[1], row[2]] for row in FERNHOLLOW_SELECT.values()]
        assert_allclose(table.select_q, expected, rtol=0, atol=0)
        assert_allclose(table.q, list(FERNHOLLOW.values()), rtol=0, atol=0)
        lines = (out / done.data_files[0]).read_text().splitlines()
        assert lines[2] == "age,q,q_select_0,q_select_1"
        assert lines[-1] == "70,1.0,,"  # no select rates past the select ages
        doc = tomllib.loads((out / done.basis_file).read_text())
        assert doc["mortality"]["unisex"]["source"].endswith(
            "table 1 (select) with table 2 (ultimate): Fernhollow select / Fernhollow ultimate")

    def test_select_values_directly_in_the_outer_axis_read_the_same(self, tmp_path):
        nested = document(two_axes(FERNHOLLOW_SELECT), one_axis(FERNHOLLOW))
        flat = document(two_axes(FERNHOLLOW_SELECT, nested=False), one_axis(FERNHOLLOW))
        _, out_nested = imported(tmp_path, nested, out=tmp_path / "a")
        _, out_flat = imported(tmp_path, flat, out=tmp_path / "b")
        a = loaded(out_nested).resolve("fernhollow-annuitants").tables[0]
        b = loaded(out_flat).resolve("fernhollow-annuitants").tables[0]
        assert_allclose(a.select_q, b.select_q, rtol=0, atol=0)

    def test_duration_as_the_outer_axis_is_transposed(self, tmp_path):
        by_duration = {d: {x: FERNHOLLOW_SELECT[x][d] for x in FERNHOLLOW_SELECT}
                       for d in (1, 2)}
        text = document(two_axes(by_duration, scales=("Duration", "Age at selection")),
                        one_axis(FERNHOLLOW))
        _, out = imported(tmp_path, text)
        table = loaded(out).resolve("fernhollow-annuitants").tables[0]
        expected = [[row[1], row[2]] for row in FERNHOLLOW_SELECT.values()]
        assert_allclose(table.select_q, expected, rtol=0, atol=0)

    def test_select_table_without_its_ultimate_is_refused(self, tmp_path):
        refused(tmp_path, document(two_axes(FERNHOLLOW_SELECT)), "Table 1",
                "must be followed in the file by its ultimate table")
        refused(tmp_path, document(two_axes(FERNHOLLOW_SELECT), two_axes(FERNHOLLOW_SELECT),
                                   one_axis(FERNHOLLOW)),
                "Table 1", "must be followed in the file by its ultimate table")

    def test_ultimate_starting_later_is_refused_unless_first_age_is_given(self, tmp_path):
        later = {x: q for x, q in FERNHOLLOW.items() if x >= 62}
        text = document(two_axes(FERNHOLLOW_SELECT), one_axis(later))
        refused(tmp_path, text, "Table 1", "select ages start at 60",
                "ultimate ages (table 2) at 62", "give --first-age 62")
        done, out = imported(tmp_path, text, first_age=62)
        table = loaded(out).resolve("fernhollow-annuitants").tables[0]
        assert (table.first_age, table.select_first_age, table.select_last_age) == (62, 62, 66)
        expected = [[FERNHOLLOW_SELECT[x][1], FERNHOLLOW_SELECT[x][2]] for x in range(62, 67)]
        assert_allclose(table.select_q, expected, rtol=0, atol=0)
        source = tomllib.loads((out / done.basis_file).read_text())["mortality"]["unisex"]
        assert source["source"].endswith("; ages from 62 only")

    def test_duration_axis_must_start_at_one(self, tmp_path):
        shifted = {x: {0: r[1], 1: r[2]} for x, r in FERNHOLLOW_SELECT.items()}
        refused(tmp_path, document(two_axes(shifted), one_axis(FERNHOLLOW)),
                "Table 1", "the duration axis starts at 0")


class TestSeveralTables:
    FEMALE = {x: round(q * 0.8, 6) if q < 1 else 1.0 for x, q in FERNHOLLOW.items()}

    def text(self):
        return document(one_axis(self.FEMALE, description="female"),
                        two_axes(FERNHOLLOW_SELECT, description="male select"),
                        one_axis(FERNHOLLOW, description="male ultimate"))

    def test_several_tables_need_to_be_named_by_sex(self, tmp_path):
        message = refused(tmp_path, self.text(), "holds 2 mortality tables",
                          "table 1 (ultimate); table 2 (select) with table 3 (ultimate)",
                          "--table female=N --table male=N")
        assert "line" not in message.split(":")[0]

    def test_female_and_male_tables_by_number(self, tmp_path, capsys):
        done, out = imported(tmp_path, self.text(), tables={"male": 2, "female": 1})
        assert done.data_files == ("data/fernhollow-annuitants-2026.1-female.csv",
                                   "data/fernhollow-annuitants-2026.1-male.csv")
        basis = loaded(out).resolve("fernhollow-annuitants")
        assert basis.sexes == ("female", "male")
        female, male = basis.tables
        assert_allclose(female.q, list(self.FEMALE.values()), rtol=0, atol=0)
        assert (female.select_period, male.select_period) == (0, 2)
        assert_allclose(male.q, list(FERNHOLLOW.values()), rtol=0, atol=0)
        assert check_tables(out, capsys)[0] == 0

    @pytest.mark.parametrize(("tables", "fragment"), [
        ({"male": 3, "female": 1}, "no mortality table is numbered 3"),
        ({"male": 2}, "name either one unisex table or a female and a male one"),
        ({"female": 2, "male": 2}, "must be different tables"),
        ({"unisex": 1, "male": 2}, "name either one unisex table"),
        ({"other": 1}, "the sex must be one of female, male, unisex"),
    ])
    def test_a_wrong_choice_of_tables_is_refused(self, tmp_path, tables, fragment):
        refused(tmp_path, self.text(), fragment, tables=tables)


class TestClosing:
    OPEN = {x: q for x, q in FERNHOLLOW.items() if x < 70}  # ends at 69 with q = 0.0281

    def test_a_table_not_closing_with_q_one_is_refused(self, tmp_path):
        refused(tmp_path, ultimate_file(self.OPEN), "Table 1",
                "ends at age 69 with q = 0.0281, not 1", "give --close-at 70")

    def test_close_at_appends_q_one_at_the_next_age(self, tmp_path):
        done, out = imported(tmp_path, ultimate_file(self.OPEN), close_at=70)
        table = loaded(out).resolve("fernhollow-annuitants").tables[0]
        assert_allclose(table.q, list(FERNHOLLOW.values()), rtol=0, atol=0)
        doc = tomllib.loads((out / done.basis_file).read_text())
        assert doc["mortality"]["unisex"]["source"].endswith("; q = 1 appended at age 70 at "
                                                             "import")
        assert "was appended at import" in (out / done.data_files[0]).read_text()

    @pytest.mark.parametrize("age", [69, 71, 90])
    def test_close_at_elsewhere_is_refused(self, tmp_path, age):
        refused(tmp_path, ultimate_file(self.OPEN), f"--close-at {age}",
                "can be appended only at age 70", close_at=age)

    def test_close_at_on_tables_already_closed_is_refused(self, tmp_path):
        refused(tmp_path, ultimate_file(), "--close-at 71 was given but every table already "
                                           "closes with q = 1", close_at=71)


class TestImprovement:
    def test_improvement_file_by_age_and_year_writes_only_the_scale(self, tmp_path, capsys):
        by_year = {y: {a: IMPROVEMENT[a][y] for a in IMPROVEMENT} for y in range(2025, 2029)}
        text = document(two_axes(by_year, scales=("Calendar Year", "Attained Age"),
                                 description="Fernhollow improvement"),
                        content_type="Mortality Improvement Scale")
        path = write_xml(tmp_path, text, "fernhollow-improvement-2026.xml")
        code = cli(["import-xml", str(path), str(tmp_path / "out")])
        printed = capsys.readouterr().out
        assert code == 0
        assert "no basis written: the file holds no mortality table" in printed
        assert "name it in a basis' [improvement] to use it" in printed
        files = snapshot(tmp_path / "out")
        assert list(files) == ["data/fernhollow-improvement-2026-improvement-1.csv"]
        lines = files["data/fernhollow-improvement-2026-improvement-1.csv"].decode().splitlines()
        assert lines[0].startswith("# Improvement scale imported from "
                                   "fernhollow-improvement-2026.xml (SHA-256 ")
        assert lines[2] == "# Annual rates of mortality improvement by age (rows) and " \
                           "calendar year (columns)."
        assert lines[3] == "age,2025,2026,2027,2028"  # rows by age whatever the file's order
        rows = [[float(v) for v in line.split(",")] for line in lines[4:]]
        expected = [[age, *IMPROVEMENT[age].values()] for age in IMPROVEMENT]
        assert_allclose(rows, expected, rtol=0, atol=0)

    def test_improvement_by_age_alone(self, tmp_path):
        rates = {60: 0.015, 61: 0.0145, 62: -0.002}
        done, out = imported(tmp_path, document(one_axis(rates),
                                                content_type="Projection Scale"))
        assert (done.basis_file, done.data_files) == (None, ())
        lines = (out / done.scale_files[0]).read_text().splitlines()
        assert lines[3:] == ["age,rate", "60,0.015", "61,0.0145", "62,-0.002"]

    def test_mortality_file_with_a_scale_named_by_improvement(self, tmp_path, capsys):
        text = document(one_axis(FERNHOLLOW), two_axes(IMPROVEMENT, ("Age", "Year")))
        refused(tmp_path, text, "Table 2", "generational table", "--improvement 2")
        done, out = imported(tmp_path, text, improvement=[2])
        assert done.scale_files == ("data/fernhollow-annuitants-2026.1-improvement-2.csv",)
        toml_text = (out / done.basis_file).read_text()
        assert "This basis values without" in toml_text
        assert ('# [improvement]  # table 2, by age (rows) and calendar year (columns)\n'
                '# file = "data/fernhollow-annuitants-2026.1-improvement-2.csv"') in toml_text
        assert check_tables(out, capsys)[0] == 0

    def test_an_imported_scale_loads_once_its_section_is_completed(self, tmp_path):
        # Round trip: the scale CSV the import writes is the one a basis' [improvement]
        # reads; uncommenting the skeleton's section (base year settled) loads it.
        ages = sorted(FERNHOLLOW)
        scale = {age: {year: 0.01 + 0.001 * (year - 2025) for year in range(2025, 2029)}
                 for age in ages}
        text = document(one_axis(FERNHOLLOW), two_axes(scale, ("Age", "Year")))
        done, out = imported(tmp_path, text, improvement=[2])
        basis_path = out / done.basis_file
        lines = basis_path.read_text().splitlines()
        start = lines.index("# [improvement]  # table 2, by age (rows) and calendar year "
                            "(columns)")
        section = [line.removeprefix("# ") for line in lines[start:start + 8]]
        section[0] = "[improvement]"
        section[3] = "base_year = 2025"
        basis_path.write_text("\n".join(lines[:start] + section + lines[start + 8:]) + "\n")
        registry = load_registry(out)
        assert not registry.refused, [r.detail for r in registry.refused]
        (basis,) = registry.listing()
        got = basis.improvement.scale
        assert (got.base_year, got.years.tolist()) == (2025, [2025, 2026, 2027, 2028])
        assert_allclose(got.rates, [[scale[a][y] for y in range(2025, 2029)] for a in ages],
                        rtol=0, atol=1e-15)

    def test_improvement_rates_outside_half_are_refused(self, tmp_path):
        refused(tmp_path, document(one_axis({60: 1.5, 61: 1.4}),
                                   content_type="Improvement Scale"),
                "Table 1 > Values > Axis > Y t='60'", "improvement rate '1.5' lies outside")

    def test_a_table_named_by_improvement_must_exist(self, tmp_path):
        refused(tmp_path, ultimate_file(), "--improvement 4: there is no table 4",
                improvement=[4])


# ---- malformed and hostile files -----------------------------------------------------------


class TestHostile:
    def test_billion_laughs_is_refused_before_any_expansion(self, tmp_path):
        entities = '<!ENTITY lol "lol">' + "".join(
            f'<!ENTITY lol{n} "{("&lol" + str(n - 1) + ";") * 10 if n > 1 else "&lol;" * 10}">'
            for n in range(1, 10))
        text = document(one_axis(FERNHOLLOW), prolog=f"<!DOCTYPE XTbML [{entities}]>\n",
                        name="&lol9;")
        refused(tmp_path, text, "line 2", "declares a document type (DTD)")

    def test_external_file_entity_is_refused_and_never_read(self, tmp_path):
        secret = tmp_path / "secret.txt"
        secret.write_text("FERNHOLLOW_API_KEY=not-for-anyone-to-see")
        text = document(one_axis(FERNHOLLOW), name="&leak;",
                        prolog=f'<!DOCTYPE XTbML [<!ENTITY leak SYSTEM "file://{secret}">]>\n')
        message = refused(tmp_path, text, "DTD")
        assert "not-for-anyone-to-see" not in message

    def test_network_entity_is_refused_and_nothing_is_fetched(self, tmp_path):
        with socket.create_server(("127.0.0.1", 0)) as server:
            port = server.getsockname()[1]
            for prolog in (f'<!DOCTYPE XTbML [<!ENTITY far SYSTEM "http://127.0.0.1:{port}/">]>',
                           f'<!DOCTYPE XTbML SYSTEM "http://127.0.0.1:{port}/rates.dtd">',
                           f'<!DOCTYPE XTbML [<!ENTITY % far SYSTEM "http://127.0.0.1:{port}/">'
                           "%far;]>"):
                refused(tmp_path, document(one_axis(FERNHOLLOW), prolog=prolog + "\n",
                                           name="&far;"), "DTD")
            server.settimeout(0.2)
            with pytest.raises(TimeoutError):
                server.accept()  # no one connected

    def test_an_undefined_entity_is_not_well_formed(self, tmp_path):
        refused(tmp_path, ultimate_file(name="&undefined;"), "line 3", "not well-formed XML",
                "undefined entity")

    def test_deep_nesting_is_refused(self, tmp_path):
        deep = "<Comments>" * 5000 + "</Comments>" * 5000
        refused(tmp_path, ultimate_file(classification_extra=deep),
                f"elements nested more than {xml_import.MAX_DEPTH} deep")

    def test_too_many_elements_are_refused(self, tmp_path, monkeypatch):
        monkeypatch.setattr(xml_import, "MAX_ELEMENTS", 20)
        refused(tmp_path, ultimate_file(), "more than 20 elements")

    def test_a_file_over_the_size_cap_is_refused_unread(self, tmp_path):
        path = tmp_path / "big.xml"
        with open(path, "wb") as handle:
            handle.write(ultimate_file().encode())
            handle.truncate(MAX_FILE_BYTES + 1)
        with pytest.raises(ImportRefused, match=f"larger than {MAX_FILE_BYTES} bytes"):
            import_xml(path, tmp_path / "out")
        assert not (tmp_path / "out").exists()

    @pytest.mark.parametrize(("text", "fragments"), [
        ("not XML at all", ("line 1, column 0", "not well-formed XML")),
        (ultimate_file()[:-40], ("not well-formed XML",)),
        ('<?xml version="1.0"?><Rates/>', ("the root element is 'Rates', not XTbML",)),
        (ultimate_file().replace("ContentClassification>", "Classification>"),
         ("line 3, XTbML", "unexpected element 'Classification'")),
        (ultimate_file().replace('<ContentType tc="5">Annuitant Mortality</ContentType>', ""),
         ("ContentClassification: ContentType is missing",)),
        (ultimate_file(content_type="Lapse"), ("content type 'Lapse' is neither",)),
        (document(content_type="Annuitant Mortality"), ("the file holds no Table",)),
    ])
    def test_a_malformed_file_is_refused(self, tmp_path, text, fragments):
        refused(tmp_path, text, *fragments)

    def test_an_unknown_encoding_is_refused(self, tmp_path):
        refused(tmp_path, ultimate_file().replace('encoding="utf-8"', 'encoding="x-fernhollow"'),
                "line 1: the declared encoding cannot be read")

    def test_bytes_that_are_not_the_declared_encoding_are_refused(self, tmp_path):
        raw = ultimate_file().encode().replace(b"(invented)", b"(\xff\xfe)")
        refused(tmp_path, raw, "line 3, column 196: not well-formed XML (invalid token)")

    def test_any_encoding_xml_allows_reads_alike(self, tmp_path):
        text = ultimate_file(name="Fernhollow \u00e9tude").replace('encoding="utf-8"',
                                                                   'encoding="utf-16"')
        done, out = imported(tmp_path, text.encode("utf-16"))
        assert tomllib.loads((out / done.basis_file).read_text())["title"] == (
            "Fernhollow \u00e9tude")
        assert_allclose(loaded(out).resolve("fernhollow-annuitants").tables[0].q,
                        list(FERNHOLLOW.values()), rtol=0, atol=0)

    def test_an_element_nowhere_in_the_format_inside_values_is_refused(self, tmp_path):
        text = ultimate_file().replace(
            "<Values>", '<Values><xi:include xmlns:xi="http://www.w3.org/2001/XInclude" '
                        'href="file:///etc/passwd"/>')
        refused(tmp_path, text, "Table 1 > Values", "unexpected element 'include'")

    def test_unknown_metadata_is_ignored(self, tmp_path):
        text = ultimate_file(classification_extra="<KeyWord>annuitants</KeyWord>"
                                                  "<Comments>invented</Comments>")
        text = text.replace("<MetaData>", "<MetaData><Nation tc=\"0\">Nowhere</Nation>")
        _, out = imported(tmp_path, text)
        assert loaded(out).resolve("fernhollow-annuitants").tables[0].last_age == 70


def replace_y(age: int, text: str) -> str:
    return ultimate_file().replace(f'<Y t="{age}">{FERNHOLLOW[age]}</Y>',
                                   f'<Y t="{age}">{text}</Y>')


class TestValues:
    @pytest.mark.parametrize(("text", "fragment"), [
        ("NaN", "'NaN' is not a number"),
        ("inf", "'inf' is not a number"),
        ("-Infinity", "'-Infinity' is not a number"),
        ("1e400", "'1e400' is not a finite number"),
        ("-0.001", "q '-0.001' lies outside [0.0, 1.0]"),
        ("1.5", "q '1.5' lies outside [0.0, 1.0]"),
        ("", "the value is empty"),
        ("abc", "'abc' is not a number"),
        ("0x1p-3", "'0x1p-3' is not a number"),
        ("1_0", "'1_0' is not a number"),
        ("0.01<b/>", "Y must hold a number, not elements"),
        pytest.param("0." + "1" * 200_000 + "x", "is too long to be a rate",
                     id="200k-digits"),
    ])
    def test_a_bad_value_is_refused_naming_its_place(self, tmp_path, text, fragment):
        message = refused(tmp_path, replace_y(63, text),
                          "line 4, Table 1 > Values > Axis > Y t='63'", fragment)
        assert message.startswith("fernhollow-annuitants-2026.1.xml line 4")

    def test_white_space_around_a_number_is_allowed(self, tmp_path):
        _, out = imported(tmp_path, replace_y(63, "\n  0.0140  \n"))
        table = loaded(out).resolve("fernhollow-annuitants").tables[0]
        assert_allclose(table.q[3], 0.014, rtol=0, atol=0)


class TestAxes:
    @pytest.mark.parametrize(("axis", "fragment"), [
        ("", "MetaData: AxisDef is missing"),
        (axis_def("Age", 60, 70).replace("<MinScaleValue>60</MinScaleValue>", ""),
         "AxisDef 1: MinScaleValue is missing"),
        (axis_def("Age", "60.5", 70), "MinScaleValue: '60.5' is not a whole number"),
        (axis_def("Age", 60, 70, increment=2), "the increment is 2; only 1 is accepted"),
        (axis_def("Age", 70, 60), "got 70 to 60"),
        (axis_def("Age", 60, 200), "within 0 to 150; got 60 to 200"),
        (axis_def("Weight", 60, 70), "scale type 'Weight' is not one of"),
        (axis_def("Age", 60, 70) * 3, "3 AxisDef elements"),
        (axis_def("Age", 60, 70) + axis_def("Attained Age", 60, 70), "both axes are age axes"),
        (axis_def("Age", 60, 70).replace("<ScaleType tc=\"1\">Age</ScaleType>",
                                         "<ScaleType>Age</ScaleType><ScaleType>Age</ScaleType>"),
         "ScaleType appears more than once"),
    ])
    def test_a_bad_axis_definition_is_refused(self, tmp_path, axis, fragment):
        refused(tmp_path, document(one_axis(FERNHOLLOW, axis=axis)), "line 4, Table 1",
                fragment)

    @pytest.mark.parametrize(("first", "last", "fragment"), [
        (60, 72, "AxisDef 1 (Age) declares 13 values (60 to 72) but 11 are given; age 71 is "
                 "missing"),
        (61, 70, "age 60 lies outside 61 to 70"),
    ])
    def test_an_axis_whose_length_disagrees_with_its_values_is_refused(self, tmp_path, first,
                                                                       last, fragment):
        axis = axis_def("Age", first, last, name="Age")
        refused(tmp_path, document(one_axis(FERNHOLLOW, axis=axis)), "Table 1 > Values > Axis",
                fragment)

    def test_a_missing_value_inside_the_axis_is_refused(self, tmp_path):
        text = ultimate_file().replace(f'<Y t="65">{FERNHOLLOW[65]}</Y>', "")
        refused(tmp_path, text, "declares 11 values (60 to 70) but 10 are given; age 65 is "
                                "missing")

    def test_a_repeated_value_is_refused(self, tmp_path):
        text = ultimate_file().replace('<Y t="65">', '<Y t="64">')
        refused(tmp_path, text, "Y t='64'", "age 64 appears twice (also on line 4)")

    def test_values_out_of_order_are_refused(self, tmp_path):
        swapped = dict(FERNHOLLOW)
        swapped = {**{x: q for x, q in swapped.items() if x < 64}, 65: swapped[65],
                   64: swapped[64], **{x: q for x, q in swapped.items() if x > 65}}
        refused(tmp_path, ultimate_file(swapped), "Y t='64'",
                "age 64 follows 65: values must be in increasing order")

    @pytest.mark.parametrize(("old", "new", "fragment"), [
        ('<Y t="63">', "<Y>", "Y has no 't' attribute naming its age"),
        ('<Y t="63">', '<Y t="sixty-three">', "'sixty-three' is not a whole number"),
        ("<Axis>", '<Axis t="1">', "the Axis of a one-axis table has no 't' attribute"),
        ("<Values><Axis>", "<Values><Axis></Axis><Axis>", "exactly one Axis in Values; found 2"),
        ("<ScalingFactor>0</ScalingFactor>", "<ScalingFactor>3</ScalingFactor>",
         "scaling factor '3': only 0 is accepted"),
    ])
    def test_a_bad_layout_is_refused(self, tmp_path, old, new, fragment):
        refused(tmp_path, ultimate_file().replace(old, new, 1), "Table 1", fragment)

    def test_select_rows_must_cover_every_duration(self, tmp_path):
        short = dict(FERNHOLLOW_SELECT)
        short[63] = {1: short[63][1]}
        refused(tmp_path, document(two_axes(short), one_axis(FERNHOLLOW)),
                "Table 1 > Values > Axis t='63' > Axis",
                "declares 2 values (1 to 2) but 1 are given; duration 2 is missing")


# ---- writing: nothing on failure, never over an existing file -----------------------------


class TestWriting:
    def test_an_existing_file_is_kept_unless_force(self, tmp_path):
        _, out = imported(tmp_path, ultimate_file())
        before = snapshot(out)
        changed = ultimate_file({**FERNHOLLOW, 65: 0.0177})
        with pytest.raises(ImportRefused, match="already exists; nothing was written"):
            imported(tmp_path, changed, out=out)
        assert snapshot(out) == before
        imported(tmp_path, changed, out=out, force=True)
        table = loaded(out).resolve("fernhollow-annuitants").tables[0]
        assert_allclose(table.q[5], 0.0177, rtol=0, atol=0)
        assert sorted(snapshot(out)) == sorted(before)

    def test_a_refused_file_leaves_an_existing_folder_as_it_was(self, tmp_path):
        out = tmp_path / "tables"
        (out / "data").mkdir(parents=True)
        (out / "data" / "other.csv").write_text("age,q\n60,1.0\n")
        before = snapshot(out)
        path = write_xml(tmp_path, replace_y(63, "NaN"))
        with pytest.raises(ImportRefused):
            import_xml(path, out)
        assert snapshot(out) == before
        assert sorted(p.name for p in tmp_path.iterdir()) == [path.name, "tables"]

    def test_files_are_added_beside_other_bases(self, tmp_path, capsys):
        out = tmp_path / "tables"
        out.mkdir()
        imported(tmp_path, ultimate_file(), out=out)
        imported(tmp_path, ultimate_file(), name="fernhollow-staff-2026.1.xml", out=out)
        registry = loaded(out)
        assert sorted(registry.bases) == [("fernhollow-annuitants", "2026.1"),
                                          ("fernhollow-staff", "2026.1")]
        assert check_tables(out, capsys)[0] == 0

    @pytest.mark.parametrize("force", [False, True])
    def test_a_failure_while_moving_files_in_undoes_the_import(self, tmp_path, monkeypatch,
                                                               force):
        out = tmp_path / "tables"
        out.mkdir()
        if force:  # the files exist already: a forced import that fails restores them
            imported(tmp_path, ultimate_file(), out=out)
        before = snapshot(out)
        real_move = xml_import._move_new

        def failing_move(source, target):
            if target.suffix == ".toml":  # the basis goes last: fail after the data moved
                raise OSError(28, "No space left on device")
            real_move(source, target)

        monkeypatch.setattr(xml_import, "_move_new", failing_move)
        path = write_xml(tmp_path, ultimate_file({**FERNHOLLOW, 65: 0.0177}))
        with pytest.raises(ImportRefused, match="No space left on device.*nothing was written"):
            import_xml(path, out, force=force)
        assert snapshot(out) == before
        assert (out / "data").exists() == force
        assert sorted(p.name for p in tmp_path.iterdir()) == [path.name, "tables"]

    def test_the_interest_rate_is_checked_by_the_registry_before_anything_is_written(
            self, tmp_path):
        refused(tmp_path, ultimate_file(), "the registry would refuse the imported basis",
                "[interest]", "must be above -1", interest_rate=-1.5)
        refused(tmp_path, ultimate_file(), "the interest rate must be a finite number",
                interest_rate=math.nan)

    @pytest.mark.parametrize(("options", "fragment"), [
        ({"basis_id": "Fernhollow"}, "id 'Fernhollow' is not allowed"),
        ({"version": "2026/1"}, "version '2026/1' is not allowed"),
    ])
    def test_names_must_be_allowed(self, tmp_path, options, fragment):
        refused(tmp_path, ultimate_file(), fragment, **options)

    def test_a_file_name_that_gives_no_id_needs_the_option(self, tmp_path):
        refused(tmp_path, ultimate_file(), "cannot derive an id", "give --id", name="___.xml")

    def test_an_output_path_that_is_a_file_is_refused(self, tmp_path):
        (tmp_path / "out").write_text("")
        path = write_xml(tmp_path, ultimate_file())
        with pytest.raises(ImportRefused, match="exists and is not a folder"):
            import_xml(path, tmp_path / "out")


@pytest.mark.parametrize(("file_name", "expected"), [
    ("fernhollow-annuitants-2026.1.xml", ("fernhollow-annuitants", "2026.1")),
    ("Fernhollow_Annuitants_2026.XML", ("fernhollow-annuitants", "2026")),
    ("fernhollow annuitants.xml", ("fernhollow-annuitants", "1")),
    ("t\u00e9st.xml", ("t-st", "1")),
    ("-.xml", (None, "1")),
])
def test_default_names_come_from_the_file_name(file_name, expected):
    assert default_names(file_name) == expected


@pytest.mark.parametrize("text", [
    'plain', 'quote " and backslash \\ and """ triple', "new\nline\r\nand\ttab",
    'x"\n[mortality.male]\nfile = "/etc/passwd', "right-to-left \u202e override",
    "control \x00\x1b[31m and del \x7f", "letters \u00e9\u0430 and astral \U0001f600",
    "''' literal ''' and [brackets] = # hash",
])
def test_toml_strings_read_back_exactly(text):
    doc = tomllib.loads(f"key = {toml_string(text)}\n")
    assert doc == {"key": text}
    assert toml_string(text).isascii() and toml_string(text).isprintable()


def test_metadata_cannot_escape_its_toml_string_or_csv_comment(tmp_path):
    nasty = ('x" &#10;[mortality.male]&#10;file = "/etc/passwd" \\ \u202e &#x1F600; '
             '&#10;age,q&#10;0,1')
    text = ultimate_file(name=nasty).replace("Fernhollow ultimate", nasty)
    done, out = imported(tmp_path, text)
    doc = tomllib.loads((out / done.basis_file).read_text())
    assert list(doc["mortality"]) == ["unisex"]
    decoded = ('x" [mortality.male] file = "/etc/passwd" \\ \u202e \U0001f600 age,q 0,1')
    assert doc["title"] == decoded
    assert doc["mortality"]["unisex"]["source"].endswith(decoded)
    assert (out / done.basis_file).read_bytes().isascii()
    table = loaded(out).resolve("fernhollow-annuitants").tables[0]
    assert (table.first_age, table.last_age) == (60, 70)


# ---- the command ---------------------------------------------------------------------------


class TestCommand:
    def test_import_then_check_tables(self, tmp_path, capsys):
        path = write_xml(tmp_path, document(two_axes(FERNHOLLOW_SELECT), one_axis(FERNHOLLOW)))
        out = tmp_path / "out"
        assert cli(["import-xml", str(path), str(out), "--id", "fm", "--version", "7",
                    "--interest-rate", "0.035"]) == 0
        printed = capsys.readouterr().out
        assert f"basis    {out / 'fm-7.toml'}  (status demo, sha256:" in printed
        assert f"data     {out / 'data' / 'fm-7-unisex.csv'}" in printed
        assert cli(["check-tables", str(out)]) == 0
        assert loaded(out).resolve("fm@7").interest_rate == 0.035

    def test_a_refusal_is_one_escaped_line_on_stderr_and_exit_1(self, tmp_path, capsys):
        path = write_xml(tmp_path, replace_y(63, "\u202e1"))
        assert cli(["import-xml", str(path), str(tmp_path / "out")]) == 1
        err = capsys.readouterr().err
        assert err.startswith("error: fernhollow-annuitants-2026.1.xml line 4, Table 1 > "
                              "Values > Axis > Y t='63': '\\u202e1' is not a number")
        assert err.count("\n") == 1 and err.isascii()
        assert not (tmp_path / "out").exists()

    def test_tables_by_sex_and_close_at_from_the_command_line(self, tmp_path, capsys):
        open_rates = {x: q for x, q in FERNHOLLOW.items() if x < 70}
        path = write_xml(tmp_path, document(one_axis(open_rates), one_axis(open_rates)))
        out = tmp_path / "out"
        assert cli(["import-xml", str(path), str(out), "--table", "female=1", "--table",
                    "male=2", "--close-at", "70"]) == 0
        assert loaded(out).resolve("fernhollow-annuitants").sexes == ("female", "male")

    def test_a_malformed_table_choice_is_a_usage_error(self, tmp_path, capsys):
        path = write_xml(tmp_path, ultimate_file())
        with pytest.raises(SystemExit) as caught:
            cli(["import-xml", str(path), str(tmp_path / "out"), "--table", "female"])
        assert caught.value.code == 2
        assert "is not SEX=N" in capsys.readouterr().err


# ---- round trips: an imported table values exactly as the same rates given as CSV ----------

A, B, C = 0.00022, 2.7e-6, 1.124  # Standard Ultimate Survival Model (Dickson, Hardy, Waters)


def susm_q(age: int) -> float:
    """Annual q under Makeham's law: p(x) = exp(-A - B c^x (c - 1) / ln c)."""
    return -math.expm1(-A - B * C**age * (C - 1) / math.log(C))


def susm_rates() -> dict[int, float]:
    rates = {age: susm_q(age) for age in range(20, 130)}
    rates[130] = 1.0  # the shipped basis closes its tabulation at 130
    return rates


def susm_select(rates: dict[int, float]) -> dict[int, dict[int, float]]:
    """Standard Select Survival Model: q[x]+s = 0.9^(2-s) q(x+s); q = 1 from the last age."""
    last = max(rates)
    return {x: {s + 1: (0.9 ** (2 - s) * rates[x + s] if x + s < last else 1.0)
                for s in (0, 1)} for x in rates}


def csv_basis(folder, basis_id: str, rates: dict, select=None, rate=0.05) -> None:
    """The same rates as a CSV basis written by hand (the registry's documented format)."""
    header = "age,q" + (",q_select_0,q_select_1" if select else "")
    rows = [f"{x},{q!r}" + (f",{select[x][1]!r},{select[x][2]!r}" if select else "")
            for x, q in rates.items()]
    (folder / "data").mkdir(parents=True, exist_ok=True)
    (folder / "data" / f"{basis_id}.csv").write_text("\n".join([header, *rows]) + "\n")
    (folder / f"{basis_id}.toml").write_text(
        f'id = "{basis_id}"\nversion = "1"\nstatus = "demo"\nsource = "Written by the test"\n'
        f'[interest]\nkind = "flat"\nrate = {rate}\n[methods]\nfractional_age = "udd"\n'
        f'mthly = "exact"\n[mortality.unisex]\nfile = "data/{basis_id}.csv"\n'
        'source = "The same rates as the XML file"\n')


ITEMS = [
    Item((Life(20.0),)),
    Item((Life(65.0),)),
    Item((Life(65.5),), Payments(frequency=12)),
    Item((Life(40.0),), Payments(timing="arrears", frequency=4, term=20)),
    Item((Life(55.0),), Payments(frequency=12, deferral=10, guarantee=5)),
    Item((Life(70.25),), Payments(timing="continuous", escalation=0.02)),
    Item((Life(66.0), Life(63.0)), Payments(frequency=12), survivorship=(1.0, 1.0, 0.5)),
]
SELECT_ITEMS = ITEMS + [
    Item((Life(60.0, duration=0),)),
    Item((Life(60.0, duration=1),), Payments(frequency=12)),
    Item((Life(70.5, duration=0),), Payments(timing="continuous")),
    Item((Life(128.0, duration=0),)),
]


def values(basis, items):
    valuation = Valuation(basis.interest, basis.fractional_age, basis.approximation)
    return value_annuities(basis.tables, items, valuation).value


class TestRoundTrip:
    def test_standard_ultimate_imported_values_as_its_csv_and_the_shipped_law(self, tmp_path):
        rates = susm_rates()
        text = document(one_axis({x: repr(q) for x, q in rates.items()},
                                 description="Makeham A = 0.00022, B = 2.7e-6, c = 1.124"),
                        name="Standard Ultimate Survival Model (generated from its law)")
        out = tmp_path / "tables"
        imported(tmp_path, text, name="susm.xml", out=out, interest_rate=0.05)
        csv_basis(out, "susm-csv", rates)
        registry = loaded(out)
        from_xml = values(registry.resolve("susm"), ITEMS)
        from_csv = values(registry.resolve("susm-csv"), ITEMS)
        assert_allclose(from_xml, from_csv, rtol=0, atol=0)  # the same doubles, the same sums
        shipped = values(load_registry(DEFAULT_TABLES).resolve("standard-ultimate"), ITEMS)
        assert_allclose(from_xml, shipped, rtol=1e-12)
        # a-due(65) = 13.5498 at 5%: Dickson, Hardy and Waters, SUSM tables (recalled from
        # memory; see shared/checks/published-values.md).
        assert_allclose(from_xml[1], 13.5498, atol=5e-5)
        # a-due(20) = 19.9664, same source.
        assert_allclose(from_xml[0], 19.9664, atol=5e-5)

    def test_standard_select_imported_values_as_its_csv_and_the_shipped_model(self, tmp_path):
        rates = susm_rates()
        select = susm_select(rates)
        text = document(
            two_axes({x: {d: repr(q) for d, q in row.items()} for x, row in select.items()},
                     scales=("Age at selection", "Duration")),
            one_axis({x: repr(q) for x, q in rates.items()}),
            name="Standard Select Survival Model (generated from its definition)")
        out = tmp_path / "tables"
        imported(tmp_path, text, name="sssm.xml", out=out, interest_rate=0.05)
        csv_basis(out, "sssm-csv", rates, select)
        registry = loaded(out)
        from_xml = values(registry.resolve("sssm"), SELECT_ITEMS)
        from_csv = values(registry.resolve("sssm-csv"), SELECT_ITEMS)
        assert_allclose(from_xml, from_csv, rtol=0, atol=0)
        shipped = values(load_registry(DEFAULT_TABLES).resolve("standard-select"), SELECT_ITEMS)
        assert_allclose(from_xml, shipped, rtol=1e-12)
        # Newly selected lives die less than ultimate ones of the same age (the definition's
        # factors are below 1), so their annuities are worth more.
        assert from_xml[7] > values(registry.resolve("sssm"), [Item((Life(60.0),))])[0]

    def test_fernhollow_closed_at_import_values_as_the_closed_csv(self, tmp_path):
        open_rates = {x: q for x, q in FERNHOLLOW.items() if x < 70}
        out = tmp_path / "tables"
        imported(tmp_path, ultimate_file(open_rates), out=out, close_at=70,
                 interest_rate=0.04)
        csv_basis(out, "fernhollow-csv", FERNHOLLOW, rate=0.04)
        registry = loaded(out)
        items = [Item((Life(float(x)),), Payments(frequency=m))
                 for x in (60, 64.5, 69) for m in (1, 12)]
        assert_allclose(values(registry.resolve("fernhollow-annuitants"), items),
                        values(registry.resolve("fernhollow-csv"), items), rtol=0, atol=0)
        # Backward recursion a-due(x) = 1 + v p(x) a-due(x+1) from a-due(70) = 1, since
        # q(70) = 1 (common practice): the appended q = 1 closes the table.
        a = 1.0
        for x in range(69, 59, -1):
            a = 1 + (1 - FERNHOLLOW[x]) / 1.04 * a
        assert_allclose(values(registry.resolve("fernhollow-annuitants"),
                               [Item((Life(60.0),))])[0], a, rtol=1e-13)


def test_select_ages_past_the_ultimate_end_are_refused(tmp_path):
    select = {x: {1: 0.5, 2: 0.6} for x in range(60, 72)}
    refused(tmp_path, document(two_axes(select), one_axis(FERNHOLLOW)), "Table 1",
            "the select ages run to 71, past the ultimate table's last age 70")


def test_the_shipped_csv_parser_and_the_import_agree_on_every_digit(tmp_path):
    """Rates with many digits survive: the CSV holds the shortest text of the same double."""
    rng = np.random.default_rng(7)
    rates = {x: float(q) for x, q in zip(range(40, 60), rng.uniform(0, 0.5, 20), strict=True)}
    rates[60] = 1.0
    _, out = imported(tmp_path, ultimate_file({x: repr(q) for x, q in rates.items()}))
    table = loaded(out).resolve("fernhollow-annuitants").tables[0]
    assert_allclose(table.q, list(rates.values()), rtol=0, atol=0)
