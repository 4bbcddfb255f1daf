"""``turnstamp stack``: stack the statistics of several nights' output folders."""

from __future__ import annotations

import json
from pathlib import Path

from ..errors import InputError

__all__ = ["add_parser", "run"]


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("stack",
                              help="stack the statistics of several nights' output folders")
    p.add_argument("folders", nargs="+", help="output folders (their checkpoint.arrow)")
    p.add_argument("--out", metavar="FILE",
                   help="write the stacked state to this JSON file (default: not written)")
    p.add_argument("--force", action="store_true", help="overwrite --out if it exists")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..core.periodicity import h_test
    from ..core.stacking import stack_states
    from ..core.timebinned import TimeBinnedMoments
    from ..service.checkpoint import read_checkpoint

    if args.out and Path(args.out).exists() and not args.force:
        raise InputError("--out", args.out, "exists; give --force to overwrite it")
    states, labels = [], []
    for folder in args.folders:
        checkpoint = read_checkpoint(Path(folder))
        if checkpoint is None:
            raise InputError("folder", folder, "has no readable checkpoint.arrow")
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
