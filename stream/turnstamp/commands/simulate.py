"""``turnstamp simulate``: publish a simulated night over ZeroMQ, as an event builder would.

Without ``--config`` it simulates the demo: the invented millisecond pulsar Lantern
seen by the invented Kestrel array at Corvid Ridge. With ``--config`` (a service
configuration) it simulates the user's own pulsar (``--target``, default the
first), with its spin models and template, seen from the configuration's site, and
sends to the configuration's first intake endpoint unless ``--endpoint`` is given.
"""

from __future__ import annotations

import re

from .common import TIME_EXAMPLE

__all__ = ["add_parser", "run", "FAULTS_HELP"]

_ENDPOINT = re.compile(r"^(tcp|ipc|inproc)://\S+$")


FAULTS_HELP = ("clock fault to inject into the time stamps: none, offset, step, scale, "
               "barycentre_sign, drift or wobble")
"""Help of ``--fault`` (``core.simulate.FAULT_KINDS``, not imported here: scipy is slow)."""


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "simulate", help="publish a simulated night over ZeroMQ, as an event builder would",
        description="Simulate a night of photon events (a pulsed signal drawn from the "
                    "target's template through its spin model and the barycentre, a "
                    "background, energies, directions, scores and weights, optionally a "
                    "clock fault) and publish it over ZeroMQ. Default: the invented demo "
                    "pulsar Lantern at the invented Corvid Ridge site; --config: your own "
                    "pulsar, template and site.")
    p.add_argument("--config", metavar="FILE",
                   help="service configuration whose site and target to simulate (default: "
                        "the invented demo pulsar and site)")
    p.add_argument("--target", help="target of --config to simulate (default: the first)")
    p.add_argument("--endpoint", help="ZeroMQ endpoint to send to (default: the config's "
                                      "first intake endpoint, else tcp://127.0.0.1:5555)")
    p.add_argument("--pattern", choices=["push", "pub"], default="push",
                   help="socket pattern: push (nothing lost) or pub")
    p.add_argument("--bind", action="store_true", help="bind instead of connect")
    p.add_argument("--seconds", type=float, default=60.0, help="length of the night to send, s")
    p.add_argument("--rate", type=float, default=20_000.0, help="events per second")
    p.add_argument("--pulsed-fraction", type=float, default=0.01,
                   help="fraction of the events that are pulsed")
    p.add_argument("--speed", type=float, default=1.0,
                   help="night seconds per wall-clock second (0: as fast as possible)")
    p.add_argument("--start", metavar="UTC",
                   help=f"start of the night, {TIME_EXAMPLE} (default: now)")
    p.add_argument("--fault", default="none", help=FAULTS_HELP)
    p.add_argument("--seed", type=int, default=0, help="random seed")
    p.add_argument("--source", default="simulator", help="source name in the message headers")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(run=run)


def _checked(args) -> dict:
    """The options as ``publish_night`` keywords, each checked with a clear error."""
    from ..demo.simulator import check_fault
    from ..errors import InputError
    from .common import positive_seconds, utc_instant

    check_fault(args.fault)
    positive_seconds("--seconds", args.seconds)
    if not args.rate > 0:
        raise InputError("--rate", args.rate, "must be a positive number of events per second")
    if not 0 <= args.pulsed_fraction <= 1:
        raise InputError("--pulsed-fraction", args.pulsed_fraction, "must be between 0 and 1")
    if not args.speed >= 0:
        raise InputError("--speed", args.speed, "must be 0 (as fast as possible) or positive")
    return dict(pattern=args.pattern, bind=args.bind, seconds=args.seconds, rate=args.rate,
                pulsed_fraction=args.pulsed_fraction, speed=args.speed,
                start_utc_ns=utc_instant("--start", args.start) if args.start else None,
                fault=args.fault, seed=args.seed, source=args.source)


def _scenario(args) -> tuple[str, dict]:
    """The endpoint, and the site and target to simulate (the demo's without --config)."""
    from ..config import load_config
    from ..errors import InputError

    if args.config is None:
        if args.target:
            raise InputError("--target", args.target, "needs --config (the demo has one target)")
        return args.endpoint or "tcp://127.0.0.1:5555", {}
    config = load_config(args.config)
    names = [t.name for t in config.targets]
    if args.target is not None and args.target not in names:
        raise InputError("--target", args.target, f"not a target of {args.config}: {names}")
    target = config.targets[names.index(args.target) if args.target else 0]
    endpoint = args.endpoint or config.intake.endpoints[0]
    if not args.endpoint and config.intake.bind:
        endpoint = endpoint.replace("://0.0.0.0:", "://127.0.0.1:").replace("://*:",
                                                                           "://127.0.0.1:")
    return endpoint, {"site": config.site, "target": target}


def run(args) -> int:
    import io

    import zmq

    from ..demo.simulator import publish_night
    from ..errors import InputError
    from ..views.progress import progress

    options = _checked(args)
    endpoint, scenario = _scenario(args)
    if not _ENDPOINT.match(endpoint):
        raise InputError("--endpoint", endpoint, "not a ZeroMQ endpoint like tcp://host:port")
    what = (f"{scenario['target'].name} at {scenario['site'].name}" if scenario
            else "the demo pulsar Lantern at Corvid Ridge (invented)")
    with progress(f"sending a simulated night of {what}",
                  total=round(args.seconds * args.rate),
                  stream=io.StringIO() if args.quiet else None) as advance:
        try:
            return publish_night(endpoint, **options, on_batch=advance, **scenario)
        except zmq.ZMQError as exc:
            raise InputError("--endpoint", endpoint, f"cannot {'bind' if args.bind else 'connect'}"
                             f": {exc}") from None
