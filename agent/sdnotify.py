"""Service-manager notifications (the sd_notify protocol) without libsystemd.

Public API
----------
- ``Notifier(socket_address=None, *, watchdog_usec=None)``: a sender bound to
  one notification socket (or to none, then every call is a no-op).
- ``Notifier.from_env(environ=os.environ, *, pid=None)``: the sender that
  ``$NOTIFY_SOCKET``, ``$WATCHDOG_USEC`` and ``$WATCHDOG_PID`` describe.
- ``Notifier.ready()``, ``.status(text)``, ``.watchdog()``, ``.stopping()``,
  ``.reloading()``: send one notification each; return True when sent.
- ``Notifier.enabled``, ``Notifier.watchdog_interval_s``, ``Notifier.close()``.

The protocol is one datagram per notification on an ``AF_UNIX`` /
``SOCK_DGRAM`` socket, holding newline-separated ``KEY=VALUE`` assignments.
Sending never raises: the daemon must keep working when the service manager
is absent or restarting, so a failed send is logged once at warning level.
"""

import logging
import os
import socket
import time

__all__ = ["Notifier"]

_log = logging.getLogger(__name__)


def _socket_address(notify_socket):
    """Turn a ``$NOTIFY_SOCKET`` value into a ``socket.sendto`` address.

    Parameters
    ----------
    notify_socket : str
        An absolute file-system path, or ``@name`` for a socket in the Linux
        abstract namespace.

    Returns
    -------
    bytes
        The address; an abstract name starts with a NUL byte.

    Raises
    ------
    ValueError
        When the value is neither an absolute path nor ``@name``.
    """
    if notify_socket.startswith("@") and len(notify_socket) > 1:
        return b"\0" + os.fsencode(notify_socket[1:])
    if notify_socket.startswith("/"):
        return os.fsencode(notify_socket)
    raise ValueError(
        f"{notify_socket=} must be an absolute path or '@' followed by an "
        "abstract socket name"
    )


def _one_line(text):
    """Make ``text`` a single protocol value (no newline, no NUL)."""
    return (
        str(text)
        .replace("\r\n", " ")
        .replace("\n", " ")
        .replace("\r", " ")
        .replace("\0", " ")
    )


