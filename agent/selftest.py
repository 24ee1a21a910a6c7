"""The commissioning checklist: ``ballpass selftest --config FILE [--json]``.

A technician runs it once from the terminal after mounting the monitor.  Each
check prints one line: ``PASS``, ``WARN`` or ``FAIL``, its name and a reason
with numbers and units.  Nothing is changed: the configuration, the learnt
baselines, the calibration corrections and the daemon's outbox are only read,
and no retained or status message is published.

Public API
----------
- :func:`selftest(config, as_json=False, stream=None)` -> exit code (0 when
  nothing failed, 1 otherwise); the ``selftest`` subcommand.
- :func:`run_checks(config)` -> list of :class:`CheckResult`.
- :class:`CheckResult` ``(check, result, detail)``; ``PASS``, ``WARN``, ``FAIL``.
- :func:`format_text(results, origin)` / :func:`format_json(results, origin)`.
- The state-directory lock, shared with the daemon:
  :func:`acquire_state_lock(state_dir, blocking=False, write_pid=True)` ->
  open file or None, :func:`release_state_lock(lock, remove=False)`,
  :func:`lock_holder_pid(state_dir)` -> int or None, :func:`lock_path`,
  ``LOCK_FILE`` (``ballpass.lock``).

The checks, in order
--------------------
1. ``config``: the file was valid (always PASS here: a bad file exits with 2
   before), with the number of points.
2. ``state lock``: no daemon works on the same state directory (an exclusive
   ``flock`` on ``<state_dir>/ballpass.lock``).  When the daemon holds it the
   checklist stops here: the sound card and the broker session are its.
3. ``state directory``: writable, and free space (WARN below 100 MB, FAIL
   below 10 MB).
4. ``clock``: the year is plausible; NTP synchronisation when it can be told.
5. ``source``: opens with the configured rate and channels, delivers frames.
6. ``point <name>``: a short capture through the point's calibration passes
   the quality gate (not clipped, not flat, no DC offset, no overrun) and
   shows a 1x line near the nominal speed; velocity RMS and ISO zone.
7. ``known answer``: the analysis finds a simulated outer-race defect (with
   unbalance: shaft-rate modulation) on the first point's machine, and
   nothing on a healthy one.
8. ``broker``: connect with the daemon's settings (TLS, credentials), and a
   QoS 1 message makes the round trip on ``<prefix>/<site>/<agent>/selftest``.

Each check is a small function returning ``(result, detail)``; an exception
inside one becomes a FAIL with its message (the traceback goes to the debug
log only).
"""

from __future__ import annotations

import contextlib
import json
import logging
import math
import os
import secrets
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from datetime import datetime, timezone
from pathlib import Path
from typing import NamedTuple

import numpy as np

from agent.errors import BallpassError

__all__ = ["selftest", "run_checks", "CheckResult", "format_text", "format_json",
           "acquire_state_lock", "release_state_lock", "lock_holder_pid", "lock_path",
           "LOCK_FILE", "PASS", "WARN", "FAIL", "RESULTS"]

log = logging.getLogger(__name__)

PASS, WARN, FAIL = "PASS", "WARN", "FAIL"
RESULTS = (PASS, WARN, FAIL)
LOCK_FILE = "ballpass.lock"

#: Longest capture analysed per point, s (the configured capture_s if shorter).
CAPTURE_MAX_S = 3.0
#: Signal read to see that the source delivers (also lets an AC-coupled input settle), s.
PROBE_S = 0.25
#: Length of the simulated known-answer recordings, s.
KNOWN_ANSWER_S = 5.0
KNOWN_ANSWER_SEED = 20816
#: Free space in the state directory: WARN below, FAIL below (bytes).
FREE_WARN_BYTES = 100_000_000
FREE_FAIL_BYTES = 10_000_000
#: Peak above this share of full scale leaves little headroom (WARN).
HEADROOM_WARN_SHARE = 0.5
#: RMS less than this many dB above the flat-signal floor is suspiciously quiet (WARN).
QUIET_MARGIN_DB = 10.0
#: Bounds of the broker round trip, s.
BROKER_TIMEOUT_S = 10.0
#: Plausible years of the system clock.
YEAR_MIN, YEAR_MAX = 2024, 2100
TIMESYNC_FLAG = Path("/run/systemd/timesync/synchronized")

_BLOCK_FRAMES = 8192


class CheckResult(NamedTuple):
    """One line of the checklist."""

    check: str
    result: str
    detail: str


# --------------------------------------------------------------------------- state lock
def lock_path(state_dir):
    """``<state_dir>/ballpass.lock``."""
    return Path(state_dir) / LOCK_FILE


