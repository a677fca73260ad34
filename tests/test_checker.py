"""The checker: each rule fails on a profile crafted to violate it, with the right
number, and passes on a compliant one. Profiles are written into tmp_path."""

import json
import math

import numpy as np
import pytest
from scipy import constants, signal

from sweepgen import physics, sampling
from sweepgen.checker import MIN_OVERLAP, CheckReport, Finding, headroom, lower, require_playable, upper, within
from sweepgen.errors import CheckFailed, PlanError
from sweepgen.playback import prepare
from sweepgen.scenario import load_scenario

from conftest import CHECKED_SCENARIO, PIEZO_LASER, VOLTAGE_BOARD, merged, write_checked

DDS_LASER = {
    "title": "test offset-locked laser",
    "limits": {"mode_hop_free": "1 GHz", "max_chirp_rate": "3 GHz/ms", "input_min": "100 MHz",
               "input_max": "250 MHz"},
    "response": {"model": "first-order", "corner": "100 kHz"},
    "chain": [{"stage": "offset_lock", "reference": "-1.6 GHz", "sign": 1, "divider": 8},
              {"stage": "dds", "clock": "1 GHz", "bits": 32}],
}
DDS_GEN = dict(VOLTAGE_BOARD, output={"kind": "frequency", "clock": "1 GHz", "word_bits": 32, "range_min": "1 MHz",
                                      "range_max": "400 MHz"})

RB_LAMBDA = 780.241209686e-9     # 87Rb D2 vacuum wavelength (D. A. Steck, Rubidium 87 D Line Data, recalled)


def run(tmp_path, scenario=None, laser=None, gen=None, rate=None):
    return prepare(load_scenario(str(write_checked(tmp_path, scenario, laser, gen))), sample_rate=rate).report


def status(report, rule):
    return [f.status for f in report.findings if f.rule == rule]


@pytest.fixture(scope="module")
def compliant(tmp_path_factory):
    return run(tmp_path_factory.mktemp("ok"))


def test_compliant_profiles_pass_every_rule(compliant):
    assert compliant.ok, [f for f in compliant.findings if f.status == "fail"]
    rules = {f.rule for f in compliant.findings}
    for rule in ("slowing_distance", "deceleration", "end_velocity", "period", "mode_hop_free", "chirp_rate",
                 "return_rate", "actuator_range", "slew_rate", "generator_range", "sample_rate", "record_length",
                 "granularity", "step_per_sample", "step_per_code", "tracking", "return_settling", "channel"):
        assert rule in rules
    assert all(f.status in ("pass", "warn") for f in compliant.findings)


# uniform light: the design deceleration is η a_max(s) (README.md, Physics background; Foot 2005 §9.3.1, recalled section)
def _a_design():
    sc = load_scenario("rb87-chopped-oven")        # the same species, s = 3, η = 0.6 as the test scenario
    sp = sc.species
    return 0.6 * physics.max_deceleration(3.0, sp.gamma, sp.wavelength, sp.mass), sp


def test_mode_hop_free_fails_with_the_span(tmp_path):
    r = run(tmp_path, laser=merged(PIEZO_LASER, limits={"mode_hop_free": "200 MHz"}))
    f = r.finding("mode_hop_free")
    assert f.status == "fail" and f.limit == pytest.approx(200e6)
    # span (v1 − v2)/λ (constant-deceleration closed form, Foot 2005 §9.3.1): the lag is the same at both ends for uniform light
    assert f.value == pytest.approx((200 - 15) / RB_LAMBDA, rel=1e-6)
    assert not r.ok


def test_chirp_rate_fails_with_a_over_lambda(tmp_path):
    r = run(tmp_path, laser=merged(PIEZO_LASER, limits={"max_chirp_rate": "50 GHz/s"}))
    a, sp = _a_design()
    f = r.finding("chirp_rate")
    assert f.status == "fail" and f.value == pytest.approx(a / RB_LAMBDA, rel=1e-6)   # chirp rate a/λ


def test_return_rate_fails_alone_with_the_smoothstep_peak(tmp_path):
    r = run(tmp_path, laser=merged(PIEZO_LASER, limits={"max_chirp_rate": "0.5 GHz/ms"}))
    assert status(r, "chirp_rate") == ["pass"]
    f = r.finding("return_rate")
    # 3x² − 2x³ has its steepest slope 3/2 at x = 1/2 (calculus): peak rate 1.5·span/T_return
    assert f.status == "fail" and f.value == pytest.approx(1.5 * (185 / RB_LAMBDA) / 0.5e-3, rel=1e-4)


