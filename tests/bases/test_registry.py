"""The basis registry: what it loads, what it refuses and why, and how references resolve.

Every refusal test puts one bad basis file next to a sound one in a temporary tables folder
and shows three things: the bad file is refused with a reason that says where the problem is,
the refusal is logged, and the sound basis is still served (by the registry and over HTTP).
All rates here are invented for the tests (Fernhollow Mutual is an invented insurer).
"""

import dataclasses
import logging
import os
import re
import shutil
import tomllib

import numpy as np
import pytest

from service import create_app
from service.app import DEFAULT_TABLES
from service.bases import UnknownBasisError, load_registry

REGISTRY_LOGGER = "service.bases.registry"

SOUND_ID = "fernhollow-sound"
SOUND_VERSION = "2026.1"
SOUND_FILE = "sound.toml"

#: Invented annual rates, ages 60 to 70, closing with q = 1.
RATES = {60: 0.0100, 61: 0.0112, 62: 0.0125, 63: 0.0140, 64: 0.0157, 65: 0.0176,
         66: 0.0198, 67: 0.0222, 68: 0.0250, 69: 0.0281, 70: 1.0}
#: In a CSV written by ``csv_text`` the comment is line 1, the header line 2 and age a is on
#: line a - 57.
FIRST_DATA_LINE = 3


def line_of(age: int) -> int:
    return FIRST_DATA_LINE + age - min(RATES)


def csv_text(rates=None, *, header="age,q", newline="\n") -> str:
    rates = RATES if rates is None else rates
    lines = ["# Fernhollow Mutual test rates: invented for the tests.", header]
    lines += [f"{age},{q}" for age, q in rates.items()]
    return newline.join(lines) + newline


def basis_text(basis_id: str, version: str, mortality: str, *, default: bool | None = None,
               digest: str | None = None, source: str | None = "Invented for the tests",
               status: str = "demo", rate: float = 0.04, mthly: str = "exact",
               extra: str = "") -> str:
    """A basis file; ``extra`` is added as it is after the top-level keys (before any
    section)."""
    lines = [f'id = "{basis_id}"', f'version = "{version}"',
             f'title = "Fernhollow Mutual test basis {basis_id} {version}"',
             f'status = "{status}"', 'purpose = "Tests of the registry."']
    if default is not None:
        lines.append(f"default = {'true' if default else 'false'}")
    if digest is not None:
        lines.append(f'digest = "{digest}"')
    if source is not None:
        lines.append(f'source = "{source}"')
    if extra:
        lines += [extra.rstrip("\n")]
    lines += ["", "[interest]", 'kind = "flat"', f"rate = {rate}", "",
              "[methods]", 'fractional_age = "udd"', f'mthly = "{mthly}"', "", mortality]
    return "\n".join(lines) + "\n"


def csv_mortality(file: str, sex: str = "unisex") -> str:
    return (f"[mortality.{sex}]\nfile = \"{file}\"\n"
            f"source = \"Invented test rates ({sex})\"\n")


def law_mortality(law: str = "gompertz", sex: str = "unisex") -> str:
    params = "{ B = 0.00003, c = 1.1 }" if law != "makeham" else \
        "{ A = 0.0005, B = 0.00003, c = 1.1 }"
    return (f"[mortality.{sex}]\nlaw = \"{law}\"\nparameters = {params}\nmin_age = 40\n"
            f"source = \"Invented law parameters ({sex})\"\n")


def write(folder, name: str, text: str, newline: str = "\n"):
    path = folder / name
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(text.replace("\n", newline).encode("utf-8"))
    return path


def load_logged(folder, caplog):
    with caplog.at_level(logging.WARNING, logger=REGISTRY_LOGGER):
        return load_registry(folder)


def served_over_http(folder) -> list[tuple[str, str]]:
    app = create_app({"TESTING": True, "TABLES_DIR": str(folder)})
    response = app.test_client().get("/v1/bases")
    assert response.status_code == 200
    return [(b["id"], b["version"]) for b in response.get_json()["bases"]]


