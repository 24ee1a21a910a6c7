"""Calibration: unit scaling, sensitivity from a reference shaker, stored corrections."""

import json
import math

import numpy as np
import pytest

from agent.calibration import (calibrate, clear_override, load_overrides, measure_sensitivity,
                               overrides_path, save_override, scale_m_s2_per_unit)
from agent.config import parse_config
from agent.errors import ConfigError
from agent.wavio import WavWriter

G = 9.80665  # m/s^2, standard gravity (CGPM 1901)
REF_HZ = 159.2    # handheld shaker reference: omega = 1000 rad/s  # common practice
REF_M_S2 = 10.0   # handheld shaker reference RMS  # common practice
RATE = 48000


def _config(tmp_path, sensitivity_mv_per_m_s2=10.2, full_scale_v=1.0, **source):
    src = {"kind": "simulated", "sample_rate_hz": RATE, "channels": 1, "realtime": False}
    src.update(source)
    return parse_config({
        "agent": {"state_dir": str(tmp_path / "state")},
        "source": src,
        "broker": {"enabled": False},
        "point": [{"name": "raw-water-pump-2-de", "channel": 0,
                   "sensitivity_mv_per_m_s2": sensitivity_mv_per_m_s2,
                   "full_scale_v": full_scale_v}],
    })


def test_scale_per_unit(tmp_path):
    point = parse_config({"broker": {"enabled": False},
                          "point": [{"name": "p", "sensitivity_mv_per_g": 100.0,
                                     "full_scale_v": 1.0}]}).points[0]
    # a 100 mV/g sensor into a 1 V full-scale input: full scale is 10 g (data-sheet arithmetic)
    assert scale_m_s2_per_unit(point, "full_scale") == pytest.approx(10 * G, rel=1e-12)
    assert scale_m_s2_per_unit(point, "volt") == pytest.approx(G / 0.1, rel=1e-12)  # 1 V = 10 g
    assert scale_m_s2_per_unit(point, "m_s2") == 1.0
    assert scale_m_s2_per_unit(point, "volt", override=20.0) == pytest.approx(50.0)
    assert scale_m_s2_per_unit(point, "m_s2", override=20.0) == 1.0
    with pytest.raises(ValueError, match="source_unit"):
        scale_m_s2_per_unit(point, "g")
    with pytest.raises(ValueError, match="override"):
        scale_m_s2_per_unit(point, "volt", override=-1.0)


def _shaker(seconds=4.0, hz=REF_HZ, rms=REF_M_S2, noise_rms=0.5, seed=11):
    t = np.arange(int(seconds * RATE)) / RATE
    rng = np.random.default_rng(seed)
    return rms * math.sqrt(2) * np.sin(2 * np.pi * hz * t + 0.3) + rng.normal(0, noise_rms, t.size)


def test_correct_sensitivity_is_confirmed():
    r = measure_sensitivity(_shaker(), RATE, REF_M_S2, REF_HZ, configured_mv_per_m_s2=10.2)
    assert r["verdict"] == "ok"
    assert r["measured_rms_m_s2"] == pytest.approx(10.0, rel=2e-3)
    assert r["measured_mv_per_m_s2"] == pytest.approx(10.2, rel=2e-3)
    assert r["snr_db"] > 40


def test_wrong_configured_sensitivity_is_found():
    true_mv, configured_mv = 12.0, 10.2
    # the sensor gives true_mv per m/s^2, the samples were divided by configured_mv
    as_configured = _shaker() * true_mv / configured_mv
    r = measure_sensitivity(as_configured, RATE, REF_M_S2, REF_HZ, configured_mv)
    assert r["verdict"] == "adjust"
    assert r["measured_mv_per_m_s2"] == pytest.approx(true_mv, rel=2e-3)
    assert r["deviation_pct"] == pytest.approx((12.0 / 10.2 - 1) * 100, abs=0.3)
    assert "12" in r["text"] and "10.2" in r["text"]


def test_shaker_slightly_off_its_nominal_frequency_is_measured_in_full():
    r = measure_sensitivity(_shaker(seconds=10.0, hz=159.0), RATE, REF_M_S2, REF_HZ, 10.2)
    assert r["measured_rms_m_s2"] == pytest.approx(10.0, rel=3e-3)


