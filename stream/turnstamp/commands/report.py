"""``turnstamp report``: the night report (HTML + PNG) from an output folder."""

from __future__ import annotations

__all__ = ["add_parser", "run"]


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("report", help="night report (HTML + PNG) from an output folder")
    p.add_argument("output_dir")
    p.add_argument("--to", help="report folder (default OUTPUT_DIR/report)")
    p.add_argument("--every", type=float, help="regenerate every SECONDS (page reloads itself)")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..views.report import report_main

    return report_main(args)