def assert_refused_beside_sound(folder, caplog, bad_file: str, *fragments: str) -> str:
    """Check the refusal of ``bad_file`` and that the sound basis is still served.

    The ``fragments`` must be in the refusal's detail, which is logged; its brief reason
    (the one /readyz shows) is printable ASCII on one line. Returns the detail.
    """
    registry = load_logged(folder, caplog)
    refusals = [r for r in registry.refused if r.file == bad_file]
    assert len(refusals) == 1, registry.refused
    detail = refusals[0].detail
    for fragment in fragments:
        assert fragment in detail, (fragment, detail)
    assert refusals[0].reason.isascii() and refusals[0].reason.isprintable()
    logged = [rec.getMessage() for rec in caplog.records
              if rec.name == REGISTRY_LOGGER and rec.levelno >= logging.WARNING]
    assert any(bad_file in message and detail in message for message in logged), logged
    # Nothing but the sound basis was loaded, and it resolves.
    assert list(registry.bases) == [(SOUND_ID, SOUND_VERSION)]
    assert registry.resolve(SOUND_ID).ref == f"{SOUND_ID}@{SOUND_VERSION}"
    assert served_over_http(folder) == [(SOUND_ID, SOUND_VERSION)]
    return detail


# ---- refusals: one test per case ------------------------------------------------------------


def test_the_sound_folder_alone_loads_without_refusals(folder, caplog):
    registry = load_logged(folder, caplog)
    assert registry.refused == ()
    assert list(registry.bases) == [(SOUND_ID, SOUND_VERSION)]
    assert not [r for r in caplog.records if r.levelno >= logging.WARNING]


@pytest.mark.parametrize("bad_q", ["1.2", "-0.1"])
def test_rate_outside_zero_one_is_refused(folder, caplog, bad_q):
    rates = dict(RATES) | {64: bad_q}
    write(folder, "data/bad.csv", csv_text(rates))
    write(folder, "bad.toml", basis_text("fernhollow-bad", "2026.1",
                                         csv_mortality("data/bad.csv")))
    assert_refused_beside_sound(folder, caplog, "bad.toml", "data/bad.csv",
                                f"line {line_of(64)}", "age 64", bad_q)


def test_select_rate_outside_zero_one_is_refused(folder, caplog):
    rows = {age: f"{q},{q * 0.8 if q < 1 else ''}" for age, q in RATES.items()}
    rows[62] = f"{RATES[62]},1.5"
    write(folder, "data/bad.csv", csv_text(rows, header="age,q,q_select_0"))
    write(folder, "bad.toml", basis_text("fernhollow-bad", "2026.1",
                                         csv_mortality("data/bad.csv")))
    assert_refused_beside_sound(folder, caplog, "bad.toml", "data/bad.csv",
                                f"line {line_of(62)}", "q_select_0", "age 62", "1.5")


def test_gap_in_ages_is_refused(folder, caplog):
    rates = {age: q for age, q in RATES.items() if age != 64}
    write(folder, "data/bad.csv", csv_text(rates))
    write(folder, "bad.toml", basis_text("fernhollow-bad", "2026.1",
                                         csv_mortality("data/bad.csv")))
    # Age 65 sits where age 64 would have been.
    assert_refused_beside_sound(folder, caplog, "bad.toml", "data/bad.csv",
                                f"line {line_of(64)}", "age 65", "age 63")


@pytest.mark.parametrize("nan_text", ["nan", "NaN"])
def test_nan_rate_in_csv_is_refused(folder, caplog, nan_text):
    rates = dict(RATES) | {62: nan_text}
    write(folder, "data/bad.csv", csv_text(rates))
    write(folder, "bad.toml", basis_text("fernhollow-bad", "2026.1",
                                         csv_mortality("data/bad.csv")))
    assert_refused_beside_sound(folder, caplog, "bad.toml", "data/bad.csv",
                                f"line {line_of(62)}", nan_text)


def test_missing_data_file_is_refused(folder, caplog):
    write(folder, "bad.toml", basis_text("fernhollow-bad", "2026.1",
                                         csv_mortality("data/absent.csv")))
    assert_refused_beside_sound(folder, caplog, "bad.toml", "data/absent.csv")


