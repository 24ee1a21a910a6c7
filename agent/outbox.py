"""The persistent outbox: a bounded store-and-forward queue in SQLite.

Public API
----------
- :class:`Outbox` ``(path, max_messages=20000, max_bytes=20_000_000, synchronous="normal")``

  - ``enqueue(kind, topic, body, qos=1, retain=False, seq_key=None)`` -> ``(id, seq)``
  - ``next_seq(seq_key)`` -> int (a sequence number for a message sent
    outside the queue, e.g. the online status or the last will)
  - ``peek(limit=100, after_id=0)`` -> list of :class:`Message`, in id order
  - ``ack(id)``, ``ack_many(ids)``: the broker has the message; forget it
  - ``depth``, ``bytes``, ``dropped`` (dict per kind), ``transactions``
  - ``close()``; also a context manager

- :class:`Message` (named tuple): ``id, kind, topic, payload, qos, retain, seq``
- ``KINDS``, ``DROP_ORDER``

Every message gets a sequence number per stream (``seq_key``, default the
topic: one stream per point and kind, one per agent for status).  The number
is taken from a persisted table inside the same transaction that stores the
message, so it survives restarts and power loss together with the message: a
subscriber sees each number at most once per stream, except for re-deliveries
of the same message (duplicates, which it drops), and a jump means messages
were dropped by the bound below.

Status messages are coalesced: only the newest status waits in the queue.
When the queue is over ``max_messages`` or ``max_bytes``, the oldest spectrum
snapshots go first, then the oldest results, and alerts only last; every drop
is counted per kind and the counts are persisted.

All SQLite and file-system errors become :class:`~agent.errors.OutboxError`
in one function, :func:`_translate`.
"""

from __future__ import annotations

import contextlib
import sqlite3
import threading
from pathlib import Path
from typing import NamedTuple

from agent.errors import OutboxError
from agent.payloads import encode

__all__ = ["Outbox", "Message", "KINDS", "DROP_ORDER", "SYNC_MODES"]

KINDS = ("status", "result", "alert", "spectrum")
DROP_ORDER = ("spectrum", "result", "alert")  # what goes first when the queue is full
SYNC_MODES = ("normal", "full")
_SCHEMA_VERSION = 1

_SCHEMA = """
CREATE TABLE IF NOT EXISTS messages (
    id INTEGER PRIMARY KEY AUTOINCREMENT,  -- never reused: the sender keeps a cursor
    kind TEXT NOT NULL,
    topic TEXT NOT NULL,
    payload BLOB NOT NULL,
    qos INTEGER NOT NULL,
    retain INTEGER NOT NULL,
    seq INTEGER NOT NULL,
    size INTEGER NOT NULL                  -- bytes of topic + payload
);
CREATE INDEX IF NOT EXISTS messages_by_kind ON messages (kind, id);
CREATE TABLE IF NOT EXISTS seq (key TEXT PRIMARY KEY, value INTEGER NOT NULL) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS dropped (kind TEXT PRIMARY KEY, count INTEGER NOT NULL) WITHOUT ROWID;
"""


class Message(NamedTuple):
    """One queued message, ready to publish."""

    id: int
    kind: str
    topic: str
    payload: bytes
    qos: int
    retain: bool
    seq: int


def _translate(exc, path, action):
    """Turn an SQLite or OS error into an OutboxError a technician can act on.

    This is the only place where library errors of the outbox are translated.
    """
    text = str(exc)
    low = text.lower()
    if "locked" in low or "busy" in low:
        hint = "another process (a second ballpass?) is using this outbox"
    elif "full" in low or "no space" in low:
        hint = "the file system of the state directory is full"
    elif "not a database" in low or "malformed" in low or "corrupt" in low:
        hint = "the file is not a usable outbox; move it away and restart (its queue is lost)"
    elif "readonly" in low or "read-only" in low or "permission" in low or "unable to open" in low:
        hint = "check that the state directory exists and is writable by the service user"
    elif "disk i/o" in low:
        hint = "the storage reported an I/O error; check the SD card or disk"
    else:
        hint = "see the SQLite message"
    return OutboxError(f"outbox {path}: cannot {action}: {text} ({hint})")


