"""Tests of agent.simulate against envelope analysis done with scipy.

The envelope spectrum is computed here independently of the package, the way
the trade does it: band-pass around the resonance (scipy.signal.butter +
sosfiltfilt), analytic signal (scipy.signal.hilbert), squared envelope,
spectrum.  Reference: R. B. Randall, J. Antoni, "Rolling element bearing
diagnostics -- A tutorial", Mech. Syst. Signal Process. 25 (2011) 485-520,
sec. 3 (envelope analysis) and sec. 2 (load-zone modulation).
"""

import math
import tracemalloc

import numpy as np
import pytest
from scipy.signal import butter, hilbert, sosfiltfilt, welch

from agent.dsp.bearing import defect_orders
from agent.simulate import MODULATIONS, BearingSimulator, MachineModel, simulate

FS_HZ = 12800
SHAFT_HZ = 25.0
SECONDS = 10.0
# deep-groove ball bearing geometry: 9 balls, d = 7.94 mm, D = 39.04 mm
ORDERS = defect_orders(9, 7.94, 39.04)
RATES_HZ = {"outer": ORDERS.bpfo * SHAFT_HZ, "inner": ORDERS.bpfi * SHAFT_HZ,
            "rolling": 2.0 * ORDERS.bsf * SHAFT_HZ}


def model(**changes):
    return MachineModel(**{"shaft_hz": SHAFT_HZ, "orders": ORDERS, **changes})


def envelope_spectrum(x, fs=FS_HZ, band_hz=(2000.0, 4000.0)):
    """Amplitude spectrum of the squared envelope of the band around the resonance."""
    sos = butter(4, band_hz, btype="bandpass", fs=fs, output="sos")
    env = np.abs(hilbert(sosfiltfilt(sos, x))) ** 2
    env -= env.mean()
    spec = np.abs(np.fft.rfft(env * np.hanning(env.size)))
    return np.fft.rfftfreq(env.size, 1.0 / fs), spec


def band_amplitude(freqs, spec, f0_hz, half_hz=0.5):
    """Root of the summed power within +-half_hz (robust to slip-broadened lines)."""
    sel = np.abs(freqs - f0_hz) <= half_hz
    return math.sqrt(float(np.sum(spec[sel] ** 2)))


def line_snr(freqs, spec, f0_hz):
    """Peak within +-0.5 Hz over the median of the spectrum 2..10 Hz away."""
    peak = spec[np.abs(freqs - f0_hz) <= 0.5].max()
    offset = np.abs(freqs - f0_hz)
    return peak / np.median(spec[(offset > 2.0) & (offset < 10.0)])


def sideband_ratio(freqs, spec, carrier_hz, mod_hz):
    lower = band_amplitude(freqs, spec, carrier_hz - mod_hz)
    upper = band_amplitude(freqs, spec, carrier_hz + mod_hz)
    return (lower + upper) / (2.0 * band_amplitude(freqs, spec, carrier_hz))


@pytest.mark.parametrize("fault", ["outer", "inner", "rolling"])
def test_impact_rate_is_the_defect_frequency(fault):
    # BPFO / BPFI / 2xBSF from bearing kinematics (Randall & Antoni 2011, eq. 1-4);
    # the strongest envelope line is the impact rate
    x = simulate(model(faults={fault}), FS_HZ, SECONDS, seed=11)
    freqs, spec = envelope_spectrum(x)
    band = (freqs > 20.0) & (freqs < 400.0)
    found_hz = freqs[band][np.argmax(spec[band])]
    assert found_hz == pytest.approx(RATES_HZ[fault], abs=0.3)  # 0.1 Hz resolution, slip spread
    assert line_snr(freqs, spec, RATES_HZ[fault]) > 20.0


def expected_sideband_ratio(depth):
    """Sideband/line amplitude of the squared envelope for strength p + q cos.

    The squared strength is p**2 + q**2/2 + 2 p q cos + (q**2/2) cos 2, so each
    first sideband is p q / (p**2 + q**2/2) of the line (amplitude modulation:
    a term 2 p q cos gives two sidebands of p q each).
    """
    p, q = 1.0 - depth / 2.0, depth / 2.0
    return p * q / (p * p + q * q / 2.0)