def test_unknown_law_is_refused(folder, caplog):
    write(folder, "bad.toml", basis_text("fernhollow-bad", "2026.1",
                                         law_mortality("weibull")))
    assert_refused_beside_sound(folder, caplog, "bad.toml", "bad.toml", "weibull")


def test_digest_not_matching_the_content_is_refused(folder, caplog):
    recorded = "sha256:" + "0" * 64
    write(folder, "bad.toml", basis_text("fernhollow-bad", "2026.1", law_mortality(),
                                         digest=recorded))
    reason = assert_refused_beside_sound(folder, caplog, "bad.toml", "bad.toml", recorded)
    assert "digest" in reason


#: What an approved or retired basis must say besides (invented for the tests).
APPROVAL = ('effective_date = 2026-01-01\n'
            'approval = { by = "Fernhollow Mutual test committee", on = 2025-12-01 }\n')


@pytest.mark.parametrize("status", ("approved", "retired"))
def test_approved_or_retired_basis_without_a_recorded_digest_is_refused(folder, caplog, status):
    # Without a recorded digest a changed table could pass for the old version.
    write(folder, "bad.toml", basis_text("fernhollow-bad", "2026.1", law_mortality(),
                                         status=status, extra=APPROVAL))
    reason = assert_refused_beside_sound(folder, caplog, "bad.toml", "bad.toml", "digest")
    assert status in reason


def test_approved_basis_with_its_digest_recorded_loads(folder):
    text = basis_text("fernhollow-ok", "2026.1", law_mortality(), status="demo",
                      extra=APPROVAL)
    write(folder, "ok.toml", text)
    digest = load_registry(folder).resolve("fernhollow-ok").digest
    write(folder, "ok.toml", basis_text("fernhollow-ok", "2026.1", law_mortality(),
                                        status="approved", digest=digest, extra=APPROVAL))
    # The status is part of the content, so the demo digest no longer matches.
    registry = load_registry(folder)
    assert [r.file for r in registry.refused] == ["ok.toml"]
    fixed = registry.refused[0].detail.split("(")[-1].split(")")[0]
    write(folder, "ok.toml", basis_text("fernhollow-ok", "2026.1", law_mortality(),
                                        status="approved", digest=fixed, extra=APPROVAL))
    assert load_registry(folder).resolve("fernhollow-ok").status == "approved"


def test_table_not_closing_with_q_one_is_refused(folder, caplog):
    rates = dict(RATES) | {70: 0.5}
    write(folder, "data/bad.csv", csv_text(rates))
    write(folder, "bad.toml", basis_text("fernhollow-bad", "2026.1",
                                         csv_mortality("data/bad.csv")))
    assert_refused_beside_sound(folder, caplog, "bad.toml", "data/bad.csv",
                                f"line {line_of(70)}", "q = 1", "70")


def test_invalid_toml_is_refused(folder, caplog):
    write(folder, "bad.toml", 'id = "fernhollow-bad"\nversion = 2026.1.1\n')
    assert_refused_beside_sound(folder, caplog, "bad.toml", "TOML", "line 2")


def test_table_without_source_is_refused(folder, caplog):
    mortality = '[mortality.unisex]\nfile = "data/sound.csv"\n'
    write(folder, "bad.toml", basis_text("fernhollow-bad", "2026.1", mortality))
    assert_refused_beside_sound(folder, caplog, "bad.toml", "bad.toml", "mortality.unisex",
                                "source")


def test_basis_without_source_is_refused(folder, caplog):
    # The basis format lists a top-level source (where the basis as a whole comes from);
    # only the digest is optional. A basis that does not say where it comes from must not load.
    write(folder, "bad.toml", basis_text("fernhollow-bad", "2026.1",
                                         csv_mortality("data/sound.csv"), source=None))
    assert_refused_beside_sound(folder, caplog, "bad.toml", "bad.toml", "source")


