"""Configuration: a TOML file validated once, at start, into frozen dataclasses.

Public API
----------
- :func:`load_config(path)` -> :class:`Config`; ``path=None`` gives the
  built-in defaults (a simulated pump, a broker on loopback).
- :func:`parse_config(mapping, origin)` -> :class:`Config` for a parsed table.
- :class:`Config` and its parts; nothing deeper in the program reads raw dicts.

Every problem in a file is collected before anything is raised: the
:class:`~agent.errors.ConfigError` lists each one with the key path, the value
found and what is allowed, and the command line exits with code 2.  Unknown
keys are errors too, so a typo never silently falls back to a default.

The configuration holds *paths* to secrets (password file, client key), never
the secrets themselves, so a ``Config`` can be logged or printed safely.
"""

from __future__ import annotations

import ipaddress
import math
import os
import sys
from dataclasses import dataclass, field
from pathlib import Path

from agent.dsp.bearing import DefectOrders, defect_orders
from agent.errors import ConfigError

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on Python 3.10 only
    import tomli as tomllib

__all__ = [
    "AgentSettings", "SourceSettings", "SimulatedSettings", "ScheduleSettings",
    "BrokerSettings", "OutboxSettings", "AlertSettings", "MachineSettings",
    "BearingSettings", "EnvelopeSettings", "LimitSettings", "PointSettings",
    "Config", "load_config", "parse_config", "default_config_path",
    "SOURCE_KINDS", "FAULTS", "MODULATIONS",
]

SOURCE_KINDS = ("soundcard", "iio", "wav", "simulated")
FAULTS = ("none", "outer", "inner", "rolling", "outer+inner")
MODULATIONS = ("none", "unbalance", "gravity", "both")
SAMPLE_FORMATS = ("int16", "int24", "int32", "float32")
SUPPORTS = ("rigid", "flexible")
MQTT_PROTOCOLS = ("5", "3.1.1")
SYNC_MODES = ("full", "normal")
LOG_LEVELS = ("debug", "info", "warning", "error")
STANDARD_GRAVITY_M_S2 = 9.80665  # ISO 80000-3 / CGPM 1901 conventional value


# --------------------------------------------------------------------------- settings
@dataclass(frozen=True)
class AgentSettings:
    """Who this agent is and where it keeps its state."""

    site: str = "larkspur-water-works"
    name: str = "pumphouse-a"
    state_dir: Path = Path("state")
    log_level: str = "info"


@dataclass(frozen=True)
class SimulatedSettings:
    """Machine state of the ``simulated`` source (demos and tests)."""

    fault: str = "outer"
    modulation: str = "unbalance"
    impact_m_s2: float = 6.0
    growth_m_s2_per_hour: float = 0.0
    noise_rms_m_s2: float = 0.5
    resonance_hz: float = 3000.0
    seed: int | None = None


@dataclass(frozen=True)
class SourceSettings:
    """Where the signal comes from; see ``config/example.toml``."""

    kind: str = "simulated"
    sample_rate_hz: int = 51200
    channels: int = 1
    device: str = ""
    sample_format: str = "int24"
    latency_s: float = 0.15
    lowest_trusted_hz: float = 0.0
    sysfs_dir: Path = Path("/sys/bus/iio/devices")
    dev_dir: Path = Path("/dev")
    buffer_frames: int = 4096
    path: Path | None = None
    realtime: bool = True
    simulated: SimulatedSettings = field(default_factory=SimulatedSettings)


@dataclass(frozen=True)
class ScheduleSettings:
    """How much signal is captured and how often."""

    capture_s: float = 10.0
    interval_s: float = 600.0
    continuous: bool = False
    spectrum_every_s: float = 86400.0


