"""Options and set-up shared by several commands, and the help formatter of them all.

The option names follow one convention across commands: ``--out FILE`` for one
output file, ``--out-dir DIR`` for an output folder, ``--table-cache DIR`` for the
barycentre table cache, ``--site FILE``, ``--model FILE`` (repeatable), ``--template
FILE``, ``--json``, ``--force``, ``--quiet`` and ``--time-scale``. Every option's help
states its default (``HelpFormatter`` adds it where the text does not).
"""

from __future__ import annotations

import argparse

from ..errors import InputError, loaded

__all__ = [
    "HelpFormatter",
    "add_site_option",
    "add_table_cache_option",
    "site_environment",
    "utc_instant",
    "utc_text",
    "positive_seconds",
    "TIME_EXAMPLE",
]

TIME_EXAMPLE = "a UTC calendar time like 2026-12-01T21:00:00"


class HelpFormatter(argparse.HelpFormatter):
    """States every option's default: flags "(default: off)", valued options
    "(default: VALUE)", unless the help already says what happens by default."""

    def _get_help_string(self, action: argparse.Action) -> str:
        text = action.help or ""
        if (not action.option_strings or action.required or "default" in text.lower()
                or action.default is argparse.SUPPRESS):
            return text
        if action.default is False:
            return f"{text} (default: off)"
        if action.default is None:
            return text
        return f"{text} (default: %(default)s)"


def add_site_option(parser: argparse.ArgumentParser) -> None:
    """``--site FILE`` (required): the observatory, never the demo site by accident."""
    parser.add_argument(
        "--site", required=True, metavar="FILE",
        help="TOML file with a [site] table (name, latitude_deg, longitude_deg, height_m), "
             "or a whole service configuration; required: a wrong site moves barycentric "
             "times by milliseconds")


def add_table_cache_option(parser: argparse.ArgumentParser, default: str | None) -> None:
    """``--table-cache DIR``: where barycentre tables are cached."""
    where = f"default: {default}" if default else "default: none, tables are built in memory"
    parser.add_argument("--table-cache", default=default, metavar="DIR",
                        help=f"folder of cached barycentre tables ({where})")


def site_environment(path: str):
    """The ``Environment`` (site tables) of the ``--site`` file."""
    from ..assemble import Environment
    from ..config import load_site

    return Environment.from_site(loaded("--site", load_site, path))


def utc_text(ns: int) -> str:
    """A UTC label (int ns since 2000-01-01T12:00:00) as 2026-12-01T21:04:05Z."""
    from ..core.timebase import format_instant

    return format_instant(ns, 0) + "Z"


def utc_instant(option: str, text: str) -> int:
    """A UTC calendar time given on the command line, as int ns since 2000-01-01T12:00:00
    (UTC labels); an ``InputError`` naming ``option`` and the value otherwise."""
    from ..core.timebase import parse_instant

    bare = text.strip()
    bare = bare[:-1] if bare.upper().endswith("Z") else bare  # 21:00:00Z is UTC too
    try:
        return parse_instant(bare)
    except (ValueError, OverflowError):
        raise InputError(option, text, f"not a time; give {TIME_EXAMPLE} "
                                       "(ISO 8601, UTC, seconds optional)") from None


def positive_seconds(option: str, value: float) -> float:
    """``value`` if it is a positive finite number of seconds, else an ``InputError``."""
    if not value > 0 or value == float("inf"):
        raise InputError(option, value, "must be a positive number of seconds")
    return value


_ORIGIN_HELP = ("what time_ns counts from: 2000-01-01T12:00:00, unix (1970-01-01), gps "
                "(1980-01-06) or any YYYY-MM-DDTHH:MM:SS in the time scale "
                "(default 2000-01-01T12:00:00)")


def add_event_file_options(parser: argparse.ArgumentParser) -> None:
    """What tagging a file of events needs: spin models, the site, the time convention."""
    parser.add_argument("--model", action="append", required=True, metavar="FILE",
                        help="spin model file (TOML/JSON); repeat for several validity "
                             "windows (required)")
    add_site_option(parser)
    parser.add_argument("--time-scale", default="UTC", choices=["UTC", "TAI", "GPS", "TT"],
                        help="time scale of time_ns (default UTC)")
    parser.add_argument("--time-origin", default="2000-01-01T12:00:00", metavar="ORIGIN",
                        help=_ORIGIN_HELP)
    parser.add_argument("--time-unit", choices=["ns", "us", "ms", "s"],
                        help="unit of time_ns (default ns; saying ns also accepts times "
                             "within 40 days of the origin)")
    parser.add_argument("--target", help="target name written to the archive (default: "
                                         "the model's target name)")


def event_file_job(args):
    """What ``add_event_file_options`` asked for, loaded: (target setup, site environment,
    time scale, time convention)."""
    from ..core.timebase import Scale
    from ..files.inputs import load_spin_model
    from ..tagging.run import offline_target
    from ..tagging.times import TimeConvention

    setup = offline_target([loaded("--model", load_spin_model, m) for m in args.model],
                           args.target)
    return (setup, site_environment(args.site), Scale(args.time_scale),
            TimeConvention(args.time_origin, args.time_unit))
