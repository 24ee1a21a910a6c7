"""Fixed memory: the pipeline's footprint depends on neither capture length nor run time.

Memory is measured with :mod:`tracemalloc` (numpy reports its array buffers
to it), never with timing.  The signal comes from
:class:`agent.simulate.BearingSimulator`, generated block by block into one
preallocated buffer, so a 600 s capture streams through without ever being
held in memory.

Slack allowed (stated, fixed):

- ``PEAK_SLACK_BYTES`` (4 KiB): how much more the traced peak of a long
  capture may reach than that of a short one (Python's own bookkeeping of
  small objects, not arrays: one float64 segment is 128 KiB here);
- ``TRANSIENT_LIMIT_BYTES`` (28 KiB): everything a capture allocates above
  what exists before it (the result's envelope spectrum, 11 KiB for the
  default plan, is most of it), so no segment- or signal-sized temporary is
  created while streaming or finishing, and no numpy casting buffer either
  (8192 items: 32 KiB in float32, 64 KiB in float64, taken by any ufunc
  that mixes precisions);
- ``SOAK_SLACK_BYTES`` (16 KiB): how much the traced memory may sit above its
  level after warm-up once thousands of captures have run; a leak of a single
  small object per capture (56 bytes or more) over 800 captures exceeds it.
"""

import os
import tracemalloc

import numpy as np
import pytest

from agent.config import parse_config
from agent.pipeline import Pipeline
from agent.simulate import BearingSimulator, MachineModel, simulate

FS_HZ = 51200
BLOCK = 8192
PEAK_SLACK_BYTES = 4 * 1024
TRANSIENT_LIMIT_BYTES = 28 * 1024
SOAK_SLACK_BYTES = 16 * 1024


def make_point():
    table = {"name": "raw-water-pump-2-de", "machine": {"shaft_hz": 24.75},
             "bearing": {"balls": 8, "ball_diameter_mm": 7.94, "pitch_diameter_mm": 38.5}}
    return parse_config({"point": [table]}).points[0]


def machine(point):
    return MachineModel(shaft_hz=24.75, orders=point.bearing.orders, faults={"outer"},
                        modulation="unbalance")


@pytest.fixture
def traced():
    tracemalloc.start()
    try:
        yield
    finally:
        tracemalloc.stop()


def capture_footprint(pipeline, simulator, buf, seconds):
    """(peak above start, retained above start) in bytes of one streamed capture."""
    blocks = int(round(seconds * FS_HZ)) // buf.shape[0]
    before = tracemalloc.get_traced_memory()[0]
    tracemalloc.reset_peak()
    pipeline.start()
    for _ in range(blocks):
        simulator.fill(buf)
        pipeline.feed(buf)
    analysis = pipeline.finish()
    current, peak = tracemalloc.get_traced_memory()
    assert analysis.quality == ()
    assert analysis.capture_s == pytest.approx(blocks * buf.shape[0] / FS_HZ)
    assert analysis.findings, "the simulated outer-race defect should be found"
    del analysis
    return peak - before, tracemalloc.get_traced_memory()[0] - before


def _footprints(plan_capture_s, lengths_s):
    point = make_point()
    pipeline = Pipeline(point, FS_HZ, plan_capture_s)
    simulator = BearingSimulator(machine(point), FS_HZ, seed=1)
    buf = np.empty(BLOCK)
    capture_footprint(pipeline, simulator, buf, lengths_s[0])      # warm-up (FFT set-up)
    return {s: capture_footprint(pipeline, simulator, buf, s) for s in lengths_s}


def _check_no_growth(results):
    first_peak = next(iter(results.values()))[0]
    for seconds, (peak, retained) in results.items():
        assert peak <= first_peak + PEAK_SLACK_BYTES, (seconds, results)
        assert retained < PEAK_SLACK_BYTES, (seconds, results)


def test_peak_does_not_grow_with_capture_length(traced):
    # common practice (fixed-memory streaming): 1 s, 60 s and 600 s of signal at
    # 51.2 kHz (30.7 million samples) through the same pipeline, block by block
    results = _footprints(1.0, (1.0, 60.0, 600.0))
    _check_no_growth(results)
    assert max(peak for peak, _ in results.values()) < TRANSIENT_LIMIT_BYTES, results


def test_peak_does_not_grow_with_capture_length_default_plan(traced):
    # the default 10 s plan (65536-sample segments): 10 s against 120 s
    _check_no_growth(_footprints(10.0, (10.0, 120.0)))


def test_default_plan_allocates_no_segment_sized_temporary(traced):
    # the project's fixed-memory rule: per-capture work writes into arrays
    # allocated at construction
    results = _footprints(10.0, (10.0,))
    assert max(peak for peak, _ in results.values()) < TRANSIENT_LIMIT_BYTES, results


def _soak(captures):
    point = make_point()
    pipeline = Pipeline(point, FS_HZ, 0.5)
    signal = simulate(machine(point), FS_HZ, 1.0, seed=2)          # allocated once
    lengths = np.random.default_rng(0).integers(int(0.2 * FS_HZ), FS_HZ + 1, captures)
    warm_up = 50
    for n in lengths[:warm_up]:
        pipeline.analyze(signal[:n])
    settled = tracemalloc.get_traced_memory()[0]
    snapshot = tracemalloc.take_snapshot()
    worst = 0
    for n in lengths[warm_up:]:
        analysis = pipeline.analyze(signal[:n])
        assert not analysis.quality
        del analysis
        worst = max(worst, tracemalloc.get_traced_memory()[0] - settled)
    grown = tracemalloc.get_traced_memory()[0] - settled
    if grown > SOAK_SLACK_BYTES or worst > SOAK_SLACK_BYTES:
        top = tracemalloc.take_snapshot().compare_to(snapshot, "lineno")[:5]
        pytest.fail(f"traced memory grew by {grown} B (worst {worst} B) over "
                    f"{captures - warm_up} captures; largest growth: "
                    + "; ".join(str(s) for s in top))


def test_thousands_of_short_captures_do_not_grow(traced):
    # common practice (a daemon runs for months): 800 captures of 0.2-1 s
    _soak(800)


@pytest.mark.slow
def test_soak_many_short_captures(traced):
    # the longer soak: 3000 captures (or BALLPASS_SOAK_CYCLES)
    _soak(max(3000, int(os.environ.get("BALLPASS_SOAK_CYCLES", "0"))))
