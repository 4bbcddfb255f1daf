"""``turnstamp table``: build (and cache) a barycentre table ahead of a night.

The table covers START to STOP (UTC calendar times) for the target of a spin model
as seen from the ``--site``; it is cached in ``--table-cache`` under a name that
hashes everything it depends on, so ``turnstamp tag`` and the service reuse it.
"""

from __future__ import annotations

from pathlib import Path

from .common import TIME_EXAMPLE, add_site_option, add_table_cache_option

__all__ = ["add_parser", "run", "MAX_DAYS"]

MAX_DAYS = 400
"""Longest table built in one go, days (a year of nights; tables are ~1 MB a month)."""


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "table", help="build (and cache) a barycentre table ahead of a night",
        description="Build the barycentre correction table of a target (its position from "
                    "a spin model) at a site between two UTC times, and cache it.")
    p.add_argument("--model", required=True, metavar="FILE",
                   help="spin model giving the target's position (TOML/JSON)")
    add_site_option(p)
    p.add_argument("--start", required=True, metavar="UTC", help=f"start: {TIME_EXAMPLE}")
    p.add_argument("--stop", required=True, metavar="UTC", help=f"stop: {TIME_EXAMPLE}")
    add_table_cache_option(p, "turnstamp-tables")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(run=run)


def _window(args) -> tuple[int, int]:
    """START and STOP as UTC label ns, checked: in order, at most ``MAX_DAYS`` apart."""
    from ..core.timebase import NS_PER_DAY
    from ..errors import InputError
    from .common import utc_instant

    start, stop = utc_instant("--start", args.start), utc_instant("--stop", args.stop)
    if stop <= start:
        raise InputError("--stop", args.stop, f"must be after --start {args.start}")
    if stop - start > MAX_DAYS * NS_PER_DAY:
        raise InputError("--stop", args.stop, f"more than {MAX_DAYS} days after --start "
                                              f"{args.start}; build tables a year at a time")
    return start, stop


def run(args) -> int:
    import io

    import numpy as np

    from ..assemble import TableCache, phase_calculators_for, target_setup
    from ..config import BarycentreConfig
    from ..core.timebase import Scale, from_tt, to_tt
    from ..errors import loaded
    from ..files.inputs import load_spin_model
    from ..views.progress import progress
    from .common import site_environment, utc_text

    start_utc, stop_utc = _window(args)
    env = site_environment(args.site)
    model = loaded("--model", load_spin_model, args.model)
    setup = target_setup("table", phase_calculators_for([model]))
    (start, stop), _ = to_tt(np.array([start_utc, stop_utc]), Scale.UTC, env.leaps)
    cache = TableCache(Path(args.table_cache), env, BarycentreConfig())
    with progress("building the barycentre table",
                  stream=io.StringIO() if args.quiet else None):
        table = _build(cache, setup.position, int(start), int(stop), args)
    edges, _ = from_tt(np.array([table.start_ns, table.stop_ns]), Scale.UTC, env.leaps)
    print(f"table for {setup.tagger.calculators[0].model.target.name} at {env.site.name}: "
          f"{utc_text(int(edges[0]))} to {utc_text(int(edges[1]))} (UTC), "
          f"{table.coefficients.shape[1]} segments of {table.segment_ns / 6e10:.0f} min, "
          f"degree {table.degree}; cached in {args.table_cache}")
    for key, value in table.provenance.items():
        if key not in ("start_ns", "stop_ns"):
            print(f"  {key}: {value}")
    return 0


def _build(cache, position, start: int, stop: int, args):
    """The table, with the ephemeris's range named when it does not reach."""
    from jplephem.exceptions import OutOfRangeError

    from ..errors import InputError

    try:
        return cache.table(position, start, stop)
    except OutOfRangeError as exc:  # "segment only covers dates ... through ..."
        raise InputError("--start/--stop", f"{args.start} to {args.stop}",
                         f"beyond the planetary ephemeris: it {exc.args[0].split(' ', 1)[1]}"
                         if exc.args else "beyond the planetary ephemeris") from None
