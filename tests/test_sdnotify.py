"""Tests of agent.sdnotify against the sd_notify protocol.

Each test binds a real AF_UNIX datagram socket, as the service manager does,
points the notifier at it and reads what arrives.  Local AF_UNIX datagrams
are queued on the receiver by the time sendto() returns, so the receiver is
read non-blocking: no waiting, no timing.
"""

import logging
import os
import socket
import struct
import subprocess
import sys
import tempfile
import time
import uuid
from pathlib import Path

import pytest

from agent.sdnotify import Notifier

REPO = Path(__file__).resolve().parents[1]


def _receiver(address):
    """Bind a non-blocking datagram socket at ``address`` (path or @name)."""
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    bind_to = "\0" + address[1:] if address.startswith("@") else address
    sock.bind(bind_to)
    sock.setblocking(False)
    return sock


def _drain(sock):
    """Every datagram waiting on ``sock``, in arrival order."""
    got = []
    while True:
        try:
            got.append(sock.recv(4096))
        except BlockingIOError:
            return got


@pytest.fixture
def path_socket():
    """A receiver bound to a file-system path (short dir: sun_path is 108 B)."""
    with tempfile.TemporaryDirectory(prefix="sdn") as tmp:
        address = os.path.join(tmp, "notify")
        sock = _receiver(address)
        yield address, sock
        sock.close()


@pytest.fixture
def abstract_socket():
    """A receiver bound to a unique name in the Linux abstract namespace."""
    address = f"@ballpass-test-{os.getpid()}-{uuid.uuid4().hex}"
    sock = _receiver(address)
    yield address, sock
    sock.close()


@pytest.mark.parametrize("which", ["path_socket", "abstract_socket"])
def test_each_call_sends_one_protocol_datagram(which, request):
    address, receiver = request.getfixturevalue(which)
    with Notifier.from_env({"NOTIFY_SOCKET": address}) as notifier:
        assert notifier.enabled
        assert notifier.ready() is True
        assert notifier.status("capturing raw-water-pump-2") is True
        assert notifier.watchdog() is True
        assert notifier.stopping() is True
    # Message strings as listed under "Well-known assignments" in
    # sd_notify(3) (man sd_notify): READY=1, STATUS=..., WATCHDOG=1,
    # STOPPING=1, one notification per datagram.
    assert _drain(receiver) == [
        b"READY=1",
        b"STATUS=capturing raw-water-pump-2",
        b"WATCHDOG=1",
        b"STOPPING=1",
    ]


def test_status_is_kept_on_one_line(path_socket):
    address, receiver = path_socket
    with Notifier(address) as notifier:
        notifier.status("point A ok\npoint B: sensor flat\r\nbroker down")
    # sd_notify(3): the message is newline-separated assignments, so a
    # newline inside STATUS= would end the value and start a bogus one.
    assert _drain(receiver) == [
        b"STATUS=point A ok point B: sensor flat broker down"
    ]


def test_status_text_is_utf8(path_socket):
    address, receiver = path_socket
    with Notifier(address) as notifier:
        notifier.status("velocity 2.1 mm/s, zone A, 20 °C")
    # sd_notify(3): STATUS= passes a single-line UTF-8 status string.
    assert _drain(receiver) == ["STATUS=velocity 2.1 mm/s, zone A, 20 °C".encode()]


def test_reloading_carries_the_monotonic_timestamp(path_socket):
    address, receiver = path_socket
    with Notifier(address) as notifier:
        before_usec = time.clock_gettime_ns(time.CLOCK_MONOTONIC) // 1000
        notifier.reloading()
        after_usec = time.clock_gettime_ns(time.CLOCK_MONOTONIC) // 1000
    (datagram,) = _drain(receiver)
    # sd_notify(3): RELOADING=1 together with MONOTONIC_USEC=, the
    # CLOCK_MONOTONIC time in decimal microseconds (needed by
    # Type=notify-reload, systemd 253 and later).
    lines = datagram.decode().split("\n")
    assert lines[0] == "RELOADING=1"
    key, value = lines[1].split("=")
    assert key == "MONOTONIC_USEC"
    assert value.isdigit()
    assert before_usec <= int(value) <= after_usec


def test_datagram_carries_our_pid_for_notify_access_main(path_socket):
    address, receiver = path_socket
    receiver.setsockopt(socket.SOL_SOCKET, socket.SO_PASSCRED, 1)
    with Notifier(address) as notifier:
        notifier.ready()
    data, ancdata, _flags, _addr = receiver.recvmsg(
        4096, socket.CMSG_SPACE(struct.calcsize("3i"))
    )
    # systemd.service(5), NotifyAccess=main: only messages whose sender
    # credentials (SCM_CREDENTIALS, unix(7)) name the main pid are accepted.
    assert data == b"READY=1"
    creds = [d for level, kind, d in ancdata
             if level == socket.SOL_SOCKET and kind == socket.SCM_CREDENTIALS]
    pid, _uid, _gid = struct.unpack("3i", creds[0])
    assert pid == os.getpid()


def test_watchdog_interval_is_half_the_timeout(path_socket):
    address, _receiver_sock = path_socket
    notifier = Notifier.from_env(
        {"NOTIFY_SOCKET": address, "WATCHDOG_USEC": "20000000"}
    )
    # sd_watchdog_enabled(3): WATCHDOG_USEC is in microseconds and the
    # daemon should ping at half that interval: 20 s -> 10 s.
    assert notifier.watchdog_interval_s == 10.0
    notifier.close()


