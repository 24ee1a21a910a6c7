"""The daemon capturing through the real PortAudio/ALSA path, fed by an ALSA ``file`` PCM.

``ballpass run`` runs as a subprocess with a sound-card source whose device is
an ALSA ``file`` PCM reading a raw file of known samples (the lowest hardware
boundary; see ``alsa_fixture``), a real mosquitto broker and a real SQLite
outbox.  The published levels must be those of the known signal, scaled by the
calibration.

Frame accounting: the daemon reads ``capture_s x rate`` = 48 000 frames per
capture and nothing else (the sound-card source makes no settling reads), so
two captures read frames 0 to 95 999 of the file.  The source's ring holds
96 000 frames (2 s at 48 kHz) and drops the *newest* frames when full, so the
first 96 000 frames the daemon reads are the file's first 96 000 frames in
order, however fast the plugin delivers.  The file is longer than that, so the
plugin's stale repeats after the end of the file are never read.
"""

import ctypes.util
import json
import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from alsa_fixture import ALSA_CONF, write_alsa_config
from broker import Subscriber

pytestmark = pytest.mark.skipif(
    ctypes.util.find_library("asound") is None or ctypes.util.find_library("portaudio") is None,
    reason="libasound2 and libportaudio2 are needed")

ROOT = Path(__file__).resolve().parents[1]
PREFIX = "ballpass/larkspur-water-works/pumphouse-a"
RATE = 48000
CHANNELS = 2
CAPTURE_S = 1
CAPTURES = 2
FILE_FRAMES = 3 * RATE  # more than the 2 x 48 000 frames the daemon reads
FULL_SCALE_INT32 = 2.0 ** 31  # S32_LE full scale (sample_format "int32")

# Two points with different calibrations.  m/s^2 per full scale = full_scale_v x 1000 / S.
POINTS = (
    {"name": "raw-water-pump-2-de", "channel": 0, "sensitivity_mv_per_m_s2": 10.2,
     "full_scale_v": 1.0},
    {"name": "raw-water-pump-2-nde", "channel": 1, "sensitivity_mv_per_m_s2": 5.0,
     "full_scale_v": 2.5},
)
# Per channel: (frequency Hz, amplitude in full scale, phase rad) of each tone.  The first
# tone lies in the 10-1000 Hz velocity band, the second above it (it adds to the
# acceleration RMS and peak but not to the velocity).
TONES = (
    ((159.2, 0.1442, 0.3), (2500.0, 0.05, 1.1)),   # ch 0: ~10 m/s^2 RMS at 159.2 Hz
    ((400.0, 0.02, 2.0), (3700.0, 0.008, 0.4)),    # ch 1: ~7.07 m/s^2 RMS at 400 Hz
)
# The out-of-band tone is this much stronger from the second second of the file on, so the
# two captures differ and each must have read its own second of the file.
SECOND_TONE_GAIN_AFTER_1_S = 1.6


def _known_int32(frames):
    """The raw file's samples: per channel the sum of its tones, as S32_LE."""
    n = np.arange(frames)
    t = n / RATE
    gain = np.where(n < RATE, 1.0, SECOND_TONE_GAIN_AFTER_1_S)
    out = np.empty((frames, CHANNELS), dtype="<i4")
    for ch, ((f1, a1, ph1), (f2, a2, ph2)) in enumerate(TONES):
        x = a1 * np.sin(2 * np.pi * f1 * t + ph1) + gain * a2 * np.sin(2 * np.pi * f2 * t + ph2)
        out[:, ch] = np.round(x * FULL_SCALE_INT32)
    return out


def _scale_m_s2_per_fs(point):
    # full scale -> volts -> m/s^2: full_scale_v x 1000 / (mV per m/s^2)  # common practice
    return point["full_scale_v"] * 1000.0 / point["sensitivity_mv_per_m_s2"]


def _within_3_sig(got, expected):
    """True when ``got`` is ``expected`` rounded to the 3 significant figures the payload
    carries (half a unit of the third figure, plus float noise)."""
    step = 10.0 ** (math.floor(math.log10(abs(expected))) - 2)
    return abs(got - expected) <= 0.5 * step * (1 + 1e-9)


def _write_daemon_config(path, *, device, port, state_dir):
    lines = [
        "[agent]", 'site = "larkspur-water-works"', 'name = "pumphouse-a"',
        f'state_dir = "{state_dir}"', "",
        "[source]", 'kind = "soundcard"', f'device = "{device}"',
        f"sample_rate_hz = {RATE}", f"channels = {CHANNELS}", 'sample_format = "int32"',
        "latency_s = 0.15", "",
        "[schedule]", f"capture_s = {CAPTURE_S}", "interval_s = 1", "continuous = true", "",
        "[broker]", 'host = "127.0.0.1"', f"port = {port}", "reconnect_min_s = 0.2",
        "reconnect_max_s = 1.0", "",
    ]
    for p in POINTS:
        lines += ["[[point]]"] + [f"{k} = {json.dumps(v)}" for k, v in p.items()] + [""]
    path.write_text("\n".join(lines))
    return path


