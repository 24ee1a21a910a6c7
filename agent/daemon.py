"""The monitoring daemon: ``ballpass run``.

One process, three kinds of thread: the source's own capture thread or
callback (sound card), the paho network thread (MQTT), and this module's main
loop, which captures, analyses, judges and queues results.

- :func:`run(config, max_captures=None)` -> exit code.
- :class:`Daemon`: the wiring, for tests and tools.

Lifecycle
---------
- Start: take the state-directory lock (one daemon per state directory),
  open the outbox, start the MQTT link (a missing broker is not fatal), open
  the source (retried with back-off while it is missing).
- Each cycle: ``capture_s`` of signal from every point's channel streams
  through its fixed-memory pipeline; results, alert changes and spectrum
  snapshots go to the outbox, which the MQTT link drains.
- ``READY=1`` is sent to systemd after the first good capture, ``WATCHDOG=1``
  from the loop itself, ``STATUS=`` with a one-line summary.
- SIGTERM/SIGINT: abandon the capture in progress, publish the offline
  status, let the outbox drain briefly, close everything, exit 0.
- SIGHUP: reload the configuration; a bad new file is logged and the old
  one keeps running.
"""

from __future__ import annotations

import logging
import os
import signal
import threading
import time

import numpy as np

from agent import __version__
from agent.errors import BallpassError, ConfigError, SourceError

__all__ = ["Daemon", "run", "setup_logging"]

log = logging.getLogger("ballpass")

BLOCK_FRAMES = 4096
SOURCE_RETRY_MIN_S = 2.0
SOURCE_RETRY_MAX_S = 60.0
DRAIN_ON_STOP_S = 3.0


def setup_logging(level="info"):
    """One line per event; syslog priority prefixes when journald reads stderr."""
    journald = bool(os.environ.get("JOURNAL_STREAM"))
    prefix = {"DEBUG": "<7>", "INFO": "<6>", "WARNING": "<4>", "ERROR": "<3>", "CRITICAL": "<2>"}

    class _Fmt(logging.Formatter):
        def format(self, record):
            text = record.getMessage()
            if record.exc_info and log.isEnabledFor(logging.DEBUG):
                text += "\n" + self.formatException(record.exc_info)
            if journald:
                return f"{prefix.get(record.levelname, '')}{text}"
            return f"{self.formatTime(record, '%Y-%m-%d %H:%M:%S')} {record.levelname.lower()}: {text}"

    handler = logging.StreamHandler()
    handler.setFormatter(_Fmt())
    root = logging.getLogger()
    root.handlers[:] = [handler]
    root.setLevel(getattr(logging, level.upper(), logging.INFO))


#: Sources whose samples arrive at the pace of a converter clock: their rate is checked.
DEVICE_PACED = ("soundcard", "iio")
#: Relative deviation of the measured sample rate that flags a capture "wrong_rate".
RATE_TOLERANCE = 0.05


def _measured_rate(frames, elapsed_s, sample_rate_hz):
    """Samples per second over the part of a capture after the device's backlog, or
    None when that part should last under half a second (too short to judge)."""
    if frames / sample_rate_hz < 0.5:
        return None
    return frames / max(elapsed_s, 1e-6)


def _rss_mb():
    try:
        with open("/proc/self/statm", "rb") as f:
            pages = int(f.read().split()[1])
        return pages * os.sysconf("SC_PAGE_SIZE") / 1e6
    except (OSError, ValueError, IndexError):
        return None


class _PointRuntime:
    """Per point: pipeline, calibration scale, alert engine, scratch buffer."""

    def __init__(self, point, config, source, overrides, baseline_store):
        from agent.alerts import AlertEngine
        from agent.calibration import input_scaling
        from agent.pipeline import Pipeline

        self.point = point
        self.scale, full_scale = input_scaling(point, source.unit, overrides.get(point.name))
        self.pipeline = Pipeline(point, source.sample_rate_hz, config.schedule.capture_s,
                                 full_scale_m_s2=full_scale,
                                 lowest_trusted_hz=config.source.lowest_trusted_hz)
        self.alerts = AlertEngine(point, config.alerts, baseline_store)
        self.buf = np.empty(BLOCK_FRAMES)
        self.last_spectrum_t = 0.0


