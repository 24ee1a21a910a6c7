"""The analysis core (agent.dsp and the pipeline) against outside references.

References used (named again beside each check):

- bearing kinematics: T. A. Harris, M. N. Kotzalas, "Rolling Bearing
  Analysis", 5th ed., 2006; R. B. Randall, J. Antoni, "Rolling element
  bearing diagnostics -- A tutorial", MSSP 25 (2011) 485-520, eq. (1)-(4);
- statistics, spectra and the analytic signal: scipy.stats.kurtosis,
  scipy.signal.welch, scipy.signal.hilbert (reference library);
- ISO 20816-3 (formerly ISO 10816-3) zone boundaries and measurement band;
- spectral kurtosis: J. Antoni, "The spectral kurtosis: a useful tool for
  characterising non-stationary signals", MSSP 20 (2006) 282-307;
- amplitude modulation: the trigonometric identity
  ``(1 + m cos a) cos b = cos b + m/2 cos(b - a) + m/2 cos(b + a)``.
"""

import math

import numpy as np
import pytest
import scipy.signal
import scipy.stats

from agent.config import parse_config
from agent.dsp.bearing import DefectOrders, defect_frequencies_hz, defect_orders
from agent.dsp.envelope import band_analytic
from agent.dsp.iso import iso_zone, velocity_band_hz, zone_limits_mm_s
from agent.dsp.kurtogram import BandKurtosis, candidate_bands
from agent.dsp.levels import Moments, crest_factor, kurtosis, rms
from agent.dsp.peaks import sideband_ratio
from agent.dsp.spectrum import hann, velocity_rms_mm_s, welch_psd
from agent.dsp.speed import refine_shaft_hz
from agent.pipeline import Pipeline
from agent.simulate import BearingSimulator, MachineModel

FS_HZ = 51200.0


def make_point(machine=None, bearing=None, envelope=None):
    """PointSettings through the real config parser (one [[point]] table)."""
    table = {"name": "raw-water-pump-2-de"}
    if machine:
        table["machine"] = machine
    if bearing:
        table["bearing"] = bearing
    if envelope:
        table["envelope"] = envelope
    return parse_config({"point": [table]}).points[0]


def _band_len(nb):
    """Inverse-FFT length with room for the squared envelope: a power of two >= 2 nb."""
    return 1 << int(2 * nb - 1).bit_length()


def tone(freq_hz, amplitude, seconds, fs=FS_HZ, phase=0.3):
    t = np.arange(int(round(seconds * fs))) / fs
    return amplitude * np.cos(2.0 * np.pi * freq_hz * t + phase)


# --------------------------------------------------------------------------- 1. bearing formulas

def test_bpfo_plus_bpfi_equals_ball_count_for_random_geometries():
    # Harris & Kotzalas 2006; Randall & Antoni 2011 eq. (1)-(2): BPFO + BPFI = n
    # and BPFO = n * FTF (eq. (3)), for any geometry and contact angle.
    rng = np.random.default_rng(20816)
    for _ in range(500):
        n = int(rng.integers(3, 40))
        pitch = float(rng.uniform(10.0, 400.0))
        ball = float(rng.uniform(0.05, 0.45)) * pitch
        angle = float(rng.uniform(0.0, 60.0))
        o = defect_orders(n, ball, pitch, angle)
        assert o.bpfo + o.bpfi == pytest.approx(n, rel=1e-12)
        assert o.bpfo == pytest.approx(n * o.ftf, rel=1e-12)
        # Randall & Antoni 2011 eq. (4): BSF = D/(2d) (1 - (d/D cos phi)^2)
        r = ball / pitch * math.cos(math.radians(angle))
        assert o.bsf == pytest.approx(pitch / (2.0 * ball) * (1.0 - r * r), rel=1e-12)
        assert 0.0 < o.ftf < 0.5 and o.bpfo < n / 2.0 < o.bpfi


def test_seven_ball_pump_bearing_at_1500_rpm():
    # common practice: a 7-ball bearing with d/D about 0.27 on a 25 Hz shaft puts
    # BPFO near 64 Hz and BPFI near 110 Hz
    freqs = defect_frequencies_hz(defect_orders(7, 6.75, 25.0), 25.0)
    assert freqs["bpfo"] == pytest.approx(64.0, abs=3.0)
    assert freqs["bpfi"] == pytest.approx(110.0, abs=3.0)


def test_rule_of_thumb_forty_and_sixty_percent():
    # common practice: BPFO ~ 0.4 n fr and BPFI ~ 0.6 n fr for ordinary ball bearings
    for n, d, pitch in ((8, 7.94, 38.5), (9, 7.94, 39.04), (10, 9.53, 46.0), (12, 7.94, 52.0)):
        o = defect_orders(n, d, pitch)
        assert o.bpfo / n == pytest.approx(0.4, abs=0.05)
        assert o.bpfi / n == pytest.approx(0.6, abs=0.05)


def test_published_test_rig_bearing_factors():
    # from memory: the widely used bearing test-rig drive-end bearing (9 balls,
    # d = 7.94 mm, D = 39.04 mm, 0 deg) is published with BPFO 3.5848, BPFI 5.4152,
    # FTF 0.39828 and a rolling-element defect factor (2xBSF) of 4.7135 x shaft
    o = defect_orders(9, 7.94, 39.04, 0.0)
    assert o.bpfo == pytest.approx(3.5848, abs=5e-4)
    assert o.bpfi == pytest.approx(5.4152, abs=5e-4)
    assert o.ftf == pytest.approx(0.3983, abs=5e-4)
    assert 2.0 * o.bsf == pytest.approx(4.7135, abs=5e-4)
    f = defect_frequencies_hz(o, 29.95)  # 1797 r/min
    assert f["bpfo"] == pytest.approx(3.5848 * 29.95, rel=2e-4)
    assert f["bsf2"] == pytest.approx(2.0 * f["bsf"], rel=1e-12)


