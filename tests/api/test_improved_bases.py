"""Bases as they are kept: improvement scales, ages from dates, blends, rounding, governance.

Each check compares the service with something computed here from the definition: a basis
whose improved, blended or dated table is written out by the test as a plain CSV table must
give the same factors as the basis that asks the service to do the projecting, blending or
dating. The tables are invented (Makeham-shaped rates written by the test); the
definitions are:

- generational projection: q(x, y) = q(x, base) x prod_{t=base}^{y-1} (1 - r(x, t)), with y
  the calendar year in which the life is aged x (the issue's definition; common practice);
- a life aged x (integer part) at a valuation date in year Y is aged x + t in year Y + t;
- blend on q: sum of w_i q_i(x) (common practice);
- ages from dates: whole years to the last birthday (common practice).
"""

import datetime
import math
import re
from decimal import ROUND_HALF_EVEN, ROUND_HALF_UP, Decimal

import numpy as np
import pytest

from service import create_app
from service.bases import load_registry
from service.bases.cohorts import RequestTables, cohort_table

FIRST_AGE, LAST_AGE = 40, 110
BASE_YEAR = 2020


def makeham_q(a: float, b: float, c: float) -> list[float]:
    """Invented rates: Makeham-shaped annual q from FIRST_AGE, closing with q = 1."""
    q = [1 - math.exp(-a - b * c**x * (c - 1) / math.log(c)) for x in range(FIRST_AGE, LAST_AGE)]
    return [*q, 1.0]


FEMALE = makeham_q(0.0002, 2.0e-6, 1.125)
MALE = makeham_q(0.0003, 3.5e-6, 1.12)


def table_csv(q) -> str:
    return "age,q\n" + "".join(f"{FIRST_AGE + k},{float(v)!r}\n" for k, v in enumerate(q))


def scale_csv(rate, years=range(2018, 2031)) -> str:
    """A by-age-and-year scale with ``rate(age, year)`` over the tables' ages."""
    head = "age," + ",".join(str(y) for y in years) + "\n"
    rows = "".join(f"{x}," + ",".join(repr(rate(x, y)) for y in years) + "\n"
                   for x in range(FIRST_AGE, LAST_AGE + 1))
    return head + rows


def basis_toml(basis_id: str, *, female="data/female.csv", male="data/male.csv",
               extra: str = "") -> str:
    return f'''id = "{basis_id}"
version = "1"
title = "Invented test basis"
status = "demo"
source = "Invented for the tests"
{extra}
[interest]
kind = "flat"
rate = 0.03

[mortality.female]
file = "{female}"
source = "Invented"

[mortality.male]
file = "{male}"
source = "Invented"
'''


def improvement_toml(file: str, *, long_term_rate: float, projection="generational",
                     year: int | None = None) -> str:
    static = f"year = {year}\n" if year is not None else ""
    return f'''
[improvement]
file = "{file}"
kind = "by-age-and-year"
base_year = {BASE_YEAR}
long_term_rate = {long_term_rate!r}
projection = "{projection}"
{static}source = "Invented for the tests"
'''


def write(folder, name: str, text: str) -> None:
    path = folder / name
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text)


def with_digest(folder, name: str) -> None:
    """Record the digest the loader asks a retired or approved file to carry."""
    refusal = next(r for r in load_registry(folder).refused if r.file == name)
    digest = re.search(r'digest = "(sha256:[0-9a-f]{64})"', refusal.detail).group(1)
    path = folder / name
    path.write_text(f'digest = "{digest}"\n' + path.read_text())


def client_over(folder):
    app = create_app({"TESTING": True, "TABLES_DIR": str(folder)})
    registry = app.extensions["registry"]
    assert not registry.refused, [r.detail for r in registry.refused]
    return app.test_client()


@pytest.fixture()
def folder(tmp_path):
    write(tmp_path, "data/female.csv", table_csv(FEMALE))
    write(tmp_path, "data/male.csv", table_csv(MALE))
    return tmp_path


def factor(client, basis: str, life: dict, valuation_date=None, **item) -> dict:
    body = {"basis": basis, "items": [{"lives": [life], "timing": "advance", **item}]}
    if valuation_date is not None:
        body["valuation_date"] = valuation_date
    response = client.post("/v1/annuity-factors", json=body)
    assert response.status_code == 200, response.get_json()
    return response.get_json()


