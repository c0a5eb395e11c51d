"""The charge wait of settle detection (benchkit/sweep/settle.py charge_wait_for): a part
charged through the fixture's feed resistor is not read until the charging has died away.

Outside truths: the step response of a first-order RC network, V(t) = V1 - dV*exp(-t/RC)
[handbook: first-order RC circuit]; a relaxation C_inf + A*exp(-t/tau) of known C_inf
(synthetic, seeded noise). A reading taken while the part still lags the supply is off by
|dC/dV|*lag, and a relaxation fit takes that for a fast relaxation.
"""

import math

import numpy as np
import pytest

from benchkit.catalogue import DEMO_PARTS, load_parts
from benchkit.sweep.plan import parse_plan
from benchkit.sweep.settle import CHARGE_TIME_CONSTANTS, SettleDetector, charge_wait_for, largest_C_F
from benchkit.errors import UserError
from instruments.clock import VirtualClock

R_FEED = 10e3
C0 = 22e-6
C_MAX = 1.2 * C0  # tolerance M: +20 % [standard: IEC 60062]
SLOPE_PER_V = -0.15  # dC/dV in C0 per volt: a steep class-2 curve (demo value)
LAG_V = 1.0  # how far the part lags the supply when the ramp ends
TAU_RELAX = 5.0
A_RELAX = 0.003
READ_S = 0.1


class ChargingPart:
    """One bias step: the part's voltage follows the RC step response, its C follows the
    voltage and a slow relaxation; readings take READ_S, with relative noise 1e-4."""

    def __init__(self, seed):
        self.clock = VirtualClock()
        self.rng = np.random.default_rng(seed)
        self.RC = R_FEED * C0
        self.used = []

    def C_settled(self):
        return C0 * (1.0 + SLOPE_PER_V * 1.0)

    def probe(self):
        self.clock.sleep(READ_S)
        t = self.clock.now()
        lag = LAG_V * math.exp(-t / self.RC)
        C = C0 * (1.0 + SLOPE_PER_V * (1.0 - lag)) + C0 * A_RELAX * math.exp(-t / TAU_RELAX)
        self.used.append(t)
        return C * (1.0 + 1e-4 * self.rng.standard_normal())


def test_the_wait_is_the_larger_of_the_plans_minimum_and_the_charge_time_constants():
    # 8 time constants of R*C [derived: exp(-8) = 3.4e-4 of the lag is left]
    assert charge_wait_for(1.0, R_FEED, C_MAX) == pytest.approx(CHARGE_TIME_CONSTANTS * R_FEED * C_MAX)
    assert charge_wait_for(1.0, R_FEED, 1e-6) == 1.0  # a small part: the plan's minimum
    assert charge_wait_for(1.0, None, C_MAX) == 1.0  # no feed resistor given: the minimum
    assert charge_wait_for(1.0, R_FEED, C_MAX, max_dwell_s=1.5) == 1.5


def test_the_largest_C_is_the_top_of_the_parts_tolerance():
    part = load_parts(DEMO_PARTS)["BD-1005"]  # 22 uF, tolerance M
    assert largest_C_F(part) == pytest.approx(1.2 * 22e-6)  # [standard: IEC 60062, M = 20 %]
    assert largest_C_F(object()) is None


def _predict(seed, feed_R_ohm):
    part = ChargingPart(seed)
    det = SettleDetector(None, 60.0, min_dwell_s=1.0, window_s=1.0,
                         max_prediction_u_pct_of_C0=0.05, feed_R_ohm=feed_R_ohm)
    det.start_sample(C_MAX)
    res = det.wait(part.clock, part.probe)
    return part, res


def _z(feed_R_ohm, check=None):
    """(C_inf predicted - C_inf true)/u over 20 seeds."""
    z = []
    for seed in range(20):
        part, res = _predict(seed, feed_R_ohm)
        if check:
            check(res)
        p = res.prediction
        z.append((p.C_inf_F - part.C_settled()) / p.u_C_inf_F)
    return np.array(z)


def test_a_large_part_is_read_only_once_it_has_charged_and_its_settled_value_is_found():
    def first_reading_after_the_charge(res):
        assert res.fit_from_s >= CHARGE_TIME_CONSTANTS * R_FEED * C_MAX - 1e-9

    z = _z(R_FEED, first_reading_after_the_charge)
    # unbiased: the median error is well inside one standard uncertainty (the rule stops at
    # the first reading whose fit looks good enough, so a few seeds stop early and miss)
    assert abs(np.median(z)) <= 1.0, z
    assert np.mean(np.abs(z) <= 3.0) >= 0.8, z


def test_without_the_feed_resistor_the_charging_tail_passes_for_a_relaxation():
    # the same part read from 1 s on (3.8 R*C: 2 % of the lag left, 0.3 % of C0): the
    # prediction is then biased by several of its own standard uncertainties
    z = _z(None)
    assert np.median(z) >= 3.0, z


def test_the_detector_refuses_a_feed_resistor_or_time_constants_that_are_not_positive():
    for bad in ({"feed_R_ohm": -1.0}, {"feed_R_ohm": 0.0}, {"charge_time_constants": 0.0},
                {"feed_R_ohm": float("nan")}):
        with pytest.raises(ValueError, match=next(iter(bad))):
            SettleDetector(None, 60.0, max_prediction_u_pct_of_C0=0.1, **bad)


def _plan(settle_extra):
    settle = {"max_prediction_u_pct_of_C0": 0.15, "max_dwell_s": 60.0, **settle_extra}
    return {"name": "charge", "bias": {"points_V": [0.0, 1.0]},
            "measure": {"dwell": "settle"}, "settle": settle,
            "limits": {"current_limit_A": 0.01, "max_ramp_V_per_s": 5.0, "discharge_wait_s": 0.0}}


def test_the_plan_takes_the_feed_resistor_and_refuses_a_bad_one():
    plan = parse_plan(_plan({"feed_R_ohm": 10e3, "charge_time_constants": 6}), "p")
    assert plan.settle["feed_R_ohm"] == 10e3 and plan.settle["charge_time_constants"] == 6
    assert "feed_R_ohm" not in parse_plan(_plan({}), "p").settle  # old plans keep their digest
    with pytest.raises(UserError, match="feed_R_ohm"):
        parse_plan(_plan({"feed_R_ohm": -1.0}), "p")


def test_the_run_summary_and_the_detector_wait_alike():
    # the plan's expected duration (benchkit/sweep/summary.py) uses the wait the detector uses
    from benchkit.sweep.settle import plan_charge_wait_s

    part = load_parts(DEMO_PARTS)["BD-1005"]
    for extra in ({"feed_R_ohm": 10e3}, {"feed_R_ohm": 10e3, "charge_time_constants": 4}, {}):
        settle = parse_plan(_plan(extra), "p").settle
        det = SettleDetector.from_plan(settle)
        det.start_sample(largest_C_F(part))
        assert plan_charge_wait_s(settle, part) == det.charge_wait_s
