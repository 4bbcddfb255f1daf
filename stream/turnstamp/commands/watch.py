"""``turnstamp watch``: the live terminal view of a running service."""

from __future__ import annotations

__all__ = ["add_parser", "run"]


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "watch", help="live terminal view of a running service",
        description="Show the service's status live: from its PUB endpoint "
                    "(output.publish_endpoint; the demo prints it) or by re-reading its output "
                    "folder's status.json. Ctrl-C to leave.")
    p.add_argument("--endpoint", help="the service's PUB endpoint, e.g. tcp://127.0.0.1:5556 "
                                      "(default: none; give this or --folder)")
    p.add_argument("--folder", metavar="DIR",
                   help="tail this output folder's status.json instead (default: none)")
    p.add_argument("--once", action="store_true", help="draw once and exit")
    p.add_argument("--wait", type=float, default=10.0, metavar="SECONDS",
                   help="with --once: how long to wait for a first status before giving up")
    p.add_argument("--ascii", action="store_true", help="plain ASCII text even on a terminal")
    p.set_defaults(run=run)


def run(args) -> int:
    import re

    from ..errors import InputError
    from ..views.live import watch_main
    from .common import positive_seconds

    positive_seconds("--wait", args.wait)
    if args.endpoint and not re.match(r"^(tcp|ipc|inproc)://\S+$", args.endpoint):
        raise InputError("--endpoint", args.endpoint, "not a ZeroMQ endpoint like "
                                                      "tcp://127.0.0.1:5556")
    return watch_main(args)
