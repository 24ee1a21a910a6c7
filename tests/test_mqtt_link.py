"""The MQTT link against a real mosquitto, with real paho and real SQLite.

References used below: mosquitto as the reference broker (its password file,
TLS listener and persistence), paho-mqtt as the reference subscriber, the
MQTT 5.0 / 3.1.1 specifications for the last will (section 3.1.2.5: the will
is published when the network connection closes without a DISCONNECT) and
for retained messages, and ``jsonschema`` for the payload schemas.
"""

import json
import logging
import queue
import signal
import subprocess
import sys
import textwrap
import threading
from pathlib import Path

import jsonschema
import pytest

from agent import payloads
from agent.errors import BrokerError
from agent.mqtt import MqttLink, read_password, tls_context
from agent.outbox import Outbox
from agent.topics import subscription
from broker import Subscriber, make_tls_files, wait_until

AGENT, SITE, POINT = "pumphouse-a", "larkspur-water-works", "raw-water-pump-2-de"
WAIT_S = 15.0  # upper bound of every wait; the waits end on events long before


def validate(body):
    kind = body["schema"].split(".")[1].split("/")[0]
    jsonschema.Draft202012Validator(payloads.load_schema(kind)).validate(body)


def small_analysis(n):
    return {"point": POINT,
            "levels": {"accel_rms_m_s2": 1.0 + n / 100, "accel_peak_m_s2": 6.0, "crest_factor": 6.0,
                       "kurtosis": 3.1, "velocity_rms_mm_s": 2.2, "velocity_band_hz": [10.0, 1000.0],
                       "iso_zone": "A"},
            "shaft_hz": 24.8, "quality": [],
            "defects": {"bpfo": {"expected_hz": 78.6, "found_hz": None, "amplitude": 1e-5,
                                 "snr_db": 2.0, "harmonics": 0, "sideband_ratio": None,
                                 "modulation_hz": None}},
            "findings": []}


def result_body(n):
    return payloads.result(small_analysis(n), agent=AGENT, site=SITE, alert_state="normal")


def status_body(state, broker_state="connected"):
    return payloads.status(agent=AGENT, site=SITE, state=state, version="test", uptime_s=1.0,
                           health={"broker": broker_state, "source": "ok"})


def make_link(settings, outbox, **kwargs):
    """A link whose on_state publishes the online status, as the daemon does."""
    def on_state(state):
        if state == "connected":
            link.publish_now(link.topics.status, status_body("online"))

    link = MqttLink(settings, AGENT, SITE, outbox, lambda: status_body("offline", "gone"),
                    on_state=on_state, **kwargs)
    return link


def seqs(messages, suffix="/result"):
    return [json.loads(p)["seq"] for t, p, _ in messages if t.endswith(suffix)]


def first_occurrences(values):
    seen, out = set(), []
    for v in values:
        if v not in seen:
            seen.add(v)
            out.append(v)
    return out


# --------------------------------------------------------------------------- delivery
def test_messages_arrive_in_order_and_validate(broker, tmp_path):
    sub = Subscriber(broker, subscription("ballpass", SITE))
    with Outbox(tmp_path / "o.db") as ob:
        link = make_link(broker.settings(), ob)
        t = link.topics
        for n in range(30):
            link.send("result", t.result(POINT), result_body(n))
        link.send("alert", t.alert(POINT), payloads.alert(
            agent=AGENT, site=SITE, point=POINT, state="watch", previous="normal",
            reasons=[{"indicator": "velocity_rms_mm_s", "value": 4.9, "limit": 4.5,
                      "limit_kind": "iso_zone", "text": "zone C"}],
            text="Velocity rose into zone C."), retain=True)
        link.send("spectrum", t.spectrum(POINT), payloads.spectrum(
            [0.0, 0.5, 1.0, 1.5], [1e-6, 2e-6, 1e-3, 1e-6], agent=AGENT, site=SITE, point=POINT,
            markers={"shaft": 24.8}, band_hz=(2000, 4000)))
        assert ob.depth == 32
        link.start()
        assert sub.wait_for(lambda m: len(seqs(m)) == 30 and len(seqs(m, "/spectrum")) == 1
                            and seqs(m, "/status"), WAIT_S)
        assert link.wait_for(lambda: ob.depth == 0 and link.in_flight == 0, WAIT_S)
        assert link.state == "connected" and link.reconnects == 0
        assert seqs(sub.messages) == list(range(1, 31))            # in order, each once
        for body in sub.payloads():
            validate(body)                                          # real messages, real schemas
        assert all(len(p) < 1024 for tp, p, _ in sub.messages if tp.endswith("/result"))
        assert link.close(timeout_s=5.0) is True
    # Retained messages (MQTT 5.0 section 3.3.1.3): a late subscriber gets the alert state
    # and the offline status published by close().
    late = Subscriber(broker, subscription("ballpass", SITE))
    assert late.wait_for(lambda m: len(m) >= 2, WAIT_S)
    retained = {tp.rsplit("/", 1)[-1]: (json.loads(p), r) for tp, p, r in late.messages}
    assert retained["alert"][0]["state"] == "watch" and retained["alert"][1] is True
    assert retained["status"][0]["state"] == "offline" and retained["status"][1] is True
    sub.close()
    late.close()