@pytest.mark.parametrize("fault,modulation,modulated", [
    # rotating load: outer-race impacts modulated at 1x, inner race even
    ("outer", "unbalance", True), ("inner", "unbalance", False),
    # stationary load zone: inner-race impacts modulated at 1x, outer race even
    ("inner", "gravity", True), ("outer", "gravity", False),
    ("outer", "both", True), ("inner", "both", True),
    # rolling element carried through the load zone by the cage: FTF sidebands
    ("rolling", "gravity", True),
])
def test_load_modulation_sidebands(fault, modulation, modulated):
    # which load modulates which race: Randall & Antoni 2011, sec. 2.1, fig. 3
    mod_hz = ORDERS.ftf * SHAFT_HZ if fault == "rolling" else SHAFT_HZ
    carrier_hz = RATES_HZ[fault]
    even = sideband_ratio(*envelope_spectrum(
        simulate(model(faults={fault}, modulation="none"), FS_HZ, SECONDS, seed=5)),
        carrier_hz, mod_hz)
    ratio = sideband_ratio(*envelope_spectrum(
        simulate(model(faults={fault}, modulation=modulation), FS_HZ, SECONDS, seed=5)),
        carrier_hz, mod_hz)
    assert even < 0.1
    if modulated:
        assert ratio == pytest.approx(expected_sideband_ratio(0.6), rel=0.15)
        assert ratio > 5.0 * even
    else:
        assert ratio < 0.1


def test_healthy_bearing_has_no_defect_lines():
    healthy = simulate(model(), FS_HZ, SECONDS, seed=2)
    freqs, spec = envelope_spectrum(healthy)
    for rate_hz in RATES_HZ.values():
        assert line_snr(freqs, spec, rate_hz) < 5.0
    faulty = simulate(model(faults={"outer"}), FS_HZ, SECONDS, seed=2)
    assert line_snr(*envelope_spectrum(faulty), RATES_HZ["outer"]) > 20.0


def test_default_defect_shows_in_envelope_before_overall_rms():
    # an early defect is found by envelope analysis long before the overall
    # level rises (Randall & Antoni 2011, sec. 1) -- common practice
    healthy = simulate(model(), FS_HZ, SECONDS, seed=4)
    faulty = simulate(model(faults={"outer"}), FS_HZ, SECONDS, seed=4)
    rms_ratio = np.sqrt(np.mean(faulty ** 2) / np.mean(healthy ** 2))
    assert 1.0 < rms_ratio < 1.4
    assert line_snr(*envelope_spectrum(faulty), RATES_HZ["outer"]) > 20.0


def test_shaft_lines_in_raw_spectrum():
    # a sinusoid of amplitude A shows as A**2/2 in a power spectrum
    # (scipy.signal.welch, scaling="spectrum", Hann window, frequency on a bin)
    for modulation in ("none", "unbalance"):
        m = model(modulation=modulation, faults={"outer"})
        x = simulate(m, FS_HZ, SECONDS, seed=3)
        freqs, power = welch(x, fs=FS_HZ, nperseg=FS_HZ, scaling="spectrum")
        band = (freqs > 5.0) & (freqs < 200.0)
        assert freqs[band][np.argmax(power[band])] == pytest.approx(SHAFT_HZ)
        one_x = math.sqrt(2.0 * power[np.argmin(np.abs(freqs - SHAFT_HZ))])
        two_x = math.sqrt(2.0 * power[np.argmin(np.abs(freqs - 2 * SHAFT_HZ))])
        assert one_x == pytest.approx(m.one_x_m_s2, rel=0.05)
        assert two_x == pytest.approx(m.two_x_m_s2, rel=0.1)
    assert model(modulation="unbalance").one_x_m_s2 > model(modulation="gravity").one_x_m_s2


def test_noise_is_gaussian_with_the_given_rms():
    # sample standard deviation of 128000 N(0, 0.5**2) samples: relative error ~ 1/sqrt(2N)
    x = simulate(model(one_x_m_s2=0.0, two_x_m_s2=0.0), FS_HZ, SECONDS, seed=8)
    assert x.std() == pytest.approx(0.5, rel=0.01)
    assert abs(x.mean()) < 0.01
    # kurtosis of a Gaussian is 3 (from memory)
    assert np.mean((x - x.mean()) ** 4) / x.var() ** 2 == pytest.approx(3.0, abs=0.1)


