"""The MQTT link: delivers the outbox to the broker, in order, at least once.

Public API
----------
- :class:`MqttLink` ``(broker, agent_id, site, outbox, will_payload, on_state=None, *, window=20)``

  - ``start()``: connect in the background (a missing broker is not an error)
  - ``notify()``: new messages are in the outbox; send them when connected
  - ``send(kind, topic, body, qos=1, retain=False, seq_key=None)``:
    ``outbox.enqueue(...)`` followed by ``notify()``; returns ``(id, seq)``
  - ``publish_now(topic, payload, *, qos=1, retain=True)`` -> ``threading.Event``:
    a message outside the queue (the online status), sent before the queue
  - ``state``: ``"connected"``, ``"connecting"`` or an error text a
    technician can act on; ``reconnects``, ``attempts``, ``rejected``,
    ``in_flight``, ``connected``
  - ``wait_for(predicate, timeout_s)`` -> bool: wait for a condition on the link
  - ``close(timeout_s=5.0)`` -> bool: drain, publish the offline status,
    disconnect; True when the outbox was empty at the end
  - ``topics``: the :class:`~agent.topics.Topics` of this agent

- :func:`explain(problem, broker, during="connection")` -> str: the one translation of paho return
  codes, MQTT reason codes, TLS and socket errors into plain words.
- :func:`tls_context(broker)` -> ``ssl.SSLContext`` (BrokerError for unusable files).
- :func:`read_password(broker)` -> str or None, read now (OSError naming the
  file, never the secret).

How delivery works
------------------
A sender thread of our own publishes outbox messages in id order, only while
connected, and keeps at most ``window`` of them in flight.  A message leaves
the outbox only when paho's ``on_publish`` reports the broker's PUBACK for its
message id.  When the connection drops, paho keeps the messages in flight
(at most ``window``) and sends them again, in order, right after the next
CONNACK; the sender then carries on with the rest of the outbox.  After a
restart of the process the outbox still holds every unacknowledged message,
and the new process sends them from the oldest.  A message can therefore
arrive twice (the broker got it but its PUBACK was lost); the ``seq`` field
lets subscribers drop the second copy.  Nothing is ever published while
disconnected, and paho's own queue is bounded (``max_queued_messages_set``),
so paho never holds a second copy of the backlog.

The link subscribes to nothing: nothing received over MQTT can run code or
change files or configuration.

Secrets: the password is read from ``broker.password_file`` (or
``$CREDENTIALS_DIRECTORY/broker-password``) right before each connection
attempt; it never appears in a log line, a state text or an exception.
"""

from __future__ import annotations

import collections
import functools
import logging
import os
import socket
import ssl
import threading
import time
from pathlib import Path

from agent.errors import BrokerError
from agent.payloads import encode
from agent.topics import Topics

__all__ = ["MqttLink", "explain", "tls_context", "read_password", "CONNECTED", "CONNECTING",
           "CREDENTIAL_NAME"]

log = logging.getLogger(__name__)

CONNECTED = "connected"
CONNECTING = "connecting"
CLOSED = "closed"
CREDENTIAL_NAME = "broker-password"  # file name below $CREDENTIALS_DIRECTORY (systemd LoadCredential=)


class _CredentialError(OSError):
    """The password file cannot be read (an OSError, so paho retries with back-off)."""


# --------------------------------------------------------------------------- errors
_REFUSALS = {
    "Bad user name or password": "not authorised: check broker.username and the password file",
    "Not authorized": "not authorised: check broker.username and the password file",
    "Client identifier not valid": "client id refused by the broker: check broker.client_id",
    "Identifier rejected": "client id refused by the broker: check broker.client_id",
    "Unsupported protocol version": ("the broker does not speak this MQTT version: "
                                     "try broker.protocol = \"3.1.1\""),
    "Server unavailable": "the broker is unavailable (it refused the connection for now)",
    "Server busy": "the broker is busy (it refused the connection for now)",
    "Banned": "this client is banned by the broker",
    "Quota exceeded": "the broker's quota for this client is exceeded",
    "Connection rate exceeded": "connecting too often for the broker; it asked us to slow down",
    "Session taken over": "another client connected with the same client id: check broker.client_id",
}