def test_mqtt_3_1_1_works(broker, tmp_path):
    sub = Subscriber(broker, subscription("ballpass", SITE), protocol="3.1.1")
    with Outbox(tmp_path / "o.db") as ob:
        link = make_link(broker.settings(protocol="3.1.1"), ob)
        link.start()
        for n in range(5):
            link.send("result", link.topics.result(POINT), result_body(n))
        assert sub.wait_for(lambda m: len(seqs(m)) == 5, WAIT_S)
        assert link.wait_for(lambda: ob.depth == 0, WAIT_S)
        assert seqs(sub.messages) == [1, 2, 3, 4, 5]
        assert link.close(5.0)
    # mosquitto logs the protocol of each client: "p2" is MQTT 3.1.1, "p5" MQTT 5 (its log format).
    assert f"as ballpass-{SITE}-{AGENT} (p2," in broker.log_text()
    sub.close()


def test_broker_down_and_back_nothing_lost(broker, tmp_path):
    # The dashboard keeps a persistent session (MQTT 5: clean_start=False + session expiry),
    # so the broker queues for it whatever arrives before it has reconnected itself.
    sub = Subscriber(broker, subscription("ballpass", SITE, kind="result"), client_id="dashboard",
                     persistent=True)
    # mosquitto saves its state on every change here; wait until the subscription is on disk.
    assert wait_until(lambda: broker.db_file.exists()
                      and b"points/+/result" in broker.db_file.read_bytes(), WAIT_S)
    with Outbox(tmp_path / "o.db") as ob:
        link = make_link(broker.settings(), ob)
        link.start()
        for n in range(10):
            link.send("result", link.topics.result(POINT), result_body(n))
        assert sub.wait_for(lambda m: len(seqs(m)) >= 10, WAIT_S)
        assert link.wait_for(lambda: ob.depth == 0, WAIT_S)

        broker.kill()                                  # like a power cut of the broker
        assert link.wait_for(lambda: not link.connected, WAIT_S)
        for n in range(10, 25):
            link.send("result", link.topics.result(POINT), result_body(n))
        assert ob.depth == 15 and link.in_flight == 0  # nothing handed to paho while down
        broker.start()
        assert link.wait_for(lambda: ob.depth == 0 and link.in_flight == 0, WAIT_S), link.state
        assert sub.wait_for(lambda m: set(seqs(m)) >= set(range(1, 26)), WAIT_S)
        assert first_occurrences(seqs(sub.messages)) == list(range(1, 26))   # none lost, in order
        assert link.reconnects >= 1 and link.state == "connected"
        link.close(5.0)
    sub.close()


def test_broker_stopped_with_messages_in_flight(broker, tmp_path):
    # Messages handed to paho but not yet acknowledged when the connection goes
    # are sent again after the reconnect; none is lost, order is kept (after
    # dropping duplicates by seq).
    sub = Subscriber(broker, subscription("ballpass", SITE, kind="result"), client_id="dashboard",
                     persistent=True)
    assert wait_until(lambda: broker.db_file.exists()
                      and b"points/+/result" in broker.db_file.read_bytes(), WAIT_S)
    with Outbox(tmp_path / "o.db") as ob:
        link = make_link(broker.settings(), ob, window=50)
        link.start()
        assert link.wait_for(lambda: link.state == "connected", WAIT_S)
        for n in range(300):
            link.send("result", link.topics.result(POINT), result_body(n))
        broker.stop()                                   # while the sender is busy
        for n in range(300, 320):
            link.send("result", link.topics.result(POINT), result_body(n))
        broker.start()
        assert link.wait_for(lambda: ob.depth == 0 and link.in_flight == 0, WAIT_S), link.state
        assert sub.wait_for(lambda m: set(seqs(m)) >= set(range(1, 321)), WAIT_S)
        assert first_occurrences(seqs(sub.messages)) == list(range(1, 321))
        link.close(5.0)
    sub.close()