def test_ring_down_is_a_sampled_second_order_resonance():
    # impulse response of a 2nd-order system exp(-zeta w t) sin(w_d t), sampled,
    # obeys x[n] = 2 r cos(theta) x[n-1] - r**2 x[n-2] with r = exp(-zeta w T),
    # theta = w_d T (z-transform of a damped sine, any DSP text); it may only be
    # broken at the two first samples of each impact (and by 1e-4 at truncation)
    fs = 51200
    zeta, f_n = 0.07, 3000.0
    m = model(faults={"inner"}, jitter=0.0, noise_rms_m_s2=0.0, one_x_m_s2=0.0,
              two_x_m_s2=0.0, impact_m_s2=4.0, resonance_hz=f_n, damping_ratio=zeta)
    sim = BearingSimulator(m, fs, seed=1, frame_samples=1000)  # rings cross frame edges
    x = np.empty(fs)
    sim.fill(x)
    w = 2 * math.pi * f_n
    r = math.exp(-zeta * w / fs)
    theta = w * math.sqrt(1 - zeta ** 2) / fs
    residual = x[2:] - 2 * r * math.cos(theta) * x[1:-1] + r * r * x[:-2]
    impacts = RATES_HZ["inner"] * 1.0
    assert np.count_nonzero(np.abs(residual) > 1e-3 * 4.0) <= 2 * (impacts + 1)
    # each impact peaks at impact_m_s2 (17 samples per cycle: sampled peak >= cos(pi/17))
    assert x.max() == pytest.approx(4.0, rel=0.02)
    assert x.max() <= 4.0 + 1e-12


def test_frame_grid_does_not_change_the_signal():
    # ring-down tails carry across internal frames: a fine grid gives the same signal
    m = model(faults={"outer", "inner", "rolling"}, modulation="both", speed_wander=0.02)
    a = np.empty(2 * FS_HZ)
    b = np.empty(2 * FS_HZ)
    BearingSimulator(m, FS_HZ, seed=9).fill(a)
    BearingSimulator(m, FS_HZ, seed=9, frame_samples=300).fill(b)
    np.testing.assert_allclose(a, b, rtol=0, atol=1e-12)


def test_block_size_does_not_change_the_signal():
    m = model(faults={"outer", "rolling"}, modulation="both")
    whole = np.empty(FS_HZ)
    BearingSimulator(m, FS_HZ, seed=21).fill(whole)
    sim = BearingSimulator(m, FS_HZ, seed=21)
    pieces = np.empty(FS_HZ)
    for block in np.split(pieces, 100):
        sim.fill(block)
    np.testing.assert_array_equal(pieces, whole)
    sim = BearingSimulator(m, FS_HZ, seed=21)
    uneven = np.empty(FS_HZ)
    cuts = np.sort(np.random.default_rng(0).integers(0, FS_HZ, 40))
    for block in np.split(uneven, cuts):
        assert sim.fill(block) == block.size
    np.testing.assert_array_equal(uneven, whole)
    assert sim.samples_delivered == FS_HZ
    np.testing.assert_array_equal(simulate(m, FS_HZ, 1.0, seed=21), whole)


def test_fill_does_not_grow_memory():
    sim = BearingSimulator(model(faults={"outer", "inner", "rolling"}, modulation="both",
                                 speed_wander=0.01), 51200, seed=1)
    out = np.empty(512)
    for _ in range(200):
        sim.fill(out)
    tracemalloc.start()
    try:
        for _ in range(500):
            sim.fill(out)
        after_500 = tracemalloc.get_traced_memory()[0]
        for _ in range(3000):
            sim.fill(out)
        after_3500, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert after_3500 - after_500 < 1024
    assert peak < 16 * 1024  # only small per-call objects, no block-sized arrays


