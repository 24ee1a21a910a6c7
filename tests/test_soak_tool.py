"""tools/soak, run for real: the daemon as its subprocess, a real mosquitto, real /proc.

No timing threshold is checked here: the machine is shared and timings vary.  The
checks are that every figure is there, has the right sign, and agrees with its
definition and with what the kernel reports through other interfaces.
"""

import importlib.machinery
import importlib.util
import json
import os
import resource
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent
SOAK = REPO / "tools" / "soak"
QUICK_CAPTURES = 30
POINTS = 2

needs_mosquitto = pytest.mark.skipif(shutil.which("mosquitto") is None,
                                     reason="mosquitto is not installed")


def _run(*args, timeout=240):
    return subprocess.run([sys.executable, str(SOAK), *args], capture_output=True, text=True,
                          cwd=REPO, timeout=timeout)


def _load_tool():
    """The script as a module (it has no .py suffix), for its /proc readers."""
    loader = importlib.machinery.SourceFileLoader("ballpass_soak_tool", str(SOAK))
    spec = importlib.util.spec_from_loader(loader.name, loader)
    module = importlib.util.module_from_spec(spec)
    sys.modules[loader.name] = module  # dataclasses look their module up there
    loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def report():
    if shutil.which("mosquitto") is None:
        pytest.skip("mosquitto is not installed")
    proc = _run("--quick", "--json")
    assert proc.returncode == 0, proc.stderr
    return json.loads(proc.stdout)


def _positive(value):
    return isinstance(value, (int, float)) and not isinstance(value, bool) and value > 0


def test_script_is_executable():
    # POSIX: a script run by name needs the execute bit and a #! line  # from memory
    assert SOAK.stat().st_mode & 0o111
    assert SOAK.read_text(encoding="utf-8").startswith("#!")


@needs_mosquitto
def test_quick_run_with_broker_reports_the_command_and_settings(report):
    cmd = report["command"]["daemon"]
    assert cmd[1:4] == ["-m", "agent", "run"]
    assert cmd[cmd.index("--max-captures") + 1] == str(QUICK_CAPTURES)
    s = report["settings"]
    assert s["broker_mode"] == "mosquitto"
    assert s["captures"] == QUICK_CAPTURES and s["points"] == POINTS
    # the product's default schedule: 10 s captures every 600 s (agent.config defaults)
    from agent.config import ScheduleSettings
    assert s["capture_s"] == ScheduleSettings().capture_s
    assert s["default_interval_s"] == ScheduleSettings().interval_s
    assert report["run"]["exit_code"] == 0
    assert report["run"]["captures_seen"] == QUICK_CAPTURES
    assert report["run"]["samples"] >= 1


@needs_mosquitto
def test_startup_figures_are_positive_and_ordered(report):
    st = report["startup"]
    for key in ("running_s", "first_capture_log_s", "first_result_at_broker_s"):
        assert _positive(st[key]), key
    # the daemon logs "running:" before its first capture, and a result reaches the broker
    # only after the capture that made it
    assert st["running_s"] <= st["first_capture_log_s"]


@needs_mosquitto
def test_cpu_figures_follow_their_definitions(report):
    c, s = report["cpu"], report["settings"]
    for key in ("total_s", "per_capture_s", "per_capture_per_point_s",
                "share_at_default_schedule_pct", "realtime_factor", "source_per_capture_s"):
        assert _positive(c[key]), key
    assert c["warmup_captures"] >= 1
    assert c["warmup_captures"] + c["measured_captures"] == QUICK_CAPTURES
    # per point = per capture / points; share = CPU seconds / schedule seconds x 100 %;
    # real-time factor = signal seconds / CPU seconds  # definitions (arithmetic)
    assert c["per_capture_per_point_s"] == pytest.approx(c["per_capture_s"] / POINTS)
    assert c["share_at_default_schedule_pct"] == pytest.approx(
        100.0 * c["per_capture_per_point_s"] / s["default_interval_s"])
    assert c["realtime_factor"] == pytest.approx(s["capture_s"] / c["per_capture_s"])
    # the CPU of the measured captures is part of the CPU of the whole run
    assert c["per_capture_s"] * c["measured_captures"] <= c["total_s"]