def value(client, basis, life, valuation_date=None, **item) -> float:
    return factor(client, basis, life, valuation_date, **item)["results"][0]["value"]


def projected(q, age: int, valuation_year: int, rate) -> list[float]:
    """The rates a life aged ``age`` in ``valuation_year`` follows, from the definition:
    at age x it is in year valuation_year + (x - age)."""
    out = []
    for k, base in enumerate(q):
        x = FIRST_AGE + k
        year = valuation_year + (x - age)
        factor_ = 1.0
        if year >= BASE_YEAR:
            for t in range(BASE_YEAR, year):
                factor_ *= 1 - rate(x, t)
        else:
            for t in range(year, BASE_YEAR):
                factor_ /= 1 - rate(x, t)
        out.append(1.0 if base == 1.0 else min(base * factor_, 1.0))
    return out


class TestGenerationalImprovement:
    def test_zero_improvement_leaves_factors_unchanged(self, folder):
        write(folder, "data/zero.csv", scale_csv(lambda x, y: 0.0))
        write(folder, "plain.toml", basis_toml("plain"))
        write(folder, "zero.toml", basis_toml(
            "zero", extra=improvement_toml("data/zero.csv", long_term_rate=0.0)))
        client = client_over(folder)
        for life in ({"age": 65, "sex": "female"}, {"age": 71.5, "sex": "male"}):
            assert value(client, "zero", life, "2026-06-30") == value(client, "plain", life)

    @pytest.mark.parametrize("rate", [0.01, 0.025])
    @pytest.mark.parametrize("age,valuation_date", [(65, "2026-12-31"), (58, "2019-03-01"),
                                                    (80, "2031-07-01")])
    def test_constant_rate_equals_the_base_table_scaled_year_by_year(self, folder, rate, age,
                                                                   valuation_date):
        # Every age and year improves at r: the life aged x + t in year Y + t has
        # q(x + t) (1 - r)^(Y + t - base), computed here and shipped as a plain table.
        write(folder, "data/flat.csv", scale_csv(lambda x, y: rate))
        write(folder, "flat.toml", basis_toml(
            "flat", extra=improvement_toml("data/flat.csv", long_term_rate=rate)))
        year = int(valuation_date[:4])
        write(folder, "data/female-by-hand.csv", table_csv(
            projected(FEMALE, age, year, lambda x, t: rate)))
        write(folder, "by-hand.toml", basis_toml("by-hand", female="data/female-by-hand.csv"))
        client = client_over(folder)
        life = {"age": age, "sex": "female"}
        improved = value(client, "flat", life, valuation_date)
        assert improved == pytest.approx(value(client, "by-hand", life), rel=1e-12)
        assert improved > value(client, "flat", life, "2020-06-30") or year <= 2020

    def test_a_two_dimensional_scale_matches_the_definition(self, folder):
        def rate(x, y):
            return max(0.0, 0.03 - 0.0004 * (x - 40)) * (1 - 0.04 * (y - 2018))

        write(folder, "data/scale.csv", scale_csv(rate))
        write(folder, "two.toml", basis_toml(
            "two", extra=improvement_toml("data/scale.csv", long_term_rate=0.008)))

        def full(x, t):  # past the last column the long-term rate
            return rate(x, t) if t <= 2030 else (0.008 if t > 2030 else rate(x, 2018))

        write(folder, "data/male-by-hand.csv", table_csv(projected(MALE, 67, 2026, full)))
        write(folder, "by-hand.toml", basis_toml("by-hand", male="data/male-by-hand.csv"))
        client = client_over(folder)
        life = {"age": 67.25, "sex": "male"}
        assert value(client, "two", life, "2026-01-15", frequency=12) == pytest.approx(
            value(client, "by-hand", life, frequency=12), rel=1e-12)

    def test_factors_rise_with_improvement_and_with_a_later_valuation_date(self, folder):
        for name, r in (("low", 0.005), ("high", 0.02)):
            write(folder, f"data/{name}.csv", scale_csv(lambda x, y, r=r: r))
            write(folder, f"{name}.toml", basis_toml(
                name, extra=improvement_toml(f"data/{name}.csv", long_term_rate=r)))
        client = client_over(folder)
        life = {"age": 70, "sex": "female"}
        assert value(client, "high", life, "2026-12-31") > value(client, "low", life,
                                                                 "2026-12-31")
        dates = ["2015-06-30", "2020-06-30", "2026-06-30", "2040-06-30"]
        values = [value(client, "high", life, d) for d in dates]
        assert values == sorted(values) and len(set(values)) == len(values)

    def test_static_projection_uses_the_stated_year_for_every_life(self, folder):
        write(folder, "data/flat.csv", scale_csv(lambda x, y: 0.015))
        write(folder, "static.toml", basis_toml("static", extra=improvement_toml(
            "data/flat.csv", long_term_rate=0.015, projection="static", year=2030)))
        static = [v if v == 1.0 else v * (1 - 0.015) ** (2030 - BASE_YEAR) for v in FEMALE]
        write(folder, "data/static-by-hand.csv", table_csv(static))
        write(folder, "by-hand.toml", basis_toml("by-hand", female="data/static-by-hand.csv"))
        client = client_over(folder)
        life = {"age": 62, "sex": "female"}
        # Static: no valuation date is needed, and none changes the answer.
        assert value(client, "static", life) == pytest.approx(
            value(client, "by-hand", life), rel=1e-12)
        assert value(client, "static", life, "2050-01-01") == value(client, "static", life)

    def test_without_a_valuation_date_the_answer_says_it_is_needed(self, folder):
        write(folder, "data/flat.csv", scale_csv(lambda x, y: 0.01))
        write(folder, "flat.toml", basis_toml(
            "flat", extra=improvement_toml("data/flat.csv", long_term_rate=0.01)))
        client = client_over(folder)
        response = client.post("/v1/annuity-factors", json={
            "basis": "flat", "items": [{"lives": [{"age": 65, "sex": "male"}],
                                        "timing": "arrears"}]})
        assert response.status_code == 422
        assert "valuation_date" in response.get_json()["errors"]

    def test_the_audit_block_names_the_scale_the_projection_and_the_date(self, folder):
        write(folder, "data/flat.csv", scale_csv(lambda x, y: 0.01))
        write(folder, "flat.toml", basis_toml(
            "flat", extra=improvement_toml("data/flat.csv", long_term_rate=0.01)))
        client = client_over(folder)
        audit = factor(client, "flat", {"age": 65, "sex": "male"}, "2026-12-31")["audit"]
        assert audit["valuation_date"] == "2026-12-31"
        assert audit["basis"]["improvement"] | {"source": None} == {
            "scale": "data/flat.csv", "kind": "by-age-and-year", "projection": "generational",
            "base_year": BASE_YEAR, "year": None, "long_term_rate": 0.01,
            "long_term_from": None, "source": None}
        csv = client.post("/v1/annuity-factors?basis=flat&valuation_date=2026-12-31",
                          data="age,sex,timing\n65,male,advance\n",
                          headers={"Content-Type": "text/csv", "Accept": "text/csv"})
        assert csv.status_code == 200, csv.get_data(as_text=True)
        assert csv.headers["X-Valuation-Date"] == "2026-12-31"
        assert csv.headers["X-Improvement"].startswith("data/flat.csv; projection=generational")

    def test_each_cohort_is_projected_once_per_request(self, folder):
        write(folder, "data/flat.csv", scale_csv(lambda x, y: 0.01))
        write(folder, "flat.toml", basis_toml(
            "flat", extra=improvement_toml("data/flat.csv", long_term_rate=0.01)))
        app = create_app({"TESTING": True, "TABLES_DIR": str(folder)})
        basis = app.extensions["registry"].resolve("flat")
        tables = RequestTables(basis, datetime.date(2026, 12, 31))
        ages = np.linspace(50, 89.9, 10_000)  # 40 integer ages: 40 cohorts
        rng = np.random.default_rng(7)
        sexes = rng.integers(0, 2, ages.size)
        placed = [tables.index(int(s), float(a)) for s, a in zip(sexes, ages, strict=True)]
        assert tables.cohorts == len(tables.tables) == 80
        # Lives of one cohort share one table object.
        first = {}
        for s, a, p in zip(sexes, ages, placed, strict=True):
            assert first.setdefault((int(s), math.floor(a)), p) == p
        assert tables.tables[placed[0]] is cohort_table(basis, int(sexes[0]),
                                                        2026 - math.floor(ages[0]))

    def test_a_batch_over_many_birth_years_matches_items_one_by_one(self, folder):
        write(folder, "data/flat.csv", scale_csv(lambda x, y: 0.012))
        write(folder, "flat.toml", basis_toml(
            "flat", extra=improvement_toml("data/flat.csv", long_term_rate=0.012)))
        client = client_over(folder)
        lives = [{"age": 50 + k * 0.75, "sex": ("female", "male")[k % 2]} for k in range(40)]
        batch = client.post("/v1/annuity-factors", json={
            "basis": "flat", "valuation_date": "2026-12-31",
            "items": [{"lives": [life], "timing": "advance"} for life in lives]}).get_json()
        # (A batch and a single item take different routes through the engine: the same
        # values to 1e-12 relative, not to the last bit.)
        for life, result in zip(lives, batch["results"], strict=True):
            assert result["value"] == pytest.approx(value(client, "flat", life, "2026-12-31"),
                                                    rel=1e-12)

    def test_two_lives_follow_their_own_cohorts(self, folder):
        write(folder, "data/flat.csv", scale_csv(lambda x, y: 0.02))
        write(folder, "flat.toml", basis_toml(
            "flat", extra=improvement_toml("data/flat.csv", long_term_rate=0.02)))
        write(folder, "data/f-by-hand.csv", table_csv(projected(
            FEMALE, 60, 2026, lambda x, t: 0.02)))
        write(folder, "data/m-by-hand.csv", table_csv(projected(MALE, 66, 2026,
                                                                lambda x, t: 0.02)))
        write(folder, "by-hand.toml", basis_toml("by-hand", female="data/f-by-hand.csv",
                                                 male="data/m-by-hand.csv"))
        client = client_over(folder)
        item = {"lives": [{"age": 66, "sex": "male"}, {"age": 60, "sex": "female"}],
                "timing": "advance", "survivorship": "last-survivor"}
        got = [client.post("/v1/annuity-factors", json={
            "basis": basis, "valuation_date": "2026-05-01", "items": [item]}).get_json()
            for basis in ("flat", "by-hand")]
        assert got[0]["results"][0]["value"] == pytest.approx(got[1]["results"][0]["value"],
                                                              rel=1e-12)

    def test_the_life_table_shows_the_cohort_projected_rates(self, folder):
        write(folder, "data/flat.csv", scale_csv(lambda x, y: 0.01))
        write(folder, "flat.toml", basis_toml(
            "flat", extra=improvement_toml("data/flat.csv", long_term_rate=0.01)))
        client = client_over(folder)
        body = client.get("/v1/bases/flat/life-table?sex=male&valuation_date=2026-12-31"
                          "&date_of_birth=1961-03-02").get_json()
        # Born 2 March 1961: 65 last birthday on 31 December 2026 (exact definition: 65.83).
        assert body["cohort"] == 2026 - 65 and body["age"] == pytest.approx(65 + 304 / 365)
        expected = projected(MALE, 65, 2026, lambda x, t: 0.01)
        assert body["rows"][0]["age"] == 65
        for row in body["rows"]:
            assert row["q"] == pytest.approx(expected[row["age"] - FIRST_AGE], rel=1e-13)
        missing = client.get("/v1/bases/flat/life-table?sex=male")
        assert missing.status_code == 422


