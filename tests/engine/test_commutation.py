"""Table-wide columns (service.engine.commutation) against textbook commutation functions and
the general path.

Under UDD and a flat rate the column path values single-life items from columns shared by
every life with the same table, multiplier, flat extra and escalation; items whose column
cannot stand in for their own chain are valued on chains. Both must agree with the general
path (every payment date summed) to 1e-12 relative.
"""

import numpy as np
import pytest

from service.engine import commutation
from service.engine.annuity import Item, Life, Payments, Valuation, value_annuities
from service.engine.columns import Columns, value_columns
from tests.reference import models


def test_whole_life_annuity_due_is_n_over_d():
    # Textbook commutation functions (e.g. Neill, Life Contingencies, ch. 3, the chapter
    # recalled from memory; common practice): D_x = v^x l_x, N_x = sum_(y >= x) D_y and
    # a-due_x = N_x / D_x, computed here in plain Python from the table's rates.
    table = models.susm()
    q = table.q.tolist()
    v = 1 / 1.04
    ages = list(range(table.first_age, table.last_age + 1))
    lx = [1.0]
    for rate in q:
        lx.append(lx[-1] * (1 - rate))
    d = [v**y * lx[y - table.first_age] for y in ages]
    n = [sum(d[k:]) for k in range(len(d))]
    chosen = [25, 40, 60, 65, 80, 95, 110]
    cols = Columns.from_dict({"age": np.array(chosen, dtype=float)})
    got = value_columns([table], cols, Valuation(0.04)).value
    expected = [n[a - table.first_age] / d[a - table.first_age] for a in chosen]
    np.testing.assert_allclose(got, expected, rtol=1e-12)


def test_temporary_and_deferred_from_the_same_columns():
    # a-due_(x:n) = (N_x - N_(x+n)) / D_x and n|a-due_x = N_(x+n) / D_x (same source).
    table = models.susm()
    v = 1 / 1.05
    lx = np.concatenate([[1.0], np.cumprod(1 - table.q)])
    ages = np.arange(table.first_age, table.last_age + 1)
    d = v**ages * lx[:-1]
    n = np.cumsum(d[::-1])[::-1]

    def at(y):
        return y - table.first_age

    x = np.array([30, 50, 70] * 3, dtype=float)
    span = np.array([5, 10, 20] * 3, dtype=float)
    cols = Columns.from_dict({"age": x, "term": span})
    temporary = value_columns([table], cols, Valuation(0.05)).value
    deferred = value_columns([table], Columns.from_dict({"age": x, "deferral": span}),
                             Valuation(0.05)).value
    xi, si = x.astype(int), span.astype(int)
    np.testing.assert_allclose(temporary, (n[at(xi)] - n[at(xi + si)]) / d[at(xi)],
                               rtol=1e-12)
    np.testing.assert_allclose(deferred, n[at(xi + si)] / d[at(xi)], rtol=1e-12)


def test_lives_beyond_their_columns_go_to_chains_and_agree(monkeypatch):
    # A multiplier of 25 makes q' = 1 before age 103 on this table: a life at 103.4 is still
    # valid (q = 1 only kills it within its year) but its column L died before its age; a
    # flat extra of 1 kills every column after its first age. Those are valued on chains.
    tables = [models.susm_short()]
    rng = np.random.default_rng(77)
    items = [Item((Life(float(a), mortality_multiplier=float(mu), flat_extra=float(fe)),),
                  Payments(str(tm), int(m), None, 0.0, float(g), float(r)))
             for a, mu, fe, tm, m, g, r in zip(
                 rng.uniform(20, 104, 40), rng.choice([1.0, 25.0], 40),
                 rng.choice([0.0, 0.0, 1.0], 40), rng.choice(["advance", "arrears"], 40),
                 rng.choice([1, 4, 12], 40), rng.choice([0.0, 5.0], 40),
                 rng.choice([0.0, 0.03], 40), strict=True)]
    items += [Item((Life(103.4, mortality_multiplier=25.0),), Payments("advance", 12))] * 3
    valuation = Valuation(0.04)
    seen = []
    real = commutation.value

    def spy(*args, **kwargs):
        values, done = real(*args, **kwargs)
        seen.append(done.copy())
        return values, done

    monkeypatch.setattr(commutation, "value", spy)
    fast = value_annuities(tables, items, valuation).value
    general = value_annuities(tables, items, valuation, fast=False).value
    np.testing.assert_allclose(fast, general, rtol=1e-12, atol=0)
    done = np.concatenate(seen)
    assert done.any() and not done.all()


@pytest.mark.parametrize("rate", [0.04, 0.0, -0.02])
def test_select_lives_with_escalation_agree(rate):
    # Select and ultimate lives, escalating, every frequency, against the general path.
    table = models.susm_select()
    rng = np.random.default_rng(31)
    n = 300
    items = []
    for a, d, m, g, r, u in zip(rng.uniform(25, 100, n), rng.integers(-1, 4, n),
                                rng.choice([1, 2, 12, 52], n), rng.choice([0, 0, 10], n),
                                rng.choice([0.0, 0.025], n), rng.choice([0, 0, 7], n),
                                strict=True):
        life = Life(float(a), duration=None if d < 0 else int(d))
        items.append(Item((life,), Payments("advance", int(m), None, float(u), float(g),
                                            float(r))))
    valuation = Valuation(rate)
    fast = value_annuities([table], items, valuation).value
    general = value_annuities([table], items, valuation, fast=False).value
    np.testing.assert_allclose(fast, general, rtol=1e-12, atol=0)


def test_key_columns_are_kept_by_tables_and_keys_and_read_only(monkeypatch):
    # commutation._shared keeps each set of keys' columns: the same tables and keys give the
    # same (read-only) object, equal to a fresh build; other tables or keys their own.
    monkeypatch.setattr(commutation, "_SHARED", {})
    tables = [models.susm(), models.susm_select()]
    t = np.array([0, 1], dtype=np.int64)
    mult, extra = np.array([1.0, 1.5]), np.array([0.0, 0.002])
    lw = np.array([-0.04, -0.02])
    first = commutation._shared(tables, t, mult, extra, lw)
    assert commutation._shared(tables, t.copy(), mult.copy(), extra.copy(), lw.copy()) is first
    fresh = commutation._Shared.build(tables, t, mult, extra, lw)
    for name in ("q", "life", "pd", "sd", "pe", "se", "ok"):
        assert np.array_equal(getattr(first, name), getattr(fresh, name))
        assert not getattr(first, name).flags.writeable
    assert commutation._shared(tables[::-1], t, mult, extra, lw) is not first
    assert commutation._shared(tables, t, mult, extra, lw + 0.01) is not first
    # And a batch valued twice gives the same values, the second time from the kept columns.
    items = [Item((Life(60.0 + k, table=k % 2, mortality_multiplier=1.0 + k / 10),),
                  Payments("advance", 12, 20.0)) for k in range(12)]  # (past small batches)
    valuation = Valuation(0.04)
    once = value_columns(tables, Columns.from_items(items), valuation).value
    kept = len(commutation._SHARED)
    assert kept == 4  # the three above, and the batch's
    again = value_columns(tables, Columns.from_items(items), valuation).value
    assert len(commutation._SHARED) == kept and np.array_equal(once, again)
