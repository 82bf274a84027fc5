"""Worked examples for the contract (and the /docs page's Try it out), under the shipped demo
bases: fernhollow-annuitants (Fernhollow Mutual, an invented insurer; sex-distinct) and
standard-ultimate (unisex). tests/api/test_contract_generation.py sends every one of them."""

ANNUITY_FACTORS = {
    "pensioners": {
        "summary": "Two Fernhollow Mutual pensioners: monthly in advance with a five-year "
                   "guarantee, and quarterly in arrears",
        "value": {"basis": "fernhollow-annuitants", "items": [
            {"id": "FM-20417", "lives": [{"age": 67, "sex": "female"}], "timing": "advance",
             "frequency": 12, "guarantee": 5},
            {"id": "FM-20418", "lives": [{"age": 71.5, "sex": "male"}], "timing": "arrears",
             "frequency": 4}]}},
    "joint-life": {
        "summary": "A joint-and-two-thirds-survivor pension at 3.5% under standard-ultimate",
        "value": {"basis": "standard-ultimate", "interest_rate": 0.035, "items": [
            {"id": "FM-30991", "lives": [{"age": 65}, {"age": 62}], "timing": "advance",
             "frequency": 12, "survivorship": {"both": 1, "first_only": 1,
                                               "second_only": 0.6667}}]}},
}

INSURANCE_FACTORS = {
    "covers": {
        "summary": "A 20-year term cover and a 15-year endowment under standard-ultimate",
        "value": {"basis": "standard-ultimate", "items": [
            {"id": "FM-T-5521", "lives": [{"age": 45}], "cover": "term", "term": 20},
            {"id": "FM-E-0712", "lives": [{"age": 50}], "cover": "endowment", "term": 15,
             "benefit_timing": "moment-of-death"}]}},
}

CASH_FLOW_PROJECTIONS = {
    "portfolio": {
        "summary": "Two Fernhollow Mutual pensions in payment, projected year by year",
        "value": {"basis": "fernhollow-annuitants", "buckets": "annual", "items": [
            {"id": "FM-20417", "lives": [{"age": 67, "sex": "female"}], "timing": "advance",
             "frequency": 12, "amount": 18000},
            {"id": "FM-20418", "lives": [{"age": 71.5, "sex": "male"}], "timing": "arrears",
             "frequency": 12, "amount": 9600}]}},
}

CASH_FLOW_SCHEDULES = {
    "ten-years": {
        "summary": "12,000 a year in advance for at most ten years to a woman aged 67",
        "value": {"basis": "fernhollow-annuitants", "amount": 12000, "item": {
            "lives": [{"age": 67, "sex": "female"}], "timing": "advance", "term": 10}}},
}

#: CSV bodies of the batch operations (their basis goes in the query string: ?basis=...).
CSV_ANNUITIES = ("id,age,sex,timing,frequency,guarantee\n"
                 "FM-20417,67,female,advance,12,5\nFM-20418,71.5,male,arrears,4,\n")
CSV_INSURANCE = "id,age,cover,term\nFM-T-5521,45,term,20\nFM-W-0090,58,whole-life,\n"
CSV_PROJECTIONS = ("id,age,sex,timing,frequency,amount\n"
                   "FM-20417,67,female,advance,12,18000\nFM-20418,71.5,male,arrears,12,9600\n")

#: Path and query parameters, by operation.
BASIS_REF = {"ref": "fernhollow-annuitants"}
LIFE_TABLE = {"ref": "standard-ultimate", "from_age": 60, "to_age": 70}

LIVE = {"status": "ok"}
