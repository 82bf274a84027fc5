"""GET /v1/bases, /v1/bases/{ref} and /v1/bases/{ref}/life-table."""

import math
import tomllib

import numpy as np
import pytest

from service.app import DEFAULT_TABLES
from service.engine.curves import Curve
from tests.api.problem import assert_problem


def shipped() -> dict[tuple[str, str], dict]:
    """The shipped basis files, read directly (not through the service)."""
    out = {}
    for path in sorted(DEFAULT_TABLES.rglob("*.toml")):
        doc = tomllib.loads(path.read_text(encoding="utf-8"))
        out[(doc["id"], doc["version"])] = doc
    return out


SHIPPED = shipped()
PUBLISHED = [f"{i}@{v}" for (i, v), doc in SHIPPED.items() if doc["status"] == "approved"]


def makeham_q(ages, a, b, c):
    """Annual q under Makeham's law: p(x) = exp(-A - B c^x (c - 1) / ln c)."""
    ages = np.asarray(ages, dtype=float)
    return -np.expm1(-a - b * c**ages * (c - 1.0) / math.log(c))


# ---- the listing ----------------------------------------------------------------------------


def test_listing_has_every_shipped_basis(client):
    response = client.get("/v1/bases")
    assert response.status_code == 200
    bases = response.get_json()["bases"]
    assert {(b["id"], b["version"]) for b in bases} == set(SHIPPED)
    assert len(bases) == len(SHIPPED)
    for b in bases:
        doc = SHIPPED[(b["id"], b["version"])]
        assert b["title"] == doc["title"]
        assert b["status"] == doc["status"]
        assert b["digest"] == doc["digest"]


def test_listing_flags_one_default_per_id(client):
    bases = client.get("/v1/bases").get_json()["bases"]
    for basis_id in {i for i, _ in SHIPPED}:
        flagged = [b["version"] for b in bases if b["id"] == basis_id and b["default"]]
        marked = [v for (i, v), doc in SHIPPED.items() if i == basis_id and doc.get("default")]
        assert len(flagged) == 1, basis_id
        if marked:
            assert flagged == marked
    flags = {(b["id"], b["version"]): b["default"] for b in bases}
    assert flags[("fernhollow-annuitants", "2026.1")] is True
    assert flags[("fernhollow-annuitants", "2025.1")] is False


# ---- one basis ------------------------------------------------------------------------------


@pytest.mark.parametrize("ref", PUBLISHED)
def test_published_basis_names_its_sources(client, ref):
    body = client.get(f"/v1/bases/{ref}").get_json()
    doc = SHIPPED[tuple(ref.split("@"))]
    assert body["source"] == doc["source"] and body["source"].strip()
    assert len(body["mortality"]) == len(doc["mortality"])
    for entry in body["mortality"]:
        spec = doc["mortality"][entry["sex"]]
        assert entry["source"] == spec["source"] and entry["source"].strip()
        assert entry["kind"] == "law"
        assert entry["law"] == spec["law"]
        assert entry["parameters"] == pytest.approx(spec["parameters"], rel=0, abs=0)
        assert entry["first_age"] == spec["min_age"]
        assert entry["last_age"] > entry["first_age"]
        assert entry["select_period"] == len(spec.get("select_factors", []))


