"""A simulated night published over ZeroMQ (the library behind ``turnstamp simulate``).

The night is drawn by ``core.simulate`` (pulsed events through the real forward
chain, a background, energies, directions, scores, weights, optional clock
faults) and sent with ``EventPublisher`` at the chosen pace. By default it is the
demo's invented pulsar Lantern seen from the invented Corvid Ridge site; given a
site and a target (a service configuration's), it is the user's own pulsar, with
its spin models and template, seen from the user's site.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable

import numpy as np

from ..assemble import Environment, TableCache, build_target
from ..config import BarycentreConfig, SiteConfig, TargetConfig
from ..core.simulate import FAULT_KINDS, Fault, NightPlan, simulate_night
from ..core.timebase import NS_PER_S, Scale, to_tt, unix_to_ns
from ..errors import InputError
from ..wire.publisher import EventPublisher
from . import DEMO_SITE, data_file

__all__ = ["publish_night", "demo_night", "demo_target", "check_fault", "BATCH_SECONDS"]

BATCH_SECONDS = 0.5  # night seconds per message: ~10 000 events at the demo's rate


def demo_target() -> TargetConfig:
    """The demo's invented pulsar Lantern, with its model and template."""
    return TargetConfig(name="lantern", models=[data_file("lantern.toml")],
                        template=data_file("lantern-template.toml"))


def check_fault(fault: str) -> str:
    """``fault`` if it is a known clock-fault kind, else an ``InputError`` naming them."""
    if fault not in FAULT_KINDS:
        raise InputError("--fault", fault, f"not a clock fault; one of {', '.join(FAULT_KINDS)}")
    return fault


def demo_night(seconds: float, rate: float, pulsed_fraction: float, start_utc_ns: int,
               fault: str = "none", seed: int = 0, batch_seconds: float = 0.5,
               source: str = "simulator", site: SiteConfig = DEMO_SITE,
               target: TargetConfig | None = None):
    """A simulated night of a pulsar seen from a site (default: the demo's).

    Returns (iterator of ``EventBatch``, start of the night in TT ns since
    2000-01-01T12:00:00, the site's ``Environment``); ``start_utc_ns`` is a UTC
    label in ns, ``seconds`` the length of the night and ``rate`` events per second.
    ``target`` must have a template (the pulse shape drawn from).
    """
    target = target or demo_target()
    if target.template is None:
        raise InputError(f"targets.{target.name}.template", None,
                         "the simulator draws pulsed events from the target's template; "
                         "give one (or choose a target that has one)")
    env = Environment.from_site(site)
    setup = build_target(target)
    start = int(to_tt(np.array([start_utc_ns]), Scale.UTC, env.leaps)[0][0])
    setup.tagger.table = TableCache(None, env, BarycentreConfig()).table(
        setup.position, start - 600 * NS_PER_S, start + int((seconds + 600) * NS_PER_S))
    plan = NightPlan(start_tt_ns=start, duration_s=seconds,
                     pulsed_rate_hz=rate * pulsed_fraction,
                     background_rate_hz=rate * (1 - pulsed_fraction),
                     template=setup.template, fault=Fault(kind=check_fault(fault)),
                     batch_seconds=batch_seconds, seed=seed, source=source)
    return simulate_night(plan, setup.tagger, setup.position, env.leaps), start, env


def publish_night(endpoint: str, *, pattern: str = "push", bind: bool = False,
                  seconds: float = 60.0, rate: float = 20_000.0, pulsed_fraction: float = 0.01,
                  speed: float = 1.0, start_utc_ns: int | None = None, fault: str = "none",
                  seed: int = 0, source: str = "simulator", report: bool = True,
                  on_batch: Callable[[int], None] | None = None,
                  site: SiteConfig = DEMO_SITE, target: TargetConfig | None = None) -> int:
    """Publish a simulated night with ``EventPublisher``; returns the exit status (0).

    Parameters
    ----------
    endpoint : str
        ZeroMQ endpoint to connect (or bind) to.
    pattern : {"push", "pub"}
        Socket pattern; ``bind`` binds instead of connecting.
    seconds : float
        Length of the night, s.
    rate : float
        Events per second of night; ``pulsed_fraction`` of them are pulsed.
    speed : float
        Night seconds per wall-clock second (0: as fast as possible).
    start_utc_ns : int, optional
        Start of the night, UTC label ns since 2000-01-01T12:00:00 (default: now).
    fault : str
        Clock fault to inject (``core.simulate.FAULT_KINDS``; "none").
    seed : int
        Random seed.
    source : str
        Source name in the message headers.
    report : bool
        Print a closing line on stderr (how many events and messages were sent).
    on_batch : callable, optional
        Called with the number of events of each message sent (progress).
    site, target : SiteConfig, TargetConfig, optional
        Who observes what (default: the demo's site and pulsar).
    """
    start_utc = start_utc_ns if start_utc_ns is not None else unix_to_ns(time.time())
    batches, _, _ = demo_night(seconds, rate, pulsed_fraction, start_utc, fault, seed,
                               BATCH_SECONDS, source=source, site=site, target=target)
    began = time.monotonic()
    sent = 0
    with EventPublisher(endpoint, source, time_scale="UTC", pattern=pattern,
                        bind=bind) as publisher:
        if pattern == "pub":
            time.sleep(0.5)  # let subscribers connect: PUB drops what nobody receives
        for batch in batches:
            if speed > 0:  # send each batch once its stretch of night has passed
                night_s = (batch.sequence + 1) * BATCH_SECONDS
                delay = night_s / speed - (time.monotonic() - began)
                if delay > 0:
                    time.sleep(delay)
            publisher.send(**batch.columns())
            sent += len(batch)
            if on_batch is not None:
                on_batch(len(batch))
        if report:
            print(f"simulator: sent {sent} events in {publisher.sequence} messages to "
                  f"{endpoint}", file=sys.stderr)
    return 0
