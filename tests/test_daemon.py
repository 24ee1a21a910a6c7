"""The daemon as a real subprocess: real mosquitto, real SQLite outbox, real signals,
a real sd_notify socket."""

import json
import os
import signal
import socket
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import jsonschema

from agent.payloads import load_schema
from broker import Subscriber, free_port, wait_until

ROOT = Path(__file__).resolve().parents[1]
PREFIX = "ballpass/larkspur-water-works/pumphouse-a"


def write_config(path, port, state_dir, *, source=None, broker_extra="", outbox="",
                 capture_s=1.0, points=None):
    source = source or ('kind = "simulated"\nchannels = 2\nrealtime = false\n'
                        '[source.simulated]\nfault = "outer"\nmodulation = "unbalance"\n'
                        'impact_m_s2 = 3.0\nseed = 4\n')
    points = points or ('[[point]]\nname = "pump-de"\nchannel = 0\n'
                        '[[point]]\nname = "pump-nde"\nchannel = 1\nfault = "none"\n')
    path.write_text(f"""
[agent]
state_dir = "{state_dir}"
[source]
{source}
[schedule]
capture_s = {capture_s}
interval_s = {max(capture_s, 1.0)}
continuous = true
[broker]
port = {port}
reconnect_min_s = 0.2
reconnect_max_s = 1.0
{broker_extra}
[outbox]
{outbox}
{points}
""")
    return path


def start_daemon(config, *args, env=None, log=None):
    e = dict(os.environ)
    e.update(env or {})
    return subprocess.Popen([sys.executable, "-m", "agent", "run", "--config", str(config), *args],
                            stdout=log or subprocess.DEVNULL, stderr=subprocess.STDOUT, env=e,
                            cwd=ROOT)


def stop_cleanly(proc):
    """SIGTERM: the daemon must flush and exit 0 within a few seconds."""
    proc.send_signal(signal.SIGTERM)
    assert proc.wait(timeout=15) == 0


def results(sub, point):
    return [json.loads(p) for t, p, _ in sub.messages if t == f"{PREFIX}/points/{point}/result"]


def test_results_validate_notify_and_clean_stop(tmp_path, broker):
    sock_path = tmp_path / "notify.sock"
    notify = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    notify.bind(str(sock_path))
    notify.settimeout(0.1)
    sub = Subscriber(broker, "ballpass/#")
    cfg = write_config(tmp_path / "c.toml", broker.port, tmp_path / "state")
    proc = start_daemon(cfg, env={"NOTIFY_SOCKET": str(sock_path), "WATCHDOG_USEC": "2000000"})
    try:
        assert sub.wait_for(lambda m: len(results(sub, "pump-nde")) >= 3, 60)
        stop_cleanly(proc)
    finally:
        if proc.poll() is None:
            proc.kill()
    # every payload kind validates against its JSON Schema (jsonschema, the reference validator)
    seen = set()
    for topic, payload, _ in sub.messages:
        kind = topic.rsplit("/", 1)[1]
        if kind in ("result", "alert", "spectrum", "status"):
            jsonschema.validate(json.loads(payload), load_schema(kind))
            seen.add(kind)
        assert kind != "result" or len(payload) < 1024  # the result message stays under 1 KiB
    assert seen == {"result", "alert", "spectrum", "status"}
    de = results(sub, "pump-de")
    assert [r["seq"] for r in de] == list(range(de[0]["seq"], de[0]["seq"] + len(de)))
    assert {f["defect"] for f in de[-1]["findings"]} == {"bpfo"}
    assert de[-1]["findings"][0]["modulation"] == "shaft"
    assert results(sub, "pump-nde")[-1]["findings"] == []
    # sd_notify protocol (man sd_notify): READY=1 after the first capture, STATUS=, WATCHDOG=1
    datagrams = []
    while True:
        try:
            datagrams.append(notify.recv(4096).decode())
        except (socket.timeout, BlockingIOError):
            break
    assert "READY=1" in datagrams and "STOPPING=1" in datagrams
    assert any(d.startswith("STATUS=") and "captures" in d for d in datagrams)
    assert "WATCHDOG=1" in datagrams
    # the retained status says offline after the stop, with the health counters
    late = Subscriber(broker, f"{PREFIX}/status")
    assert late.wait_for(lambda m: m, 10)
    status = json.loads(late.messages[-1][1])
    assert status["state"] == "offline"
    for key in ("captures", "flagged", "overruns", "outbox_depth", "dropped", "reconnects",
                "analysis_ms", "rss_mb", "broker", "source"):
        assert key in status["health"]
    late.close()
    sub.close()


def test_sighup_reload_bad_config_keeps_running(tmp_path, broker):
    log = open(tmp_path / "daemon.log", "w+")
    cfg = write_config(tmp_path / "c.toml", broker.port, tmp_path / "state")
    sub = Subscriber(broker, "ballpass/#")
    proc = start_daemon(cfg, log=log)
    try:
        assert sub.wait_for(lambda m: len(results(sub, "pump-de")) >= 1, 60)
        good = cfg.read_text()
        cfg.write_text(good.replace('name = "pump-nde"', 'name = "bad name"'))
        proc.send_signal(signal.SIGHUP)
        assert wait_until(lambda: "reload refused" in (tmp_path / "daemon.log").read_text(), 20)
        n = len(results(sub, "pump-de"))
        assert sub.wait_for(lambda m: len(results(sub, "pump-de")) > n + 1, 30)  # still running
        cfg.write_text(good)
        proc.send_signal(signal.SIGHUP)
        assert wait_until(lambda: "configuration reloaded" in (tmp_path / "daemon.log").read_text(), 20)
        stop_cleanly(proc)
    finally:
        if proc.poll() is None:
            proc.kill()
        sub.close()
    text = (tmp_path / "daemon.log").read_text()
    assert "point[1].name = 'bad name'" in text and "Traceback" not in text