class Daemon:
    """The running agent; see the module docstring.

    Parameters
    ----------
    config : Config
    max_captures : int, optional
        Stop after this many capture cycles (tests, demos).
    """

    def __init__(self, config, max_captures=None):
        self.config = config
        self.max_captures = max_captures
        self.stop_event = threading.Event()
        self.reload_requested = False
        self.started_monotonic = time.monotonic()
        self.health = {"captures": 0, "flagged": 0, "overruns": 0, "outbox_depth": 0,
                       "outbox_bytes": 0, "dropped": {"result": 0, "spectrum": 0, "alert": 0},
                       "reconnects": 0, "analysis_ms": 0.0, "rss_mb": None,
                       "broker": "connecting", "source": "starting"}
        self.source = None
        self.link = None
        self.outbox = None
        self.points = []
        self.ready_sent = False
        self.notifier = None
        self._last_ping = 0.0
        self._will_cache = None
        self.config_path = None
        self._lock_file = None
        self._block = None

    # ------------------------------------------------------------------ signals
    def install_signals(self):
        """SIGTERM/SIGINT stop, SIGHUP reloads (main thread only)."""
        def stop(signum, _frame):
            log.info("signal %s: stopping", signal.Signals(signum).name)
            self.stop_event.set()

        def hup(_signum, _frame):
            self.reload_requested = True
            self.stop_event.set()  # wake the loop; it clears the event and reloads

        signal.signal(signal.SIGTERM, stop)
        signal.signal(signal.SIGINT, stop)
        signal.signal(signal.SIGHUP, hup)

    # ------------------------------------------------------------------ wiring
    def _topics(self):
        from agent.topics import Topics
        a = self.config.agent
        return Topics(self.config.broker.topic_prefix, a.site, a.name)

    def _status_body(self, state):
        from agent import payloads
        a = self.config.agent
        self.health["rss_mb"] = _rss_mb()
        if self.outbox is not None:
            self.health["outbox_depth"] = self.outbox.depth
            self.health["outbox_bytes"] = self.outbox.bytes
            self.health["dropped"] = dict(self.outbox.dropped)
        if self.link is not None:
            self.health["reconnects"] = self.link.reconnects
            self.health["broker"] = self.link.state
        return payloads.status(agent=a.name, site=a.site, state=state, version=__version__,
                               uptime_s=time.monotonic() - self.started_monotonic,
                               health=self.health)

    def _open_delivery(self):
        from agent.mqtt import MqttLink
        from agent.outbox import Outbox
        cfg = self.config
        self.outbox = Outbox(cfg.agent.state_dir / "outbox.sqlite3", cfg.outbox.max_messages,
                             cfg.outbox.max_bytes, cfg.outbox.synchronous)
        if cfg.broker.enabled:
            self.link = MqttLink(cfg.broker, cfg.agent.name, cfg.agent.site, self.outbox,
                                 will_payload=self._will, on_state=self._on_link_state)
            self.link.start()

    def _on_link_state(self, state):
        """After every (re)connection, queue a fresh online status to replace a retained
        offline will.  It goes through the outbox (which keeps only the newest status), so
        status messages stay in ``seq`` order."""
        if state == "connected" and not self.stop_event.is_set() and self.outbox is not None:
            self._publish_status("online")

    def _will(self):
        """The offline status: built once for the last will (the link asks before every
        connection attempt, which must not write to the outbox each time), and anew, with
        the final counters and a fresh ``seq``, when stopping."""
        from agent import payloads
        if self._will_cache is None or self.stop_event.is_set():
            body = self._status_body("offline")
            body["seq"] = self.outbox.next_seq(self._topics().status)
            self._will_cache = payloads.encode(body)
        return self._will_cache

    def _enqueue(self, kind, point, body):
        topics = self._topics()
        topic = topics.status if kind == "status" else topics.for_kind(kind, point)
        retain = kind in ("status", "alert")
        self.outbox.enqueue(kind, topic, body, qos=1, retain=retain, seq_key=topic)
        if self.link is not None:
            self.link.notify()

    def _publish_status(self, state="online"):
        self._enqueue("status", None, self._status_body(state))

    def _open_source(self):
        from agent.sources import open_source
        delay = SOURCE_RETRY_MIN_S
        while not self.stop_event.is_set():
            src = open_source(self.config)
            try:
                src.open()
                self.health["source"] = "ok"
                log.info("source open: %s", src.describe())
                return src
            except SourceError as exc:
                self.health["source"] = str(exc)
                log.warning("source not available (%s); retrying in %.0f s", exc, delay)
                self._notify_status(f"waiting for the source: {exc}")
                self._publish_status("online")
                self._wait(delay)
                delay = min(delay * 2, SOURCE_RETRY_MAX_S)
        return None

    def _build_points(self):
        from agent.baseline import BaselineStore
        from agent.calibration import load_overrides
        overrides = load_overrides(self.config.agent.state_dir)
        store = BaselineStore(self.config.agent.state_dir)
        self.points = [_PointRuntime(p, self.config, self.source, overrides, store)
                       for p in self.config.points]

    # ------------------------------------------------------------------ systemd
    def _notify_status(self, text):
        if self.notifier is not None:
            self.notifier.status(text)

    def _watchdog(self):
        """Ping the systemd watchdog, at most a few times per interval."""
        n = self.notifier
        if n is None or not n.watchdog_interval_s:
            return
        now = time.monotonic()
        if now - self._last_ping >= n.watchdog_interval_s / 4:
            n.watchdog()
            self._last_ping = now

    def _wait(self, seconds):
        """Wait, pinging the watchdog; returns early when stopping."""
        end = time.monotonic() + seconds
        interval = self.notifier.watchdog_interval_s if self.notifier else None
        step = interval / 2 if interval else 5.0
        while not self.stop_event.is_set():
            left = end - time.monotonic()
            if left <= 0:
                return
            self.stop_event.wait(min(left, step))
            self._watchdog()

    # ------------------------------------------------------------------ capture
    def capture_cycle(self):
        """One capture of every point; returns False when the source failed."""
        src = self.source
        cfg = self.config
        frames_wanted = int(round(cfg.schedule.capture_s * src.sample_rate_hz))
        block = self._block
        if not cfg.schedule.continuous:
            src.discard()
        overflows_before = src.overflows
        for pr in self.points:
            pr.pipeline.start()
        t_capture = time.time()
        done = 0
        lead_frames = frames_wanted // 10  # what the device had buffered arrives at once
        t_lead = None
        try:
            while done < frames_wanted and not self.stop_event.is_set():
                n = src.read(block[:min(BLOCK_FRAMES, frames_wanted - done)])
                if n == 0:
                    raise SourceError("the source ended")
                for pr in self.points:
                    np.multiply(block[:n, pr.point.channel], pr.scale, out=pr.buf[:n])
                    pr.pipeline.feed(pr.buf[:n])
                done += n
                if t_lead is None and done >= lead_frames:
                    t_lead, lead_done = time.monotonic(), done
                self._watchdog()
        except SourceError as exc:
            self.health["source"] = str(exc)
            log.error("capture failed: %s", exc)
            return False
        if self.stop_event.is_set() and done < frames_wanted:
            return True  # abandoned on a signal; nothing to publish
        overruns = src.overflows - overflows_before
        flags = ["overrun"] if overruns else []
        if src.kind in DEVICE_PACED and t_lead is not None:
            rate = _measured_rate(done - lead_done, time.monotonic() - t_lead, src.sample_rate_hz)
            if rate is not None and abs(rate / src.sample_rate_hz - 1.0) > RATE_TOLERANCE:
                flags.append("wrong_rate")
                log.warning("the input delivered %.0f samples/s, not the configured %d: capture "
                            "flagged", rate, src.sample_rate_hz)
        self.health["overruns"] += overruns
        t0 = time.perf_counter()
        for pr in self.points:
            self._judge(pr, pr.pipeline.finish(flags), t_capture)
        self.health["analysis_ms"] = round((time.perf_counter() - t0) * 1000.0 / len(self.points), 1)
        self.health["captures"] += 1
        self.health["source"] = "ok"
        return True

    def _judge(self, pr, analysis, t_capture):
        from agent import payloads
        a = self.config.agent
        d = analysis.to_dict()
        if analysis.flagged:
            self.health["flagged"] += 1
            log.warning("point %s: capture flagged %s; no judgement made",
                        pr.point.name, ",".join(analysis.quality))
        change = pr.alerts.update(d)
        self._enqueue("result", pr.point.name,
                      payloads.result(d, agent=a.name, site=a.site,
                                      alert_state=pr.alerts.state, ts=t_capture))
        spectrum_due = (time.monotonic() - pr.last_spectrum_t >= self.config.schedule.spectrum_every_s
                        or pr.last_spectrum_t == 0.0)
        if change is not None:
            log.warning("point %s: %s -> %s: %s", pr.point.name, change.previous, change.state,
                        change.text)
            self._enqueue("alert", pr.point.name, payloads.alert(
                agent=a.name, site=a.site, point=pr.point.name, state=change.state,
                previous=change.previous, reasons=change.reasons, text=change.text,
                caution=change.caution, ts=t_capture))
            spectrum_due = True
        freqs, amp = analysis.envelope_spectrum()
        if spectrum_due and freqs is not None:
            from agent.dsp.bearing import defect_frequencies_hz
            f = defect_frequencies_hz(pr.point.bearing.orders, analysis.shaft_hz)
            markers = {"bpfo": f["bpfo"], "bpfi": f["bpfi"], "bsf2": f["bsf2"], "ftf": f["ftf"],
                       "shaft": analysis.shaft_hz}
            self._enqueue("spectrum", pr.point.name, payloads.spectrum(
                freqs, amp, agent=a.name, site=a.site, point=pr.point.name, markers=markers,
                band_hz=d["envelope"]["band_hz"], ts=t_capture))
            pr.last_spectrum_t = time.monotonic()
        lv = d["levels"]
        if lv["velocity_rms_mm_s"] is not None:
            found = ", ".join(f["defect"] for f in d["findings"]) or "no defect signature"
            log.info("point %s: %.2f mm/s (zone %s), %.3g m/s² RMS, %s, alert %s", pr.point.name,
                     lv["velocity_rms_mm_s"], lv["iso_zone"], lv["accel_rms_m_s2"], found,
                     pr.alerts.state)

    # ------------------------------------------------------------------ main loop
    def _reload(self):
        from agent.config import load_config
        self.reload_requested = False
        path = self.config_path
        try:
            new = load_config(path)
        except ConfigError as exc:
            log.error("reload refused, keeping the running configuration: %s",
                      "; ".join(exc.problems))
            return
        if (new.source != self.config.source or new.broker != self.config.broker
                or new.agent != self.config.agent or new.outbox != self.config.outbox):
            log.warning("reload: source, broker, agent and outbox settings take effect at the "
                        "next restart; points, schedule and alerts are applied now")
            new = type(new)(agent=self.config.agent, source=self.config.source,
                            schedule=new.schedule, broker=self.config.broker,
                            outbox=self.config.outbox, alerts=new.alerts, points=new.points,
                            origin=new.origin)
        try:
            old = self.config
            self.config = new
            self._build_points()
        except (ValueError, BallpassError) as exc:
            self.config = old
            self._build_points()
            log.error("reload refused, keeping the running configuration: %s", exc)
            return
        log.info("configuration reloaded from %s", path)

    def serve(self):
        """Run until stopped; returns the exit code."""
        from agent.sdnotify import Notifier
        from agent.selftest import acquire_state_lock
        cfg = self.config
        self.notifier = Notifier.from_env()
        try:
            cfg.agent.state_dir.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            log.error("state directory %s cannot be created: %s", cfg.agent.state_dir, exc.strerror)
            return 1
        self._lock_file = acquire_state_lock(cfg.agent.state_dir)
        if self._lock_file is None:
            from agent.selftest import lock_holder_pid
            pid = lock_holder_pid(cfg.agent.state_dir)
            log.error("another ballpass process%s uses %s; refusing to start a second daemon",
                      f" (pid {pid})" if pid else "", cfg.agent.state_dir)
            return 1
        try:
            self._open_delivery()
            self._publish_status("online")
            self.source = self._open_source()
            if self.source is None:
                return 0
            self._block = np.empty((BLOCK_FRAMES, self.source.channels))
            self._build_points()
            log.info("ballpass %s running: %d point(s), %g s every %g s", __version__,
                     len(self.points), cfg.schedule.capture_s, cfg.schedule.interval_s)
            cycles = 0
            while not self.stop_event.is_set() or self.reload_requested:
                if self.reload_requested:
                    self.stop_event.clear()
                    if self.notifier:
                        self.notifier.reloading()
                    self._reload()
                    if self.notifier:
                        self.notifier.ready()
                    continue
                t_start = time.monotonic()
                ok = self.capture_cycle()
                if not ok:
                    self.source.close()
                    self.source = self._open_source()
                    if self.source is None:
                        break
                    continue
                cycles += 1
                if self.health["captures"] and not self.ready_sent and self.notifier:
                    self.notifier.ready()
                    self.ready_sent = True
                self._publish_status("online")
                self._notify_status(self._summary())
                if self.max_captures and cycles >= self.max_captures:
                    break
                if not self.config.schedule.continuous:
                    self._wait(self.config.schedule.interval_s - (time.monotonic() - t_start))
            return 0
        finally:
            self._shutdown()

    def _summary(self):
        parts = [f"{self.health['captures']} captures"]
        for pr in self.points:
            parts.append(f"{pr.point.name}: {pr.alerts.state}")
        parts.append(f"outbox {self.outbox.depth}")
        parts.append(f"broker {self.link.state if self.link else 'disabled'}")
        return "; ".join(parts)

    def _shutdown(self):
        self.stop_event.set()
        if self.notifier is not None:
            self.notifier.stopping()
        if self.source is not None:
            try:
                self.source.close()
            except BallpassError as exc:
                log.warning("closing the source: %s", exc)
        if self.link is not None:
            self.link.close(DRAIN_ON_STOP_S)
        if self.outbox is not None:
            self.outbox.close()
        if self._lock_file is not None:
            self._lock_file.close()
        log.info("stopped")


def run(config, max_captures=None, config_path=None):
    """Run the daemon in this process (installs signal handlers); exit code."""
    setup_logging(config.agent.log_level)
    d = Daemon(config, max_captures=max_captures)
    d.config_path = config_path if config_path is not None else (
        None if config.origin.startswith("<") else config.origin)
    d.install_signals()
    try:
        return d.serve()
    except BallpassError as exc:
        log.error("%s", exc)
        return 1
    except Exception:  # the top-level loop: log, exit non-zero, systemd restarts us
        log.exception("unexpected error; exiting so that the service manager restarts ballpass")
        return 1
