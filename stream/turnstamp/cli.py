"""``turnstamp``: the command line.

Every subcommand has ``--help``. Bad input ends with one clear line naming the
field and value (exit status 2); our own bugs keep their traceback.
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
from pathlib import Path

from . import __version__
from .errors import InputError

__all__ = ["main"]


def _site_and_env(path):
    from pydantic import BaseModel, ConfigDict

    from .assemble import Environment
    from .config import SiteConfig, load_config

    class SiteFile(BaseModel):  # a site-only file, or a full service configuration
        model_config = ConfigDict(extra="ignore")
        site: SiteConfig

    if path is None:
        from .demo import DEMO_SITE

        return Environment.from_site(DEMO_SITE)
    return Environment.from_site(load_config(path, SiteFile).site)


def cmd_tag(args) -> int:
    from .core.timebase import Scale
    from .offline import default_target, tag_file

    env = _site_and_env(args.site)
    summary = tag_file(Path(args.events), Path(args.out), default_target(args.model, args.target),
                       env, Scale(args.scale), Path(args.table_cache) if args.table_cache else None,
                       progress=None if args.quiet else sys.stderr)
    print("\n".join(summary.lines()))
    return 0


def cmd_model(args) -> int:
    from .core.spin import spin_down_summary
    from .files.inputs import load_spin_model

    status = 0
    for path in args.models:
        model = load_spin_model(path)
        if args.action == "check":
            print(f"{path}: ok ({model.model_id}, phase reference {model.phase_reference_key()})")
            continue
        summary = spin_down_summary(model)
        target = model.target
        print(f"{model.model_id}: {target.name} "
              f"(ra {target.right_ascension_deg} deg, dec {target.declination_deg} deg)")
        units = {"frequency_hz": "Hz", "period_s": "s", "period_derivative": "s/s",
                 "spin_down_power_erg_per_s": "erg/s", "characteristic_age_yr": "yr",
                 "surface_dipole_field_gauss": "G", "braking_index": "",
                 "valid_from_mjd_tdb": "MJD (TDB)", "valid_until_mjd_tdb": "MJD (TDB)"}
        for key, value in summary.items():
            shown = "n/a" if value is None else (f"{value:.10g}" if isinstance(value, float)
                                                 else str(value))
            print(f"  {key.replace('_', ' '):32s} {shown} {units.get(key, '')}")
        extras = []
        if model.glitches:
            extras.append(f"{len(model.glitches)} glitch(es)")
        if model.binary is not None:
            extras.append(f"binary orbit ({model.binary.kind})")
        if model.timing_noise is not None:
            extras.append(f"{len(model.timing_noise.sine_cycles)} timing-noise harmonics")
        if extras:
            print("  also: " + ", ".join(extras))
    return status


def cmd_table(args) -> int:
    import numpy as np

    from .assemble import TableCache, build_target
    from .config import BarycentreConfig
    from .core.timebase import Scale, format_instant, parse_instant, to_tt
    from .offline import default_target

    env = _site_and_env(args.site)
    setup = build_target(default_target([args.model]))
    (start, stop), _ = to_tt(np.array([parse_instant(args.start), parse_instant(args.stop)]),
                             Scale.UTC, env.leaps)
    table = TableCache(Path(args.cache), env, BarycentreConfig()).table(
        setup.position, int(start), int(stop))
    print(f"table {format_instant(table.start_ns, 0)} to {format_instant(table.stop_ns, 0)} TT, "
          f"{table.coefficients.shape[1]} segments of {table.segment_ns / 6e10:.0f} min, "
          f"degree {table.degree}; cached in {args.cache}")
    for key, value in table.provenance.items():
        print(f"  {key}: {value}")
    return 0


def cmd_stack(args) -> int:
    from .core.periodicity import h_test
    from .core.stacking import stack_states
    from .core.timebinned import TimeBinnedMoments
    from .service.checkpoint import read_checkpoint

    states, labels = [], []
    for folder in args.folders:
        checkpoint = read_checkpoint(Path(folder))
        if checkpoint is None:
            raise InputError("folder", folder, "has no readable checkpoint.json")
        states.append(checkpoint["pipeline"])
        labels.append(str(folder))
    merged = stack_states(states, labels)
    for name, target in merged["targets"].items():
        print(f"{name}: {len(target['runs'])} run(s), phase reference {target['phase_reference']}")
        for recipe, state in zip(target["recipes"], target["moments"], strict=True):
            moments = TimeBinnedMoments.from_state(state).total()
            h = h_test(moments)
            print(f"  {recipe:12s} {moments.count:>12,} events  H = {h.statistic:10.1f} "
                  f"({h.harmonics} harmonics)  {h.sigma:6.2f} sigma")
    if args.out:
        Path(args.out).write_text(json.dumps(merged))
        print(f"stacked state written to {args.out}")
    return 0


def cmd_template(args) -> int:
    from .files.reader import read_stream

    rows = [r for r in read_stream(Path(args.output_dir), "profiles").to_pylist()
            if r["target"] == args.target and r["recipe"] == args.recipe]
    if not rows:
        raise InputError("target/recipe", f"{args.target}/{args.recipe}",
                         f"no profiles rows in {args.output_dir}")
    counts = rows[-1]["counts"]
    lines = [f"# binned template from {args.output_dir}, target {args.target}, recipe "
             f"{args.recipe}, {rows[-1]['events']} events",
             f'name = "{args.name or args.target}"',
             "binned_profile = [" + ", ".join(f"{c:.6g}" for c in counts) + "]"]
    Path(args.out).write_text("\n".join(lines) + "\n")
    from .files.inputs import load_template

    load_template(args.out)  # what we wrote must load
    print(f"template with {len(counts)} bins written to {args.out}")
    return 0


def cmd_bench(args) -> int:
    from .bench import main as bench_main

    return bench_main(args)


def cmd_schemas(args) -> int:
    from .schema_export import check_schemas, write_schemas

    if args.check:
        stale = check_schemas(Path(args.directory))
        for name in stale:
            print(f"out of date: {name}")
        return 1 if stale else 0
    for path in write_schemas(Path(args.directory)):
        print(path)
    return 0


def cmd_run(args) -> int:
    from .service.loop import run_service

    return run_service(Path(args.config))


def cmd_simulate(args) -> int:
    from .simulator import run_simulator

    return run_simulator(args)


def cmd_demo(args) -> int:
    from .demo_run import run_demo

    return run_demo(args)


def cmd_inspect(args) -> int:
    from .inspect import inspect_path

    print(inspect_path(Path(args.path), rows=args.rows, as_json=args.json))
    return 0


def cmd_report(args) -> int:
    from .views.report import report_main

    return report_main(args)


def cmd_watch(args) -> int:
    from .views.live import watch_main

    return watch_main(args)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="turnstamp",
        description="Barycentric phase tagging and live periodicity monitoring for "
                    "photon-counting telescopes.")
    parser.add_argument("--version", action="version", version=f"turnstamp {__version__}")
    parser.add_argument("-v", "--verbose", action="store_true", help="log more")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    p = sub.add_parser("demo", help="simulate a night and run the service on it, live")
    p.add_argument("--seconds", type=float, default=60.0, help="how long to run (default 60)")
    p.add_argument("--out", default="turnstamp-demo", help="output folder (default ./turnstamp-demo)")
    p.add_argument("--rate", type=float, default=20_000.0,
                   help="events per second from the simulated array (default 20000)")
    p.add_argument("--fault", default="none",
                   help="inject a clock fault: none, offset, step, scale, barycentre_sign, "
                        "drift, wobble")
    p.set_defaults(func=cmd_demo)

    p = sub.add_parser("run", help="run the service with a configuration file")
    p.add_argument("config", help="TOML configuration (see schemas/config.schema.json)")
    p.set_defaults(func=cmd_run)

    p = sub.add_parser("simulate", help="publish a simulated night over ZeroMQ")
    p.add_argument("--endpoint", default="tcp://127.0.0.1:5555")
    p.add_argument("--pattern", choices=["push", "pub"], default="push")
    p.add_argument("--bind", action="store_true", help="bind instead of connect")
    p.add_argument("--seconds", type=float, default=60.0, help="length of the night to send")
    p.add_argument("--rate", type=float, default=20_000.0, help="events per second")
    p.add_argument("--pulsed-fraction", type=float, default=0.01)
    p.add_argument("--speed", type=float, default=1.0,
                   help="night seconds per wall second (0: as fast as possible)")
    p.add_argument("--start", help="UTC start of the night (default: now)")
    p.add_argument("--fault", default="none")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--source", default="simulator")
    p.set_defaults(func=cmd_simulate)

    p = sub.add_parser("tag", help="tag a file of events offline (Arrow IPC or Parquet)")
    p.add_argument("events", help="input with event_id and time_ns columns")
    p.add_argument("--model", action="append", required=True,
                   help="spin model file (TOML/JSON); repeat for several validity windows")
    p.add_argument("--site", help="TOML with a [site] table (default: the demo site)")
    p.add_argument("--scale", default="UTC", choices=["UTC", "TAI", "GPS", "TT"],
                   help="time scale of time_ns (default UTC)")
    p.add_argument("--out", required=True, help="output .arrow or .parquet")
    p.add_argument("--target", help="target name written to the archive")
    p.add_argument("--table-cache", help="folder for cached barycentre tables")
    p.add_argument("--quiet", action="store_true", help="no progress line")
    p.set_defaults(func=cmd_tag)

    p = sub.add_parser("model", help="check spin models or show their spin-down summary")
    p.add_argument("action", choices=["show", "check"])
    p.add_argument("models", nargs="+")
    p.set_defaults(func=cmd_model)

    p = sub.add_parser("table", help="build (and cache) a barycentre table ahead of a night")
    p.add_argument("--model", required=True, help="spin model giving the target position")
    p.add_argument("--site", help="TOML with a [site] table (default: the demo site)")
    p.add_argument("--start", required=True, help="UTC, e.g. 2026-12-01T18:00:00")
    p.add_argument("--stop", required=True, help="UTC")
    p.add_argument("--cache", default="turnstamp-tables", help="cache folder")
    p.set_defaults(func=cmd_table)

    p = sub.add_parser("inspect", help="summarise an output file or folder")
    p.add_argument("path")
    p.add_argument("--rows", type=int, default=5, help="rows to show per file")
    p.add_argument("--json", action="store_true")
    p.set_defaults(func=cmd_inspect)

    p = sub.add_parser("report", help="night report (HTML + PNG) from an output folder")
    p.add_argument("output_dir")
    p.add_argument("--to", help="report folder (default OUTPUT_DIR/report)")
    p.add_argument("--every", type=float, help="regenerate every SECONDS (page reloads itself)")
    p.set_defaults(func=cmd_report)

    p = sub.add_parser("watch", help="live terminal view of a running service")
    p.add_argument("--endpoint", help="the service's PUB endpoint")
    p.add_argument("--folder", help="tail this output folder instead")
    p.add_argument("--once", action="store_true", help="draw once and exit")
    p.add_argument("--ascii", action="store_true", help="plain ASCII bars even on a terminal")
    p.set_defaults(func=cmd_watch)

    p = sub.add_parser("stack", help="stack the statistics of several nights' output folders")
    p.add_argument("folders", nargs="+", help="output folders (their checkpoint.json)")
    p.add_argument("--out", help="write the stacked state (JSON)")
    p.set_defaults(func=cmd_stack)

    p = sub.add_parser("template", help="make a binned template from a night's profile")
    p.add_argument("output_dir")
    p.add_argument("--target", required=True)
    p.add_argument("--recipe", default="all")
    p.add_argument("--name", help="template name (default: the target)")
    p.add_argument("--out", required=True, help="template file to write (.toml)")
    p.set_defaults(func=cmd_template)

    p = sub.add_parser("bench", help="benchmark the hot paths (not a test)")
    p.add_argument("--json", action="store_true", help="machine-readable output")
    p.add_argument("--quick", action="store_true", help="smaller sizes")
    p.add_argument("--service", action="store_true", help="also ZeroMQ -> Arrow end to end")
    p.add_argument("--soak", type=float, default=0.0, help="seconds of memory soak")
    p.set_defaults(func=cmd_bench)

    p = sub.add_parser("schemas", help="write the JSON/Arrow schemas (or check them)")
    p.add_argument("directory", nargs="?", default="schemas")
    p.add_argument("--write", action="store_true", help="(default) write the files")
    p.add_argument("--check", action="store_true", help="exit 1 if any file is out of date")
    p.set_defaults(func=cmd_schemas)
    return parser


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    logging.basicConfig(level=logging.INFO if args.verbose else logging.WARNING,
                        format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    from .files.bundled import ensure_offline

    ensure_offline()
    try:
        return args.func(args)
    except InputError as exc:
        print(f"turnstamp {args.command}: {exc}", file=sys.stderr)
        return 2
    except FileNotFoundError as exc:
        print(f"turnstamp {args.command}: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
