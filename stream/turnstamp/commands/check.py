"""``turnstamp check CONFIG``: is this configuration ready, and what will tonight look like?

Reads the configuration as ``turnstamp run`` would, then loads every spin model,
template and site table it names and sets them against tonight: the night at the
site from local mean noon to the next (``--night`` picks the date; a space-borne
site uses UTC noon). It prints the site, where the service will listen and write,
each target's models and validity windows against tonight, the barycentre-table
coverage and the ephemeris range, then the warnings (tonight's phases usable but
worth knowing about) and the problems (tonight's phases would be wrong, missing or
left out of the statistics). Exit status 0: ready; 1: problems; 2: the
configuration itself is invalid.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path

__all__ = ["add_parser", "run", "Findings", "tonight", "check_config"]

HOUR_NS = 3_600_000_000_000
DAY_NS = 24 * HOUR_NS
TT_MINUS_UTC_NS = 69_184_000_000  # since 2017; only to show a gap to the minute
_KEV_PER_UNIT = (("PeV", 1e12), ("TeV", 1e9), ("GeV", 1e6), ("MeV", 1e3), ("keV", 1.0),
                 ("eV", 1e-3))


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "check", help="check a configuration and show what tonight will look like",
        description="Validate a service configuration with its spin models, templates and "
                    "site tables, and show tonight: targets, validity windows against "
                    "tonight, barycentre-table coverage, warnings and problems. Exit status "
                    "0: ready, 1: problems found, 2: the configuration is invalid.")
    p.add_argument("config", help="TOML configuration of turnstamp run")
    p.add_argument("--night", metavar="DATE",
                   help="the night that starts on this date, YYYY-MM-DD (default: the "
                        "current night at the site, or the coming one after local noon)")
    p.add_argument("--json", action="store_true", help="machine-readable output on stdout")
    p.set_defaults(run=run)


@dataclass
class Findings:
    """What the check found: lines to show, warnings, problems, and the facts as data."""

    lines: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    problems: list[str] = field(default_factory=list)
    facts: dict = field(default_factory=dict)


def run(args) -> int:
    from ..config import load_config

    config = load_config(args.config)
    findings = check_config(config, tonight(config.site, args.night))
    if args.json:
        print(json.dumps({"config": str(args.config), **findings.facts,
                          "warnings": findings.warnings, "problems": findings.problems,
                          "ready": not findings.problems}, indent=2, default=str))
    else:
        print(f"configuration {args.config}: valid")
        print("\n".join(findings.lines))
        _print_list("warnings", findings.warnings)
        _print_list("problems", findings.problems)
        print("ready for tonight" if not findings.problems else
              f"not ready: {len(findings.problems)} problem(s) above")
    return 1 if findings.problems else 0


def _print_list(title: str, items: list[str]) -> None:
    if items:
        print(f"{title}:")
        print("\n".join(f"  ! {item}" for item in items))


def tonight(site, night: str | None, now_unix: float | None = None) -> tuple[int, int]:
    """Tonight at the site as (start, stop), UTC labels in ns since 2000-01-01T12:00:00:
    local mean noon to the next (UTC noon without a longitude)."""
    import time

    from ..core.timebase import unix_to_ns
    from .common import utc_instant

    east_deg = site.longitude_deg or 0.0
    east_deg = east_deg - 360.0 if east_deg > 180.0 else east_deg
    noon_offset = int(round(-east_deg / 15.0 * HOUR_NS))  # local noon - UTC noon
    if night is not None:  # UTC midnight + 12 h = UTC noon
        start = utc_instant("--night", night[:10]) + DAY_NS // 2 + noon_offset
        return start, start + DAY_NS
    now = unix_to_ns(time.time() if now_unix is None else now_unix)
    # the epoch of the ns count is UTC noon: local noons fall on noon_offset + k days
    start = ((now - noon_offset) // DAY_NS) * DAY_NS + noon_offset  # the last local noon
    return start, start + DAY_NS


def check_config(config, night: tuple[int, int]) -> Findings:
    """Every check of ``turnstamp check`` against the ``night`` (UTC label ns)."""
    from .common import utc_text

    found = Findings()
    found.facts["tonight_utc"] = [utc_text(night[0]), utc_text(night[1])]
    env = _site(config.site, found)
    found.lines.append(f"tonight: {utc_text(night[0])} to {utc_text(night[1])} (local mean "
                       "noon to noon at the site)")
    _service(config, found)
    if env is not None:
        tt = _night_tt(env, night)
        _tables(config, env, tt, found)
        found.lines.append("targets:")
        for target in config.targets:
            _target(target, tt, found)
    return found


def _night_tt(env, night: tuple[int, int]) -> tuple[int, int]:
    import numpy as np

    from ..core.timebase import Scale, to_tt

    tt, _ = to_tt(np.array(night, np.int64), Scale.UTC, env.leaps)
    return int(tt[0]), int(tt[1])


def _site(site, found: Findings):
    """The site's tables (None when they cannot be loaded: a problem)."""
    from ..assemble import Environment

    if site.orbit_file is not None:
        where = f"orbit table {site.orbit_file}"
    else:
        where = (f"latitude {site.latitude_deg} deg, longitude {site.longitude_deg} deg east, "
                 f"height {site.height_m} m")
    try:
        env = Environment.from_site(site)
    except (ValueError, OSError) as exc:
        found.problems.append(f"site {site.name}: {exc}")
        return None
    chain = "; ".join(c.name for c in env.clock_chain) or "none"
    found.lines.append(f"site {site.name}: {where}; clock chain: {chain}")
    found.facts["site"] = site.model_dump(mode="json")
    return env


