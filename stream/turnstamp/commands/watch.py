"""``turnstamp watch``: the live terminal view of a running service."""

from __future__ import annotations

__all__ = ["add_parser", "run"]


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("watch", help="live terminal view of a running service")
    p.add_argument("--endpoint", help="the service's PUB endpoint")
    p.add_argument("--folder", help="tail this output folder instead")
    p.add_argument("--once", action="store_true", help="draw once and exit")
    p.add_argument("--ascii", action="store_true", help="plain ASCII bars even on a terminal")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..views.live import watch_main

    return watch_main(args)