def test_actuator_range_fails_and_is_never_playable(tmp_path):
    r = run(tmp_path, laser=merged(PIEZO_LASER, limits={"input_max": "2 V"}))
    f = r.finding("actuator_range")
    end = -(15 + physics.lag_velocity(3.0, 0.6, r.scenario.species.gamma, RB_LAMBDA)) / RB_LAMBDA
    assert f.status == "fail" and f.limit == 2.0
    assert f.value == pytest.approx((end + 140e6) / 40e6, rel=1e-6)      # drive = (Δ − set point)/coefficient
    with pytest.raises(CheckFailed, match="actuator_range"):
        require_playable(r)
    assert r.quantisation is None                                  # no codes are made for an unsafe drive


def test_fifty_ohm_doubling_decides_the_generator_range(tmp_path):
    # the drive needs -3.03 to 2.90 V at the actuator; the generator is programmed within ±2 V
    small = {"range_min": "-2 V", "range_max": "2 V"}
    hz = run(tmp_path, gen=merged(VOLTAGE_BOARD, output=small))
    lag = physics.lag_velocity(3.0, 0.6, hz.scenario.species.gamma, RB_LAMBDA)
    lo, hi = [(-(v + lag) / RB_LAMBDA + 140e6) / 40e6 for v in (200, 15)]   # drive = (Δ − set point)/coefficient
    f = hz.finding("generator_range")
    assert f.status == "fail" and f.limit == pytest.approx(-2.0) and f.value == pytest.approx(lo, rel=1e-6)
    # set for 50 Ω but driving a high-impedance input: twice the programmed voltage arrives (common practice)
    doubled = run(tmp_path, gen=merged(VOLTAGE_BOARD, output=dict(small, termination="50 ohm")))
    g = doubled.finding("generator_range")
    assert g.status == "pass" and g.limit == pytest.approx(-4.0)
    q = doubled.quantisation
    assert q.delivered_factor == 2.0
    # programmed peak-to-peak is half the span needed at the actuator
    assert q.amplitude == pytest.approx((hi - lo) / 2, rel=2e-3)
    assert q.code_scale == pytest.approx(q.amplitude * 2 / (2 * 8191))



# an output limiting amplitude (peak-to-peak) and offset apart; range_* default to ±(offset_max + amplitude_max/2)
@pytest.mark.parametrize("amp, off, wide, status, centred", [
    ("5 V", "5 V", False, "fail", True),        # fits the ±7.5 V window but needs 5.93 Vpp
    ("6 V", "0 V", True, "fail", False),        # fits 6 Vpp centred, but the offset must stay at 0 V
    ("6.5 V", "0 V", True, "warn", False),      # fits with less than 20 % to spare
    ("10 V", "5 V", False, "pass", True),
])
def test_generator_amplitude_judges_the_peak_to_peak_the_offset_limit_leaves(tmp_path, amp, off, wide, status,
                                                                              centred):
    out = {"kind": "voltage", "amplitude_max": amp, "offset_max": off, "dac_bits": 14}
    if wide:
        out.update(range_min="-10 V", range_max="10 V")
    r = run(tmp_path, gen=merged(VOLTAGE_BOARD, output=out))
    lag = physics.lag_velocity(3.0, 0.6, r.scenario.species.gamma, RB_LAMBDA)
    lo, hi = [(-(v + lag) / RB_LAMBDA + 140e6) / 40e6 for v in (200, 15)]   # drive = (Δ − set point)/coefficient
    need = hi - lo if centred else 2 * max(hi, -lo)                         # about the centre, or about 0 V
    a_max = float(amp.split()[0])
    f = r.finding("generator_amplitude")
    assert (f.status, f.unit) == (status, "V")
    assert f.value == pytest.approx(need, rel=1e-6) and f.limit == a_max
    assert f.headroom == pytest.approx((a_max - need) / a_max, rel=1e-6)
    assert "amplitude_max" in f.message and "offset_max" in f.message
    assert (f.advice != "") == (status != "pass") and "see the message" not in f.advice
    if not centred and status != "pass":
        assert "set point" in f.advice                                      # centring the drive helps
    # the window rule still judges the window alone, once; no second finding without numbers
    assert [g.status for g in r.findings if g.rule == "generator_range"] == ["pass"]
    assert all(g.value is not None for g in r.findings if g.status == "fail")
    assert (r.quantisation is None) == (status == "fail")
    if status == "fail":
        with pytest.raises(CheckFailed, match="generator_amplitude"):
            require_playable(r)

