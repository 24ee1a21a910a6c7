"""tools/dashboard against a real mosquitto broker, and its model and rendering.

Messages are built with agent.payloads (the agent's own builders) and sent
with paho from the test; the dashboard runs as a subprocess.  Nothing waits a
fixed time: the test reads the dashboard's log lines (``-v``) and reacts to
them, and only guards against a hang with generous time-outs.
"""

import json
import queue
import shutil
import signal
import socket
import subprocess
import sys
import threading
from pathlib import Path

import numpy as np
import pytest

from agent import payloads
from agent.dashboard_model import (DashboardModel, PayloadError, parse_payload, render_event,
                                   render_spectrum, render_table, sanitize)
from agent.topics import Topics, parse

ROOT = Path(__file__).resolve().parents[1]
DASHBOARD = ROOT / "tools" / "dashboard"
SITE, AGENT, POINT = "larkspur-water-works", "pumphouse-a", "raw-water-pump-2-de"
TOPICS = Topics("ballpass", SITE, AGENT)
HANG_S = 30  # only a guard against a hung process, never a pass/fail threshold

pytestmark = pytest.mark.skipif(shutil.which("mosquitto") is None, reason="mosquitto not installed")


# ------------------------------------------------------------------ fixtures
def _lines(stream):
    """A queue fed with the lines of a pipe by a daemon thread."""
    q = queue.Queue()

    def pump():
        for line in iter(stream.readline, ""):
            q.put(line.rstrip("\n"))
        q.put(None)
    threading.Thread(target=pump, daemon=True).start()
    return q


def _wait_for(q, needle, seen):
    """Read lines until one contains ``needle``; every line read goes to ``seen``."""
    while True:
        line = q.get(timeout=HANG_S)
        if line is None:
            raise AssertionError(f"stream ended before {needle!r}; got:\n" + "\n".join(seen))
        seen.append(line)
        if needle in line:
            return line