def acquire_state_lock(state_dir, blocking=False, write_pid=True):
    """Take the exclusive lock that lets one process work on a state directory.

    Parameters
    ----------
    state_dir : path
        The agent's state directory; it must exist (the daemon creates it
        first, the self-test never does).
    blocking : bool, default False
        Wait for the lock instead of returning None when another process
        holds it.
    write_pid : bool, default True
        Replace the file's content with this process id, so that others can
        name the holder (the daemon; the self-test passes False: it writes
        nothing).

    Returns
    -------
    file object or None
        The open lock file, holding an exclusive ``flock`` until it is closed
        (:func:`release_state_lock`, or process exit).  Its attribute
        ``created`` is True when this call created the file, ``lock_path`` is
        its path.  None when another process holds the lock (non-blocking).

    Raises
    ------
    OSError
        The directory is missing or the file cannot be opened.

    Notes
    -----
    ``flock(LOCK_EX | LOCK_NB)`` on ``<state_dir>/ballpass.lock``.  The kernel
    drops the lock when the holder exits, however it exits, so a stale file
    never blocks a restart.  After locking, the file is checked to still be
    the one at the path (same device and inode): a holder may remove the file
    while others wait for it, and a lock on a removed file protects nothing,
    so then the lock is taken again on the new file.  When the file cannot be
    opened for writing (another user's daemon), it is opened read-only, which
    is enough to test the lock.

    Example (the daemon)::

        state_dir.mkdir(parents=True, exist_ok=True)
        lock = acquire_state_lock(state_dir)
        if lock is None:
            raise BallpassError(f"already running (pid {lock_holder_pid(state_dir)})")
        ...  # keep ``lock`` referenced for the life of the process
    """
    import fcntl

    path = lock_path(state_dir)
    flags = fcntl.LOCK_EX | (0 if blocking else fcntl.LOCK_NB)
    while True:
        fd, created, writable = _open_lock_file(path, writable_needed=write_pid)
        if fd is None:
            continue  # removed between two opens: try again
        lock = os.fdopen(fd, "r+b" if writable else "rb", buffering=0)
        try:
            fcntl.flock(fd, flags)
        except BlockingIOError:
            lock.close()
            return None
        except BaseException:
            lock.close()
            raise
        try:
            on_disk = os.stat(path)
            here = os.fstat(fd)
            same = (on_disk.st_dev, on_disk.st_ino) == (here.st_dev, here.st_ino)
        except FileNotFoundError:
            same = False
        if not same:
            lock.close()
            continue
        lock.created = created
        lock.lock_path = path
        if write_pid:
            lock.seek(0)
            lock.truncate()
            lock.write(f"{os.getpid()}\n".encode("ascii"))
        return lock


def _open_lock_file(path, writable_needed):
    """``(fd, created, writable)``; fd None when the file vanished in between."""
    cloexec = getattr(os, "O_CLOEXEC", 0)
    try:
        return os.open(path, os.O_RDWR | os.O_CREAT | os.O_EXCL | cloexec, 0o644), True, True
    except FileExistsError:
        pass
    try:
        return os.open(path, os.O_RDWR | cloexec), False, True
    except FileNotFoundError:
        return None, False, False
    except PermissionError:
        if writable_needed:
            raise
    try:
        return os.open(path, os.O_RDONLY | cloexec), False, False
    except FileNotFoundError:
        return None, False, False


def release_state_lock(lock, remove=False):
    """Give up a lock from :func:`acquire_state_lock`.

    Parameters
    ----------
    lock : file object or None
        The lock (None is accepted and ignored).
    remove : bool, default False
        Remove the lock file first, while still holding the lock (the
        self-test removes a file it created, so it leaves nothing behind;
        waiters notice the removal, see :func:`acquire_state_lock`).
    """
    if lock is None:
        return
    try:
        if remove:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(lock.lock_path)
    finally:
        lock.close()


def lock_holder_pid(state_dir):
    """Process id written into the lock file by its holder, or None.

    Parameters
    ----------
    state_dir : path
        The agent's state directory.

    Returns
    -------
    int or None
        None when the file is missing, unreadable, empty or not a number.
    """
    try:
        text = lock_path(state_dir).read_text(encoding="ascii", errors="replace").strip()
    except OSError:
        return None
    return int(text) if text.isdigit() else None


# --------------------------------------------------------------------------- helpers
def _error_text(exc):
    """One line for an exception: our errors speak for themselves."""
    if isinstance(exc, BallpassError):
        text = str(exc)
    elif isinstance(exc, OSError) and exc.strerror:
        where = f"{exc.filename}: " if exc.filename else ""
        text = f"{where}{exc.strerror}"
    else:
        text = f"{type(exc).__name__}: {exc}"
    return " / ".join(line.strip() for line in text.splitlines() if line.strip()) or type(exc).__name__