def _service(config, found: Findings) -> None:
    intake = config.intake
    verb = "binds" if intake.bind else "connects to"
    found.lines.append(f"intake: {intake.pattern}, {verb} {', '.join(intake.endpoints)}")
    for endpoint in intake.endpoints if intake.bind else ():
        _port_free(endpoint, "intake.endpoints", found)
    publish = config.output.publish_endpoint
    found.lines.append(f"live updates: {publish} (turnstamp watch --endpoint {publish})"
                       if publish else "live updates: none (set output.publish_endpoint for "
                       "turnstamp watch --endpoint); turnstamp watch --folder works")
    if config.control.endpoint:
        found.lines.append(f"control: {config.control.endpoint}")
    from ..service.sockets import beyond_loopback

    found.warnings += beyond_loopback(config)
    _output_folder(Path(config.output.directory), found)
    found.facts["endpoints"] = {"intake": list(intake.endpoints), "publish": publish,
                                "control": config.control.endpoint}


def _port_free(endpoint: str, field_name: str, found: Findings) -> None:
    """Warn when a tcp endpoint to bind is taken already (a service running?)."""
    import socket

    if not endpoint.startswith("tcp://"):
        return
    host, _, port = endpoint[6:].rpartition(":")
    if not port.isdigit() or host in ("*", ""):
        return
    with socket.socket() as probe:
        try:
            probe.bind((host, int(port)))
        except OSError as exc:
            found.warnings.append(f"{field_name}: {endpoint} cannot be bound now ({exc.strerror});"
                                  " is a service already running there?")


def _output_folder(folder: Path, found: Findings) -> None:
    existing = next((p for p in (folder, *folder.parents) if p.exists()), folder)
    writable = os.access(existing, os.W_OK)
    state = ("exists" if folder.exists() else f"will be created in {existing}") + \
        (", writable" if writable else ", NOT writable")
    found.lines.append(f"output: {folder} ({state})")
    if not writable:
        found.problems.append(f"output.directory = {str(folder)!r}: {existing} is not "
                              "writable by this user")
    elif folder.exists() and any(folder.glob("ledger-*.arrow*")):
        found.warnings.append(f"output.directory = {str(folder)!r} holds an earlier run: the "
                              "service resumes it (counts and statistics continue)")


