"""Meter model: loading, autoranged resolution, accuracy bound, displayed value, sigma."""

from __future__ import annotations

import textwrap

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose

from diag.core import meter as mt
from diag.core.rules import load_rules

METERS = load_rules()["meters"]
H35 = METERS["handheld-3.5"]


def test_divider_formula_one_megohm_source_reads_nine_percent_low():
    # Handbook divider formula worked by hand: 10 MΩ / (10 MΩ + 1 MΩ) = 0.90909,
    # i.e. the reading is 9.09 % low.
    r = mt.loaded(1.0, 1e6, mt.input_impedance(H35))
    assert_allclose(r, 10 / 11, rtol=1e-12)
    assert_allclose(1 - r, 0.0909, atol=5e-5)


def test_ac_input_impedance_is_r_parallel_c():
    # Handbook: Z = R / (1 + jωRC); 10 MΩ ∥ 100 pF at 1 kHz: ωRC = 2π·1e3·1e-3 = 6.2832.
    z = mt.input_impedance(H35, 1000.0)
    assert_allclose(abs(z), 10e6 / np.hypot(1, 2 * np.pi * 1e3 * 10e6 * 100e-12), rtol=1e-12)


@pytest.mark.parametrize("value, res", [
    (1.999, 0.001),     # 2000 counts: 1.999 V shows on the 2 V range (common practice, no source)
    (12.0, 0.01),       # 12 V needs the 20 V range: 0.01 V resolution (common practice)
    (2.0, 0.01),        # 2.000 V does not fit 3½ digits: next range up (common practice)
    (0.1999, 0.0001),   # 199.9 mV on the 200 mV range (common practice, no source)
    (-5.0, 0.01),       # polarity does not change the range
    (150.0, 0.1),
])
def test_autoranged_resolution_of_a_2000_count_meter(value, res):
    assert_allclose(mt.resolution(value, H35, "V"), res, rtol=1e-12)


def test_shown_band_edges_are_what_the_meter_displays():
    # A 2000-count meter (common practice, no source): 0.1 mV per count on 200 mV, 1 mV on
    # 2 V, 10 mV on 20 V. Microvolts show as 0.0 mV; 1.2806 V as 1.281 V; 2.0412 V as 2.04 V.
    lo, hi = mt.shown_band(np.array([2.1e-6, 1.2806, -0.0123]),
                           np.array([21.2e-6, 2.0412, 0.00004]), H35, "V")
    assert_allclose(lo, [0.0, 1.281, -0.0123], atol=1e-12)
    assert_allclose(hi, [0.0, 2.04, 0.0], atol=1e-12)


@given(st.floats(-150, 150), st.floats(0, 50), st.floats(0, 1))
@settings(max_examples=200, deadline=None)
def test_a_reading_inside_a_band_shows_inside_the_shown_band(low, width, where):
    """Rounding to the display grid is monotone: whatever the meter shows for a true value
    inside [low, high] lies inside the shown band (no meter error drawn)."""
    high = low + width
    x = low + where * width
    lo, hi = mt.shown_band(low, high, H35, "V")
    q = mt.resolution(x, H35, "V")
    shown = np.rint(x / q) * q
    assert lo - 1e-9 <= shown <= hi + 1e-9


def test_amperes_use_the_current_ranges():
    # 2000 counts on the 200 mA range: 0.1 mA per count (common practice, no source).
    assert_allclose(mt.resolution(0.104, H35, "A"), 1e-4, rtol=1e-12)


def test_accuracy_bound_pct_plus_counts():
    # ±(0.5 % + 2 counts) of 12.00 V on the 20 V range: 0.06 + 0.02 = 0.08 V (worked by hand
    # from the SPEC default profile).
    assert_allclose(mt.accuracy(12.0, "dc", H35, "V"), 0.08, rtol=1e-12)
    # AC ±(1.0 % + 3 counts) of 0.5 V on the 2 V range: 0.005 + 0.003 = 0.008 V.
    assert_allclose(mt.accuracy(0.5, "ac", H35, "V"), 0.008, rtol=1e-12)
    # DC amperes ±(1.0 % + 3 counts) of 30 mA on the 200 mA range: 0.3 mA + 0.3 mA.
    assert_allclose(mt.accuracy(0.030, "dc", H35, "A"), 0.0006, rtol=1e-12)


def test_over_range_is_infinite_bound_and_ol_display():
    # 2000 counts on the 1000 V top range hold 999.5 V at most (counts × resolution).
    assert np.isinf(mt.accuracy(1500.0, "dc", H35, "V"))
    rng = np.random.default_rng(0)
    shown = mt.display(np.array([1500.0, -1500.0, np.nan]), "dc", H35, "V", rng)
    assert shown[0] == np.inf and shown[1] == -np.inf and np.isnan(shown[2])


