"""The ``ballpass`` command (also ``python -m agent``).

Subcommands
-----------
run        the monitoring daemon (systemd service)
selftest   one-off commissioning checklist
analyze    analyse a WAV recording through the same pipeline
simulate   write a simulated recording of a point's machine
bearing    defect frequencies of a bearing geometry
record     capture the configured source into a WAV in m/s²
devices    list sound-card inputs
calibrate  check a point's sensitivity against a reference shaker
baseline   forget learnt baselines

Exit codes: 0 success, 1 a check failed or the source/broker failed,
2 bad usage or configuration (every problem listed at once).  User mistakes
never print a traceback.
"""

from __future__ import annotations

import argparse
import json
import os
import sys

from agent import __version__
from agent.allocator import keep_freed_memory
from agent.errors import BallpassError, ConfigError, UsageError

__all__ = ["main", "build_parser"]

EXIT_OK, EXIT_FAILED, EXIT_USAGE = 0, 1, 2


def _positive_float(text):
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not v > 0:
        raise argparse.ArgumentTypeError(f"{text!r} must be positive")
    return v


def _positive_int(text):
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if v <= 0:
        raise argparse.ArgumentTypeError(f"{text!r} must be positive")
    return v


def build_parser():
    """The argument parser of every subcommand."""
    p = argparse.ArgumentParser(
        prog="ballpass",
        description="Vibration monitor for pumps and fans: levels, ISO zones, envelope "
                    "spectrum and bearing defect frequencies, delivered over MQTT.")
    p.add_argument("--version", action="version", version=f"ballpass {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    def with_config(sp, required=False):
        sp.add_argument("--config", metavar="FILE", required=required,
                        help="configuration file (TOML); built-in demo defaults when omitted"
                        if not required else "configuration file (TOML)")

    sp = sub.add_parser("run", help="run the monitoring daemon")
    with_config(sp)
    sp.add_argument("--max-captures", type=_positive_int, metavar="N",
                    help="stop after N capture cycles (tests, demos)")

    sp = sub.add_parser("selftest", help="commissioning checklist (PASS/WARN/FAIL)")
    with_config(sp)
    sp.add_argument("--json", action="store_true", help="print the checklist as JSON")

    sp = sub.add_parser("analyze", help="analyse a WAV recording")
    sp.add_argument("recording", metavar="RECORDING.wav")
    with_config(sp)
    sp.add_argument("--point", metavar="NAME", help="point whose machine and bearing apply "
                                                     "(default: the first)")
    sp.add_argument("--json", action="store_true", help="print the analysis JSON")

    sp = sub.add_parser("simulate", help="write a simulated recording of a point's machine")
    with_config(sp)
    sp.add_argument("--out", metavar="FILE.wav", required=True)
    sp.add_argument("--point", metavar="NAME")
    sp.add_argument("--fault", default="outer",
                    choices=("none", "outer", "inner", "rolling", "outer+inner"))
    sp.add_argument("--modulation", default="none",
                    choices=("none", "unbalance", "gravity", "both"))
    sp.add_argument("--seconds", type=_positive_float, default=10.0)
    sp.add_argument("--sample-rate", type=_positive_int, default=51200, metavar="HZ")
    sp.add_argument("--impact-m-s2", type=_positive_float, default=None, metavar="A",
                    help="peak of each defect impact in m/s² (default 3)")
    sp.add_argument("--seed", type=int, default=None)

    sp = sub.add_parser("bearing", help="defect frequencies of a bearing")
    sp.add_argument("--balls", type=_positive_int, required=True)
    sp.add_argument("--ball-diameter-mm", type=_positive_float, required=True, metavar="D")
    sp.add_argument("--pitch-diameter-mm", type=_positive_float, required=True, metavar="P")
    sp.add_argument("--contact-angle-deg", type=float, default=0.0, metavar="A")
    sp.add_argument("--shaft-hz", type=_positive_float, default=None, metavar="F")
    sp.add_argument("--json", action="store_true")

    sp = sub.add_parser("record", help="capture the configured source into a WAV (m/s²)")
    with_config(sp)
    sp.add_argument("--seconds", type=_positive_float, required=True)
    sp.add_argument("--out", metavar="FILE.wav", required=True)
    sp.add_argument("--point", metavar="NAME", help="only this point's channel")

    sp = sub.add_parser("devices", help="list sound-card inputs")
    with_config(sp)

    sp = sub.add_parser("calibrate", help="measure a point's sensitivity on a reference shaker")
    with_config(sp, required=True)
    sp.add_argument("--point", metavar="NAME", required=True)
    sp.add_argument("--reference-m-s2", type=_positive_float, default=10.0, metavar="A",
                    help="reference RMS acceleration in m/s² (default 10)")
    sp.add_argument("--reference-hz", type=_positive_float, default=159.2, metavar="F",
                    help="reference frequency in Hz (default 159.2)")
    sp.add_argument("--seconds", type=_positive_float, default=5.0)

    sp = sub.add_parser("baseline", help="manage learnt baselines")
    with_config(sp)
    sp.add_argument("--reset", action="store_true", required=True,
                    help="forget the baseline so that it is learnt again")
    sp.add_argument("--point", metavar="NAME", help="only this point")
    return p


def _load(args):
    from agent.config import load_config
    return load_config(getattr(args, "config", None))


def _cmd_analyze(args):
    from agent.offline import analyze_wav
    from agent.report import analysis_report
    cfg = _load(args)
    analysis, info = analyze_wav(args.recording, cfg, args.point)
    if info.frames_declared is not None:
        rate = info.sample_rate_hz
        print(f"ballpass analyze: note: {args.recording} ends after {info.frames / rate:.1f} s of "
              f"the {info.frames_declared / rate:.1f} s its header announces (a recording cut "
              f"short?); what is there was analysed", file=sys.stderr)
    if args.json:
        print(json.dumps(_jsonable(analysis.to_dict()), indent=2))
    else:
        print(analysis_report(analysis.to_dict(), source=str(args.recording)))
    return EXIT_OK


def _jsonable(obj):
    if isinstance(obj, float):
        return round(obj, 6)
    if isinstance(obj, dict):
        return {k: _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    return obj


def _cmd_simulate(args):
    from agent.offline import machine_model, write_simulation
    cfg = _load(args)
    point = cfg.points[0] if args.point is None else _point(cfg, args.point)
    try:
        model = machine_model(point, args.fault, args.modulation, args.impact_m_s2,
                              resonance_hz=min(3000.0, 0.4 * args.sample_rate))
        frames = write_simulation(args.out, model, args.sample_rate, args.seconds, args.seed)
    except ValueError as exc:
        raise UsageError(str(exc)) from None
    except OSError as exc:
        raise UsageError(f"{args.out}: cannot be written ({exc.strerror})") from None
    print(f"wrote {args.out}: {frames / args.sample_rate:g} s at {args.sample_rate} Hz, float32 "
          f"m/s², point {point.name}, shaft {point.machine.shaft_hz:g} Hz, fault {args.fault}, "
          f"modulation {args.modulation}")
    return EXIT_OK


def _point(cfg, name):
    try:
        return cfg.point(name)
    except ValueError as exc:
        raise UsageError(str(exc)) from None


def _cmd_bearing(args):
    from agent.dsp.bearing import defect_orders
    from agent.report import bearing_report
    geometry = {"balls": args.balls, "ball_diameter_mm": args.ball_diameter_mm,
                "pitch_diameter_mm": args.pitch_diameter_mm,
                "contact_angle_deg": args.contact_angle_deg}
    try:
        orders = defect_orders(**geometry)
    except ValueError as exc:
        raise UsageError(str(exc)) from None
    if args.json:
        out = {"geometry": geometry,
               "orders": {"bpfo": orders.bpfo, "bpfi": orders.bpfi, "bsf": orders.bsf,
                          "bsf2": 2 * orders.bsf, "ftf": orders.ftf}}
        if args.shaft_hz:
            out["shaft_hz"] = args.shaft_hz
            out["hz"] = {k: v * args.shaft_hz for k, v in out["orders"].items()}
        print(json.dumps(_jsonable(out), indent=2))
    else:
        print(bearing_report(geometry, orders, args.shaft_hz))
    return EXIT_OK


def _cmd_record(args):
    from agent.recording import record
    cfg = _load(args)
    if args.point is not None:
        _point(cfg, args.point)
    s = record(cfg, args.seconds, args.out, args.point)
    print(f"wrote {s['path']}: {s['seconds']:g} s at {s['sample_rate_hz']} Hz, float32 m/s², "
          f"one channel per point ({', '.join(s['points'])}); {s['overflows']} overrun(s)")
    return EXIT_OK


def _cmd_devices(args):
    from agent.sources import devices_report
    cfg = _load(args) if args.config else None
    print(devices_report(cfg))
    return EXIT_OK


def _cmd_calibrate(args):
    from agent.calibration import calibrate
    cfg = _load(args)
    _point(cfg, args.point)
    try:
        result = calibrate(cfg, args.point, args.reference_m_s2, args.reference_hz, args.seconds)
    except ValueError as exc:
        raise UsageError(str(exc)) from None
    print(result.get("text") or json.dumps(_jsonable(result), indent=2))
    if result.get("saved"):
        print(f"correction written to {result.get('path')} (the configuration file is unchanged)")
    return EXIT_FAILED if result.get("verdict") == "unreliable" else EXIT_OK


def _cmd_baseline(args):
    from agent.baseline import reset_baselines
    cfg = _load(args)
    if args.point is not None:
        _point(cfg, args.point)
    done = reset_baselines(cfg.agent.state_dir, args.point)
    if done:
        for name in done:
            print(f"baseline of point {name} reset: it is learnt again from the next "
                  f"{cfg.alerts.baseline_captures} good captures")
    else:
        print("no learnt baseline to reset")
    return EXIT_OK


def _cmd_run(args):
    from agent.daemon import run
    cfg = _load(args)
    return run(cfg, max_captures=args.max_captures)


def _cmd_selftest(args):
    from agent.selftest import selftest
    cfg = _load(args)
    return selftest(cfg, as_json=args.json)


_COMMANDS = {
    "run": _cmd_run, "selftest": _cmd_selftest, "analyze": _cmd_analyze,
    "simulate": _cmd_simulate, "bearing": _cmd_bearing, "record": _cmd_record,
    "devices": _cmd_devices, "calibrate": _cmd_calibrate, "baseline": _cmd_baseline,
}


#: Thread-pool sizes of the BLAS libraries numpy may be built with.
BLAS_THREAD_VARIABLES = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")


def single_threaded_blas():
    """Ask numpy's BLAS for one thread, unless the environment says otherwise.

    The analysis is sequential and its dot products are short (one
    half-segment): with a BLAS thread pool each one pays a hand-over between
    cores (a 32 768-point dot product right after a write took 50 us with two
    threads and 11 us with one, ``tools/bench`` machine).  Effective only
    before numpy is first imported, which is why it runs first in
    :func:`main`; a value already set is kept.
    """
    for name in BLAS_THREAD_VARIABLES:
        os.environ.setdefault(name, "1")


def main(argv=None):
    """Entry point; returns the exit code."""
    single_threaded_blas()
    keep_freed_memory()
    args = build_parser().parse_args(argv)
    try:
        return _COMMANDS[args.command](args)
    except ConfigError as exc:
        print(f"ballpass: the configuration has {len(exc.problems)} problem(s):", file=sys.stderr)
        for p in exc.problems:
            print(f"  - {p}", file=sys.stderr)
        return EXIT_USAGE
    except UsageError as exc:
        print(f"ballpass {args.command}: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except BallpassError as exc:
        print(f"ballpass {args.command}: {exc}", file=sys.stderr)
        return EXIT_FAILED
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        # the reader (e.g. `| head`) went away: not an error of ours
        sys.stderr.close()
        return EXIT_OK
