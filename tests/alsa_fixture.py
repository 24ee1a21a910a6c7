"""Capture devices without sound hardware: ALSA ``file`` PCMs fed from raw files.

A PCM of type ``file`` with ``slave.pcm "null"`` and an ``infile`` delivers the
bytes of that file as captured samples, in whatever format, rate and channel
count the stream opens (alsa-lib PCM plugin documentation, "File plugin").
PortAudio enumerates devices when ``sounddevice`` is imported, so the ALSA
configuration must be in place before that: every check runs in a fresh
Python subprocess with ``ALSA_CONFIG_PATH`` set.

The plugin reads its file much faster than real time and never reports the
end of the file, so readers stop by frame count.
"""

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

ALSA_CONF = "/usr/share/alsa/alsa.conf"


def write_alsa_config(directory, pcms):
    """Write an ALSA config defining capture PCMs ``{name: raw_file}``; return its path."""
    directory = Path(directory)
    blocks = []
    for name, raw in pcms.items():
        blocks.append(textwrap.dedent(f"""\
            pcm.{name} {{
                type file
                slave.pcm "null"
                file "/dev/null"
                infile "{Path(raw)}"
                format "raw"
            }}
            """))
    path = directory / "ballpass-test-alsa.conf"
    path.write_text("\n".join(blocks))
    return path


def run_python(code, alsa_config, timeout_s=60):
    """Run ``code`` in a subprocess that sees only the PCMs of ``alsa_config``.

    The code must print one JSON document as its last line of output; it is
    returned parsed.
    """
    env = dict(os.environ)
    env["ALSA_CONFIG_PATH"] = f"{ALSA_CONF}:{alsa_config}"
    proc = subprocess.run([sys.executable, "-c", textwrap.dedent(code)], env=env,
                          capture_output=True, text=True, timeout=timeout_s,
                          cwd=Path(__file__).resolve().parents[1])
    if proc.returncode != 0:
        raise AssertionError(f"subprocess failed ({proc.returncode}):\n{proc.stdout}\n{proc.stderr}")
    lines = [ln for ln in proc.stdout.splitlines() if ln.strip()]
    return json.loads(lines[-1])


def write_config(path, *, device, sample_format, state_dir, rate=48000, channels=2,
                 points=({"name": "raw-water-pump-2-de", "channel": 0,
                          "sensitivity_mv_per_m_s2": 10.2, "full_scale_v": 1.0},)):
    """A TOML configuration with a sound-card source and the given points."""
    lines = [
        "[agent]", 'site = "larkspur-water-works"', 'name = "pumphouse-a"',
        f'state_dir = "{state_dir}"', "",
        "[source]", 'kind = "soundcard"', f'device = "{device}"',
        f"sample_rate_hz = {rate}", f"channels = {channels}",
        f'sample_format = "{sample_format}"', "latency_s = 0.15", "",
        "[broker]", "enabled = false", "",
    ]
    for p in points:
        lines += ["[[point]]"] + [f"{k} = {json.dumps(v)}" for k, v in p.items()] + [""]
    Path(path).write_text("\n".join(lines))
    return path
