"""``turnstamp run``: the live service, with a configuration file."""

from __future__ import annotations

from pathlib import Path

__all__ = ["add_parser", "run"]


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("run", help="run the service with a configuration file")
    p.add_argument("config", help="TOML configuration (see schemas/config.schema.json)")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..service.loop import run_service

    return run_service(Path(args.config))
