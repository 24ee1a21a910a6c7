"""A real mosquitto broker for tests, and helpers around it.

Public API
----------
- :class:`Broker` ``(workdir, *, tls=None, users=None, persistence=True, require_certificate=False, extra=())``:
  ``start()``, ``stop()`` (SIGTERM, saves persistence), ``kill()`` (SIGKILL),
  ``restart()``, ``host``, ``port``, ``log_text()``, ``settings(**overrides)``
  -> an ``agent.config.BrokerSettings`` pointing at this broker.
- :func:`make_tls_files(folder, name="test", san=...)` -> :class:`TlsFiles`: a
  CA, a server certificate for ``DNS:localhost, IP:127.0.0.1`` (or ``san``)
  and a client certificate, all made with ``openssl``.
- :class:`Subscriber` ``(broker, topic_filter, ...)``: a paho client that
  collects messages; ``wait_for(predicate, timeout_s)``, ``messages``,
  ``payloads(kind=None)``, ``close()``.
- :func:`free_port()`, :func:`wait_until(predicate, timeout_s)`.
- Fixtures: ``broker_factory`` (call it with Broker's keyword arguments; every
  broker is stopped at the end of the test), ``broker`` (one plain broker on
  loopback, anonymous, persistence on), ``tls_files``.
"""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import threading
import time
from dataclasses import dataclass, replace
from pathlib import Path

import pytest

__all__ = ["Broker", "Subscriber", "TlsFiles", "make_tls_files", "free_port", "wait_until",
           "broker_factory", "broker", "tls_files"]

START_TIMEOUT_S = 10.0


