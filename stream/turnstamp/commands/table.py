"""``turnstamp table``: build (and cache) a barycentre table ahead of a night."""

from __future__ import annotations

from pathlib import Path

from .common import add_site_option

__all__ = ["add_parser", "run"]


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("table", help="build (and cache) a barycentre table ahead of a night")
    p.add_argument("--model", required=True, help="spin model giving the target position")
    add_site_option(p)
    p.add_argument("--start", required=True, help="UTC, e.g. 2026-12-01T18:00:00")
    p.add_argument("--stop", required=True, help="UTC")
    p.add_argument("--cache", default="turnstamp-tables", help="cache folder")
    p.set_defaults(run=run)


def run(args) -> int:
    import numpy as np

    from ..assemble import TableCache
    from ..config import BarycentreConfig
    from ..core.timebase import Scale, format_instant, parse_instant, to_tt
    from ..files.inputs import load_spin_model
    from ..tagging.run import offline_target
    from ..views.progress import progress
    from .common import site_environment

    env = site_environment(args.site)
    setup = offline_target([load_spin_model(args.model)])
    (start, stop), _ = to_tt(np.array([parse_instant(args.start), parse_instant(args.stop)]),
                             Scale.UTC, env.leaps)
    with progress("building the barycentre table"):
        table = TableCache(Path(args.cache), env, BarycentreConfig()).table(
            setup.position, int(start), int(stop))
    print(f"table {format_instant(table.start_ns, 0)} to {format_instant(table.stop_ns, 0)} TT, "
          f"{table.coefficients.shape[1]} segments of {table.segment_ns / 6e10:.0f} min, "
          f"degree {table.degree}; cached in {args.cache}")
    for key, value in table.provenance.items():
        print(f"  {key}: {value}")
    return 0