def test_contact_angle_narrows_the_spread():
    # Harris & Kotzalas 2006: r = d/D cos(phi), so BPFI - BPFO = n r shrinks and
    # both rates move towards n/2 as the contact angle grows
    spreads = [defect_orders(12, 10.0, 50.0, a) for a in (0.0, 15.0, 25.0, 40.0)]
    for a, b in zip(spreads, spreads[1:]):
        assert b.bpfi - b.bpfo < a.bpfi - a.bpfo
        assert b.bpfo > a.bpfo and b.bpfi < a.bpfi
        assert b.bpfo + b.bpfi == pytest.approx(12.0)
    o = defect_orders(12, 10.0, 50.0, 40.0)
    assert o.bpfi - o.bpfo == pytest.approx(12 * 0.2 * math.cos(math.radians(40.0)), rel=1e-12)


@pytest.mark.parametrize("args", [
    (2, 7.94, 39.04), (7.5, 7.94, 39.04), (True, 7.94, 39.04), ("9", 7.94, 39.04),
    (9, 0.0, 39.04), (9, -1.0, 39.04), (9, 7.94, 0.0), (9, 39.04, 39.04), (9, 40.0, 39.04),
    (9, math.nan, 39.04), (9, 7.94, math.inf), (9, 7.94, 39.04, 90.0), (9, 7.94, 39.04, -1.0),
    (9, 7.94, 39.04, math.nan),
])
def test_bad_geometry_raises(args):
    # common practice (scipy style): every bad parameter raises ValueError
    with pytest.raises(ValueError):
        defect_orders(*args)


def test_bad_orders_and_speed_raise():
    with pytest.raises(ValueError):
        DefectOrders(bpfo=-1.0, bpfi=5.0, bsf=2.0, ftf=0.4)
    with pytest.raises(ValueError):
        DefectOrders(bpfo=3.5, bpfi=math.nan, bsf=2.0, ftf=0.4)
    for shaft_hz in (0.0, -25.0, math.nan, math.inf):
        with pytest.raises(ValueError):
            defect_frequencies_hz(defect_orders(9, 7.94, 39.04), shaft_hz)


# --------------------------------------------------------------------------- 2. levels

def stream(x, sizes, max_block=4096):
    mom = Moments(max_block)
    pos, i = 0, 0
    while pos < x.size:
        n = sizes[i % len(sizes)]
        mom.add(x[pos:pos + n])
        pos += n
        i += 1
    return mom


def test_sine_crest_factor_and_kurtosis():
    # from memory (textbook values): a sine has crest factor sqrt(2) and Pearson
    # kurtosis 1.5; checked against scipy.stats.kurtosis(fisher=False) as well
    x = tone(50.0, 3.0, 1.0, fs=10000.0, phase=0.0) + 7.0   # whole periods, samples on the peaks
    mom = stream(x, [1, 999, 4096, 17, 2500])
    assert mom.crest_factor == pytest.approx(math.sqrt(2.0), rel=1e-6)
    assert mom.kurtosis == pytest.approx(1.5, rel=1e-9)
    assert mom.rms == pytest.approx(3.0 / math.sqrt(2.0), rel=1e-9)
    assert kurtosis(x) == pytest.approx(scipy.stats.kurtosis(x, fisher=False), rel=1e-9)
    assert crest_factor(x) == pytest.approx(math.sqrt(2.0), rel=1e-6)


def test_gaussian_kurtosis_is_three():
    # from memory: Pearson kurtosis of Gaussian noise is 3; the estimator's standard
    # deviation is sqrt(24 / n) ~ 0.005 for 1e6 samples, so +-0.05 is ten sigma
    x = np.random.default_rng(3).normal(0.2, 1.7, 1_000_000)
    mom = stream(x, [4096, 333, 1, 2048, 4000])
    assert mom.kurtosis == pytest.approx(3.0, abs=0.05)
    assert mom.kurtosis == pytest.approx(scipy.stats.kurtosis(x, fisher=False, bias=True), rel=1e-9)
    assert mom.rms == pytest.approx(np.std(x), rel=1e-9)


@pytest.mark.parametrize("sizes", [[1], [7, 4096, 13], [4096], [1000, 1, 2999, 64]])
def test_streaming_equals_whole_array(sizes):
    # reference library: numpy / scipy.stats on the whole array
    rng = np.random.default_rng(len(sizes))
    x = np.concatenate([rng.standard_normal(20000) * 0.5 + 100.0,          # large mean
                        rng.standard_t(3, 20000),                           # heavy tails
                        tone(123.0, 2.0, 0.5, fs=51200.0)])
    mom = stream(x, sizes)
    d = x - x.mean()
    assert mom.n == x.size
    assert mom.mean == pytest.approx(x.mean(), rel=1e-9)
    assert mom.rms == pytest.approx(rms(x), rel=1e-9)
    assert mom.rms == pytest.approx(np.std(x), rel=1e-9)
    assert mom.kurtosis == pytest.approx(scipy.stats.kurtosis(x, fisher=False), rel=1e-9)
    assert mom.m3 / x.size == pytest.approx(np.mean(d ** 3), rel=1e-9)
    assert mom.peak == pytest.approx(np.max(np.abs(d)), rel=1e-12)
    assert mom.crest_factor == pytest.approx(crest_factor(x), rel=1e-9)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_a_constant_signal_has_no_peak(dtype):
    # definition: a constant has no excursion from its mean (peak 0, crest factor 0),
    # however the block means round; its RMS is 0 to the rounding of the block sums
    value = 0.0078125 * 3.3
    mom = Moments(8192, dtype=dtype)
    for _ in range(7):
        mom.add(np.full(8192, value, dtype=dtype))
    mom.add(np.full(100, value, dtype=dtype))
    assert mom.peak == 0.0 and mom.crest_factor == 0.0
    assert mom.rms <= 64 * np.finfo(dtype).eps * value


def test_moments_refuses_oversized_block():
    with pytest.raises(ValueError):
        Moments(0)
    with pytest.raises(ValueError):
        Moments(16).add(np.zeros(17))
    with pytest.raises(ValueError, match="float32"):
        Moments(16, dtype=np.float32).add(np.zeros(8))       # float64 block