def _tables(config, env, tt: tuple[int, int], found: Findings) -> None:
    from ..core.timebase import NS_PER_DAY

    cover = config.barycentre
    if cover.cover_from or cover.cover_until:
        found.lines.append(f"barycentre tables: fixed coverage {cover.cover_from or 'now - '}"
                           f"{'' if cover.cover_from else cover.hours_before} to "
                           f"{cover.cover_until or 'now + '}"
                           f"{'' if cover.cover_until else cover.hours_after} (UTC)")
        _fixed_cover(cover, tt, found)
    else:
        found.lines.append(f"barycentre tables: built at start for now - {cover.hours_before:g} h"
                           f" to now + {cover.hours_after:g} h, extended ahead while running")
    _ephemeris(env, tt, found)
    mjd = 51_544.5 + tt[1] / NS_PER_DAY
    if mjd > env.orientation.last_mjd:
        found.warnings.append(f"the Earth-orientation table ends at MJD "
                              f"{env.orientation.last_mjd:.0f}, before tonight ends: "
                              "barycentric times off by up to ~1.4 µs (set "
                              "site.earth_orientation_file to a newer IERS finals2000A file)")
    if mjd > env.leaps.expires_mjd:
        found.warnings.append(f"the leap-second table expired at MJD {env.leaps.expires_mjd}: a "
                              "leap second announced since would be missed (update "
                              "astropy-iers-data)")
    for link in env.clock_chain:
        if tt[0] < link.instants_ns[0] or tt[1] > link.instants_ns[-1]:
            found.warnings.append(f"clock correction {link.name!r} does not cover all of "
                                  "tonight: its end value is held (events flagged "
                                  "CLOCK_CORRECTION_EXTRAPOLATED)")


def _fixed_cover(cover, tt: tuple[int, int], found: Findings) -> None:
    from .common import utc_instant

    start = utc_instant("barycentre.cover_from", cover.cover_from) if cover.cover_from else None
    stop = utc_instant("barycentre.cover_until", cover.cover_until) if cover.cover_until \
        else None
    if (start is not None and start > tt[1]) or (stop is not None and stop < tt[0]):
        found.problems.append("barycentre.cover_from/cover_until leave tonight uncovered: "
                              "every event would be rejected as outside_table_coverage")
    elif (start is not None and start > tt[0]) or (stop is not None and stop < tt[1]):
        found.warnings.append("barycentre.cover_from/cover_until cover only part of tonight: "
                              "events outside are rejected as outside_table_coverage")


def _ephemeris(env, tt: tuple[int, int], found: Findings) -> None:
    """Whether the planetary ephemeris covers tonight (its error states its range)."""
    import numpy as np

    jd = 2_451_545.0 + np.array(tt, float) / DAY_NS
    try:
        env.ephemeris.posvel("earth", jd, np.zeros(2))
    except Exception as exc:  # jplephem's OutOfRangeError states the kernel's range
        found.problems.append(f"planetary ephemeris ({env.ephemeris.name}) does not cover "
                              f"tonight: {exc}")
        return
    found.lines.append(f"ephemeris: {env.ephemeris.name}, covers tonight")


