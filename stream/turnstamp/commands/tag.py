"""``turnstamp tag``: tag a file of events offline (Arrow IPC or Parquet)."""

from __future__ import annotations

import io
from pathlib import Path

from .common import add_site_option

__all__ = ["add_parser", "run"]


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("tag", help="tag a file of events offline (Arrow IPC or Parquet)")
    p.add_argument("events", help="input with event_id and time_ns columns")
    p.add_argument("--model", action="append", required=True,
                   help="spin model file (TOML/JSON); repeat for several validity windows")
    add_site_option(p)
    p.add_argument("--scale", default="UTC", choices=["UTC", "TAI", "GPS", "TT"],
                   help="time scale of time_ns (default UTC)")
    p.add_argument("--out", required=True, help="output .arrow or .parquet")
    p.add_argument("--target", help="target name written to the archive")
    p.add_argument("--table-cache", help="folder for cached barycentre tables")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..assemble import build_target
    from ..core.timebase import Scale
    from ..tagging import default_target, tag_file
    from ..views.progress import progress
    from .common import site_environment

    env = site_environment(args.site)
    setup = build_target(default_target(args.model, args.target))
    quiet = io.StringIO() if args.quiet else None  # the bar drawn nowhere
    with progress("tagging events", stream=quiet) as advance:
        summary = tag_file(Path(args.events), Path(args.out), setup, env, Scale(args.scale),
                           Path(args.table_cache) if args.table_cache else None,
                           on_batch=advance)
    print("\n".join(summary.lines()))
    return 0