@pytest.mark.parametrize("key", sorted(SHIPPED))
def test_basis_detail_gives_its_defaults(client, key):
    ref = "@".join(key)
    response = client.get(f"/v1/bases/{ref}")
    assert response.status_code == 200
    body = response.get_json()
    doc = SHIPPED[key]
    assert (body["id"], body["version"], body["digest"]) == (*key, doc["digest"])
    audit = dict(body["audit"]["basis"])
    improvement = audit.pop("improvement", None)
    assert audit == {"id": key[0], "version": key[1], "digest": doc["digest"],
                     "status": doc["status"]}
    # A basis with an improvement scale names it in every audit block, as its file says.
    if "improvement" in doc:
        assert (improvement["scale"], improvement["kind"], improvement["base_year"]) == (
            doc["improvement"]["file"], doc["improvement"]["kind"],
            doc["improvement"]["base_year"])
    else:
        assert improvement is None
    defaults = body["defaults"]
    interest = defaults["interest"]
    assert interest["source"] == "basis"
    if "file" in doc["interest"]:
        # A curve read from a data file: what was read is shown, with its digest.
        assert interest["kind"] == doc["interest"]["kind"] and interest["rates"]
        assert interest["digest"] == Curve.from_mapping(
            {k: v for k, v in interest.items() if k not in ("digest", "source")}).digest()
    else:
        assert interest == {"kind": "flat", "rate": doc["interest"]["rate"], "source": "basis",
                            "digest": Curve.flat(doc["interest"]["rate"]).digest()}
    assert defaults["fractional_age"] == doc["methods"]["fractional_age"]
    assert defaults["mthly"] == doc["methods"]["mthly"]
    assert body["sex_distinct"] is ("unisex" not in doc["mortality"])
    assert sorted(e["sex"] for e in body["mortality"]) == sorted(doc["mortality"])


def test_demo_basis_detail_describes_its_files(client):
    body = client.get("/v1/bases/fernhollow-annuitants").get_json()
    assert body["version"] == "2026.1" and body["default"] is True
    files = {e["sex"]: e for e in body["mortality"]}
    assert set(files) == {"female", "male"}
    for sex, entry in files.items():
        assert entry["kind"] == "file"
        assert entry["file"] == f"data/fernhollow-2026-1-{sex}.csv"
        assert (entry["first_age"], entry["last_age"], entry["select_period"]) == (40, 120, 1)
    pinned = client.get("/v1/bases/fernhollow-annuitants@2025.1").get_json()
    assert (pinned["version"], pinned["default"]) == ("2025.1", False)
    assert pinned["defaults"]["mthly"] == "woolhouse-2"


@pytest.mark.parametrize("ref", ["no-such-basis", "standard-ultimate@1999.1", "..",
                                 "standard-ultimate@..", "standard-ultimate-2026.1.toml"])
def test_unknown_basis_detail_is_404(client, ref):
    assert_problem(client.get(f"/v1/bases/{ref}"), 404)
    assert_problem(client.get(f"/v1/bases/{ref}/life-table"), 404)


@pytest.mark.parametrize("path", [
    "/v1/bases/%2e%2e%2f",
    "/v1/bases/%2e%2e%2f/life-table",
    "/v1/bases/%2fetc%2fpasswd",
    "/v1/bases/%2fetc%2fpasswd/life-table",
    "/v1/bases/standard-ultimate@..%2f..%2fx/life-table",
])
def test_encoded_path_refs_are_404_problems(client, path):
    # An encoded slash in a ref decodes to a path that names no basis: the answer is a 404
    # problem, not a redirect to some other URL.
    assert_problem(client.get(path), 404)


# ---- the life table -------------------------------------------------------------------------


def life_table(client, ref, **query):
    response = client.get(f"/v1/bases/{ref}/life-table", query_string=query)
    assert response.status_code == 200, response.get_data(as_text=True)
    return response.get_json()


def columns(body) -> dict[str, np.ndarray]:
    return {k: np.array([row[k] for row in body["rows"]], dtype=float)
            for k in ("age", "q", "p", "l", "d", "e")}