def test_daemon_publishes_the_levels_of_the_known_signal(tmp_path, broker):
    raw = _known_int32(FILE_FRAMES)
    # the file is in exactly the format the stream opens: S32_LE, 48 kHz, 2 channels, interleaved
    raw.tofile(tmp_path / "signal.raw")
    alsa_conf = write_alsa_config(tmp_path, {"larkspur_pumphouse_in": tmp_path / "signal.raw"})
    cfg = _write_daemon_config(tmp_path / "ballpass.toml", device="larkspur_pumphouse_in",
                               port=broker.port, state_dir=tmp_path / "state")
    sub = Subscriber(broker, "ballpass/#")
    log_path = tmp_path / "daemon.log"
    env = dict(os.environ)
    # alsa.conf first, or the "null" slave is undefined; a fresh process enumerates afresh
    env["ALSA_CONFIG_PATH"] = f"{ALSA_CONF}:{alsa_conf}"
    with open(log_path, "w") as log:
        proc = subprocess.Popen(
            [sys.executable, "-m", "agent", "run", "--config", str(cfg),
             "--max-captures", str(CAPTURES)],
            stdout=log, stderr=subprocess.STDOUT, env=env, cwd=ROOT)
        try:
            code = proc.wait(timeout=60)
        finally:
            if proc.poll() is None:
                proc.kill()
                proc.wait(timeout=10)
    log_text = log_path.read_text()
    assert code == 0, log_text
    assert "Traceback" not in log_text, log_text

    def results(name):
        topic = f"{PREFIX}/points/{name}/result"
        return sorted((json.loads(p) for t, p, _ in sub.messages if t == topic),
                      key=lambda r: r["seq"])

    assert sub.wait_for(lambda m: all(len(results(p["name"])) >= CAPTURES for p in POINTS), 10), \
        log_text

    for p in POINTS:
        got = results(p["name"])
        assert len(got) == CAPTURES, got
        scale = _scale_m_s2_per_fs(p)
        (f_band, a_band, _), _ = TONES[p["channel"]]
        for i, r in enumerate(got):
            # capture i read frames [i x 48 000, (i + 1) x 48 000) of the file
            n0, n1 = i * CAPTURE_S * RATE, (i + 1) * CAPTURE_S * RATE
            x = raw[n0:n1, p["channel"]] / FULL_SCALE_INT32 * scale
            d = x - x.mean()
            # RMS and peak about the mean, straight from the samples (numpy, the reference
            # library); compared at the payload's 3 significant figures
            rms = float(np.sqrt(np.mean(d * d)))
            peak = float(np.max(np.abs(d)))
            lv = r["levels"]
            assert _within_3_sig(lv["accel_rms_m_s2"], rms), (p["name"], i, lv, rms)
            assert _within_3_sig(lv["accel_peak_m_s2"], peak), (p["name"], i, lv, peak)
            # velocity of a sine: v = a / (2 pi f) (sine kinematics, from memory); 10 m/s^2 RMS
            # at 159.2 Hz is ~10 mm/s  # common calibrator practice
            # the out-of-band tone adds nothing; 2 % covers the Hann main lobe's spread
            a_rms = a_band * scale / math.sqrt(2.0)
            v_mm_s = a_rms / (2 * math.pi * f_band) * 1000.0
            assert lv["velocity_rms_mm_s"] == pytest.approx(v_mm_s, rel=0.02), (p["name"], i, lv)
            # The file plugin delivers thousands of times faster than real time: the daemon
            # measures the delivered rate of a device-paced source and flags the capture
            # "wrong_rate"; a capture at the wrong rate never yields a finding.  The 2 s ring
            # fills within milliseconds at that pace, so "overrun" may be flagged as well;
            # no signal-quality flag (clipped, flat, dc_offset, too_short) may be.
            assert "wrong_rate" in r["quality"], r
            assert set(r["quality"]) <= {"wrong_rate", "overrun"}, r
            assert r["findings"] == [], r
    de = results(POINTS[0]["name"])
    # the calibrator check itself: ~10 m/s^2 RMS at 159.2 Hz reads ~10 mm/s  # common calibrator practice
    assert de[0]["levels"]["velocity_rms_mm_s"] == pytest.approx(10.0, rel=0.02)

    statuses = [json.loads(pl) for t, pl, _ in sub.messages if t == f"{PREFIX}/status"]
    assert statuses and statuses[-1]["health"]["source"] == "ok", statuses[-1:]
    sub.close()
    # the retained status, as a newcomer sees it after the daemon stopped
    late = Subscriber(broker, f"{PREFIX}/status")
    assert late.wait_for(lambda m: m, 10), broker.log_text()
    _, payload, retained = late.messages[-1]
    late.close()
    status = json.loads(payload)
    assert retained and status["state"] == "offline"
    assert status["health"]["source"] == "ok", status
    assert status["health"]["captures"] == CAPTURES
    assert status["health"]["flagged"] == CAPTURES * len(POINTS)
