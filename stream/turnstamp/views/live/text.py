"""The status as plain text: the screen of ``turnstamp watch`` when its output is not
a terminal (a pipe, a log, a test) or with ``--ascii``, and the summary of the demo.

No escape codes; ASCII only unless Unicode blocks are asked for. Lines longer than
the width are cut with an ellipsis. ``render_status`` is the entry point; with
``color=True`` it returns the rich screen (``screen.py``) as ANSI text instead.
"""

from __future__ import annotations

import math

from .fields import (
    adds_up,
    ascii_text,
    count_text,
    counters,
    last_sequence,
    mapping,
    number_text,
    problems_text,
    sigma_text,
    time_text,
    unusable_text,
    window_labels,
)

__all__ = ["BLOCKS", "ASCII_LEVELS", "PROFILE_ROWS", "render_status", "profile_bars", "bar_heights"]

BLOCKS = " ▁▂▃▄▅▆▇█"
"""Eighth-height block characters for the profile bar chart (index = eighths filled)."""
ASCII_LEVELS = " .:#"
"""The plain-ASCII fallback (index = quarters filled, rounded)."""
PROFILE_ROWS = 5
"""Default height of each profile's bar chart, lines."""
_MAX_WARNINGS = 8


class _Glyphs:
    """The symbols of one rendering: Unicode or ASCII."""

    def __init__(self, unicode: bool):
        self.unicode = unicode
        self.sigma = "σ" if unicode else "sigma"
        self.dash = "—" if unicode else "-"
        self.ellipsis = "…" if unicode else "..."
        self.bullet = "●" if unicode else "*"


