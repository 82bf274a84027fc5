"""Impossible items are refused with ItemError naming the offending field."""

import math

import pytest

from service.engine.annuity import (
    Item,
    Life,
    Payments,
    Valuation,
    annuity_values,
    cash_flow_schedule,
)
from service.engine.errors import EngineError, ItemError
from tests.reference import models

GOOD = Item((Life(65.0),))


def refuse(item, *, position=0, table=None):
    """Value ``item`` at ``position`` in a batch of otherwise good items; return the error."""
    items = [GOOD] * position + [item] + [GOOD]
    with pytest.raises(ItemError) as caught:
        annuity_values([table or models.susm()], items, Valuation(0.05))
    return caught.value


class TestItemErrors:
    @pytest.mark.parametrize(("item", "path"), (
        (Item((Life(131.0),)), "lives.0.age"),
        (Item((Life(130.5),)), "lives.0.age"),
        (Item((Life(19.0),)), "lives.0.age"),
        (Item((Life(128.0, age_adjustment=3.0),)), "lives.0.age"),
        (Item((Life(60.0), Life(140.0))), "lives.1.age"),
        (Item((Life(65.0),), Payments(term=5.0, guarantee=10.0)), "guarantee"),
        (Item((Life(65.0),), Payments(frequency=12, term=10.05)), "term"),
        (Item((Life(65.0),), Payments(frequency=4, term=10.0, deferral=0.1)), "deferral"),
        (Item((Life(65.0),), Payments(frequency=2, guarantee=0.25)), "guarantee"),
        (Item((Life(65.0),), Payments(frequency=1, term=2.5)), "term"),
        (Item((Life(65.0, mortality_multiplier=-0.5),)), "lives.0.mortality_multiplier"),
        (Item((Life(65.0, mortality_multiplier=math.inf),)), "lives.0.mortality_multiplier"),
        (Item((Life(65.0),), Payments(frequency=0)), "frequency"),
        (Item((Life(65.0),), Payments(timing="yearly")), "timing"),
        (Item((Life(65.0),), Payments(escalation=-1.0)), "escalation"),
        (Item((Life(65.0, duration=-1),)), "lives.0.duration"),
        (Item(()), "lives"),
    ))
    @pytest.mark.parametrize("position", (0, 3))
    def test_path_names_the_field(self, item, path, position):
        error = refuse(item, position=position)
        assert list(error.errors) == [f"{position}.{path}"]
        assert all(isinstance(m, str) and m for m in error.errors[f"{position}.{path}"])

    @pytest.mark.parametrize("term", (-1.0, 0.0))
    def test_a_bad_term_blames_only_the_term(self, term):
        # No guarantee was asked for, so the guarantee is not at fault.
        error = refuse(Item((Life(65.0),), Payments(term=term)))
        assert list(error.errors) == ["0.term"]

    def test_several_problems_are_all_reported(self):
        item = Item((Life(140.0, mortality_multiplier=-1.0),),
                    Payments(frequency=12, term=1.01, guarantee=2.0))
        error = refuse(item)
        assert {"0.term", "0.guarantee", "0.lives.0.mortality_multiplier"} <= set(error.errors)

    def test_guarantee_equal_to_term_is_allowed(self):
        got = annuity_values([models.susm()], [Item((Life(65.0),), Payments(term=5.0,
                                                                             guarantee=5.0))],
                             Valuation(0.05))
        assert got.shape == (1,)

    def test_schedule_refuses_too(self):
        with pytest.raises(ItemError) as caught:
            cash_flow_schedule([models.susm()], Item((Life(131.0),)), Valuation(0.05))
        assert list(caught.value.errors) == ["0.lives.0.age"]

    def test_select_duration_before_the_select_table(self):
        error = refuse(Item((Life(20.0, duration=1),)), table=models.susm_select())
        assert list(error.errors) == ["0.lives.0.duration"]

    def test_item_error_is_an_engine_error(self):
        assert issubclass(ItemError, EngineError)


class TestValuationErrors:
    @pytest.mark.parametrize("options", (
        {"interest": -1.0},
        {"interest": math.nan},
        {"interest": 0.05, "fractional_age": "linear"},
        {"interest": 0.05, "approximation": "woolhouse-4"},
    ))
    def test_bad_settings(self, options):
        with pytest.raises(ValueError):
            Valuation(**options)
