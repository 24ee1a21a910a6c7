"""The SQLite outbox: order, sequence numbers, coalescing, bounds, crash safety.

References used below: SQLite itself (a second connection after close reads
the file, ``PRAGMA integrity_check``, ``PRAGMA journal_mode``), and the kernel's
SIGKILL (a real subprocess killed mid-write).
"""

import json
import signal
import sqlite3
import subprocess
import sys
import textwrap

import pytest

from agent.config import OutboxSettings, ScheduleSettings
from agent.errors import OutboxError
from agent.outbox import DROP_ORDER, Outbox


def raw_rows(path):
    """Rows read with a fresh sqlite3 connection (the outbox must be closed)."""
    con = sqlite3.connect(path)
    try:
        rows = con.execute("SELECT id, kind, topic, payload, seq FROM messages ORDER BY id").fetchall()
        assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"  # SQLite's own check
        assert con.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        return rows
    finally:
        con.close()


def test_fifo_order_seq_per_stream_and_ack(tmp_path):
    path = tmp_path / "outbox.db"
    with Outbox(path) as ob:
        got = [ob.enqueue("result", f"t/{p}/result", {"n": n}) for n in range(3) for p in ("a", "b")]
        assert [i for i, _ in got] == sorted(i for i, _ in got)
        assert [s for _, s in got] == [1, 1, 2, 2, 3, 3]        # one stream per topic
        msgs = ob.peek(10)
        assert [m.id for m in msgs] == [i for i, _ in got]
        assert [json.loads(m.payload) for m in msgs][:2] == [{"n": 0, "seq": 1}, {"n": 0, "seq": 1}]
        assert all(m.qos == 1 and m.retain is False for m in msgs)
        assert [m.id for m in ob.peek(2, after_id=msgs[1].id)] == [msgs[2].id, msgs[3].id]
        ob.ack(msgs[0].id)
        ob.ack_many([msgs[1].id, msgs[2].id, 999999])             # unknown ids are ignored
        assert ob.depth == 3
        assert ob.bytes == sum(len(m.topic) + len(m.payload) for m in msgs[3:])
        _, seq = ob.enqueue("alert", "t/a/alert", {}, retain=True, seq_key="custom")
        assert seq == 1 and ob.peek(10)[-1].retain is True
    rows = raw_rows(path)
    assert [r[0] for r in rows] == [m.id for m in msgs[3:]] + [rows[-1][0]]


def test_seq_and_counters_survive_reopen(tmp_path):
    path = tmp_path / "outbox.db"
    with Outbox(path, max_messages=10) as ob:
        for n in range(12):
            ob.enqueue("result", "t/p/result", {"n": n})
        top_id = ob.peek(100)[-1].id
        ob.ack_many(m.id for m in ob.peek(100))
        assert ob.depth == 0 and ob.bytes == 0
        assert ob.dropped == {"spectrum": 0, "result": 2, "alert": 0}
    with Outbox(path, max_messages=10) as ob:
        assert ob.dropped["result"] == 2
        new_id, seq = ob.enqueue("result", "t/p/result", {"n": 12})
        assert seq == 13                     # the stream continues after a restart
        assert new_id > top_id               # ids are never reused, even after the queue emptied
        assert ob.next_seq("t/p/result") == 14


def test_status_is_coalesced(tmp_path):
    with Outbox(tmp_path / "o.db") as ob:
        ob.enqueue("result", "t/p/result", {"n": 1})
        for n in range(5):
            ob.enqueue("status", "t/status", {"n": n}, retain=True)
        ob.enqueue("result", "t/p/result", {"n": 2})
        msgs = ob.peek(10)
        assert [m.kind for m in msgs] == ["result", "status", "result"]
        assert json.loads(msgs[1].payload) == {"n": 4, "seq": 5}
        assert ob.depth == 3 and ob.dropped == {"spectrum": 0, "result": 0, "alert": 0}


def test_bound_drops_spectrum_then_result_then_alert(tmp_path):
    assert DROP_ORDER == ("spectrum", "result", "alert")
    path = tmp_path / "o.db"
    with Outbox(path, max_messages=6) as ob:
        for kind in ("alert", "spectrum", "result", "alert", "spectrum", "result"):
            ob.enqueue(kind, f"t/p/{kind}", {"k": kind})
        ob.enqueue("result", "t/p/result", {"k": "new1"})      # drops the oldest spectrum
        assert [m.kind for m in ob.peek(10)] == ["alert", "result", "alert", "spectrum", "result", "result"]
        ob.enqueue("result", "t/p/result", {"k": "new2"})      # drops the last spectrum
        ob.enqueue("alert", "t/p/alert", {"k": "new3"})        # no spectrum left: oldest result
        assert [m.kind for m in ob.peek(10)] == ["alert", "alert", "result", "result", "result", "alert"]
        assert ob.dropped == {"spectrum": 2, "result": 1, "alert": 0}
        for n in range(3):
            ob.enqueue("alert", "t/p/alert", {"n": n})         # results go before any alert
        assert [m.kind for m in ob.peek(10)] == ["alert"] * 6
        ob.enqueue("alert", "t/p/alert", {"n": 3})             # only alerts left: oldest alert
        assert ob.dropped == {"spectrum": 2, "result": 4, "alert": 1}
        assert ob.depth == 6
    with Outbox(path, max_messages=6) as ob:
        assert ob.dropped == {"spectrum": 2, "result": 4, "alert": 1}