def explain(problem, broker, during="connection"):
    """Turn a paho code, an MQTT reason code or a network/TLS error into plain words.

    This is the only function that interprets library errors of the MQTT link;
    the texts become the link's ``state`` (published in the health status) and
    the messages of :class:`~agent.errors.BrokerError`.

    Parameters
    ----------
    problem : ReasonCode, MQTTErrorCode, OSError or ssl.SSLError
        What paho or the socket layer reported.
    broker : BrokerSettings
        For the host and port in the text.
    during : {"connection", "connecting", "tls_files"}, optional
        What was going on: an established connection, a connection attempt
        (socket, TLS handshake), or loading the TLS files at start.

    Returns
    -------
    str
        A sentence naming the likely cause and the setting to check.  It never
        contains the password.
    """
    where = f"{broker.host}:{broker.port}"
    if during == "tls_files":
        detail = getattr(problem, "strerror", None) or getattr(problem, "reason", None) or str(problem)
        name = getattr(problem, "filename", None)
        return (f"TLS files cannot be loaded ({detail}{f': {name}' if name else ''}): check "
                f"broker.ca_file, broker.cert_file and broker.key_file")
    if isinstance(problem, _CredentialError):
        return str(problem)
    if isinstance(problem, ssl.SSLCertVerificationError):
        detail = problem.verify_message or problem.reason or "unknown reason"
        low = detail.lower()
        if "hostname mismatch" in low or "ip address mismatch" in low:
            return (f"TLS: the broker's certificate does not name {broker.host!r}: check broker.host "
                    f"(it must match the certificate's subjectAltName)")
        if "expired" in low or "not yet valid" in low:
            return (f"TLS: the broker's certificate is {detail}: check the certificate and this "
                    f"machine's clock")
        return f"TLS: certificate verify failed ({detail}): check broker.ca_file"
    if isinstance(problem, ssl.SSLError):
        reason = problem.reason or problem.__class__.__name__
        if reason == "WRONG_VERSION_NUMBER":
            return f"TLS: {where} does not answer with TLS: check broker.port and broker.tls"
        if "CERTIFICATE" in reason or "ALERT" in reason:
            return (f"TLS: the broker refused the handshake ({reason}): check broker.cert_file and "
                    f"broker.key_file")
        return f"TLS: handshake with {where} failed ({reason})"
    if isinstance(problem, ConnectionRefusedError):
        return f"connection refused by {where}: is the broker running, and is broker.port right?"
    if isinstance(problem, socket.gaierror):
        return f"cannot resolve broker.host {broker.host!r} ({problem.strerror or problem})"
    if isinstance(problem, TimeoutError):
        return f"no answer from {where} (timed out): check broker.host, broker.port and the network"
    if isinstance(problem, ConnectionResetError) and during == "connecting" and broker.tls:
        return (f"TLS: {where} closed the connection during the handshake: check broker.port "
                f"and broker.tls (is it a TLS listener?)")
    if isinstance(problem, ConnectionError):
        return f"connection to {where} lost ({problem.strerror or problem.__class__.__name__})"
    if isinstance(problem, OSError):
        return f"network error with {where}: {problem.strerror or problem}"
    if hasattr(problem, "is_failure") and hasattr(problem, "getName"):  # paho ReasonCode
        name = problem.getName()
        text = _REFUSALS.get(name)
        return text if text is not None else f"the broker refused: {name}"
    from paho.mqtt import client as mqtt  # lazy: only reached with a paho code
    if isinstance(problem, mqtt.MQTTErrorCode):
        if problem == mqtt.MQTTErrorCode.MQTT_ERR_QUEUE_SIZE:
            return "paho's send queue is full (messages stay in the outbox)"
        if problem == mqtt.MQTTErrorCode.MQTT_ERR_NO_CONN:
            return CONNECTING
        return f"MQTT client error: {mqtt.error_string(problem)}"
    return f"unexpected broker problem: {problem!r}"


# --------------------------------------------------------------------------- connection parts
def tls_context(broker):
    """The TLS context for the broker connection.

    Parameters
    ----------
    broker : BrokerSettings
        ``ca_file`` (None: the system's trusted CAs), optional ``cert_file``
        and ``key_file`` for a client certificate.

    Returns
    -------
    ssl.SSLContext
        Certificate and host name checked (TLS 1.2 or newer, Python's defaults).

    Raises
    ------
    BrokerError
        When a file cannot be read or is not a certificate / key.
    """
    try:
        context = ssl.create_default_context(
            ssl.Purpose.SERVER_AUTH, cafile=str(broker.ca_file) if broker.ca_file else None)
        if broker.cert_file is not None:
            context.load_cert_chain(str(broker.cert_file), str(broker.key_file))
    except OSError as exc:  # ssl.SSLError is an OSError
        raise BrokerError(explain(exc, broker, during="tls_files")) from None
    return context