class TestAgesFromDates:
    @pytest.mark.parametrize("definition,born,on,age", [
        # hand-worked: born 15 June 1960, valued 14 June 2026: 65 last birthday, 364 days of
        # a 365-day year since it.
        ("exact", "1960-06-15", "2026-06-14", 65 + 364 / 365),
        ("last-birthday", "1960-06-15", "2026-06-14", 65.0),
        ("nearest-birthday", "1960-06-15", "2026-06-14", 66.0),
        # hand-worked: born 15 June 1960, valued 14 December 2026: 182 days since the
        # birthday, short of half of 365: nearest is 66; on 15 December (183 days) it is 67.
        ("nearest-birthday", "1960-06-15", "2026-12-14", 66.0),
        ("nearest-birthday", "1960-06-15", "2026-12-15", 67.0),
        # hand-worked: born 29 February 1960; in 2026 the birthday is 28 February.
        ("last-birthday", "1960-02-29", "2026-02-27", 65.0),
        ("last-birthday", "1960-02-29", "2026-02-28", 66.0),
    ])
    def test_the_age_used_is_the_one_a_person_counts(self, folder, definition, born, on, age):
        write(folder, "dated.toml", basis_toml("dated",
                                               extra=f'age_definition = "{definition}"'))
        client = client_over(folder)
        got = factor(client, "dated", {"date_of_birth": born, "sex": "female"}, on)
        result = got["results"][0]
        assert result["ages"] == [pytest.approx(age, abs=1e-12)]
        assert got["audit"]["basis"]["age_definition"] == definition
        assert result["value"] == value(client, "dated", {"age": result["ages"][0],
                                                          "sex": "female"})

    def test_a_date_of_birth_needs_a_valuation_date(self, folder):
        write(folder, "dated.toml", basis_toml("dated"))
        client = client_over(folder)
        response = client.post("/v1/annuity-factors", json={"basis": "dated", "items": [
            {"lives": [{"date_of_birth": "1960-01-01", "sex": "male"}], "timing": "advance"}]})
        assert response.status_code == 422
        assert "valuation_date" in response.get_json()["errors"]

    def test_a_birth_after_the_valuation_date_is_refused_in_its_place(self, folder):
        write(folder, "dated.toml", basis_toml("dated"))
        client = client_over(folder)
        body = client.post("/v1/annuity-factors", json={
            "basis": "dated", "valuation_date": "2026-12-31", "on_error": "per-item",
            "items": [{"lives": [{"date_of_birth": "2027-01-01", "sex": "male"}],
                       "timing": "advance"},
                      {"lives": [{"date_of_birth": "1950-01-01", "sex": "male"}],
                       "timing": "advance"}]}).get_json()
        assert list(body["results"][0]["problem"]["errors"]) == ["lives.0.date_of_birth"]
        assert body["results"][1]["ages"] == [76.0 + 364 / 365]

    def test_age_and_date_of_birth_together_are_refused(self, folder):
        write(folder, "dated.toml", basis_toml("dated"))
        client = client_over(folder)
        response = client.post("/v1/annuity-factors", json={
            "basis": "dated", "valuation_date": "2026-12-31", "items": [{"lives": [
                {"age": 60, "date_of_birth": "1966-01-01", "sex": "male"}],
                "timing": "advance"}]})
        assert response.status_code == 422
        assert "items.0.lives.0.date_of_birth" in response.get_json()["errors"]