def free_port():
    """A TCP port on 127.0.0.1 that was free a moment ago."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def wait_until(predicate, timeout_s, step_s=0.01):
    """Poll ``predicate`` until true or ``timeout_s``; for conditions that give no event
    (a file appearing, a port opening).  Returns the last value."""
    deadline = time.monotonic() + timeout_s
    while True:
        value = predicate()
        if value or time.monotonic() >= deadline:
            return value
        time.sleep(step_s)


@dataclass(frozen=True)
class TlsFiles:
    """Paths of a test PKI."""

    ca_cert: Path
    ca_key: Path
    server_cert: Path
    server_key: Path
    client_cert: Path
    client_key: Path


def _openssl(*args, cwd):
    subprocess.run(["openssl", *args], cwd=cwd, check=True, capture_output=True, timeout=30)


def make_tls_files(folder, name="test", san="DNS:localhost,IP:127.0.0.1"):
    """Make a CA and a server and a client certificate signed by it.

    The server certificate names ``san`` in its subjectAltName, by default
    ``DNS:localhost, IP:127.0.0.1`` (hostname checks use the SAN, not the CN).
    Keys are P-256 EC keys, which are quick to make.
    """
    folder = Path(folder) / f"pki-{name}"
    folder.mkdir(parents=True, exist_ok=True)
    f = TlsFiles(*(folder / n for n in ("ca.crt", "ca.key", "server.crt", "server.key",
                                        "client.crt", "client.key")))
    ec = ["-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes"]
    _openssl("req", "-x509", *ec, "-keyout", f.ca_key.name, "-out", f.ca_cert.name, "-days", "2",
             "-subj", f"/CN=ballpass {name} CA", "-addext", "basicConstraints=critical,CA:TRUE",
             "-addext", "keyUsage=critical,keyCertSign,cRLSign", cwd=folder)
    for role, cn, ext in (
            ("server", "localhost", f"subjectAltName={san}\n"
                                    "extendedKeyUsage=serverAuth\n"),
            ("client", "ballpass-agent", "extendedKeyUsage=clientAuth\n")):
        (folder / f"{role}.ext").write_text("basicConstraints=CA:FALSE\n" + ext)
        _openssl("req", "-new", *ec, "-keyout", f"{role}.key", "-out", f"{role}.csr",
                 "-subj", f"/CN={cn}", cwd=folder)
        _openssl("x509", "-req", "-in", f"{role}.csr", "-CA", f.ca_cert.name, "-CAkey", f.ca_key.name,
                 "-CAcreateserial", "-out", f"{role}.crt", "-days", "2", "-extfile", f"{role}.ext",
                 cwd=folder)
    return f


class Broker:
    """One mosquitto process on a free loopback port with its own config.

    Parameters
    ----------
    workdir : Path
        Where the config, log, password file and persistence go.
    tls : TlsFiles, optional
        Serve TLS with this server certificate.
    users : dict, optional
        ``{user: password}``: anonymous access off, a password file made with
        ``mosquitto_passwd``.
    persistence : bool, optional
        Keep sessions and retained messages across restarts (saved on every
        change and at a clean stop).
    require_certificate : bool, optional
        With ``tls``: clients must present a certificate signed by the CA.
    extra : sequence of str, optional
        More config lines.
    """

    def __init__(self, workdir, *, tls=None, users=None, persistence=True,
                 require_certificate=False, extra=()):
        self.workdir = Path(workdir)
        self.workdir.mkdir(parents=True, exist_ok=True)
        self.host = "127.0.0.1"
        self.port = free_port()
        self.tls = tls
        self.users = dict(users or {})
        self.persistence = persistence
        self.require_certificate = require_certificate
        self.extra = tuple(extra)
        self.conf_path = self.workdir / "mosquitto.conf"
        self.log_path = self.workdir / "mosquitto.log"
        self.db_dir = self.workdir / "db"
        self.proc = None
        self._write_config()

    def _write_config(self):
        lines = [f"listener {self.port} {self.host}",
                 f"log_dest file {self.log_path}",
                 "log_type error", "log_type warning", "log_type notice", "log_type information",
                 "connection_messages true",
                 "max_queued_messages 100000"]
        if os.geteuid() == 0:
            lines.append("user root")  # else mosquitto drops to a 'mosquitto' user
        if self.users:
            pw = self.workdir / "passwords"
            pw.unlink(missing_ok=True)
            for i, (user, password) in enumerate(self.users.items()):
                cmd = ["mosquitto_passwd", "-b", str(pw), user, password]
                if i == 0:
                    cmd.insert(1, "-c")
                subprocess.run(cmd, check=True, capture_output=True, timeout=30)
            lines += ["allow_anonymous false", f"password_file {pw}"]
        else:
            lines.append("allow_anonymous true")
        if self.tls is not None:
            lines += [f"cafile {self.tls.ca_cert}", f"certfile {self.tls.server_cert}",
                      f"keyfile {self.tls.server_key}"]
            if self.require_certificate:
                lines.append("require_certificate true")
        if self.persistence:
            self.db_dir.mkdir(exist_ok=True)
            lines += ["persistence true", f"persistence_location {self.db_dir}/",
                      "autosave_on_changes true", "autosave_interval 1"]
        lines += list(self.extra)
        self.conf_path.write_text("\n".join(lines) + "\n")

    @property
    def db_file(self):
        """The persistence file (appears at the first save)."""
        return self.db_dir / "mosquitto.db"

    def start(self):
        """Start mosquitto and wait until it accepts connections."""
        if self.proc is not None and self.proc.poll() is None:
            raise RuntimeError("broker already running")
        self.proc = subprocess.Popen(["mosquitto", "-c", str(self.conf_path)],
                                     stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)

        def accepting():
            if self.proc.poll() is not None:
                return True
            with socket.socket() as s:
                s.settimeout(0.2)
                return s.connect_ex((self.host, self.port)) == 0

        wait_until(accepting, START_TIMEOUT_S)
        if self.proc.poll() is not None:
            err = self.proc.stderr.read().decode(errors="replace")
            raise RuntimeError(f"mosquitto exited with {self.proc.returncode}: {err}\n{self.log_text()}")
        return self

    def _end(self, sig):
        if self.proc is None or self.proc.poll() is not None:
            return
        self.proc.send_signal(sig)
        self.proc.wait(timeout=10)
        self.proc.stderr.close()

    def stop(self):
        """Stop cleanly (SIGTERM): mosquitto saves its persistence file."""
        self._end(signal.SIGTERM)

    def kill(self):
        """Kill (SIGKILL): like a power cut of the broker."""
        self._end(signal.SIGKILL)

    def restart(self):
        """Start again on the same port with the same persistence."""
        self.stop()
        return self.start()

    @property
    def running(self):
        return self.proc is not None and self.proc.poll() is None

    def log_text(self):
        return self.log_path.read_text(errors="replace") if self.log_path.exists() else ""

    def settings(self, **overrides):
        """An ``agent.config.BrokerSettings`` for this broker (fast back-off for tests)."""
        from agent.config import BrokerSettings
        base = BrokerSettings(host=self.host, port=self.port, reconnect_min_s=0.1,
                              reconnect_max_s=0.5, keepalive_s=10, tls=self.tls is not None,
                              ca_file=self.tls.ca_cert if self.tls else None)
        return replace(base, **overrides)


class Subscriber:
    """A paho client that collects every message matching ``topic_filter``.

    Parameters
    ----------
    broker : Broker
    topic_filter : str
    client_id : str, optional
        Needed with ``persistent``.
    persistent : bool, optional
        Keep the session (subscription and queued QoS 1 messages) while
        disconnected: MQTT 5 ``clean_start=False`` with a session expiry, or
        MQTT 3.1.1 ``clean_session=False``.
    protocol : {"5", "3.1.1"}
    username, password : str, optional
    tls : TlsFiles, optional
    """

    def __init__(self, broker, topic_filter, *, client_id="", persistent=False, protocol="5",
                 username=None, password=None, tls=None):
        from paho.mqtt import client as mqtt
        from paho.mqtt.packettypes import PacketTypes
        from paho.mqtt.properties import Properties
        self.messages = []   # (topic, payload bytes, retain flag)
        self._cond = threading.Condition()
        self.subscribed = threading.Event()
        v5 = protocol == "5"
        kwargs = {"callback_api_version": mqtt.CallbackAPIVersion.VERSION2, "client_id": client_id,
                  "protocol": mqtt.MQTTv5 if v5 else mqtt.MQTTv311}
        if not v5:
            kwargs["clean_session"] = not persistent
        c = mqtt.Client(**kwargs)
        if username:
            c.username_pw_set(username, password)
        if tls is not None:
            c.tls_set(ca_certs=str(tls.ca_cert))
        c.reconnect_delay_set(0.05, 0.2)

        def on_connect(client, userdata, flags, reason_code, properties):
            if reason_code == 0:
                client.subscribe(topic_filter, qos=1)

        def on_subscribe(client, userdata, mid, reason_codes, properties):
            self.subscribed.set()

        def on_message(client, userdata, msg):
            with self._cond:
                self.messages.append((msg.topic, bytes(msg.payload), bool(msg.retain)))
                self._cond.notify_all()

        c.on_connect, c.on_subscribe, c.on_message = on_connect, on_subscribe, on_message
        if v5:
            props = None
            if persistent:
                props = Properties(PacketTypes.CONNECT)
                props.SessionExpiryInterval = 3600
            c.connect_async(broker.host, broker.port, keepalive=10, clean_start=not persistent,
                            properties=props)
        else:
            c.connect_async(broker.host, broker.port, keepalive=10)
        c.loop_start()
        self.client = c
        if not self.subscribed.wait(START_TIMEOUT_S):
            c.loop_stop()
            raise RuntimeError(f"subscriber could not subscribe to {topic_filter!r}:\n{broker.log_text()}")

    def wait_for(self, predicate, timeout_s=10.0):
        """Wait until ``predicate(messages)`` is true; returns its last value."""
        with self._cond:
            return self._cond.wait_for(lambda: predicate(self.messages), timeout=timeout_s)

    def payloads(self, suffix=None):
        """Decoded JSON payloads, optionally of topics ending in ``suffix``."""
        with self._cond:
            return [json.loads(p) for t, p, _ in self.messages if suffix is None or t.endswith(suffix)]

    def close(self):
        self.client.disconnect()
        self.client.loop_stop()


@pytest.fixture
def broker_factory(tmp_path):
    """Make and start brokers: ``broker_factory(**Broker kwargs)``; all stopped afterwards."""
    made = []

    def make(**kwargs):
        b = Broker(tmp_path / f"broker{len(made)}", **kwargs)
        made.append(b)
        return b.start()

    yield make
    for b in made:
        b.kill()


@pytest.fixture
def broker(broker_factory):
    """A running broker on loopback: anonymous, no TLS, persistence on."""
    return broker_factory()


@pytest.fixture
def tls_files(tmp_path):
    """A test CA with server (localhost, 127.0.0.1) and client certificates."""
    return make_tls_files(tmp_path)
