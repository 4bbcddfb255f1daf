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
    p.add_argument("--retag", action="store_true",
                   help="instead: turnstamp retag on a local Dask cluster, 1 and 2 workers "
                        "(scaling efficiency, cost per fragment); default off")
    p.add_argument("--retag-events", type=int, metavar="N",
                   help="events of the --retag dataset (default 1e7, 1e6 with --quick)")
    p.set_defaults(run=run)


def run(args) -> int:
    """One section of benchmarks, printed as text or JSON; exit 1 if a pass/fail one failed."""
    if args.crash_cycles or args.night_hours:
        return _service_endurance(args)
    if args.clock:
        from ..bench.clock import bench_clock, clock_lines

        return show(args, bench_clock(quick=args.quick), clock_lines)
    if args.fuzz:
        from ..bench.fuzz import bench_fuzz, fuzz_lines

        results = bench_fuzz(args.fuzz)
        show(args, results, fuzz_lines)
        return 0 if results["fuzz_passed"] else 1
    if args.retag or args.retag_events:
        from ..bench.retag import bench_retag, retag_lines

        events = args.retag_events or (10**6 if args.quick else 10**7)
        return show(args, bench_retag(events), retag_lines)
    from ..bench.suite import run_benchmarks, summary_lines

    return show(args, run_benchmarks(quick=args.quick, service=args.service,
                                     soak_s=args.soak, tag=not args.no_tag,
                                     tag_events=args.tag_events), summary_lines)


def show(args, results: dict, lines) -> int:
    import json

    print(json.dumps(results, indent=2) if args.json else "\n".join(lines(results)))
    return 0


def _service_endurance(args) -> int:
    """Crash cycles and/or a full night; exit 1 if the crash cycles lost or doubled data."""
    results, lines, passed = {}, [], True
    if args.crash_cycles:
        from ..bench.crash import bench_crash, crash_lines, crash_passed

        results.update(bench_crash(args.crash_cycles))
        lines += crash_lines(results)
        passed = crash_passed(results)
    if args.night_hours:
        from ..bench.night import bench_night, night_lines

        night = bench_night(args.night_hours, quick=args.quick)
        results.update(night)
        lines += night_lines(night)
    show(args, results, lambda _: lines)
    return 0 if passed else 1