class TestBlends:
    @pytest.mark.parametrize("on", ["q", "survival"])
    def test_a_blended_table_gives_the_factor_of_the_blend_computed_here(self, folder, on):
        write(folder, "blended.toml", basis_toml("blended", extra=f'''
[blends.mixed-70-30]
male = 0.7
female = 0.3
on = "{on}"
'''))
        if on == "q":
            blend = [0.7 * m + 0.3 * f for m, f in zip(MALE, FEMALE, strict=True)]
        else:  # survivors from a common radix, then q from them
            lm = np.concatenate([[1.0], np.cumprod(1 - np.array(MALE))])
            lf = np.concatenate([[1.0], np.cumprod(1 - np.array(FEMALE))])
            mixed = 0.7 * lm + 0.3 * lf
            blend = [*(1 - mixed[1:-1] / mixed[:-2]), 1.0]
        blend[-1] = 1.0
        write(folder, "data/blend-by-hand.csv", table_csv(blend))
        write(folder, "by-hand.toml", basis_toml("by-hand", male="data/blend-by-hand.csv"))
        client = client_over(folder)
        got = value(client, "blended", {"age": 63.5, "sex": "mixed-70-30"}, frequency=4)
        assert got == pytest.approx(value(client, "by-hand", {"age": 63.5, "sex": "male"},
                                          frequency=4), rel=1e-12)
        detail = client.get("/v1/bases/blended").get_json()
        assert detail["tables"] == ["female", "male", "mixed-70-30"]
        assert detail["blends"] == [{"name": "mixed-70-30", "on": on,
                                     "weights": {"male": 0.7, "female": 0.3}}]

    def test_a_name_the_basis_does_not_define_is_refused(self, folder):
        write(folder, "plain.toml", basis_toml("plain"))
        client = client_over(folder)
        response = client.post("/v1/annuity-factors", json={"basis": "plain", "items": [
            {"lives": [{"age": 60, "sex": "mixed-70-30"}], "timing": "advance"}]})
        assert response.status_code == 422
        assert response.get_json()["errors"] == {"items.0.lives.0.sex": [
            "This basis is sex-distinct: give one of female, male."]}


