"""Helpers shared by the tests that hold the engine's fast paths to its general path.

The general path (``value_annuities(..., fast=False)``) sums every payment date, amount x
v^t x t_p_x; its own tests check it against direct references. A fast path must refuse the
same items with the same errors and value the rest to 1e-12 relative.
"""

import numpy as np

from service.engine.annuity import value_annuities
from service.engine.errors import ItemError

RTOL = 1e-12


def errors_both_ways(tables, items, valuation) -> list:
    """[the fast path's ItemError errors, the general path's] for ``items`` (None where the
    path values them)."""
    got = []
    for fast in (True, False):
        try:
            value_annuities(tables, items, valuation, fast=fast)
            got.append(None)
        except ItemError as exc:
            got.append(exc.errors)
    return got


def valid(tables, items, valuation):
    """Drop the items the general path refuses (ages moved outside the table, lives dead at
    their adjusted age), checking first that both paths refuse the same ones."""
    while True:
        errors = errors_both_ways(tables, items, valuation)
        assert errors[0] == errors[1]
        if errors[0] is None:
            return items
        bad = {int(path.split(".")[0]) for path in errors[0]}
        items = [item for n, item in enumerate(items) if n not in bad]


def assert_same(tables, items, valuation):
    """The fast and general paths give the same values (to RTOL), method codes and methods;
    return the fast path's Values."""
    fast = value_annuities(tables, items, valuation)
    general = value_annuities(tables, items, valuation, fast=False)
    np.testing.assert_allclose(fast.value, general.value, rtol=RTOL, atol=0)
    assert fast.method_code.tolist() == general.method_code.tolist()
    assert fast.methods == general.methods
    return fast
