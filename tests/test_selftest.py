"""The commissioning checklist end to end: real subprocesses, real files, real mosquitto.

Every run is ``python -m agent selftest --config FILE`` in a subprocess; the
sensor side is faked only at its lowest boundary (a WAV file, the simulated
source), the broker is a real mosquitto (tests/broker.py).
"""

import json
import os
import re
import subprocess
import sys
import textwrap

import numpy as np
import pytest

from agent.selftest import LOCK_FILE, acquire_state_lock, lock_holder_pid, release_state_lock
from agent.wavio import WavWriter
from broker import free_port

LINE = re.compile(r"^(PASS|WARN|FAIL)  (\S.*?)\s{2,}(\S.*)$")


def ballpass(*args):
    return subprocess.run([sys.executable, "-m", "agent", *args], capture_output=True,
                          text=True, timeout=120)


ONE_POINT = textwrap.dedent("""
    [[point]]
    name = "raw-water-pump-2-de"
    channel = 0
    sensitivity_mv_per_g = 100.0
    [point.machine]
    shaft_hz = 24.75
    [point.bearing]
    balls = 8
    ball_diameter_mm = 7.94
    pitch_diameter_mm = 38.5
    """)


def write_config(tmp_path, source, broker="enabled = false", points=None, state_dir=None):
    state = state_dir or tmp_path / "state"
    state.mkdir(exist_ok=True)
    points = points or ONE_POINT
    text = textwrap.dedent(f"""
        [agent]
        site = "larkspur-water-works"
        name = "pumphouse-a"
        state_dir = "{state}"
        [schedule]
        capture_s = 3
        interval_s = 60
        """) + source + "\n[broker]\n" + broker + "\n" + points
    path = tmp_path / "ballpass.toml"
    path.write_text(text)
    return path, state


SIMULATED = textwrap.dedent("""
    [source]
    kind = "simulated"
    sample_rate_hz = 51200
    channels = 2
    realtime = false
    [source.simulated]
    fault = "none"
    modulation = "none"
    seed = 7
    """)

TWO_POINTS = textwrap.dedent("""
    [[point]]
    name = "raw-water-pump-2-de"
    channel = 0
    [point.machine]
    shaft_hz = 24.75
    [[point]]
    name = "raw-water-pump-2-nde"
    channel = 1
    [point.machine]
    shaft_hz = 24.75
    """)


def broker_lines(broker, extra=""):
    return f'host = "{broker.host}"\nport = {broker.port}\n' + extra


def parse_lines(stdout):
    """``{check: (result, detail)}`` of the text checklist."""
    out = {}
    for line in stdout.splitlines():
        m = LINE.match(line)
        if m:
            out[m.group(2).strip()] = (m.group(1), m.group(3))
    return out


def listing(folder):
    """Names, sizes and modification times of everything in a folder."""
    return sorted((p.name, p.stat().st_size, p.stat().st_mtime_ns) for p in folder.iterdir())


# --------------------------------------------------------------------------- whole runs
def test_simulated_source_and_real_broker_pass(tmp_path, broker):
    cfg, state = write_config(tmp_path, SIMULATED, broker_lines(broker), TWO_POINTS)
    (state / "keep.txt").write_text("the daemon's file\n")
    before = listing(state)
    r = ballpass("selftest", "--config", str(cfg))
    assert r.returncode == 0, r.stdout + r.stderr
    lines = parse_lines(r.stdout)
    assert set(lines) == {"config", "state lock", "state directory", "clock", "source",
                          "point raw-water-pump-2-de", "point raw-water-pump-2-nde",
                          "known answer", "broker"}
    assert all(result in ("PASS", "WARN") for result, _ in lines.values()), r.stdout
    for name in ("config", "state lock", "state directory", "source", "known answer", "broker"):
        assert lines[name][0] == "PASS", r.stdout
    assert "came back" in lines["broker"][1]
    assert "2 points" in lines["config"][1]
    # The columns line up: every detail starts at the same position.
    starts = {line.index(detail) for line in r.stdout.splitlines()
              for _, detail in lines.values() if line.endswith(detail)}
    assert len(starts) == 1
    # Nothing was left behind or changed in the state directory (no lock file, no temp file).
    assert listing(state) == before
    # The simulated 1x of a balanced machine is 0.2 m/s² at 24.75 Hz: v = a / (2 pi f) =
    # 1.3 mm/s peak, 0.91 mm/s RMS; ISO 20816-3 group 2 rigid puts < 1.4 mm/s in zone A.
    # (velocity from acceleration: v = a / (2 pi f), textbook kinematics; zones: ISO 20816-3 Table A.1)
    detail = lines["point raw-water-pump-2-de"][1]
    assert "ISO zone A" in detail, detail
    vel = float(re.search(r"velocity ([0-9.]+) mm/s", detail).group(1))
    assert 0.8 < vel < 1.4
    # A simulated line at 24.75 Hz is found as the 1x line within a bin (0.78 Hz at 64 k points).
    shaft = float(re.search(r"1x at ([0-9.]+) Hz", detail).group(1))
    assert abs(shaft - 24.75) < 0.8