def test_both_unisex_and_female_tables_are_refused(folder, caplog):
    mortality = csv_mortality("data/sound.csv", "unisex") + "\n" + \
        csv_mortality("data/sound.csv", "female")
    write(folder, "bad.toml", basis_text("fernhollow-bad", "2026.1", mortality))
    assert_refused_beside_sound(folder, caplog, "bad.toml", "bad.toml", "unisex", "female")


def test_data_file_outside_the_folder_is_refused(folder, caplog):
    write(folder.parent, "outside.csv", csv_text())
    write(folder, "bad.toml", basis_text("fernhollow-bad", "2026.1",
                                         csv_mortality("../outside.csv")))
    assert_refused_beside_sound(folder, caplog, "bad.toml", "bad.toml", "inside the tables")


def test_same_id_and_version_in_two_files_refuses_both(folder, caplog):
    # Neither file can be trusted to be the one meant, whatever order they sort in.
    write(folder, "aa-copy.toml", basis_text(SOUND_ID, SOUND_VERSION, law_mortality()))
    registry = load_logged(folder, caplog)
    refused = {r.file: r for r in registry.refused}
    assert set(refused) == {"aa-copy.toml", SOUND_FILE}
    for refusal in refused.values():
        assert "same id and version" in refusal.reason
        # Each detail names the basis and both files.
        for fragment in (f"{SOUND_ID}@{SOUND_VERSION}", "aa-copy.toml", SOUND_FILE):
            assert fragment in refusal.detail, refusal.detail
    logged = " ".join(r.getMessage() for r in caplog.records if r.name == REGISTRY_LOGGER)
    assert "aa-copy.toml" in logged and SOUND_FILE in logged
    assert registry.bases == {}
    with pytest.raises(UnknownBasisError):
        registry.resolve(f"{SOUND_ID}@{SOUND_VERSION}")


# ---- versions and references ---------------------------------------------------------------


def three_versions(folder):
    write(folder, "v/2025.1.toml", basis_text("fernhollow-annuitants-test", "2025.1",
                                              law_mortality(), default=False, rate=0.045))
    write(folder, "v/2026.1.toml", basis_text("fernhollow-annuitants-test", "2026.1",
                                              law_mortality(), default=True, rate=0.04))
    # The newest version is not the default: only the flag decides.
    write(folder, "v/2027.1.toml", basis_text("fernhollow-annuitants-test", "2027.1",
                                              law_mortality(), rate=0.035))


def test_versions_of_one_id_coexist_and_resolve(folder):
    three_versions(folder)
    registry = load_registry(folder)
    assert registry.refused == ()
    versions = sorted(v for (i, v) in registry.bases if i == "fernhollow-annuitants-test")
    assert versions == ["2025.1", "2026.1", "2027.1"]
    default = registry.resolve("fernhollow-annuitants-test")
    assert default.version == "2026.1"
    assert default.interest_rate == pytest.approx(0.04, abs=0)
    for version, rate in [("2025.1", 0.045), ("2026.1", 0.04), ("2027.1", 0.035)]:
        pinned = registry.resolve(f"fernhollow-annuitants-test@{version}")
        assert pinned.version == version
        assert pinned.interest_rate == pytest.approx(rate, abs=0)
    with pytest.raises(UnknownBasisError):
        registry.resolve("fernhollow-annuitants-test@2024.1")
    with pytest.raises(UnknownBasisError):
        registry.resolve("fernhollow-annuitants-unknown")


def test_versions_listed_over_http_with_one_default(folder):
    three_versions(folder)
    app = create_app({"TESTING": True, "TABLES_DIR": str(folder)})
    client = app.test_client()
    listed = client.get("/v1/bases").get_json()["bases"]
    flags = {b["version"]: b["default"] for b in listed if b["id"] == "fernhollow-annuitants-test"}
    assert flags == {"2025.1": False, "2026.1": True, "2027.1": False}
    detail = client.get("/v1/bases/fernhollow-annuitants-test").get_json()
    assert detail["version"] == "2026.1"
    pinned = client.get("/v1/bases/fernhollow-annuitants-test@2025.1").get_json()
    assert (pinned["version"], pinned["default"]) == ("2025.1", False)