def test_slew_rate_fails_with_rate_over_coefficient(tmp_path):
    r = run(tmp_path, laser=merged(PIEZO_LASER, limits={"max_slew": "10 V/ms"}))
    f = r.finding("slew_rate")
    assert f.status == "fail" and f.unit == "V/s"
    assert f.value == pytest.approx(1.5 * (185 / RB_LAMBDA) / 0.5e-3 / 40e6, rel=1e-4)


def test_stage_range_fails_for_a_narrow_aom_band(tmp_path):
    laser = merged(PIEZO_LASER, chain=[
        {"stage": "aom", "passes": 2, "order": -1, "centre": "200 MHz", "set_point": "-140 MHz",
         "rf_min": "150 MHz", "rf_max": "250 MHz"},
        {"stage": "vco", "coefficient": "50 MHz/V", "frequency": "50 MHz", "voltage": "1 V"}])
    r = run(tmp_path, laser=merged(laser, limits={"input_min": "0 V", "input_max": "10 V"}))
    f = r.finding("stage_range")
    lag = physics.lag_velocity(3.0, 0.6, r.scenario.species.gamma, RB_LAMBDA)
    start, end = -(200 + lag) / RB_LAMBDA, -(15 + lag) / RB_LAMBDA

    def rf(detuning):
        return 200e6 + (detuning + 140e6) / -2                # f = centre + ΔΔ/(passes·order)

    # the RF leaves the band at both ends: 142 MHz < 150 MHz (-5.3 %) and 261 MHz > 250 MHz (-4.3 %);
    # the finding names the edge with the smaller headroom, the lower one, relative to 150 MHz
    assert rf(end) < 150e6 and rf(start) > 250e6
    assert f.status == "fail" and f.limit == pytest.approx(150e6)
    assert f.value == pytest.approx(rf(end), rel=1e-9)
    assert f.headroom == pytest.approx((rf(end) - 150e6) / 150e6, rel=1e-9)
    assert f.headroom < (250e6 - rf(start)) / 250e6 < 0


def test_tracking_fails_for_a_slow_actuator_with_rate_times_tau(tmp_path):
    r = run(tmp_path, laser=merged(PIEZO_LASER, response={"corner": "2 kHz"}))
    f = r.finding("tracking")
    a, sp = _a_design()
    tau = 1 / (2 * math.pi * 2e3)
    # a first-order system lags a ramp by rate·τ (1 − e^{−t/τ}) (textbook); the chirp lasts ≫ τ
    assert f.status == "fail" and f.value == pytest.approx(a / RB_LAMBDA * tau, rel=0.02)
    lag = physics.lag_velocity(3.0, 0.6, sp.gamma, sp.wavelength) / sp.wavelength
    assert f.limit == pytest.approx(0.25 * lag, rel=1e-9)           # default tracking_fraction 0.25


def test_tracking_agrees_with_scipy_lsim(tmp_path):
    laser = merged(PIEZO_LASER, response={"model": "second-order", "resonance": "8 kHz", "q": 2.0, "corner": None})
    r = run(tmp_path, laser=laser)
    tr = r.tracking
    # reference implementation: scipy.signal.lsim of H(s) over three periods of the played drive
    w0 = 2 * math.pi * 8e3
    sys = signal.lti([w0 ** 2], [1, w0 / 2.0, w0 ** 2])
    u = np.tile(tr.drive, 3)
    t = np.arange(u.size) / tr.sample_rate
    _, y, _ = signal.lsim(sys, u, t, X0=None, interp=False)     # zero-order hold, like the generator
    ref = y[-tr.drive.size:]
    mine = r.laser.chain.to_drive(tr.actual)
    assert np.max(np.abs(ref - mine)) < 1e-6 * np.ptp(tr.drive)


def test_return_settling_fails_for_a_ringing_actuator(tmp_path):
    laser = merged(PIEZO_LASER, response={"model": "second-order", "resonance": "1.5 kHz", "q": 40.0, "corner": None})
    r = run(tmp_path, laser=laser)
    f = r.finding("return_settling")
    assert f.status == "fail" and f.value > f.limit
    i0 = 0                                   # continuous beam: the chirp starts at the period start
    assert f.value == pytest.approx(max(abs(r.tracking.error[i0]), abs(r.tracking.error[-1])))


def test_step_per_sample_fails_at_a_slow_fixed_rate(tmp_path):
    r = run(tmp_path, scenario=merged(CHECKED_SCENARIO, drive={"sample_rate": "100 kSa/s"}))
    f = r.finding("step_per_sample")
    assert f.status == "fail"
    assert f.value == pytest.approx(1.5 * (185 / RB_LAMBDA) / 0.5e-3 / 1e5, rel=1e-4)
    assert f.limit == pytest.approx(0.1 * r.scenario.species.linewidth)


