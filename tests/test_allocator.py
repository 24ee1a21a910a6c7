"""Freed memory stays in the process once the ballpass command has started.

Each check runs in a fresh interpreter (a real subprocess): the allocator's
settings are process-wide and its thresholds move as a process allocates, so
only a new process shows the defaults.  RSS is read from ``/proc/self/statm``
(proc(5): the second field, resident pages).
"""

from __future__ import annotations

import json
import platform
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent

pytestmark = pytest.mark.skipif(
    platform.system() != "Linux" or platform.libc_ver()[0] != "glibc",
    reason="the thresholds are glibc's (mallopt(3))")

# A block well above glibc's initial mmap threshold of 128 KiB and below the
# 16 MiB that ballpass sets: mallopt(3), M_MMAP_THRESHOLD (Linux man-pages).
PROBE = r"""
import json, os, sys
sys.path.insert(0, {repo!r})
page = os.sysconf("SC_PAGE_SIZE")

def rss():
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * page

{setup}
size = 8 << 20
before = rss()
block = bytearray(size)          # zero-filled by the allocator: every page touched
for i in range(0, size, page):
    block[i] = 1
held = rss()
del block
after = rss()
print(json.dumps({{"result": result, "grew": held - before, "kept": after - before}}))
"""


def _probe(setup):
    code = PROBE.format(repo=str(REPO), setup=setup)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=60, check=True).stdout
    return json.loads(out)


def test_defaults_give_a_large_freed_block_back_to_the_system():
    # the baseline the setting changes: above the mmap threshold, free() unmaps
    # (mallopt(3), M_MMAP_THRESHOLD; glibc default 128 KiB)
    r = _probe("result = None")
    assert r["grew"] >= 7 << 20
    assert r["kept"] < 1 << 20


def test_keep_freed_memory_keeps_a_freed_block_resident():
    r = _probe("from agent.allocator import keep_freed_memory\nresult = keep_freed_memory()")
    assert r["result"] in (16 << 20, 512 << 10)
    if r["result"] == 16 << 20:  # 64-bit glibc: an 8 MiB block now comes from the heap and stays
        assert r["kept"] >= 7 << 20


def test_the_ballpass_command_sets_it_before_any_work():
    # a real command through agent.cli.main; afterwards freed blocks stay resident
    setup = ("from agent.cli import main\n"
             "import contextlib, io\n"
             "with contextlib.redirect_stdout(io.StringIO()):\n"
             "    code = main(['bearing', '--balls', '9', '--ball-diameter-mm', '7.94',\n"
             "                 '--pitch-diameter-mm', '39.04'])\n"
             "from agent.allocator import keep_freed_memory\n"
             "result = [code, keep_freed_memory()]")
    r = _probe(setup)
    code, threshold = r["result"]
    assert code == 0 and threshold in (16 << 20, 512 << 10)
    if threshold == 16 << 20:
        assert r["kept"] >= 7 << 20


def test_a_second_call_returns_the_first_result():
    r = _probe("from agent.allocator import keep_freed_memory\n"
               "result = [keep_freed_memory(), keep_freed_memory()]")
    assert r["result"][0] == r["result"][1]
