"""WAV replay and simulated sources: samples, units, looping and real-time pacing.

Real-time pacing is checked with an injected clock whose time moves only when
the source waits, so the checks are exact and take no wall-clock time.
"""

import numpy as np
import pytest

from agent.config import parse_config
from agent.errors import SourceError
from agent.simulate import BearingSimulator, MachineModel
from agent.sources import Source, open_source, source_class
from agent.sources.simulated import fault_set
from agent.wavio import WavWriter

RATE = 8000


class FakeClock:
    """A monotonic clock that advances only when someone waits on it."""

    def __init__(self, t0=100.0):
        self.t = t0
        self.waits = []

    def __call__(self):
        return self.t

    def wait(self, seconds):
        self.waits.append(seconds)
        self.t += seconds


def _wav_config(path, channels=2, realtime=False, rate=RATE):
    return parse_config({
        "source": {"kind": "wav", "path": str(path), "sample_rate_hz": rate,
                   "channels": channels, "realtime": realtime},
        "broker": {"enabled": False},
        "point": [{"name": "fan-3-de", "channel": 0}],
    })


def _write_wav(path, data, fmt):
    with WavWriter(path, RATE, channels=data.shape[1], sample_format=fmt) as w:
        w.write(data)


def test_float_wav_is_m_s2_and_loops_at_the_end(tmp_path):
    data = np.random.default_rng(3).normal(0, 2.0, (3000, 2)).astype(np.float32).astype(np.float64)
    _write_wav(tmp_path / "rec.wav", data, "float32")
    src = open_source(_wav_config(tmp_path / "rec.wav"))
    out = np.zeros((7500, 2))
    with src:
        assert src.read(out) == 7500
        assert src.unit == "m_s2"
        assert src.describe()["loops"] == 2
    np.testing.assert_array_equal(out, np.concatenate([data, data, data[:1500]]))


def test_integer_wav_is_full_scale_and_extra_channels_are_left_out(tmp_path):
    codes = np.array([[-32768, 1, 5], [32767, -2, 6], [0, 3, 7]])
    _write_wav(tmp_path / "int.wav", codes / 32768.0, "int16")
    with open_source(_wav_config(tmp_path / "int.wav", channels=2)) as src:
        out = np.zeros((3, 2))
        src.read(out)
        assert src.unit == "full_scale"
    np.testing.assert_array_equal(out, codes[:, :2] / 32768.0)  # int16 full scale is 2**15


def test_wav_that_does_not_match_the_config_is_refused(tmp_path):
    _write_wav(tmp_path / "one.wav", np.zeros((10, 1)), "float32")
    with pytest.raises(SourceError, match="one.wav.*1 channels"):
        open_source(_wav_config(tmp_path / "one.wav", channels=2)).open()
    with pytest.raises(SourceError, match="one.wav.*set source.sample_rate_hz = 8000"):
        open_source(_wav_config(tmp_path / "one.wav", channels=1, rate=16000)).open()
    with pytest.raises(SourceError, match="missing.wav"):
        open_source(_wav_config(tmp_path / "missing.wav", channels=1)).open()


def test_wav_realtime_pacing_follows_absolute_deadlines(tmp_path):
    _write_wav(tmp_path / "rec.wav", np.zeros((4000, 1)), "float32")
    clock = FakeClock()
    src = source_class("wav")(_wav_config(tmp_path / "rec.wav", channels=1, realtime=True),
                              clock=clock, wait=clock.wait)
    out = np.zeros((800, 1))
    with src:
        src.read(out)
        assert clock.t == pytest.approx(100.0 + 800 / RATE, abs=1e-12)
        clock.t += 0.5                      # the reader was busy for 0.5 s
        src.read(out)                       # already due: no wait
        assert len(clock.waits) == 1
        for _ in range(8):                  # catches up, then is paced again
            src.read(out)
        assert clock.t == pytest.approx(100.0 + 10 * 800 / RATE, abs=1e-12)  # no drift
        src.discard()                       # re-anchored: the next read is one block away
        src.read(out)
        assert clock.t == pytest.approx(100.0 + 11 * 800 / RATE, abs=1e-12)


