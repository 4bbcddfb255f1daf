"""``turnstamp bench --fuzz N``: hostile messages at a running service (not a test).

The service runs as its own process on loopback. In each round a fresh service
first receives junk (junk-first ordering: nothing good has been written yet), then
hostile messages of every kind mixed with good ones: random bytes and frame
counts, empty frames, headers that are not UTF-8, not JSON, nested too deeply or of
a wrong version, bodies cut short or followed by bytes after the end-of-stream
marker, headers claiming 2^63 - 1 events or sequence numbers, repeats of good
messages, and messages over the size limit. Meanwhile hostile clients hammer the
control socket (any frames, any bytes, huge frames, REQ with extra frames, DEALER
without the delimiter, clients that never read) and a probe asks ``status`` every
quarter second.

Measured per round and in total: crashes (the process ended), stalls (a status
reply slower than 3 s), the slowest status reply, exact accounting (one ledger row
per message sent; events received as the generator predicts from what each message
really holds, never from header claims; received = tagged + filtered + rejected; no
good message missing or refused), and the service's resident memory.
"""

from __future__ import annotations

import json
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
import zmq

from ..core.timebase import parse_instant
from ..files.reader import read_stream
from ..wire.encode import encode_message
from .service import _ports, bench_config

__all__ = ["bench_fuzz", "fuzz_lines"]

GOOD_SOURCE = "fuzz-good"
STALL_S = 3.0
ROUNDS = 4
MAX_BYTES = 64 * 2**20  # the service's default max_message_bytes
_NIGHT = parse_instant("2026-12-02T03:00:00")


def _good(sequence: int, rng: np.random.Generator, source: str = GOOD_SOURCE):
    n = int(rng.integers(1, 20))
    first = (sequence % 2**30) * 20
    columns = {"event_id": np.arange(first, first + n, dtype=np.uint64),
               "time_ns": np.sort(_NIGHT + (sequence % 2**20) * 10**7
                                  + rng.integers(0, 10**7, n)),
               "ra_deg": np.full(n, 123.4567), "dec_deg": np.full(n, 23.4567)}
    return encode_message(source, sequence, "UTC", columns), n


def _header(**fields) -> bytes:
    base = {"format": "turnstamp.events", "version": 1, "source": "fuzz-bad", "sequence": 0,
            "time_scale": "UTC", "events": 3}
    return json.dumps({**base, **fields}).encode()


def _junk(kind: int, rng: np.random.Generator, body: bytes) -> tuple[list[bytes], int]:
    """One hostile message and the events it really holds (counted if decoded)."""
    def noise(low=0, high=256):
        return rng.bytes(int(rng.integers(low, high)))

    choices = [
        lambda: [noise()],
        lambda: [noise() for _ in range(int(rng.integers(0, 7)))] or [b""],
        lambda: [b"", b""],
        lambda: [b"\xff\xfe\xfd" + noise(), body],
        lambda: [b"[" * 100_000, body],
        lambda: [_header(version=99), body],
        lambda: [_header(events=2**63 - 1), body],
        lambda: [_header(), body[: int(rng.integers(0, max(1, len(body) - 9)))]],
        lambda: [_header(), body + b"\x00" * 8 + noise(1, 64)],
        lambda: [_header(), noise(8, 4096)],
        lambda: [_header(source="x" * 65), body],
        lambda: [_header(), body, noise()],
    ]
    return choices[kind % len(choices)](), 0


def _plan(count: int, rng: np.random.Generator, junk_first: int):
    """(frames, events held, good sequence or None) for ``count`` hostile messages
    plus good ones; the first ``junk_first`` are junk."""
    body = _good(0, rng, "fuzz-bad")[0][1]
    out, sequence, kept = [], 0, []
    for index in range(count):
        roll = rng.random()
        if index >= junk_first and roll < 0.1:
            frames, n = _good(sequence, rng)
            out.append((frames, n, sequence))
            kept.append((frames, n))
            sequence += 1
        if index >= junk_first and roll > 0.995 and kept:  # a repeat: a duplicate
            frames, n = kept[-1]
            out.append((frames, n, None))
            continue
        if index >= junk_first and 0.99 < roll <= 0.995:  # a spoofed huge sequence
            frames, n = _good(2**63 - 1 - index, rng)
            out.append((frames, n, None))
            continue
        if roll > 0.9999:  # over the size limit (but within what ZeroMQ admits)
            out.append(([_header(), body + b"\x00" * (MAX_BYTES + 1024)], 0, None))
            continue
        out.append((*_junk(int(rng.integers(0, 12)), rng, body), None))
    return out


