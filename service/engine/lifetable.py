"""Life-table columns for one life followed from an age: q, p, l, d and curtate expectation."""

from dataclasses import dataclass

import numpy as np

from service.engine.errors import FieldError
from service.engine.survival import build_lives


@dataclass(frozen=True, eq=False)
class LifeTableColumns:
    age: np.ndarray
    q: np.ndarray
    p: np.ndarray
    l: np.ndarray  # noqa: E741 - the actuarial symbol
    d: np.ndarray
    e: np.ndarray
    radix: float
    radix_age: int  # where l equals the radix


def life_table_columns(table, from_age: int, *, to_age: int | None = None,
                       duration: int | None = None, multiplier: float = 1.0,
                       radix: float = 100_000.0) -> LifeTableColumns:
    """Return rows ``from_age`` to ``to_age`` (default the last age) of a life's table path.

    Without ``duration`` the path is the ultimate table from its first age, where ``l`` is
    ``radix`` (as published tables print it), so ``from_age`` and ``to_age`` only choose rows.
    With ``duration`` it is a life selected at ``from_age - duration`` (select rates first,
    then ultimate), and ``l`` is ``radix`` at the age of selection. ``d = l q``, and ``e`` is
    the curtate expectation sum_{k>=1} kp of a life at each row on the same path.

    Raises FieldError naming ``from_age``, ``to_age`` or ``duration`` when the ages or the
    selection lie outside the table.
    """
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
    rows = slice(from_age - start, last - start + 1)
    q = q_all[rows]
    l_col = radix * cum[rows]
    return LifeTableColumns(np.arange(from_age, last + 1), q, 1.0 - q, l_col, l_col * q,
                            e_all[rows], radix, start)
