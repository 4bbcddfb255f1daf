"""``turnstamp clock``: the clock-chain check of a finished night, from its archive."""

from __future__ import annotations

from .common import add_site_option

__all__ = ["add_parser", "run"]


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "clock", help="check the clock chain of a night from its archive (offline-tagged "
                      "file or service output folder)")
    p.add_argument("archive", help="archive file (.arrow or .parquet) from 'turnstamp tag', or "
                                   "a service output folder holding archive-*.arrows")
    p.add_argument("--model", action="append", required=True, metavar="[TARGET=]FILE",
                   help="spin model (TOML/JSON); repeat for several validity windows; with "
                        "several targets in the archive write TARGET=FILE (required)")
    p.add_argument("--template", action="append", required=True, metavar="[TARGET=]FILE",
                   help="pulse template (TOML/JSON); TARGET=FILE for each of several targets "
                        "(required)")
    add_site_option(p)
    p.add_argument("--recipe", help="recipe whose events are checked (default: the first)")
    p.add_argument("--chunk-seconds", type=float, default=60.0,
                   help="chunk length in seconds, a multiple of 10 (default 60)")
    p.add_argument("--tolerance-cycles", type=float, default=0.02,
                   help="largest acceptable phase error in cycles (default 0.02)")
    p.add_argument("--tolerance-us", type=float,
                   help="also a limit in microseconds (default: none)")
    p.add_argument("--no-weights", action="store_true",
                   help="ignore photon weights (default: use them when any differs from 1)")
    p.add_argument("--table-cache", help="folder for cached barycentre tables (default: none)")
    p.add_argument("--json", action="store_true", help="machine-readable output on stdout")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(run=run)


def _assigned(values: list[str], option: str) -> dict[str | None, list[str]]:
    """``[TARGET=]FILE`` values grouped by target (None: no target named)."""
    out: dict[str | None, list[str]] = {}
    for value in values:
        name, sep, path = value.partition("=")
        key = name if sep and path else None
        out.setdefault(key, []).append(path if key is not None else value)
    if None in out and len(out) > 1:
        from ..errors import InputError

        raise InputError(option, values, "give every file as TARGET=FILE, or none")
    return out


def _targets(args, present: list[str]):
    """Models and template per target, from the options and the archive's targets."""
    from pathlib import Path

    from ..archiveclock import TargetFiles
    from ..errors import InputError

    models, templates = _assigned(args.model, "--model"), _assigned(args.template, "--template")
    if None in models or None in templates:
        if len(present) != 1:
            raise InputError("--model/--template", args.model + args.template,
                             f"the archive holds several targets {present}: write TARGET=FILE")
        only = present[0]
        models = {only: models.get(None, models.get(only, []))}
        templates = {only: templates.get(None, templates.get(only, []))}
    out = {}
    for name in sorted(set(models) | set(templates)):
        if name not in models or name not in templates or len(templates[name]) != 1:
            raise InputError("--model/--template", name,
                             "each target needs its spin model(s) and exactly one template")
        out[name] = TargetFiles(tuple(Path(m) for m in models[name]), Path(templates[name][0]))
    return out


def run(args) -> int:
    import io
    import json
    from pathlib import Path

    import pyarrow as pa
    import pyarrow.compute as pc

    from ..archiveclock import check_archive, read_archive
    from ..core.clock.check import CheckSettings
    from ..core.timebase import NS_PER_S
    from ..errors import InputError, loaded
    from ..files.inputs import load_spin_model, load_template
    from ..views.progress import progress
    from .common import site_environment

    if not (args.chunk_seconds >= 10 and args.chunk_seconds % 10 == 0):
        raise InputError("--chunk-seconds", args.chunk_seconds, "must be a multiple of 10 s")
    archive = Path(args.archive)
    rows = read_archive(archive)
    present = sorted(pc.unique(rows["target"].cast(pa.string())).to_pylist())
    targets = _targets(args, present)
    for files in targets.values():  # each file checked now, named by its option
        for model in files.models:
            loaded("--model", load_spin_model, model)
        loaded("--template", load_template, files.template)
    settings = CheckSettings(int(args.chunk_seconds * NS_PER_S), args.tolerance_cycles,
                             args.tolerance_us)
    env = site_environment(args.site)
    quiet = io.StringIO() if args.quiet or args.json else None
    with progress("folding the archive", stream=quiet) as advance:
        check = check_archive(archive, targets, env, recipe=args.recipe, settings=settings,
                              table_cache=Path(args.table_cache) if args.table_cache else None,
                              weighted=False if args.no_weights else None, advance=advance,
                              table=rows)
    if args.json:
        print(json.dumps(check.to_dict(), indent=2, allow_nan=False))
        return 0
    for target, recipe, verdict, _ in check.results:
        print(f"{target} ({recipe}):")
        print("\n".join(f"  {line}" for line in verdict.lines))
    if check.joint is not None:
        print("all targets:")
        print("\n".join(f"  {line}" for line in check.joint.lines))
    return 0