def test_json_lists_every_check(tmp_path, broker):
    cfg, state = write_config(tmp_path, SIMULATED, broker_lines(broker), TWO_POINTS)
    r = ballpass("selftest", "--config", str(cfg), "--json")
    assert r.returncode == 0, r.stdout + r.stderr
    doc = json.loads(r.stdout)
    names = [c["check"] for c in doc["checks"]]
    assert names == ["config", "state lock", "state directory", "clock", "source",
                     "point raw-water-pump-2-de", "point raw-water-pump-2-nde",
                     "known answer", "broker"]
    for c in doc["checks"]:
        assert set(c) == {"check", "result", "detail"}
        assert c["result"] in ("PASS", "WARN", "FAIL") and c["detail"]
    s = doc["summary"]
    assert s["pass"] + s["warn"] + s["fail"] == len(names)
    assert s["fail"] == 0 and s["exit_code"] == 0
    assert doc["config"] == str(cfg)
    assert list(state.iterdir()) == []


def test_broker_down_fails(tmp_path):
    port = free_port()  # nobody listens there
    cfg, state = write_config(tmp_path, SIMULATED, f'host = "127.0.0.1"\nport = {port}\n')
    r = ballpass("selftest", "--config", str(cfg))
    assert r.returncode == 1, r.stdout + r.stderr
    lines = parse_lines(r.stdout)
    result, detail = lines["broker"]
    assert result == "FAIL"
    assert "refused" in detail and str(port) in detail
    assert [n for n, (res, _) in lines.items() if res == "FAIL"] == ["broker"]
    assert "Traceback" not in r.stdout + r.stderr
    assert list(state.iterdir()) == []


def test_delivery_disabled_warns(tmp_path):
    cfg, _ = write_config(tmp_path, SIMULATED, "enabled = false")
    r = ballpass("selftest", "--config", str(cfg))
    assert r.returncode == 0, r.stdout + r.stderr
    assert parse_lines(r.stdout)["broker"] == (
        "WARN", "delivery disabled (broker.enabled = false): nothing is sent anywhere")


def test_a_configured_band_too_narrow_for_the_harmonics_warns(tmp_path):
    # from memory: the squared envelope of a band B Hz wide holds nothing above B.
    # BPFI of this 8-ball bearing at 24.75 Hz is 4.94 x 24.75 = 122 Hz (from
    # memory, the geometric formula); a 400 Hz band holds 3 of its 8 harmonics.
    points = ONE_POINT + "[point.envelope]\nband_hz = [2800.0, 3200.0]\n"
    cfg, _ = write_config(tmp_path, SIMULATED, "enabled = false", points)
    r = ballpass("selftest", "--config", str(cfg))
    assert r.returncode == 0, r.stdout + r.stderr
    result, detail = parse_lines(r.stdout)["point raw-water-pump-2-de"]
    assert result == "WARN"
    assert "envelope.band_hz 2800-3200 Hz is 400 Hz wide" in detail
    assert "3 of 8 BPFI" in detail


def _wav_config(tmp_path, wav, fs):
    source = textwrap.dedent(f"""
        [source]
        kind = "wav"
        path = "{wav}"
        sample_rate_hz = {fs}
        channels = 1
        realtime = false
        """)
    return write_config(tmp_path, source)


def test_silent_recording_is_flat(tmp_path):
    fs = 51200
    wav = tmp_path / "silent.wav"
    with WavWriter(wav, fs, channels=1, sample_format="float32") as w:
        w.write(np.zeros(fs * 3))
    cfg, _ = _wav_config(tmp_path, wav, fs)
    r = ballpass("selftest", "--config", str(cfg))
    assert r.returncode == 1, r.stdout + r.stderr
    result, detail = parse_lines(r.stdout)["point raw-water-pump-2-de"]
    assert result == "FAIL"
    assert detail.startswith("flat: no signal (RMS 0 m/s²)"), detail
    # the analysis itself still works on simulated signals
    assert parse_lines(r.stdout)["known answer"][0] == "PASS"


