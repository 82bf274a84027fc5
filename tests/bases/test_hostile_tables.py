"""A hostile or careless tables folder: links out of it, deep nesting, duplicate ids, and ids
with control characters or look-alike letters. Each bad file is refused (never raised), /readyz
shows only a short reason, the log and check-tables the detail, escaped.

Rates are the invented Fernhollow Mutual test rates of test_registry.
"""

import json
import logging
import os

import pytest

from service import create_app
from service.bases import load_registry
from service.bases import registry as registry_module
from service.cli import main as cli
from tests.bases.test_registry import (
    REGISTRY_LOGGER,
    SOUND_ID,
    SOUND_VERSION,
    assert_refused_beside_sound,
    basis_text,
    csv_mortality,
    csv_text,
    law_mortality,
    load_logged,
    write,
)

#: What a file outside the folder might hold (say, the process environment).
SECRET = "FERNHOLLOW_API_KEY=not-for-anyone-to-see"


def readyz(folder) -> tuple[int, dict]:
    app = create_app({"TESTING": True, "TABLES_DIR": str(folder),
                      "REQUIRED_BASES": (f"{SOUND_ID}@{SOUND_VERSION}",)})
    response = app.test_client().get("/readyz")
    return response.status_code, response.get_json()


def check_tables(folder, capsys) -> tuple[int, list[str]]:
    code = cli(["check-tables", str(folder)])
    out = capsys.readouterr()
    return code, (out.out + out.err).splitlines()


@pytest.fixture()
def outside(tmp_path_factory):
    place = tmp_path_factory.mktemp("outside")
    write(place, "environ", SECRET + "\nPATH=/usr/bin\n")
    write(place, "rates.csv", csv_text())
    return place


# ---- symbolic links ----------------------------------------------------------------------


class TestLinks:
    def test_data_file_linked_outside_is_refused_and_not_echoed(self, folder, outside,
                                                                caplog):
        os.symlink(outside / "environ", folder / "data" / "linked.csv")
        write(folder, "bad.toml", basis_text("fernhollow-bad", "2026.1",
                                             csv_mortality("data/linked.csv")))
        detail = assert_refused_beside_sound(folder, caplog, "bad.toml", "data/linked.csv",
                                             "outside the tables folder")
        # The log says where the link leads; nothing from the target is read or shown.
        assert str((outside / "environ").resolve()) in detail
        assert SECRET not in detail
        status, body = readyz(folder)
        assert status == 200
        assert body["refused"] == ["bad.toml: [mortality.unisex] data/linked.csv: the data "
                                   "file links outside the tables folder"]
        assert SECRET not in json.dumps(body)

    def test_a_valid_table_linked_from_outside_is_refused_too(self, folder, outside, caplog):
        # Even a sound table: the folder is what was checked and shipped, nothing else.
        os.symlink(outside / "rates.csv", folder / "data" / "linked.csv")
        write(folder, "bad.toml", basis_text("fernhollow-bad", "2026.1",
                                             csv_mortality("data/linked.csv")))
        assert_refused_beside_sound(folder, caplog, "bad.toml", "outside the tables folder")

    def test_data_folder_linked_outside_is_refused(self, folder, outside, caplog):
        os.symlink(outside, folder / "elsewhere")
        write(folder, "bad.toml", basis_text("fernhollow-bad", "2026.1",
                                             csv_mortality("elsewhere/environ")))
        assert_refused_beside_sound(folder, caplog, "bad.toml", "outside the tables folder")

    def test_basis_file_linked_outside_is_refused(self, folder, outside, caplog):
        write(outside, "basis.toml", basis_text("fernhollow-bad", "2026.1", law_mortality()))
        os.symlink(outside / "basis.toml", folder / "bad.toml")
        assert_refused_beside_sound(folder, caplog, "bad.toml", "outside the tables folder")

    def test_link_inside_the_folder_loads(self, folder):
        # As a mounted configuration folder does: the target is inside the tables folder.
        os.symlink("sound.csv", folder / "data" / "current.csv")
        write(folder, "linked.toml", basis_text("fernhollow-linked", "2026.1",
                                                csv_mortality("data/current.csv")))
        registry = load_registry(folder)
        assert registry.refused == ()
        assert registry.resolve("fernhollow-linked").tables[0].q[0] == 0.01

    def test_link_loop_is_refused(self, folder, caplog):
        os.symlink("loop-b.csv", folder / "data" / "loop-a.csv")
        os.symlink("loop-a.csv", folder / "data" / "loop-b.csv")
        write(folder, "bad.toml", basis_text("fernhollow-bad", "2026.1",
                                             csv_mortality("data/loop-a.csv")))
        assert_refused_beside_sound(folder, caplog, "bad.toml", "cannot read")

    def test_a_data_file_that_is_a_folder_is_refused(self, folder, caplog):
        (folder / "data" / "folder.csv").mkdir()
        write(folder, "bad.toml", basis_text("fernhollow-bad", "2026.1",
                                             csv_mortality("data/folder.csv")))
        assert_refused_beside_sound(folder, caplog, "bad.toml", "not a regular file")

    def test_readyz_never_quotes_a_data_file(self, folder, caplog):
        # Inside the folder too, only the log sees what a bad file holds.
        write(folder, "data/odd.csv", SECRET + "\n60,0.5\n61,1\n")
        write(folder, "bad.toml", basis_text("fernhollow-bad", "2026.1",
                                             csv_mortality("data/odd.csv")))
        detail = assert_refused_beside_sound(folder, caplog, "bad.toml", SECRET)
        assert "columns" in detail
        _, body = readyz(folder)
        assert SECRET not in json.dumps(body)
        assert body["refused"] == ["bad.toml: [mortality.unisex] data/odd.csv: the columns "
                                   "must be age,q then q_select_0, q_select_1, ..."]