@pytest.mark.parametrize("offset", [0.0, 100.0])
def test_single_precision_moments_match_scipy_on_the_same_samples(offset):
    # reference library: scipy.stats / numpy in float64 on the very float32
    # samples the pipeline's levels see; single-precision block sums (BLAS
    # dot products, about 1e-7 relative) merged in float64
    rng = np.random.default_rng(17)
    x = (np.concatenate([rng.standard_t(3, 100_000), tone(123.0, 2.0, 1.0, fs=51200.0)])
         + offset).astype(np.float32)
    mom = Moments(32768, dtype=np.float32)
    for start in range(0, x.size, 32768):
        mom.add(x[start:start + 32768])
    ref = x.astype(np.float64)
    assert mom.rms == pytest.approx(np.std(ref), rel=1e-6)
    assert mom.kurtosis == pytest.approx(scipy.stats.kurtosis(ref, fisher=False), rel=1e-5)
    assert mom.peak == pytest.approx(np.max(np.abs(ref - ref.mean())), rel=1e-6)


# --------------------------------------------------------------------------- 3. velocity

def test_calibrator_tone_is_ten_mm_s_from_a_psd():
    # common practice (vibration calibrators): 10 m/s^2 RMS at 159.15 Hz
    # (omega = 1000 rad/s) is 10 mm/s RMS
    f0 = 1000.0 / (2.0 * math.pi)
    x = tone(f0, 10.0 * math.sqrt(2.0), 8.0)
    f, psd = welch_psd(x, FS_HZ, 32768)
    assert velocity_rms_mm_s(psd, f[1], 10.0, 1000.0) == pytest.approx(10.0, rel=2e-3)


def test_calibrator_tone_through_the_pipeline():
    # common practice (vibration calibrators): 10 m/s^2 RMS at 159.15 Hz -> 10.0 mm/s
    pl = Pipeline(make_point(), FS_HZ, 10.0)
    a = pl.analyze(tone(1000.0 / (2.0 * math.pi), 10.0 * math.sqrt(2.0), 10.0))
    assert a.levels["velocity_rms_mm_s"] == pytest.approx(10.0, rel=2e-3)
    assert a.levels["accel_rms_m_s2"] == pytest.approx(10.0, rel=1e-3)
    # ISO 20816-3 (from memory): 10 mm/s is zone D for group 2 rigid (above 4.5)
    assert a.levels["iso_zone"] == "D"


@pytest.mark.parametrize("freq_hz", [5.0, 1500.0])
def test_tone_outside_the_band_contributes_nothing(freq_hz):
    # ISO 20816-3 (from memory): the broadband value covers 10-1000 Hz; a tone
    # outside it, at the calibrator level, must add next to nothing
    pl = Pipeline(make_point(), FS_HZ, 10.0)
    rng = np.random.default_rng(5)
    base = tone(80.0, 0.5, 10.0) + 0.01 * rng.standard_normal(int(10 * FS_HZ))
    v_base = pl.analyze(base).levels["velocity_rms_mm_s"]
    v_with = pl.analyze(base + tone(freq_hz, 10.0 * math.sqrt(2.0), 10.0)).levels["velocity_rms_mm_s"]
    in_band = 10.0 / (2.0 * math.pi * freq_hz) * 1000.0   # what the tone would read in band
    assert math.sqrt(max(v_with ** 2 - v_base ** 2, 0.0)) < 0.005 * in_band


def test_velocity_band_follows_machine_speed():
    # ISO 20816-3 (from memory): 10-1000 Hz, or 2-1000 Hz below 600 r/min
    assert velocity_band_hz(1485 / 60.0) == (10.0, 1000.0)
    assert velocity_band_hz(480 / 60.0) == (2.0, 1000.0)
    assert velocity_band_hz(480 / 60.0, lowest_trusted_hz=10.0) == (10.0, 1000.0)
    slow = Pipeline(make_point(machine={"shaft_hz": 8.0}), FS_HZ, 10.0)
    fast = Pipeline(make_point(machine={"shaft_hz": 24.75}), FS_HZ, 10.0)
    x = tone(60.0, 1.0, 10.0)
    assert slow.analyze(x).levels["velocity_band_hz"] == [2.0, 1000.0]
    assert fast.analyze(x).levels["velocity_band_hz"] == [10.0, 1000.0]
    # a 5 Hz line counts on the slow machine, not on the fast one (ISO 20816-3, from memory)
    low = tone(5.0, 1.0, 10.0)
    v_slow = slow.analyze(low).levels["velocity_rms_mm_s"]
    assert v_slow == pytest.approx(1000.0 / (2.0 * math.pi * 5.0) / math.sqrt(2.0), rel=0.01)
    assert fast.analyze(low).levels["velocity_rms_mm_s"] < 0.01 * v_slow


def test_velocity_rejects_bad_band():
    psd = np.ones(100)
    for lo, hi in ((0.0, 100.0), (50.0, 10.0), (-1.0, 10.0)):
        with pytest.raises(ValueError):
            velocity_rms_mm_s(psd, 1.0, lo, hi)


# --------------------------------------------------------------------------- 4. Welch scaling

