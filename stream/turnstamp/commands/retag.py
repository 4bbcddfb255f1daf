"""``turnstamp retag``: re-tag a whole archive (a dataset of event files) on a Dask
cluster, embedded on this machine or an existing one."""

from __future__ import annotations

from .common import add_event_file_options, add_table_cache_option, event_file_job

__all__ = ["add_parser", "run"]


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "retag", help="re-tag a dataset of event files on a Dask cluster",
        description="Barycentric time and rotational phase of every event of a dataset "
                    "(a folder of Parquet or Arrow IPC files, hive partitions welcome), "
                    "one file per task on a Dask cluster, into a partitioned Parquet "
                    "dataset with merged night-by-night statistics. Files already done "
                    "with the same models and site are skipped: rerun to resume.")
    p.add_argument("dataset", help="folder of .parquet or .arrow files (or one file) with "
                                   "event_id and time_ns columns")
    add_event_file_options(p)
    p.add_argument("--out-dir", required=True, metavar="DIR",
                   help="output dataset folder (required): Parquet files at the input's "
                        "relative paths, _statistics.json, _rejects/, _fragments/")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="address of an existing Dask scheduler, used as it is (default: "
                        "start a local cluster of worker processes)")
    p.add_argument("--workers", type=int, metavar="N",
                   help="worker processes of the local cluster (default: one per CPU)")
    add_table_cache_option(p, None)
    p.add_argument("--json", action="store_true", help="print the summary as JSON on stdout "
                                                       "(default: text)")
    p.add_argument("--quiet", action="store_true", help="no progress bar or dashboard line "
                                                        "(default: shown on a terminal)")
    p.set_defaults(run=run)


def run(args) -> int:
    import io
    import sys
    from pathlib import Path

    from ..retag.cluster import cluster_client, dashboard_link
    from ..retag.run import execute, prepare
    from ..views.progress import progress

    setup, env, scale, convention = event_file_job(args)
    quiet = args.quiet or args.json
    prepared = prepare(Path(args.dataset), Path(args.out_dir), setup, env,
                       scale, convention=convention,
                       table_cache=Path(args.table_cache) if args.table_cache else None)
    with cluster_client(args.scheduler, args.workers, dashboard=not quiet) as client:
        link = dashboard_link(client)
        if link and not quiet:
            print(f"Dask dashboard: {link}", file=sys.stderr)
        with progress("re-tagging fragments", stream=io.StringIO() if quiet else None) as step:
            summary = execute(prepared, client, on_fragment=step)
    if args.json:
        import json

        print(json.dumps(summary.as_dict(), indent=2))
    else:
        print("\n".join(summary.lines()))
    return 1 if summary.failed else 0