def test_step_per_code_fails_with_few_dac_bits(tmp_path):
    r = run(tmp_path, gen=merged(VOLTAGE_BOARD, output={"dac_bits": 6}))
    f = r.finding("step_per_code")
    assert f.status == "fail"
    # one code = amplitude/(2·(2^5 − 1)) volts = that × 40 MHz/V of detuning
    assert f.value == pytest.approx(r.quantisation.amplitude / (2 * 31) * 40e6, rel=1e-9)


def test_record_length_and_sample_rate_rules(tmp_path):
    r = run(tmp_path, gen=merged(VOLTAGE_BOARD, sampling={"memory": 4096}), rate=1e6)
    f = r.finding("record_length")
    assert f.status == "fail" and f.value == 6000 and f.limit == 4096
    auto = run(tmp_path, gen=merged(VOLTAGE_BOARD, sampling={"memory": 1024}))
    g = auto.finding("sample_rate")
    assert g.status == "fail" and "memory wins" in g.message
    listed = run(tmp_path, gen=merged(VOLTAGE_BOARD, sampling={"rates": ["1 MSa/s", "4 MSa/s"], "rate_min": None,
                                                     "rate_max": None}), rate=2e6)
    assert status(listed, "sample_rate") == ["fail"]
    fast = run(tmp_path, rate=40e6)
    assert status(fast, "sample_rate") == ["fail"] and fast.finding("sample_rate").limit == 20e6


def test_granularity_warns_when_padding(tmp_path):
    r = run(tmp_path, gen=merged(VOLTAGE_BOARD, sampling={"granularity": 7}), rate=4e6)
    f = r.finding("granularity")
    assert f.status == "warn" and f.value == 3 and r.rate_choice.count == 24003     # 24000 samples -> 7·3429
    assert r.ok


def test_channel_and_output_kind(tmp_path):
    r = run(tmp_path, scenario=merged(CHECKED_SCENARIO, drive={"channel": 2}))
    assert status(r, "channel") == ["fail"]
    r = run(tmp_path, gen=DDS_GEN)
    assert status(r, "output_kind") == ["fail"]


def test_dds_chain_matches_the_generator(tmp_path):
    sc = merged(CHECKED_SCENARIO)
    ok = run(tmp_path, scenario=sc, laser=DDS_LASER, gen=DDS_GEN)
    assert ok.ok and status(ok, "dds_match") == ["pass"]
    f = ok.finding("dds_rounding")
    # word LSB clock/2^32 at the DDS is 8 LSB of beat, i.e. of detuning; rounding error at most half of that
    assert f.status == "pass" and 0 < f.value <= 8 * 1e9 / 2 ** 32 / 2 * (1 + 1e-9)
    bad = run(tmp_path, scenario=sc, laser=DDS_LASER,
              gen=merged(DDS_GEN, output={"clock": "800 MHz"}))
    g = bad.finding("dds_match")
    assert g.status == "fail" and g.value == 1e9 and g.limit == 800e6
    coarse_laser = merged(DDS_LASER, chain=[DDS_LASER["chain"][0], {"stage": "dds", "clock": "1 GHz", "bits": 12}])
    coarse = run(tmp_path, scenario=sc, laser=coarse_laser, gen=merged(DDS_GEN, output={"word_bits": 12}))
    h = coarse.finding("dds_rounding")
    assert h.status == "fail" and h.value <= 8 * 1e9 / 2 ** 12 / 2 * (1 + 1e-9)
    assert h.value > 0.5 * 8 * 1e9 / 2 ** 12 / 2                  # the worst sample is near a half-LSB
    assert coarse.finding("step_per_code").value == pytest.approx(8 * 1e9 / 2 ** 12)


def test_period_rule_fails_instead_of_crashing(tmp_path):
    r = run(tmp_path, scenario=merged(CHECKED_SCENARIO, chirp={"period": "4 ms"}))
    f = r.finding("period")
    a, _ = _a_design()
    # chirp duration (v1 − v2)/a (constant-deceleration closed form, Foot 2005 §9.3.1) + hold + return
    assert f.status == "fail" and f.value == pytest.approx((200 - 15) / a + 0.2e-3 + 0.5e-3, rel=1e-6)
    assert f.limit == pytest.approx(4e-3) and not r.ok