@dataclass(frozen=True)
class BrokerSettings:
    """MQTT broker connection.  Secrets are read from files at connect time."""

    host: str = "127.0.0.1"
    port: int = 1883
    protocol: str = "5"
    client_id: str = ""
    topic_prefix: str = "ballpass"
    keepalive_s: int = 30
    tls: bool = False
    ca_file: Path | None = None
    cert_file: Path | None = None
    key_file: Path | None = None
    username: str = ""
    password_file: Path | None = None
    allow_plaintext: bool = False
    reconnect_min_s: float = 1.0
    reconnect_max_s: float = 120.0
    enabled: bool = True

    @property
    def is_loopback(self):
        """True when the broker host is this machine."""
        return _is_loopback(self.host)


@dataclass(frozen=True)
class OutboxSettings:
    """Bounds of the persistent store-and-forward queue."""

    max_messages: int = 20000
    max_bytes: int = 20_000_000
    # "full": a message the agent queued is never lost to a power cut (about 37
    # fsyncs an hour at the default schedule, measured); "normal" saves those.
    synchronous: str = "full"


@dataclass(frozen=True)
class AlertSettings:
    """Debounce, hysteresis and baseline learning of the alert engine."""

    raise_after: int = 2
    clear_after: int = 3
    hysteresis: float = 0.9
    baseline_captures: int = 12
    baseline_watch_ratio: float = 2.0
    baseline_act_ratio: float = 4.0
    defect_watch_snr_db: float = 10.0
    defect_act_snr_db: float = 20.0


@dataclass(frozen=True)
class MachineSettings:
    """The machine that carries the measured bearing."""

    shaft_hz: float = 24.75
    speed_search: float = 0.05
    iso_group: int = 2
    support: str = "rigid"


@dataclass(frozen=True)
class BearingSettings:
    """Bearing geometry (or directly entered orders) as defect orders."""

    orders: DefectOrders
    designation: str = ""
    balls: int | None = None
    ball_diameter_mm: float | None = None
    pitch_diameter_mm: float | None = None
    contact_angle_deg: float = 0.0


@dataclass(frozen=True)
class EnvelopeSettings:
    """Envelope analysis of one point."""

    band_hz: tuple[float, float] | None = None  # None: chosen by spectral kurtosis
    harmonics: int = 8
    tolerance: float = 0.02
    resolution_hz: float = 0.0  # 0: derived from the slowest modulation


@dataclass(frozen=True)
class LimitSettings:
    """Optional absolute limits per indicator (None: not used)."""

    velocity_watch_mm_s: float | None = None
    velocity_act_mm_s: float | None = None
    accel_rms_watch_m_s2: float | None = None
    accel_rms_act_m_s2: float | None = None
    crest_factor_watch: float | None = None
    kurtosis_watch: float | None = None


@dataclass(frozen=True)
class PointSettings:
    """One measured bearing: channel, calibration, machine, bearing, limits."""

    name: str
    channel: int
    sensitivity_mv_per_m_s2: float
    full_scale_v: float
    machine: MachineSettings
    bearing: BearingSettings
    envelope: EnvelopeSettings
    limits: LimitSettings
    fault: str | None = None
    modulation: str | None = None

    @property
    def full_scale_m_s2(self):
        """Acceleration at digital full scale (±1.0), from the calibration."""
        return self.full_scale_v * 1000.0 / self.sensitivity_mv_per_m_s2


@dataclass(frozen=True)
class Config:
    """The whole, validated configuration."""

    agent: AgentSettings
    source: SourceSettings
    schedule: ScheduleSettings
    broker: BrokerSettings
    outbox: OutboxSettings
    alerts: AlertSettings
    points: tuple[PointSettings, ...]
    origin: str = "<built-in defaults>"

    def point(self, name):
        """The point called ``name``; ValueError listing the names if absent."""
        for p in self.points:
            if p.name == name:
                return p
        names = ", ".join(p.name for p in self.points)
        raise ValueError(f"no point named {name!r}; configured points: {names}")


# --------------------------------------------------------------------------- reading
_MISSING = object()