def test_two_versions_both_marked_default_are_refused(folder, caplog):
    write(folder, "a.toml", basis_text("fernhollow-clash", "2025.1", law_mortality(),
                                       default=True))
    write(folder, "b.toml", basis_text("fernhollow-clash", "2026.1", law_mortality(),
                                       default=True))
    registry = load_logged(folder, caplog)
    refused = {r.file: r for r in registry.refused}
    assert set(refused) == {"a.toml", "b.toml"}
    for refusal in refused.values():
        assert "default" in refusal.reason
        assert "default" in refusal.detail and "fernhollow-clash" in refusal.detail
    messages = " ".join(r.getMessage() for r in caplog.records if r.name == REGISTRY_LOGGER)
    assert "a.toml" in messages and "b.toml" in messages
    for ref in ("fernhollow-clash", "fernhollow-clash@2025.1", "fernhollow-clash@2026.1"):
        with pytest.raises(UnknownBasisError):
            registry.resolve(ref)
    assert registry.resolve(SOUND_ID).version == SOUND_VERSION
    assert served_over_http(folder) == [(SOUND_ID, SOUND_VERSION)]


# ---- content digests -----------------------------------------------------------------------


def digest_of(folder, ref=SOUND_ID) -> str:
    return load_registry(folder).resolve(ref).digest


def test_digest_is_a_sha256_label(folder):
    assert re.fullmatch(r"sha256:[0-9a-f]{64}", digest_of(folder))


def test_digest_changes_when_one_rate_changes(folder):
    before = digest_of(folder)
    write(folder, "data/sound.csv", csv_text(dict(RATES) | {65: 0.0177}))
    assert digest_of(folder) != before


def test_digest_changes_when_a_law_parameter_changes(tmp_path):
    write(tmp_path, "law.toml", basis_text("fernhollow-law", "2026.1", law_mortality()))
    before = digest_of(tmp_path, "fernhollow-law")
    write(tmp_path, "law.toml", basis_text("fernhollow-law", "2026.1",
                                           law_mortality().replace("c = 1.1", "c = 1.1001")))
    assert digest_of(tmp_path, "fernhollow-law") != before


def test_recorded_digest_refuses_a_changed_table(folder, caplog):
    write(folder, "data/recorded.csv", csv_text())
    mortality = csv_mortality("data/recorded.csv")
    write(folder, "recorded.toml", basis_text("fernhollow-recorded", "2026.1", mortality))
    recorded = digest_of(folder, "fernhollow-recorded")
    # Recording the digest of the content does not change the digest, and the basis loads.
    write(folder, "recorded.toml", basis_text("fernhollow-recorded", "2026.1", mortality,
                                              digest=recorded))
    assert digest_of(folder, "fernhollow-recorded") == recorded
    # One rate changes under the recorded digest: the basis is refused.
    write(folder, "data/recorded.csv", csv_text(dict(RATES) | {65: 0.0177}))
    registry = load_logged(folder, caplog)
    assert [r.file for r in registry.refused] == ["recorded.toml"]
    assert recorded in registry.refused[0].detail
    assert registry.resolve(SOUND_ID).version == SOUND_VERSION


def test_digest_ignores_crlf_line_endings(folder):
    before = digest_of(folder)
    write(folder, "data/sound.csv", csv_text(newline="\r\n"))
    assert (folder / "data/sound.csv").read_bytes().count(b"\r\n") == len(RATES) + 2
    assert digest_of(folder) == before
    write(folder, SOUND_FILE, basis_text(SOUND_ID, SOUND_VERSION,
                                         csv_mortality("data/sound.csv"), default=True),
          newline="\r\n")
    assert digest_of(folder) == before


def test_crlf_csv_reports_the_same_line_numbers(folder, caplog):
    write(folder, "data/bad.csv", csv_text(dict(RATES) | {66: "1.2"}, newline="\r\n"))
    write(folder, "bad.toml", basis_text("fernhollow-bad", "2026.1",
                                         csv_mortality("data/bad.csv")))
    assert_refused_beside_sound(folder, caplog, "bad.toml", f"line {line_of(66)}", "age 66")