def assert_consistent(body):
    col = columns(body)
    # Common practice: p = 1 - q, l(k+1) = l(k) p(k), d = l q, e(k) = p(k) (1 + e(k+1)).
    np.testing.assert_array_equal(np.diff(col["age"]), 1)
    np.testing.assert_allclose(col["p"], 1.0 - col["q"], rtol=0, atol=1e-15)
    if col["age"][0] == body["radix_age"]:
        assert col["l"][0] == pytest.approx(body["radix"], rel=1e-15)
    else:
        assert col["age"][0] > body["radix_age"] and col["l"][0] <= body["radix"]
    np.testing.assert_allclose(col["l"][1:], col["l"][:-1] * col["p"][:-1], rtol=1e-12, atol=0)
    np.testing.assert_allclose(col["d"], col["l"] * col["q"], rtol=1e-12, atol=0)
    np.testing.assert_allclose(col["e"][:-1], col["p"][:-1] * (1.0 + col["e"][1:]),
                               rtol=1e-12, atol=1e-12)
    assert ((col["q"] >= 0) & (col["q"] <= 1)).all()


@pytest.mark.parametrize("age, printed", [(40, 99338.3), (60, 96634.1), (65, 94579.7),
                                          (80, 75657.2)])
def test_l_column_matches_the_printed_table(client, age, printed):
    # Dickson, Hardy and Waters, AMLCR, Standard Ultimate Survival Model table: l with radix
    # 100,000 at age 20, printed to one decimal (recalled from memory). from_age only picks rows.
    body = life_table(client, "standard-ultimate", from_age=age, to_age=age)
    assert body["radix_age"] == 20
    assert round(body["rows"][0]["l"], 1) == printed


def test_select_l_starts_at_the_age_of_selection(client):
    body = life_table(client, "standard-select", from_age=47, duration=2)
    assert body["radix_age"] == 45
    q45, q46 = 0.81 * life_table(client, "standard-ultimate", from_age=45, to_age=45)[
        "rows"][0]["q"], 0.9 * life_table(client, "standard-ultimate", from_age=46,
                                          to_age=46)["rows"][0]["q"]
    # l[45]+2 = radix p[45] p[45]+1, the select rates being 0.9^(2-s) q(x+s) (the model's
    # definition).
    assert body["rows"][0]["l"] == pytest.approx(100_000 * (1 - q45) * (1 - q46), rel=1e-13)


@pytest.mark.parametrize("ref, query", [
    ("standard-ultimate", {}),
    ("standard-ultimate", {"from_age": 60}),
    ("illustrative", {"from_age": 13}),
    ("standard-select", {"from_age": 45, "duration": 0}),
    ("fernhollow-annuitants", {"sex": "female"}),
    ("fernhollow-annuitants", {"sex": "male", "duration": 0, "from_age": 70}),
    ("fernhollow-annuitants@2025.1", {"sex": "male"}),
])
def test_life_table_rows_are_consistent_to_the_end(client, ref, query):
    body = life_table(client, ref, **query)
    assert_consistent(body)
    col = columns(body)
    # Followed to the table's end: the last row closes the table.
    assert col["q"][-1] == 1.0 and col["e"][-1] == 0.0
    if "from_age" in query:
        assert col["age"][0] == query["from_age"]


def test_life_table_stops_at_to_age(client):
    body = life_table(client, "standard-ultimate", from_age=60, to_age=70)
    assert [row["age"] for row in body["rows"]] == list(range(60, 71))
    assert_consistent(body)
    full = life_table(client, "standard-ultimate", from_age=60)
    assert body["rows"] == full["rows"][:11]


def test_ultimate_rates_follow_makehams_law(client):
    # Source: Dickson, Hardy and Waters, Actuarial Mathematics for Life Contingent Risks,
    # Standard Ultimate Survival Model (Makeham A = 0.00022, B = 2.7e-6, c = 1.124).
    col = columns(life_table(client, "standard-ultimate", from_age=20, to_age=110))
    np.testing.assert_allclose(col["q"], makeham_q(col["age"], 0.00022, 2.7e-6, 1.124),
                               rtol=1e-12, atol=0)


