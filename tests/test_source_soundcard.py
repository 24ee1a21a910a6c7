"""Sound-card source through the real PortAudio/ALSA stack, fed by ALSA ``file`` PCMs.

Each check runs in a subprocess (see ``alsa_fixture``): the stream really opens
through libportaudio and alsa-lib; only the lowest layer, the PCM device, is a
raw file of known samples.
"""

import ctypes.util

import numpy as np
import pytest

from agent.errors import DeviceNotFound, SourceError
from agent.sources.soundcard import find_input_device
from alsa_fixture import run_python, write_alsa_config, write_config

pytestmark = pytest.mark.skipif(
    ctypes.util.find_library("asound") is None or ctypes.util.find_library("portaudio") is None,
    reason="libasound2 and libportaudio2 are needed")

RATE = 48000
FRAMES = 96000  # 2 s in the file; every check reads fewer frames than the source's ring holds


def _known_int16(frames):
    """Channel 0: a full-range pseudo-random walk through every code; 1: a sine."""
    n = np.arange(frames)
    ch0 = ((n * 7919 + 12345) % 65536 - 32768).astype("<i2")
    ch1 = np.round(20000 * np.sin(2 * np.pi * 159.2 * n / RATE)).astype("<i2")
    return np.stack([ch0, ch1], axis=1)


def _known_int32(frames):
    n = np.arange(frames, dtype=np.int64)
    ch0 = ((n * 2654435761 + 7) % 2**32 - 2**31).astype("<i4")  # every bit pattern in use
    ch1 = (np.round(1.5e9 * np.sin(2 * np.pi * 100.0 * n / RATE))).astype("<i4")
    return np.stack([ch0, ch1], axis=1)


@pytest.fixture(scope="module")
def rig(tmp_path_factory):
    d = tmp_path_factory.mktemp("alsa")
    s16 = _known_int16(FRAMES)
    s32 = _known_int32(FRAMES)
    # the raw files are in exactly the format the streams open: S16_LE / S32_LE, 48 kHz, 2 ch
    s16.tofile(d / "s16.raw")
    s32.tofile(d / "s32.raw")
    conf = write_alsa_config(d, {
        "larkspur_rig_s16": d / "s16.raw",
        "larkspur_rig_s32": d / "s32.raw",
        "larkspur_capture": d / "s16.raw",
        "larkspur_capture_2": d / "s16.raw",
    })
    return {"dir": d, "conf": conf, "s16": s16, "s32": s32}


def test_int16_stream_delivers_the_file_bit_exact_in_full_scale_units(rig):
    d = rig["dir"]
    cfg = write_config(d / "s16.toml", device="larkspur_rig_s16", sample_format="int16",
                       state_dir=d / "state16")
    out = run_python(f"""
        import json, numpy as np
        from agent.config import load_config
        from agent.sources import open_source
        src = open_source(load_config({str(cfg)!r}))
        out = np.zeros((30000, 2))
        with src:
            got = src.read(out[:10000])
            got += src.read(out[10000:])
            desc = src.describe()
        np.save({str(d / "s16_out.npy")!r}, out)
        print(json.dumps({{"got": got, "unit": src.unit, "desc": desc}}))
    """, rig["conf"])
    assert out["got"] == 30000 and out["unit"] == "full_scale"
    assert out["desc"]["device"] == "larkspur_rig_s16" and out["desc"]["hostapi"] == "ALSA"
    got = np.load(d / "s16_out.npy")
    expected = rig["s16"][:30000] / 32768.0  # int16 full scale is 2**15 (common practice: PCM scaling)
    np.testing.assert_array_equal(got, expected)


def test_int32_stream_delivers_the_file_bit_exact_in_full_scale_units(rig):
    d = rig["dir"]
    cfg = write_config(d / "s32.toml", device="larkspur_rig_s32", sample_format="int32",
                       state_dir=d / "state32")
    out = run_python(f"""
        import json, numpy as np
        from agent.config import load_config
        from agent.sources import open_source
        src = open_source(load_config({str(cfg)!r}))
        out = np.zeros((20000, 2))
        with src:
            got = src.read(out)
        np.save({str(d / "s32_out.npy")!r}, out)
        print(json.dumps({{"got": got}}))
    """, rig["conf"])
    assert out["got"] == 20000
    got = np.load(d / "s32_out.npy")
    np.testing.assert_array_equal(got, rig["s32"][:20000] / 2.0**31)  # int32 full scale is 2**31 (common practice)


