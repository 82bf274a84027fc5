"""The spread of an annuity's present value: moments against textbook formulas, percentiles
against a brute-force enumeration written here."""

import itertools
import math

import numpy as np
import pytest
from numpy.testing import assert_allclose

from service.engine.annuity import Item, Life, Payments, Valuation, annuity_values
from service.engine.spread import CONTINUOUS_TOLERANCE_YEARS, annuity_spread
from service.engine.tables import MortalityTable
from tests.reference import models
from tests.reference.direct import DirectLife


def test_variance_of_the_whole_life_annuity_due():
    # Var(a-due_K+1) = (2A - A^2) / d^2, 2A at double the force of interest (Bowers et al.,
    # Actuarial Mathematics, life annuities; Dickson, Hardy and Waters, AMLCR, annuities).
    # A and 2A are summed here from the table's rates.
    table = models.susm()
    for age in (30, 65, 90):
        q = table.q[age - 20:]
        alive = np.concatenate([[1.0], np.cumprod(1 - q)[:-1]])
        k = np.arange(q.size)
        a1 = np.sum(1.05 ** -(k + 1) * alive * q)
        a2 = np.sum(1.05 ** (-2 * (k + 1)) * alive * q)
        d = 0.05 / 1.05
        got = annuity_spread([table], [Item((Life(float(age)),))], Valuation(0.05), [[50]])
        assert_allclose(got.standard_deviation[0], math.sqrt((a2 - a1 * a1) / d**2),
                        rtol=1e-11)