def test_select_view_applies_the_select_factors(client):
    # Source: Dickson, Hardy and Waters, Standard Select Survival Model definition:
    # q[x]+s = 0.9^(2-s) q(x+s) for s = 0, 1; ultimate from duration 2.
    ultimate = columns(life_table(client, "standard-ultimate", from_age=40))["q"]
    select = columns(life_table(client, "standard-select", from_age=40, duration=0))["q"]
    assert select[0] == pytest.approx(0.81 * ultimate[0], rel=1e-12)
    assert select[1] == pytest.approx(0.9 * ultimate[1], rel=1e-12)
    np.testing.assert_allclose(select[2:], ultimate[2:], rtol=1e-12, atol=0)
    one_year_on = columns(life_table(client, "standard-select", from_age=41, duration=1))["q"]
    assert one_year_on[0] == pytest.approx(0.9 * ultimate[1], rel=1e-12)
    np.testing.assert_allclose(one_year_on[1:], ultimate[2:], rtol=1e-12, atol=0)
    beyond = columns(life_table(client, "standard-select", from_age=42, duration=2))["q"]
    np.testing.assert_allclose(beyond, ultimate[2:], rtol=1e-12, atol=0)


def test_demo_select_year_uses_the_select_column(client):
    path = DEFAULT_TABLES / "data" / "fernhollow-2026-1-female.csv"
    rows = [line.split(",") for line in path.read_text().splitlines()
            if line and not line.startswith("#")][1:]
    by_age = {int(r[0]): (float(r[1]), r[2]) for r in rows}
    col = columns(life_table(client, "fernhollow-annuitants", sex="female", from_age=65,
                             duration=0))
    assert col["q"][0] == pytest.approx(float(by_age[65][1]), rel=1e-15)
    np.testing.assert_allclose(col["q"][1:], [by_age[a][0] for a in range(66, 121)],
                               rtol=1e-15, atol=0)


def test_sex_is_required_on_the_demo_basis(client):
    response = client.get("/v1/bases/fernhollow-annuitants/life-table")
    body = assert_problem(response, 422, "sex")
    assert body["audit"]["basis"]["id"] == "fernhollow-annuitants"
    female = life_table(client, "fernhollow-annuitants", sex="female")
    male = life_table(client, "fernhollow-annuitants", sex="male")
    assert (female["sex"], male["sex"]) == ("female", "male")
    assert female["rows"][0]["q"] != male["rows"][0]["q"]


def test_sex_is_ignored_on_a_unisex_basis(client):
    plain = life_table(client, "standard-ultimate", from_age=60)
    female = life_table(client, "standard-ultimate", from_age=60, sex="female")
    assert female["rows"] == plain["rows"]
    assert plain["sex"] == "unisex"


@pytest.mark.parametrize("ref, query, path", [
    ("standard-ultimate", {"from_age": 10}, "from_age"),
    ("standard-ultimate", {"from_age": 131}, "from_age"),
    ("standard-ultimate", {"from_age": 250}, "from_age"),
    ("standard-ultimate", {"from_age": -1}, "from_age"),
    ("standard-ultimate", {"from_age": "sixty"}, "from_age"),
    ("fernhollow-annuitants", {"sex": "female", "from_age": 30}, "from_age"),
    ("standard-select", {"from_age": 20, "duration": 1}, None),
    ("standard-ultimate", {"sex": "other"}, "sex"),
    ("standard-ultimate", {"colour": "blue"}, "colour"),
])
def test_life_table_refuses_ages_outside_the_table(client, ref, query, path):
    response = client.get(f"/v1/bases/{ref}/life-table", query_string=query)
    assert_problem(response, 422, path)


def test_to_age_before_from_age_names_to_age(client):
    response = client.get("/v1/bases/standard-ultimate/life-table",
                          query_string={"from_age": 60, "to_age": 50})
    assert_problem(response, 422, "to_age")


def test_to_age_past_the_table_end_names_to_age(client):
    response = client.get("/v1/bases/fernhollow-annuitants/life-table",
                          query_string={"sex": "male", "from_age": 60, "to_age": 125})
    assert_problem(response, 422, "to_age")
