"""GUM combination, ILAC-G8 decision rules, the aging law and ISO 2859-1 plans, each on a
worked example computed by hand here."""

import math

import pytest

from benchkit.errors import UserError
from benchkit.verify import aging, sampling
from benchkit.verify.decision import (CONFORMING, NONCONFORMING, NOT_DECIDABLE, combine_verdicts,
                                      decide)
from benchkit.verify.uncertainty import Budget, Component, combined, expanded, rectangular, type_a


def test_gum_worked_example():
    # JCGM 100:2008 4.3.7: rectangular half-width a -> u = a/sqrt(3); a = 0.1 % -> 0.057735 %
    u_meter = rectangular(0.1)
    assert u_meter == pytest.approx(0.1 / math.sqrt(3)) and round(u_meter, 6) == 0.057735
    # JCGM 100:2008 5.1.2, independent inputs: u_c = sqrt(0.057735^2 + 0.05^2) = 0.076376 %
    b = Budget([Component("meter", u_meter), Component("repeatability", 0.05, evaluation="type A")])
    assert round(b.u_c, 6) == 0.076376
    assert b.u_c == pytest.approx(math.sqrt(0.1**2 / 3 + 0.05**2))
    # JCGM 100:2008 6.2.1, k = 2: U = 0.152753 %
    assert round(b.U, 6) == 0.152753
    assert b.to_dict()["U"] == pytest.approx(2 * b.u_c)


def test_gum_sensitivity_and_correlation():
    # JCGM 100:2008 5.1.2 and 5.2.2: u_c^2 = sum c_i^2 u_i^2 + 2 sum c_i c_j u_i u_j r_ij.
    # Two inputs u = 3 and 4 with c = 1: independent 5; fully correlated 7; anti-correlated 1.
    comps = [Component("a", 3.0), Component("b", 4.0)]
    assert combined(comps) == pytest.approx(5.0)
    assert combined(comps, [[1, 1], [1, 1]]) == pytest.approx(7.0)
    assert combined(comps, [[1, -1], [-1, 1]]) == pytest.approx(1.0)
    assert combined([Component("a", 3.0, sensitivity=-2.0)]) == pytest.approx(6.0)
    with pytest.raises(UserError):
        expanded(1.0, k=0)


def test_type_a_mean_of_readings():
    # JCGM 100:2008 4.2.3: u = s/sqrt(n); values 1,2,3,4,5: s = sqrt(2.5), n = 5 -> 0.707107
    assert type_a([1, 2, 3, 4, 5]) == pytest.approx(math.sqrt(2.5) / math.sqrt(5))
    with pytest.raises(UserError):
        type_a([1.0])


def test_ilac_g8_guard_band_on_a_10uF_K_part():
    # ILAC-G8:09/2019 4.2.2, w = U: 10 uF K (9..11 uF), U = 0.2 uF -> AL = 9.2 / 10.8 uF;
    # 10.9 uF passes simple acceptance and fails guarded acceptance [worked by hand].
    lo, hi, U = 9.0, 11.0, 0.2
    g = decide(10.9, U, lo, hi, "guarded")
    assert (g.accept_lo, g.accept_hi) == (pytest.approx(9.2), pytest.approx(10.8))
    assert g.verdict != CONFORMING
    # ISO 14253-1: 10.9 is inside 11 + 0.2, so nonconformity is not proven either
    assert g.verdict == NOT_DECIDABLE and g.statement == "conditional pass"
    s = decide(10.9, U, lo, hi, "simple")
    assert s.verdict == CONFORMING and (s.accept_lo, s.accept_hi) == (9.0, 11.0)
    # 10.7 inside AL: conforming under both; 11.3 beyond TL + U: nonconforming under both
    assert decide(10.7, U, lo, hi, "guarded").verdict == CONFORMING
    assert decide(10.7, U, lo, hi, "guarded").statement == "pass"
    assert decide(11.3, U, lo, hi, "guarded").verdict == NONCONFORMING
    assert decide(11.3, U, lo, hi, "simple").verdict == NONCONFORMING
    # 11.1: outside TL but within U of it: simple rejects; guarded cannot decide;
    # ILAC-G8 4.2.3 non-binary statement "conditional fail"
    assert decide(11.1, U, lo, hi, "simple").verdict == NONCONFORMING
    d = decide(11.1, U, lo, hi, "guarded")
    assert d.verdict == NOT_DECIDABLE and d.statement == "conditional fail"
    # same on the lower side: 9.1 is between TL and AL
    assert decide(9.1, U, lo, hi, "guarded").verdict == NOT_DECIDABLE
    assert decide(8.7, U, lo, hi, "guarded").verdict == NONCONFORMING