# ---- whatever is in a file, it is refused, never raised -----------------------------------


class TestNeverRaised:
    @pytest.mark.parametrize("nesting", (
        "x = " + "[" * 50_000 + "]" * 50_000,           # past the reader's recursion
        "x = " + "{a = " * 5000 + "1" + "}" * 5000,
        "x = " + "[" * 40 + "]" * 40,                   # readable, but deeper than a basis
    ))
    def test_deeply_nested_toml_is_refused(self, folder, caplog, capsys, nesting):
        write(folder, "bad.toml", 'id = "fernhollow-bad"\n' + nesting + "\n")
        detail = assert_refused_beside_sound(folder, caplog, "bad.toml", "nested")
        assert "deep" in detail
        code, lines = check_tables(folder, capsys)
        assert code == 1
        assert [line for line in lines if line.startswith("REFUSED")] == [
            f"REFUSED  bad.toml: {detail}"]

    def test_an_unexpected_failure_refuses_the_file(self, folder, caplog, monkeypatch):
        real = registry_module.content_digest

        def failing(doc, data):
            if doc["id"] == "fernhollow-bad":
                raise ZeroDivisionError("simulated")
            return real(doc, data)

        monkeypatch.setattr(registry_module, "content_digest", failing)
        write(folder, "bad.toml", basis_text("fernhollow-bad", "2026.1", law_mortality()))
        detail = assert_refused_beside_sound(folder, caplog, "bad.toml", "ZeroDivisionError")
        assert "simulated" in detail

    def test_law_parameters_of_the_wrong_kind_are_refused(self, folder, caplog):
        mortality = law_mortality().replace("min_age = 40", "min_age = 40\n"
                                            "select_factors = [\"x\", {a = 1}]")
        write(folder, "bad.toml", basis_text("fernhollow-bad", "2026.1", mortality))
        assert_refused_beside_sound(folder, caplog, "bad.toml", "mortality.unisex")

    def test_methods_that_are_not_a_table_are_refused(self, folder, caplog):
        text = basis_text("fernhollow-bad", "2026.1", law_mortality())
        text = text.replace('[methods]\nfractional_age = "udd"\nmthly = "exact"\n', "")
        text = text.replace('status = "demo"', 'status = "demo"\nmethods = 3')
        write(folder, "bad.toml", text)
        assert_refused_beside_sound(folder, caplog, "bad.toml", "[methods]")


# ---- ids and versions ---------------------------------------------------------------------