def _bytes_text(n):
    """Bytes in SI units (1 MB = 10**6 B), 3 significant figures."""
    for unit, size in (("GB", 10 ** 9), ("MB", 10 ** 6), ("kB", 10 ** 3)):
        if n >= size:
            return f"{n / size:.3g} {unit}"
    return f"{n} B"


def _db(ratio):
    return 20.0 * math.log10(ratio) if ratio > 0 else -math.inf


# --------------------------------------------------------------------------- checks
def check_config(config):
    """Check 1: the configuration was read (always PASS here).

    Returns
    -------
    (str, str)
        Result and detail.
    """
    names = ", ".join(p.name for p in config.points)
    n = len(config.points)
    src = config.source
    return PASS, (f"{config.origin}: {n} point{'s' if n != 1 else ''} ({names}); source "
                  f"{src.kind} at {src.sample_rate_hz} Hz, {src.channels} channel"
                  f"{'s' if src.channels != 1 else ''}")


def check_state_lock(state_dir, held):
    """Check 2: no daemon works on this state directory.

    Parameters
    ----------
    state_dir : Path
        The state directory.
    held : dict
        Receives ``"lock"`` (the lock this process now holds, to be released
        at the end) when the lock was free.

    Returns
    -------
    (str, str)
    """
    if not state_dir.is_dir():
        return PASS, f"no daemon uses {state_dir} (it does not exist yet)"
    try:
        lock = acquire_state_lock(state_dir, write_pid=False)
    except PermissionError:
        if not lock_path(state_dir).exists():
            return PASS, f"no daemon uses {state_dir} (no lock file)"
        raise
    if lock is None:
        pid = lock_holder_pid(state_dir)
        who = f"pid {pid}" if pid is not None else "pid unknown"
        return FAIL, f"the daemon is running ({who}): stop it first or use its status"
    held["lock"] = lock
    return PASS, f"no daemon uses {state_dir} (lock {LOCK_FILE} is free)"


def check_state_dir(config):
    """Check 3: the state directory is writable and has free space.

    Returns
    -------
    (str, str)

    Notes
    -----
    A temporary file is created, written, synced and removed again.  A
    directory that does not exist yet is not created (the daemon does that):
    its nearest existing parent must then be writable, which is a WARN.
    """
    state_dir = Path(config.agent.state_dir)
    bound = f"outbox bound {_bytes_text(config.outbox.max_bytes)}"
    if not state_dir.exists():
        parent = state_dir.parent
        while not parent.exists() and parent != parent.parent:
            parent = parent.parent
        if not os.access(parent, os.W_OK | os.X_OK):
            return FAIL, (f"{state_dir} does not exist and {parent} is not writable: create it "
                          f"for the service user")
        free = shutil.disk_usage(parent).free
        result = FAIL if free < FREE_FAIL_BYTES else WARN
        return result, (f"{state_dir} does not exist yet (the daemon creates it; {parent} is "
                        f"writable); {_bytes_text(free)} free, {bound}")
    if not state_dir.is_dir():
        return FAIL, f"{state_dir} is not a directory"
    fd, tmp = tempfile.mkstemp(prefix=".selftest-", suffix=".tmp", dir=state_dir)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(b"ballpass selftest\n")
            fh.flush()
            os.fsync(fh.fileno())
    finally:
        os.unlink(tmp)
    free = shutil.disk_usage(state_dir).free
    text = f"{state_dir} is writable; {_bytes_text(free)} free, {bound}"
    if free < FREE_FAIL_BYTES:
        return FAIL, f"{text}: below {_bytes_text(FREE_FAIL_BYTES)}, free some space"
    if free < FREE_WARN_BYTES:
        return WARN, f"{text}: below {_bytes_text(FREE_WARN_BYTES)}"
    return PASS, text


def _ntp_synchronised():
    """``(True|False|None, how)``: NTP state as systemd reports it, None when unknown."""
    tool = shutil.which("timedatectl")
    if tool is not None:
        try:
            done = subprocess.run([tool, "show", "-p", "NTPSynchronized", "--value"],
                                  capture_output=True, text=True, timeout=5.0, check=False)
        except (OSError, subprocess.TimeoutExpired):
            log.debug("timedatectl did not answer", exc_info=True)
        else:
            answer = done.stdout.strip()
            if done.returncode == 0 and answer in ("yes", "no"):
                return answer == "yes", "timedatectl"
    if TIMESYNC_FLAG.exists():
        return True, str(TIMESYNC_FLAG)
    return None, ""


