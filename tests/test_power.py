"""power: seeds advice against statsmodels' TTestPower and, for TOST, statsmodels'
ttost_paired by simulation and the normal-approximation formula."""

import math

import numpy as np
import pytest
from statsmodels.stats.power import TTestPower
from statsmodels.stats.weightstats import ttost_paired

from runner.evidence.distributions import norm_isf
from runner.evidence.power import paired_t_power, seeds_for_equivalence, seeds_to_detect, tost_power
from runner.evidence.protocols import Resampling


def test_seeds_to_detect_reference_values():
    """REFERENCE_CHECKS.md / statsmodels TTestPower (two-sided, alpha 0.05, power 0.8):
    effect 0.5 -> 33.37 pairs, 1.0 -> 9.94."""
    assert seeds_to_detect(0.5, 1.0).n == pytest.approx(33.37, abs=0.01)
    assert seeds_to_detect(0.01, 0.01).n == pytest.approx(9.94, abs=0.01)
    for effect in (0.3, 0.8, 1.5):
        ref = TTestPower().solve_power(effect_size=effect, alpha=0.05, power=0.8)
        assert seeds_to_detect(effect, 1.0).n == pytest.approx(ref, rel=1e-4)
    assert seeds_to_detect(0.5, 1.0).seeds == 34


@pytest.mark.parametrize("n", [2, 3, 5, 10, 20])
@pytest.mark.parametrize("effect", [0.2, 0.7, 1.2])
def test_power_matches_statsmodels(n, effect):
    assert paired_t_power(effect, 1.0, n) == pytest.approx(TTestPower().power(effect, n, 0.05), abs=1e-8)


def test_resampling_can_make_detection_unreachable():
    """With v = 1/n + 1/3 the noncentrality is capped at effect * sqrt(3): effect 0.5 cannot
    reach power 0.8 with any number of seeds; the answer says so."""
    advice = seeds_to_detect(0.5, 1.0, protocol=Resampling.resample(200, 600))
    assert not advice.reachable and advice.seeds is None and math.isinf(advice.n)


def test_zero_spread_advice_uses_the_sign_flip_floor():
    assert seeds_to_detect(0.01, 0.0).seeds == 6


def test_tost_power_matches_simulated_statsmodels_ttost():
    """Schuirmann 1987 TOST power at n = 20, margin 0.5 sd, true difference 0.1 sd: equal to
    the rejection rate of statsmodels' ttost_paired over 4000 simulated data sets (within
    4 binomial standard errors)."""
    rng = np.random.default_rng(0)
    n, sims = 20, 4000
    hits = sum(ttost_paired(rng.normal(0.1, 1.0, n), np.zeros(n), -0.5, 0.5)[0] < 0.05 for _ in range(sims))
    power = tost_power(0.1, 1.0, 0.5, n)
    assert abs(hits / sims - power) < 4 * math.sqrt(power * (1 - power) / sims)


def test_equivalence_seeds_approach_the_normal_formula():
    """For large n with true difference 0: n ~ (z_{1-alpha} + z_{1-beta/2})^2 sigma^2 / delta^2
    (Chow, Shao & Wang 2008, from memory); with delta = 0.1 sigma the t version is within 1%."""
    approx = (norm_isf(0.05) + norm_isf(0.1)) ** 2 / 0.1**2
    assert seeds_for_equivalence(0.1, 1.0).n == pytest.approx(approx, rel=0.01)


def test_equivalence_outside_margin_is_unreachable():
    assert not seeds_for_equivalence(0.1, 1.0, diff=0.2).reachable