class TestRounding:
    @pytest.mark.parametrize("rule,mode", [("half-up", ROUND_HALF_UP),
                                           ("half-even", ROUND_HALF_EVEN)])
    def test_rounded_sits_beside_the_full_value(self, folder, rule, mode):
        write(folder, "rounded.toml", basis_toml("rounded", extra=f'''
[rounding]
places = 3
rule = "{rule}"
'''))
        write(folder, "plain.toml", basis_toml("plain"))
        client = client_over(folder)
        for age in (55, 61.25, 70, 84.5):
            life = {"age": age, "sex": "male"}
            result = factor(client, "rounded", life)["results"][0]
            assert result["value"] == value(client, "plain", life)  # nothing rounded inside
            # Source: Python's decimal module, rounding modes ROUND_HALF_UP / ROUND_HALF_EVEN.
            assert result["rounded"] == float(Decimal(repr(result["value"])).quantize(
                Decimal("0.001"), rounding=mode))
        csv = client.post("/v1/annuity-factors?basis=rounded", data="age,sex,timing\n"
                          "60,male,advance\n", headers={"Content-Type": "text/csv",
                                                        "Accept": "text/csv"})
        header, row = csv.get_data(as_text=True).splitlines()[:2]
        assert header.split(",")[:3] == ["id", "value", "rounded"]
        insurance = client.post("/v1/insurance-factors", json={"basis": "rounded", "items": [
            {"lives": [{"age": 60, "sex": "male"}], "cover": "whole-life"}]}).get_json()
        assert "rounded" in insurance["results"][0]

    def test_a_basis_without_a_rule_gives_no_rounded(self, folder):
        write(folder, "plain.toml", basis_toml("plain"))
        client = client_over(folder)
        assert "rounded" not in factor(client, "plain", {"age": 60, "sex": "male"})["results"][0]