def check_clock(now=None):
    """Check 4: the system clock is plausible and, if it can be told, synchronised.

    Parameters
    ----------
    now : datetime, optional
        The time to judge (default: the system clock, UTC).

    Returns
    -------
    (str, str)
    """
    now = datetime.now(timezone.utc) if now is None else now
    stamp = now.strftime("%Y-%m-%dT%H:%M:%SZ")
    if not YEAR_MIN <= now.year <= YEAR_MAX:
        return FAIL, (f"the clock reads {stamp}: set the time (a board without a real-time clock "
                      f"needs NTP); every timestamp would be wrong")
    synced, how = _ntp_synchronised()
    if synced is None:
        return WARN, f"{stamp}; cannot tell whether the clock is synchronised"
    if not synced:
        return WARN, f"{stamp}; the clock is not synchronised ({how}): check NTP"
    return PASS, f"{stamp}; synchronised ({how})"


def check_source(config, stack, opened):
    """Check 5: the source opens with the configured rate and channels.

    Parameters
    ----------
    config : Config
    stack : contextlib.ExitStack
        Closes the source at the end of the run.
    opened : dict
        Receives ``"source"`` (open) when the check passes.

    Returns
    -------
    (str, str)
    """
    from agent.sources import open_source

    src = config.source
    source = open_source(config).open()
    stack.callback(_close_source, source)
    problems = []
    if source.sample_rate_hz != src.sample_rate_hz:
        problems.append(f"runs at {source.sample_rate_hz} Hz, not the configured "
                        f"{src.sample_rate_hz} Hz")
    if source.channels != src.channels:
        problems.append(f"has {source.channels} channels, not the configured {src.channels}")
    if problems:
        return FAIL, f"{src.kind} source " + " and ".join(problems)
    frames = max(int(round(PROBE_S * source.sample_rate_hz)), 1)
    probe = np.zeros((frames, source.channels))
    got = source.read(probe)
    if got < frames:
        return FAIL, f"{src.kind} source delivered {got} of {frames} frames and ended"
    if not np.all(np.isfinite(probe)):
        return FAIL, f"{src.kind} source delivers non-finite samples (NaN or infinity)"
    opened["source"] = source
    desc = source.describe()
    where = desc.get("device") or desc.get("name") or desc.get("path") or ""
    unit = {"m_s2": "in m/s²", "full_scale": "as ±1.0 full scale", "volt": "in volts"}.get(
        source.unit, source.unit)
    return PASS, (f"{src.kind}{' ' + str(where) if where else ''}: {source.sample_rate_hz} Hz, "
                  f"{source.channels} channel{'s' if source.channels != 1 else ''}, samples "
                  f"{unit}; read {got / source.sample_rate_hz:g} s")


def _close_source(source):
    """Close the source at the end of the run; a failure to close is no finding."""
    try:
        source.close()
    except (BallpassError, OSError):
        log.debug("closing the source failed", exc_info=True)


class _PointCapture:
    """A point's pipeline and calibration during the self-test capture."""

    def __init__(self, point, pipeline, scale, full_scale_m_s2):
        self.point = point
        self.pipeline = pipeline
        self.scale = scale
        self.full_scale_m_s2 = full_scale_m_s2
        self.total = 0.0
        self.n = 0


def capture_points(config, source, seconds):
    """Capture ``seconds`` of every point at once and analyse each.

    Parameters
    ----------
    config : Config
    source : Source
        Open.
    seconds : float
        Capture length, s.

    Returns
    -------
    dict
        ``{point_name: (Analysis, mean_m_s2, full_scale_m_s2, overruns)}``.
    """
    from agent.calibration import input_scaling, load_overrides
    from agent.pipeline import Pipeline

    fs = source.sample_rate_hz
    overrides = load_overrides(config.agent.state_dir)
    caps = []
    for p in config.points:
        scale, full_scale = input_scaling(p, source.unit, overrides.get(p.name))
        pipe = Pipeline(p, fs, seconds, full_scale_m_s2=full_scale,
                        lowest_trusted_hz=config.source.lowest_trusted_hz)
        caps.append(_PointCapture(p, pipe, scale, full_scale))
    total = int(round(seconds * fs))
    block = np.zeros((min(_BLOCK_FRAMES, total), source.channels))
    column = np.zeros(block.shape[0])
    source.discard()
    overflows_before = source.overflows
    for c in caps:
        c.pipeline.start()
    done = 0
    while done < total:
        k = min(block.shape[0], total - done)
        got = source.read(block[:k])
        if got == 0:
            break
        for c in caps:
            x = column[:got]
            np.multiply(block[:got, c.point.channel], c.scale, out=x)
            c.total += float(x.sum())
            c.n += got
            c.pipeline.feed(x)
        done += got
    overruns = source.overflows - overflows_before
    extra = ("overrun",) if overruns else ()
    out = {}
    for c in caps:
        mean = c.total / c.n if c.n else 0.0
        out[c.point.name] = (c.pipeline.finish(extra), mean, c.full_scale_m_s2, overruns)
    return out


