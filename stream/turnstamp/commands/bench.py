"""``turnstamp bench``: benchmark the hot paths (not a test)."""

from __future__ import annotations

__all__ = ["add_parser", "run"]


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("bench", help="benchmark the hot paths (not a test)",
                              description="Measure the hot paths against baselines taken in "
                                          "the same run on the same machine.")
    p.add_argument("--json", action="store_true", help="machine-readable output on stdout")
    p.add_argument("--quick", action="store_true", help="smaller sizes, for a quick look")
    p.add_argument("--service", action="store_true",
                   help="also measure the service end to end, ZeroMQ to Arrow files")
    p.add_argument("--soak", type=float, default=0.0, metavar="SECONDS",
                   help="seconds of memory soak at 1e5 events/s (0: none)")
    p.set_defaults(run=run)


def run(args) -> int:
    import json

    from ..bench.suite import run_benchmarks, summary_lines

    results = run_benchmarks(quick=args.quick, service=args.service, soak_s=args.soak)
    print(json.dumps(results, indent=2) if args.json else "\n".join(summary_lines(results)))
    return 0
