"""``turnstamp report``: the night report (HTML + PNG) from an output folder."""

from __future__ import annotations

__all__ = ["add_parser", "run"]


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "report", help="night report (HTML + PNG) from an output folder",
        description="Build the night report of an output folder (the service's "
                    "output.directory, live or finished, or the folder of a turnstamp tag "
                    "output): one self-contained HTML page and each figure as a PNG.")
    p.add_argument("output_dir", metavar="OUTPUT_DIR", help="the output folder to report on")
    p.add_argument("--out-dir", metavar="DIR", help="report folder (default: OUTPUT_DIR/report)")
    p.add_argument("--every", type=float, metavar="SECONDS",
                   help="regenerate every SECONDS, the page reloading itself (default: once)")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..views.report import report_main

    return report_main(args)