def _flag_text(flag, analysis, mean_m_s2, full_scale_m_s2, overruns):
    lv = analysis.levels
    rms, peak = lv["accel_rms_m_s2"], lv["accel_peak_m_s2"]
    if flag == "clipped":
        limit = (f"the converter's full scale ({full_scale_m_s2:.3g} m/s²)"
                 if full_scale_m_s2 else f"a flat top at {peak:.3g} m/s²")
        return (f"clipped: the signal reaches {limit}; lower the input gain or use a less "
                f"sensitive sensor")
    if flag == "flat":
        return (f"flat: no signal (RMS {rms:.3g} m/s²); check the sensor, its cable, its power "
                f"and the point's channel")
    if flag == "dc_offset":
        return (f"DC offset of {mean_m_s2:.3g} m/s² against {rms:.3g} m/s² RMS; check the "
                f"sensor's bias supply and cable")
    if flag == "overrun":
        return (f"{overruns} overrun(s) during the capture: samples were lost (the board is "
                f"too busy or source.latency_s too small)")
    if flag == "too_short":
        return f"too short: {analysis.capture_s:.3g} s is less than one analysis segment"
    if flag == "nonfinite":
        return "invalid samples (NaN, infinity or beyond 10^6 m/s²: check the scaling)"
    if flag == "wrong_rate":
        return "the source runs at another rate than configured"
    return flag


def check_point(point, captured):
    """Check 6: one point's capture is fit for analysis and plausible.

    Parameters
    ----------
    point : PointSettings
    captured : tuple
        ``(Analysis, mean_m_s2, full_scale_m_s2, overruns)`` from
        :func:`capture_points`.

    Returns
    -------
    (str, str)
    """
    from agent.dsp.quality import FLAT_RMS_FS, FLAT_RMS_M_S2

    analysis, mean, full_scale, overruns = captured
    if analysis.quality:
        return FAIL, "; ".join(_flag_text(f, analysis, mean, full_scale, overruns)
                               for f in analysis.quality)
    lv = analysis.levels
    rms, peak = lv["accel_rms_m_s2"], lv["accel_peak_m_s2"]
    vel, zone = lv["velocity_rms_mm_s"], lv["iso_zone"]
    lo_hz, hi_hz = lv["velocity_band_hz"]
    parts = [f"velocity {vel:.3g} mm/s RMS ({lo_hz:g}-{hi_hz:g} Hz, ISO zone {zone})",
             f"accel {rms:.3g} m/s² RMS, peak {peak:.3g} m/s²"]
    warnings = []
    floor = FLAT_RMS_M_S2 if full_scale is None else max(FLAT_RMS_M_S2, FLAT_RMS_FS * full_scale)
    if full_scale:
        parts[-1] += f" ({_db(peak / full_scale):.0f} dBFS)"
        if peak >= HEADROOM_WARN_SHARE * full_scale:
            warnings.append(f"peak at {100 * peak / full_scale:.0f} % of full scale: little "
                            f"headroom before clipping")
    margin_db = _db(rms / floor)
    if margin_db < QUIET_MARGIN_DB:
        warnings.append(f"RMS only {margin_db:.0f} dB above the noise floor of {floor:.3g} m/s²: "
                        f"is the machine running and the sensor mounted?")
    nominal = analysis.shaft_hz_nominal
    search = point.machine.speed_search
    if analysis.speed_source == "spectrum":
        parts.append(f"1x at {analysis.shaft_hz:.2f} Hz (nominal {nominal:g} Hz)")
    elif search > 0:
        warnings.append(f"no clear 1x line within ±{100 * search:g} % of the nominal "
                        f"{nominal:g} Hz: check machine.shaft_hz and that the machine runs")
    else:
        warnings.append(f"speed search off (machine.speed_search = 0): the 1x line at "
                        f"{nominal:g} Hz is not checked")
    if zone in ("C", "D"):
        warnings.append(f"velocity in ISO zone {zone}: have the machine assessed")
    narrow = _band_too_narrow(point, analysis)
    if narrow:
        warnings.append(narrow)
    if analysis.findings:
        names = ", ".join(f"{f['defect']} ({f['severity']})" for f in analysis.findings)
        warnings.append(f"bearing defect signature already present: {names}")
    detail = ", ".join(parts)
    if warnings:
        return WARN, detail + "; " + "; ".join(warnings)
    return PASS, detail


