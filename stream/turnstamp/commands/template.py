"""``turnstamp template``: a binned pulse template from a night's profile."""

from __future__ import annotations

from pathlib import Path

from ..errors import InputError

__all__ = ["add_parser", "run"]


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("template", help="make a binned template from a night's profile")
    p.add_argument("output_dir", metavar="OUTPUT_DIR", help="an output folder with profiles")
    p.add_argument("--target", required=True, help="target whose profile to use")
    p.add_argument("--recipe", default="all", help="recipe whose profile to use")
    p.add_argument("--name", help="template name (default: the target)")
    p.add_argument("--out", required=True, metavar="FILE", help="template file to write (.toml)")
    p.add_argument("--force", action="store_true", help="overwrite --out if it exists")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..files.inputs import load_template
    from ..files.reader import read_stream

    if Path(args.out).exists() and not args.force:
        raise InputError("--out", args.out, "exists; give --force to overwrite it")
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
    load_template(args.out)  # what we wrote must load
    print(f"template with {len(counts)} bins written to {args.out}")
    return 0