class _ControlFuzz(threading.Thread):
    """Hostile control clients, and a probe timing ``status`` replies."""

    def __init__(self, context, endpoint, rng):
        super().__init__(daemon=True)
        self.context, self.endpoint, self.rng = context, endpoint, rng
        self.done = threading.Event()
        self.sent = 0
        self.slowest = 0.0
        self.stalls = 0
        self.unanswered = 0

    def run(self):
        hostile = [self.context.socket(zmq.DEALER) for _ in range(4)]
        for socket in hostile:
            socket.setsockopt(zmq.LINGER, 0)
            socket.setsockopt(zmq.SNDHWM, 100)
            socket.connect(self.endpoint)
        last_probe = 0.0
        while not self.done.is_set():
            socket = hostile[int(self.rng.integers(0, len(hostile)))]
            frames = [self.rng.bytes(int(self.rng.integers(0, 64)))
                      for _ in range(int(self.rng.integers(1, 5)))]
            if self.rng.random() < 0.01:
                frames = [b"", b"s" * 100_000]  # over the control socket's frame limit
            try:
                socket.send_multipart(frames, flags=zmq.NOBLOCK)
                self.sent += 1
            except zmq.Again:
                pass
            if self.sent % 8 == 0:
                time.sleep(0.001)  # the drain never reads replies: a deaf client
            if time.monotonic() - last_probe > 0.25:
                last_probe = time.monotonic()
                self._probe()
        for socket in hostile:
            socket.close(linger=0)

    def _probe(self):
        with self.context.socket(zmq.REQ) as request:
            request.setsockopt(zmq.LINGER, 0)
            request.connect(self.endpoint)
            start = time.monotonic()
            request.send_multipart([b"status", b"extra"] if self.rng.random() < 0.3
                                   else [b"status"])
            if request.poll(int(STALL_S * 4 * 1000)):
                request.recv()
            else:
                self.unanswered += 1
            seconds = time.monotonic() - start
        self.slowest = max(self.slowest, seconds)
        self.stalls += seconds > STALL_S


def _rss(pid: int) -> int:
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
    except OSError:
        pass
    return 0