def _band_too_narrow(point, analysis):
    """A warning when a configured demodulation band is narrower than the
    harmonics sought: the squared envelope of a band B Hz wide holds nothing
    above B, so the higher harmonics are never searched.  None otherwise."""
    band = analysis.envelope.get("band_hz")
    if analysis.envelope.get("band_source") != "config" or not band:
        return None
    asked = point.envelope.harmonics
    short = [(label, ev["searched"]) for key, label in (("bpfo", "BPFO"), ("bpfi", "BPFI"),
                                                         ("bsf", "2xBSF"))
             if (ev := analysis.defects.get(key)) and ev["searched"] < asked]
    if not short:
        return None
    which = ", ".join(f"{n} of {asked} {label}" for label, n in short)
    return (f"envelope.band_hz {band[0]:g}-{band[1]:g} Hz is {band[1] - band[0]:g} Hz wide and the "
            f"envelope spectrum reaches no higher, so only {which} harmonics are searched: "
            f"widen the band, or lower envelope.harmonics")


def _simulated_analysis(point, fs, fault, modulation, seconds, seed):
    """Stream a simulated recording of ``point``'s machine through its pipeline."""
    from agent.offline import machine_model
    from agent.pipeline import Pipeline
    from agent.simulate import BearingSimulator

    model = machine_model(point, fault, modulation, resonance_hz=min(3000.0, 0.4 * fs))
    sim = BearingSimulator(model, fs, seed=seed)
    pipe = Pipeline(point, fs, seconds)
    pipe.start()
    block = np.zeros(_BLOCK_FRAMES)
    left = int(round(seconds * fs))
    while left > 0:
        k = min(left, block.shape[0])
        sim.fill(block[:k])
        pipe.feed(block[:k])
        left -= k
    return pipe.finish()


def _findings_text(findings):
    if not findings:
        return "no finding"
    return ", ".join(f"{f['defect']} with {f['modulation']} modulation" for f in findings)


def check_known_answer(config, seconds=KNOWN_ANSWER_S, seed=KNOWN_ANSWER_SEED):
    """Check 7: the analysis gives the known answer on simulated signals.

    An outer-race defect with unbalance on the first point's machine must
    give exactly one finding, ``bpfo`` with ``shaft`` modulation; a healthy
    machine must give none.

    Returns
    -------
    (str, str)

    Notes
    -----
    A rotating load (unbalance) meets a fixed outer-race defect once per
    turn, so the impacts are modulated at the shaft rate and the BPFO line
    carries sidebands at 1x.  The signals are streamed through the point's
    own pipeline at the configured sample rate, in fixed blocks.

    References
    ----------
    .. [1] R. B. Randall, J. Antoni, "Rolling element bearing diagnostics --
       A tutorial", Mech. Syst. Signal Process. 25 (2011) 485-520.
    """
    point = config.points[0]
    fs = config.source.sample_rate_hz
    faulty = _simulated_analysis(point, fs, "outer", "unbalance", seconds, seed)
    healthy = _simulated_analysis(point, fs, "none", "none", seconds, seed + 1)
    problems = []
    if faulty.quality or healthy.quality:
        problems.append(f"quality flags on simulated signals: {list(faulty.quality)} / "
                        f"{list(healthy.quality)}")
    got = [(f["defect"], f["modulation"]) for f in faulty.findings]
    if got != [("bpfo", "shaft")]:
        problems.append(f"outer-race defect with unbalance gave {_findings_text(faulty.findings)} "
                        f"(expected bpfo with shaft modulation)")
    if healthy.findings:
        problems.append(f"healthy machine gave {_findings_text(healthy.findings)} "
                        f"(expected no finding)")
    if problems:
        return FAIL, f"point {point.name} at {fs} Hz: " + "; ".join(problems)
    ev = faulty.defects["bpfo"]
    return PASS, (f"point {point.name} at {fs} Hz: simulated outer-race defect found as bpfo "
                  f"at {ev['found_hz']:.2f} Hz (expected {ev['expected_hz']:.2f} Hz, SNR "
                  f"{ev['snr_db']:.0f} dB) with shaft modulation; healthy machine: no finding")


def _selftest_topic(config):
    """The private round-trip topic: ``<prefix>/<site>/<agent>/selftest``."""
    from agent.topics import Topics

    topics = Topics(config.broker.topic_prefix, config.agent.site, config.agent.name)
    return f"{topics.base}/selftest"