def _target(target, tt: tuple[int, int], found: Findings) -> None:
    from ..core.spin import digit_warnings
    from ..errors import loaded
    from ..files.inputs import load_spin_model, load_template

    found.lines.append(f"  {target.name}:")
    models = []
    for path in target.models:
        try:
            models.append(loaded(f"targets.{target.name}.models", load_spin_model, path))
        except (ValueError, OSError) as exc:
            found.problems.append(f"target {target.name}: {exc}")  # names the file
    for model in models:
        found.lines.append("    " + _validity_line(model, tt))
        found.warnings.extend(digit_warnings(model))
    if models:
        _covered(target.name, models, tt, found)
    if target.template is None:
        found.lines.append("    no template: no clock-chain check for this target")
    else:
        try:
            template = loaded(f"targets.{target.name}.template", load_template,
                              target.template)
            recipe = target.clock_check_recipe or target.recipes[0].name
            found.lines.append(f"    template {template.name}: clock-chain check on recipe "
                               f"{recipe}")
        except (ValueError, OSError) as exc:
            found.problems.append(f"target {target.name}: {exc}")
    found.lines.append("    recipes: " + "; ".join(_recipe_text(r) for r in target.recipes))


def _mjd_tt_ns(mjd) -> int:
    """An MJD (TDB) as TT ns since 2000-01-01T12:00:00 (TDB - TT < 2 ms: enough here)."""
    from decimal import Decimal

    return int((Decimal(mjd) - Decimal("51544.5")) * DAY_NS)


def _validity_line(model, tt: tuple[int, int]) -> str:
    from .common import utc_text

    start, stop = (_mjd_tt_ns(model.validity.start_mjd_tdb),
                   _mjd_tt_ns(model.validity.end_mjd_tdb))
    if stop < tt[0]:
        verdict = "ENDED before tonight"
    elif start > tt[1]:
        verdict = "STARTS after tonight"
    elif start <= tt[0] and stop >= tt[1]:
        verdict = "covers tonight"
    else:
        verdict = "covers PART of tonight"
    return (f"model {model.model_id} ({model.target.name}, {model.frequency_hz} Hz): valid "
            f"{utc_text(start)[:10]} to {utc_text(stop)[:10]} (MJD "
            f"{model.validity.start_mjd_tdb} to {model.validity.end_mjd_tdb} TDB): {verdict}")


def _covered(name: str, models, tt: tuple[int, int], found: Findings) -> None:
    """A problem when no model is valid for part or all of tonight."""
    from .common import utc_text

    windows = sorted((max(_mjd_tt_ns(m.validity.start_mjd_tdb), tt[0]),
                      min(_mjd_tt_ns(m.validity.end_mjd_tdb), tt[1])) for m in models)
    gaps, reached = [], tt[0]
    for start, stop in windows:
        if start > reached:
            gaps.append((reached, start))
        reached = max(reached, stop)
    if reached < tt[1]:
        gaps.append((reached, tt[1]))
    if not gaps:
        return
    which = "any" if gaps == [tt] else "part"
    where = "" if which == "any" else " (" + ", ".join(
        f"{utc_text(a - TT_MINUS_UTC_NS)} to {utc_text(b - TT_MINUS_UTC_NS)}"
        for a, b in gaps) + ", to the minute)"
    found.problems.append(f"target {name}: no spin model is valid for {which} of tonight"
                          f"{where}: its events would be tagged outside the validity window "
                          "and left out of the statistics; add a model valid tonight")


def _recipe_text(recipe) -> str:
    cuts = []
    if recipe.energy_min is not None:
        cuts.append(f"energy >= {_energy_text(recipe.energy_min)}")
    if recipe.energy_max is not None:
        cuts.append(f"energy <= {_energy_text(recipe.energy_max)}")
    if recipe.max_distance_deg is not None:
        cuts.append(f"within {recipe.max_distance_deg:g} deg")
    if recipe.min_score is not None:
        cuts.append(f"score >= {recipe.min_score:g}")
    if recipe.use_weights:
        cuts.append("weighted")
    return recipe.name + (f" ({', '.join(cuts)})" if cuts else " (every event)")


def _energy_text(kev: float) -> str:
    """An energy in keV in the largest unit that keeps it >= 1 ("1 TeV")."""
    for unit, scale in _KEV_PER_UNIT:
        if abs(kev) >= scale:
            return f"{kev / scale:g} {unit}"
    return f"{kev * 1e3:g} eV"
