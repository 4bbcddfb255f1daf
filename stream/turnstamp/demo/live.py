"""The simulator and the service together on loopback, live (``turnstamp demo``).

Writes a configuration for the invented scenario into the output folder (so it
can be read and reused with ``turnstamp run``), starts the service as a separate
process, publishes a simulated night at real-time pace, shows a status line
every second, then stops the service (SIGINT: it flushes and closes every file)
and prints the summary: significance reached, a text profile, the clock-chain
verdict with its numbers, and where the files are.
"""

from __future__ import annotations

import json
import signal
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path

from . import data_file, lantern_toml, site_toml

__all__ = ["run_demo", "demo_config", "HARD_RECIPES"]

HARD_RECIPES = """
  [[targets.recipes]]
  name = "all"

  [[targets.recipes]]
  name = "hard"
  energy_min = "1 TeV"
  max_distance_deg = 0.3
  min_score = 0.5
  use_weights = true
"""


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def demo_config(out: Path, intake_port: int, publish_port: int) -> str:
    """The demo's service configuration (TOML)."""
    return f"""# turnstamp demo: invented site, array and pulsars (see turnstamp/demo/__init__.py)
[intake]
endpoints = ["tcp://127.0.0.1:{intake_port}"]
pattern = "pull"

{site_toml()}
{lantern_toml(recipes=HARD_RECIPES)}
[[targets]]
name = "ember"
models = ["{data_file('ember.toml')}"]
region_radius_deg = 0.5

[statistics]
windows_minutes = [1.0, 5.0]
update_every_s = 1.0

[clock_check]
chunk_seconds = 10.0
every_s = 5.0

[output]
directory = "{out}"
publish_endpoint = "tcp://127.0.0.1:{publish_port}"
checkpoint_every_s = 5.0
"""


def _status_line(status: dict) -> str:
    from ..views.live.fields import sigma_text

    c = status.get("counters", {})
    parts = [f"{status.get('events_per_s', 0):8,.0f} ev/s",
             f"received {c.get('events_received', 0):,}"]
    for target in status.get("targets", []):
        for recipe in target.get("recipes", [])[:1]:
            cumulative = recipe.get("windows", {}).get("cumulative", {})
            sigma = cumulative.get("sigma")
            shown = sigma_text(sigma, 1)
            parts.append(f"{target['name']} {shown}{'σ' if shown[-1].isdigit() else ''}")
        clock = target.get("clock")
        if clock:
            parts.append(f"clock {clock['status']} ({clock['kind']})")
    return " | ".join(parts)


def run_demo(out: Path, seconds: float = 60.0, rate: float = 20_000.0,
             fault: str = "none") -> int:
    """Run the demo for ``seconds`` at ``rate`` events/s (optionally with a clock
    ``fault``), writing into ``out``; returns the exit status (1: the service or the
    simulator failed, or the accounting did not reconcile)."""
    out = Path(out).resolve()
    if out.exists() and any(out.glob("*.arrow*")):
        stamp = time.strftime("%Y%m%dT%H%M%S")
        out = out / stamp  # never mix two runs' files
    out.mkdir(parents=True, exist_ok=True)
    intake, publish = _free_port(), _free_port()
    config = out / "demo.toml"
    config.write_text(demo_config(out, intake, publish))
    print(f"turnstamp demo: {seconds:.0f} s of a simulated night of the invented "
          f"millisecond pulsar Lantern,\nseen by the invented Kestrel array at Corvid Ridge; "
          f"{rate:,.0f} events/s; fault injected: {fault}.")
    print(f"configuration: {config}")
    print(f"watch it live: turnstamp watch --endpoint tcp://127.0.0.1:{publish}   "
          f"(or: turnstamp watch --folder {out})")
    log_lines: list[str] = []
    service = _start_service(config, out / "status.json", log_lines)
    if service is None:
        return 1
    failures: list[BaseException] = []
    sender = threading.Thread(target=_send, args=(f"tcp://127.0.0.1:{intake}", seconds, rate,
                                                  fault, failures), daemon=True)
    sender.start()
    _follow(sender, out / "status.json")
    time.sleep(2.5)  # the last updates of the service (1 s cadence)
    service.send_signal(signal.SIGINT)
    try:
        service.wait(timeout=60)
    except subprocess.TimeoutExpired:
        service.kill()
    if failures:
        print(f"turnstamp demo: the simulator failed: {failures[0]}", file=sys.stderr)
        return 1
    return _summary(out, log_lines)


def _start_service(config: Path, status_file: Path, log_lines: list[str]):
    """``turnstamp run CONFIG`` as a child process, once it has written its status (None,
    after printing its log, when it did not start within a minute)."""
    service = subprocess.Popen([sys.executable, "-m", "turnstamp", "run", str(config)],
                               stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    threading.Thread(target=lambda: log_lines.extend(service.stdout), daemon=True).start()
    deadline = time.time() + 60
    while not status_file.exists():
        if service.poll() is not None or time.time() > deadline:
            print("the service did not start:\n" + "".join(log_lines), file=sys.stderr)
            if service.poll() is None:
                service.kill()
            return None
        time.sleep(0.2)
    return service


def _send(endpoint: str, seconds: float, rate: float, fault: str,
          failures: list[BaseException]) -> None:
    """The simulator's thread: publish the night; an exception is kept for the caller."""
    from .simulator import publish_night

    try:
        publish_night(endpoint, seconds=seconds, rate=rate, pulsed_fraction=0.006,
                      fault=fault, seed=1, source="kestrel-array", report=False)
    except Exception as exc:  # reported by run_demo, which then fails
        failures.append(exc)


def _follow(sender: threading.Thread, status_file: Path) -> None:
    """A status line every second while the simulator sends."""
    interactive = sys.stdout.isatty()
    last = 0.0
    while sender.is_alive():
        time.sleep(0.25)
        if time.time() - last >= 1.0:
            last = time.time()
            try:
                line = _status_line(json.loads(status_file.read_text()))
            except (OSError, json.JSONDecodeError):
                continue
            print(("\r" + line.ljust(110)) if interactive else line, end="" if interactive
                  else "\n", flush=True)
    if interactive:
        print()


def _summary(out: Path, log_lines: list[str]) -> int:
    from ..views.live import render_status

    status = json.loads((out / "status.json").read_text())
    print()
    print(render_status(status, width=100, color=False))
    c = status["counters"]
    balanced = c.get("events_received", 0) == (c.get("events_tagged", 0)
                                               + c.get("events_filtered", 0)
                                               + c.get("events_rejected", 0))
    print(f"\naccounting: received {c.get('events_received', 0):,} = tagged "
          f"{c.get('events_tagged', 0):,} + filtered {c.get('events_filtered', 0):,} + "
          f"rejected {c.get('events_rejected', 0):,}: {'reconciled' if balanced else 'MISMATCH'}")
    print(f"\nfiles in {out}:")
    for stem in ("archive", "significance", "profiles", "clock", "ledger", "rejects"):
        files = sorted(out.glob(f"{stem}-*.arrow*"))
        size = sum(f.stat().st_size for f in files)
        print(f"  {stem:13s} {len(files)} file(s), {size / 1e6:6.1f} MB")
    print("  status.json, checkpoint.arrow, demo.toml")
    print(f"\nnext: turnstamp report {out}    (night report as HTML + PNG)")
    print(f"      turnstamp inspect {out}")
    errors = [line for line in log_lines if "Traceback" in line or "ERROR" in line]
    if errors or not balanced:
        print("".join(log_lines), file=sys.stderr)
        return 1
    return 0