def test_slowing_distance_fails_with_the_closed_form(tmp_path):
    r = run(tmp_path, scenario=merged(CHECKED_SCENARIO, target={"distance": "0.3 m"}))
    f = r.finding("slowing_distance")
    a, _ = _a_design()
    assert f.status == "fail"
    assert f.value == pytest.approx((200 ** 2 - 15 ** 2) / (2 * a), rel=1e-6)   # (v1² − v2²)/2a
    assert f.limit == pytest.approx(0.25)


def test_a_chirp_that_starts_before_the_light_cannot_exist(tmp_path):
    """The design atom would be in the dark when the chirp starts: no sweep, bad input (exit 2)."""
    sc = merged(CHECKED_SCENARIO, source={"pulse_time": "0 ms"}, chirp={"start_time": "0.1 ms"})
    with pytest.raises(PlanError) as info:
        run(tmp_path, scenario=sc)
    assert info.value.exit_code == 2 and info.value.key == "chirp.start_time"


def test_a_slowing_distance_that_does_not_fit_is_a_failed_rule_with_advice(tmp_path):
    """The plan exists but breaks the target's distance: a failed rule (exit 1), and the hardware
    rules still judge the sweep."""
    r = run(tmp_path, scenario=merged(CHECKED_SCENARIO, target={"distance": "0.3 m"}))
    f = r.finding("slowing_distance")
    assert f.status == "fail" and f.headroom == pytest.approx((f.limit - f.value) / f.limit)
    assert "lower chirp.start_velocity" in f.advice and not r.plan.fits
    assert r.finding("actuator_range") is not None
    with pytest.raises(CheckFailed):
        require_playable(r)


def test_end_velocity_and_deceleration(tmp_path):
    r = run(tmp_path, scenario=merged(CHECKED_SCENARIO, target={"capture_velocity": "10 m/s"}))
    f = r.finding("end_velocity")
    assert f.status == "fail" and f.value == 15 and f.limit == 10
    # η > 0.8 leaves less than 20 % of the force in reserve: a warning (η < 1 is enforced by the loader);
    # an unbounded light gives every atom the on-axis force, so the ratio is η itself
    r = run(tmp_path, scenario=merged(CHECKED_SCENARIO, chirp={"force_fraction": 0.9}))
    g = r.finding("deceleration")
    assert g.status == "warn" and g.value == pytest.approx(0.9)


def test_photon_budget_for_a_lossy_molecule(tmp_path):
    from importlib.resources import files

    from scipy import integrate, stats

    text = files("sweepgen.profiles").joinpath("species/caf-a-x.toml").read_text()
    (tmp_path / "lossy.toml").write_text(text.replace("value = 2e-5", "value = 1e-4"))
    sc = merged(CHECKED_SCENARIO, species="lossy.toml", chirp={"start_velocity": "150 m/s", "end_velocity": "10 m/s",
                                                         "force_fraction": 0.3, "period": "20 ms"},
                target={"capture_velocity": "12 m/s"})
    r = run(tmp_path, scenario=sc)
    f = r.finding("photon_budget")
    sp = r.scenario.species
    # a molecule caught at v scatters (v − v_end)/v_r photons, v_r = h/(mλ), and survives (1 − p)^N (README.md,
    # Physics background; CODATA h via scipy.constants); averaged over the band of the effusive source, whose
    # flux density is scipy.stats.chi(df=4, scale=α/√2) (REFERENCES.md, Ramsey 1956)
    v_r = constants.h / (sp.mass * sp.wavelength)
    alpha = math.sqrt(2 * constants.k * 390.0 / sp.mass)
    pdf = stats.chi(df=4, scale=alpha / math.sqrt(2)).pdf
    keep = lambda v: (1 - 1e-4) ** ((v - 10.0) / v_r)
    band = integrate.quad(lambda v: pdf(v) * keep(v), 10, 150)[0] / integrate.quad(pdf, 10, 150)[0]
    assert f.value == pytest.approx(band, rel=1e-4)
    assert f"{100 * keep(150.0):.3g} %" in f.message          # those slowed from the start velocity
    # below chirp.min_survival (default 0.5) the check warns with the numbers; it does not refuse
    assert f.status == "warn" and f.limit == 0.5 and f.advice
    r = run(tmp_path, scenario=merged(sc, chirp={"min_survival": 0.3}))
    assert r.finding("photon_budget").status == "pass" and r.finding("photon_budget").limit == 0.3


