"""``turnstamp simulate``: publish a simulated night of the invented demo pulsar."""

from __future__ import annotations

__all__ = ["add_parser", "run"]


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("simulate", help="publish a simulated night over ZeroMQ")
    p.add_argument("--endpoint", default="tcp://127.0.0.1:5555")
    p.add_argument("--pattern", choices=["push", "pub"], default="push")
    p.add_argument("--bind", action="store_true", help="bind instead of connect")
    p.add_argument("--seconds", type=float, default=60.0, help="length of the night to send")
    p.add_argument("--rate", type=float, default=20_000.0, help="events per second")
    p.add_argument("--pulsed-fraction", type=float, default=0.01)
    p.add_argument("--speed", type=float, default=1.0,
                   help="night seconds per wall second (0: as fast as possible)")
    p.add_argument("--start", help="UTC start of the night (default: now)")
    p.add_argument("--fault", default="none")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--source", default="simulator")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..demo.simulator import publish_night
    from ..views.progress import progress

    with progress("sending simulated events", total=round(args.seconds * args.rate)) as advance:
        return publish_night(args.endpoint, pattern=args.pattern, bind=args.bind,
                             seconds=args.seconds, rate=args.rate,
                             pulsed_fraction=args.pulsed_fraction, speed=args.speed,
                             start=args.start, fault=args.fault, seed=args.seed,
                             source=args.source, on_batch=advance)