def test_clipped_recording_fails(tmp_path):
    fs = 51200
    wav = tmp_path / "clipped.wav"
    t = np.arange(fs * 3) / fs
    # A 159.2 Hz sine 1.5 times the converter's range: the integer WAV clips it at full scale.
    # (159.2 Hz: the usual reference frequency of handheld calibrators, common practice)
    with WavWriter(wav, fs, channels=1, sample_format="int16") as w:
        w.write(1.5 * np.sin(2 * np.pi * 159.2 * t))
    cfg, _ = _wav_config(tmp_path, wav, fs)
    r = ballpass("selftest", "--config", str(cfg))
    assert r.returncode == 1, r.stdout + r.stderr
    result, detail = parse_lines(r.stdout)["point raw-water-pump-2-de"]
    assert result == "FAIL"
    assert detail.startswith("clipped"), detail
    # Full scale in m/s² = V_fs * 1000 / S: 1 V at 100 mV/g (g = 9.80665 m/s², CGPM 1901)
    # is 98.1 m/s² (sensor sensitivity definition, common practice).
    assert "full scale (98.1 m/s²)" in detail


def test_offset_recording_fails(tmp_path):
    fs = 51200
    wav = tmp_path / "offset.wav"
    noise = np.random.default_rng(4).normal(0.0, 0.2, fs * 3)
    # An AC-coupled accelerometer output has no steady component; 5 m/s² of it against
    # 0.2 m/s² RMS means a bias or cable fault (IEPE sensor practice, common practice).
    with WavWriter(wav, fs, channels=1, sample_format="float32") as w:
        w.write(5.0 + noise)
    cfg, _ = _wav_config(tmp_path, wav, fs)
    r = ballpass("selftest", "--config", str(cfg))
    assert r.returncode == 1, r.stdout + r.stderr
    result, detail = parse_lines(r.stdout)["point raw-water-pump-2-de"]
    assert result == "FAIL"
    assert detail.startswith("DC offset of 5 m/s² against 0.2 m/s² RMS"), detail


def test_missing_recording_fails_the_source(tmp_path):
    cfg, _ = _wav_config(tmp_path, tmp_path / "nowhere.wav", 51200)
    r = ballpass("selftest", "--config", str(cfg))
    assert r.returncode == 1, r.stdout + r.stderr
    lines = parse_lines(r.stdout)
    assert lines["source"][0] == "FAIL" and "nowhere.wav" in lines["source"][1]
    assert lines["point raw-water-pump-2-de"] == ("FAIL", "not measured: the source did not open")
    assert "Traceback" not in r.stdout + r.stderr


def test_clock_before_2024_fails():
    from datetime import datetime, timezone

    from agent.selftest import check_clock
    # A board without a battery-backed clock boots at the Unix epoch, 1970-01-01
    # (POSIX time origin; common practice on single-board computers).
    result, detail = check_clock(datetime(1970, 1, 1, 0, 0, 12, tzinfo=timezone.utc))
    assert result == "FAIL" and "1970-01-01T00:00:12Z" in detail
    result, _ = check_clock(datetime(2026, 6, 1, tzinfo=timezone.utc))
    assert result in ("PASS", "WARN")


# --------------------------------------------------------------------------- the lock
HOLDER = textwrap.dedent("""
    import fcntl, os, sys
    f = open(sys.argv[1], "a+")
    fcntl.flock(f.fileno(), fcntl.LOCK_EX)
    f.seek(0); f.truncate(); f.write(f"{os.getpid()}\\n"); f.flush()
    print("locked", flush=True)
    sys.stdin.read()
    """)


