"""``turnstamp bench --crash-cycles N``: ``kill -9`` at random and chosen moments.

The service runs as its own process; this process is the event builder, sending
at full rate on a thread (messages are queued in ZeroMQ at every kill). Each cycle
kills the service at one of: a random moment, while a checkpoint is being written
(its temporary file exists), just after a file rotation, during start-up, or twice
in quick succession. After each restart the sender resends what the service reports
missing on its control socket (``missing_reported``: the README's recipe), checked
against the ledger in the files (``missing_after_restart``); at the end it resends
until nothing is missing.

Checked at the end: every event id exactly once in the archive; the counters of
the final status equal what the files hold; every file that was ever seen closed
is still readable and unchanged (SHA-256 taken when first seen closed); every
closed file opens with pyarrow (and pandas, polars, duckdb where installed).
"""

from __future__ import annotations

import hashlib
import json
import os
import random
import signal
import subprocess
import sys
import tempfile
import threading
import time
from collections import deque
from pathlib import Path

import numpy as np
import zmq

from ..core.timebase import NS_PER_S, parse_instant, unix_to_ns
from ..files.reader import END_OF_STREAM, read_stream, stream_files
from ..files.schemas import OUTPUTS
from ..wire.encode import encode_message
from .crashcheck import check_folder
from .service import bench_config

__all__ = ["bench_crash", "missing_after_restart", "missing_reported"]

BATCH = 2_000
SOURCE = "crash-bench"
NIGHT_UTC = "2026-12-02T03:00:00"
MODES = ("random", "checkpoint", "rotation", "startup", "twice")


def missing_after_restart(out: Path, source: str, sent: int, below_highest: bool = True
                          ) -> list[int]:
    """Sequences of ``source`` sent (0 .. sent-1) that no ledger row accepted.

    ``below_highest``: only those below the highest accepted (gaps; later ones may
    still be queued on their way). What the resend protocol of the status and the
    control socket reports, read here from the files themselves.
    """
    ledger = read_stream(out, "ledger")
    accepted = set()
    if ledger.num_rows:
        keep = np.array([o == "accepted" for o in ledger["outcome"].to_pylist()])
        sources = np.array(ledger["source"].to_pylist(), dtype=object)
        sequences = ledger["sequence"].to_numpy(zero_copy_only=False)
        accepted = {int(s) for s in sequences[keep & (sources == source)]}
    limit = (max(accepted) if accepted else -1) if below_highest else sent - 1
    return [s for s in range(min(sent - 1, limit) + 1) if s not in accepted]


def missing_reported(control: str, source: str, sent: int, below_highest: bool = True
                     ) -> list[int]:
    """The same, from the service's own report (``wire.publisher.ask_sources``): its
    missing ranges, and with ``below_highest=False`` everything sent above its
    highest committed number."""
    from ..wire.publisher import ask_sources

    report = ask_sources(control, timeout_ms=30_000).get(source)
    if report is None:
        return [] if below_highest else list(range(sent))
    wanted = [n for first, last in report["missing_ranges"] for n in range(first, last + 1)]
    if not below_highest:
        wanted += range(report["highest_sequence"] + 1, sent)
    return wanted