def test_the_deceleration_rule_fails_when_the_beam_is_too_small(tmp_path):
    # the issue's sodium-like geometry: a 0.5 mm waist and a 10 mrad beam of atoms; the design
    # deceleration is compared with the force at the atoms' median distance from the axis
    small = merged(CHECKED_SCENARIO, source={"divergence": "10 mrad"}, light={"waist": "0.5 mm", "focus": "0 m"})
    r = run(tmp_path, scenario=small)
    f = r.finding("deceleration")
    assert f.status == "fail" and f.value > 1.0 and "from the axis" in f.message and "light.waist" in f.advice
    assert r.finding("beam_overlap").status == "warn" and r.finding("beam_overlap").value < 0.05
    # a wide beam gives the force to nearly all of them: η again
    wide = merged(CHECKED_SCENARIO, source={"divergence": "1 mrad"}, light={"waist": "20 mm", "focus": "0 m"})
    r = run(tmp_path, scenario=wide)
    assert r.finding("deceleration").status == "pass" and r.finding("deceleration").value < 0.65
    assert r.finding("beam_overlap").value > MIN_OVERLAP


def test_the_shipped_sodium_scenario_of_the_issue_now_fails(tmp_path):
    # waist 0.5 mm at the oven, 10 mrad divergence, s0 = 2 (the scenario shipped before these models)
    old = {"title": "old Na", "species": "na23-d2", "laser": "laser.toml", "generator": "gen.toml",
           "source": {"model": "effusive", "temperature": "600 K", "divergence": "10 mrad"},
           "light": {"saturation": 2.0, "start": "0.10 m", "waist": "0.5 mm", "focus": "0 m"},
           "target": {"distance": "0.60 m", "capture_velocity": "40 m/s"},
           "chirp": {"start_velocity": "500 m/s", "end_velocity": "30 m/s", "force_fraction": 0.6, "hold": "0.2 ms",
                     "return_time": "0.5 ms", "period": "5 ms"}}
    r = run(tmp_path, scenario=old, laser=merged(PIEZO_LASER, limits={"mode_hop_free": "5 GHz", "max_chirp_rate":
                                                                  "2 THz/s", "max_slew": "1 kV/ms"}))
    assert not r.ok
    # the force the design asks for is not there: the light is weaker by the effective saturation
    # intensity, and where the atoms are, weaker still
    failing = {f.rule for f in r.failures()}
    assert failing & {"slowing_distance", "deceleration"}


def test_depumping_warns_without_repump_with_numbers(tmp_path):
    rb = merged(CHECKED_SCENARIO, species="rb87-d2")
    r = run(tmp_path, scenario=rb)
    f = r.finding("depumping")
    assert f.status == "warn" and f.value < 0.3 and "266.6 MHz" in f.message and "no repump" in f.message
    assert "[channels.repump]" in f.advice
    repumped = merged(rb, channels={"repump": {"kind": "frequency", "role": "repump", "saturation": 1.0,
                                                "offset": "0 MHz"}})
    r = run(tmp_path, scenario=repumped)
    assert r.finding("depumping").status == "pass" and r.finding("depumping").value > 0.9


@pytest.mark.parametrize("species", ["na23-d2", "k39-d2"])
def test_close_excited_levels_leave_almost_nothing_without_repump(tmp_path, species):
    r = run(tmp_path, scenario=merged(CHECKED_SCENARIO, species=species, chirp={"start_velocity": "150 m/s"}))
    f = r.finding("depumping")
    assert f.status == "warn" and f.value < 0.02


def test_a_hold_that_stops_the_slowed_atoms_fails(tmp_path):
    # the issue: a 0.5 ms hold at about 2.3e4 m/s² takes about 11.7 m/s from atoms that end at 10 m/s
    caf = merged(CHECKED_SCENARIO, species="caf-a-x", light={"saturation": 4.0, "start": "0.15 m"},
                 target={"distance": "1.3 m", "capture_velocity": "12 m/s"},
                 chirp={"start_velocity": "150 m/s", "end_velocity": "10 m/s", "force_fraction": 0.35, "hold": "0.5 ms",
                        "return_time": "0.6 ms", "period": "30 ms"})
    laser = merged(PIEZO_LASER, limits={"max_chirp_rate": "2 THz/s", "max_slew": "1 kV/ms"})
    r = run(tmp_path, scenario=caf, laser=laser)
    f = r.finding("after_chirp")
    # more than 0.9 of the end velocity is gone before the target (afterchirp.STOP_FRACTION)
    assert f.status == "fail" and f.value > f.limit == pytest.approx(9.0) and "switch the slowing light off" in f.advice
    short = run(tmp_path, scenario=merged(caf, chirp={"hold": "0 ms"}), laser=laser)
    assert short.finding("after_chirp").status in ("pass", "warn")
    assert short.finding("after_chirp").value < f.value