# ---- the shipped tables ---------------------------------------------------------------------


def test_shipped_tables_load_with_nothing_refused(caplog):
    registry = load_logged(DEFAULT_TABLES, caplog)
    assert registry.refused == ()
    shipped = sorted(DEFAULT_TABLES.rglob("*.toml"))
    assert len(registry.bases) == len(shipped) > 0


def test_every_shipped_file_records_the_digest_of_its_content():
    registry = load_registry(DEFAULT_TABLES)
    for path in sorted(DEFAULT_TABLES.rglob("*.toml")):
        doc = tomllib.loads(path.read_text(encoding="utf-8"))
        assert "digest" in doc, f"{path.name} records no digest"
        basis = registry.resolve(f"{doc['id']}@{doc['version']}")
        assert basis.digest == doc["digest"], path.name
        assert basis.file == str(path.relative_to(DEFAULT_TABLES))


def test_a_copy_of_the_shipped_tables_gives_the_same_digests(tmp_path):
    copy = tmp_path / "tables"
    shutil.copytree(DEFAULT_TABLES, copy)
    shipped = load_registry(DEFAULT_TABLES)
    copied = load_registry(copy)
    assert {k: b.digest for k, b in copied.bases.items()} == \
        {k: b.digest for k, b in shipped.bases.items()}


# ---- immutability ---------------------------------------------------------------------------


def test_loaded_basis_attributes_and_rates_are_read_only(folder):
    basis = load_registry(folder).resolve(SOUND_ID)
    with pytest.raises(dataclasses.FrozenInstanceError):
        basis.interest_rate = 0.10
    with pytest.raises(ValueError):
        basis.tables[0].q[0] = 0.5
    np.testing.assert_allclose(basis.tables[0].q, list(RATES.values()), rtol=0, atol=0)


def test_loaded_basis_mortality_description_is_read_only(folder):
    # A basis is immutable after start-up (architecture); the description served by
    # GET /v1/bases/{ref} must not be changeable in place either.
    basis = load_registry(folder).resolve(SOUND_ID)
    with pytest.raises(TypeError):
        basis.mortality["unisex"]["source"] = "changed after loading"


# ---- the folder itself ----------------------------------------------------------------------


def test_nonexistent_folder_raises_oserror(tmp_path):
    with pytest.raises(OSError):
        load_registry(tmp_path / "no-such-folder")


def test_a_file_in_place_of_the_folder_raises_oserror(tmp_path):
    not_a_folder = write(tmp_path, "tables", "not a folder\n")
    with pytest.raises(OSError):
        load_registry(not_a_folder)


def test_unreadable_folder_raises_oserror(folder, monkeypatch):
    # The process may run as root here, where permission bits do not bite; so the operating
    # system's refusal to list the folder is simulated at the two listing calls.
    real_scandir, real_listdir = os.scandir, os.listdir

    def denied(path):
        if os.path.realpath(os.fspath(path)).startswith(os.path.realpath(folder)):
            raise PermissionError(13, "Permission denied", os.fspath(path))

    def scandir(path="."):
        denied(path)
        return real_scandir(path)

    def listdir(path="."):
        denied(path)
        return real_listdir(path)

    monkeypatch.setattr(os, "scandir", scandir)
    monkeypatch.setattr(os, "listdir", listdir)
    with pytest.raises(OSError):
        load_registry(folder)


@pytest.mark.skipif(os.name != "posix" or os.geteuid() == 0,
                    reason="permission bits do not stop root from reading a folder")
def test_folder_without_read_permission_raises_oserror(folder):
    folder.chmod(0)
    try:
        with pytest.raises(OSError):
            load_registry(folder)
    finally:
        folder.chmod(0o755)


def test_app_factory_stops_on_a_nonexistent_folder(tmp_path):
    with pytest.raises(OSError):
        create_app({"TESTING": True, "TABLES_DIR": str(tmp_path / "no-such-folder")})