class Outbox:
    """A bounded, persistent queue of messages waiting for the broker.

    Parameters
    ----------
    path : str or Path
        The SQLite file (in the state directory).  Its folder must exist.
    max_messages : int, optional
        Most messages kept (default 20000).
    max_bytes : int, optional
        Most bytes (topics + payloads) kept (default 20 MB).
    synchronous : {"normal", "full"}, optional
        SQLite ``synchronous`` setting; see Notes.  Default "normal".

    Raises
    ------
    ValueError
        For a bad bound or mode.
    OutboxError
        When the file cannot be opened or is not an outbox, or is in use by
        another process.

    Notes
    -----
    The file is opened once, in WAL mode and with an exclusive lock, so a
    second process on the same state directory fails at start instead of
    sending the same messages twice.

    ``synchronous``: in WAL mode both settings keep the database consistent
    on power loss (it can never be corrupted by a cut).  With ``"normal"`` the
    WAL is flushed to storage only at checkpoints, so the transactions of the
    last moments before a power cut may be lost (rolled back) -- messages
    enqueued or acknowledged in those moments: a lost enqueue is a lost result,
    a lost ack a duplicate.  Worse, a message may have reached the broker
    before its enqueue was lost; the next message of that stream then gets
    the same ``seq`` again and a subscriber that drops duplicates by ``seq``
    drops it.  With ``"full"`` every commit waits for the WAL to
    reach the storage, so nothing that ``enqueue`` returned is ever lost, at
    the cost of one flush per transaction.  A kill of the process (not of the
    power) loses nothing in either mode: the data is in the operating
    system's cache.

    Measured at the default schedule (a capture every 600 s, two points, the
    broker up): 36 write transactions per hour (an enqueue and an
    acknowledgement per result and status), about 6 pages each, 0.45 MB/h
    written in both modes; ``"full"`` flushes about 37 times per hour,
    ``"normal"`` about once every two hours (at checkpoints).  At that rate
    the flushes of ``"full"`` cost nothing noticeable.

    References
    ----------
    .. [1] SQLite documentation, "Write-Ahead Logging" and "PRAGMA synchronous",
       https://sqlite.org/wal.html, https://sqlite.org/pragma.html#pragma_synchronous
    """

    def __init__(self, path, max_messages=20000, max_bytes=20_000_000, synchronous="normal"):
        if isinstance(max_messages, bool) or not isinstance(max_messages, int) or max_messages < 1:
            raise ValueError(f"{max_messages=} must be a whole number >= 1")
        if isinstance(max_bytes, bool) or not isinstance(max_bytes, int) or max_bytes < 1024:
            raise ValueError(f"{max_bytes=} must be a whole number >= 1024")
        if synchronous not in SYNC_MODES:
            raise ValueError(f"{synchronous=} must be one of {SYNC_MODES!r}")
        self.path = Path(path)
        self.max_messages = max_messages
        self.max_bytes = max_bytes
        self.synchronous = synchronous
        self._lock = threading.Lock()
        self._db = None
        self._depth = 0
        self._bytes = 0
        self._dropped = {k: 0 for k in DROP_ORDER}
        self._transactions = 0
        try:
            self._open()
        except BaseException:
            if self._db is not None:
                self._db.close()
                self._db = None
            raise

    def _open(self):
        synchronous = self.synchronous
        with self._errors("open"):
            if not self.path.parent.is_dir():
                raise sqlite3.OperationalError(f"unable to open: folder {self.path.parent} does not exist")
            self._db = sqlite3.connect(str(self.path), isolation_level=None,
                                       check_same_thread=False, timeout=0.5)
            self._db.execute("PRAGMA locking_mode = EXCLUSIVE")
            mode = self._db.execute("PRAGMA journal_mode = WAL").fetchone()[0]
            if mode.lower() != "wal":
                raise sqlite3.OperationalError(f"journal_mode is {mode!r}, WAL not available")
            self._db.execute(f"PRAGMA synchronous = {synchronous.upper()}")
            with self._transaction():
                version = self._db.execute("PRAGMA user_version").fetchone()[0]
                if version not in (0, _SCHEMA_VERSION):
                    raise sqlite3.DatabaseError(f"not an outbox of this version (user_version {version})")
                for statement in _SCHEMA.split(";"):
                    if statement.strip():
                        self._db.execute(statement)
                self._db.execute(f"PRAGMA user_version = {_SCHEMA_VERSION}")
            self._depth, self._bytes = self._db.execute(
                "SELECT COUNT(*), COALESCE(SUM(size), 0) FROM messages").fetchone()
            for kind, count in self._db.execute("SELECT kind, count FROM dropped"):
                self._dropped[kind] = count

    # ------------------------------------------------------------------ plumbing
    @contextlib.contextmanager
    def _errors(self, action):
        try:
            yield
        except (sqlite3.Error, OSError) as exc:
            raise _translate(exc, self.path, action) from None

    @contextlib.contextmanager
    def _transaction(self):
        self._db.execute("BEGIN IMMEDIATE")
        try:
            yield
        except BaseException:
            with contextlib.suppress(sqlite3.Error):
                self._db.execute("ROLLBACK")
            raise
        self._db.execute("COMMIT")
        self._transactions += 1

    def _open_db(self):
        if self._db is None:
            raise OutboxError(f"outbox {self.path}: already closed")
        return self._db

    # ------------------------------------------------------------------ queue
    def enqueue(self, kind, topic, body, qos=1, retain=False, seq_key=None):
        """Store a message; assign its sequence number in the same transaction.

        Parameters
        ----------
        kind : str
            One of ``KINDS``.
        topic : str
            The MQTT topic (from :mod:`agent.topics`).
        body : dict
            The payload body (from :mod:`agent.payloads`), without ``seq``.
        qos : {0, 1, 2}, optional
            MQTT QoS (default 1).
        retain : bool, optional
            Retain flag (default False).
        seq_key : str, optional
            The stream this message counts in; default the topic.

        Returns
        -------
        (int, int)
            The message id (increasing, never reused) and its ``seq``.

        Raises
        ------
        ValueError
            For an unknown kind, a bad QoS, a body that is not a dict or holds
            ``seq`` already, or a message larger than ``max_bytes``.
        OutboxError
            When the database cannot be written.
        """
        if kind not in KINDS:
            raise ValueError(f"{kind=} must be one of {KINDS!r}")
        if qos not in (0, 1, 2):
            raise ValueError(f"{qos=} must be 0, 1 or 2")
        if not isinstance(topic, str) or not topic:
            raise ValueError(f"{topic=} must be a non-empty string")
        if not isinstance(body, dict) or "seq" in body:
            raise ValueError("body must be a dict without 'seq' (the outbox assigns it)")
        key = topic if seq_key is None else seq_key
        topic_bytes = len(topic.encode("utf-8"))
        with self._lock, self._errors(f"store a {kind} message"):
            db = self._open_db()
            with self._transaction():
                seq = self._take_seq(db, key)
                payload = encode(dict(body, seq=seq))
                size = topic_bytes + len(payload)
                if size > self.max_bytes:
                    raise ValueError(f"message of {size} bytes is larger than {self.max_bytes=}")
                depth, nbytes = self._depth, self._bytes
                if kind == "status":
                    old = db.execute("SELECT COUNT(*), COALESCE(SUM(size), 0) FROM messages "
                                     "WHERE kind = 'status'").fetchone()
                    db.execute("DELETE FROM messages WHERE kind = 'status'")
                    depth, nbytes = depth - old[0], nbytes - old[1]
                cur = db.execute("INSERT INTO messages (kind, topic, payload, qos, retain, seq, size) "
                                 "VALUES (?, ?, ?, ?, ?, ?, ?)",
                                 (kind, topic, payload, qos, int(bool(retain)), seq, size))
                msg_id = cur.lastrowid
                depth, nbytes = depth + 1, nbytes + size
                depth, nbytes, dropped = self._enforce_bounds(db, depth, nbytes)
            self._depth, self._bytes = depth, nbytes
            for k, n in dropped.items():
                self._dropped[k] += n
        return msg_id, seq

    @staticmethod
    def _take_seq(db, key):
        cur = db.execute("UPDATE seq SET value = value + 1 WHERE key = ?", (key,))
        if cur.rowcount == 0:
            db.execute("INSERT INTO seq (key, value) VALUES (?, 1)", (key,))
            return 1
        return db.execute("SELECT value FROM seq WHERE key = ?", (key,)).fetchone()[0]

    def _enforce_bounds(self, db, depth, nbytes):
        """Drop the oldest messages, least valuable kind first, until within bounds."""
        dropped = {}
        kinds = list(DROP_ORDER)
        while (depth > self.max_messages or nbytes > self.max_bytes) and kinds:
            row = db.execute("SELECT id, size FROM messages WHERE kind = ? ORDER BY id LIMIT 1",
                             (kinds[0],)).fetchone()
            if row is None:
                kinds.pop(0)
                continue
            db.execute("DELETE FROM messages WHERE id = ?", (row[0],))
            depth, nbytes = depth - 1, nbytes - row[1]
            dropped[kinds[0]] = dropped.get(kinds[0], 0) + 1
        for kind, n in dropped.items():
            cur = db.execute("UPDATE dropped SET count = count + ? WHERE kind = ?", (n, kind))
            if cur.rowcount == 0:
                db.execute("INSERT INTO dropped (kind, count) VALUES (?, ?)", (kind, n))
        return depth, nbytes, dropped

    def next_seq(self, seq_key):
        """Take the next sequence number of a stream for a message sent outside the queue.

        Parameters
        ----------
        seq_key : str
            The stream (normally the topic).

        Returns
        -------
        int
        """
        if not isinstance(seq_key, str) or not seq_key:
            raise ValueError(f"{seq_key=} must be a non-empty string")
        with self._lock, self._errors("take a sequence number"):
            db = self._open_db()
            with self._transaction():
                return self._take_seq(db, seq_key)

    def peek(self, limit=100, after_id=0):
        """The oldest waiting messages, in id order, without removing them.

        Parameters
        ----------
        limit : int, optional
            Most messages returned (default 100).
        after_id : int, optional
            Only messages with an id above this (default 0: from the start).

        Returns
        -------
        list of Message
        """
        if isinstance(limit, bool) or not isinstance(limit, int) or limit < 1:
            raise ValueError(f"{limit=} must be a whole number >= 1")
        with self._lock, self._errors("read the queue"):
            rows = self._open_db().execute(
                "SELECT id, kind, topic, payload, qos, retain, seq FROM messages "
                "WHERE id > ? ORDER BY id LIMIT ?", (int(after_id), limit)).fetchall()
        return [Message(r[0], r[1], r[2], bytes(r[3]), r[4], bool(r[5]), r[6]) for r in rows]

    def ack(self, msg_id):
        """Forget a message the broker has acknowledged (unknown ids are ignored)."""
        self.ack_many((msg_id,))

    def ack_many(self, ids):
        """Forget several acknowledged messages in one transaction."""
        ids = [int(i) for i in ids]
        if not ids:
            return
        with self._lock, self._errors("remove delivered messages"):
            db = self._open_db()
            depth, nbytes = self._depth, self._bytes
            with self._transaction():
                for i in ids:
                    row = db.execute("SELECT size FROM messages WHERE id = ?", (i,)).fetchone()
                    if row is not None:
                        db.execute("DELETE FROM messages WHERE id = ?", (i,))
                        depth, nbytes = depth - 1, nbytes - row[0]
            self._depth, self._bytes = depth, nbytes

    # ------------------------------------------------------------------ state
    @property
    def depth(self):
        """Messages waiting."""
        return self._depth

    @property
    def bytes(self):
        """Bytes (topics + payloads) waiting."""
        return self._bytes

    @property
    def dropped(self):
        """Messages dropped by the bounds since the outbox was created, per kind."""
        with self._lock:
            return dict(self._dropped)

    @property
    def transactions(self):
        """Write transactions committed since this object opened the file."""
        return self._transactions

    def close(self):
        """Close the database (idempotent)."""
        with self._lock:
            db, self._db = self._db, None
            if db is not None:
                with self._errors("close"):
                    db.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
