"""Fault specs (contract section 6): parsing, defaults, clear errors, and when a fault fires.

Source: the project's interface contract, section 6 (common practice for fault injection:
one fault, one trigger count, one documented lifetime).
"""

from __future__ import annotations

import pytest
from hypothesis import given, strategies as st

from instruments.sim.faults import KINDS, Fault, FaultPlan, FaultSpecError


@pytest.mark.parametrize("kind,role", [
    ("timeout", "meter"), ("drop", "meter"), ("garble", "meter"), ("late", "meter"),
    ("overload", "meter"), ("error", "meter"), ("current-limit", "supply"),
    ("temp-drift", "thermometer"), ("refuse", "chamber"), ("unstable", "chamber"),
])
def test_default_role_per_kind(kind, role):
    # contract section 6: default role per kind
    fault = Fault.parse(kind)
    assert (fault.kind, fault.role, fault.after) == (kind, role, 0)


def test_options():
    f = Fault.parse("late:after=10:delay=1.5")
    assert (f.kind, f.after, f.delay_s, f.role) == ("late", 10, 1.5, "meter")
    assert Fault.parse("temp-drift:rate=0.5").rate_C_per_min == 0.5
    assert Fault.parse("current-limit:limit=2e-6:after=3").limit_A == 2e-6
    assert Fault.parse("overload:count=3").count == 3
    assert Fault.parse("error:code=-113:role=supply").code == -113
    assert Fault.parse(" DROP:After=40 ").after == 40
    assert Fault.parse("drop:role=Scanner").role == "scanner"
    assert Fault.parse("refuse:count=2").count == 2
    assert Fault.parse("unstable:amp=1.5").amplitude_C == 1.5
    assert Fault.parse("timeout:role=chamber").role == "chamber"
    assert Fault.parse("unstable:amp=1.5").spec() == "unstable:after=0:role=chamber:amp=1.5"


def test_defaults_documented():
    # faults.py docstring: late 10 s (twice a typical 5 s timeout), temp-drift 0.5 degC/min,
    # current-limit 1e-7 A, overload 1 reading, error -222
    assert Fault("late").delay_s == 10.0
    assert Fault("temp-drift").rate_C_per_min == 0.5
    assert Fault("current-limit").limit_A == 1e-7
    assert Fault("overload").count == 1
    assert Fault("error").code == -222


@pytest.mark.parametrize("spec,words", [
    ("", "empty fault spec"),
    ("explode", "kind 'explode' is unknown"),
    ("drop:after", "must read NAME=VALUE"),
    ("drop:after=", "must read NAME=VALUE"),
    ("drop:after=x", "must be an integer"),
    ("drop:after=-1", "must be 0 or more"),
    ("drop:when=3", "option 'when' is unknown"),
    ("drop:delay=2", "applies only to late"),
    ("late:delay=0", "must be positive"),
    ("late:delay=soon", "must be a number"),
    ("drop:role=oven", "role 'oven' is unknown"),
    ("error:code=5", "must be a SCPI error code"),
    ("overload:count=0", "must be 1 or more"),
])
def test_bad_specs_say_what_is_wrong(spec, words):
    # brief: bad input gets one clear line
    with pytest.raises(FaultSpecError) as info:
        Fault.parse(spec)
    message = str(info.value)
    assert words in message
    assert "\n" not in message
    assert isinstance(info.value, ValueError)


@given(st.sampled_from(KINDS), st.integers(0, 10_000), st.sampled_from(
    ["meter", "supply", "scanner", "thermometer"]))
def test_spec_round_trip(kind, after, role):
    fault = Fault(kind, after=after, role=role)
    assert Fault.parse(fault.spec()) == fault


def test_plan_counts_messages_per_role_and_fires_once():
    # faults.py docstring: after=N lets N messages pass and acts on message N+1; reply faults
    # wait for the first query from there on; a once-fault fires once
    applied = []
    plan = FaultPlan({"error": applied.append})
    plan.arm(Fault.parse("drop:after=2"))
    plan.arm(Fault.parse("timeout:after=1"))
    plan.arm(Fault.parse("error:after=0:role=supply"))
    seen = []
    for is_query in (False, False, False, True, True):
        a = plan.on_message("meter", is_query)
        seen.append((a.drop, a.swallow))
    assert seen == [(False, False), (False, False), (True, False), (False, True), (False, False)]
    assert applied == []
    plan.on_message("supply", False)
    plan.on_message("supply", False)
    assert [f.kind for f in applied] == ["error"]
    assert plan.pending() == []


def test_injected_fault_counts_from_the_moment_it_is_armed():
    plan = FaultPlan({})
    for _ in range(5):
        plan.on_message("meter", True)
    plan.arm(Fault.parse("garble:after=1"))
    assert plan.on_message("meter", True).garble is False
    assert plan.on_message("meter", True).garble is True