def test_watchdog_pid_of_this_process_is_honoured(path_socket):
    address, _receiver_sock = path_socket
    notifier = Notifier.from_env(
        {"NOTIFY_SOCKET": address, "WATCHDOG_USEC": "20000000",
         "WATCHDOG_PID": str(os.getpid())}
    )
    # sd_watchdog_enabled(3): the watchdog applies when WATCHDOG_PID is
    # unset or equals the calling process.
    assert notifier.watchdog_interval_s == 10.0
    notifier.close()


def test_watchdog_pid_of_another_process_disables_the_watchdog(path_socket):
    address, _receiver_sock = path_socket
    other_pid = os.getppid()
    assert other_pid != os.getpid()
    notifier = Notifier.from_env(
        {"NOTIFY_SOCKET": address, "WATCHDOG_USEC": "20000000",
         "WATCHDOG_PID": str(other_pid)}
    )
    # sd_watchdog_enabled(3): a WATCHDOG_PID naming another process means
    # the watchdog is not meant for us.
    assert notifier.watchdog_interval_s is None
    assert notifier.enabled  # notifications other than the watchdog still go
    notifier.close()


def test_pid_argument_overrides_getpid(path_socket):
    address, _receiver_sock = path_socket
    env = {"NOTIFY_SOCKET": address, "WATCHDOG_USEC": "5000000",
           "WATCHDOG_PID": "4242"}
    with Notifier.from_env(env, pid=4242) as notifier:
        assert notifier.watchdog_interval_s == 2.5  # 5 s / 2, sd_watchdog_enabled(3)
    with Notifier.from_env(env, pid=4243) as notifier:
        assert notifier.watchdog_interval_s is None


def test_without_notify_socket_every_call_is_a_noop(caplog):
    caplog.set_level(logging.DEBUG, logger="agent.sdnotify")
    notifier = Notifier.from_env({"WATCHDOG_USEC": "20000000"})
    # sd_notify(3): with $NOTIFY_SOCKET unset nothing is sent and the call
    # returns 0 (not an error).
    assert not notifier.enabled
    assert notifier.watchdog_interval_s is None
    for call in (notifier.ready, notifier.watchdog, notifier.stopping,
                 notifier.reloading):
        assert call() is False
    assert notifier.status("idle") is False
    notifier.close()
    assert caplog.records == []


def test_empty_notify_socket_is_unset():
    notifier = Notifier.from_env({"NOTIFY_SOCKET": ""})
    # common practice: an empty variable counts as unset (sd_notify(3)
    # sends nothing either way).
    assert not notifier.enabled


def test_relative_notify_socket_is_ignored_with_a_warning(caplog):
    caplog.set_level(logging.WARNING, logger="agent.sdnotify")
    notifier = Notifier.from_env({"NOTIFY_SOCKET": "run/notify"})
    # sd_notify(3): the variable holds an absolute path or an abstract
    # name starting with "@"; anything else is refused.
    assert not notifier.enabled
    assert notifier.ready() is False
    assert len(caplog.records) == 1


def test_bad_watchdog_usec_is_ignored_with_a_warning(path_socket, caplog):
    address, _receiver_sock = path_socket
    caplog.set_level(logging.WARNING, logger="agent.sdnotify")
    for bad in ("soon", "-5", "0"):
        notifier = Notifier.from_env(
            {"NOTIFY_SOCKET": address, "WATCHDOG_USEC": bad})
        assert notifier.watchdog_interval_s is None
        notifier.close()
    assert len(caplog.records) == 3


def test_send_failure_is_logged_once_and_never_raised(caplog):
    caplog.set_level(logging.WARNING, logger="agent.sdnotify")
    with tempfile.TemporaryDirectory(prefix="sdn") as tmp:
        gone = os.path.join(tmp, "notify")  # nobody bound here: ENOENT
        with Notifier(gone) as notifier:
            assert notifier.ready() is False
            assert notifier.watchdog() is False
            assert notifier.status("still here") is False
    warnings = [r for r in caplog.records if r.levelno == logging.WARNING]
    assert len(warnings) == 1
    assert "notify" in warnings[0].getMessage()


def test_closed_notifier_is_a_noop(path_socket):
    address, receiver = path_socket
    notifier = Notifier(address)
    notifier.close()
    assert not notifier.enabled
    assert notifier.ready() is False
    assert _drain(receiver) == []


def test_environment_is_not_modified(path_socket):
    address, _receiver_sock = path_socket
    env = {"NOTIFY_SOCKET": address, "WATCHDOG_USEC": "1000000"}
    Notifier.from_env(env).close()
    assert env == {"NOTIFY_SOCKET": address, "WATCHDOG_USEC": "1000000"}


@pytest.mark.parametrize("bad", [0, -1, 1.5, "100", True])
def test_bad_watchdog_usec_argument_raises(bad):
    with pytest.raises(ValueError, match="watchdog_usec"):
        Notifier(None, watchdog_usec=bad)


@pytest.mark.parametrize("bad", ["relative/path", "@", "", "notify"])
def test_bad_socket_address_argument_raises(bad):
    with pytest.raises(ValueError, match="notify_socket"):
        Notifier(bad)


def test_child_process_notifies_from_its_environment(abstract_socket):
    address, receiver = abstract_socket
    env = dict(os.environ, NOTIFY_SOCKET=address, PYTHONPATH=str(REPO))
    code = ("from agent.sdnotify import Notifier\n"
            "n = Notifier.from_env()\n"
            "n.status('starting'); n.ready(); n.close()\n")
    subprocess.run([sys.executable, "-c", code], env=env, check=True,
                   cwd=str(REPO))
    # sd_notify(3): a service finds the socket through $NOTIFY_SOCKET.
    assert _drain(receiver) == [b"STATUS=starting", b"READY=1"]