def check_broker(config, timeout_s=BROKER_TIMEOUT_S):
    """Check 8: the broker accepts us and a QoS 1 message makes the round trip.

    Parameters
    ----------
    config : Config
        ``broker`` settings (host, port, protocol, TLS files, user name and
        password file) and the topic levels.
    timeout_s : float
        Bound of each wait (connection, subscription, round trip), s.

    Returns
    -------
    (str, str)

    Notes
    -----
    The client id is the daemon's with ``-selftest-<pid>`` appended, so a
    daemon elsewhere with the same identity is not thrown off.  The session
    is clean, there is no last will and nothing is retained: the broker keeps
    nothing of the test.  TLS and the password are handled by
    :mod:`agent.mqtt`, exactly as for the daemon, and every problem is put
    into words by :func:`agent.mqtt.explain` (never with the password).
    """
    b = config.broker
    if not b.enabled:
        return WARN, "delivery disabled (broker.enabled = false): nothing is sent anywhere"
    from paho.mqtt import client as mqtt

    from agent import mqtt as link

    v5 = b.protocol == "5"
    topic = _selftest_topic(config)
    nonce = secrets.token_hex(8)
    payload = json.dumps({"selftest": nonce, "agent": config.agent.name,
                          "site": config.agent.site}, separators=(",", ":")).encode("utf-8")
    base_id = b.client_id or f"ballpass-{config.agent.site}-{config.agent.name}"
    kwargs = {"callback_api_version": mqtt.CallbackAPIVersion.VERSION2,
              "client_id": f"{base_id}-selftest-{os.getpid()}",
              "protocol": mqtt.MQTTv5 if v5 else mqtt.MQTTv311}
    if not v5:
        kwargs["clean_session"] = True
    client = mqtt.Client(**kwargs)
    if log.isEnabledFor(logging.DEBUG):  # paho's own lines only when asked for
        client.enable_logger(logging.getLogger(__name__ + ".paho"))

    cond = threading.Condition()
    seen = {}

    def note(key, value):
        with cond:
            seen.setdefault(key, value)
            cond.notify_all()

    def wait(key, also=lambda: False):
        """Wait for ``key``, the end of the connection or ``also()``; True if ``key`` came."""
        with cond:
            cond.wait_for(lambda: key in seen or "disconnect" in seen or also(), timeout=timeout_s)
            return key in seen

    client.on_connect = lambda c, u, flags, rc, props: note("connack", rc)
    client.on_disconnect = lambda c, u, flags, rc, props: note("disconnect", rc)
    client.on_subscribe = lambda c, u, mid, rcs, props: note("suback", list(rcs))
    client.on_publish = lambda c, u, mid, rc, props: note("puback", rc)
    client.on_message = (lambda c, u, msg: note("message", time.monotonic())
                         if msg.payload == payload else None)

    if b.tls:
        client.tls_set_context(link.tls_context(b))
    where = f"{b.host}:{b.port} (MQTT {b.protocol}{', TLS' if b.tls else ', plaintext'})"
    if b.username:
        try:
            client.username_pw_set(b.username, link.read_password(b))
        except OSError as exc:  # the password file; the text never holds the secret
            return FAIL, link.explain(exc, b)
    who = f" as {b.username!r}" if b.username else ""
    try:
        if v5:
            client.connect(b.host, int(b.port), keepalive=int(b.keepalive_s), clean_start=True)
        else:
            client.connect(b.host, int(b.port), keepalive=int(b.keepalive_s))
    except OSError as exc:  # socket, DNS and TLS errors (ssl.SSLError is an OSError)
        return FAIL, link.explain(exc, b, during="connecting")
    client.loop_start()
    try:
        if not wait("connack"):
            if "disconnect" in seen:
                hint = "" if b.tls else " (a TLS port? then set broker.tls = true)"
                return FAIL, f"{where}: the connection was closed before the broker answered{hint}"
            return FAIL, f"{where}: no answer to CONNECT within {timeout_s:g} s"
        rc = seen["connack"]
        if rc.is_failure:
            return FAIL, f"{where}: {link.explain(rc, b)}"
        client.subscribe(topic, qos=1)
        if not wait("suback"):
            return FAIL, f"{where}: connected{who}, but no answer to SUBSCRIBE within {timeout_s:g} s"
        refused = [rc for rc in seen["suback"] if rc.is_failure]
        t0 = time.monotonic()
        client.publish(topic, payload, qos=1, retain=False)
        if refused:
            if wait("puback") and not seen["puback"].is_failure:
                return WARN, (f"{where}: connected{who}, publishing accepted, but subscribing to "
                              f"{topic} is refused ({link.explain(refused[0], b)}): the round "
                              f"trip cannot be checked")
            return FAIL, (f"{where}: connected{who}, but subscribing to {topic} is refused "
                          f"({link.explain(refused[0], b)})")
        def refused_ack():
            return "puback" in seen and seen["puback"].is_failure

        if not wait("message", also=refused_ack):
            ack = seen.get("puback")
            why = (f"the broker refused the message ({link.explain(ack, b)})"
                   if ack is not None and ack.is_failure else
                   f"it did not come back within {timeout_s:g} s (does the broker's ACL allow "
                   f"publishing and subscribing under {topic}?)")
            return FAIL, f"{where}: connected{who}, published on {topic}, but {why}"
        rtt_ms = (seen["message"] - t0) * 1000.0
        return PASS, (f"{where}: connected{who}; a QoS 1 message on {topic} came back in "
                      f"{rtt_ms:.0f} ms")
    finally:
        client.disconnect()
        client.loop_stop()


