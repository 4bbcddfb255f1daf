"""``turnstamp bench --service``: events through ZeroMQ into Arrow files.

The service runs as its own process (as in production); this process is the
event builder. Measured in the same run: raw loopback ZeroMQ with the same
messages and a receiver that only counts (the baseline), then the service's
sustained rate with zero loss (the median of three bursts, each into a fresh
service, with the lowest and highest), its update latency (event received -> significance
row written), and with ``--soak`` its resident memory over time at a fixed rate.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
import zmq

from ..core.timebase import NS_PER_S, parse_instant, unix_to_ns
from ..demo import lantern_toml, site_toml
from ..files.reader import read_stream
from ..wire.encode import encode_message

__all__ = ["bench_service", "bench_config", "TWO_RECIPES"]

BATCH = 10_000
NIGHT_UTC = "2026-12-02T03:00:00"


def _messages(total: int, source: str = "bench", rate: float = 1e6) -> list[list[bytes]]:
    """Pre-encoded messages of BATCH events, time-ordered as a stream of ``rate``
    events per second produces them (so one message spans BATCH / rate seconds)."""
    rng = np.random.default_rng(5)
    start = parse_instant(NIGHT_UTC)
    count = total // BATCH
    step = int(BATCH / rate * NS_PER_S)
    out = []
    for i in range(count):
        times = np.sort(start + i * step + rng.integers(0, step, BATCH))
        columns = {
            "event_id": np.arange(i * BATCH, (i + 1) * BATCH, dtype=np.uint64),
            "time_ns": times,
            "energy_kev": rng.uniform(1e8, 1e10, BATCH),
            "ra_deg": 123.4567 + rng.normal(0, 0.5, BATCH),
            "dec_deg": 23.4567 + rng.normal(0, 0.5, BATCH),
            "weight": rng.random(BATCH),
        }
        out.append(encode_message(source, i, "UTC", columns))
    return out


TWO_RECIPES = '[[targets.recipes]]\nname = "all"\n[[targets.recipes]]\nname = "weighted"\n' \
    "use_weights = true\n"


def bench_config(directory: Path, name: str, *, intake: int | None = None,
                 control: int | None = None, recipes: str = TWO_RECIPES,
                 cover_from: str = "2026-12-02T00:00:00", output: str = "") -> Path:
    """A service configuration for the benchmarks: the demo site and pulsar (region 3°),
    a barycentre table over the bench night, outputs in ``directory/out``; loopback
    intake and control ports when given, extra ``[output]`` lines in ``output``."""
    sockets = "" if intake is None else f'[intake]\nendpoints = ["tcp://127.0.0.1:{intake}"]\n'
    if control is not None:
        sockets += f'[control]\nendpoint = "tcp://127.0.0.1:{control}"\n'
    text = f"""{sockets}
{site_toml()}
[barycentre]
cover_from = "{cover_from}"
cover_until = "2026-12-02T14:00:00"
{lantern_toml(region_radius_deg=3.0, recipes=recipes)}
[output]
directory = "{directory / 'out'}"
{output}"""
    path = directory / f"{name}.toml"
    path.write_text(text)
    return path


def _ports(n: int) -> list[int]:
    context = zmq.Context()
    sockets = [context.socket(zmq.PULL) for _ in range(n)]
    ports = [s.bind_to_random_port("tcp://127.0.0.1") for s in sockets]
    for s in sockets:
        s.close(linger=0)
    context.term()
    return ports


def _raw_zmq_rate(messages: list[list[bytes]]) -> float:
    """Baseline: the same messages over loopback PUSH/PULL to a counting receiver."""
    context = zmq.Context()
    pull = context.socket(zmq.PULL)
    port = pull.bind_to_random_port("tcp://127.0.0.1")
    done = threading.Event()

    def receive():
        for _ in range(len(messages)):
            pull.recv_multipart(copy=False)
        done.set()

    thread = threading.Thread(target=receive)
    thread.start()
    push = context.socket(zmq.PUSH)
    push.connect(f"tcp://127.0.0.1:{port}")
    start = time.perf_counter()
    for frames in messages:
        push.send_multipart(frames, copy=False)
    done.wait()
    seconds = time.perf_counter() - start
    thread.join()
    push.close(linger=0)
    pull.close(linger=0)
    context.term()
    return len(messages) * BATCH / seconds


class _Service:
    def __init__(self, directory: Path):
        intake, control = _ports(2)
        self.intake, self.control_endpoint = intake, f"tcp://127.0.0.1:{control}"
        config = bench_config(directory, "bench", intake=intake, control=control)
        self.process = subprocess.Popen([sys.executable, "-m", "turnstamp", "run", str(config)],
                                        stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        self.context = zmq.Context()
        self.status_file = directory / "out" / "status.json"
        deadline = time.time() + 120
        while not self.status_file.exists():
            if self.process.poll() is not None or time.time() > deadline:
                raise RuntimeError("service did not start: " + self.process.stderr.read().decode())
            time.sleep(0.1)

    def status(self) -> dict:
        with self.context.socket(zmq.REQ) as request:
            request.setsockopt(zmq.RCVTIMEO, 30_000)
            request.setsockopt(zmq.LINGER, 0)
            request.connect(self.control_endpoint)
            request.send(b"status")
            return json.loads(request.recv())

    def cpu_seconds(self) -> tuple[float, float]:
        """The service process's user and system CPU time so far (all its threads)."""
        fields = Path(f"/proc/{self.process.pid}/stat").read_text().rsplit(")", 1)[1].split()
        tick = os.sysconf("SC_CLK_TCK")
        return int(fields[11]) / tick, int(fields[12]) / tick

    def rss_bytes(self) -> int:
        for line in Path(f"/proc/{self.process.pid}/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
        return 0

    def stop(self) -> None:
        self.process.terminate()
        self.process.wait(timeout=120)
        self.context.term()


def _send(service: _Service, messages, rate: float | None = None) -> float:
    context = zmq.Context()
    push = context.socket(zmq.PUSH)
    push.connect(f"tcp://127.0.0.1:{service.intake}")
    start = time.perf_counter()
    for i, frames in enumerate(messages):
        if rate:
            delay = start + i * BATCH / rate - time.perf_counter()
            if delay > 0:
                time.sleep(delay)
        push.send_multipart(frames, copy=False)
    push.close(linger=-1)
    context.term()
    return start


def bench_service(quick: bool = False, soak_s: float = 0.0, bursts: int = 3) -> dict:
    """The raw ZeroMQ baseline, then ``bursts`` bursts, each into a fresh service: the
    rate is their median (the spread is reported: this machine's speed drifts by tens
    of percent within minutes), losses their sum, the latency their worst."""
    total = 10**6 if quick else 5 * 10**6
    messages = _messages(total)
    results = {"service_batch_events": BATCH, "service_events_sent": total,
               "zmq_raw_events_per_s": _raw_zmq_rate(messages)}
    runs = [_burst(messages, total) for _ in range(1 if quick else bursts)]
    rates = [run["service_events_per_s"] for run in runs]
    middle = runs[int(np.argsort(rates)[len(rates) // 2])]
    results.update(middle)
    results.update({
        "service_bursts": len(runs),
        "service_events_per_s_lowest": min(rates), "service_events_per_s_highest": max(rates),
        "service_ratio_to_raw_zmq": middle["service_events_per_s"]
                                    / results["zmq_raw_events_per_s"],
        "service_events_lost": sum(run["service_events_lost"] for run in runs),
        "service_missing_messages": sum(run["service_missing_messages"] for run in runs),
        "service_update_latency_p99_s": max(run["service_update_latency_p99_s"] or 0.0
                                            for run in runs),
    })
    if soak_s:  # a fresh service: the burst's freed buffers would blur the picture
        with tempfile.TemporaryDirectory(prefix="turnstamp-soak-") as tmp:
            service = _Service(Path(tmp))
            try:
                results.update(_soak(service, soak_s))
            finally:
                service.stop()
    return results


def _burst(messages, total: int) -> dict:
    """All ``messages`` at full speed into a fresh service."""
    with tempfile.TemporaryDirectory(prefix="turnstamp-bench-") as tmp:
        service = _Service(Path(tmp))
        try:
            service.status()  # warmed up and answering
            cpu_before = service.cpu_seconds()
            started_utc_ns = unix_to_ns(time.time())
            start = _send(service, messages)
            while time.perf_counter() - start < 600:
                time.sleep(0.5)  # rare polls: a status request costs the service time
                if service.status()["counters"].get("events_received", 0) >= total:
                    break
            # the ledger's receipt time of the last message ends the interval (the
            # message itself is processed ~10 ms later)
            ledger = read_stream(Path(tmp) / "out", "ledger")
            last_ns = int(ledger["received_utc_ns"].to_numpy().max())
            seconds = (last_ns - started_utc_ns) / 1e9
            user, system = np.subtract(service.cpu_seconds(), cpu_before)
            time.sleep(2.5)  # two more update cycles for the latency figures
            status = service.status()
            counters = status["counters"]
            out = {
                "service_events_per_s": total / seconds,
                # where the service's own time went during the burst (to ~0.1 s: the
                # last polls are included): system time is mostly the archive's writes
                # into the page cache, which virtual machines make dear on fresh memory
                "service_cpu_user_ms_per_message": 1e3 * user / len(messages),
                "service_cpu_system_ms_per_message": 1e3 * system / len(messages),
                "service_events_lost": total - counters.get("events_received", 0),
                "service_missing_messages": counters.get("missing_messages", 0),
                "service_update_latency_p99_s": (status.get("update_latency_s") or {}).get("p99"),
                "service_rss_after_burst_mb": service.rss_bytes() / 2**20,
            }
        finally:
            service.stop()
        archive = sum(f.stat().st_size for f in Path(tmp, "out").glob("archive-*.arrow*"))
        out["service_archive_bytes_per_event"] = archive / total
    return out


def _soak(service: _Service, seconds: float, rate: float = 100_000.0) -> dict:
    """Resident memory while sending at ``rate`` for ``seconds``."""
    count = int(seconds * rate / BATCH)
    rng = np.random.default_rng(7)
    start_ns = parse_instant("2026-12-02T06:00:00")
    messages = []
    for i in range(count):
        times = np.sort(start_ns + int(i * BATCH / rate * NS_PER_S)
                        + rng.integers(0, int(BATCH / rate * NS_PER_S), BATCH))
        messages.append(encode_message("soak", i, "UTC", {
            "event_id": np.arange(i * BATCH, (i + 1) * BATCH, dtype=np.uint64),
            "time_ns": times}))
    samples = []
    sender = threading.Thread(target=_send, args=(service, messages, rate))
    sender.start()
    began = time.time()
    while sender.is_alive():
        time.sleep(5.0)
        samples.append((time.time() - began, service.rss_bytes()))
    sender.join()
    warm = min(60.0, seconds / 4)
    settled = np.array([rss for t, rss in samples if t >= warm] or [s[1] for s in samples],
                       dtype=float)
    low, median, high = np.percentile(settled, [5, 50, 95])
    first = np.median(settled[: max(1, len(settled) // 10)])
    last = np.median(settled[-max(1, len(settled) // 10):])
    return {"soak_seconds": seconds, "soak_events_per_s": rate,
            "soak_rss_median_mb": median / 2**20, "soak_rss_max_mb": settled.max() / 2**20,
            # flatness: 5th to 95th percentile of the samples after warm-up, over the median
            "soak_rss_spread": (high - low) / median,
            "soak_rss_growth": (last - first) / first,
            "soak_rss_samples_mb": [round(r / 2**20, 1) for _, r in samples]}