class _Table:
    """Typed access to one TOML table that records problems instead of raising."""

    def __init__(self, data, path, problems):
        self.path = path
        self.problems = problems
        if data is _MISSING or data is None:
            data = {}
        if not isinstance(data, dict):
            self._bad("", data, "a table")
            data = {}
        self.data = data
        self.used = set()

    def _key(self, key):
        return f"{self.path}.{key}" if self.path else key

    def _bad(self, key, value, allowed):
        where = self._key(key) if key else self.path
        self.problems.append(f"{where} = {value!r}: must be {allowed}")

    def has(self, key):
        return key in self.data

    def raw(self, key, default=_MISSING):
        self.used.add(key)
        return self.data.get(key, default)

    def table(self, key):
        return _Table(self.raw(key), self._key(key), self.problems)

    def tables(self, key):
        value = self.raw(key, [])
        if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
            self._bad(key, value, "an array of tables ([[" + self._key(key) + "]])")
            return []
        return [_Table(v, f"{self._key(key)}[{i}]", self.problems) for i, v in enumerate(value)]

    def str(self, key, default, choices=None, allow_empty=True):
        value = self.raw(key, default)
        if not isinstance(value, str):
            self._bad(key, value, "a string")
            return default
        if choices is not None and value not in choices:
            self._bad(key, value, "one of " + ", ".join(repr(c) for c in choices))
            return default
        if not allow_empty and not value.strip():
            self._bad(key, value, "a non-empty string")
            return default
        return value

    def name(self, key, default):
        value = self.str(key, default, allow_empty=False)
        bad = set(value) & set("/#+ \t\n\0")
        if bad:
            self._bad(key, value, "a name without spaces, '/', '#' or '+' (it becomes an MQTT topic level)")
            return default
        return value

    def num(self, key, default, lo=None, hi=None, lo_open=False, integer=False):
        value = self.raw(key, default)
        if value is None:
            return None
        kind = "a whole number" if integer else "a number"
        ok_type = isinstance(value, int) if integer else isinstance(value, (int, float))
        if isinstance(value, bool) or not ok_type or not math.isfinite(value):
            self._bad(key, value, kind)
            return default
        if lo is not None and (value <= lo if lo_open else value < lo):
            rel = ">" if lo_open else ">="
            self._bad(key, value, f"{kind} {rel} {lo}" + (f" and <= {hi}" if hi is not None else ""))
            return default
        if hi is not None and value > hi:
            self._bad(key, value, f"{kind} <= {hi}" + (f" and >= {lo}" if lo is not None else ""))
            return default
        return int(value) if integer else float(value)

    def int(self, key, default, lo=None, hi=None):
        return self.num(key, default, lo, hi, integer=True)

    def bool(self, key, default):
        value = self.raw(key, default)
        if not isinstance(value, bool):
            self._bad(key, value, "true or false")
            return default
        return value

    def path_(self, key, default, base):
        value = self.raw(key, default)
        if value is None or value == "":
            return None if default is None else Path(default)
        if not isinstance(value, str):
            self._bad(key, value, "a path string")
            return None if default is None else Path(default)
        p = Path(os.path.expanduser(value))
        if not p.is_absolute() and base is not None:
            p = base / p
        return p

    def finish(self):
        for key in self.data:
            if key not in self.used:
                self.problems.append(f"{self._key(key)}: unknown key (check the spelling; "
                                     f"see config/example.toml for every key)")


def _is_loopback(host):
    if host in ("localhost", "localhost.localdomain", "ip6-localhost"):
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


def default_config_path():
    """Path of the built-in default configuration shipped in the package."""
    return Path(__file__).with_name("data") / "default.toml"