@pytest.fixture
def lock_holder(tmp_path):
    """Another process holding ``flock`` on ``<state>/ballpass.lock`` until the test ends."""
    state = tmp_path / "state"
    state.mkdir()
    proc = subprocess.Popen([sys.executable, "-c", HOLDER, str(state / LOCK_FILE)],
                            stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    assert proc.stdout.readline().strip() == "locked"
    yield state, proc
    proc.stdin.close()
    proc.wait(timeout=10)
    proc.stdout.close()


def test_refuses_to_run_beside_the_daemon(tmp_path, lock_holder):
    state, proc = lock_holder
    before = listing(state)
    cfg, _ = write_config(tmp_path, SIMULATED, state_dir=state)
    r = ballpass("selftest", "--config", str(cfg))
    assert r.returncode == 1, r.stdout + r.stderr
    lines = parse_lines(r.stdout)
    assert lines["state lock"] == (
        "FAIL", f"the daemon is running (pid {proc.pid}): stop it first or use its status")
    assert "source" not in lines and "broker" not in lines   # nothing else is touched
    assert listing(state) == before
    r = ballpass("selftest", "--config", str(cfg), "--json")
    assert r.returncode == 1
    doc = json.loads(r.stdout)
    assert [c["check"] for c in doc["checks"]] == ["config", "state lock"]
    assert doc["summary"]["fail"] == 1


def test_lock_helper_against_another_process(lock_holder):
    state, proc = lock_holder
    # flock(2): an exclusive lock held by another open file description blocks LOCK_EX|LOCK_NB
    assert acquire_state_lock(state, write_pid=False) is None
    assert lock_holder_pid(state) == proc.pid
    proc.stdin.close()
    proc.wait(timeout=10)
    # flock(2): the lock goes away when the holder's descriptors are closed, e.g. at exit
    lock = acquire_state_lock(state)
    assert lock is not None and not lock.created
    assert lock_holder_pid(state) == os.getpid()
    release_state_lock(lock)
    assert (state / LOCK_FILE).exists()


def test_lock_helper_removes_only_what_it_created(tmp_path):
    lock = acquire_state_lock(tmp_path, write_pid=False)
    assert lock.created and (tmp_path / LOCK_FILE).exists()
    assert acquire_state_lock(tmp_path) is None   # flock(2): a second open file is refused
    assert lock_holder_pid(tmp_path) is None      # nothing written when not asked
    release_state_lock(lock, remove=True)
    assert list(tmp_path.iterdir()) == []


# --------------------------------------------------------------------------- broker security
def _mqtt_helpers_ready():
    import agent.mqtt
    return hasattr(agent.mqtt, "tls_context") and hasattr(agent.mqtt, "read_password")


needs_mqtt_helpers = pytest.mark.skipif(
    not _mqtt_helpers_ready(),
    reason="agent.mqtt.tls_context(broker) and read_password(broker) are not there yet")


@needs_mqtt_helpers
@pytest.mark.parametrize("given,result", [("right-horse-battery", "PASS"),
                                          ("wrong-staple", "FAIL")])
def test_broker_password(tmp_path, broker_factory, given, result):
    b = broker_factory(users={"pumphouse-a": "right-horse-battery"})
    secret = tmp_path / "broker-password"
    secret.write_text(given + "\n")
    cfg, _ = write_config(tmp_path, SIMULATED, broker_lines(
        b, f'username = "pumphouse-a"\npassword_file = "{secret}"\n'))
    r = ballpass("selftest", "--config", str(cfg))
    got, detail = parse_lines(r.stdout)["broker"]
    assert got == result, r.stdout + r.stderr
    assert r.returncode == (0 if result == "PASS" else 1)
    if result == "FAIL":
        # MQTT 5 CONNACK reason 0x86 "Bad User Name or Password" (OASIS MQTT 5.0, 3.2.2.2)
        assert "not authorised" in detail
    assert "right-horse-battery" not in r.stdout + r.stderr
    assert "wrong-staple" not in r.stdout + r.stderr


@needs_mqtt_helpers
@pytest.mark.parametrize("ca,result", [("own", "PASS"), ("other", "FAIL")])
def test_broker_tls_certificate_authority(tmp_path, broker_factory, tls_files, ca, result):
    from broker import make_tls_files
    b = broker_factory(tls=tls_files)
    ca_file = tls_files.ca_cert if ca == "own" else make_tls_files(tmp_path, "other").ca_cert
    cfg, _ = write_config(tmp_path, SIMULATED, broker_lines(
        b, f'tls = true\nca_file = "{ca_file}"\n'))
    r = ballpass("selftest", "--config", str(cfg))
    got, detail = parse_lines(r.stdout)["broker"]
    assert got == result, r.stdout + r.stderr
    if result == "FAIL":
        # a chain that does not end at a trusted CA fails verification (RFC 5280, 6.1)
        assert "certificate verify failed" in detail and "broker.ca_file" in detail
    else:
        assert "TLS" in detail and "came back" in detail
