"""``turnstamp watch``: a live terminal view of a running service.

Theory of operation
-------------------
The service describes itself once a second in ``status.json`` (replaced
atomically) and, when ``output.publish_endpoint`` is set, publishes the same JSON
on a ZeroMQ PUB socket as two frames, topic ``b"status"`` and the UTF-8 JSON.
``watch`` reads either source and draws one screen of text per update:
``render_status`` is a pure function from the status dictionary to that text,
and ``run_watch`` is the loop around it.

A subscriber that falls behind must not show old news: ZeroMQ's own "conflate"
option does not work with two-frame messages, so each wake-up drains every
queued message without blocking and keeps only the newest. The loop wakes at
least once a second; on a terminal it redraws in place (ANSI home and clear,
colour for OK/WARN/FAIL) and says how old the last update is; otherwise it
prints each new status as a plain block, blocks separated by a blank line, with
no escape codes and ASCII only.

Every key of the status may be missing or null (older or newer services, a
target still warming up): the view shows what is there.
"""

from __future__ import annotations

import json
import math
import os
import shutil
import sys
import time
from pathlib import Path
from typing import TextIO

from .core.timebase import format_instant

__all__ = ["render_status", "profile_bars", "run_watch", "watch_main", "read_status_file"]

BLOCKS = " ▁▂▃▄▅▆▇█"
"""Eighth-height block characters for the profile bar chart (index = eighths filled)."""
ASCII_LEVELS = " .:#"
"""The plain-ASCII fallback (index = quarters filled, rounded)."""
CLEAR_HOME = "\x1b[H\x1b[2J"
_ANSI = {"OK": "\x1b[32m", "WARN": "\x1b[33m", "FAIL": "\x1b[1;31m", "bold": "\x1b[1m",
         "dim": "\x1b[2m", "good": "\x1b[1;32m", "bad": "\x1b[1;31m", "running": "\x1b[32m",
         "stopped": "\x1b[33m"}
_RESET = "\x1b[0m"
_PROFILE_ROWS = 5
_STALE_S = 3.0


class _Style:
    """Colour and glyphs of one rendering: ANSI or none, Unicode or ASCII."""

    def __init__(self, color: bool, unicode: bool):
        self.color = color
        self.unicode = unicode
        self.sigma = "σ" if unicode else "sigma"
        self.dash = "—" if unicode else "-"
        self.ellipsis = "…" if unicode else "..."
        self.bullet = "●" if unicode else "*"

    def paint(self, text: str, key: str | None) -> str:
        if not self.color or key not in _ANSI:
            return text
        return f"{_ANSI[key]}{text}{_RESET}"


_TO_ASCII = {"σ": "sigma", "µ": "u", "μ": "u", "±": "+/-", "≤": "<=", "≥": ">=", "—": "-",
             "–": "-", "−": "-", "²": "^2", "χ": "chi", "→": "->", "…": "...", "×": "x",
             "°": " deg", "√": "sqrt", "Δ": "delta", "ν": "nu", "φ": "phi"}


def _ascii(text: str) -> str:
    """Plain-ASCII spelling of the few symbols the service's messages use; '?' else."""
    if text.isascii():
        return text
    return "".join(c if c.isascii() else _TO_ASCII.get(c, "?") for c in text)


def _visible_length(text: str) -> int:
    length, escape = 0, False
    for char in text:
        if char == "\x1b":
            escape = True
        elif escape:
            escape = char != "m"
        else:
            length += 1
    return length


def _fit(line: str, width: int, style: _Style) -> str:
    """Cut a line to ``width`` visible characters (escape codes kept whole)."""
    if _visible_length(line) <= width:
        return line
    out, seen, escape = [], 0, False
    limit = max(width - len(style.ellipsis), 0)
    for char in line:
        if char == "\x1b":
            escape = True
        if escape:
            out.append(char)
            escape = char != "m"
            continue
        if seen >= limit:
            continue
        out.append(char)
        seen += 1
    return "".join(out) + (_RESET if style.color else "") + style.ellipsis