class Notifier:
    """Send state changes and watchdog pings to the service manager.

    Parameters
    ----------
    socket_address : str or None, default None
        Where to send: an absolute path of an ``AF_UNIX`` datagram socket, or
        ``@name`` for the abstract namespace.  None disables every call.
    watchdog_usec : int or None, default None
        The watchdog timeout the service manager enforces, in microseconds
        (``WatchdogSec=``).  None or no socket: no watchdog.

    Raises
    ------
    ValueError
        When ``socket_address`` is not an absolute path or ``@name``, or
        ``watchdog_usec`` is not a positive integer.

    Notes
    -----
    The socket is created once, here, and reused for every datagram; it is
    not connected, so each datagram goes to the address by name.  When it
    cannot be created the notifier disables itself after one warning.

    References
    ----------
    .. [1] sd_notify(3), systemd manual: message format, ``READY=1``,
       ``STATUS=``, ``WATCHDOG=1``, ``STOPPING=1``, ``RELOADING=1``,
       ``MONOTONIC_USEC=``, and ``$NOTIFY_SOCKET`` with ``@`` for the
       abstract namespace.
    .. [2] sd_watchdog_enabled(3), systemd manual: ``$WATCHDOG_USEC``,
       ``$WATCHDOG_PID``, and pinging at half the timeout.
    """

    def __init__(self, socket_address=None, *, watchdog_usec=None):
        if watchdog_usec is not None and (
            isinstance(watchdog_usec, bool)
            or not isinstance(watchdog_usec, int)
            or watchdog_usec <= 0
        ):
            raise ValueError(f"{watchdog_usec=} must be a positive integer or None")
        self._address = (
            None if socket_address is None else _socket_address(socket_address)
        )
        self._watchdog_usec = watchdog_usec
        self._warned = False
        self._sock = None
        if self._address is not None:
            try:
                self._sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
            except OSError as exc:
                self._warn(f"cannot create the notification socket: {exc}")
                self._address = None

    @classmethod
    def from_env(cls, environ=os.environ, *, pid=None):
        """Build the notifier the service manager asked for.

        Parameters
        ----------
        environ : mapping of str to str, default os.environ
            Where to read ``NOTIFY_SOCKET``, ``WATCHDOG_USEC`` and
            ``WATCHDOG_PID``.  Not modified.
        pid : int or None, default None
            Our process id, compared with ``WATCHDOG_PID``; None means
            ``os.getpid()``.

        Returns
        -------
        Notifier
            Disabled when ``NOTIFY_SOCKET`` is unset, empty or unusable.

        Notes
        -----
        The watchdog is honoured only when ``WATCHDOG_USEC`` is a positive
        integer and ``WATCHDOG_PID`` is absent or equals ``pid``: a value
        meant for another process (e.g. a parent that started us) is ignored,
        as sd_watchdog_enabled(3) describes.  Values that cannot be used are
        logged at warning level, never raised: they come from the service
        manager, not from the caller.
        """
        own_pid = os.getpid() if pid is None else pid
        notify_socket = environ.get("NOTIFY_SOCKET", "")
        address = None
        if notify_socket:
            try:
                _socket_address(notify_socket)
            except ValueError:
                _log.warning(
                    "NOTIFY_SOCKET=%r is not a path or @name; "
                    "not notifying the service manager",
                    notify_socket,
                )
            else:
                address = notify_socket

        watchdog_usec = None
        usec_text = environ.get("WATCHDOG_USEC", "")
        pid_text = environ.get("WATCHDOG_PID", "")
        if usec_text:
            try:
                usec = int(usec_text)
                if usec <= 0:
                    raise ValueError(usec_text)
            except ValueError:
                _log.warning("WATCHDOG_USEC=%r is not a positive integer; "
                             "watchdog off", usec_text)
            else:
                if pid_text and pid_text != str(own_pid):
                    _log.info("WATCHDOG_PID=%s is not our pid %d; watchdog off",
                              pid_text, own_pid)
                else:
                    watchdog_usec = usec
        return cls(address, watchdog_usec=watchdog_usec)

    @property
    def enabled(self):
        """bool: True when notifications are sent somewhere."""
        return self._address is not None

    @property
    def watchdog_interval_s(self):
        """float or None: how often to call ``watchdog()``, in seconds.

        Half the service manager's timeout, as sd_watchdog_enabled(3)
        recommends; None when no watchdog is expected or nothing is sent.
        """
        if self._watchdog_usec is None or not self.enabled:
            return None
        return self._watchdog_usec / 2e6

    def ready(self):
        """Report that start-up (or a reload) has finished: ``READY=1``."""
        return self._send("READY=1")

    def status(self, text):
        """Report a one-line, human-readable state: ``STATUS=text``.

        Parameters
        ----------
        text : str
            Shown by ``systemctl status``.  Line breaks and NUL bytes are
            replaced by spaces, since a newline ends the assignment.
        """
        return self._send("STATUS=" + _one_line(text))

    def watchdog(self):
        """Tell the service manager we are alive: ``WATCHDOG=1``."""
        return self._send("WATCHDOG=1")

    def stopping(self):
        """Report that shutdown has begun: ``STOPPING=1``."""
        return self._send("STOPPING=1")

    def reloading(self):
        """Report that a configuration reload has begun.

        Sends ``RELOADING=1`` with ``MONOTONIC_USEC=`` (CLOCK_MONOTONIC in
        microseconds) in the same datagram; systemd 253 and later need the
        timestamp for ``Type=notify-reload``, older versions ignore it.  Call
        ``ready()`` when the reload is done.
        """
        now_usec = time.clock_gettime_ns(time.CLOCK_MONOTONIC) // 1000
        return self._send(f"RELOADING=1\nMONOTONIC_USEC={now_usec}")

    def close(self):
        """Close the socket; later calls are no-ops."""
        sock, self._sock, self._address = self._sock, None, None
        if sock is not None:
            sock.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc_info):
        self.close()

    def __repr__(self):
        target = None if self._address is None else os.fsdecode(self._address)
        return (
            f"Notifier(socket_address={target!r}, "
            f"watchdog_usec={self._watchdog_usec!r})"
        )

    def _send(self, message):
        """Send ``message`` as one datagram; True when it went out."""
        sock, address = self._sock, self._address
        if sock is None or address is None:
            return False
        try:
            sock.sendto(message.encode("utf-8"), address)
        except OSError as exc:
            self._warn(f"cannot notify the service manager: {exc}")
            return False
        return True

    def _warn(self, text):
        """Log ``text`` at warning level the first time only."""
        if not self._warned:
            self._warned = True
            _log.warning("%s (further notification errors are not logged)", text)