def _mosquitto(folder, listener_lines=(), extra_lines=("allow_anonymous true",)):
    """Start a private mosquitto on a free loopback port; returns (process, port)."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    conf = folder / "mosquitto.conf"
    conf.write_text("\n".join([f"listener {port} 127.0.0.1", *listener_lines, *extra_lines,
                                "user root", "log_dest stderr", "log_type all", ""]))
    proc = subprocess.Popen(["mosquitto", "-c", str(conf)], stderr=subprocess.PIPE,
                            stdout=subprocess.DEVNULL, text=True)
    _wait_for(_lines(proc.stderr), " running", [])   # "mosquitto version X running"
    return proc, port


@pytest.fixture
def broker_port(tmp_path):
    """A private mosquitto on a free loopback port (minimal local fixture)."""
    proc, port = _mosquitto(tmp_path)
    yield port
    proc.terminate()
    proc.wait(timeout=HANG_S)


class Publisher:
    """A paho client of the test, publishing QoS 1 and waiting for each PUBACK."""

    def __init__(self, port):
        import paho.mqtt.client as mqtt
        from paho.mqtt.enums import CallbackAPIVersion
        self.client = mqtt.Client(CallbackAPIVersion.VERSION2, protocol=mqtt.MQTTv5)
        connected = threading.Event()
        self.client.on_connect = lambda *a: connected.set()
        self.client.connect("127.0.0.1", port)
        self.client.loop_start()
        assert connected.wait(HANG_S)

    def send(self, topic, body, seq=None, retain=False):
        if isinstance(body, dict):
            body = payloads.encode({**body, "seq": seq})
        info = self.client.publish(topic, body, qos=1, retain=retain)
        info.wait_for_publish(HANG_S)
        assert info.is_published()

    def close(self):
        self.client.disconnect()
        self.client.loop_stop()


def _analysis(velocity_mm_s=2.1, zone="B", snr_db=18.2):
    return {
        "point": POINT, "capture_s": 10.0, "sample_rate_hz": 51200,
        "levels": {"accel_rms_m_s2": 1.23, "accel_peak_m_s2": 8.1, "crest_factor": 6.6,
                   "kurtosis": 5.2, "velocity_rms_mm_s": velocity_mm_s,
                   "velocity_band_hz": [10.0, 1000.0], "iso_zone": zone},
        "shaft_hz": 24.8, "quality": [],
        "defects": {"bpfo": {"expected_hz": 78.6, "found_hz": 78.9, "amplitude": 0.12,
                             "snr_db": snr_db, "harmonics": 5, "sideband_ratio": 0.35,
                             "modulation_hz": 24.8}},
        "findings": [{"defect": "bpfo", "severity": "high", "modulation": "shaft",
                      "text": "Outer-race defect signature."}],
    }


def _result(**kw):
    return payloads.result(_analysis(**kw), agent=AGENT, site=SITE, alert_state="watch")


def _status(state="online"):
    return payloads.status(agent=AGENT, site=SITE, state=state, version="0.1.0",
                           uptime_s=120, health={"outbox_depth": 2, "broker": "connected"})


def _alert(state, previous):
    return payloads.alert(agent=AGENT, site=SITE, point=POINT, state=state, previous=previous,
                          reasons=[], text=f"{POINT}: alert raised from {previous} to {state}.")


def _spectrum():
    freqs_hz = np.arange(0.0, 1200.0, 0.5)
    amp = np.full(freqs_hz.shape, 1e-4)
    for k in range(1, 6):
        amp[int(round(k * 78.9 / 0.5))] = 1e-2 / k
    return payloads.spectrum(freqs_hz, amp, agent=AGENT, site=SITE, point=POINT,
                             markers={"bpfo": 78.6, "bpfi": 119.4, "bsf2": 66.0, "ftf": 9.83,
                                      "shaft": 24.75},
                             band_hz=(2000.0, 4000.0))


def _start_dashboard(port, *extra):
    return subprocess.Popen([sys.executable, str(DASHBOARD), "--host", "127.0.0.1",
                             "--port", str(port), "-v", *extra],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


# ------------------------------------------------------------- end to end
def test_once_json_counts_gap_duplicate_and_malformed(broker_port):
    pub = Publisher(broker_port)
    pub.send(TOPICS.status, _status(), seq=7, retain=True)
    pub.send(TOPICS.alert(POINT), _alert("watch", "normal"), seq=3, retain=True)

    dash = _start_dashboard(broker_port, "--once", "--json", "--wait-s", "600", "--spectrum", POINT)
    err, seen = _lines(dash.stderr), []
    try:
        _wait_for(err, "ready: retained messages received", seen)
        for seq in (1, 2, 4, 4):                     # 3 is missing, 4 comes twice
            pub.send(TOPICS.result(POINT), _result(), seq=seq)
        pub.send(TOPICS.result(POINT), b"{not json")
        pub.send(TOPICS.result(POINT), b'{"schema":"ballpass.result/1","seq":NaN}')
        wrong_agent = {**_result(), "agent": "somebody-else"}
        pub.send(TOPICS.result(POINT), wrong_agent, seq=5)
        pub.send(TOPICS.alert(POINT), _alert("act", "watch"), seq=4)
        pub.send(TOPICS.spectrum(POINT), _spectrum(), seq=1)
        _wait_for(err, f"{TOPICS.spectrum(POINT)} seq=1", seen)
        dash.send_signal(signal.SIGINT)              # ends the wait; the snapshot still comes
        out, _ = dash.communicate(timeout=HANG_S)
    finally:
        if dash.poll() is None:
            dash.kill()
        pub.close()
    assert dash.returncode == 0, seen
    snap = json.loads(out)

    assert snap["schema"] == "ballpass.dashboard/1"
    assert snap["broker"]["retained_complete"] is True
    [agent] = snap["agents"]
    assert (agent["site"], agent["agent"], agent["state"], agent["version"]) == \
        (SITE, AGENT, "online", "0.1.0")
    [point] = snap["points"]
    assert point["point"] == POINT and point["velocity_rms_mm_s"] == 2.1 and point["iso_zone"] == "B"
    assert point["alert"] == "act"                   # the live alert came after the results
    assert point["finding"] == {"defect": "bpfo", "severity": "high", "modulation": "shaft",
                                "hz": 78.9, "snr_db": 18.2, "harmonics": 5}
    assert point["spectrum_ts"] is not None
    assert snap["spectrum"]["markers"]["bpfo"] == 78.6 and len(snap["spectrum"]["amplitude"]) > 100

    streams = {s["kind"]: s for s in snap["streams"]}
    assert streams["result"]["gaps"] == 1 and streams["result"]["duplicates"] == 1
    assert streams["result"]["received"] == 3 and streams["result"]["last_seq"] == 4
    assert streams["alert"]["gaps"] == 0 and streams["alert"]["last_seq"] == 4
    assert snap["totals"]["malformed"] == 3
    assert snap["totals"]["gaps"] == 1 and snap["totals"]["duplicates"] == 1
    errors = " | ".join(m["error"] for m in snap["malformed"])
    assert "not JSON" in errors and "site/agent differ from the topic" in errors

    assert [(a["previous"], a["state"], a["retained"]) for a in snap["alerts"]] == \
        [("normal", "watch", True), ("watch", "act", False)]


def test_once_retained_state_and_last_will(broker_port):
    pub = Publisher(broker_port)
    pub.send(TOPICS.status, _status(), seq=12, retain=True)
    pub.send(TOPICS.alert(POINT), _alert("watch", "normal"), seq=3, retain=True)
    # the last will is prepared at connect time: an older seq than the last status
    pub.send(TOPICS.status, _status("offline"), seq=11, retain=True)
    pub.close()
    done = subprocess.run([sys.executable, str(DASHBOARD), "--port", str(broker_port),
                           "--once", "--json", "--wait-s", "0"],
                          capture_output=True, text=True, timeout=HANG_S)
    assert done.returncode == 0, done.stderr
    snap = json.loads(done.stdout)
    assert [a["state"] for a in snap["agents"]] == ["offline"]
    assert [(p["point"], p["alert"]) for p in snap["points"]] == [(POINT, "watch")]
    assert snap["totals"]["duplicates"] == 0


def test_live_line_output_and_spectrum_plot(broker_port):
    pub = Publisher(broker_port)
    dash = _start_dashboard(broker_port, "--spectrum", POINT)
    err, out, seen = _lines(dash.stderr), _lines(dash.stdout), []
    try:
        _wait_for(err, "ready", seen)
        pub.send(TOPICS.result(POINT), _result(velocity_mm_s=3.4, zone="C"), seq=9)
        line = _wait_for(out, f"{SITE}/{AGENT}/{POINT} result seq 9", seen)
        assert "velocity 3.4 mm/s zone C" in line and "BPFO 78.9 Hz 18 dB high" in line
        pub.send(TOPICS.spectrum(POINT), _spectrum(), seq=2)
        _wait_for(out, "markers: O BPFO 78.6 Hz", seen)
        dash.send_signal(signal.SIGTERM)
        dash.wait(timeout=HANG_S)
    finally:
        if dash.poll() is None:
            dash.kill()
        pub.close()
    assert dash.returncode == 0
    assert not any("\x1b" in s for s in seen)        # not a terminal: no escapes


def test_unreachable_broker_and_bad_usage(tmp_path):
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        closed_port = s.getsockname()[1]             # nothing listens once closed
    done = subprocess.run([sys.executable, str(DASHBOARD), "--port", str(closed_port), "--once"],
                          capture_output=True, text=True, timeout=HANG_S)
    assert done.returncode == 1 and "connection refused" in done.stderr
    for args in (["--host", "192.0.2.10", "--once"],            # remote without TLS
                 ["--json"],                                      # --json needs --once
                 ["--username", "viewer", "--password-file", str(tmp_path / "absent"), "--once"],
                 ["--config", str(tmp_path / "absent.toml"), "--once"]):
        done = subprocess.run([sys.executable, str(DASHBOARD), *args],
                              capture_output=True, text=True, timeout=HANG_S)
        assert done.returncode == 2, (args, done.stderr)


# ------------------------------------------------------- model, in process
def _feed(model, topic, body, seq, retained=False):
    data = payloads.encode({**body, "seq": seq}) if isinstance(body, dict) else body
    return model.handle(topic, data, retained)


def test_sequence_accounting():
    model = DashboardModel("ballpass")
    outcomes = [_feed(model, TOPICS.result(POINT), _result(), s)["outcome"]
                for s in (10, 11, 15, 15, 12, 16)]
    assert outcomes == ["applied", "applied", "applied", "duplicate", "duplicate", "applied"]
    [stream] = model.snapshot()["streams"]
    assert (stream["gaps"], stream["duplicates"], stream["received"]) == (3, 2, 4)
    # a retained copy replayed after a reconnect is neither applied nor a duplicate
    _feed(model, TOPICS.alert(POINT), _alert("watch", "normal"), 5, retained=True)
    assert _feed(model, TOPICS.alert(POINT), _alert("watch", "normal"), 5,
                 retained=True)["outcome"] == "replayed"
    assert model.totals["duplicates"] == 2 and model.totals["replayed"] == 1
    # an empty retained payload (deleted retained message) and a foreign topic
    assert model.handle(TOPICS.status, b"", True)["outcome"] == "cleared"
    assert model.handle("elsewhere/x", b"{}")["outcome"] == "foreign"


@pytest.mark.parametrize("payload, why", [
    (b"\xff\xfe", "not UTF-8"),
    (b"[1, 2]", "not a JSON object"),
    (b'{"a": 1, "a": 2}', "appears twice"),
    (b'{"schema": "ballpass.result/1", "seq": Infinity}', "not valid JSON"),
    (b'{"schema": "ballpass.result/2"}', "is not 'ballpass.result/1'"),
])
def test_malformed_payloads_are_rejected(payload, why):
    parts = parse("ballpass", TOPICS.result(POINT))
    with pytest.raises(PayloadError, match=why):
        parse_payload("result", parts, payload)


def test_field_checks_and_sanitizing():
    parts = parse("ballpass", TOPICS.result(POINT))
    good = {**_result(), "seq": 1}
    for change, why in (({"seq": True}, "seq"), ({"seq": -1}, "seq"), ({"point": "other"}, "point"),
                        ({"ts": "yesterday"}, "ts"), ({"alert": "panic"}, "alert")):
        with pytest.raises(PayloadError, match=why):
            parse_payload("result", parts, payloads.encode({**good, **change}))
    assert parse_payload("result", parts, payloads.encode(good))["seq"] == 1
    # ECMA-48 CSI (ESC [) and C1 controls would let a payload drive the terminal
    assert sanitize("ok\x1b[2J\x9b31m\u202eend") == "ok[2J31mend"


def test_render_table_and_alert_log():
    model = DashboardModel("ballpass")
    _feed(model, TOPICS.status, _status(), 1)
    _feed(model, TOPICS.result(POINT), _result(velocity_mm_s=5.1, zone="D"), 1)
    evil = {**_alert("act", "watch"), "text": "bearing \x1b[2Jworn"}
    _feed(model, TOPICS.alert(POINT), evil, 1)
    plain = render_table(model.snapshot(), width=140)
    assert "\x1b" not in plain
    row = [ln for ln in plain.splitlines() if POINT in ln and "online" in ln][0]
    assert "5.1 mm/s" in row and " D " in row and "act" in row and "BPFO 78.9 Hz 18 dB high" in row
    assert "watch -> act" in plain and "bearing [2Jworn" in plain
    colored = render_table(model.snapshot(), width=140, color=True)
    assert "\x1b[31mact" in colored and "\x1b[2J" not in colored
    assert render_event(_feed(model, TOPICS.result(POINT), b"nope", None)).startswith("MALFORMED")


def test_spectrum_plot_puts_markers_on_the_lines():
    body = {**_spectrum(), "seq": 1}
    text = render_spectrum(body, width=100, height=10)
    rows = text.splitlines()
    plot = [r.split("|", 1)[1] for r in rows if "|" in r]
    marker_row = rows[len(plot) + 2][11:]             # after the axis line, past the labels
    tallest = plot[0].index("#")                      # only the highest line reaches the top row
    # the BPFO line (78.9 Hz, within the slip band of 78.6 Hz) is the tallest column
    assert marker_row[tallest] == "O"
    assert marker_row.count("o") >= 3                 # its harmonics 2x..5x are marked too
    assert "I BPFI 119 Hz" in text and "B 2xBSF 66 Hz" in text and "F FTF 9.83 Hz" in text
    with pytest.raises(ValueError, match="width"):
        render_spectrum(body, width=3)


@pytest.mark.skipif(shutil.which("openssl") is None or shutil.which("mosquitto_passwd") is None,
                    reason="openssl and mosquitto_passwd are needed")
def test_tls_and_password_like_the_agent(tmp_path):
    def ssl_cmd(*args):
        subprocess.run(["openssl", *args], check=True, capture_output=True, cwd=tmp_path)
    ec = ["-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes"]
    ssl_cmd("req", "-x509", *ec, "-keyout", "ca.key", "-out", "ca.pem", "-days", "2",
            "-subj", "/CN=Larkspur test CA")
    ssl_cmd("req", *ec, "-keyout", "server.key", "-out", "server.csr", "-subj", "/CN=localhost")
    (tmp_path / "san.ext").write_text("subjectAltName=DNS:localhost,IP:127.0.0.1\n")
    ssl_cmd("x509", "-req", "-in", "server.csr", "-CA", "ca.pem", "-CAkey", "ca.key",
            "-CAcreateserial", "-out", "server.pem", "-days", "2", "-extfile", "san.ext")
    subprocess.run(["mosquitto_passwd", "-c", "-b", str(tmp_path / "passwd"), "viewer", "s3cret"],
                   check=True, capture_output=True)
    proc, port = _mosquitto(
        tmp_path,
        listener_lines=[f"cafile {tmp_path / 'ca.pem'}", f"certfile {tmp_path / 'server.pem'}",
                        f"keyfile {tmp_path / 'server.key'}"],
        extra_lines=["allow_anonymous false", f"password_file {tmp_path / 'passwd'}"])
    try:
        (tmp_path / "viewer.pass").write_text("s3cret\n")
        (tmp_path / "wrong.pass").write_text("guess\n")
        base = [sys.executable, str(DASHBOARD), "--host", "localhost", "--port", str(port), "--tls",
                "--ca-file", str(tmp_path / "ca.pem"), "--username", "viewer",
                "--once", "--json", "--wait-s", "0"]
        done = subprocess.run(base + ["--password-file", str(tmp_path / "viewer.pass")],
                              capture_output=True, text=True, timeout=HANG_S)
        assert done.returncode == 0, done.stderr
        assert json.loads(done.stdout)["broker"]["retained_complete"] is True
        done = subprocess.run(base + ["--password-file", str(tmp_path / "wrong.pass")],
                              capture_output=True, text=True, timeout=HANG_S)
        assert done.returncode == 1 and "not authorised" in done.stderr
        assert "guess" not in done.stderr                 # the password never shows
        done = subprocess.run([a for a in base if a not in ("--ca-file", str(tmp_path / "ca.pem"))]
                              + ["--password-file", str(tmp_path / "viewer.pass")],
                              capture_output=True, text=True, timeout=HANG_S)
        assert done.returncode == 1 and "certificate verify failed" in done.stderr
    finally:
        proc.terminate()
        proc.wait(timeout=HANG_S)