@needs_mosquitto
def test_rss_fd_and_thread_figures_are_present_and_consistent(report):
    rss = report["rss_mb"]
    for key in ("min", "max", "first", "last", "peak_whole_run"):
        assert _positive(rss[key]), key
    for key in ("growth", "max_over_first"):
        assert isinstance(rss[key], float), key
    assert "slope_per_1000_captures" in rss
    assert rss["min"] <= rss["first"] <= rss["max"] and rss["min"] <= rss["last"] <= rss["max"]
    assert rss["growth"] == pytest.approx(rss["last"] - rss["first"])
    # VmHWM is the peak of VmRSS (proc(5)), so no sample can exceed it
    assert rss["peak_whole_run"] >= rss["max"]
    # a process has at least stdin, stdout and stderr open (POSIX), and one thread
    assert 3 <= report["fds"]["min"] <= report["fds"]["max"]
    assert 1 <= report["threads"]["min"] <= report["threads"]["max"]


@needs_mosquitto
def test_every_result_reaches_the_broker_in_sequence(report):
    d = report["delivery"]
    # QoS 1 is at-least-once delivery (MQTT 5.0, sec. 4.3.2): none lost with a live broker
    assert d["results_received"] == QUICK_CAPTURES * POINTS
    assert sorted(d["per_point"].values()) == [QUICK_CAPTURES] * POINTS
    assert d["seq_gaps"] == 0
    assert report["outbox"]["depth"] <= report["settings"]["outbox_max_messages"]


@needs_mosquitto
def test_versions_in_the_header_are_the_ones_imported(report):
    import numpy
    from paho.mqtt import __version__ as paho_version
    # the versions reported are the ones this interpreter imports  # reference libraries
    assert report["machine"]["numpy"] == numpy.__version__
    assert report["machine"]["paho_mqtt"] == paho_version
    assert report["machine"]["cpu_count"] == os.cpu_count()


def test_broker_away_fills_the_outbox_to_its_bound():
    proc = _run("--quick", "--no-broker", "--outbox-max", "20", "--json")
    assert proc.returncode == 0, proc.stderr
    rep = json.loads(proc.stdout)
    assert rep["settings"]["broker_mode"] == "away"
    assert rep["delivery"] is None and rep["startup"]["first_result_at_broker_s"] is None
    assert _positive(rep["startup"]["first_capture_log_s"])
    assert _positive(rep["cpu"]["per_capture_s"]) and _positive(rep["rss_mb"]["last"])
    ob = rep["outbox"]
    # 2 results per capture for 30 captures cannot fit a bound of 20: the oldest are dropped
    assert ob["depth"] <= 20
    assert sum(ob["dropped"].values()) > 0


def test_plain_text_report_names_the_command_and_units(tmp_path):
    proc = _run("--captures", "3", "--no-broker", "--keep", str(tmp_path / "work"))
    assert proc.returncode == 0, proc.stderr
    out = proc.stdout
    assert "tools/soak --captures 3 --no-broker --keep" in out
    assert "-m agent run --config" in out and "--max-captures 3" in out
    for unit in (" s", " %", " MB", " x"):
        assert unit in out, unit
    assert (tmp_path / "work" / "soak.toml").exists()  # --keep keeps the configuration


def test_failing_daemon_exits_1_with_its_log_tail(tmp_path):
    work = tmp_path / "work"
    work.mkdir()
    (work / "state").write_text("a file where the state directory should be")
    proc = _run("--captures", "2", "--no-broker", "--keep", str(work))
    assert proc.returncode == 1
    assert "exited with status 1" in proc.stderr
    assert "state directory" in proc.stderr  # the daemon's own log line, from the tail


def test_bad_option_exits_2():
    # argparse reports usage errors with exit status 2  # Python argparse documentation
    assert _run("--outbox-max", "5").returncode == 2
    assert _run("--captures", "0").returncode == 2


def test_proc_readers_agree_with_the_kernel_s_other_interfaces():
    tool = _load_tool()
    pid = os.getpid()
    sample = tool.read_proc(pid)
    times = os.times()
    # utime + stime of /proc/<pid>/stat are what times(2) reports, in clock ticks  # proc(5)
    tick_s = 1.0 / os.sysconf("SC_CLK_TCK")
    assert sample.cpu_s == pytest.approx(times.user + times.system, abs=3 * tick_s)
    # VmHWM and getrusage(2) ru_maxrss (KiB on Linux) are the same peak RSS counter  # getrusage(2)
    maxrss_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024 / 1e6
    assert sample.hwm_mb == pytest.approx(maxrss_mb, abs=0.5)
    assert 0 < sample.rss_mb <= sample.hwm_mb
    assert sample.fds == len(os.listdir("/proc/self/fd")) and sample.threads >= 1