def test_record_writes_calibrated_m_s2_with_the_stored_override(rig):
    d = rig["dir"]
    state = d / "state-rec"
    points = ({"name": "raw-water-pump-2-de", "channel": 0, "sensitivity_mv_per_m_s2": 10.2,
               "full_scale_v": 1.0},
              {"name": "raw-water-pump-2-nde", "channel": 1, "sensitivity_mv_per_m_s2": 10.2,
               "full_scale_v": 2.5})
    cfg = write_config(d / "rec.toml", device="larkspur_rig_s16", sample_format="int16",
                       state_dir=state, points=points)
    out = run_python(f"""
        import json
        from agent.calibration import save_override
        from agent.config import load_config
        from agent.recording import record
        save_override({str(state)!r}, "raw-water-pump-2-nde", 9.8)
        result = record(load_config({str(cfg)!r}), 0.5, {str(d / "rec.wav")!r})
        print(json.dumps(result))
    """, rig["conf"])
    assert out["frames"] == 24000 and out["points"] == ["raw-water-pump-2-de", "raw-water-pump-2-nde"]
    from agent.wavio import WavReader

    with WavReader(d / "rec.wav") as r:
        assert r.info.sample_format == "float32" and r.info.channels == 2
        assert r.info.sample_rate_hz == RATE and r.info.frames == 24000
        got = np.zeros((24000, 2))
        assert r.read_into(got) == 24000
    raw = rig["s16"][:24000] * 2.0 ** -15
    # m/s^2 = full scale x full_scale_v x 1000 / sensitivity (mV per m/s^2)
    scale_de = 1.0 * 1000.0 / 10.2
    scale_nde = 2.5 * 1000.0 / 9.8  # the override, not the configured 10.2
    np.testing.assert_array_equal(got[:, 0], (raw[:, 0] * scale_de).astype(np.float32))
    np.testing.assert_array_equal(got[:, 1], (raw[:, 1] * scale_nde).astype(np.float32))
    assert out["scale_m_s2_per_unit"]["raw-water-pump-2-nde"] == pytest.approx(scale_nde, rel=1e-15)


def test_devices_by_index_name_part_exact_name_ambiguous_and_missing(rig):
    d = rig["dir"]
    missing_cfg = write_config(d / "missing.toml", device="no-such-card", sample_format="int16",
                               state_dir=d / "s")
    out = run_python(f"""
        import json
        from agent.config import load_config
        from agent.errors import DeviceNotFound, SourceError
        from agent.sources import devices_report, open_source
        from agent.sources.soundcard import find_input_device, list_input_devices
        devs = list_input_devices()
        res = {{"names": [x["name"] for x in devs]}}
        res["part"] = find_input_device("rig_s32", devs)["name"]
        res["exact"] = find_input_device("LARKSPUR_CAPTURE", devs)["name"]
        res["index"] = find_input_device(str(devs[1]["index"]), devs)["name"]
        for key, name in (("ambiguous", "larkspur_rig"), ("missing", "no-such-card"),
                          ("bad_index", "99")):
            try:
                find_input_device(name, devs)
            except SourceError as exc:
                res[key] = [type(exc).__name__, str(exc)]
        try:
            open_source(load_config({str(missing_cfg)!r})).open()
        except DeviceNotFound as exc:
            res["open_missing"] = str(exc)
        res["report"] = devices_report(load_config({str(missing_cfg)!r}))
        print(json.dumps(res))
    """, rig["conf"])
    assert set(out["names"]) >= {"larkspur_rig_s16", "larkspur_rig_s32", "larkspur_capture",
                                 "larkspur_capture_2"}
    assert out["part"] == "larkspur_rig_s32"
    assert out["exact"] == "larkspur_capture"  # whole name wins over "larkspur_capture_2"
    assert out["index"] == out["names"][1]
    kind, text = out["ambiguous"]
    assert kind == "SourceError" and "larkspur_rig_s16" in text and "larkspur_rig_s32" in text
    kind, text = out["missing"]
    assert kind == "DeviceNotFound" and "larkspur_capture_2" in text  # lists what is there
    assert out["bad_index"][0] == "DeviceNotFound"
    assert "no-such-card" in out["open_missing"]
    assert "larkspur_rig_s16" in out["report"] and "AC-coupled" in out["report"]
    assert "no-such-card" in out["report"]


def test_callback_counts_input_overflow_flags_and_copies_the_block(rig):
    d = rig["dir"]
    cfg = write_config(d / "cb.toml", device="larkspur_rig_s16", sample_format="int16",
                       state_dir=d / "s")
    out = run_python(f"""
        import json, numpy as np, sounddevice as sd
        from agent.config import load_config
        from agent.sources.soundcard import SoundcardSource
        src = SoundcardSource(load_config({str(cfg)!r}), ring_frames=1000)
        block = np.arange(512, dtype=np.int16).reshape(256, 2)
        flags = sd.CallbackFlags()
        flags.input_overflow = True
        src._callback(block, 256, None, flags)
        src._callback(block, 256, None, sd.CallbackFlags())
        src._callback(block, 256, None, flags)
        src._callback(block, 256, None, sd.CallbackFlags())  # ring full: 1000 of 1024 fit
        print(json.dumps({{"overflows": src.overflows, "device": src.describe()["device_overflows"],
                          "ring": src.ring.overruns, "available": src.ring.available,
                          "dropped": src.ring.frames_dropped}}))
    """, rig["conf"])
    assert out == {"overflows": 3, "device": 2, "ring": 1, "available": 1000, "dropped": 24}


def test_default_device_is_the_one_marked_default():
    devices = [{"index": 3, "name": "USB Audio CODEC: - (hw:1,0)", "is_default": False},
               {"index": 5, "name": "default", "is_default": True}]
    assert find_input_device("", devices)["index"] == 5
    assert find_input_device("usb audio", devices)["index"] == 3  # case does not matter
    with pytest.raises(DeviceNotFound, match="no default input"):
        find_input_device("", devices[:1])
    with pytest.raises(SourceError, match="matches 2"):
        find_input_device("a", devices)