@pytest.mark.parametrize("nperseg", [
    1000, 4096,
    1001,
])
def test_welch_psd_matches_scipy(nperseg):
    # reference library: scipy.signal.welch, Hann window, 50 % overlap, mean removed
    rng = np.random.default_rng(nperseg)
    x = rng.standard_normal(30011) + tone(440.0, 2.0, 30011 / FS_HZ) + 0.7
    f, p = welch_psd(x, FS_HZ, nperseg)
    f_ref, p_ref = scipy.signal.welch(x, FS_HZ, window="hann", nperseg=nperseg,
                                      noverlap=nperseg // 2, detrend="constant")
    np.testing.assert_allclose(f, f_ref, rtol=1e-12)
    np.testing.assert_allclose(p, p_ref, rtol=1e-10, atol=1e-10 * p_ref.max())
    np.testing.assert_allclose(hann(nperseg), scipy.signal.get_window("hann", nperseg), atol=1e-15)


def _velocity_from_psd(f, p, lo_hz, hi_hz):
    """Independent velocity RMS: PSD / (2 pi f)^2 summed over the band (Parseval)."""
    sel = (f >= lo_hz) & (f <= hi_hz)
    return 1000.0 * math.sqrt(float(np.sum(p[sel] / (2.0 * np.pi * f[sel]) ** 2)) * (f[1] - f[0]))


def test_pipeline_psd_matches_scipy_through_velocity():
    # reference library: scipy.signal.welch with the pipeline's segment length;
    # the pipeline's velocity RMS is a weighted sum of its internal PSD, so any
    # scaling, overlap or windowing difference shows up here
    rng = np.random.default_rng(11)
    x = (rng.standard_normal(int(7.3 * FS_HZ)) * 0.8 + tone(24.75, 1.0, 7.3)
         + tone(300.0, 0.4, 7.3) + 0.05)
    pl = Pipeline(make_point(), FS_HZ, 7.3)
    n = pl.nperseg
    f, p = scipy.signal.welch(x, FS_HZ, window="hann", nperseg=n, noverlap=n // 2,
                              detrend="constant")
    lo, hi = pl.velocity_band_hz
    v_ref = _velocity_from_psd(f, p, lo, hi)
    # streamed in uneven blocks, as the acquisition does
    pl.start()
    pos = 0
    for size in [1, 5000, 12345, 8192, 3] * 1000:
        if pos >= x.size:
            break
        pl.feed(x[pos:pos + size])
        pos += size
    a = pl.finish()
    # the pipeline's segment FFT runs in float32 (agent/dsp/fastfft.py): its
    # round-off is about 1e-7 of the result, the pure function's 1e-16
    assert a.levels["velocity_rms_mm_s"] == pytest.approx(v_ref, rel=1e-6)
    assert velocity_rms_mm_s(p, f[1], lo, hi) == pytest.approx(v_ref, rel=1e-10)
    # the whole-array call gives the same
    assert pl.analyze(x).levels["velocity_rms_mm_s"] == pytest.approx(v_ref, rel=1e-6)


# --------------------------------------------------------------------------- 5. envelope

def test_band_analytic_equals_scipy_hilbert_on_bin_centred_signal():
    # reference library: scipy.signal.hilbert; with every component on a bin
    # centre the rectangular-window band cut is exact
    n = 8192
    df = FS_HZ / n
    t = np.arange(n) / FS_HZ
    m = 0.5
    fc, fm = 480 * df, 13 * df
    in_band = ((1.0 + m * np.cos(2 * np.pi * fm * t + 0.3)) * np.cos(2 * np.pi * fc * t + 1.1)
               + 0.3 * np.cos(2 * np.pi * (fc + 100 * df) * t + 0.2))
    out_band = 2.0 * np.cos(2 * np.pi * 20 * df * t)     # far below the band
    lo_bin, hi_bin = 400, 600
    mlen = _band_len(hi_bin - lo_bin)
    z = band_analytic(np.fft.rfft(in_band + out_band), n, lo_bin, hi_bin, np.empty(mlen, complex))
    ref = np.abs(scipy.signal.hilbert(in_band))[::n // mlen]
    np.testing.assert_allclose(np.abs(z), ref, atol=1e-9)


def test_band_analytic_matches_scipy_hilbert_mid_segment():
    # reference library: scipy.signal.hilbert of the long in-band signal; one
    # unwindowed segment cut from its middle, compared on the decimated grid in
    # the middle half of the segment (the rectangular cut leaks at the edges)
    n = 8192
    total = 4 * n
    t = np.arange(total) / FS_HZ
    rng = np.random.default_rng(8)
    m = 0.5
    am = (1.0 + m * np.cos(2 * np.pi * 80.0 * t + 0.3)) * np.cos(2 * np.pi * 3000.0 * t + 1.1)
    spec = np.fft.rfft(rng.standard_normal(total))
    f = np.fft.rfftfreq(total, 1.0 / FS_HZ)
    spec[(f < 2600.0) | (f > 3600.0)] = 0.0                  # band-limited noise
    noise = np.fft.irfft(spec, total)
    noise *= 0.2 / noise.std()
    in_band = am + 0.4 * np.cos(2 * np.pi * 3410.3 * t) + noise
    x = in_band + 2.0 * np.cos(2 * np.pi * 211.7 * t)        # out of band
    analytic = scipy.signal.hilbert(in_band)
    s0 = 3 * n // 2
    df = FS_HZ / n
    lo_bin, hi_bin = int(2000.0 / df), int(4000.0 / df)
    mlen = _band_len(hi_bin - lo_bin)
    z = band_analytic(np.fft.rfft(x[s0:s0 + n]), n, lo_bin, hi_bin, np.empty(mlen, complex))
    ref_sq = np.abs(analytic[s0:s0 + n:n // mlen]) ** 2
    mid = slice(mlen // 4, 3 * mlen // 4)
    err = np.abs(np.abs(z[mid]) ** 2 - ref_sq[mid])
    assert err.max() < 0.02 * ref_sq.mean()


def _hann2_gain(offset_bins, mlen=4096):
    """DTFT of the squared periodic Hann taper at a fraction of a bin, normalised."""
    k = np.arange(mlen)
    w = (0.5 - 0.5 * np.cos(2 * np.pi * k / mlen)) ** 2
    return abs(np.sum(w * np.exp(-2j * np.pi * offset_bins * k / mlen))) / w.sum()


@pytest.mark.parametrize("m", [0.1, 0.3, 0.6, 1.0])
@pytest.mark.parametrize("on_bin", [True, False])
def test_pipeline_envelope_lines_of_am(m, on_bin):
    # from memory (trigonometry): for A (1 + m cos) cos(carrier) the squared
    # envelope is A^2 (1 + m^2/2 + 2 m cos + m^2/2 cos 2.); Randall & Antoni 2011
    # sec. 3 (squared envelope spectrum); off a bin centre the line reads the
    # taper's own gain at that offset (scalloping), computed here from its DTFT
    pl = Pipeline(make_point(envelope={"band_hz": [2000.0, 4000.0]}), FS_HZ, 10.0)
    df = pl.df_hz
    fm = 102 * df if on_bin else 80.0
    amp_c = 2.0
    t = np.arange(int(10 * FS_HZ)) / FS_HZ
    x = (amp_c * (1 + m * np.cos(2 * np.pi * fm * t + 0.4)) * np.cos(2 * np.pi * 3000.3 * t + 1.0)
         + 0.5 * np.sin(2 * np.pi * 24.75 * t)
         + 0.01 * np.random.default_rng(1).standard_normal(t.size))
    a = pl.analyze(x)
    assert not a.quality
    freqs, amp = a.envelope_spectrum()
    assert freqs[1] == pytest.approx(df)
    for harmonic, expected in ((1, 2 * m * amp_c ** 2), (2, m * m / 2 * amp_c ** 2)):
        f = harmonic * fm
        k = int(round(f / df))
        gain = _hann2_gain(f / df - k)
        assert amp[k - 1:k + 2].max() == pytest.approx(expected * gain, rel=0.02)


# --------------------------------------------------------------------------- 6. sidebands

@pytest.mark.parametrize("m", [0.1, 0.3, 0.6, 1.0])
def test_sideband_ratio_is_modulation_depth(m):
    # from memory (trigonometry): (1 + m cos a) cos b has two sidebands of m/2 each;
    # the spacing is a whole number of bins so all three lines see the same Hann
    # scalloping (the carrier itself is off a bin centre)
    n = 65536
    fs = 12800.0
    t = np.arange(n) / fs
    fc, fm = 1000.37, 127 * fs / n
    x = (1 + m * np.cos(2 * np.pi * fm * t + 0.2)) * np.cos(2 * np.pi * fc * t + 0.9)
    w = hann(n)
    amp = np.abs(np.fft.rfft(x * w)) * 2.0 / w.sum()       # Hann amplitude spectrum
    df = fs / n
    ratio, lower, upper = sideband_ratio(amp, df, fc, fm, 2 * df)
    assert ratio == pytest.approx(m, rel=0.01)
    assert lower == pytest.approx(upper, rel=0.02)


def test_no_sideband_ratio_around_a_fundamental_lost_in_the_floor():
    # common practice: a sideband ratio describes the modulation of a line; with
    # no line at the defect frequency there is nothing to describe.  A line
    # amplitude-modulated to depth 0.5 (from memory, trigonometry: each sideband
    # is m/2 of the carrier, so the ratio is m), once present and once absent,
    # leaving the noise floor alone.
    from agent.findings import search_defect
    rng = np.random.default_rng(5)
    df, fc, fm = 0.5, 100.0, 10.0
    floor = 1e-3 * (1.0 + 0.2 * rng.random(4000))
    amp = floor.copy()
    for f, a in ((fc, 1.0), (fc - fm, 0.25), (fc + fm, 0.25)):
        amp[int(f / df)] = a
    with_line = search_defect(amp, df, fc, 3, 0.02, modulation_hz=fm)
    assert with_line["sideband_ratio"] == pytest.approx(0.5)
    only_floor = search_defect(floor, df, fc, 3, 0.02, modulation_hz=fm)
    assert only_floor["found_hz"] is not None and only_floor["snr_db"] < 6.0
    assert only_floor["sideband_ratio"] is None and only_floor["sideband_snr_db"] is None


def _comb_spectrum(df, lines, n=4000, seed=9):
    """An envelope amplitude spectrum: a rough floor near 1e-3 and lines (f, a)."""
    rng = np.random.default_rng(seed)
    amp = 1e-3 * (1.0 + 0.2 * rng.random(n))
    for f, a in lines:
        amp[int(round(f / df))] = a
    return amp


def _judged(amp, df, shaft_hz, key_hz):
    from agent.findings import count_harmonics, judge, search_defect, shaft_lines
    ev = {"bpfo": search_defect(amp, df, key_hz, 8, 0.02, modulation_hz=shaft_hz)}
    count_harmonics(ev, shaft_hz, df, standing_shaft=shaft_lines(amp, df, shaft_hz))
    return {f["defect"] for f in judge(ev, flagged=False)}


def test_a_shaft_harmonic_comb_silences_a_defect_rate_on_it():
    # common practice: looseness and rubs fill the envelope spectrum with a comb of
    # shaft harmonics; a defect rate that lies on that comb cannot be claimed from
    # the lines it shares with it.  BPFO = 2.99 x shaft, lines 1 bin from 3x, 6x, 9x.
    df, shaft, bpfo = 0.25, 10.0, 29.9
    defect = [(h * bpfo, 0.1 / h) for h in range(1, 9)]
    comb = [(k * shaft, 0.05) for k in range(1, 31)]
    assert _judged(_comb_spectrum(df, defect), df, shaft, bpfo) == {"bpfo"}
    assert _judged(_comb_spectrum(df, comb), df, shaft, bpfo) == set()
    # the comb alone, whatever the defect lines would add, is no outer-race finding
    # from lines that sit on it: with both, the fundamental stays ambiguous
    from agent.findings import count_harmonics, search_defect, shaft_lines
    amp = _comb_spectrum(df, comb + defect)
    ev = {"bpfo": search_defect(amp, df, bpfo, 8, 0.02, modulation_hz=shaft)}
    count_harmonics(ev, shaft, df, standing_shaft=shaft_lines(amp, df, shaft))
    assert ev["bpfo"]["fundamental_ambiguous"]


def test_a_ripple_on_a_strong_lines_flank_is_not_a_defect_line():
    # Randall & Antoni 2011, sec. 2.1: random slip smears the envelope lines of a
    # bearing defect; a strong line then has broad flanks, and a ripple on them is
    # no line of another defect.  A separate weak line, with a dip before it, is.
    from agent.findings import count_harmonics, judge, search_defect
    df, f0, fo = 0.5, 100.0, 107.0
    bins = np.arange(4000) * df
    strong = 1e-3 + sum(0.5 / h / (1.0 + ((bins - h * f0) / 0.8) ** 2) for h in range(1, 9))
    # a weak "defect" expected at 107 Hz, its peak at 105 Hz (the low edge of its
    # 2 % window, 5 Hz from the strong line): a ripple on the flank ...
    ripple = strong.copy()
    k = int(105.0 / df)
    ripple[k] *= 1.6
    # ... or a line of its own, two bins past a dip
    separate = 1e-3 + sum(0.5 / h / (1.0 + ((bins - h * f0) / 0.2) ** 2) for h in range(1, 9))
    separate[k] += 0.01
    for amp, present in ((ripple, False), (separate, True)):
        ev = {"bpfo": search_defect(amp, df, f0, 8, 0.02),
              "bpfi": search_defect(amp, df, fo, 1, 0.02)}
        count_harmonics(ev, 37.0, df, standing_shaft=[], amp=amp)
        assert ev["bpfi"]["snr_db"] > 10.0  # over the median floor it looks like a line
        assert ev["bpfi"]["fundamental_ambiguous"] is (not present)


def test_a_ripple_on_a_sidebands_flank_is_not_a_defect_line():
    # Randall & Antoni 2011, sec. 2.1 and 2.2: a slip-broadened outer-race line
    # under a rotating load carries 1x sidebands that are as broad as their line;
    # a ripple on a sideband's flank, 2.5 Hz from it (beyond the two bins within
    # which it would be the sideband itself), is no line of another defect
    from agent.findings import count_harmonics, search_defect
    df, f0, shaft = 0.5, 100.0, 10.0
    bins = np.arange(4000) * df
    amp = 1e-3 + sum(a / h / (1.0 + ((bins - f) / 0.8) ** 2)
                     for h in range(1, 9)
                     for f, a in ((h * f0, 0.5), (h * f0 - shaft, 0.2), (h * f0 + shaft, 0.2)))
    k = int(87.5 / df)
    amp[k] *= 2.5
    assert amp[k] > amp[k - 1] and amp[k] > amp[k + 1]   # a local maximum
    ev = {"bpfo": search_defect(amp, df, f0, 8, 0.02, modulation_hz=shaft),
          "bpfi": search_defect(amp, df, 86.5, 1, 0.02, modulation_hz=shaft)}
    count_harmonics(ev, shaft, df, standing_shaft=[], amp=amp)
    assert ev["bpfi"]["found_hz"] == pytest.approx(87.5, abs=df / 2)
    assert ev["bpfi"]["snr_db"] > 10.0  # over the median floor it looks like a line
    assert ev["bpfi"]["fundamental_ambiguous"]


def test_a_rate_without_its_own_line_cannot_claim_another_defects_harmonics():
    # from memory (harmonic arithmetic): when BPFI is 1.5 x BPFO, every 2nd BPFI
    # harmonic is a 3rd BPFO harmonic.  With a standing outer-race family and no
    # line at BPFI itself, the shared lines are the outer race's, even where the
    # geometry puts BPFI's harmonic a little nearer to them than BPFO's.
    from agent.findings import count_harmonics, judge, search_defect
    df = 0.5
    amp = _comb_spectrum(df, [(h * 100.0, 0.1 / h) for h in range(1, 17)])
    ev = {"bpfo": search_defect(amp, df, 100.1, 8, 0.02),
          "bpfi": search_defect(amp, df, 150.0, 8, 0.02)}
    count_harmonics(ev, 37.0, df, standing_shaft=[], amp=amp)
    assert ev["bpfi"]["snr_db"] < 6.0                  # no BPFI line of its own
    assert ev["bpfi"]["harmonics"] == 0
    assert {f["defect"] for f in judge(ev, flagged=False)} == {"bpfo"}


def test_a_defect_line_on_a_shaft_harmonic_cannot_be_told_from_it():
    # from memory: lines closer than about half a bin cannot be separated in a
    # Hann-windowed spectrum.  BPFO = 3.001 x shaft sits on 3x: without other
    # evidence beyond the shaft orders up to 10, no finding
    df, shaft = 0.25, 10.0
    bpfo = 30.01
    amp = _comb_spectrum(df, [(h * bpfo, 0.1 / h) for h in range(1, 4)])
    assert _judged(amp, df, shaft, bpfo) == set()


def test_sideband_ratio_bad_input():
    amp = np.ones(1000)
    with pytest.raises(ValueError):
        sideband_ratio(amp, 1.0, 100.0, 0.0, 1.0)
    assert math.isnan(sideband_ratio(amp, 1.0, 10.0, 20.0, 1.0)[0])   # lower line below 0 Hz


# --------------------------------------------------------------------------- 7. ISO zones

@pytest.mark.parametrize("value, zone", [
    (0.0, "A"), (1.39, "A"), (1.4, "B"), (1.41, "B"), (2.79, "B"), (2.8, "C"), (2.81, "C"),
    (4.49, "C"), (4.5, "D"), (4.51, "D"), (45.0, "D"),
])
def test_iso_group2_rigid(value, zone):
    # ISO 20816-3 (from memory): group 2, rigid: A/B 1.4, B/C 2.8, C/D 4.5 mm/s RMS;
    # a value on a boundary belongs to the higher zone (the module's convention)
    assert iso_zone(value, 2, "rigid") == zone
    assert iso_zone(value) == zone


def test_iso_other_groups():
    # ISO 20816-3 (from memory): group 1 rigid 2.3/4.5/7.1, group 1 flexible
    # 3.5/7.1/11.0, group 2 flexible 2.3/4.5/7.1 mm/s RMS
    assert zone_limits_mm_s(1, "rigid") == (2.3, 4.5, 7.1)
    assert zone_limits_mm_s(1, "flexible") == (3.5, 7.1, 11.0)
    assert zone_limits_mm_s(2, "flexible") == (2.3, 4.5, 7.1)
    assert zone_limits_mm_s(2, "rigid") == (1.4, 2.8, 4.5)
    assert [iso_zone(v, 1, "flexible") for v in (3.4, 3.5, 7.0, 7.1, 10.9, 11.0)] == \
        ["A", "B", "B", "C", "C", "D"]
    assert [iso_zone(v, 1, "rigid") for v in (2.2, 4.4, 7.0, 7.1)] == ["A", "B", "C", "D"]
    assert [iso_zone(v, 2, "flexible") for v in (2.2, 2.3, 4.5, 7.1)] == ["A", "B", "C", "D"]


@pytest.mark.parametrize("args", [
    (-0.1,), (math.nan,), (math.inf,), (1.0, 3, "rigid"), (1.0, 0, "rigid"),
    (1.0, 2, "soft"), (1.0, 2, "Rigid"),
])
def test_iso_bad_input(args):
    with pytest.raises(ValueError):
        iso_zone(*args)


# --------------------------------------------------------------------------- 8. spectral kurtosis

def _band_kurtosis(x, fs, nperseg, bands):
    bk = BandKurtosis(fs, nperseg, bands)
    w = hann(nperseg)
    for s in range(0, x.size - nperseg + 1, nperseg // 2):
        seg = x[s:s + nperseg]
        bk.add(np.fft.rfft((seg - seg.mean()) * w))
    return bk


@pytest.mark.parametrize("seed", [0, 1])
def test_spectral_kurtosis_of_gaussian_noise_is_zero(seed):
    # Antoni 2006: SK = <|c|^4>/<|c|^2>^2 - 2 is 0 for stationary Gaussian noise
    bands = candidate_bands(FS_HZ, 800.0, 0.0, FS_HZ / 2, levels=5)
    x = np.random.default_rng(seed).standard_normal(1_000_000)
    k = _band_kurtosis(x, FS_HZ, 8192, bands).kurtosis()
    assert len(bands) > 20
    assert np.all(np.abs(k) < 0.1)
    assert abs(float(np.mean(k))) < 0.02


def test_candidate_bands_cut_at_the_limits_keep_a_low_resonance_inside():
    # Antoni 2007: the 1/3-binary tree of the fast kurtogram; its first band of
    # each level starts at 0 Hz.  A fast shaft needs wide bands (here 3.8 kHz for
    # the envelope to hold 8 harmonics); cut back to the 500 Hz limit instead of
    # dropped, they keep a 3 kHz resonance well inside a candidate.
    fs, min_width = 48000.0, 3800.0
    bands = candidate_bands(fs, min_width, 500.0, 0.45 * fs)
    assert all(500.0 <= lo < hi <= 0.45 * fs and hi - lo >= min_width for lo, hi in bands)
    assert any(lo + 0.2 * (hi - lo) <= 3000.0 <= hi - 0.2 * (hi - lo) for lo, hi in bands)
    assert (500.0, 6000.0) in bands and (0.0, 6000.0) not in bands


def test_spectral_kurtosis_of_a_tone_is_minus_one():
    # Antoni 2006: SK of a pure sinusoid is -1
    x = tone(5010.3, 1.0, 10.0)
    bands = [(4800.0, 5600.0), (3200.0, 6400.0), (0.0, 12800.0)]
    k = _band_kurtosis(x, FS_HZ, 8192, bands).kurtosis()
    np.testing.assert_allclose(k, -1.0, atol=0.01)


def _ringing_outer_race(resonance_hz):
    """4 s of a 9-ball bearing's outer-race impacts ringing a resonance, in noise."""
    model = MachineModel(shaft_hz=24.75, orders=defect_orders(9, 7.94, 39.04),
                         faults={"outer"}, resonance_hz=resonance_hz, impact_m_s2=3.0,
                         noise_rms_m_s2=0.5)
    x = np.empty(int(4 * FS_HZ))
    BearingSimulator(model, FS_HZ, seed=4).fill(x)
    return x


def test_spectral_kurtosis_finds_the_ringing_band():
    # Antoni 2006/2007: impacts ringing a resonance give the highest SK in the band
    # that holds the resonance
    x = _ringing_outer_race(6000.0)
    bands = candidate_bands(FS_HZ, 400.0, 500.0, 0.45 * FS_HZ, levels=6)
    lo, hi, k = _band_kurtosis(x, FS_HZ, 8192, bands).best()
    assert lo <= 6000.0 <= hi and k > 1.0
    # and the pipeline's automatic band choice
    point = make_point(bearing={"balls": 9, "ball_diameter_mm": 7.94, "pitch_diameter_mm": 39.04},
                       envelope={"harmonics": 5})
    a = Pipeline(point, FS_HZ, 4.0).analyze(x)
    assert a.envelope["band_source"] == "auto"
    lo, hi = a.envelope["band_hz"]
    assert lo <= 6000.0 <= hi


def test_a_band_sharing_a_longer_transform_keeps_its_kurtosis():
    # Antoni 2007: SK is a property of the band's complex envelope, not of how
    # finely that envelope is sampled.  A band cut back at a limit is computed at
    # the transform length of its level's other bands; its SK must match the one
    # computed at its own length, and Gaussian noise must still read 0.
    x = _ringing_outer_race(3000.0)
    bands = candidate_bands(FS_HZ, 2000.0, 500.0, 0.45 * FS_HZ)
    cut = (500.0, 4266.666666666667)
    shared = _band_kurtosis(x, FS_HZ, 65536, bands)
    alone = _band_kurtosis(x, FS_HZ, 65536, [cut])
    assert shared._bins[shared.bands.index(cut)][2] > alone._bins[0][2]  # a longer transform
    k_shared = shared.kurtosis()[shared.bands.index(cut)]
    assert k_shared == pytest.approx(alone.kurtosis()[0], rel=0.05)
    noise = np.random.default_rng(2).standard_normal(1_000_000)
    assert np.all(np.abs(_band_kurtosis(noise, FS_HZ, 65536, bands).kurtosis()) < 0.1)


# --------------------------------------------------------------------------- 9. speed

def test_shaft_speed_refined_from_spectrum():
    # common practice: the 1x line near nominal gives the running speed; Gaussian
    # interpolation of a Hann-windowed line (Gasior & Gonzalez 2004) to < 0.05 Hz
    point = make_point(machine={"shaft_hz": 25.0, "speed_search": 0.05})
    rng = np.random.default_rng(9)
    x = tone(24.6, 1.0, 8.0) + tone(49.2, 0.3, 8.0) + 0.3 * rng.standard_normal(int(8 * FS_HZ))
    a = Pipeline(point, FS_HZ, 8.0).analyze(x)
    assert a.speed_source == "spectrum"
    assert a.shaft_hz == pytest.approx(24.6, abs=0.05)
    assert a.shaft_hz_nominal == 25.0
    # the function alone on a scipy Welch PSD (reference library)
    f, p = scipy.signal.welch(x, FS_HZ, window="hann", nperseg=65536, noverlap=32768)
    hz, source = refine_shaft_hz(p, f[1], 25.0, 0.05)
    assert source == "spectrum" and hz == pytest.approx(24.6, abs=0.05)


def test_shaft_speed_without_a_line_is_nominal():
    point = make_point(machine={"shaft_hz": 25.0, "speed_search": 0.05})
    x = 0.3 * np.random.default_rng(10).standard_normal(int(8 * FS_HZ))
    a = Pipeline(point, FS_HZ, 8.0).analyze(x)
    assert a.speed_source == "nominal" and a.shaft_hz == 25.0
    f, p = scipy.signal.welch(x, FS_HZ, window="hann", nperseg=65536, noverlap=32768)
    assert refine_shaft_hz(p, f[1], 25.0, 0.0) == (25.0, "nominal")
    with pytest.raises(ValueError):
        refine_shaft_hz(p, f[1], 0.0, 0.05)


def test_noise_floor_is_the_numpy_median_of_the_neighbourhood():
    # reference library: numpy.median over the bins around the centre, the
    # peak's +-3 bins left out (the definition in agent/dsp/peaks.py)
    from agent.dsp.peaks import noise_floor
    rng = np.random.default_rng(21)
    amp = rng.random(400)
    for _ in range(200):
        center_hz, half_hz = rng.uniform(10.0, 390.0), rng.uniform(1.0, 80.0)
        c = int(round(center_hz))
        hw = max(int(round(half_hz)), 7)
        lo, hi = max(c - hw, 1), min(c + hw + 1, amp.size)
        ref = np.median(np.concatenate((amp[lo:max(c - 3, lo)], amp[min(c + 4, hi):hi])))
        assert noise_floor(amp, 1.0, center_hz, half_hz) == ref
        assert noise_floor(amp.tolist(), 1.0, center_hz, half_hz) == ref


def test_noise_floor_leaves_out_the_sideband_places():
    # reference library: numpy.median over the bins left once the centre and each
    # excluded place (+-3 bins) are taken out; the neighbourhood doubles until
    # 12 bins are left (the definition in agent/dsp/peaks.py)
    from agent.dsp.peaks import noise_floor
    rng = np.random.default_rng(22)
    amp = rng.random(400)
    for _ in range(200):
        center_hz, half_hz = rng.uniform(60.0, 340.0), rng.uniform(1.0, 30.0)
        m = rng.uniform(3.0, 15.0)
        places = (center_hz - 2 * m, center_hz - m, center_hz + m, center_hz + 2 * m)
        c = int(round(center_hz))
        out = [c] + [int(round(p)) for p in places]
        hw = max(int(round(half_hz)), 7)
        for _ in range(4):
            idx = [j for j in range(max(c - hw, 1), min(c + hw + 1, amp.size))
                   if all(abs(j - e) > 3 for e in out)]
            if len(idx) >= 12:
                break
            hw *= 2
        assert noise_floor(amp, 1.0, center_hz, half_hz, exclude_hz=places) == np.median(amp[idx])


def test_sidebands_at_a_coarse_resolution_are_not_taken_for_the_floor():
    # from memory (trigonometry): amplitude modulation of depth m puts sidebands of
    # m/2 of the line at +-fm, so the ratio (lower + upper) / line is m.  A line at
    # 37.5 Hz modulated at 10.6 Hz, seen with 1.56 Hz bins (a 2 s capture at
    # 51.2 kHz), its lines slip-broadened (2 Hz half-width): the sidebands fill
    # most of the line's neighbourhood, and the floor must be measured beside them.
    from agent.findings import search_defect
    df, fc, fm, m = 1.5625, 37.5, 10.6, 0.8
    bins = np.arange(2000) * df
    amp = 1e-3 + sum(a / h / (1.0 + ((bins - f) / 2.0) ** 2)
                     for h in range(1, 9)
                     for f, a in ((h * fc, 0.5), (h * fc - fm, 0.5 * m / 2), (h * fc + fm, 0.5 * m / 2)))
    ev = search_defect(amp, df, fc, 8, 0.02, modulation_hz=fm)
    assert ev["sideband_ratio"] == pytest.approx(m, rel=0.25)
    assert ev["sideband_snr_db"] >= 6.0
    assert ev["snr_db"] >= 10.0


def test_sidebands_within_the_lines_own_width_are_not_measured():
    # from memory: a Hann-windowed line spans +-2 bins; sidebands nearer than 2.5
    # bins are part of the line's own shape, and a "ratio" of them would read any
    # line as modulated.  An unmodulated line at 3.1 Hz bins (a 1 s capture at
    # 51.2 kHz), with a 5 Hz cage rate: no ratio, and the finding says why.
    from agent.findings import count_harmonics, judge, search_defect
    df, f0 = 3.125, 100.0
    bins = np.arange(2000) * df
    amp = 1e-3 + sum(0.5 / h / (1.0 + ((bins - h * f0) / 2.0) ** 2) for h in range(1, 9))
    ev = {"bsf": search_defect(amp, df, f0, 8, 0.02, modulation_hz=5.0)}
    assert ev["bsf"]["sideband_ratio"] is None and not ev["bsf"]["sidebands_resolved"]
    count_harmonics(ev, 37.0, df, standing_shaft=[], amp=amp)
    (finding,) = judge(ev, flagged=False)
    assert finding["modulation"] == "none" and "capture is too short" in finding["text"]
    # 8 bins away, the same line is judged as before
    resolved = search_defect(amp, df, f0, 8, 0.02, modulation_hz=25.0)
    assert resolved["sidebands_resolved"] and resolved["sideband_ratio"] is not None


def test_list_median_is_the_numpy_median():
    # reference library: numpy.median (odd and even counts, one value, ties)
    from agent.dsp.peaks import list_median
    rng = np.random.default_rng(23)
    for size in (1, 2, 3, 8, 31, 64):
        v = rng.random(size)
        assert list_median(v.tolist()) == np.median(v)
    assert list_median([2.0, 1.0, 2.0, 5.0]) == np.median([2.0, 1.0, 2.0, 5.0]) == 2.0


def test_peak_search_reads_a_list_as_it_reads_the_array():
    # reference library: numpy.argmax picks the first of equal largest bins;
    # the searches take the spectrum as an array or as a list, with the same result
    from agent.dsp.peaks import find_peak
    from agent.findings import search_defect
    rng = np.random.default_rng(22)
    amp = rng.random(600)
    amp[100:103] = [2.0, 5.0, 5.0]  # a flat top: the first largest bin wins
    assert find_peak(amp, 1.0, 101.0, 2.0).bin == 101 == int(np.argmax(amp[99:104])) + 99
    values = amp.tolist()
    for _ in range(200):
        target_hz, tol_hz = rng.uniform(1.0, 620.0), rng.uniform(0.1, 20.0)
        assert find_peak(values, 1.0, target_hz, tol_hz) == find_peak(amp, 1.0, target_hz, tol_hz)
        fc, fm = rng.uniform(20.0, 300.0), rng.uniform(5.0, 30.0)
        ref = sideband_ratio(amp, 1.0, fc, fm, 2.0)
        np.testing.assert_equal(sideband_ratio(values, 1.0, fc, fm, 2.0), ref)
        assert search_defect(values, 1.0, fc, 8, 0.02, fm) == search_defect(amp, 1.0, fc, 8, 0.02, fm)