def test_headroom_and_warn_band():
    assert upper("x", 79, 100, "", "").status == "pass"
    assert upper("x", 81, 100, "", "").status == "warn"
    assert upper("x", 101, 100, "", "").status == "fail"
    f = within("x", -1, 8.5, -10, 10, "V", "")
    assert f.status == "warn" and f.value == 8.5 and f.limit == 10 and f.headroom == pytest.approx(0.15)
    assert within("x", -11, 0, -10, 10, "V", "").status == "fail"
    rep = CheckReport([Finding("a", "pass", 1, 2, "", 0.5, ""), Finding("w", "warn", 1, 2, "", 0.1, ""),
                       Finding("b", "fail", 3, 2, "", -0.5, "")])
    assert [f.rule for f in rep.ordered()] == ["b", "w", "a"] and not rep.ok
    doc = json.loads(json.dumps(rep.to_json()))
    assert doc["ok"] is False
    assert [f["rule"] for f in doc["findings"]] == ["b", "w", "a"]      # failures first, as the text report


def test_headroom_is_measured_against_the_limit_for_every_kind_of_rule():
    """One definition (README.md, Glossary): the room left to the limit over the limit's size, so it
    can be recomputed from the value and limit printed beside it."""
    # an upper limit, a lower limit and a range's upper edge, each exceeded by a factor two: -100 %
    assert upper("x", 20e6, 10e6, "Sa/s", "").headroom == pytest.approx(-1.0)
    assert lower("x", 5e6, 10e6, "Sa/s", "").headroom == pytest.approx(-0.5)
    f = within("x", 20e6, 20e6, 1e3, 10e6, "Sa/s", "")
    assert (f.status, f.limit, f.headroom) == ("fail", 10e6, pytest.approx(-1.0))
    # 8.19 MHz against a 5 MHz floor of a 5-300 MHz band: 64 %, not 3.19/147.5 = 2 %
    f = within("x", 8.19e6, 100e6, 5e6, 300e6, "Hz", "")
    assert (f.status, f.value, f.limit) == ("pass", 8.19e6, 5e6)
    assert f.headroom == pytest.approx((8.19 - 5) / 5)
    # the edge with the smaller headroom is named, not the one nearer in absolute terms
    # (62 MHz is 2 MHz above 60 MHz: 3.3 %; 97.5 MHz is 2.5 MHz below 100 MHz: 2.5 %)
    f = within("x", 62e6, 97.5e6, 60e6, 100e6, "Hz", "")
    assert (f.value, f.limit, f.headroom) == (97.5e6, 100e6, pytest.approx(0.025))
    assert headroom(62e6, 60e6, "lower") == pytest.approx(2 / 60)
    # a zero edge has no size: it is measured against the range's width
    f = within("x", 1.5, 6.8, 0.0, 10.0, "V", "")
    assert (f.limit, f.headroom, f.status) == (0.0, pytest.approx(0.15), "warn")
    assert headroom(0.0, 0.0, "upper") is None


def test_a_rate_twice_the_generators_limit_reads_minus_100_percent(tmp_path):
    """VOLTAGE_BOARD plays up to 20 MSa/s; 40 MSa/s is twice its limit."""
    f = run(tmp_path, rate=40e6).finding("sample_rate")
    assert (f.status, f.value, f.limit) == ("fail", 40e6, 20e6)
    assert f.headroom == pytest.approx(-1.0)


@pytest.mark.parametrize("key", ["rb87-chopped-oven", "na23-continuous-focused", "caf-buffer-gas"])
def test_shipped_scenarios_pass_with_their_hardware(key):
    r = prepare(load_scenario(key)).report
    assert r.ok, [(f.rule, f.message) for f in r.failures()]


def _tracking_error_by_lfilter(report, sample_rate):
    """Reference: ``(time, |laser − plan|)`` over one period at every sample played at ``sample_rate``,
    through scipy.signal: the response discretised with a zero-order hold (cont2discrete) and run
    from rest over three periods with lfilter (the shipped actuators settle in a small fraction of
    a period), the drive quantised to the generator's codes as it is played."""
    schedule, laser, q = report.plan.schedule(), report.laser, report.quantisation
    n = round(schedule.period * sample_rate)
    t = np.arange(n) / sample_rate
    planned = schedule.detuning(t)
    drive = sampling.codes_to_drive(sampling.drive_to_codes(laser.chain.to_drive(planned), q), q)
    b, a, _ = signal.cont2discrete(laser.response.transfer(), 1.0 / sample_rate, method="zoh")
    played = signal.lfilter(np.squeeze(b), a, np.tile(drive - drive[0], 3))[-n:] + drive[0]
    return t, np.abs(laser.chain.to_detuning(played) - planned)