def test_set_impact_changes_the_defect_strength():
    quiet = dict(noise_rms_m_s2=0.0, one_x_m_s2=0.0, two_x_m_s2=0.0)
    sim = BearingSimulator(model(faults={"outer"}, **quiet), FS_HZ, seed=3)
    x = np.empty(FS_HZ)
    sim.fill(x)
    assert x.max() == pytest.approx(3.0, rel=0.05)
    sim.set_impact(6.0)
    sim.fill(x)
    assert x[-FS_HZ // 2:].max() == pytest.approx(6.0, rel=0.05)
    sim.set_impact(0.0)
    sim.fill(x)
    np.testing.assert_array_equal(x[-FS_HZ // 4:], 0.0)
    assert sim.model.impact_m_s2 == 0.0


def test_set_model_adds_a_fault_while_running():
    sim = BearingSimulator(model(), FS_HZ, seed=6)
    x = np.empty(int(SECONDS * FS_HZ))
    sim.fill(x[:FS_HZ])
    sim.set_model(model(faults={"inner"}, modulation="gravity", damping_ratio=0.01))
    sim.fill(x)
    assert line_snr(*envelope_spectrum(x), RATES_HZ["inner"]) > 20.0


def test_speed_wander_keeps_the_mean_defect_rate():
    # +-1 % slow speed variation: the envelope line stays at BPFO within the wander
    x = simulate(model(faults={"outer"}, speed_wander=0.01), FS_HZ, SECONDS, seed=12)
    freqs, spec = envelope_spectrum(x)
    band = (freqs > 20.0) & (freqs < 400.0)
    assert freqs[band][np.argmax(spec[band])] == pytest.approx(RATES_HZ["outer"], rel=0.012)


@pytest.mark.parametrize("changes,name", [
    (dict(shaft_hz=0.0), "shaft_hz"),
    (dict(shaft_hz=float("nan")), "shaft_hz"),
    (dict(orders=(3.5, 5.4, 2.3, 0.4)), "orders"),
    (dict(faults={"cage"}), "faults"),
    (dict(faults="outer"), "faults"),
    (dict(modulation="sideways"), "modulation"),
    (dict(impact_m_s2=-1.0), "impact_m_s2"),
    (dict(modulation_depth=1.5), "modulation_depth"),
    (dict(resonance_hz=0.0), "resonance_hz"),
    (dict(damping_ratio=1.0), "damping_ratio"),
    (dict(damping_ratio=0.0), "damping_ratio"),
    (dict(jitter=0.5), "jitter"),
    (dict(one_x_m_s2=-0.1), "one_x_m_s2"),
    (dict(two_x_m_s2=float("inf")), "two_x_m_s2"),
    (dict(noise_rms_m_s2=-0.5), "noise_rms_m_s2"),
    (dict(speed_wander=0.5), "speed_wander"),
    (dict(impact_m_s2=True), "impact_m_s2"),
])
def test_bad_model_fields_raise(changes, name):
    with pytest.raises(ValueError, match=name):
        model(**changes)


def test_bad_simulator_arguments_raise():
    with pytest.raises(ValueError, match="Nyquist"):
        BearingSimulator(model(resonance_hz=3000.0), 6000)
    with pytest.raises(ValueError, match="sample_rate_hz"):
        BearingSimulator(model(), 0)
    with pytest.raises(ValueError, match="model"):
        BearingSimulator("pump", FS_HZ)
    with pytest.raises(ValueError, match="frame_samples"):
        BearingSimulator(model(), FS_HZ, frame_samples=0)
    with pytest.raises(ValueError, match="seconds"):
        simulate(model(), FS_HZ, -1.0)
    sim = BearingSimulator(model(), FS_HZ)
    with pytest.raises(ValueError, match="float64"):
        sim.fill(np.empty(10, dtype=np.float32))
    with pytest.raises(ValueError, match="float64"):
        sim.fill(np.empty((10, 2)))
    with pytest.raises(ValueError, match="impact_m_s2"):
        sim.set_impact(-2.0)
    with pytest.raises(ValueError, match="Nyquist"):
        sim.set_model(model(resonance_hz=7000.0))


def test_modulation_names_are_the_documented_ones():
    assert MODULATIONS == ("none", "unbalance", "gravity", "both")
    assert model(faults=["outer", "inner"]).faults == frozenset({"outer", "inner"})


def test_set_model_keeps_the_shaft_phase_continuous():
    # a pure 1x tone: after a speed change the waveform continues without a jump
    # (|dx/dt| <= 2 pi f A, so one sample step is at most 2 pi f A / fs)
    tone = dict(noise_rms_m_s2=0.0, one_x_m_s2=1.0, two_x_m_s2=0.0)
    sim = BearingSimulator(model(**tone), FS_HZ, seed=7, frame_samples=1000)
    ref = BearingSimulator(model(**tone), FS_HZ, seed=7, frame_samples=1000)
    x = np.empty(4 * FS_HZ)
    y = np.empty(4 * FS_HZ)
    sim.fill(x[:1500])
    ref.fill(y)
    # a long ring-down (kernel longer than the 1000-sample frame) forces a reallocation
    sim.set_model(model(shaft_hz=40.0, damping_ratio=0.005, resonance_hz=500.0, **tone))
    sim.fill(x[1500:])
    np.testing.assert_allclose(x[:2000], y[:2000], rtol=0, atol=1e-12)  # generated before
    step_limit = 2 * math.pi * 40.0 * 1.0 / FS_HZ
    assert np.abs(np.diff(x)).max() <= step_limit * 1.0001
    freqs, power = welch(x[FS_HZ:], fs=FS_HZ, nperseg=FS_HZ, scaling="spectrum")
    assert freqs[np.argmax(power)] == pytest.approx(40.0)