def test_kill9_with_backlog_then_restart_delivers_everything(tmp_path, broker_factory):
    port = free_port()  # nothing listens yet: the broker is "away"
    state = tmp_path / "state"
    cfg = write_config(tmp_path / "c.toml", port, state)
    proc = start_daemon(cfg)
    db = state / "outbox.sqlite3"
    try:
        assert wait_until(lambda: db.exists() and proc.poll() is None, 30)
        time.sleep(3.0)  # let a backlog build up while the broker is away
    finally:
        proc.kill()  # SIGKILL: no clean shutdown
        proc.wait(timeout=10)
    con = sqlite3.connect(str(db))
    backlog = con.execute("SELECT COUNT(*) FROM messages WHERE kind = 'result'").fetchone()[0]
    con.close()
    assert backlog >= 4
    from broker import Broker
    b = Broker(tmp_path / "broker", persistence=False)
    b.port = port
    b._write_config()
    b.start()
    try:
        sub = Subscriber(b, "ballpass/#")
        proc = start_daemon(cfg, "--max-captures", "1")
        assert proc.wait(timeout=60) == 0
        de = results(sub, "pump-de")
        seqs = [r["seq"] for r in de]
        assert seqs[:len(seqs)] == list(range(1, len(seqs) + 1))  # in order, none lost
        assert len(de) >= backlog // 2
        sub.close()
    finally:
        b.stop()


def test_missing_source_is_retried_and_capture_resumes(tmp_path, broker):
    wav = tmp_path / "feed.wav"
    src = (f'kind = "wav"\nchannels = 1\nsample_rate_hz = 25600\npath = "{wav}"\n'
           f'realtime = false\n')
    points = '[[point]]\nname = "fan-1"\nchannel = 0\n[point.machine]\nshaft_hz = 24.75\n'
    cfg = write_config(tmp_path / "c.toml", broker.port, tmp_path / "state", source=src,
                       points=points)
    sub = Subscriber(broker, "ballpass/#")
    proc = start_daemon(cfg)
    try:
        def source_error(m):
            st = [json.loads(p) for t, p, _ in m if t.endswith("/status")]
            return st and "feed.wav" in st[-1]["health"]["source"]
        assert sub.wait_for(source_error, 30)
        assert proc.poll() is None
        from agent.config import load_config
        from agent.offline import machine_model, write_simulation
        point = load_config(cfg).points[0]
        tmp = tmp_path / "partial.wav"
        write_simulation(tmp, machine_model(point, "outer", "none"), 25600, 3.0, seed=1)
        tmp.rename(wav)  # the device "comes back"
        assert sub.wait_for(lambda m: len(results(sub, "fan-1")) >= 1, 30)
        stop_cleanly(proc)
    finally:
        if proc.poll() is None:
            proc.kill()
        sub.close()


def _proc_stats(pid):
    status = Path(f"/proc/{pid}/status").read_text()
    rss_kb = int(next(line.split()[1] for line in status.splitlines() if line.startswith("VmRSS")))
    fds = len(os.listdir(f"/proc/{pid}/fd"))
    threads = len(os.listdir(f"/proc/{pid}/task"))
    return rss_kb / 1024.0, fds, threads


def test_soak_memory_fds_threads_and_bounded_outbox(tmp_path):
    """Back-to-back captures at 51.2 kHz, two points, broker away: RSS, file descriptors and
    threads stay flat after warm-up and the outbox stays within its bound.
    BALLPASS_SOAK_CYCLES sets the length (default 600, CI's short form)."""
    cycles = int(os.environ.get("BALLPASS_SOAK_CYCLES", "600"))
    state = tmp_path / "state"
    cfg = write_config(tmp_path / "c.toml", free_port(), state, capture_s=0.5,
                       outbox="max_messages = 40\nmax_bytes = 200000\n")
    proc = start_daemon(cfg, "--max-captures", str(cycles))
    samples = []
    try:
        while proc.poll() is None:
            try:
                samples.append(_proc_stats(proc.pid))
            except (OSError, StopIteration):
                break
            time.sleep(0.25)
        assert proc.wait(timeout=600) == 0
    finally:
        if proc.poll() is None:
            proc.kill()
    assert len(samples) >= 8, "the soak ran too briefly to judge"
    warm = samples[len(samples) // 4:]
    rss = [s[0] for s in warm]
    # bound (stated in the README): RSS may not grow more than 8 MB after warm-up
    assert max(rss) - rss[0] < 8.0, f"RSS grew from {rss[0]:.1f} to {max(rss):.1f} MB"
    assert max(s[1] for s in warm) - warm[0][1] <= 1, "file descriptors grew"
    assert max(s[2] for s in warm) - warm[0][2] <= 1, "threads grew"
    con = sqlite3.connect(str(state / "outbox.sqlite3"))
    depth = con.execute("SELECT COUNT(*) FROM messages").fetchone()[0]
    con.close()
    assert depth <= 40