# --------------------------------------------------------------------------- running
def _guarded(results, name, fn, *args):
    """Run one check; an exception becomes a FAIL with its message."""
    try:
        result, detail = fn(*args)
    except Exception as exc:  # noqa: BLE001 - each check is a top-level unit of the checklist
        log.debug("check %r raised", name, exc_info=True)
        result, detail = FAIL, _error_text(exc)
    if result not in RESULTS:
        raise ValueError(f"check {name!r} returned {result=}; must be one of {RESULTS}")
    results.append(CheckResult(name, result, detail))
    return result


def run_checks(config):
    """Run the checklist.

    Parameters
    ----------
    config : agent.config.Config
        The validated configuration.

    Returns
    -------
    list of CheckResult
        In the order of the module docstring.  When a daemon holds the state
        lock the list ends with that FAIL (the other checks would disturb it).
    """
    results = []
    state_dir = Path(config.agent.state_dir)
    _guarded(results, "config", check_config, config)
    held = {}
    try:
        if _guarded(results, "state lock", check_state_lock, state_dir, held) == FAIL:
            return results
        _guarded(results, "state directory", check_state_dir, config)
        _guarded(results, "clock", check_clock)
        with contextlib.ExitStack() as stack:
            opened = {}
            _guarded(results, "source", check_source, config, stack, opened)
            captured = {}
            why = "not measured: the source did not open"
            if "source" in opened:
                seconds = min(config.schedule.capture_s, CAPTURE_MAX_S)
                try:
                    captured = capture_points(config, opened["source"], seconds)
                except Exception as exc:  # noqa: BLE001 - reported on every point's line
                    log.debug("capture failed", exc_info=True)
                    why = f"capture failed: {_error_text(exc)}"
        for p in config.points:
            if p.name in captured:
                _guarded(results, f"point {p.name}", check_point, p, captured[p.name])
            else:
                results.append(CheckResult(f"point {p.name}", FAIL, why))
        _guarded(results, "known answer", check_known_answer, config)
        _guarded(results, "broker", check_broker, config)
    finally:
        lock = held.get("lock")
        if lock is not None:
            release_state_lock(lock, remove=lock.created)
    return results


def _summary(results):
    counts = {r: sum(1 for c in results if c.result == r) for r in RESULTS}
    return counts, (1 if counts[FAIL] else 0)


def format_text(results, origin):
    """The checklist as aligned text lines (what a technician reads).

    Parameters
    ----------
    results : list of CheckResult
    origin : str
        The configuration file.

    Returns
    -------
    str
    """
    width = max((len(c.check) for c in results), default=0)
    lines = [f"ballpass selftest: {origin}"]
    lines += [f"{c.result:<4}  {c.check:<{width}}  {c.detail}" for c in results]
    counts, code = _summary(results)
    verdict = "ready" if code == 0 else "NOT ready: fix the FAIL lines and run it again"
    lines.append(f"{counts[PASS]} PASS, {counts[WARN]} WARN, {counts[FAIL]} FAIL: {verdict}")
    return "\n".join(lines)


def format_json(results, origin):
    """The checklist as JSON text.

    Returns
    -------
    str
        ``{"config": origin, "checks": [{"check", "result", "detail"}, ...],
        "summary": {"pass", "warn", "fail", "exit_code"}}``.
    """
    counts, code = _summary(results)
    doc = {"config": origin,
           "checks": [c._asdict() for c in results],
           "summary": {"pass": counts[PASS], "warn": counts[WARN], "fail": counts[FAIL],
                       "exit_code": code}}
    return json.dumps(doc, indent=2, ensure_ascii=False)


def selftest(config, as_json=False, stream=None):
    """Run the checklist, print it and return the exit code.

    Parameters
    ----------
    config : agent.config.Config
        The validated configuration.
    as_json : bool, default False
        Print JSON (:func:`format_json`) instead of aligned text.
    stream : file object, optional
        Where to print (default ``sys.stdout``).

    Returns
    -------
    int
        0 when no check failed, 1 otherwise.
    """
    results = run_checks(config)
    out = sys.stdout if stream is None else stream
    text = format_json(results, config.origin) if as_json else format_text(results, config.origin)
    print(text, file=out)
    return _summary(results)[1]