BAD_IDS = {
    "newline": "fernhollow\\nbad",
    "escape sequence": "fernhollow\\u001b[2Jbad",
    "capital letter": "Fernhollow-bad",
    "cyrillic o": "fernh\u043ellow-bad",
    "fullwidth digit": "fernhollow-\uff12",
    "space": "fernhollow bad",
    "underscore": "fernhollow_bad",
    "leading hyphen": "-fernhollow",
    "trailing dot": "fernhollow.",
    "at sign": "fernhollow@bad",
    "slash": "fernhollow/bad",
    "empty": "",
    "too long": "f" * 65,
}


class TestNames:
    @pytest.mark.parametrize("bad_id", BAD_IDS.values(), ids=list(BAD_IDS))
    def test_id_outside_the_allowed_letters_is_refused(self, folder, caplog, bad_id):
        write(folder, "bad.toml", basis_text(bad_id, "2026.1", law_mortality()))
        detail = assert_refused_beside_sound(folder, caplog, "bad.toml", "id: not allowed")
        assert "id: not allowed" in load_registry(folder).refused[0].reason
        assert detail.isascii() and detail.isprintable()

    @pytest.mark.parametrize("bad_version", ("2026.1\\n", "2026_1", "\uff12\uff10\uff12\uff16",
                                             "2026.1 ", "v" * 33, ".."))
    def test_version_outside_the_allowed_letters_is_refused(self, folder, caplog,
                                                           bad_version):
        write(folder, "bad.toml", basis_text("fernhollow-bad", bad_version, law_mortality()))
        assert_refused_beside_sound(folder, caplog, "bad.toml", "version: not allowed")

    @pytest.mark.parametrize("good", ("a", "fernhollow-annuitants", "s2.v-1", "x" * 64))
    def test_allowed_ids_load(self, folder, good):
        write(folder, "good.toml", basis_text(good, "2026.1", law_mortality()))
        assert load_registry(folder).resolve(f"{good}@2026.1").id == good

    def test_csv_schedule_of_every_loaded_basis_is_served(self, folder):
        # A newline in an id used to reach the X-Basis-Id header and answer 500.
        write(folder, "bad.toml", basis_text(BAD_IDS["newline"], "2026.1", law_mortality()))
        app = create_app({"TESTING": True, "TABLES_DIR": str(folder)})
        client = app.test_client()
        for ref in [f"{b['id']}@{b['version']}"
                    for b in client.get("/v1/bases").get_json()["bases"]]:
            response = client.post("/v1/cash-flow-schedules", headers={"Accept": "text/csv"},
                                   json={"basis": ref, "item": {"lives": [{"age": 65}],
                                                                "timing": "advance"}})
            assert response.status_code == 200, response.get_data(as_text=True)
            assert response.headers["X-Basis-Id"] == ref.split("@")[0]

    def test_check_tables_prints_only_printable_ascii(self, folder, capsys):
        write(folder, "bad.toml", basis_text(BAD_IDS["escape sequence"], "2026.1",
                                             law_mortality()))
        write(folder, "odd\u202ename\n.toml", basis_text("fernhollow-odd", "2026.1",
                                                         law_mortality(),
                                                         status="\\u001b[31mred"))
        code, lines = check_tables(folder, capsys)
        assert code == 1
        assert all(line.isascii() and line.isprintable() for line in lines), lines
        refused = [line for line in lines if line.startswith("REFUSED")]
        assert len(refused) == 2
        assert any("odd\\u202ename\\n.toml" in line and "\\x1b[31mred" in line
                   for line in refused), refused
        assert any("'fernhollow\\x1b[2Jbad'" in line for line in refused), refused
        assert [line for line in lines if line.startswith("ok ")] == [
            line for line in lines if f"{SOUND_ID}@{SOUND_VERSION}" in line]

    def test_log_lines_are_escaped(self, folder, caplog):
        write(folder, "bad\n.toml", basis_text("fernhollow-bad", "2026.1", law_mortality(),
                                               status="x\ny"))
        registry = load_logged(folder, caplog)
        assert [r.file for r in registry.refused] == ["bad\n.toml"]
        logged = [r.getMessage() for r in caplog.records
                  if r.name == REGISTRY_LOGGER and r.levelno >= logging.WARNING]
        assert logged and all("\n" not in message for message in logged), logged