def test_no_reference_line_is_unreliable():
    noise = np.random.default_rng(5).normal(0, 1.0, 4 * RATE)
    r = measure_sensitivity(noise, RATE, REF_M_S2, REF_HZ, 10.2)
    assert r["verdict"] == "unreliable"
    json.dumps(r, allow_nan=False)  # every figure stays valid JSON


def test_measure_checks_its_arguments():
    x = _shaker(seconds=1.0)
    for kwargs, name in (({"sample_rate_hz": 0}, "sample_rate_hz"),
                         ({"reference_m_s2": 0}, "reference_m_s2"),
                         ({"reference_hz": 30000}, "reference_hz"),
                         ({"configured_mv_per_m_s2": -1}, "configured_mv_per_m_s2")):
        args = {"samples_m_s2_as_configured": x, "sample_rate_hz": RATE,
                "reference_m_s2": REF_M_S2, "reference_hz": REF_HZ,
                "configured_mv_per_m_s2": 10.2, **kwargs}
        with pytest.raises(ValueError, match=name):
            measure_sensitivity(**args)
    with pytest.raises(ValueError, match="too few"):
        measure_sensitivity(x[:1000], RATE, REF_M_S2, REF_HZ, 10.2)


def test_overrides_are_kept_atomically_in_the_state_dir(tmp_path):
    state = tmp_path / "state"
    assert load_overrides(state) == {}
    save_override(state, "raw-water-pump-2-de", 11.5, {"reference_hz": REF_HZ})
    save_override(state, "raw-water-pump-2-nde", 9.9)
    assert load_overrides(state) == {"raw-water-pump-2-de": 11.5, "raw-water-pump-2-nde": 9.9}
    assert sorted(p.name for p in state.iterdir()) == ["calibration.json"]  # no temp files left
    assert clear_override(state, "raw-water-pump-2-nde") is True
    assert clear_override(state, "raw-water-pump-2-nde") is False
    assert load_overrides(state) == {"raw-water-pump-2-de": 11.5}
    overrides_path(state).write_text("{not json")
    with pytest.raises(ConfigError, match="calibration.json"):
        load_overrides(state)
    overrides_path(state).write_text(json.dumps({"schema": "ballpass.calibration/1",
                                                 "points": {"p": {"sensitivity_mv_per_m_s2": 0}}}))
    with pytest.raises(ConfigError, match="must be a number > 0"):
        load_overrides(state)


def test_calibrate_from_an_integer_recording_then_confirms_the_correction(tmp_path):
    true_mv = 12.0
    # sensor output in volts = sensitivity x acceleration; on a 1 V input that is full scale
    volts = _shaker(seconds=3.0) * true_mv / 1000.0
    with WavWriter(tmp_path / "shaker.wav", RATE, channels=1, sample_format="int24") as w:
        w.write(volts / 1.0)
    cfg = _config(tmp_path, sensitivity_mv_per_m_s2=10.2, kind="wav",
                  path=str(tmp_path / "shaker.wav"))
    first = calibrate(cfg, "raw-water-pump-2-de", REF_M_S2, REF_HZ, seconds=2.0)
    assert first["verdict"] == "adjust" and first["saved"] is True
    assert first["source_unit"] == "full_scale"
    assert first["measured_mv_per_m_s2"] == pytest.approx(true_mv, rel=3e-3)
    assert load_overrides(cfg.agent.state_dir)["raw-water-pump-2-de"] == pytest.approx(
        first["measured_mv_per_m_s2"])
    second = calibrate(cfg, "raw-water-pump-2-de", REF_M_S2, REF_HZ, seconds=2.0)
    assert second["verdict"] == "ok" and second["saved"] is False
    assert second["configured_mv_per_m_s2"] == pytest.approx(first["measured_mv_per_m_s2"])
    assert second["configured_in_file_mv_per_m_s2"] == 10.2


def test_calibrate_refuses_sources_already_in_m_s2_and_unknown_points(tmp_path):
    cfg = _config(tmp_path)
    with pytest.raises(ValueError, match="m/s\\^2 already"):
        calibrate(cfg, "raw-water-pump-2-de", REF_M_S2, REF_HZ, seconds=1.0)
    with pytest.raises(ValueError, match="no point named"):
        calibrate(cfg, "fan-9", REF_M_S2, REF_HZ, seconds=1.0)