def test_backlog_drops_oldest_results_first_and_counts_them(broker, tmp_path):
    sub = Subscriber(broker, subscription("ballpass", SITE))
    with Outbox(tmp_path / "o.db", max_messages=10) as ob:
        link = make_link(broker.settings(), ob)
        t = link.topics
        for n in range(15):
            link.send("result", t.result(POINT), result_body(n))
            if n in (3, 11):
                link.send("alert", t.alert(POINT), payloads.alert(
                    agent=AGENT, site=SITE, point=POINT, state="watch" if n == 3 else "normal",
                    previous="normal" if n == 3 else "watch", reasons=[], text="change"),
                    retain=True)
        assert ob.dropped == {"spectrum": 0, "result": 7, "alert": 0}
        link.start()
        assert sub.wait_for(lambda m: len(seqs(m)) == 8 and len(seqs(m, "/alert")) == 2, WAIT_S)
        assert link.wait_for(lambda: ob.depth == 0, WAIT_S)
        # The gap in the result stream is exactly the count of dropped results.
        assert seqs(sub.messages) == list(range(8, 16))
        assert seqs(sub.messages, "/alert") == [1, 2]
        link.close(5.0)
    sub.close()


# --------------------------------------------------------------------------- agent processes
AGENT_PROC = textwrap.dedent("""
    import json, logging, sys
    from agent.config import BrokerSettings
    from agent.mqtt import MqttLink, read_password, tls_context
    from agent.outbox import Outbox
    sys.path.insert(0, sys.argv[2])
    from test_mqtt_link import make_link, result_body, POINT

    cfg = json.loads(sys.argv[1])
    logging.basicConfig(level=logging.INFO, stream=sys.stderr)
    ob = Outbox(cfg["outbox"])
    settings = BrokerSettings(host="127.0.0.1", port=cfg["port"], reconnect_min_s=0.1,
                              reconnect_max_s=0.5, keepalive_s=10)
    link = make_link(settings, ob)
    link.start()
    for n in range(cfg["enqueue"]):
        link.send("result", link.topics.result(POINT), result_body(n))
    print("enqueued", ob.depth, flush=True)
    if cfg["connect"]:
        link.wait_for(lambda: link.state == "connected", 15)
        print("state", link.state, flush=True)
    if cfg["drain"]:
        ok = link.wait_for(lambda: ob.depth == 0 and link.in_flight == 0, 15)
        print("drained", ok, flush=True)
        print("closed", link.close(5.0), flush=True)
        sys.exit(0)
    sys.stdin.read()     # until killed
""")


class AgentProcess:
    """The agent script in a subprocess; its stdout lines are read by a thread."""

    def __init__(self, tmp_path, port, outbox, enqueue=0, connect=True, drain=False):
        script = tmp_path / "agent_proc.py"
        script.write_text(AGENT_PROC)
        cfg = {"port": port, "outbox": str(outbox), "enqueue": enqueue, "connect": connect,
               "drain": drain}
        self.proc = subprocess.Popen([sys.executable, str(script), json.dumps(cfg),
                                      str(Path(__file__).parent)],
                                     stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                                     stderr=subprocess.PIPE, text=True)
        self.lines = queue.Queue()
        threading.Thread(target=self._read, daemon=True).start()

    def _read(self):
        for line in self.proc.stdout:
            self.lines.put(line)
        self.lines.put("")                          # end of output

    def expect(self, word):
        """The next stdout line, which must start with ``word``."""
        try:
            line = self.lines.get(timeout=WAIT_S)
        except queue.Empty:
            line = "<no output>"
        assert line.startswith(word), (line, self.stderr_if_dead())
        return line.split()

    def stderr_if_dead(self):
        return self.proc.stderr.read() if self.proc.poll() is not None else ""

    def kill9(self):
        self.proc.send_signal(signal.SIGKILL)
        self.proc.wait(timeout=10)

    def finish(self):
        try:
            self.proc.wait(timeout=WAIT_S)
        finally:
            if self.proc.poll() is None:
                self.proc.kill()
            for f in (self.proc.stdin, self.proc.stdout, self.proc.stderr):
                f.close()


