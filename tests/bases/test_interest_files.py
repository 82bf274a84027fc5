"""Interest structures in basis files: inline or from a data file covered by the digest."""

import pytest

from service.bases import load_registry
from tests.bases.test_registry import (
    assert_refused_beside_sound,
    basis_text,
    csv_mortality,
    write,
)

SPOT_CSV = "# Invented spot rates for the tests.\nterm,rate\n1,0.03\n5,0.035\n10,0.04\n"


def with_interest(basis_id: str, interest: str) -> str:
    text = basis_text(basis_id, "2026.1", csv_mortality("data/sound.csv"))
    return text.replace('[interest]\nkind = "flat"\nrate = 0.04\n', interest)


def test_a_spot_curve_from_a_file(folder):
    write(folder, "data/spot.csv", SPOT_CSV)
    write(folder, "curve.toml", with_interest(
        "fernhollow-curve", '[interest]\nkind = "spot"\nfile = "data/spot.csv"\n'))
    basis = load_registry(folder).resolve("fernhollow-curve")
    assert basis.interest.describe() == {"kind": "spot", "terms": [1.0, 5.0, 10.0],
                                         "rates": [0.03, 0.035, 0.04]}
    assert basis.interest_rate is None


def test_the_curve_file_is_in_the_digest(folder):
    write(folder, "data/spot.csv", SPOT_CSV)
    write(folder, "curve.toml", with_interest(
        "fernhollow-curve", '[interest]\nkind = "spot"\nfile = "data/spot.csv"\n'))
    before = load_registry(folder).resolve("fernhollow-curve").digest
    write(folder, "data/spot.csv", SPOT_CSV.replace("0.035", "0.036"))
    assert load_registry(folder).resolve("fernhollow-curve").digest != before


@pytest.mark.parametrize("interest", [
    'kind = "forward"\nedges = [10]\nrates = [0.05, 0.035]\n',
    'kind = "segments"\nedges = [5, 20]\nrates = [0.045, 0.052, 0.055]\n',
])
def test_bands_inline(folder, interest):
    write(folder, "bands.toml", with_interest("fernhollow-bands", "[interest]\n" + interest))
    basis = load_registry(folder).resolve("fernhollow-bands")
    assert basis.interest.kind in ("forward", "segments")


def test_bands_from_a_file_start_at_zero(folder):
    write(folder, "data/bands.csv", "from,rate\n0,0.05\n10,0.035\n")
    write(folder, "bands.toml", with_interest(
        "fernhollow-bands", '[interest]\nkind = "forward"\nfile = "data/bands.csv"\n'))
    basis = load_registry(folder).resolve("fernhollow-bands")
    assert basis.interest.describe() == {"kind": "forward", "edges": [10.0],
                                         "rates": [0.05, 0.035]}


@pytest.mark.parametrize("interest, data, fragments", [
    ('kind = "spot"\nterms = [5, 1]\nrates = [0.03, 0.04]\n', None, ("[interest].terms",)),
    ('kind = "segments"\nedges = [5]\nrates = [0.03]\n', None, ("[interest].rates",)),
    ('kind = "spot"\nterms = [1]\nrates = [-1.5]\n', None, ("[interest].rates.0",)),
    ('kind = "curve"\nrate = 0.04\n', None, ("[interest].kind",)),
    ('kind = "spot"\nfile = "data/bad.csv"\n', "years,rate\n1,0.03\n", ("term,rate",)),
    ('kind = "forward"\nfile = "data/bad.csv"\n', "from,rate\n1,0.03\n", ("start at 0",)),
    ('kind = "spot"\nfile = "data/bad.csv"\n', "term,rate\n1,abc\n", ("not a number",)),
    ('kind = "flat"\nfile = "data/bad.csv"\n', "term,rate\n1,0.03\n", ("or forward bands",)),
])
def test_bad_interest_is_refused(folder, caplog, interest, data, fragments):
    if data is not None:
        write(folder, "data/bad.csv", data)
    write(folder, "bad.toml", with_interest("fernhollow-bad", "[interest]\n" + interest))
    assert_refused_beside_sound(folder, caplog, "bad.toml", *fragments)