def test_byte_bound(tmp_path):
    with Outbox(tmp_path / "o.db", max_messages=1000, max_bytes=4096) as ob:
        body = {"pad": "x" * 900}
        for _ in range(8):
            ob.enqueue("result", "t/p/result", body)
        assert ob.bytes <= 4096 and ob.depth == 4
        assert ob.dropped["result"] == 4
        with pytest.raises(ValueError, match="larger"):
            ob.enqueue("result", "t/p/result", {"pad": "x" * 5000})
        assert ob.depth == 4                       # the refused message left nothing behind


def test_caller_mistakes_raise_value_error(tmp_path):
    with pytest.raises(ValueError):
        Outbox(tmp_path / "o.db", max_messages=0)
    with pytest.raises(ValueError):
        Outbox(tmp_path / "o.db", synchronous="off")
    with Outbox(tmp_path / "o.db") as ob:
        for args in (("gossip", "t", {}), ("result", "", {}), ("result", "t", {"seq": 1}),
                     ("result", "t", [1])):
            with pytest.raises(ValueError):
                ob.enqueue(*args)
        with pytest.raises(ValueError):
            ob.enqueue("result", "t", {}, qos=3)
        with pytest.raises(ValueError):
            ob.peek(0)


def test_library_errors_become_outbox_errors(tmp_path):
    with pytest.raises(OutboxError, match="does not exist"):
        Outbox(tmp_path / "missing-folder" / "o.db")
    junk = tmp_path / "junk.db"
    junk.write_bytes(b"this is not an SQLite database, just text " * 100)
    with pytest.raises(OutboxError, match="not a usable outbox"):
        Outbox(junk)
    ob = Outbox(tmp_path / "o.db")
    with pytest.raises(OutboxError, match="another process"):
        Outbox(tmp_path / "o.db")                  # exclusive: one owner per file
    ob.close()
    ob.close()
    with pytest.raises(OutboxError, match="closed"):
        ob.enqueue("result", "t", {})
    Outbox(tmp_path / "o.db").close()              # the lock went with the first owner


WRITER = textwrap.dedent("""
    import sys
    from agent.outbox import Outbox
    ob = Outbox(sys.argv[1], synchronous=sys.argv[2])
    n = 0
    while True:
        n += 1
        kind = ("result", "alert", "spectrum")[n % 3]
        msg_id, seq = ob.enqueue(kind, "t/p/" + kind, {"n": n, "pad": "x" * 200})
        print(msg_id, seq, kind, n, flush=True)
""")


@pytest.mark.parametrize("synchronous", ["normal", "full"])
def test_kill_9_while_writing_loses_nothing_returned(tmp_path, synchronous):
    # A real process is SIGKILLed in the middle of a stream of enqueues.
    path = tmp_path / "o.db"
    script = tmp_path / "writer.py"
    script.write_text(WRITER)
    proc = subprocess.Popen([sys.executable, str(script), str(path), synchronous],
                            stdout=subprocess.PIPE, text=True)
    confirmed = []
    try:
        for line in proc.stdout:
            confirmed.append(tuple(line.split()))
            if len(confirmed) == 300:
                break
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=10)
        proc.stdout.close()
    assert len(confirmed) == 300
    rows = raw_rows(path)                          # integrity_check ok, still WAL
    stored = {str(r[0]): (r[1], r[4], json.loads(r[3])) for r in rows}
    for msg_id, seq, kind, n in confirmed:         # every enqueue that returned is there
        assert stored[msg_id] == (kind, int(seq), {"n": int(n), "pad": "x" * 200, "seq": int(seq)})
    for kind in ("result", "alert", "spectrum"):   # per stream: 1, 2, 3, ... without gaps
        seqs = [r[4] for r in rows if r[1] == kind]
        assert seqs == list(range(1, len(seqs) + 1))
    with Outbox(path) as ob:
        assert ob.depth == len(rows)
        _, seq = ob.enqueue("result", "t/p/result", {})
        assert seq == sum(1 for r in rows if r[1] == "result") + 1


def test_transactions_per_hour_at_the_default_schedule(tmp_path):
    # One hour of the default schedule (ScheduleSettings defaults: a capture every
    # 600 s) on a two-point agent with the broker up: per interval one result per
    # point and one status are stored, then acknowledged one by one (the worst
    # case: no batching of acknowledgements).
    schedule, settings = ScheduleSettings(), OutboxSettings()
    intervals = int(3600 // schedule.interval_s)
    points = ("raw-water-pump-2-de", "raw-water-pump-2-nde")
    with Outbox(tmp_path / "o.db", synchronous=settings.synchronous) as ob:
        start = ob.transactions
        for _ in range(intervals):
            for p in points:
                ob.enqueue("result", f"t/{p}/result", {"x": 1})
            ob.enqueue("status", "t/status", {"x": 1}, retain=True)
            for m in ob.peek(100):
                ob.ack(m.id)
        per_hour = ob.transactions - start
    # One transaction per enqueue and one per acknowledgement: 36 per hour.
    assert per_hour == intervals * (len(points) + 1) * 2 == 36
