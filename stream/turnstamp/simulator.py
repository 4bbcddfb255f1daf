"""``turnstamp simulate``: publish a simulated night of the invented demo pulsar.

The night is drawn by ``core.simulate`` (pulsed events through the real forward
chain, a background, energies, directions, scores, weights, optional clock
faults) and sent with ``EventPublisher`` at the chosen pace.
"""

from __future__ import annotations

import sys
import time

import numpy as np

from .assemble import Environment, TableCache, build_target
from .config import BarycentreConfig, TargetConfig
from .core.simulate import Fault, NightPlan, simulate_night
from .core.timebase import NS_PER_S, Scale, parse_instant, to_tt, unix_to_ns
from .demo import DEMO_SITE, data_file
from .wire.publisher import EventPublisher

__all__ = ["run_simulator", "demo_night"]


def demo_night(seconds: float, rate: float, pulsed_fraction: float, start_utc_ns: int,
               fault: str = "none", seed: int = 0, batch_seconds: float = 0.5,
               source: str = "simulator"):
    """(batches iterator, night start TT ns) for the demo pulsar seen from the demo site."""
    env = Environment.from_site(DEMO_SITE)
    target = build_target(TargetConfig(name="lantern", models=[data_file("lantern.toml")],
                                       template=data_file("lantern-template.toml")))
    start = int(to_tt(np.array([start_utc_ns]), Scale.UTC, env.leaps)[0][0])
    target.tagger.table = TableCache(None, env, BarycentreConfig()).table(
        target.position, start - 600 * NS_PER_S, start + int((seconds + 600) * NS_PER_S))
    plan = NightPlan(start_tt_ns=start, duration_s=seconds,
                     pulsed_rate_hz=rate * pulsed_fraction,
                     background_rate_hz=rate * (1 - pulsed_fraction),
                     template=target.template, fault=Fault(kind=fault),
                     batch_seconds=batch_seconds, seed=seed, source=source)
    return simulate_night(plan, target.tagger, target.position, env.leaps), start, env


def run_simulator(args, out=sys.stderr) -> int:
    start_utc = parse_instant(args.start) if args.start else unix_to_ns(time.time())
    batch_seconds = 0.5
    batches, _, _ = demo_night(args.seconds, args.rate, args.pulsed_fraction, start_utc,
                               args.fault, args.seed, batch_seconds, source=args.source)
    began = time.monotonic()
    sent = 0
    with EventPublisher(args.endpoint, args.source, time_scale="UTC",
                        pattern=args.pattern, bind=args.bind) as publisher:
        if args.pattern == "pub":
            time.sleep(0.5)  # let subscribers connect: PUB drops what nobody receives
        for batch in batches:
            if args.speed > 0:  # send each batch once its stretch of night has passed
                night_s = (batch.sequence + 1) * batch_seconds
                delay = night_s / args.speed - (time.monotonic() - began)
                if delay > 0:
                    time.sleep(delay)
            publisher.send(**batch.columns())
            sent += len(batch)
        if out is not None:
            print(f"simulator: sent {sent} events in {publisher.sequence} messages to "
                  f"{args.endpoint}", file=out)
    return 0
