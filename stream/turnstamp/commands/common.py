"""Options and set-up shared by several commands."""

from __future__ import annotations

__all__ = ["add_site_option", "site_environment"]


def add_site_option(parser) -> None:
    """``--site FILE``: a TOML file with a [site] table (or a whole configuration)."""
    parser.add_argument("--site", help="TOML with a [site] table (default: the demo site)")


def site_environment(path):
    """The ``Environment`` (site tables) of ``--site``, or of the demo site without it."""
    from ..assemble import Environment
    from ..config import load_site
    from ..demo import DEMO_SITE

    return Environment.from_site(DEMO_SITE if path is None else load_site(path))