def test_last_will_on_kill_9(broker, tmp_path):
    sub = Subscriber(broker, subscription("ballpass", SITE, AGENT, kind="status"))
    agent = AgentProcess(tmp_path, broker.port, tmp_path / "o.db")
    try:
        agent.expect("enqueued")
        assert agent.expect("state") == ["state", "connected"]
        assert sub.wait_for(lambda m: any(b["state"] == "online" for b in sub.payloads()), WAIT_S)
        agent.kill9()
        # MQTT 5.0 section 3.1.2.5: the broker publishes the will when the connection closes
        # without DISCONNECT.
        assert sub.wait_for(lambda m: sub.payloads()[-1]["state"] == "offline", WAIT_S)
    finally:
        agent.finish()
    offline = sub.payloads()[-1]
    validate(offline)
    assert offline["health"]["broker"] == "gone"
    late = Subscriber(broker, subscription("ballpass", SITE, AGENT, kind="status"))
    assert late.wait_for(lambda m: len(m) == 1, WAIT_S)
    assert late.messages[0][2] is True and json.loads(late.messages[0][1])["state"] == "offline"
    sub.close()
    late.close()


def test_backlog_survives_kill_9_of_the_agent(broker, tmp_path):
    outbox = tmp_path / "o.db"
    broker.stop()                                   # no broker: the agent builds a backlog
    first = AgentProcess(tmp_path, broker.port, outbox, enqueue=12, connect=False)
    try:
        assert first.expect("enqueued") == ["enqueued", "12"]
        first.kill9()
    finally:
        first.finish()
    broker.start()
    sub = Subscriber(broker, subscription("ballpass", SITE))
    second = AgentProcess(tmp_path, broker.port, outbox, enqueue=0, drain=True)
    try:
        second.expect("enqueued")
        second.expect("state")
        assert second.expect("drained") == ["drained", "True"]
        assert second.expect("closed") == ["closed", "True"]
    finally:
        second.finish()
    assert second.proc.returncode == 0
    assert sub.wait_for(lambda m: len(seqs(m)) >= 12 and sub.payloads("/status")[-1]["state"] == "offline",
                        WAIT_S)
    assert first_occurrences(seqs(sub.messages)) == list(range(1, 13))
    for body in sub.payloads():
        validate(body)
    states = [b["state"] for b in sub.payloads("/status")]
    assert states[0] == "online" and states[-1] == "offline"   # close() published offline
    sub.close()


# --------------------------------------------------------------------------- refusals
def test_wrong_password_clear_state_no_crash_loop_no_secret_in_logs(broker_factory, tmp_path, caplog):
    right, wrong = "Right-horse-7f3e", "Wrong-battery-91c2"
    broker = broker_factory(users={"pumphouse-a": right})
    pw = tmp_path / "broker-password"
    pw.write_text(wrong + "\n")
    caplog.set_level(logging.DEBUG)                 # paho's own debug log included
    states = []
    with Outbox(tmp_path / "o.db") as ob:
        link = MqttLink(broker.settings(username="pumphouse-a", password_file=pw), AGENT, SITE,
                        ob, payloads.encode(dict(status_body("offline"), seq=1)),
                        on_state=states.append)
        assert read_password(link.broker) == wrong            # the line break is not part of it
        link.start()
        assert link.wait_for(lambda: link.attempts >= 3, WAIT_S)
        text = "not authorised: check broker.username and the password file"
        assert link.state == text
        warnings = [r for r in caplog.records if r.levelno >= logging.WARNING and text in r.getMessage()]
        assert len(warnings) == 1                   # said once, not at every retry
        assert states.count(text) == 1
        # The password is read at every attempt: fixing the file is enough.
        pw.write_text(right + "\n")
        assert link.wait_for(lambda: link.state == "connected", WAIT_S)
        link.close(5.0)
    log_text = "\n".join(r.getMessage() for r in caplog.records) + caplog.text
    assert wrong not in log_text and right not in log_text
    assert wrong not in "".join(states)


def test_password_from_the_credentials_directory(broker_factory, tmp_path, monkeypatch):
    broker = broker_factory(users={"pumphouse-a": "Cred-dir-secret-5"})
    creds = tmp_path / "creds"
    creds.mkdir()
    (creds / "broker-password").write_text("Cred-dir-secret-5")
    monkeypatch.setenv("CREDENTIALS_DIRECTORY", str(creds))     # as systemd LoadCredential= does
    with Outbox(tmp_path / "o.db") as ob:
        link = MqttLink(broker.settings(username="pumphouse-a"), AGENT, SITE, ob, b"{}")
        link.start()
        assert link.wait_for(lambda: link.state == "connected", WAIT_S), link.state
        link.close(5.0)


def test_unreadable_password_file_is_a_state_not_a_crash(broker_factory, tmp_path):
    broker = broker_factory(users={"pumphouse-a": "x"})
    with Outbox(tmp_path / "o.db") as ob:
        link = MqttLink(broker.settings(username="pumphouse-a", password_file=tmp_path / "nope"),
                        AGENT, SITE, ob, b"{}")
        link.start()
        assert link.wait_for(lambda: link.attempts >= 2, WAIT_S)
        assert link.state.startswith(f"password file {tmp_path / 'nope'} cannot be read")
        assert "broker.password_file" in link.state
        link.close(1.0)


