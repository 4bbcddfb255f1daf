"""``turnstamp bench``: benchmark the hot paths and the tag command (not a test)."""

from __future__ import annotations

__all__ = ["add_parser", "run"]


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "bench", help="benchmark the hot paths and the tag command (not a test)",
        description="Throughput and memory against targets, with baselines measured in "
                    "the same run: the tagging kernel and moments, the whole tag command "
                    "file to file, and (--service) the live service end to end.")
    p.add_argument("--json", action="store_true",
                   help="machine-readable output on stdout (default: text)")
    p.add_argument("--quick", action="store_true",
                   help="smaller sizes: 1e5/1e6 events instead of 1e6/1e7 (default: off)")
    p.add_argument("--service", action="store_true",
                   help="also ZeroMQ -> Arrow end to end (default: off)")
    p.add_argument("--soak", type=float, default=0.0, metavar="SECONDS",
                   help="seconds of service memory soak at 1e5 events/s (default 0: none)")
    p.add_argument("--no-tag", action="store_true",
                   help="skip the whole tag command, file to file (default: run it)")
    p.add_argument("--tag-events", type=int, metavar="N",
                   help="events in the tag command's files (default 1e7, 1e6 with --quick)")
    p.add_argument("--clock", action="store_true",
                   help="instead: the clock verdict's statistics (offset efficiency and "
                        "coverage, false alarms on clean nights, reach); default off")
    p.add_argument("--crash-cycles", type=int, default=0, metavar="N",
                   help="instead: N kill -9 and restart cycles of the service under a "
                        "full-rate sender, then check the folder (default 0: none)")
    p.add_argument("--night-hours", type=float, default=0.0, metavar="H",
                   help="instead: service throughput with H hours of retained statistics "
                        "against an empty night (default 0: none)")
    p.add_argument("--fuzz", type=int, default=0, metavar="N",
                   help="instead: N hostile messages at the intake and the control socket "
                        "of fresh services, junk first (default 0: none)")
    p.set_defaults(run=run)


def run(args) -> int:
    import json

    if args.crash_cycles or args.night_hours:
        return _service_endurance(args)
    if args.clock:
        from ..bench.clock import bench_clock, clock_lines

        results = bench_clock(quick=args.quick)
        print(json.dumps(results, indent=2) if args.json else "\n".join(clock_lines(results)))
        return 0
    if args.fuzz:
        from ..bench.fuzz import bench_fuzz, fuzz_lines

        results = bench_fuzz(args.fuzz)
        print(json.dumps(results, indent=2) if args.json else "\n".join(fuzz_lines(results)))
        return 0 if results["fuzz_passed"] else 1
    from ..bench.suite import run_benchmarks, summary_lines

    results = run_benchmarks(quick=args.quick, service=args.service, soak_s=args.soak,
                             tag=not args.no_tag, tag_events=args.tag_events)
    print(json.dumps(results, indent=2) if args.json else "\n".join(summary_lines(results)))
    return 0


def _service_endurance(args) -> int:
    import json

    results, lines = {}, []
    if args.crash_cycles:
        from ..bench.crash import bench_crash, crash_lines

        results.update(bench_crash(args.crash_cycles))
        lines += crash_lines(results)
    if args.night_hours:
        from ..bench.night import bench_night, night_lines

        night = bench_night(args.night_hours, quick=args.quick)
        results.update(night)
        lines += night_lines(night)
    print(json.dumps(results, indent=2) if args.json else "\n".join(lines))
    return 0