def _sim_config(realtime=False, **simulated):
    settings = {"fault": "outer", "modulation": "unbalance", "impact_m_s2": 4.0,
                "noise_rms_m_s2": 0.3, "resonance_hz": 2000.0, "seed": 7}
    settings.update(simulated)
    return parse_config({
        "source": {"kind": "simulated", "sample_rate_hz": RATE, "channels": 3,
                   "realtime": realtime, "simulated": settings},
        "broker": {"enabled": False},
        "point": [
            {"name": "raw-water-pump-2-de", "channel": 0,
             "machine": {"shaft_hz": 24.75},
             "bearing": {"balls": 8, "ball_diameter_mm": 7.94, "pitch_diameter_mm": 38.5}},
            {"name": "raw-water-pump-2-nde", "channel": 2, "fault": "none",
             "modulation": "gravity", "machine": {"shaft_hz": 24.75},
             "bearing": {"balls": 9, "ball_diameter_mm": 7.94, "pitch_diameter_mm": 39.04}},
        ],
    })


def _reference_model(cfg, point, faults, modulation, impact):
    s = cfg.source.simulated
    return MachineModel(shaft_hz=point.machine.shaft_hz, orders=point.bearing.orders,
                        faults=faults, modulation=modulation, impact_m_s2=impact,
                        resonance_hz=s.resonance_hz, noise_rms_m_s2=s.noise_rms_m_s2)


def test_simulated_channels_carry_each_points_machine(tmp_path):
    cfg = _sim_config()
    out = np.zeros((10000, 3))
    with open_source(cfg) as src:
        assert isinstance(src, Source)
        src.read(out[:3000])
        src.read(out[3000:])
        assert src.unit == "m_s2"
    de, nde = cfg.points
    ref0 = np.zeros(10000)
    BearingSimulator(_reference_model(cfg, de, {"outer"}, "unbalance", 4.0), RATE, seed=7).fill(ref0)
    ref2 = np.zeros(10000)
    # the point's own fault/modulation override the source-level ones
    BearingSimulator(_reference_model(cfg, nde, set(), "gravity", 4.0), RATE, seed=8).fill(ref2)
    np.testing.assert_array_equal(out[:, 0], ref0)
    np.testing.assert_array_equal(out[:, 2], ref2)
    np.testing.assert_array_equal(out[:, 1], 0.0)  # no point on channel 1


def test_simulated_impact_grows_linearly_with_signal_time():
    cfg = _sim_config(growth_m_s2_per_hour=3600.0)  # 1 m/s^2 per second of signal
    out = np.zeros((RATE, 3))
    with open_source(cfg) as src:
        src.read(out)
        src.read(out)
        assert src.describe()["impact_m_s2"] == pytest.approx(6.0)
    ref = BearingSimulator(_reference_model(cfg, cfg.points[0], {"outer"}, "unbalance", 4.0),
                           RATE, seed=7)
    expected = np.zeros(RATE)
    ref.fill(expected)
    ref.set_impact(5.0)
    ref.fill(expected)
    np.testing.assert_array_equal(out[:, 0], expected)


def test_simulated_realtime_pacing_and_growth_follow_the_clock():
    cfg = _sim_config(realtime=True, growth_m_s2_per_hour=3600.0)
    clock = FakeClock(t0=5.0)
    src = source_class("simulated")(cfg, clock=clock, wait=clock.wait)
    out = np.zeros((2000, 3))
    with src:
        for _ in range(4):
            src.read(out)
        assert clock.t == pytest.approx(5.0 + 4 * 2000 / RATE, abs=1e-12)
        assert src.describe()["impact_m_s2"] == pytest.approx(4.0 + 1.0)  # 1 s of wall clock


def test_fault_names():
    assert fault_set("outer+inner") == frozenset({"outer", "inner"})
    assert fault_set("none") == frozenset()
    with pytest.raises(ValueError, match="fault"):
        fault_set("cage")


def test_read_checks_its_arguments(tmp_path):
    src = open_source(_sim_config())
    with pytest.raises(ValueError, match="not open"):
        src.read(np.zeros((10, 3)))
    with src:
        with pytest.raises(ValueError, match="shape"):
            src.read(np.zeros((10, 2)))
        with pytest.raises(ValueError, match="float64"):
            src.read(np.zeros((10, 3), dtype=np.float32))
