"""Mortality models used as test inputs, defined by their published law parameters."""

from functools import cache

from service.engine import tables

#: Standard Ultimate Survival Model: Makeham's law, ages 20 and up.
SUSM = {"A": 0.00022, "B": 2.7e-6, "c": 1.124}
SUSM_FIRST_AGE = 20
#: Standard Select Survival Model: q[x]+s = 0.9^(2-s) q(x+s) for s = 0, 1.
SELECT_FACTORS = (0.9**2, 0.9)
#: Illustrative Life Table: Makeham's law, ages 13 and up.
ILT = {"A": 0.0007, "B": 0.00005, "c": 10**0.04}
ILT_FIRST_AGE = 13


@cache
def susm():
    return tables.table_from_law("makeham", SUSM, SUSM_FIRST_AGE)


@cache
def susm_select():
    return tables.table_from_law("makeham", SUSM, SUSM_FIRST_AGE, select_factors=SELECT_FACTORS)


@cache
def susm_short():
    """The SUSM law closed at age 105, so that many lives reach the closing year."""
    return tables.table_from_law("makeham", SUSM, SUSM_FIRST_AGE, last_age=105)


@cache
def ilt():
    return tables.table_from_law("makeham", ILT, ILT_FIRST_AGE)