def load_config(path=None):
    """Read and validate a configuration file.

    Parameters
    ----------
    path : str or Path, optional
        The TOML file.  ``None`` loads the built-in defaults (a simulated pump
        of the demo plant, a broker on loopback).

    Returns
    -------
    Config

    Raises
    ------
    ConfigError
        With every problem found; the file is never partly applied.
    """
    builtin = path is None
    path = Path(default_config_path() if builtin else path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError([f"{path}: configuration file not found"]) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError([f"{path}: cannot be read ({exc})"]) from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError([f"{path}: not valid TOML: {exc}"]) from None
    base = None if builtin else path.resolve().parent
    return parse_config(data, origin="<built-in defaults>" if builtin else str(path), base_dir=base)


def parse_config(data, origin="<memory>", base_dir=None):
    """Validate a parsed TOML mapping into a :class:`Config`.

    Relative paths are taken relative to ``base_dir`` (the config file's
    folder); the state directory defaults to ``$STATE_DIRECTORY`` when systemd
    sets it, else ``./state``.
    """
    problems = []
    root = _Table(data, "", problems)

    agent = _read_agent(root.table("agent"), base_dir)
    source = _read_source(root.table("source"), base_dir)
    schedule = _read_schedule(root.table("schedule"))
    broker = _read_broker(root.table("broker"), base_dir)
    outbox = _read_outbox(root.table("outbox"))
    alerts = _read_alerts(root.table("alerts"))
    points = [_read_point(t, source) for t in root.tables("point")]
    root.finish()

    if not points and not root.has("point"):
        points = [_read_point(_Table({"name": "pump-nde"}, "point[0]", problems), source)]
    elif not points:
        problems.append("point: at least one [[point]] is needed")
    names = [p.name for p in points if p is not None]
    for dup in sorted({n for n in names if names.count(n) > 1}):
        problems.append(f"point.name = {dup!r}: must be unique among points")
    for i, p in enumerate(points):
        if p is not None and p.channel >= source.channels:
            problems.append(f"point[{i}].channel = {p.channel}: must be < source.channels = "
                            f"{source.channels} (channels are counted from 0)")
        if p is not None and p.envelope.band_hz and p.envelope.band_hz[1] >= source.sample_rate_hz / 2:
            problems.append(f"point[{i}].envelope.band_hz = {list(p.envelope.band_hz)}: upper edge "
                            f"must be below half the sample rate ({source.sample_rate_hz / 2:g} Hz)")
    if schedule.capture_s > schedule.interval_s and not schedule.continuous:
        problems.append(f"schedule.capture_s = {schedule.capture_s:g}: must be <= schedule.interval_s "
                        f"= {schedule.interval_s:g} (or set schedule.continuous = true)")
    if broker.enabled and not broker.tls and not broker.is_loopback and not broker.allow_plaintext:
        problems.append(f"broker.host = {broker.host!r}: is not on this machine, so broker.tls must "
                        f"be true (or set broker.allow_plaintext = true to send in clear text "
                        f"on purpose)")
    if broker.password_file is not None and not broker.username:
        problems.append("broker.password_file is set: broker.username must be set too")
    if (broker.cert_file is None) != (broker.key_file is None):
        problems.append("broker.cert_file and broker.key_file: give both for a client "
                        "certificate, or neither")
    if problems:
        raise ConfigError([f"{origin}: {p}" for p in problems])
    return Config(agent=agent, source=source, schedule=schedule, broker=broker,
                  outbox=outbox, alerts=alerts, points=tuple(points), origin=origin)


def _read_agent(t, base_dir):
    d = AgentSettings()
    state_default = os.environ.get("STATE_DIRECTORY", "").split(":")[0] or str(d.state_dir)
    out = AgentSettings(
        site=t.name("site", d.site),
        name=t.name("name", d.name),
        state_dir=t.path_("state_dir", state_default, base_dir),
        log_level=t.str("log_level", d.log_level, LOG_LEVELS),
    )
    t.finish()
    return out


def _read_source(t, base_dir):
    d = SourceSettings()
    kind = t.str("kind", d.kind, SOURCE_KINDS)
    rate_default = 48000 if kind == "soundcard" else d.sample_rate_hz
    trusted_default = 10.0 if kind == "soundcard" else 0.0
    sim_t = t.table("simulated")
    sd = SimulatedSettings()
    sim = SimulatedSettings(
        fault=sim_t.str("fault", sd.fault, FAULTS),
        modulation=sim_t.str("modulation", sd.modulation, MODULATIONS),
        impact_m_s2=sim_t.num("impact_m_s2", sd.impact_m_s2, 0.0),
        growth_m_s2_per_hour=sim_t.num("growth_m_s2_per_hour", sd.growth_m_s2_per_hour, 0.0, 10000.0),
        noise_rms_m_s2=sim_t.num("noise_rms_m_s2", sd.noise_rms_m_s2, 0.0, lo_open=True),
        resonance_hz=sim_t.num("resonance_hz", sd.resonance_hz, 100.0),
        seed=sim_t.int("seed", None, 0),
    )
    sim_t.finish()
    device = t.raw("device", d.device)
    if isinstance(device, int) and not isinstance(device, bool):
        device = str(device)
    elif not isinstance(device, str):
        t._bad("device", device, "a device index (whole number) or a name substring (string)")
        device = d.device
    out = SourceSettings(
        kind=kind,
        sample_rate_hz=t.int("sample_rate_hz", rate_default, 1000, 1_000_000),
        channels=t.int("channels", d.channels, 1, 64),
        device=device,
        sample_format=t.str("sample_format", d.sample_format, SAMPLE_FORMATS),
        latency_s=t.num("latency_s", d.latency_s, 0.0, 2.0, lo_open=True),
        lowest_trusted_hz=t.num("lowest_trusted_hz", trusted_default, 0.0, 200.0),
        sysfs_dir=t.path_("sysfs_dir", str(d.sysfs_dir), base_dir),
        dev_dir=t.path_("dev_dir", str(d.dev_dir), base_dir),
        buffer_frames=t.int("buffer_frames", d.buffer_frames, 16, 1 << 22),
        path=t.path_("path", None, base_dir),
        realtime=t.bool("realtime", d.realtime),
        simulated=sim,
    )
    if kind == "wav" and out.path is None:
        t._bad("path", "", "the WAV file to replay when source.kind = 'wav'")
    if kind == "simulated" and sim.resonance_hz >= out.sample_rate_hz / 2:
        t.problems.append(f"source.simulated.resonance_hz = {sim.resonance_hz:g}: must be below half "
                          f"the sample rate ({out.sample_rate_hz / 2:g} Hz)")
    t.finish()
    return out


def _read_schedule(t):
    d = ScheduleSettings()
    out = ScheduleSettings(
        capture_s=t.num("capture_s", d.capture_s, 0.5, 3600.0),
        interval_s=t.num("interval_s", d.interval_s, 1.0, 86400.0 * 7),
        continuous=t.bool("continuous", d.continuous),
        spectrum_every_s=t.num("spectrum_every_s", d.spectrum_every_s, 0.0),
    )
    t.finish()
    return out


def _read_broker(t, base_dir):
    d = BrokerSettings()
    host = t.str("host", d.host, allow_empty=False)
    tls = t.bool("tls", d.tls)
    out = BrokerSettings(
        host=host,
        port=t.int("port", 8883 if tls else d.port, 1, 65535),
        protocol=t.str("protocol", d.protocol, MQTT_PROTOCOLS),
        client_id=t.str("client_id", d.client_id),
        topic_prefix=t.name("topic_prefix", d.topic_prefix),
        keepalive_s=t.int("keepalive_s", d.keepalive_s, 5, 3600),
        tls=tls,
        ca_file=t.path_("ca_file", None, base_dir),
        cert_file=t.path_("cert_file", None, base_dir),
        key_file=t.path_("key_file", None, base_dir),
        username=t.str("username", d.username),
        password_file=t.path_("password_file", None, base_dir),
        allow_plaintext=t.bool("allow_plaintext", d.allow_plaintext),
        reconnect_min_s=t.num("reconnect_min_s", d.reconnect_min_s, 0.1, 600.0),
        reconnect_max_s=t.num("reconnect_max_s", d.reconnect_max_s, 1.0, 3600.0),
        enabled=t.bool("enabled", d.enabled),
    )
    t.finish()
    return out


def _read_outbox(t):
    d = OutboxSettings()
    out = OutboxSettings(
        max_messages=t.int("max_messages", d.max_messages, 10),
        max_bytes=t.int("max_bytes", d.max_bytes, 10_000),
        synchronous=t.str("synchronous", d.synchronous, SYNC_MODES),
    )
    t.finish()
    return out


def _read_alerts(t):
    d = AlertSettings()
    out = AlertSettings(
        raise_after=t.int("raise_after", d.raise_after, 1, 100),
        clear_after=t.int("clear_after", d.clear_after, 1, 100),
        hysteresis=t.num("hysteresis", d.hysteresis, 0.5, 1.0),
        baseline_captures=t.int("baseline_captures", d.baseline_captures, 0, 10000),
        baseline_watch_ratio=t.num("baseline_watch_ratio", d.baseline_watch_ratio, 1.0, lo_open=True),
        baseline_act_ratio=t.num("baseline_act_ratio", d.baseline_act_ratio, 1.0, lo_open=True),
        defect_watch_snr_db=t.num("defect_watch_snr_db", d.defect_watch_snr_db, 0.0),
        defect_act_snr_db=t.num("defect_act_snr_db", d.defect_act_snr_db, 0.0),
    )
    if out.baseline_act_ratio <= out.baseline_watch_ratio:
        t._bad("baseline_act_ratio", out.baseline_act_ratio,
               f"greater than alerts.baseline_watch_ratio = {out.baseline_watch_ratio:g}")
    if out.defect_act_snr_db <= out.defect_watch_snr_db:
        t._bad("defect_act_snr_db", out.defect_act_snr_db,
               f"greater than alerts.defect_watch_snr_db = {out.defect_watch_snr_db:g}")
    t.finish()
    return out


def _read_point(t, source):
    problems_before = len(t.problems)
    name = t.name("name", "pump-nde")
    channel = t.int("channel", 0, 0, 63)
    if t.has("sensitivity_mv_per_g") and t.has("sensitivity_mv_per_m_s2"):
        t._bad("sensitivity_mv_per_g", t.raw("sensitivity_mv_per_g"),
               "given alone: set sensitivity_mv_per_g or sensitivity_mv_per_m_s2, not both")
    if t.has("sensitivity_mv_per_g"):
        sens = t.num("sensitivity_mv_per_g", 100.0, 0.0, lo_open=True) / STANDARD_GRAVITY_M_S2
    else:
        sens = t.num("sensitivity_mv_per_m_s2", 100.0 / STANDARD_GRAVITY_M_S2, 0.0, lo_open=True)
    full_scale_v = t.num("full_scale_v", 1.0, 0.0, lo_open=True)

    mt = t.table("machine")
    md = MachineSettings()
    machine = MachineSettings(
        shaft_hz=mt.num("shaft_hz", md.shaft_hz, 0.5, 500.0),
        speed_search=mt.num("speed_search", md.speed_search, 0.0, 0.3),
        iso_group=mt.int("iso_group", md.iso_group, 1, 2),
        support=mt.str("support", md.support, SUPPORTS),
    )
    mt.finish()

    bearing = _read_bearing(t.table("bearing"))

    et = t.table("envelope")
    ed = EnvelopeSettings()
    band = et.raw("band_hz", "auto")
    if band == "auto":
        band = None
    elif (isinstance(band, list) and len(band) == 2
          and all(isinstance(b, (int, float)) and not isinstance(b, bool) for b in band)
          and 0 < band[0] < band[1]):
        band = (float(band[0]), float(band[1]))
    else:
        et._bad("band_hz", band, "\"auto\" or [low_hz, high_hz] with 0 < low_hz < high_hz")
        band = None
    envelope = EnvelopeSettings(
        band_hz=band,
        harmonics=et.int("harmonics", ed.harmonics, 1, 20),
        tolerance=et.num("tolerance", ed.tolerance, 0.0, 0.1, lo_open=True),
        resolution_hz=et.num("resolution_hz", ed.resolution_hz, 0.0, 50.0),
    )
    et.finish()

    lt = t.table("limits")
    limits = LimitSettings(**{k: lt.num(k, None, 0.0, lo_open=True)
                              for k in LimitSettings.__dataclass_fields__})
    for lo_key, hi_key in (("velocity_watch_mm_s", "velocity_act_mm_s"),
                           ("accel_rms_watch_m_s2", "accel_rms_act_m_s2")):
        lo, hi = getattr(limits, lo_key), getattr(limits, hi_key)
        if lo is not None and hi is not None and hi <= lo:
            lt._bad(hi_key, hi, f"greater than {lt._key(lo_key)} = {lo:g}")
    lt.finish()

    fault = t.str("fault", None, FAULTS) if t.has("fault") else None
    modulation = t.str("modulation", None, MODULATIONS) if t.has("modulation") else None
    t.finish()
    if len(t.problems) > problems_before or bearing is None:
        return PointSettings(name=name, channel=channel, sensitivity_mv_per_m_s2=1.0,
                             full_scale_v=1.0, machine=machine,
                             bearing=bearing or BearingSettings(DefectOrders(1, 1, 1, 1)),
                             envelope=envelope, limits=limits)
    return PointSettings(name=name, channel=channel, sensitivity_mv_per_m_s2=sens,
                         full_scale_v=full_scale_v, machine=machine, bearing=bearing,
                         envelope=envelope, limits=limits, fault=fault, modulation=modulation)


# A common 62xx-size deep-groove ball bearing of a small end-suction pump (demo default).
_DEFAULT_GEOMETRY = {"balls": 8, "ball_diameter_mm": 7.94, "pitch_diameter_mm": 38.5,
                     "contact_angle_deg": 0.0}


def _read_bearing(t):
    geometry_keys = ("balls", "ball_diameter_mm", "pitch_diameter_mm", "contact_angle_deg")
    order_keys = ("bpfo", "bpfi", "bsf", "ftf")
    designation = t.str("designation", "")
    has_geometry = any(t.has(k) for k in geometry_keys)
    has_orders = any(t.has(k) for k in order_keys)
    if has_geometry and has_orders:
        t.problems.append(f"{t.path}: give the geometry ({', '.join(geometry_keys[:3])}) or the "
                          f"four orders ({', '.join(order_keys)}), not both")
        for k in geometry_keys + order_keys:
            t.raw(k)
        t.finish()
        return None
    if has_orders:
        values = {k: t.num(k, None, 0.0, 100.0, lo_open=True) for k in order_keys}
        missing = [k for k in order_keys if values[k] is None]
        for k in missing:
            t._bad(k, None, "given: the four orders bpfo, bpfi, bsf (ball spin, not 2xBSF) "
                            "and ftf go together")
        t.finish()
        if missing or any(v is None for v in values.values()):
            return None
        return BearingSettings(orders=DefectOrders(**values), designation=designation)
    g = dict(_DEFAULT_GEOMETRY)
    g["balls"] = t.int("balls", g["balls"], 3, 200)
    g["ball_diameter_mm"] = t.num("ball_diameter_mm", g["ball_diameter_mm"], 0.0, lo_open=True)
    g["pitch_diameter_mm"] = t.num("pitch_diameter_mm", g["pitch_diameter_mm"], 0.0, lo_open=True)
    g["contact_angle_deg"] = t.num("contact_angle_deg", g["contact_angle_deg"], 0.0, 89.0)
    t.finish()
    try:
        orders = defect_orders(**g)
    except ValueError as exc:
        t.problems.append(f"{t.path}: {exc}")
        return None
    return BearingSettings(orders=orders, designation=designation, **g)