def test_guard_band_wider_than_the_zone_leaves_nothing_to_accept():
    # ISO 14253-1: with U larger than half the zone no value proves conformity
    for x in (9.5, 10.0, 10.5):
        assert decide(x, 1.5, 9.0, 11.0, "guarded").verdict == NOT_DECIDABLE


def test_no_measurement_decides_nothing_and_rules_are_checked():
    assert decide(float("nan"), 0.1, 9, 11, "simple").verdict == NOT_DECIDABLE
    with pytest.raises(UserError):
        decide(10, 0.1, 9, 11, "lenient")


def test_sample_verdict_from_points():
    # one nonconforming point makes the item nonconforming (common practice for a curve claim)
    assert combine_verdicts([CONFORMING, NOT_DECIDABLE, NONCONFORMING]) == NONCONFORMING
    assert combine_verdicts([CONFORMING, NOT_DECIDABLE]) == NOT_DECIDABLE
    assert combine_verdicts([CONFORMING, CONFORMING]) == CONFORMING
    assert combine_verdicts([]) == NOT_DECIDABLE


def test_aging_law_refers_a_24h_reading_to_1000h():
    # Aging law C(t) = C(t1)*(1 - k/100*log10(t/t1)) [common practice; IEC 60384-22 annex];
    # k = 2.5 %/decade, t1 = 1 h, read at 24 h, to 1000 h: (1 - 0.075)/(1 - 0.025*log10 24)
    # = 0.958058 [derived]; tolerances refer to 1000 h [standard: EIA-198-1 clause 1.1.2]
    f = aging.aging_factor(24.0, 1000.0, 2.5, t1_h=1.0)
    assert round(f, 6) == 0.958058
    assert f == pytest.approx((1 - 0.025 * 3) / (1 - 0.025 * math.log10(24)))
    assert aging.REFERENCE_AGE_H == 1000.0
    assert aging.refer_to_reference_age(10e-6, 24.0, 2.5) == pytest.approx(10e-6 * f)
    # the law's definition: one decade costs k percent of C(t1)
    assert aging.aging_fraction(10.0, 2.5) == pytest.approx(0.975)
    assert aging.aging_fraction(100.0, 2.5) == pytest.approx(0.95)
    # going back in age undoes going forward
    assert aging.aging_factor(1000, 24, 2.5) * f == pytest.approx(1.0)
    # class 1 does not age (C0G about 0) [common practice]
    assert aging.typical_rate_pct("C0G") == 0.0
    assert aging.typical_rate_pct("X7R") == 2.5 and aging.typical_rate_pct("Y5V") == 7.0
    with pytest.raises(UserError):
        aging.aging_factor(0, 1000, 2.5)


def test_iso_2859_lot_2000_level_II():
    # ISO 2859-1 (ANSI/ASQ Z1.4): lot 1201-3200 at level II -> K, n = 125; at K, AQL 1.0 ->
    # Ac 3 / Re 4, AQL 2.5 -> Ac 7 / Re 8 [standard: ISO 2859-1 Tables 1 and 2-A]
    assert sampling.sample_size(2000, "II") == ("K", 125)
    p = sampling.plan_for_lot(2000, 1.0, "II")
    assert (p.letter, p.n, p.Ac, p.Re) == ("K", 125, 3, 4)
    p = sampling.plan_for_lot(2000, 2.5)
    assert (p.Ac, p.Re) == (7, 8)
    for lot in (1201, 3200):
        assert sampling.code_letter(lot, "II") == "K"
    assert sampling.code_letter(1200, "II") == "J" and sampling.code_letter(3201, "II") == "L"