def test_refused_connection_is_a_state(tmp_path, broker):
    broker.stop()
    with Outbox(tmp_path / "o.db") as ob:
        link = MqttLink(broker.settings(), AGENT, SITE, ob, b"{}")
        link.start()                                # a missing broker at boot is not fatal
        assert link.wait_for(lambda: link.attempts >= 2, WAIT_S)
        assert link.state.startswith(f"connection refused by 127.0.0.1:{broker.port}")
        broker.start()
        assert link.wait_for(lambda: link.state == "connected", WAIT_S)
        link.close(2.0)


# --------------------------------------------------------------------------- TLS
def test_tls_with_test_ca_and_client_certificate(broker_factory, tls_files, tmp_path):
    broker = broker_factory(tls=tls_files, require_certificate=True)
    settings = broker.settings(host="localhost", cert_file=tls_files.client_cert,
                               key_file=tls_files.client_key)
    with Outbox(tmp_path / "o.db") as ob:
        link = make_link(settings, ob)
        link.start()
        for n in range(3):
            link.send("result", link.topics.result(POINT), result_body(n))
        assert link.wait_for(lambda: ob.depth == 0 and link.in_flight == 0, WAIT_S), link.state
        assert link.state == "connected"
        link.close(5.0)
    assert "(p5," in broker.log_text()


def test_tls_wrong_ca_gives_a_clear_state(broker_factory, tls_files, tmp_path, caplog):
    broker = broker_factory(tls=tls_files)
    other = make_tls_files(tmp_path, name="other")
    caplog.set_level(logging.INFO)
    with Outbox(tmp_path / "o.db") as ob:
        link = MqttLink(broker.settings(ca_file=other.ca_cert), AGENT, SITE, ob, b"{}")
        link.start()
        assert link.wait_for(lambda: link.attempts >= 3, WAIT_S)
        assert link.state.startswith("TLS: certificate verify failed")
        assert link.state.endswith("check broker.ca_file")
        assert sum(link.state in r.getMessage() for r in caplog.records) == 1
        assert not link.connected
        link.close(1.0)


def test_tls_hostname_mismatch_and_plaintext_port(broker_factory, tmp_path, broker):
    # A certificate for another name, signed by the CA we trust.
    elsewhere = make_tls_files(tmp_path, name="elsewhere", san="DNS:mqtt.elsewhere.invalid")
    tls_broker = broker_factory(tls=elsewhere)
    with Outbox(tmp_path / "a.db") as ob:
        link = MqttLink(tls_broker.settings(), AGENT, SITE, ob, b"{}")
        link.start()
        assert link.wait_for(lambda: link.attempts >= 2, WAIT_S)
        assert "does not name '127.0.0.1'" in link.state and "broker.host" in link.state
        link.close(1.0)
    with Outbox(tmp_path / "b.db") as ob:
        # TLS towards a plaintext listener.
        link = MqttLink(broker.settings(tls=True, ca_file=elsewhere.ca_cert), AGENT, SITE, ob, b"{}")
        link.start()
        assert link.wait_for(lambda: link.attempts >= 2, WAIT_S)
        assert link.state.startswith("TLS:") and "broker.port" in link.state, link.state
        link.close(1.0)


def test_missing_ca_file_is_refused_at_start(broker, tmp_path):
    with pytest.raises(BrokerError, match="broker.ca_file"):
        tls_context(broker.settings(tls=True, ca_file=tmp_path / "absent.crt"))
    with Outbox(tmp_path / "o.db") as ob:
        link = MqttLink(broker.settings(tls=True, ca_file=tmp_path / "absent.crt"), AGENT, SITE,
                        ob, b"{}")
        with pytest.raises(BrokerError, match="broker.ca_file"):
            link.start()


def test_caller_mistakes(broker, tmp_path):
    with Outbox(tmp_path / "o.db") as ob:
        for kwargs in ({"window": 0}, {"window": 1001}):
            with pytest.raises(ValueError):
                MqttLink(broker.settings(), AGENT, SITE, ob, b"{}", **kwargs)
        with pytest.raises(ValueError):
            MqttLink(broker.settings(), AGENT, SITE, ob, "not bytes")
        with pytest.raises(ValueError):
            MqttLink(broker.settings(), "a/b", SITE, ob, b"{}")
        link = MqttLink(broker.settings(), AGENT, SITE, ob, b"{}")
        assert link.close(1.0) is True               # closing a link never started is fine
