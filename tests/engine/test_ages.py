"""Ages from dates: completed years plus an actual/actual fraction between anniversaries.

Every expected value below is hand-worked from the rule in service/engine/ages.py; the day
counts are written out, and each is also checked against date subtraction."""

import datetime as dt

import pytest

from service.engine.ages import AGE_DEFINITIONS, age_at

D = dt.date


def ages(born, valued):
    return tuple(age_at(born, valued, d) for d in ("exact", "last-birthday", "nearest-birthday"))


class TestAroundBirthdays:
    BORN = D(1980, 6, 15)

    def test_day_before_a_birthday(self):
        # Hand-worked: last anniversary 15 Jun 2019, next 15 Jun 2020; the year between holds
        # 29 Feb 2020, so it has 366 days; 14 Jun 2020 is day 365 of it.
        # exact 39 + 365/366; last birthday 39; nearest 40 (365/366 >= 1/2).
        assert (D(2020, 6, 15) - D(2019, 6, 15)).days == 366
        assert ages(self.BORN, D(2020, 6, 14)) == (39 + 365 / 366, 39.0, 40.0)

    def test_on_a_birthday(self):
        # Hand-worked: 15 Jun 2020 is the 40th anniversary; every definition gives 40 exactly.
        assert ages(self.BORN, D(2020, 6, 15)) == (40.0, 40.0, 40.0)

    def test_day_after_a_birthday(self):
        # Hand-worked: 15 Jun 2020 to 15 Jun 2021 is 365 days (no 29 Feb); day 1 of it.
        assert (D(2021, 6, 15) - D(2020, 6, 15)).days == 365
        assert ages(self.BORN, D(2020, 6, 16)) == (40 + 1 / 365, 40.0, 40.0)

    def test_year_end_in_a_leap_year(self):
        # Hand-worked: born 31 Dec 1999; 31 Dec 1999 to 31 Dec 2000 holds 29 Feb 2000: 366
        # days; 1 Jan 2000 is day 1 of it.
        assert ages(D(1999, 12, 31), D(2000, 1, 1)) == (1 / 366, 0.0, 0.0)


class TestHalfBirthdays:
    BORN = D(1980, 6, 15)

    # Hand-worked day counts from 15 Jun: to 15 Jul 30, to 15 Aug 61, to 15 Sep 92,
    # to 15 Oct 122, to 15 Nov 153, to 15 Dec 183 days.

    def test_a_366_day_year_changes_on_day_183(self):
        # 15 Jun 2019 to 15 Jun 2020: 366 days, half is exactly day 183 = 15 Dec 2019.
        # 14 Dec: 182/366 < 1/2 -> 39; 15 Dec: 183/366 = 1/2 exactly -> rounds up to 40;
        # 16 Dec: 184/366 -> 40.
        assert (D(2019, 12, 15) - D(2019, 6, 15)).days == 183
        assert ages(self.BORN, D(2019, 12, 14)) == (39 + 182 / 366, 39.0, 39.0)
        assert ages(self.BORN, D(2019, 12, 15)) == (39.5, 39.0, 40.0)
        assert ages(self.BORN, D(2019, 12, 16)) == (39 + 184 / 366, 39.0, 40.0)

    def test_a_365_day_year_changes_on_day_183(self):
        # 15 Jun 2021 to 15 Jun 2022: 365 days, half is 182.5 days.
        # 14 Dec 2021: 182/365 < 1/2 -> 41; 15 Dec 2021: 183/365 > 1/2 -> 42.
        assert (D(2022, 6, 15) - D(2021, 6, 15)).days == 365
        assert ages(self.BORN, D(2021, 12, 14)) == (41 + 182 / 365, 41.0, 41.0)
        assert ages(self.BORN, D(2021, 12, 15)) == (41 + 183 / 365, 41.0, 42.0)


class TestBornOn29February:
    BORN = D(2000, 2, 29)

    def test_anniversary_is_28_february_in_a_year_that_is_not_leap(self):
        # Hand-worked: 29 Feb 2000 to 28 Feb 2001 is 365 days; 27 Feb 2001 is day 364.
        assert (D(2001, 2, 28) - self.BORN).days == 365
        assert ages(self.BORN, D(2001, 2, 27)) == (364 / 365, 0.0, 1.0)
        assert ages(self.BORN, D(2001, 2, 28)) == (1.0, 1.0, 1.0)
        # 28 Feb 2001 to 28 Feb 2002 is 365 days; 1 Mar 2001 is day 1.
        assert ages(self.BORN, D(2001, 3, 1)) == (1 + 1 / 365, 1.0, 1.0)

    def test_leap_valuation_year(self):
        # Hand-worked: in 2004 the anniversary is 29 Feb itself. 28 Feb 2003 to 29 Feb 2004 is
        # 366 days; 28 Feb 2004 is day 365 of it: exact 3 + 365/366.
        assert (D(2004, 2, 29) - D(2003, 2, 28)).days == 366
        assert ages(self.BORN, D(2004, 2, 28)) == (3 + 365 / 366, 3.0, 4.0)
        assert ages(self.BORN, D(2004, 2, 29)) == (4.0, 4.0, 4.0)
        # 29 Feb 2004 to 28 Feb 2005 is 365 days; 1 Mar 2004 is day 1.
        assert (D(2005, 2, 28) - D(2004, 2, 29)).days == 365
        assert ages(self.BORN, D(2004, 3, 1)) == (4 + 1 / 365, 4.0, 4.0)


class TestEdges:
    @pytest.mark.parametrize("born", (D(1960, 3, 1), D(2000, 2, 29)))
    def test_valuation_on_the_birth_date_is_age_zero(self, born):
        for definition in AGE_DEFINITIONS:
            age = age_at(born, born, definition)
            assert age == 0.0 and type(age) is float

    def test_every_definition_returns_a_float(self):
        for definition in AGE_DEFINITIONS:
            assert type(age_at(D(1970, 1, 1), D(2020, 1, 1), definition)) is float

    def test_valuation_before_birth_is_refused(self):
        with pytest.raises(ValueError, match="before the date of birth"):
            age_at(D(1980, 6, 15), D(1980, 6, 14), "exact")

    def test_unknown_definition_is_refused(self):
        with pytest.raises(ValueError, match="unknown age definition"):
            age_at(D(1980, 6, 15), D(2020, 6, 14), "next-birthday")

    def test_datetimes_are_refused(self):
        with pytest.raises(TypeError, match="datetime.date"):
            age_at(dt.datetime(1980, 6, 15), D(2020, 6, 14), "exact")