def profile_bars(counts, rows: int = PROFILE_ROWS, width: int = 80,
                 blocks: bool = True) -> list[str]:
    """A pulse profile over two cycles as a text bar chart.

    Parameters
    ----------
    counts : sequence of float
        Counts per phase bin over one cycle (bins of equal width on [0, 1)).
    rows : int
        Height in lines.
    width : int
        Most columns to use; adjacent bins are summed until two cycles fit.
    blocks : bool
        Eighth-height Unicode blocks (True) or ASCII levels ``" .:#"``.

    Returns
    -------
    list of str
        ``rows`` lines of bars, then an axis line marking phases 0, 1 and 2 and a
        line of labels. The lowest bin fills one row and the highest all of them
        (bars do not start at zero, so that a pulse on a large background shows);
        the caller prints the range.
    """
    heights = bar_heights(counts, rows, width)
    if not heights:
        return []
    lines = []
    for row in range(rows - 1, -1, -1):
        fills = [min(max(h - row, 0.0), 1.0) for h in heights]
        if blocks:
            lines.append("".join(BLOCKS[int(round(f * 8))] for f in fills))
        else:
            lines.append("".join(ASCII_LEVELS[int(round(f * 3))] for f in fills))
    n = len(heights)
    axis = ["-"] * n
    labels = [" "] * (n + 1)
    for position, text in ((0, "0"), (n // 2, "1"), (n - 1, "2")):
        axis[position] = "+"
        labels[position] = text
    lines.append("".join(axis))
    lines.append("".join(labels).rstrip())
    return lines


def bar_heights(counts, rows: int, width: int) -> list[float]:
    """Bar heights in rows (1 for the lowest bin, ``rows`` for the highest) over two
    cycles, adjacent bins summed until two cycles fit ``width`` columns."""
    values = [float(v) for v in counts if isinstance(v, (int, float))
              and math.isfinite(float(v))]
    if not values:
        return []
    merge = 1
    while 2 * math.ceil(len(values) / merge) > max(width, 2) and merge < len(values):
        merge += 1
    series = [sum(values[i:i + merge]) for i in range(0, len(values), merge)] * 2
    low, high = min(series), max(series)
    span = high - low
    # the lowest bin fills one row, the highest all rows: the shape shows on any background
    return [1.0 + (v - low) / span * (rows - 1) if span > 0 else float(rows) for v in series]


def render_status(status: dict, width: int = 100, color: bool = False, *,
                  blocks: bool | None = None, note: str | None = None,
                  profile_rows: int = PROFILE_ROWS) -> str:
    """One screen of text from a service status (``status.json`` / the PUB message).

    Parameters
    ----------
    status : dict
        The status; any key may be missing or null.
    width : int
        Columns; longer lines are cut.
    color : bool
        False: plain text, no escape codes. True: the rich screen (panels, tables,
        bars) rendered at ``width`` as text with ANSI styles.
    blocks : bool, optional
        Plain text only: Unicode (block characters, σ) or plain ASCII (default).
    note : str, optional
        An extra line under the header (for example how old the update is).
    profile_rows : int
        Plain text only: height of each profile's bar chart in lines (0: no bars).

    Returns
    -------
    str
        The screen, lines joined by newlines, no trailing newline.
    """
    if color:
        from .screen import screen_text

        return screen_text(status, width=width, note=note)
    glyphs = _Glyphs(bool(blocks))
    width = max(int(width), 40)
    status = mapping(status)
    lines = [_header(status, glyphs), *([note] if note else []), *_totals(status)]
    for target in status.get("targets") or []:
        if isinstance(target, dict):
            lines += ["", *_target_lines(target, width, glyphs, profile_rows)]
    warnings = [str(w) for w in status.get("warnings") or []]
    if warnings:
        lines += ["", "warnings:", *("  ! " + w for w in warnings[-_MAX_WARNINGS:])]
    if not glyphs.unicode:
        lines = [ascii_text(line) for line in lines]
    return "\n".join(_fit(line, width, glyphs) for line in lines)


def _fit(line: str, width: int, glyphs: _Glyphs) -> str:
    """Cut a line to ``width`` characters, ending in an ellipsis when cut."""
    if len(line) <= width:
        return line
    return line[:max(width - len(glyphs.ellipsis), 0)] + glyphs.ellipsis


def _header(status: dict, glyphs: _Glyphs) -> str:
    header = f"turnstamp {glyphs.bullet} {status.get('state') or 'unknown'}"
    if status.get("started_utc"):
        header += f"   started {status['started_utc']}"
    updated = time_text(status.get("computed_at_utc_ns"))
    if updated:
        header += f"   updated {updated}"
    if status.get("trials") is not None:
        header += f"   trials {count_text(status.get('trials'))}"
    return header


def _totals(status: dict) -> list[str]:
    """The events (and whether they add up), rates, messages, reasons and sources."""
    numbers = counters(status)
    received, tagged, filtered, rejected = (count_text(numbers.get(k)) for k in (
        "events_received", "events_tagged", "events_filtered", "events_rejected"))
    events = (f"events   {received} received = {tagged} tagged + {filtered} filtered + "
              f"{rejected} rejected")
    balance = adds_up(numbers)
    if balance is not None:
        events += "  (adds up)" if balance else "  (DOES NOT ADD UP)"
    lines = [events, (
        f"rate     {number_text(status.get('events_per_s'), 1)} events/s (last 10 s)   "
        f"messages {count_text(numbers.get('messages_received'))} received, "
        f"{count_text(numbers.get('messages_rejected'))} refused, "
        f"{count_text(numbers.get('missing_messages'))} missing, "
        f"{count_text(numbers.get('duplicate_messages'))} duplicate")]
    reasons = mapping(status.get("rejected_by_reason"))
    if reasons:
        lines.append("rejected: " + ", ".join(f"{k} {count_text(v)}"
                                              for k, v in sorted(reasons.items())))
    problems = problems_text(status)
    if problems:
        lines.append(problems)
    sources = mapping(status.get("sources"))
    if sources:
        lines.append("sources  " + "; ".join(_source_text(name, mapping(s))
                                              for name, s in sorted(sources.items())))
    return lines


def _source_text(name: str, source: dict) -> str:
    return (f"{name}: {count_text(source.get('messages'))} messages, "
            f"{count_text(source.get('events'))} events, "
            f"last sequence {count_text(last_sequence(source))}, "
            f"missing {count_text(source.get('missing'))}")


def _target_lines(target: dict, width: int, glyphs: _Glyphs, rows: int) -> list[str]:
    head = str(target.get("name") or "?")
    if target.get("frequency_hz") is not None:
        head += f"   {number_text(target.get('frequency_hz'), 6)} Hz"
    if target.get("model_ids"):
        head += "   models " + ", ".join(str(m) for m in target["model_ids"])
    lines = [head]
    unusable = unusable_text(target)
    for recipe in target.get("recipes") or []:
        if isinstance(recipe, dict):
            lines += _recipe_lines(recipe, width, glyphs, rows, unusable)
    lines += _clock_lines(target.get("clock"), glyphs)
    return lines


def _recipe_lines(recipe: dict, width: int, glyphs: _Glyphs, rows: int,
                  unusable: str | None = None) -> list[str]:
    weighting = "weighted" if recipe.get("weighted") else "unweighted"
    rate = recipe.get("events_per_s")
    lines = [f"  recipe {recipe.get('name', '?')} ({weighting}): "
             f"{count_text(recipe.get('events'))} events"
             + (f", {number_text(rate, 1)} events/s" if rate is not None else "")]
    lines += _window_lines(mapping(recipe.get("windows")), glyphs)
    profile = mapping(recipe.get("profile"))
    counts = [c for c in profile.get("counts") or [] if isinstance(c, (int, float))]
    if counts and any(c > 0 for c in counts) and rows > 0:
        unit = "weighted counts" if recipe.get("weighted") else "events"
        lines.append(f"    profile, two cycles ({len(counts)} bins; {unit} per bin from "
                     f"{number_text(min(counts), 1)} (one row) to "
                     f"{number_text(max(counts), 1)})")
        lines += ["    " + bar for bar in profile_bars(counts, rows=rows, width=width - 6,
                                                       blocks=glyphs.unicode)]
    elif recipe.get("profile") is not None:
        lines.append(f"    profile: {unusable or 'no events yet'}")
    return lines


def _window_lines(windows: dict, glyphs: _Glyphs) -> list[str]:
    if not windows:
        return []
    s = glyphs.sigma
    lines = [f"    {'window':<12}{'events':>12}{'H':>10}{'harm.':>7}"
             f"{s + ' pre':>12}{s + ' post-trials':>20}"]
    for label in window_labels(windows):
        w = windows[label]
        if isinstance(w, dict):
            lines.append(f"    {label:<12}{count_text(w.get('events')):>12}"
                         f"{number_text(w.get('h'), 1):>10}{count_text(w.get('harmonics')):>7}"
                         f"{sigma_text(w.get('sigma')):>12}"
                         f"{sigma_text(w.get('sigma_post_trials')):>20}")
    return lines


def _clock_lines(clock, glyphs: _Glyphs) -> list[str]:
    if not isinstance(clock, dict):
        return []
    return [f"  clock check (recipe {clock.get('recipe', '?')}): "
            f"{clock.get('status') or '?'} {glyphs.dash} {clock.get('kind', '?')}",
            *("    " + str(line) for line in (clock.get("lines") or [])[:4])]
