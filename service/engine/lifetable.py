"""Life-table columns for one life followed from an age: q, p, l, d and curtate expectation."""

from dataclasses import dataclass

import numpy as np

from service.engine.survival import build_lives


@dataclass(frozen=True, eq=False)
class LifeTableColumns:
    age: np.ndarray
    q: np.ndarray
    p: np.ndarray
    l: np.ndarray  # noqa: E741 - the actuarial symbol
    d: np.ndarray
    e: np.ndarray


def life_table_columns(table, from_age: int, *, to_age: int | None = None,
                       duration: int | None = None, multiplier: float = 1.0,
                       radix: float = 100_000.0) -> LifeTableColumns:
    """Follow a life aged ``from_age`` (selected ``duration`` years ago) to the table's end.

    Rows run from ``from_age`` to ``to_age`` (default the last age). ``l`` starts at ``radix``,
    ``d = l q``, and ``e`` is the curtate expectation sum_{k>=1} kp_x of the life at each row,
    which follows the same path (select rates first, then ultimate).

    Raises ValueError when the ages or the duration lie outside the table.
    """
    lives, problems = build_lives([table], [0], [float(from_age)],
                                  [np.inf if duration is None else duration], [multiplier], "udd")
    if problems:
        raise ValueError(next(iter(problems.values()))[1])
    last = table.last_age if to_age is None else to_age
    if not from_age <= last <= table.last_age:
        raise ValueError(f"to_age must lie between {from_age} and {table.last_age}")
    q_all = lives.q[0, : table.last_age - from_age + 1]
    cum = lives.cum[0, : table.last_age - from_age + 2]  # S at each integer offset, then 0
    # e_k = sum_{j > k} S_j / S_k, from a reverse cumulative sum.
    tail = np.cumsum(cum[::-1])[::-1]
    with np.errstate(invalid="ignore", divide="ignore"):
        e_all = np.where(cum[:-1] > 0, (tail[1:]) / np.where(cum[:-1] > 0, cum[:-1], 1), 0.0)
    n = last - from_age + 1
    q = q_all[:n]
    l_col = radix * cum[:n]
    return LifeTableColumns(np.arange(from_age, last + 1), q, 1.0 - q, l_col, l_col * q, e_all[:n])
