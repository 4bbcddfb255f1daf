"""``turnstamp demo``: simulate a night and run the service on it, live."""

from __future__ import annotations

from pathlib import Path

__all__ = ["add_parser", "run"]


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("demo", help="simulate a night and run the service on it, live")
    p.add_argument("--seconds", type=float, default=60.0, help="how long to run (default 60)")
    p.add_argument("--out", default="turnstamp-demo",
                   help="output folder (default ./turnstamp-demo)")
    p.add_argument("--rate", type=float, default=20_000.0,
                   help="events per second from the simulated array (default 20000)")
    p.add_argument("--fault", default="none",
                   help="inject a clock fault: none, offset, step, scale, barycentre_sign, "
                        "drift, wobble")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..demo.live import run_demo

    return run_demo(Path(args.out), seconds=args.seconds, rate=args.rate, fault=args.fault)