class TestGovernance:
    APPROVAL = '''effective_date = 2025-01-01
superseded_by = "2"
[approval]
by = "Board of the invented fund, minute 12"
on = 2024-12-01
'''

    def test_a_retired_version_is_served_only_when_pinned_and_warns(self, folder):
        old = basis_toml("fund").replace('status = "demo"', 'status = "retired"')
        old = old.replace('source = "Invented for the tests"\n',
                          'source = "Invented for the tests"\n' + self.APPROVAL, 1)
        write(folder, "fund-1.toml", old)
        with_digest(folder, "fund-1.toml")
        write(folder, "fund-2.toml", basis_toml("fund").replace('version = "1"',
                                                                'version = "2"'))
        client = client_over(folder)
        unpinned = factor(client, "fund", {"age": 60, "sex": "male"})
        assert unpinned["audit"]["basis"]["version"] == "2"
        pinned = factor(client, "fund@1", {"age": 60, "sex": "male"})
        assert pinned["audit"]["basis"]["status"] == "retired"
        assert any("retired" in w["message"] for w in pinned["warnings"])
        detail = client.get("/v1/bases/fund@1").get_json()
        assert detail["default"] is False
        assert detail["superseded_by"] == "2"
        assert detail["approval"] == {"by": "Board of the invented fund, minute 12",
                                      "on": "2024-12-01"}
        assert detail["effective_date"] == "2025-01-01"

    def test_a_retired_version_alone_is_no_default(self, folder):
        old = basis_toml("fund").replace('status = "demo"', 'status = "retired"')
        old = old.replace('source = "Invented for the tests"\n',
                          'source = "Invented for the tests"\n' + self.APPROVAL, 1)
        write(folder, "fund-1.toml", old)
        with_digest(folder, "fund-1.toml")
        client = client_over(folder)
        assert client.post("/v1/annuity-factors", json={"basis": "fund", "items": [
            {"lives": [{"age": 60, "sex": "male"}], "timing": "advance"}]}).status_code == 404
        assert factor(client, "fund@1", {"age": 60, "sex": "male"})["results"][0]["value"] > 0
