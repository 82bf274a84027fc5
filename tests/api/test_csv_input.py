"""Batches sent as CSV: the same items, limits and errors as JSON, errors by row and column."""

from service import create_app
from tests.api.problem import assert_problem

URL = "/v1/annuity-factors"
CSV = ("id,age,sex,timing,frequency,guarantee,age_2,sex_2,survivorship,start_requires\n"
       "FM-1,67,female,advance,12,5,,,,\n"
       "FM-2,71.5,male,arrears,4,,,,,\n"
       "FM-3,66,male,advance,12,,63,female,joint-life,first\n")
JSON_ITEMS = [
    {"id": "FM-1", "lives": [{"age": 67, "sex": "female"}], "timing": "advance",
     "frequency": 12, "guarantee": 5},
    {"id": "FM-2", "lives": [{"age": 71.5, "sex": "male"}], "timing": "arrears",
     "frequency": 4},
    {"id": "FM-3", "lives": [{"age": 66, "sex": "male"}, {"age": 63, "sex": "female"}],
     "timing": "advance", "frequency": 12, "survivorship": "joint-life",
     "start_requires": "first"}]


def post_csv(client, text, query="basis=fernhollow-annuitants", url=URL, **kwargs):
    return client.post(f"{url}?{query}", data=text.encode(), content_type="text/csv", **kwargs)


def test_rows_are_the_items_json_sends(client):
    got = post_csv(client, CSV)
    assert got.status_code == 200, got.get_data(as_text=True)
    as_json = client.post(URL, json={"basis": "fernhollow-annuitants", "items": JSON_ITEMS})
    assert got.get_json()["results"] == as_json.get_json()["results"]


def test_errors_name_the_row_and_column(client):
    bad = CSV.replace("FM-2,71.5,male", "FM-2,abc,male").replace("FM-1,67", "FM-1,-2")
    problem = assert_problem(post_csv(client, bad), 422)
    assert set(problem["errors"]) == {"rows.2.age", "rows.3.age"}
    no_sex = CSV.replace(",63,female,", ",63,,")
    assert set(assert_problem(post_csv(client, no_sex), 422)["errors"]) == {"rows.4.sex_2"}


def test_per_item_names_columns(client):
    bad = CSV.replace("FM-2,71.5,male", "FM-2,171.5,male")
    body = post_csv(client, bad, "basis=fernhollow-annuitants&on_error=per-item").get_json()
    assert (body["valued"], body["refused"]) == (2, 1)
    assert body["results"][1]["problem"]["errors"] == {"age": [
        "age 171.5 is outside the table's ages 40 to 120"]}


def test_csv_in_csv_out(client):
    response = post_csv(client, CSV, headers={"Accept": "text/csv"})
    lines = response.get_data(as_text=True).splitlines()
    assert lines[0].startswith("id,value,") and len(lines) == 4


def test_refusals(client):
    assert_problem(post_csv(client, CSV, "basis=fernhollow-annuitants&colour=blue"), 422,
                   "colour")
    assert_problem(post_csv(client, CSV, "interest_rate=0.04"), 422, "basis")
    assert_problem(post_csv(client, "id,age\n"), 422, "body")
    assert_problem(post_csv(client, "id,age,age\nx,60,61\n"), 422, "body")
    assert_problem(post_csv(client, "age,timing\n60,advance,extra\n"), 422, "rows.2")
    small = create_app({"TESTING": True, "MAX_ITEMS": 2}).test_client()
    assert_problem(post_csv(small, CSV), 413)


def test_insurance_from_csv(client):
    text = "id,age,sex,cover,term,benefit_timing\nA,50,male,term,20,moment-of-death\n"
    body = post_csv(client, text, url="/v1/insurance-factors").get_json()
    assert body["results"][0]["id"] == "A" and body["results"][0]["value"] > 0