def _int(value) -> str:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return "-"
    if isinstance(value, float) and not math.isfinite(value):
        return "-"
    return f"{int(value):,}"


def _float(value, digits: int = 2) -> str:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return "-"
    if not math.isfinite(float(value)):
        return "-"
    return f"{float(value):,.{digits}f}"


def _time_of(ns) -> str | None:
    if not isinstance(ns, int) or isinstance(ns, bool) or ns == 0:
        return None
    try:
        return format_instant(ns, 0).replace("T", " ") + " UTC"
    except (ValueError, OverflowError):
        return None


def profile_bars(counts, rows: int = _PROFILE_ROWS, width: int = 80,
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
    values = [float(v) for v in counts if isinstance(v, (int, float))
              and math.isfinite(float(v))]
    if not values:
        return []
    merge = 1
    while 2 * math.ceil(len(values) / merge) > max(width, 2) and merge < len(values):
        merge += 1
    merged = [sum(values[i:i + merge]) for i in range(0, len(values), merge)]
    series = merged * 2
    low, high = min(series), max(series)
    span = high - low
    # the lowest bin fills one row, the highest all rows: the shape shows on any background
    heights = [1.0 + (v - low) / span * (rows - 1) if span > 0 else float(rows)
               for v in series]
    lines = []
    for row in range(rows - 1, -1, -1):
        chars = []
        for h in heights:
            fill = min(max(h - row, 0.0), 1.0)
            if blocks:
                chars.append(BLOCKS[int(round(fill * 8))])
            else:
                chars.append(ASCII_LEVELS[int(round(fill * 3))])
        lines.append("".join(chars))
    n = len(series)
    axis = ["-"] * n
    for position in (0, n // 2, n - 1):
        axis[position] = "+"
    labels = [" "] * (n + 1)
    for position, text in ((0, "0"), (n // 2, "1"), (n - 1, "2")):
        labels[position] = text
    lines.append("".join(axis))
    lines.append("".join(labels).rstrip())
    return lines


def render_status(status: dict, width: int = 100, color: bool = False, *,
                  blocks: bool | None = None, note: str | None = None,
                  profile_rows: int = _PROFILE_ROWS) -> str:
    """One screen of text from a service status (``status.json`` / the PUB message).

    Parameters
    ----------
    status : dict
        The status; any key may be missing or null.
    width : int
        Columns; longer lines are cut.
    color : bool
        ANSI colour (OK green, WARN yellow, FAIL red). False: no escape codes.
    blocks : bool, optional
        Unicode (block characters, σ) or plain ASCII; default: the same as ``color``.
    note : str, optional
        An extra line under the header (for example how old the update is).
    profile_rows : int
        Height of each profile's bar chart in lines (0: no bars).

    Returns
    -------
    str
        The screen, lines joined by newlines, no trailing newline.
    """
    style = _Style(color, color if blocks is None else blocks)
    width = max(int(width), 40)
    status = status if isinstance(status, dict) else {}
    lines: list[str] = []
    add = lines.append

    state = str(status.get("state") or "unknown")
    header = f"turnstamp {style.paint(style.bullet + ' ' + state, state)}"
    if status.get("started_utc"):
        header += f"   started {status['started_utc']}"
    updated = _time_of(status.get("computed_at_utc_ns"))
    if updated:
        header += f"   updated {updated}"
    if status.get("trials") is not None:
        header += f"   trials {_int(status.get('trials'))}"
    add(header)
    if note:
        add(style.paint(note, "WARN"))

    counters = status.get("counters") if isinstance(status.get("counters"), dict) else {}
    received, tagged, filtered, rejected = (counters.get(k) for k in (
        "events_received", "events_tagged", "events_filtered", "events_rejected"))
    line = (f"events   {_int(received)} received = {_int(tagged)} tagged + "
            f"{_int(filtered)} filtered + {_int(rejected)} rejected")
    numbers = [received, tagged, filtered, rejected]
    if all(isinstance(v, int) and not isinstance(v, bool) for v in numbers):
        adds_up = received == tagged + filtered + rejected
        line += "  " + (style.paint("(adds up)", "good") if adds_up else
                        style.paint("(DOES NOT ADD UP)", "bad"))
    add(line)
    add(f"rate     {_float(status.get('events_per_s'), 1)} events/s (last 10 s)   messages "
        f"{_int(counters.get('messages_received'))} received, "
        f"{_int(counters.get('messages_rejected'))} refused, "
        f"{_int(counters.get('missing_messages'))} missing, "
        f"{_int(counters.get('duplicate_messages'))} duplicate")
    reasons = status.get("rejected_by_reason")
    if isinstance(reasons, dict) and reasons:
        add("rejected: " + ", ".join(f"{k} {_int(v)}" for k, v in sorted(reasons.items())))
    sources = status.get("sources")
    if isinstance(sources, dict) and sources:
        parts = []
        for name, s in sorted(sources.items()):
            s = s if isinstance(s, dict) else {}
            last = s.get("last_sequence", s.get("highest_sequence"))
            parts.append(f"{name}: {_int(s.get('messages'))} messages, {_int(s.get('events'))}"
                         f" events, last sequence {_int(last)}, missing {_int(s.get('missing'))}")
        add("sources  " + "; ".join(parts))

    for target in status.get("targets") or []:
        if isinstance(target, dict):
            add("")
            lines.extend(_target_lines(target, width, style, profile_rows))

    warnings = [str(w) for w in status.get("warnings") or []]
    if warnings:
        add("")
        add(style.paint("warnings:", "WARN"))
        for warning in warnings[-8:]:
            add("  ! " + warning)
    if not style.unicode:
        lines = [_ascii(line) for line in lines]
    return "\n".join(_fit(line, width, style) for line in lines)


def _target_lines(target: dict, width: int, style: _Style, rows: int) -> list[str]:
    s = style.sigma
    out = []
    name = str(target.get("name") or "?")
    head = style.paint(name, "bold")
    if target.get("frequency_hz") is not None:
        head += f"   {_float(target.get('frequency_hz'), 6)} Hz"
    models = target.get("model_ids")
    if models:
        head += "   models " + ", ".join(str(m) for m in models)
    out.append(head)
    for recipe in target.get("recipes") or []:
        if not isinstance(recipe, dict):
            continue
        weighting = "weighted" if recipe.get("weighted") else "unweighted"
        rate = recipe.get("events_per_s")
        out.append(f"  recipe {recipe.get('name', '?')} ({weighting}): "
                   f"{_int(recipe.get('events'))} events"
                   + (f", {_float(rate, 1)} events/s" if rate is not None else ""))
        windows = recipe.get("windows") if isinstance(recipe.get("windows"), dict) else {}
        if windows:
            out.append(f"    {'window':<12}{'events':>12}{'H':>10}{'harm.':>7}"
                       f"{s + ' pre':>12}{s + ' post-trials':>20}")
            order = ["cumulative", *sorted(k for k in windows if k != "cumulative")]
            for label in order:
                w = windows.get(label)
                if not isinstance(w, dict):
                    continue
                post = w.get("sigma_post_trials")
                post_text = f"{_float(post):>20}"
                if isinstance(post, (int, float)) and math.isfinite(post) and post >= 5:
                    post_text = style.paint(post_text, "good")
                out.append(f"    {label:<12}{_int(w.get('events')):>12}{_float(w.get('h'), 1):>10}"
                           f"{_int(w.get('harmonics')):>7}{_float(w.get('sigma')):>12}"
                           f"{post_text}")
        profile = recipe.get("profile") if isinstance(recipe.get("profile"), dict) else {}
        counts = [c for c in profile.get("counts") or [] if isinstance(c, (int, float))]
        if counts and any(c > 0 for c in counts) and rows > 0:
            bars = profile_bars(counts, rows=rows, width=width - 6, blocks=style.unicode)
            low = min(counts)
            unit = "weighted counts" if recipe.get("weighted") else "events"
            out.append(f"    profile, two cycles ({len(counts)} bins; {unit} per bin "
                       f"from {_float(low, 1)} (one row) to {_float(max(counts), 1)})")
            out.extend("    " + bar for bar in bars)
        elif recipe.get("profile") is not None:
            out.append("    profile: no events yet")
    clock = target.get("clock")
    if isinstance(clock, dict):
        verdict = str(clock.get("status") or "?")
        out.append(f"  clock check (recipe {clock.get('recipe', '?')}): "
                   f"{style.paint(verdict, verdict)} {style.dash} {clock.get('kind', '?')}")
        for line in (clock.get("lines") or [])[:4]:
            out.append("    " + str(line))
    return out


# --------------------------------------------------------------------------------------
# The loop
# --------------------------------------------------------------------------------------


def read_status_file(folder: Path) -> dict | None:
    """``folder/status.json`` as a dict, or None when it is missing or unreadable."""
    try:
        status = json.loads((Path(folder) / "status.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return status if isinstance(status, dict) else None


class _Subscriber:
    """SUB socket on the service's PUB endpoint, topic ``status``, newest message only."""

    def __init__(self, endpoint: str):
        import zmq

        self._zmq = zmq
        self.context = zmq.Context()
        self.socket = self.context.socket(zmq.SUB)
        self.socket.setsockopt(zmq.LINGER, 0)
        self.socket.setsockopt(zmq.RCVHWM, 16)
        self.socket.setsockopt(zmq.SUBSCRIBE, b"status")
        self.socket.connect(endpoint)
        self.poller = zmq.Poller()
        self.poller.register(self.socket, zmq.POLLIN)
        self.errors = 0

    def newest(self, timeout_s: float) -> dict | None:
        """Wait up to ``timeout_s`` for a message; drain the queue; the newest status."""
        zmq = self._zmq
        if not self.poller.poll(max(int(timeout_s * 1000), 0)):
            return None
        newest = None
        while True:
            try:
                frames = self.socket.recv_multipart(zmq.NOBLOCK)
            except zmq.Again:
                break
            if len(frames) != 2 or frames[0] != b"status":
                self.errors += 1
                continue
            try:
                status = json.loads(frames[1].decode("utf-8"))
            except (UnicodeDecodeError, ValueError):
                self.errors += 1
                continue
            if isinstance(status, dict):
                newest = status
        return newest

    def close(self) -> None:
        self.socket.close(linger=0)
        self.context.term()


def _age_note(status: dict, received_at: float, now: float) -> str | None:
    if status.get("state") == "stopped":
        return "the service has stopped; this is its last status"
    age = now - received_at
    if age > _STALE_S:
        return f"no update for {age:.0f} s"
    return None


def _screen(status, width, color, blocks, note, height: int | None) -> str:
    """The status rendered with the tallest profile bars that fit ``height`` lines."""
    for rows in (_PROFILE_ROWS, 3, 0):
        screen = render_status(status, width, color, blocks=blocks, note=note,
                               profile_rows=rows)
        if height is None or screen.count("\n") + 1 < height:
            break
    return screen


def run_watch(endpoint: str | None = None, folder: str | Path | None = None, *,
              once: bool = False, out: TextIO | None = None, color: bool | None = None,
              blocks: bool | None = None, width: int | None = None,
              interval_s: float = 1.0, timeout_s: float | None = None,
              max_frames: int | None = None) -> int:
    """Show the service's status until Ctrl-C (or once).

    Parameters
    ----------
    endpoint : str, optional
        The service's PUB endpoint (``tcp://127.0.0.1:5556``). Takes precedence.
    folder : str or Path, optional
        Output folder whose ``status.json`` is re-read (when there is no endpoint).
    once : bool
        Draw the first status and return.
    out : text stream, optional
        Where to draw (default ``sys.stdout``); a terminal gets in-place redraws.
    color, blocks : bool, optional
        ANSI colour and Unicode blocks; default: whether ``out`` is a terminal
        (colour also off when ``NO_COLOR`` is set).
    width : int, optional
        Columns (default: the terminal's, or 100).
    interval_s : float
        Longest wait between redraws, seconds.
    timeout_s : float, optional
        With ``once``: how long to wait for a first status (default 10 s).
    max_frames : int, optional
        Stop after this many drawings (for tests).

    Returns
    -------
    int
        0, or 1 when ``once`` found no status in time.
    """
    out = out if out is not None else sys.stdout
    terminal = bool(getattr(out, "isatty", lambda: False)())
    color = (terminal and "NO_COLOR" not in os.environ) if color is None else color
    blocks = terminal if blocks is None else blocks
    size = shutil.get_terminal_size((100, 40))
    if width is None:
        width = size.columns if terminal else 100
    height = size.lines
    if endpoint is None and folder is None:
        raise ValueError("give an endpoint or a folder")
    wait_first = 10.0 if timeout_s is None else timeout_s
    subscriber = _Subscriber(endpoint) if endpoint is not None else None
    source = endpoint if endpoint is not None else str(Path(folder) / "status.json")
    started = time.monotonic()
    frames = 0
    last: dict | None = None
    last_at = 0.0
    last_printed = None
    try:
        while True:
            if subscriber is not None:
                status = subscriber.newest(interval_s if last is not None or not once
                                           else min(interval_s, wait_first))
            else:
                status = read_status_file(Path(folder))
                if status is not None and last is not None and \
                        status.get("computed_at_utc_ns") == last.get("computed_at_utc_ns"):
                    status = None  # unchanged file
            now = time.monotonic()
            if status is not None:
                last, last_at = status, now
                if subscriber is None:  # the file's age, not the time we read it
                    try:
                        age = time.time() - (Path(folder) / "status.json").stat().st_mtime
                        last_at = now - max(age, 0.0)
                    except OSError:
                        pass
            if last is None:
                if once and now - started >= wait_first:
                    print(f"turnstamp watch: no status from {source} within {wait_first:g} s "
                          "(is the service running, with output.publish_endpoint set for "
                          "--endpoint?)", file=sys.stderr)
                    return 1
                if terminal and not once:
                    out.write(CLEAR_HOME + f"turnstamp watch: waiting for {source} ...\n")
                    out.flush()
                if subscriber is None:
                    time.sleep(min(interval_s, 0.25) if once else interval_s)
                continue
            note = _age_note(last, last_at, now)
            screen = _screen(last, width, color, blocks, note,
                             height if terminal and not once else None)
            if terminal and not once:
                out.write(CLEAR_HOME + screen + "\n")
                out.flush()
                frames += 1
            elif status is not None or once:
                if last_printed is not None:
                    out.write("\n")
                out.write(screen + "\n")
                out.flush()
                last_printed = screen
                frames += 1
            if once or (max_frames is not None and frames >= max_frames):
                return 0
            if subscriber is None:
                time.sleep(interval_s)
    except KeyboardInterrupt:
        return 0
    finally:
        if subscriber is not None:
            subscriber.close()


def watch_main(args) -> int:
    """``turnstamp watch [--endpoint E | --folder F] [--once] [--ascii]``."""
    endpoint = getattr(args, "endpoint", None)
    folder = getattr(args, "folder", None)
    if endpoint and folder:
        print("turnstamp watch: give --endpoint or --folder, not both", file=sys.stderr)
        return 2
    if not endpoint and not folder:
        print("turnstamp watch: give --endpoint (the service's output.publish_endpoint) or "
              "--folder (its output folder)", file=sys.stderr)
        return 2
    if folder and not Path(folder).is_dir():
        print(f"turnstamp watch: {folder}: no such output folder", file=sys.stderr)
        return 2
    blocks = False if getattr(args, "ascii", False) else None
    return run_watch(endpoint=endpoint or None, folder=folder or None,
                     once=bool(getattr(args, "once", False)), blocks=blocks)