def _round(count: int, seed: int) -> dict:
    rng = np.random.default_rng(seed)
    plan = _plan(count, rng, junk_first=int(rng.integers(1, 50)))
    with tempfile.TemporaryDirectory(prefix="turnstamp-fuzz-") as tmp:
        intake, control = _ports(2)
        config = bench_config(Path(tmp), "bench", intake=intake, control=control)
        process = subprocess.Popen([sys.executable, "-m", "turnstamp", "run", str(config)],
                                   stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        out = Path(tmp) / "out"
        deadline = time.time() + 120
        while not (out / "status.json").exists() and process.poll() is None \
                and time.time() < deadline:
            time.sleep(0.1)
        context = zmq.Context()
        prober = _ControlFuzz(context, f"tcp://127.0.0.1:{control}", rng)
        prober.start()
        rss = [_rss(process.pid)]
        push = context.socket(zmq.PUSH)
        push.setsockopt(zmq.SNDTIMEO, 100)
        push.connect(f"tcp://127.0.0.1:{intake}")
        sent = 0
        for index, (frames, _, _) in enumerate(plan):
            while process.poll() is None:
                try:
                    push.send_multipart(frames)
                    sent += 1
                    break
                except zmq.Again:
                    continue
            if index % 2000 == 0:
                rss.append(_rss(process.pid))
        ledger_rows = _settle(out, sent, process)
        rss.append(_rss(process.pid))
        prober.done.set()
        prober.join(timeout=30)
        push.close(linger=0)
        crashed = process.poll() is not None
        if not crashed:
            process.terminate()
        code = process.wait(timeout=120)
        error = process.stderr.read().decode(errors="replace").strip().splitlines()
        context.term()
        result = _accounting(out, plan, sent, ledger_rows)
    return {**result, "messages": len(plan), "sent": sent, "crashed": crashed,
            "exit_status": code, "last_error": error[-1] if crashed and error else "",
            "control_requests": prober.sent, "status_stalls": prober.stalls,
            "status_unanswered": prober.unanswered, "status_slowest_s": prober.slowest,
            "rss_first_mb": rss[0] / 2**20, "rss_max_mb": max(rss) / 2**20,
            "rss_last_mb": rss[-1] / 2**20}


def _settle(out: Path, sent: int, process, timeout: float = 120) -> int:
    """Wait until the status counts every message sent (or the process ended)."""
    deadline = time.time() + timeout
    received = 0
    while time.time() < deadline and process.poll() is None:
        try:
            received = json.loads((out / "status.json").read_text())["counters"] \
                .get("messages_received", 0)
        except (OSError, ValueError, KeyError):
            pass
        if received >= sent:
            break
        time.sleep(0.2)
    return received


def _accounting(out: Path, plan, sent: int, received: int) -> dict:
    try:
        status = json.loads((out / "status.json").read_text())
        ledger = read_stream(out, "ledger").to_pylist()
    except Exception as exc:  # a crashed round may leave nothing readable
        return {"accounting_exact": False, "accounting_problem": f"unreadable: {exc}"}
    counters = status.get("counters", {})
    expected_events = sum(n for _, n, _ in plan[:sent])
    good = {sequence for _, _, sequence in plan[:sent] if sequence is not None}
    accepted = {r["sequence"] for r in ledger
                if r["source"] == GOOD_SOURCE and r["outcome"] == "accepted"}
    checks = {
        "one ledger row per message": len(ledger) == sent == counters.get("messages_received"),
        "events as really held": counters.get("events_received") == expected_events
        == sum(r["events"] for r in ledger),
        "received = tagged + filtered + rejected": counters.get("events_received") == (
            counters.get("events_tagged", 0) + counters.get("events_filtered", 0)
            + counters.get("events_rejected", 0)),
        "every good message accepted": good <= accepted,
        "no missing messages counted": counters.get("missing_messages") == 0,
    }
    failed = [name for name, ok in checks.items() if not ok]
    return {"accounting_exact": not failed, "accounting_problem": "; ".join(failed),
            "ledger_rows": len(ledger), "events_received": counters.get("events_received"),
            "status_state": status.get("state")}


def bench_fuzz(total: int, rounds: int = ROUNDS) -> dict:
    """``total`` hostile messages over ``rounds`` fresh services, junk first in each."""
    per_round = [_round(total // rounds, seed) for seed in range(rounds)]
    results = {
        "fuzz_messages": sum(r["messages"] for r in per_round),
        "fuzz_rounds": rounds,
        "fuzz_crashes": sum(r["crashed"] for r in per_round),
        "fuzz_stalls_over_3s": sum(r["status_stalls"] for r in per_round),
        "fuzz_status_unanswered": sum(r["status_unanswered"] for r in per_round),
        "fuzz_status_slowest_s": max(r["status_slowest_s"] for r in per_round),
        "fuzz_control_requests": sum(r["control_requests"] for r in per_round),
        "fuzz_accounting_exact_rounds": sum(r.get("accounting_exact", False) for r in per_round),
        "fuzz_rss_max_mb": max(r["rss_max_mb"] for r in per_round),
        "fuzz_rounds_detail": per_round,
    }
    results["fuzz_passed"] = (results["fuzz_crashes"] == 0 and results["fuzz_stalls_over_3s"]
                              == 0 and results["fuzz_status_unanswered"] == 0
                              and results["fuzz_accounting_exact_rounds"] == rounds)
    return results


def fuzz_lines(results: dict) -> list[str]:
    """The fuzz results as text: totals, then one line per round."""
    lines = [f"  {key:32s} {value:,.3g}" if isinstance(value, float) else f"  {key:32s} {value}"
             for key, value in results.items() if key != "fuzz_rounds_detail"]
    for number, r in enumerate(results["fuzz_rounds_detail"]):
        lines.append(f"  round {number}: {r['messages']:,} messages ({r['sent']:,} sent), "
                     f"crashed {r['crashed']}, accounting exact {r.get('accounting_exact')} "
                     f"{r.get('accounting_problem') or ''}, slowest status "
                     f"{r['status_slowest_s']:.2f} s, RSS {r['rss_first_mb']:.0f} -> "
                     f"{r['rss_max_mb']:.0f} MB max, {r['last_error']}")
    return lines
