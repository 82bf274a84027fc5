"""Life-table columns for one life followed from an age: q, p, l, d, the curtate and complete
expectations of life, and at a flat rate the commutation columns D, N, C, M, S, R."""

import math
from dataclasses import dataclass

import numpy as np

from service.engine import integrals
from service.engine.errors import FieldError
from service.engine.survival import ASSUMPTIONS, build_lives

_YEAR_INTEGRAL = {"udd": integrals.udd, "constant-force": integrals.constant_force,
                  "balducci": integrals.balducci}


@dataclass(frozen=True, eq=False)
class LifeTableColumns:
    age: np.ndarray
    q: np.ndarray
    p: np.ndarray
    l: np.ndarray  # noqa: E741 - the actuarial symbol
    d: np.ndarray
    e: np.ndarray
    e_complete: np.ndarray  # complete expectation of life under the fractional-age assumption
    radix: float
    radix_age: int  # where l equals the radix
    commutation: dict[str, np.ndarray] | None = None  # D, N, C, M, S, R, a_due at a rate


def life_table_columns(table, from_age: int, *, to_age: int | None = None,
                       duration: int | None = None, multiplier: float = 1.0,
                       radix: float = 100_000.0, assumption: str = "udd",
                       rate: float | None = None) -> LifeTableColumns:
    """Return rows ``from_age`` to ``to_age`` (default the last age) of a life's table path.

    Without ``duration`` the path is the ultimate table from its first age, where ``l`` is
    ``radix`` (as published tables print it), so ``from_age`` and ``to_age`` only choose rows.
    With ``duration`` it is a life selected at ``from_age - duration`` (select rates first,
    then ultimate), and ``l`` is ``radix`` at the age of selection. ``d = l q``, and ``e`` is
    the curtate expectation sum_{k>=1} kp of a life at each row on the same path, and
    ``e_complete`` the complete expectation, the integral of tp, with survival within each year
    of age under ``assumption`` (under UDD it is e + 1/2).

    With ``rate`` (a flat effective annual rate) the commutation columns are added, with
    v = 1/(1 + rate) and x the age (Bowers et al., Actuarial Mathematics, commutation
    functions): D = v^x l, N = sum of D from x on, C = v^(x+1) d, M = sum of C from x on,
    S = sum of N from x on, R = sum of M from x on, and the whole-life annuity-due N / D.

    Raises FieldError naming ``from_age``, ``to_age`` or ``duration`` when the ages or the
    selection lie outside the table.
    """
    if assumption not in ASSUMPTIONS:
        raise ValueError(f"unknown fractional-age assumption {assumption!r}")
    last = table.last_age if to_age is None else to_age
    if not table.first_age <= from_age <= table.last_age:
        raise FieldError("from_age", f"from_age must lie between {table.first_age} and "
                                     f"{table.last_age}")
    if not from_age <= last <= table.last_age:
        raise FieldError("to_age", f"to_age must lie between {from_age} and {table.last_age}")
    start = table.first_age if duration is None else from_age - duration
    lives, problems = build_lives([table], [0], [float(start)],
                                  [np.inf if duration is None else 0], [multiplier], "udd")
    if problems:
        raise FieldError("duration", next(iter(problems.values()))[1])
    q_all = lives.q[0, : table.last_age - start + 1]
    cum = lives.cum[0, : table.last_age - start + 2]  # S at each integer offset, then 0
    # e_k = sum_{j > k} S_j / S_k, from a reverse cumulative sum.
    tail = np.cumsum(cum[::-1])[::-1]
    with np.errstate(invalid="ignore", divide="ignore"):
        e_all = np.where(cum[:-1] > 0, (tail[1:]) / np.where(cum[:-1] > 0, cum[:-1], 1), 0.0)
    # Survival within each year, integrated: the person-years lived in the year per life
    # alive at its start.
    within = _YEAR_INTEGRAL[assumption](q_all, 0.0, 0.0, 1.0)
    lived = np.cumsum((cum[:-1] * within)[::-1])[::-1]
    with np.errstate(invalid="ignore", divide="ignore"):
        e_complete = np.where(cum[:-1] > 0, lived / np.where(cum[:-1] > 0, cum[:-1], 1), 0.0)
    rows = slice(from_age - start, last - start + 1)
    q = q_all[rows]
    l_all = radix * cum[:-1]
    commutation = None
    if rate is not None:
        ages = np.arange(start, table.last_age + 1, dtype=float)
        log_v = -math.log1p(rate)
        d_col = np.exp(log_v * ages) * l_all
        c_col = np.exp(log_v * (ages + 1)) * l_all * q_all

        def tail(x):
            return np.cumsum(x[::-1])[::-1]

        n_col, m_col = tail(d_col), tail(c_col)
        with np.errstate(invalid="ignore", divide="ignore"):
            a_due = np.where(d_col > 0, n_col / np.where(d_col > 0, d_col, 1), 0.0)
        commutation = {"D": d_col[rows], "N": n_col[rows], "C": c_col[rows], "M": m_col[rows],
                       "S": tail(n_col)[rows], "R": tail(m_col)[rows], "a_due": a_due[rows]}
    l_col = l_all[rows]
    return LifeTableColumns(np.arange(from_age, last + 1), q, 1.0 - q, l_col, l_col * q,
                            e_all[rows], e_complete[rows], radix, start, commutation)
