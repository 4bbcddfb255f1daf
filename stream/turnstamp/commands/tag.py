"""``turnstamp tag``: tag a file of events offline (Arrow IPC or Parquet)."""

from __future__ import annotations

from .common import add_event_file_options, add_table_cache_option, event_file_job

__all__ = ["add_parser", "run"]



def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "tag", help="tag a file of events offline (Arrow IPC or Parquet)",
        description="Barycentric time and rotational phase of every event of a file, "
                    "written to an archive file; read and written batch by batch.")
    p.add_argument("events", help="input (.arrow, .arrows or .parquet) with event_id and "
                                  "time_ns columns")
    add_event_file_options(p)
    p.add_argument("--out", required=True, metavar="FILE",
                   help="archive to write, .arrow or .parquet (required); refused if it "
                        "exists, unless --force")
    add_table_cache_option(p, None)
    p.add_argument("--force", action="store_true",
                   help="overwrite existing outputs (default: refuse)")
    p.add_argument("--json", action="store_true", help="print the summary as JSON on stdout "
                                                       "(default: text)")
    p.add_argument("--quiet", action="store_true", help="no progress bar (default: a bar on "
                                                        "a terminal)")
    p.set_defaults(run=run)


def run(args) -> int:
    import io
    from pathlib import Path

    from ..tagging.allocator import keep_freed_memory
    from ..tagging.begin import FileTagging

    keep_freed_memory()
    # the input is read while the configuration and site tables load (tagging.begin)
    with FileTagging(Path(args.events), Path(args.out), args.force,
                     statistics_aside=True) as tagging:
        from ..views.progress import progress

        setup, env, scale, convention = event_file_job(args)
        quiet = io.StringIO() if args.quiet or args.json else None  # the bar drawn nowhere
        with progress("tagging events", stream=quiet) as advance:
            summary = tagging.tag(setup, env, scale, table_cache=Path(args.table_cache)
                                  if args.table_cache else None, convention=convention,
                                  on_batch=advance)
    if args.json:
        import json

        print(json.dumps(summary.as_dict(), indent=2))
    else:
        print("\n".join(summary.lines()))
    return 0