def test_display_is_within_bound_and_on_the_resolution_grid():
    rng = np.random.default_rng(1)
    true = np.full(20000, 1.5)
    shown = mt.display(true, "dc", H35, "V", rng)
    bound = mt.accuracy(1.5, "dc", H35, "V")
    assert np.all(np.abs(shown - true) <= bound + 0.0005 + 1e-12)
    steps = shown / 0.001
    assert_allclose(steps, np.rint(steps), atol=1e-9)
    # The error is spread over the bound, not stuck at one value.
    assert np.unique(shown).size > 10


def test_sigma_bounds_the_spread_of_displayed_values():
    # The percentage part (uniform within ±p) and the counts part (uniform within ±c)
    # are drawn apart, each with standard deviation (bound)/√3; rounding adds q/√12 in
    # quadrature (variance of a uniform distribution, (b - a)² / 12: handbook). The
    # inference's sigma takes the whole bound b = p + c as one uniform, b/√3: at least
    # that spread and at most √2 times it, since (p + c)² <= 2 (p² + c²).
    rng = np.random.default_rng(2)
    for value in (0.7312, 4.87, 11.6):
        true = np.full(40000, value)
        shown = mt.display(true, "dc", H35, "V", rng)
        q = float(mt.resolution(value, H35, "V"))
        p = H35["dc_pct"] / 100 * value
        c = H35["dc_counts"] * q
        exact = np.sqrt((p**2 + c**2) / 3 + q**2 / 12)
        s = float(mt.sigma(value, "dc", H35, "V"))
        assert_allclose(np.std(shown), exact, rtol=0.05)
        assert exact <= s <= np.sqrt(2) * exact
        assert_allclose(np.mean(shown), value, atol=3 * s / np.sqrt(true.size) + 1e-4)


def test_one_unit_is_read_by_one_meter():
    # The same meter takes every reading of a unit: its calibration error (the
    # percentage part) is one draw per function (DC volts, AC volts, amperes) for the
    # unit, only the counts part differs per reading, so two points on one node read
    # within 2 x 2 counts and a rounding step of each other (SPEC section 1 profile,
    # figures from memory); over many units the gain spreads over the whole ±pct.
    from diag.core.case import Observable

    obs = [Observable("TP1", "dc", 1.0, "V"), Observable("TP2", "dc", 1.0, "V"),
           Observable("TP3", "ac", 1.0, "V"), Observable("TP4", "dc", 1.0, "A")]
    true = np.array([9.8, 9.8, 0.3, 0.02])
    rng = np.random.default_rng(8)
    shown = np.array([mt.display_unit(true, obs, H35, rng) for _ in range(4000)])
    q = float(mt.resolution(9.8, H35, "V"))
    assert np.all(np.abs(shown[:, 0] - shown[:, 1]) <= 2 * H35["dc_counts"] * q + q + 1e-9)
    for j, o in enumerate(obs):
        bound = float(mt.accuracy(true[j], o.kind, H35, o.unit))
        res = float(mt.resolution(true[j], H35, o.unit))
        assert np.all(np.abs(shown[:, j] - true[j]) <= bound + res / 2 + 1e-12)
    gain = (shown[:, 0] - true[0]) / (H35["dc_pct"] / 100 * true[0])
    assert gain.min() < -0.8 and gain.max() > 0.8


def test_every_profile_has_the_fields_the_meter_model_reads():
    for name, prof in METERS.items():
        for key in ("r_in", "c_in", "counts", "dc_pct", "dc_counts", "ac_pct", "ac_counts",
                    "a_pct", "a_counts", "v_ranges", "a_ranges"):
            assert key in prof, f"{name} lacks {key}"
        assert list(prof["v_ranges"]) == sorted(prof["v_ranges"]), name


def _tmp_case(tmp_path, text: str):
    from diag.core.case import load_case

    path = tmp_path / "c.yaml"
    path.write_text(textwrap.dedent(text), encoding="utf-8")
    return load_case(str(path))


def _readings(case):
    from diag.core import netlist, solver

    rules = load_rules()
    circuit = netlist.compile_case(case, rules)
    dc = solver.solve_dc(circuit, {})
    ac = solver.solve_ac(circuit, {}, dc) if case.signal is not None else None
    return mt.observe(circuit, {}, dc, ac, case.observables, case.meter)


def test_observe_applies_divider_loading(tmp_path):
    case = _tmp_case(tmp_path, """\
        case: 1
        title: loading check
        about: two 1 MΩ resistors across 10 V
        parts:
          V1: {kind: supply, plus: vcc, minus: gnd, volts: 10, r_source: 1}
          R1: {kind: resistor, nodes: [vcc, mid], ohms: 1M}
          R2: {kind: resistor, nodes: [mid, gnd], ohms: 1M}
        points:
          TP1: {node: mid, where: "midpoint"}
          TP2: {node: vcc, minus: mid, where: "across R1"}
          TP3: {supply: V1, where: "ammeter"}
        """)
    r = _readings(case)
    # (Rth is 5 % of r_in, so observe re-solves with the meter connected: in a linear
    # network that must give the divider formula exactly.)
    # Handbook divider by hand: open 10 V · 1M / (2M + 1) behind 1M ∥ (1M + 1) on 10 MΩ
    # (about 5 · 10 / 10.5 = 4.762 V, 4.8 % low).
    # rtol 1e-5: the solver's 1e-12 S node shunts (solver.GSHUNT) move this by ~3 ppm.
    v_open, r_th = 10 * 1e6 / (2e6 + 1), 1e6 * (1e6 + 1) / (2e6 + 1)
    assert_allclose(r[0, 0], v_open * 10e6 / (10e6 + r_th), rtol=1e-5)
    # Across R1 (a pair off the ground): the same figures by symmetry.
    assert_allclose(r[0, 1], v_open * 10e6 / (10e6 + r_th), rtol=1e-5)
    # Supply current without the meter: 10 V / (2 MΩ + 1 Ω) (Ohm's law).
    assert_allclose(r[0, 2], 10 / (2e6 + 1), rtol=1e-6)