def brute_force(table, item: Item, i: float):
    """Every (present value, probability) by looping over the death period of each life."""
    p = item.payments
    m = p.frequency
    lives = [DirectLife.of(table.q, table.first_age, life.age, "udd") for life in item.lives]
    horizon = max(life.horizon for life in lives)
    n = round(p.term * m) if p.term is not None else math.ceil((horizon - p.deferral) * m) + 1
    times = [p.deferral + (j + (p.timing == "arrears")) / m for j in range(n)]
    amounts = [(1 + p.escalation) ** (j // m) / m * (1 + i) ** -t for j, t in enumerate(times)]
    checkpoints = [p.deferral, *times]
    # A life either dies in (c_k-1, c_k] for some k, or outlives every checkpoint; a
    # representative death time inside each such period decides every payment.
    outcomes = []
    for life in lives:
        s = [1.0] + [life.survival(c) for c in checkpoints] + [0.0]
        reps = [checkpoints[0] - 1.0] + [
            (checkpoints[k - 1] + checkpoints[k]) / 2 for k in range(1, len(checkpoints))] + [
            checkpoints[-1] + 1.0]
        outcomes.append([(reps[k], s[k] - s[k + 1]) for k in range(len(s) - 1)])
    g = round(p.guarantee * m)
    a0, a1, a2 = item.survivorship if len(lives) == 2 else (1.0, 1.0, 1.0)
    dist = []
    for combo in itertools.product(*outcomes):
        deaths = [c[0] for c in combo]
        prob = math.prod(c[1] for c in combo)
        at_u = [d > p.deferral for d in deaths]
        met = {"any": any(at_u), "first": at_u[0], "both": all(at_u)}[item.start_requires]
        value = 0.0
        if met:
            for j, (t, pv) in enumerate(zip(times, amounts, strict=True)):
                alive = [d > t for d in deaths]
                if j < g:
                    value += a0 * pv
                elif len(alive) == 1:
                    value += pv * alive[0]
                else:
                    value += pv * (a0 * (alive[0] and alive[1])
                                   + a1 * (alive[0] and not alive[1])
                                   + a2 * (alive[1] and not alive[0]))
        dist.append((value, prob))
    return dist


def percentile(dist, level):
    """The smallest value whose cumulative probability is at least level/100."""
    total = 0.0
    for value, prob in sorted(dist):
        total += prob
        if total >= level / 100 - 1e-12:
            return value
    return max(v for v, _ in dist)


LEVELS = [1, 5, 25, 50, 75, 95, 99.5]
CASES = {
    "one life, half-yearly, guaranteed": Item((Life(96.5),), Payments("advance", 2, None, 0.0,
                                                                      2.0, 0.02)),
    "one life, deferred, arrears": Item((Life(92.0),), Payments("arrears", 1, 6.0, 3.0)),
    "two lives, first required": Item((Life(97.0), Life(95.0)), Payments("advance", 1,
                                                                         deferral=2.0),
                                      (1.0, 1.0, 0.5), "first"),
    "two lives, joint, guaranteed": Item((Life(99.0), Life(98.0)), Payments("arrears", 2, None,
                                                                           0.0, 1.0),
                                         (1.0, 0.0, 0.0)),
    "two lives, both required": Item((Life(98.0), Life(97.0)), Payments("advance", 1,
                                                                        deferral=1.0),
                                     (1.0, 0.6, 0.6), "both"),
}


@pytest.mark.parametrize("name", sorted(CASES))
def test_against_brute_force(name):
    table = models.susm_short()
    item = CASES[name]
    dist = brute_force(table, item, 0.04)
    got = annuity_spread([table], [item], Valuation(0.04), [LEVELS])
    mean = sum(v * p for v, p in dist)
    second = sum(v * v * p for v, p in dist)
    assert_allclose(got.mean[0], mean, rtol=1e-12)
    assert_allclose(got.standard_deviation[0], math.sqrt(second - mean * mean), rtol=1e-9)
    assert_allclose(got.percentiles[0], [percentile(dist, lv) for lv in LEVELS], rtol=1e-12)
    # The mean is the factor.
    assert_allclose(got.mean[0], annuity_values([table], [item], Valuation(0.04))[0],
                    rtol=1e-12)


def test_a_guarantee_is_an_atom_at_its_value():
    # A life aged 100, 10 years guaranteed, monthly in advance: the lowest outcomes are the
    # annuity-certain-due of 10 years, 12-thly: (1 - v^10) / d^(12) (common practice).
    item = Item((Life(100.0),), Payments("advance", 12, None, 0.0, 10.0))
    got = annuity_spread([models.susm()], [item], Valuation(0.05), [[1, 50]])
    certain = (1 - 1.05**-10) / (12 * (1 - 1.05 ** (-1 / 12)))
    assert_allclose(got.percentiles[0], [certain, certain], rtol=1e-12)


class TestContinuous:
    """Continuous payments, enumerated on blocks of 1/12 year: each outcome within half a
    block's value (CONTINUOUS_TOLERANCE_YEARS of a year's payment) of the true one."""

    MU, RATE = 0.04, 0.05

    def exponential_life(self):
        # A constant force mu to a very high age: the future lifetime is exponential.
        q = np.full(801, -math.expm1(-self.MU))
        q[-1] = 1.0
        return MortalityTable.of(0, q)

    def test_against_the_exponential_lifetime(self):
        # T exponential(mu): Y = (1 - e^(-delta T))/delta, so A-bar = mu/(mu + delta),
        # 2A-bar = mu/(mu + 2 delta), Var Y = (2A-bar - A-bar^2)/delta^2 (Bowers et al.,
        # Actuarial Mathematics, continuous annuities), and the p-quantile of Y is
        # (1 - (1 - p)^(delta/mu))/delta.
        delta = math.log1p(self.RATE)
        levels = [5, 25, 50, 75, 95]
        got = annuity_spread([self.exponential_life()], [Item((Life(30.0),),
                                                              Payments("continuous"))],
                             Valuation(self.RATE, "constant-force"), [levels])
        a1, a2 = self.MU / (self.MU + delta), self.MU / (self.MU + 2 * delta)
        tolerance = CONTINUOUS_TOLERANCE_YEARS
        assert abs(got.mean[0] - 1 / (self.MU + delta)) < tolerance
        assert abs(got.standard_deviation[0] - math.sqrt(a2 - a1 * a1) / delta) < tolerance
        expected = [(1 - (1 - p / 100) ** (delta / self.MU)) / delta for p in levels]
        assert np.all(np.abs(got.percentiles[0] - expected) <= tolerance)

    @pytest.mark.parametrize("item", [
        Item((Life(65.0),), Payments("continuous", 1, None, 0.0, 10.0, 0.02)),
        Item((Life(55.0), Life(52.0)), Payments("continuous", deferral=10.0),
             (1.0, 1.0, 0.5), "first"),
        Item((Life(70.0), Life(66.0)), Payments("continuous", 1, 20.0), (1.0, 0.0, 0.0))])
    def test_the_mean_is_the_factor_within_the_tolerance(self, item):
        got = annuity_spread([models.susm()], [item], Valuation(0.05), [[50]])
        factor = annuity_values([models.susm()], [item], Valuation(0.05))[0]
        assert abs(got.mean[0] - factor) < CONTINUOUS_TOLERANCE_YEARS