def read_password(broker):
    """The broker password, read now from its file.

    Parameters
    ----------
    broker : BrokerSettings
        ``password_file``; when None, ``$CREDENTIALS_DIRECTORY/broker-password``
        is used if it exists (systemd ``LoadCredential=``).

    Returns
    -------
    str or None
        The file's text without the trailing line break; None when there is no
        password source.

    Raises
    ------
    OSError
        (a subclass) when the file cannot be read; its text names the file and
        the setting, never the content.  :func:`explain` passes it through.
    """
    path = broker.password_file
    if path is None:
        creds = os.environ.get("CREDENTIALS_DIRECTORY")
        if not creds:
            return None
        path = Path(creds) / CREDENTIAL_NAME
        if not path.exists():
            return None
    try:
        data = Path(path).read_bytes()
    except OSError as exc:
        why = exc.strerror or type(exc).__name__
        raise _CredentialError(f"password file {path} cannot be read ({why}): "
                               f"check broker.password_file") from None
    try:
        return data.decode("utf-8").rstrip("\r\n")
    except UnicodeDecodeError:
        raise _CredentialError(f"password file {path} is not UTF-8 text: "
                               f"check broker.password_file") from None


# --------------------------------------------------------------------------- the link
class MqttLink:
    """Connection to the broker and delivery of the outbox.

    Parameters
    ----------
    broker : BrokerSettings
        Host, port, protocol, TLS files, user name, password file, back-off.
    agent_id, site : str
        Topic levels of this agent (``agent.name``, ``agent.site``).
    outbox : Outbox
        The queue to deliver; messages are removed when the broker has them.
    will_payload : bytes, dict or callable
        The offline status, used as the last will (retained, QoS 1) and
        published by :meth:`close`: encoded bytes, or a body dict from
        :func:`agent.payloads.status` (it then gets the next ``seq`` of the
        status stream and is encoded), or a callable returning either.  A
        callable is called before every connection attempt and at close, so
        time, health and ``seq`` are fresh.
    on_state : callable, optional
        ``on_state(state)`` after every change of :attr:`state`; called from
        the network thread (keep it short; it may call :meth:`publish_now`,
        e.g. the online status on ``"connected"``).
    window : int, optional
        Most outbox messages in flight (sent, PUBACK not yet received);
        default 20.

    Notes
    -----
    Configuration is validated before (``agent.config``); this class refuses
    nothing at run time: plaintext to a remote host has been allowed on
    purpose if it gets here.
    """

    def __init__(self, broker, agent_id, site, outbox, will_payload, on_state=None, *, window=20):
        if not isinstance(window, int) or isinstance(window, bool) or not 1 <= window <= 1000:
            raise ValueError(f"{window=} must be a whole number from 1 to 1000")
        if not (isinstance(will_payload, (bytes, bytearray, dict)) or callable(will_payload)):
            raise ValueError("will_payload must be bytes, a status body dict, or a callable "
                             "returning one of them")
        if not isinstance(broker.host, str) or not broker.host:
            raise ValueError(f"broker.host={broker.host!r} must be a non-empty string")
        if not 1 <= int(broker.port) <= 65535:
            raise ValueError(f"broker.port={broker.port!r} must be from 1 to 65535")
        if broker.protocol not in ("5", "3.1.1"):
            raise ValueError(f"broker.protocol={broker.protocol!r} must be '5' or '3.1.1'")
        self.broker = broker
        self.topics = Topics(broker.topic_prefix, site, agent_id)
        self.outbox = outbox
        self.window = window
        self._will = will_payload
        self._on_state = on_state
        self._client_id = broker.client_id or f"ballpass-{site}-{agent_id}"

        self._client = None
        self._thread = None
        self._state = CONNECTING
        self._connected = False
        self._ever_connected = False
        self._closing = False
        self._stop = False
        self._reconnects = 0
        self._attempts = 0
        self._rejected = 0
        self._publish_problem = None
        self._last_will = b""

        self._cond = threading.Condition()      # waiters of wait_for(); guards _state
        self._wake = threading.Event()          # the sender has work
        self._acked = collections.deque()       # (mid, reason_code) from on_publish
        self._direct_lock = threading.Lock()
        self._direct = {}                       # topic -> (payload, qos, retain, event)
        # Touched by the sender thread only:
        self._inflight = {}                     # mid -> (outbox id or None, event or None)
        self._cursor = 0                        # highest outbox id handed to paho

    # ------------------------------------------------------------------ properties
    @property
    def state(self):
        """``"connected"``, ``"connecting"`` or an error text."""
        return self._state

    @property
    def connected(self):
        """True between a successful CONNACK and the loss of the connection."""
        return self._connected

    @property
    def reconnects(self):
        """Successful connections after the first one."""
        return self._reconnects

    @property
    def attempts(self):
        """Connection attempts so far (successful or not)."""
        return self._attempts

    @property
    def rejected(self):
        """Messages the broker acknowledged with a failure reason (not retried)."""
        return self._rejected

    @property
    def in_flight(self):
        """Messages sent and waiting for the broker's acknowledgement."""
        return len(self._inflight)

    # ------------------------------------------------------------------ lifecycle
    def start(self):
        """Create the client and connect in the background.

        Returns immediately; a broker that is not there yet is retried with
        capped, doubling back-off (``broker.reconnect_min_s`` ..
        ``reconnect_max_s``).

        Raises
        ------
        BrokerError
            When the TLS files cannot be loaded (bad path or format).
        """
        if self._client is not None:
            raise ValueError("start() was called already")
        from paho.mqtt import client as mqtt  # lazy: the package imports without paho
        b = self.broker
        v5 = b.protocol == "5"
        kwargs = {"callback_api_version": mqtt.CallbackAPIVersion.VERSION2,
                  "client_id": self._client_id,
                  "protocol": mqtt.MQTTv5 if v5 else mqtt.MQTTv311}
        if not v5:
            kwargs["clean_session"] = True
        client = _client_class(mqtt)(**kwargs)
        client.ballpass_link = self
        client.on_log = _paho_log
        client.on_connect = self._on_connect
        client.on_disconnect = self._on_disconnect
        client.on_publish = self._on_publish
        client.max_inflight_messages_set(self.window)
        client.max_queued_messages_set(self.window + 8)  # + room for the status messages
        client.reconnect_delay_set(b.reconnect_min_s, max(b.reconnect_min_s, b.reconnect_max_s))
        if b.tls:
            client.tls_set_context(tls_context(b))
        self._last_will = self._will_bytes()
        self._client = client
        self._thread = threading.Thread(target=self._run, name="ballpass-mqtt-sender", daemon=True)
        self._thread.start()
        if v5:
            client.connect_async(b.host, int(b.port), keepalive=int(b.keepalive_s), clean_start=True)
        else:
            client.connect_async(b.host, int(b.port), keepalive=int(b.keepalive_s))
        client.loop_start()
        log.info("broker %s:%s: connecting (MQTT %s%s)", b.host, b.port, b.protocol,
                 ", TLS" if b.tls else "")

    def close(self, timeout_s=5.0):
        """Deliver what is waiting, publish the offline status, disconnect.

        Parameters
        ----------
        timeout_s : float, optional
            Longest wait for the outbox to drain (only while connected; what
            is left stays in the outbox for the next start).

        Returns
        -------
        bool
            True when nothing was left waiting.
        """
        if not timeout_s >= 0:
            raise ValueError(f"{timeout_s=} must be >= 0")
        client = self._client
        if client is None or self._stop:
            return self.outbox.depth == 0
        deadline = time.monotonic() + timeout_s
        self.notify()
        drained = self.wait_for(lambda: self._is_drained() or not self._connected, timeout_s)
        drained = drained and self._is_drained()
        if self._connected:
            sent = self.publish_now(self.topics.status, self._will_bytes(), qos=1, retain=True)
            self.notify()
            sent.wait(max(deadline - time.monotonic(), 1.0))
        self._closing = True
        client.disconnect()
        client.loop_stop()
        self._stop = True
        self._wake.set()
        if self._thread is not threading.current_thread():
            self._thread.join(timeout=max(deadline - time.monotonic(), 1.0))
        self._set_state(CLOSED)
        return drained and self.outbox.depth == 0

    def __enter__(self):
        self.start()
        return self

    def __exit__(self, *exc):
        self.close()

    # ------------------------------------------------------------------ sending
    def notify(self):
        """Tell the sender that the outbox has new messages."""
        self._wake.set()

    def send(self, kind, topic, body, qos=1, retain=False, seq_key=None):
        """Enqueue a message in the outbox and wake the sender.

        Returns
        -------
        (int, int)
            The outbox id and the ``seq`` of the message.
        """
        result = self.outbox.enqueue(kind, topic, body, qos=qos, retain=retain, seq_key=seq_key)
        self._wake.set()
        return result

    def publish_now(self, topic, payload, *, qos=1, retain=True):
        """Publish a message outside the outbox, ahead of it.

        Parameters
        ----------
        topic : str
            E.g. ``link.topics.status``.
        payload : bytes or dict
            Encoded payload, or a body dict: it then gets the next ``seq`` of
            the topic's stream and is encoded.
        qos : int, optional
            Default 1.
        retain : bool, optional
            Default True (the status is retained).

        Returns
        -------
        threading.Event
            Set when the broker has acknowledged the message.  A message that
            finds the link disconnected is dropped (a newer one for the same
            topic replaces it too), so the event may never be set.
        """
        if isinstance(payload, dict):
            payload = encode(dict(payload, seq=self.outbox.next_seq(topic)))
        if not isinstance(payload, (bytes, bytearray)):
            raise ValueError("payload must be bytes or a body dict")
        event = threading.Event()
        with self._direct_lock:
            self._direct[topic] = (bytes(payload), qos, retain, event)
        self._wake.set()
        return event

    def wait_for(self, predicate, timeout_s):
        """Wait until ``predicate()`` is true; re-checked after every link event.

        Returns
        -------
        bool
            The last value of the predicate (False on timeout).
        """
        with self._cond:
            return bool(self._cond.wait_for(predicate, timeout=timeout_s))

    def _is_drained(self):
        """Nothing waiting: outbox empty, nothing in flight, no direct message pending."""
        return self.outbox.depth == 0 and not self._inflight and not self._direct

    def _notify_waiters(self):
        with self._cond:
            self._cond.notify_all()

    def _run(self):
        """The sender thread: acknowledgements in, outbox messages out."""
        idle_s = max(float(self.broker.keepalive_s), 1.0)  # safety net if notify() is forgotten
        while not self._stop:
            self._wake.wait(timeout=idle_s)
            self._wake.clear()
            if self._stop:
                break
            try:  # the top of this thread: report and carry on with the next wake-up
                self._take_acks()
                if self._connected:
                    self._send_direct()
                    self._send_outbox()
            except Exception:  # noqa: BLE001 - top-level loop of the sender thread
                log.exception("sending to the broker failed; will retry")
            self._notify_waiters()

    def _take_acks(self):
        done = []
        while self._acked:
            mid, reason = self._acked.popleft()
            entry = self._inflight.pop(mid, None)
            if entry is None:
                continue
            msg_id, event = entry
            if reason is not None and reason.is_failure:
                self._rejected += 1
                log.warning("broker refused a message (%s); it is not sent again",
                            explain(reason, self.broker))
            if msg_id is not None:
                done.append(msg_id)
            if event is not None:
                event.set()
        if done:
            self.outbox.ack_many(done)

    def _send_direct(self):
        with self._direct_lock:
            items, self._direct = self._direct, {}
        for topic, (payload, qos, retain, event) in items.items():
            taken, go_on = self._publish(topic, payload, qos, retain, None, event)
            if not go_on:
                break

    def _send_outbox(self):
        free = self.window - len(self._inflight)
        if free <= 0:
            return
        for m in self.outbox.peek(free, after_id=self._cursor):
            taken, go_on = self._publish(m.topic, m.payload, m.qos, m.retain, m.id, None)
            if taken:
                self._cursor = m.id
            if not go_on:
                break

    def _publish(self, topic, payload, qos, retain, msg_id, event):
        """Hand one message to paho.

        Returns
        -------
        (bool, bool)
            Whether paho took the message (it is tracked until its PUBACK),
            and whether to go on with the next one.
        """
        from paho.mqtt import client as mqtt
        info = self._client.publish(topic, payload, qos=qos, retain=retain)
        if info.rc == mqtt.MQTTErrorCode.MQTT_ERR_SUCCESS:
            self._inflight[info.mid] = (msg_id, event)
            self._publish_problem = None
            return True, True
        if info.rc == mqtt.MQTTErrorCode.MQTT_ERR_NO_CONN and qos > 0:
            # The connection went away in between: paho keeps this QoS 1 message
            # (its queue is bounded) and sends it after the next CONNACK.
            self._inflight[info.mid] = (msg_id, event)
            return True, False
        problem = explain(info.rc, self.broker)
        if problem != self._publish_problem:
            log.warning("broker %s:%s: publish not accepted: %s", self.broker.host,
                        self.broker.port, problem)
            self._publish_problem = problem
        return False, False

    # ------------------------------------------------------------------ paho callbacks
    # These run on paho's network thread: no I/O, no blocking, no exceptions.
    def _before_attempt(self, client):
        self._attempts += 1
        if callable(self._will):
            try:  # the daemon's callable; a failure must not stop paho's thread
                self._last_will = self._will_bytes()
            except Exception:  # noqa: BLE001
                log.exception("building the last-will status failed; using the previous one")
        client.will_set(self.topics.status, self._last_will, qos=1, retain=True)
        username = self.broker.username
        if username:
            client.username_pw_set(username, read_password(self.broker))
        self._notify_waiters()

    def _attempt_failed(self, exc):
        self._set_state(explain(exc, self.broker, during="connecting"))

    def _on_connect(self, client, userdata, flags, reason_code, properties):
        if reason_code.is_failure:
            self._set_state(explain(reason_code, self.broker))
            return
        if self._ever_connected:
            self._reconnects += 1
        self._ever_connected = True
        self._connected = True
        self._set_state(CONNECTED)
        self._wake.set()

    def _on_disconnect(self, client, userdata, flags, reason_code, properties):
        was_connected, self._connected = self._connected, False
        if self._closing:
            return
        if was_connected:
            log.warning("broker %s:%s: connection lost (%s); reconnecting", self.broker.host,
                        self.broker.port, reason_code)
            self._set_state(CONNECTING)
        self._wake.set()

    def _on_publish(self, client, userdata, mid, reason_code, properties):
        self._acked.append((mid, reason_code))
        self._wake.set()

    # ------------------------------------------------------------------ helpers
    def _set_state(self, state):
        with self._cond:
            changed, self._state = state != self._state, state
            self._cond.notify_all()         # also unchanged: an attempt happened
        if not changed:
            return
        where = f"{self.broker.host}:{self.broker.port}"
        if state in (CONNECTED, CONNECTING, CLOSED):
            log.info("broker %s: %s", where, state)
        else:
            log.warning("broker %s: %s", where, state)
        if self._on_state is not None:
            try:  # a callback boundary on paho's thread: an exception would stop the network loop
                self._on_state(state)
            except Exception:  # noqa: BLE001
                log.exception("on_state callback failed")

    def _will_bytes(self):
        payload = self._will() if callable(self._will) else self._will
        if isinstance(payload, dict):
            payload = encode(dict(payload, seq=self.outbox.next_seq(self.topics.status)))
        if not isinstance(payload, (bytes, bytearray)):
            raise ValueError("will_payload must give bytes or a status body dict")
        return bytes(payload)



_paho_logger = logging.getLogger(__name__ + ".paho")


def _paho_log(client, userdata, level, buf):
    """paho's log, at debug level: the link's state and warnings say what matters.

    paho logs a failed reconnect at ERROR on every retry; those lines would flood
    the journal while the broker is away.  Only exceptions caught in our
    callbacks keep the ERROR level.
    """
    if buf.startswith("Caught exception"):
        _paho_logger.error("%s", buf)
    else:
        _paho_logger.debug("%s", buf)


@functools.cache
def _client_class(mqtt):
    """paho's Client with a hook around every connection attempt.

    ``reconnect()`` is where paho opens the socket and does the TLS handshake;
    paho's loop swallows the exception and retries, so this is the one place
    to see *why* an attempt failed, and to read the password right before it.
    """
    class _Client(mqtt.Client):
        ballpass_link = None

        def reconnect(self):
            link = self.ballpass_link
            try:
                link._before_attempt(self)
                return super().reconnect()
            except OSError as exc:
                link._attempt_failed(exc)
                raise

    return _Client