def test_supply_point_reads_with_the_ammeter_burden_in_series(tmp_path):
    case = _tmp_case(tmp_path, """\
        case: 1
        title: burden check
        about: a 1 V supply into 1 Ω, read through the ammeter
        parts:
          V1: {kind: supply, plus: vcc, minus: gnd, volts: 1, r_source: 0.05}
          R1: {kind: resistor, nodes: [vcc, gnd], ohms: 1}
        points:
          TP1: {supply: V1, where: "ammeter"}
        """)
    r = _readings(case)
    # Ohm's law by hand: 1 V over 0.05 Ω source + 0.1 Ω burden (meters.yaml) + 1 Ω load
    assert_allclose(r[0, 0], 1.0 / (0.05 + 0.1 + 1.0), rtol=1e-6)


def test_observe_ac_loading_uses_r_parallel_c(tmp_path):
    case = _tmp_case(tmp_path, """\
        case: 1
        title: AC loading check
        about: a 1 kHz source behind 1 MΩ, measured by the meter
        parts:
          V1: {kind: signal, plus: in, minus: gnd, vrms: 1, hz: 1k, r_source: 1M}
          R1: {kind: resistor, nodes: [in, gnd], ohms: 100M}
        points:
          TP1: {node: in, where: "source terminal", reads: [dc, ac]}
        """)
    r = _readings(case)
    # By hand: open-circuit 1 V · 100M/(101M) behind 1M ∥ 100M; meter 10 MΩ ∥ 100 pF.
    zs = 1e6 * 100e6 / 101e6
    zin = 10e6 / (1 + 2j * np.pi * 1e3 * 10e6 * 100e-12)
    expect = abs(100 / 101 * zin / (zin + zs))
    assert_allclose(r[0, 1], expect, rtol=1e-6)
    assert_allclose(r[0, 0], 0.0, atol=1e-12)


def test_single_range_meter_overflows_above_its_range():
    # analog-20k has one 10 V range: 12 V is off the scale (rules/meters.yaml profile).
    analog = METERS["analog-20k"]
    assert np.isinf(mt.accuracy(12.0, "dc", analog, "V"))
    assert_allclose(mt.accuracy(5.0, "dc", analog, "V"), 0.15, rtol=1e-12)  # 3 % of 5 V


@given(st.floats(min_value=-900.0, max_value=900.0, allow_nan=False),
       st.sampled_from(["dc", "ac"]), st.integers(0, 2**32 - 1))
@settings(max_examples=300, deadline=None)
def test_displayed_value_stays_within_the_bound(value, kind, seed):
    if kind == "ac":
        value = abs(value)
    shown = float(mt.display(value, kind, H35, "V", np.random.default_rng(seed)))
    bound = float(mt.accuracy(value, kind, H35, "V"))
    # error within the specification, plus half a count of the range it is shown on
    q = float(mt.resolution(shown, H35, "V"))
    assert abs(shown - value) <= bound + q / 2 + 1e-9 * max(1.0, abs(value))


def test_ac_display_never_shows_below_zero():
    # An rms reading is a magnitude (common practice, no source): near 0 V the error
    # draw must not produce a negative display.
    rng = np.random.default_rng(3)
    shown = mt.display(np.zeros(5000), "ac", H35, "V", rng)
    assert shown.min() >= 0.0
    assert shown.max() > 0.0  # the meter's count error still shows


@pytest.mark.parametrize("value, text", [
    (0.0455, "0.0455"),   # 45.5 mV on the 200 mV range: 0.1 mV a count (common practice)
    (1.483, "1.483"),     # 2 V range, 1 mV a count
    (12.6, "12.60"),      # 20 V range, 10 mV a count: the display shows 12.60
    (float("inf"), "OL"),
    (float("-inf"), "-OL"),
    (-0.00001, "0.0000"),  # rounds to zero: written without a sign (our own rule)
    (-0.0, "0.0000"),
    (-0.02, "-0.0200"),
])
def test_display_number_has_the_digits_of_the_range(value, text):
    # what `diag simulate` writes: the number the 3½-digit display shows, in volts
    assert mt.display_number(value, H35, "V") == text