def _in_chirp(report, t):
    chirp = report.plan.schedule().segment("chirp")
    return (t >= chirp.start) & (t < chirp.end)


@pytest.mark.slow
@pytest.mark.parametrize("key", ["rb87-chopped-oven", "na23-continuous-focused", "caf-buffer-gas"])
def test_tracking_verdict_agrees_with_the_full_computation(key):
    report = prepare(load_scenario(key)).report
    rate = report.rate_choice.sample_rate
    assert report.tracking.sample_rate == rate          # every played sample is simulated
    t, err = _tracking_error_by_lfilter(report, rate)
    worst = np.max(err[_in_chirp(report, t)])
    tracking = report.finding("tracking")
    assert tracking.value == pytest.approx(worst, rel=1e-6)
    i0 = round(report.plan.schedule().segment("chirp").start * rate) % t.size
    settling = report.finding("return_settling")
    assert settling.value == pytest.approx(max(err[i0], err[i0 - 1]), rel=1e-6, abs=1e-6 * tracking.limit)


@pytest.mark.slow
def test_tracking_beyond_the_simulated_points_is_within_one_step(tmp_path):
    # played at 2^20 samples per period (a fixed rate), simulated at a quarter of it (2^18 points)
    rate = (1 << 20) / 6e-3                              # CHECKED_SCENARIO's period is 6 ms
    gen = merged(VOLTAGE_BOARD, sampling={"rate_max": "200 MSa/s", "memory": 1 << 21})
    report = run(tmp_path, laser=merged(PIEZO_LASER, response={"corner": "20 kHz"}), gen=gen, rate=rate)
    assert report.tracking.sample_rate == pytest.approx(rate / 4) and report.tracking.time.size == 1 << 18
    t, err = _tracking_error_by_lfilter(report, rate)
    worst = np.max(err[_in_chirp(report, t)])
    step = report.plan.schedule().max_abs_chirp_rate("chirp") / report.tracking.sample_rate
    f = report.finding("tracking")
    assert abs(f.value - worst) <= step                  # the coarser hold staircase: one simulated step
    assert 0.1 * f.limit < worst < f.limit and f.status == "pass"


def test_the_sodium_demo_uses_most_of_its_aom_band_and_vco_input_and_says_so():
    # The three range warnings of na23-continuous-focused are the physics of its hardware, not an artefact:
    # an 800 MHz optical chirp through a double pass takes 400 MHz of RF (Δ = set_point − 2 (f − centre) for
    # the minus-first order twice), 74 % of the 80-620 MHz band, centred; each end is 70.6 MHz from its edge.
    from sweepgen.planner import plan
    from sweepgen.playback import prepare
    from sweepgen.scenario import load_scenario

    sc = load_scenario("na23-continuous-focused")
    p = plan(sc)
    rf = sorted(350e6 + (-456e6 - d) / 2 for d in (p.start_detuning, p.end_detuning))
    assert rf[0] - 80e6 == pytest.approx(620e6 - rf[1], rel=1e-3)          # centred in the band
    findings = {(f.rule, f.unit): f for f in prepare(sc).report.findings if f.status == "warn"}
    assert set(findings) == {("actuator_range", "V"), ("stage_range", "Hz"), ("stage_range", "V")}
    aom = findings["stage_range", "Hz"]
    assert aom.value == pytest.approx(rf[1], rel=1e-9) and aom.limit == 620e6
    assert aom.headroom == pytest.approx((620e6 - rf[1]) / 620e6) and "(chain[0].rf_max)" in aom.message
    # the VCO's calibration (the laser file's points), fitted by NumPy's own least squares, read backwards
    volts = np.arange(11.0)
    mhz = [30.00, 109.48, 187.61, 264.65, 340.93, 416.00, 490.58, 564.37, 636.60, 708.53, 780.12]
    fit = np.polynomial.Polynomial.fit(volts, np.array(mhz) * 1e6, 3)
    v_low = min(r.real for r in (fit - rf[0]).roots() if abs(r.imag) < 1e-9 and 0 <= r.real <= 10)
    for key in (("actuator_range", "V"), ("stage_range", "V")):
        f = findings[key]
        assert f.value == pytest.approx(v_low, abs=1e-3) and f.limit == 0.0
        assert f.headroom == pytest.approx(v_low / 10.0, abs=1e-4)      # a zero edge against the range's width
