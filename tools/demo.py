"""Demo launcher behind tools/demo: local broker, agent on built-in defaults, dashboard."""

import argparse
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from agent.config import default_config_path  # noqa: E402


def free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def mosquitto_binary():
    for cand in (shutil.which("mosquitto"), "/usr/sbin/mosquitto"):
        if cand and os.path.exists(cand):
            return cand
    sys.exit("demo: mosquitto is not installed (tools/setup installs it)")


def main():
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--seconds", type=float, default=None, help="stop after this long")
    ap.add_argument("--no-dashboard", action="store_true")
    args = ap.parse_args()

    work = ROOT / ".demo"
    work.mkdir(exist_ok=True)
    shutil.rmtree(work / "state", ignore_errors=True)  # every demo tells the story from the start
    port = free_port()
    conf = work / "mosquitto.conf"
    conf.write_text(f"listener {port} 127.0.0.1\nallow_anonymous true\n"
                    f"log_dest file {work / 'mosquitto.log'}\n"
                    + ("user root\n" if os.geteuid() == 0 else ""))
    cfg_text = default_config_path().read_text()
    cfg_text = cfg_text.replace("port = 1883", f"port = {port}")
    cfg_text = cfg_text.replace('name = "pumphouse-a"',
                                f'name = "pumphouse-a"\nstate_dir = "{work / "state"}"')
    cfg = work / "demo.toml"
    cfg.write_text(cfg_text)

    procs = []
    broker = subprocess.Popen([mosquitto_binary(), "-c", str(conf)])
    procs.append(broker)
    deadline = time.monotonic() + 5
    while time.monotonic() < deadline:
        try:
            socket.create_connection(("127.0.0.1", port), timeout=0.2).close()
            break
        except OSError:
            time.sleep(0.05)
    print(f"demo: mosquitto on 127.0.0.1:{port}; agent config {cfg}; logs in {work}")
    agent_log = open(work / "agent.log", "w")
    agent = subprocess.Popen([sys.executable, "-m", "agent", "run", "--config", str(cfg)],
                             stdout=agent_log, stderr=subprocess.STDOUT, cwd=ROOT)
    procs.append(agent)
    dash = None
    if not args.no_dashboard:
        dash = subprocess.Popen([sys.executable, str(ROOT / "tools" / "dashboard"), "--config",
                                 str(cfg), "--spectrum", "raw-water-pump-2-de"], cwd=ROOT)
        procs.append(dash)
    try:
        start = time.monotonic()
        while args.seconds is None or time.monotonic() - start < args.seconds:
            if agent.poll() is not None:
                print(f"demo: the agent stopped (exit {agent.returncode}); see {work / 'agent.log'}")
                break
            time.sleep(0.5)
    except KeyboardInterrupt:
        pass
    finally:
        for p in reversed(procs):  # dashboard, agent (publishes offline), then the broker
            if p.poll() is None:
                p.send_signal(signal.SIGTERM if p is not broker else signal.SIGINT)
            try:
                p.wait(timeout=10)
            except subprocess.TimeoutExpired:
                p.kill()
        agent_log.close()
    print(f"demo: stopped. The agent's log: {work / 'agent.log'}")


if __name__ == "__main__":
    main()