class _Sender:
    """Sends message after message at full rate; resends take precedence."""

    def __init__(self, endpoint: str):
        self.context = zmq.Context()
        self.push = self.context.socket(zmq.PUSH)
        self.push.setsockopt(zmq.SNDHWM, 200)
        self.push.setsockopt(zmq.SNDTIMEO, 100)
        self.push.setsockopt(zmq.LINGER, 0)
        self.push.connect(endpoint)
        self.sent = 0  # new messages handed to ZeroMQ: sequences 0 .. sent-1
        self.resent = 0
        self.resends: deque[int] = deque()
        self.paused = threading.Event()
        self.stopped = threading.Event()
        start = parse_instant(NIGHT_UTC)
        rng = np.random.default_rng(3)
        self.times = np.sort(start + rng.integers(0, NS_PER_S, BATCH))
        self.energy = rng.uniform(1e8, 1e10, BATCH)
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.thread.start()

    def frames(self, sequence: int) -> list[bytes]:
        ids = np.arange(sequence * BATCH, (sequence + 1) * BATCH, dtype=np.uint64)
        times = self.times + sequence * (NS_PER_S // 100)
        return encode_message(SOURCE, sequence, "UTC",
                              {"event_id": ids, "time_ns": times, "energy_kev": self.energy})

    def _run(self) -> None:
        pending = None
        while not self.stopped.is_set():
            if pending is None:
                if self.resends:
                    pending = ("resend", self.resends.popleft())
                elif self.paused.is_set():
                    time.sleep(0.01)
                    continue
                else:
                    pending = ("new", self.sent)
                frames = self.frames(pending[1])
            try:
                self.push.send_multipart(frames, copy=False)
            except zmq.Again:
                continue  # the service is down: try the same message again
            if pending[0] == "new":
                self.sent += 1
            else:
                self.resent += 1
            pending = None

    def close(self) -> None:
        self.stopped.set()
        self.thread.join(timeout=30)
        self.push.close(linger=0)
        self.context.term()


def _config(directory: Path, intake: int, control: int) -> Path:
    """Frequent checkpoints and rotations: a kill lands in every phase of the work."""
    return bench_config(directory, "crash", intake=intake, control=control,
                        recipes='[[targets.recipes]]\nname = "all"\n',
                        output="checkpoint_every_s = 0.5\nrotate_minutes = 0.05\n"
                               "rotate_megabytes = 32.0\n")


class _Folder:
    """The output folder: closed files' hashes, first seen, checked ever after."""

    def __init__(self, out: Path):
        self.out = out
        self.closed: dict[str, str] = {}
        self.changed: list[str] = []

    def survey(self) -> None:
        for stem in OUTPUTS:
            for path in stream_files(self.out, stem):
                try:
                    data = path.read_bytes()
                except FileNotFoundError:
                    continue
                digest = hashlib.sha256(data).hexdigest()
                if path.name in self.closed:
                    if self.closed[path.name] != digest:
                        self.changed.append(path.name)
                elif data.endswith(END_OF_STREAM):
                    self.closed[path.name] = digest


def _wait_for(predicate, timeout: float) -> bool:
    deadline = time.time() + timeout
    while time.time() < deadline:
        if predicate():
            return True
        time.sleep(0.005)
    return False


def _start(config: Path, out: Path) -> subprocess.Popen:
    log = open(out.parent / "service.log", "ab")  # noqa: SIM115 - the child keeps it
    return subprocess.Popen([sys.executable, "-m", "turnstamp", "run", str(config)],
                            stdout=subprocess.DEVNULL, stderr=log)


def _running(out: Path, since: float) -> bool:
    try:
        status = json.loads((out / "status.json").read_text())
    except (OSError, ValueError):
        return False
    return status.get("state") == "running" and status["computed_at_utc_ns"] >= unix_to_ns(since)


def _kill(process: subprocess.Popen) -> None:
    process.send_signal(signal.SIGKILL)
    process.wait(timeout=60)


def _kill_moment(mode: str, out: Path, rng: random.Random) -> None:
    """Wait for the moment ``mode`` aims at (bounded)."""
    if mode == "checkpoint":
        _wait_for(lambda: any(n.startswith(".checkpoint") for n in os.listdir(out)), 5.0)
    elif mode == "rotation":
        count = len(stream_files(out, "archive"))
        _wait_for(lambda: len(stream_files(out, "archive")) > count, 8.0)
    else:
        time.sleep(rng.uniform(0.2, 2.0))


def _cycle(mode: str, config: Path, out: Path, rng: random.Random) -> subprocess.Popen:
    """One kill of the running service and the restart(s); returns the new process."""
    process = _start(config, out)
    try:
        if mode == "startup":
            time.sleep(rng.uniform(0.3, 1.5))  # set-up, recovery or the first messages
            _kill(process)
            process = _start(config, out)
        _started(process, out)
        if mode == "twice":
            time.sleep(rng.uniform(0.05, 0.5))
            _kill(process)
            process = _start(config, out)
            _started(process, out)
    except BaseException:
        if process.poll() is None:
            _kill(process)
        raise
    return process


def _started(process: subprocess.Popen, out: Path) -> None:
    since = time.time() - 0.01
    if not _wait_for(lambda: _running(out, since) or process.poll() is not None, 120) \
            or process.poll() is not None:
        log = (out.parent / "service.log").read_text()[-3000:]
        raise RuntimeError(f"the service did not start after a kill:\n{log}")


def bench_crash(cycles: int = 20, seed: int = 9) -> dict:
    """Run ``cycles`` kill-and-restart cycles under a full-rate sender; check the folder."""
    rng = random.Random(seed)
    with tempfile.TemporaryDirectory(prefix="turnstamp-crash-", ignore_cleanup_errors=True) as tmp:
        intake, control = _free_port(), _free_port()
        config, out = _config(Path(tmp), intake, control), Path(tmp) / "out"
        control = f"tcp://127.0.0.1:{control}"
        sender = _Sender(f"tcp://127.0.0.1:{intake}")
        folder = _Folder(out)
        modes, resends, disagree = [], 0, 0
        began = time.time()
        process = _start(config, out)
        try:
            _wait_for(lambda: _running(out, began), 120)
            _wait_for(lambda: len(missing_after_restart(out, SOURCE, 1, False)) == 0, 30)
            for cycle in range(cycles):
                mode = MODES[cycle % len(MODES)] if cycle < len(MODES) else rng.choice(MODES)
                modes.append(mode)
                _kill_moment(mode, out, rng)
                _kill(process)
                folder.survey()
                process = _cycle(mode, config, out, rng)
                time.sleep(0.5)  # what was queued at the sender flows in first
                queued = set(sender.resends)
                missing = [m for m in missing_reported(control, SOURCE, sender.sent)
                           if m not in queued]
                disagree += missing != [m for m in missing_after_restart(out, SOURCE,
                                                                          sender.sent)
                                        if m not in queued]
                sender.resends.extend(missing)
                resends += len(missing)
            sender.paused.set()
            resends += _resend_all(sender, out, control)
            _stop(process)
            process = None
            folder.survey()
        finally:
            if process is not None and process.poll() is None:
                _kill(process)
            sender.close()
        result = check_folder(out, folder.closed, folder.changed, sender.sent * BATCH)
        result.update({"crash_cycles": cycles, "crash_modes": modes,
                       "crash_messages_sent": sender.sent, "crash_events_sent": sender.sent * BATCH,
                       "crash_messages_resent": resends, "crash_seconds": time.time() - began,
                       "crash_reports_unlike_the_files": disagree})
    return result


def _resend_all(sender: _Sender, out: Path, control: str) -> int:
    """Resend until the ledger accepts every message sent; returns how many resent.
    Each round waits until the ledger stops growing (the queues have drained)."""
    resent = 0
    deadline = time.time() + 600
    while time.time() < deadline:
        rows, quiet_since = -1, time.time()
        while time.time() - quiet_since < 2.0 or sender.resends:
            time.sleep(0.25)
            now = len(read_stream(out, "ledger"))
            if now != rows:
                rows, quiet_since = now, time.time()
        missing = missing_reported(control, SOURCE, sender.sent, below_highest=False)
        if not missing and not missing_after_restart(out, SOURCE, sender.sent, False):
            return resent
        sender.resends.extend(missing)
        resent += len(missing)
    raise RuntimeError("messages still missing after 600 s of resending")


def _stop(process: subprocess.Popen) -> None:
    process.send_signal(signal.SIGTERM)
    process.wait(timeout=120)


def _free_port() -> int:
    context = zmq.Context()
    with context.socket(zmq.PULL) as sock:
        port = sock.bind_to_random_port("tcp://127.0.0.1")
    context.term()
    return port


def crash_passed(result: dict) -> bool:
    """Every event exactly once, counters equal the files, no closed file changed."""
    return (result["crash_events_archived_twice"] == 0 and result["crash_events_lost"] == 0
            and result["crash_counters_equal_files"]
            and not result["crash_closed_files_changed"])


def crash_lines(result: dict) -> list[str]:
    """The benchmark's figures as text."""
    ok = crash_passed(result)
    return [
        f"crash cycles: {result['crash_cycles']} ({', '.join(result['crash_modes'])})",
        f"  messages sent {result['crash_messages_sent']:,} "
        f"({result['crash_events_sent']:,} events), resent {result['crash_messages_resent']:,}"
        f" (refused as duplicates: {result['crash_duplicate_messages_refused']:,}); reports "
        f"of missing messages unlike the files: {result['crash_reports_unlike_the_files']}",
        f"  archived twice {result['crash_events_archived_twice']}, lost "
        f"{result['crash_events_lost']}, counters equal the files: "
        f"{result['crash_counters_equal_files']}",
        f"  closed files {result['crash_closed_files']}, changed since closed: "
        f"{len(result['crash_closed_files_changed'])}; opened by {result['crash_readers']}",
        f"  {result['crash_seconds']:.0f} s; verdict: {'PASS' if ok else 'FAIL'}",
    ]
