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


def test_the_run_summary_gives_the_plans_minimum_and_maximum_per_point():
    # the charge wait is sized at each bias, so the summary's shortest point is min_dwell_s
    from benchkit.catalogue import DEMO_FIXTURE, load_fixture
    from benchkit.sweep.plan import build_sweeps, resolve_samples
    from benchkit.sweep.summary import expected_duration_s

    parts = load_parts(DEMO_PARTS)
    fixture = load_fixture(DEMO_FIXTURE, parts)
    slot = next(s for s in fixture if s.part_id == "BD-1005")
    d = _plan({"feed_R_ohm": 10e3, "min_dwell_s": 0.5})
    d["samples"] = [{"sample_id": slot.sample_id, "part_id": slot.part_id, "channel": slot.channel}]
    plan = parse_plan(d, "p")
    sw = build_sweeps(plan, resolve_samples(plan, fixture), parts)[0]
    V = [0.0] + [p.bias_V for p in sw.points] + [0.0]
    ramp = sum(abs(b - a) for a, b in zip(V[:-1], V[1:])) / 5.0  # at 5 V/s
    n = len(sw.points)
    lo, hi = expected_duration_s(plan, sw)
    assert lo == pytest.approx(ramp + n * 0.5) and hi == pytest.approx(ramp + n * 60.0)


class BiasedPart:
    """One bias step to a bias where the part has C_end (a fraction of C0 under DC bias):
    it charges with R_feed*C_end [handbook: first-order RC circuit], starting `lag_V` away
    from the set bias (positive: still below it, a rising step; negative: still above it, a
    falling step, where C reads low until the lag has gone), plus a slow relaxation."""

    def __init__(self, seed, C_end, lag_V):
        self.clock = VirtualClock()
        self.rng = np.random.default_rng(seed)
        self.C_end, self.lag_V = C_end, lag_V
        self.RC = R_FEED * C_end

    def C_settled(self):
        return self.C_end

    def probe(self):
        self.clock.sleep(READ_S)
        t = self.clock.now()
        lag = self.lag_V * math.exp(-t / self.RC)
        C = self.C_end * (1.0 - SLOPE_PER_V * lag) + C0 * A_RELAX * math.exp(-t / TAU_RELAX)
        return C * (1.0 + 1e-4 * self.rng.standard_normal())


def _wait_on(part, min_dwell_s=0.2):
    det = SettleDetector(None, 60.0, min_dwell_s=min_dwell_s, window_s=1.0,
                         max_prediction_u_pct_of_C0=0.05, feed_R_ohm=R_FEED)
    det.start_sample(C_MAX)
    return det, det.wait(part.clock, part.probe)


def test_under_bias_the_wait_is_sized_from_the_c_the_part_has_there_and_stays_unbiased():
    # at a fifth of C0 the part charges with a fifth of the time constant: its wait is
    # 8 R C (times the margin for a reading taken while it lags), not the 0 V part's
    z = []
    for seed in range(20):
        part = BiasedPart(seed, 0.2 * C0, LAG_V)
        det, res = _wait_on(part)
        assert res.fit_from_s >= CHARGE_TIME_CONSTANTS * part.RC - 1e-9  # charged [handbook]
        assert res.fit_from_s <= 0.5 * CHARGE_TIME_CONSTANTS * R_FEED * C_MAX
        assert det.point_charge_wait_s < det.charge_wait_s
        p = res.prediction
        z.append((p.C_inf_F - part.C_settled()) / p.u_C_inf_F)
    z = np.array(z)
    assert abs(np.median(z)) <= 1.0, z
    assert np.mean(np.abs(z) <= 3.0) >= 0.8, z


def test_a_falling_step_that_reads_low_at_first_waits_for_the_c_it_comes_to():
    # still 4 V above its set bias (a fast ramp on a slow fixture), the part first reads a
    # third low, more than the margin covers; the readings after the first show more C,
    # and the wait grows to 8 R C of the charged value
    for seed in range(5):
        part = BiasedPart(seed, 0.8 * C0, -4.0 * LAG_V)
        first = part.C_end * (1.0 - SLOPE_PER_V * part.lag_V * math.exp(-READ_S / part.RC))
        det, res = _wait_on(part)
        assert res.fit_from_s >= CHARGE_TIME_CONSTANTS * part.RC - 1e-9
        assert det.point_charge_wait_s > CHARGE_TIME_CONSTANTS * R_FEED * first * 1.25


def test_without_a_usable_reading_the_wait_is_the_largest_parts():
    det = SettleDetector(None, 60.0, min_dwell_s=0.2, window_s=1.0,
                         max_prediction_u_pct_of_C0=0.05, feed_R_ohm=R_FEED)
    det.start_sample(C_MAX)
    for C in (None, float("nan"), 9.9e37, 0.0, -1e-6):
        assert det.charge_wait_at(C) == det.charge_wait_s
    assert det.charge_wait_at(1e-9) == 0.2  # a tiny C: the plan's minimum


def test_the_turn_wait_is_sized_by_one_reading_at_the_turn():
    part = BiasedPart(0, 0.1 * C0, LAG_V)
    det = SettleDetector(None, 60.0, min_dwell_s=0.2, window_s=1.0,
                         max_prediction_u_pct_of_C0=0.05, feed_R_ohm=R_FEED)
    det.start_sample(C_MAX)
    res = det.turn_wait(part.clock, part.probe)
    assert CHARGE_TIME_CONSTANTS * part.RC <= float(res) < 0.25 * det.charge_wait_s
