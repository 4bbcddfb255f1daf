"""``turnstamp demo``: simulate a night and run the service on it, live."""

from __future__ import annotations

from pathlib import Path

from .simulate import FAULTS_HELP

__all__ = ["add_parser", "run"]


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "demo", help="simulate a night and run the service on it, live",
        description="Run the service and a simulator together on loopback: a simulated "
                    "night of the invented millisecond pulsar Lantern seen by the invented "
                    "Kestrel array at the invented Corvid Ridge site. Prints the endpoints "
                    "for turnstamp watch, a status line every second and a summary.")
    p.add_argument("--seconds", type=float, default=60.0, help="how long to run, s")
    p.add_argument("--out-dir", default="turnstamp-demo", metavar="DIR",
                   help="output folder (a fresh subfolder when it holds an earlier run)")
    p.add_argument("--rate", type=float, default=20_000.0,
                   help="events per second from the simulated array")
    p.add_argument("--fault", default="none", help=FAULTS_HELP)
    p.set_defaults(run=run)


def run(args) -> int:
    from ..demo.live import run_demo
    from ..demo.simulator import check_fault
    from ..errors import InputError
    from .common import positive_seconds

    check_fault(args.fault)
    positive_seconds("--seconds", args.seconds)
    if not args.rate > 0:
        raise InputError("--rate", args.rate, "must be a positive number of events per second")
    return run_demo(Path(args.out_dir), seconds=args.seconds, rate=args.rate, fault=args.fault)