def test_code_letter_table_shape():
    # ISO 2859-1 Table 1 [standard; entries from memory]: every lot size from 2 is covered
    # once; letters never fall as the lot grows or the level rises; level II at 2-8 is A and
    # at 500001+ is Q; III is never below II, I never above.
    rows = sampling.CODE_LETTER_TABLE
    assert rows[0][0][0] == 2 and rows[-1][0][1] is None
    for ((_, hi), _), ((lo, _), _) in zip(rows, rows[1:]):
        assert lo == hi + 1
    order = sampling.LETTERS
    for _, letters in rows:
        idx = [order.index(x) for x in letters.split()]
        assert idx[4] <= idx[5] <= idx[6]  # I <= II <= III
        assert idx[:4] == sorted(idx[:4])  # S-1 <= S-2 <= S-3 <= S-4
    for col in range(7):
        idx = [order.index(r[1].split()[col]) for r in rows]
        assert idx == sorted(idx)
    assert sampling.code_letter(5, "II") == "A" and sampling.code_letter(10**6, "II") == "Q"


def test_normal_table_follows_its_diagonal_pattern():
    # ISO 2859-1 Table 2-A [standard; entries from memory]: the Ac series 0,1,2,3,5,7,10,14,21
    # runs along diagonals (one code letter down = one AQL step up), with an up arrow right of
    # each 0/1 and a down arrow before 1/2.
    series = ["0/1", "^", "v", "1/2", "2/3", "3/4", "5/6", "7/8", "10/11", "14/15", "21/22"]
    full_aql_index = {a: i + 4 for i, a in enumerate(sampling.AQLS_PCT)}  # 0.010 is index 0
    for i, letter in enumerate(sampling.LETTERS):
        for aql in sampling.AQLS_PCT:
            d = i + full_aql_index[aql] - 14
            expected = "v" if d < 0 else ("^" if d >= len(series) else series[d])
            assert sampling.table_entry(letter, aql) == expected, (letter, aql)
    # every cell resolves to a plan whose Re = Ac + 1 (single sampling)
    for letter in sampling.LETTERS:
        for aql in sampling.AQLS_PCT:
            used, ac, re_ = sampling.normal_plan(letter, aql)
            assert re_ == ac + 1


def test_arrows_change_the_sample_size():
    # ISO 2859-1 Table 2-A: K at AQL 0.15 is an up arrow -> J's plan 0/1 with n = 80
    assert sampling.normal_plan("K", 0.15) == ("J", 0, 1)
    # A at AQL 1.0 is a down arrow -> E (n = 13), 0/1
    assert sampling.normal_plan("A", 1.0) == ("E", 0, 1)
    # a sample as large as the lot means 100 % inspection (ISO 2859-1)
    p = sampling.plan_for_lot(10, 1.0)
    assert p.full_inspection and p.n == 10


def test_lot_decision_counts():
    p = sampling.plan_for_lot(2000, 1.0)  # n 125, Ac 3, Re 4
    assert sampling.lot_decision(p, 125, 3) == CONFORMING
    assert sampling.lot_decision(p, 125, 4) == NONCONFORMING
    assert sampling.lot_decision(p, 20, 4) == NONCONFORMING  # Re reached early
    assert sampling.lot_decision(p, 20, 0) == NOT_DECIDABLE  # sample incomplete
    assert sampling.lot_decision(p, 125, 2, 2) == NOT_DECIDABLE  # undecided could tip it


@pytest.mark.parametrize("lot, aql, level", [(1, 1.0, "II"), (100, 10.0, "II"), (100, 1.0, "IV"),
                                             ("abc", 1.0, "II"), (12.5, 1.0, "II")])
def test_sampling_bad_input(lot, aql, level):
    with pytest.raises(UserError):
        sampling.plan_for_lot(lot, aql, level)


from hypothesis import given, strategies as st  # noqa: E402


@given(x=st.floats(0.0, 20.0), U=st.floats(0.0, 3.0))
def test_guard_band_only_makes_acceptance_stricter(x, U):
    # ILAC-G8:09/2019 4.2.2: with w = U the acceptance zone is the tolerance zone shrunk by U,
    # so whatever guarded acceptance accepts, simple acceptance accepts too; ISO 14253-1: what
    # is proven nonconforming is also outside the tolerance zone.
    g = decide(x, U, 9.0, 11.0, "guarded")
    s = decide(x, U, 9.0, 11.0, "simple")
    if g.verdict == CONFORMING:
        assert s.verdict == CONFORMING and 9.0 + U <= x <= 11.0 - U
    if g.verdict == NONCONFORMING:
        assert s.verdict == NONCONFORMING and (x < 9.0 - U or x > 11.0 + U)
    if U == 0.0:
        assert g.verdict == s.verdict  # no uncertainty: the two rules agree
