"""The status as a rich screen for a terminal: built to fit 80 columns by 24 lines.

Layout, top to bottom: a panel with the totals first (events received, tagged,
filtered, rejected, the rate, and whether they add up), then messages and
sources; one table row per (target, recipe, window) with the events and the
significance after trials as a bar (full at 5σ); beside each recipe's rows its
pulse profile over two cycles, one line of the bar chart per row; then one line
per clock-chain verdict and the last warnings. A significance below zero reads
"no excess".
"""

from __future__ import annotations

import io

from rich import box
from rich.console import Console, ConsoleOptions, Group, RenderResult
from rich.measure import Measurement
from rich.panel import Panel
from rich.progress_bar import ProgressBar
from rich.table import Table
from rich.text import Text

from .fields import (
    adds_up,
    count_text,
    counters,
    is_number,
    last_sequence,
    mapping,
    number_text,
    problems_text,
    sigma_text,
    time_text,
    unusable_text,
    window_labels,
)
from .text import BLOCKS, bar_heights

__all__ = ["DETECTION_SIGMA", "status_screen", "screen_text", "ProfileRow"]

DETECTION_SIGMA = 5.0
"""Significance (σ after trials) at which the bar is full and turns green: the usual
threshold for claiming a detection (common practice)."""
_STATE_STYLE = {"running": "bold green", "stopped": "bold yellow"}
_VERDICT_STYLE = {"OK": "green", "WARN": "yellow", "FAIL": "bold red"}
_MAX_WARNINGS = 3
_BAR_WIDTH = 6


class ProfileRow:
    """One line of a pulse profile's bar chart over two cycles, as wide as its cell.

    Parameters
    ----------
    counts : sequence of float
        Counts per phase bin over one cycle.
    rows : int
        Height of the whole chart, lines.
    row : int
        Which line this is, 0 at the top.
    """

    def __init__(self, counts, rows: int, row: int):
        self.counts = list(counts)
        self.rows = max(int(rows), 1)
        self.row = row

    def __rich_measure__(self, console: Console, options: ConsoleOptions) -> Measurement:
        return Measurement(min(8, 2 * len(self.counts)), 2 * len(self.counts))

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        heights = bar_heights(self.counts, self.rows, options.max_width)
        level = self.rows - 1 - self.row
        yield Text("".join(BLOCKS[int(round(min(max(h - level, 0.0), 1.0) * 8))]
                           for h in heights), style="cyan", no_wrap=True)


def status_screen(status: dict, *, note: str | None = None) -> Group:
    """The rich screen of a service status (any key may be missing or null).

    Parameters
    ----------
    status : dict
        ``status.json`` or the PUB message.
    note : str, optional
        A line under the totals (how old the update is, or that the service stopped).

    Returns
    -------
    rich.console.Group
    """
    status = mapping(status)
    parts = [_totals_panel(status)]
    if note:
        parts.append(Text(note, style="bold yellow"))
    targets = [t for t in status.get("targets") or [] if isinstance(t, dict)]
    if targets:
        parts.append(_targets_table(targets))
        parts.extend(_clock_line(t) for t in targets if isinstance(t.get("clock"), dict))
    warnings = [str(w) for w in status.get("warnings") or []]
    parts.extend(Text("! " + w, style="yellow", no_wrap=True, overflow="ellipsis")
                 for w in warnings[-_MAX_WARNINGS:])
    return Group(*parts)


def screen_text(status: dict, *, width: int = 80, note: str | None = None,
                styles: bool = True) -> str:
    """``status_screen`` rendered to text ``width`` columns wide.

    Parameters
    ----------
    status : dict
        The service status.
    width : int
        Columns.
    note : str, optional
        As for ``status_screen``.
    styles : bool
        Keep the ANSI colour and weight codes (True) or give bare text.

    Returns
    -------
    str
        The screen, lines joined by newlines, no trailing newline.
    """
    buffer = io.StringIO()
    console = Console(file=buffer, width=width, force_terminal=styles,
                      color_system="standard" if styles else None, highlight=False,
                      legacy_windows=False)
    console.print(status_screen(status, note=note))
    return buffer.getvalue().rstrip("\n")


def _totals_panel(status: dict) -> Panel:
    numbers = counters(status)
    totals = Table.grid(padding=(0, 2))
    for _ in range(6):
        totals.add_column(justify="right")
    totals.add_row(*(Text(h, style="dim") for h in (
        "received", "tagged", "filtered", "rejected", "events/s", "")))
    balance = adds_up(numbers)
    check = (Text("") if balance is None else Text("adds up", style="green") if balance
             else Text("DOES NOT ADD UP", style="bold red"))
    totals.add_row(*(Text(count_text(numbers.get(k)), style="bold") for k in (
        "events_received", "events_tagged", "events_filtered", "events_rejected")),
        Text(number_text(status.get("events_per_s"), 1), style="bold"), check)
    lines = [totals, _one_line(
        f"messages {count_text(numbers.get('messages_received'))} "
        f"({count_text(numbers.get('messages_rejected'))} refused, "
        f"{count_text(numbers.get('missing_messages'))} missing, "
        f"{count_text(numbers.get('duplicate_messages'))} duplicate)"
        + _reasons_text(mapping(status.get("rejected_by_reason"))))]
    sources = mapping(status.get("sources"))
    if sources:
        lines.append(_one_line("; ".join(_source_text(name, mapping(s))
                                         for name, s in sorted(sources.items()))))
    problems = problems_text(status)
    if problems:
        lines.append(Text(problems, style="bold yellow", no_wrap=True, overflow="ellipsis"))
    started = status.get("started_utc")
    return Panel(Group(*lines), title=_title(status), title_align="left",
                 subtitle=f"started {started}" if started else None, subtitle_align="right",
                 box=box.ROUNDED, padding=(0, 1))


def _one_line(text: str) -> Text:
    return Text(text, no_wrap=True, overflow="ellipsis")


def _title(status: dict) -> Text:
    state = str(status.get("state") or "unknown")
    title = Text("turnstamp ", style="bold")
    title.append(f"● {state}", style=_STATE_STYLE.get(state, ""))
    updated = time_text(status.get("computed_at_utc_ns"))
    if updated:
        title.append(f" · updated {updated}")
    if status.get("trials") is not None:
        title.append(f" · trials {count_text(status.get('trials'))}")
    return title


def _reasons_text(reasons: dict) -> str:
    if not reasons:
        return ""
    return " · rejected " + ", ".join(f"{k} {count_text(v)}"
                                       for k, v in sorted(reasons.items()))


def _source_text(name: str, source: dict) -> str:
    return (f"{name}: {count_text(source.get('messages'))} messages, last sequence "
            f"{count_text(last_sequence(source))}, missing {count_text(source.get('missing'))}")


def _targets_table(targets: list[dict]) -> Table:
    table = Table(box=box.SIMPLE_HEAD, show_edge=False, pad_edge=False, padding=(0, 1),
                  collapse_padding=True, header_style="dim", expand=True)
    table.add_column("target", no_wrap=True, overflow="ellipsis")
    table.add_column("recipe", no_wrap=True, overflow="ellipsis")
    table.add_column("window", no_wrap=True, overflow="ellipsis")
    table.add_column("events", justify="right", no_wrap=True)
    table.add_column("σ (trials)", no_wrap=True)
    table.add_column("profile, 2 cycles", no_wrap=True, ratio=1, min_width=10)
    for target in targets:
        labels = _target_labels(target)
        index = 0
        unusable = unusable_text(target, short=True)
        for recipe in (r for r in target.get("recipes") or [] if isinstance(r, dict)):
            for row in _recipe_rows(recipe, unusable):
                table.add_row(labels[index] if index < len(labels) else "", *row)
                index += 1
        if index == 0:
            table.add_row(labels[0], "-", "", "", "", "")
    return table


def _target_labels(target: dict) -> list[Text]:
    """The target column, one line per row: name, then spin frequency."""
    labels = [Text(str(target.get("name") or "?"), style="bold")]
    if is_number(target.get("frequency_hz")):
        labels.append(Text(f"{float(target['frequency_hz']):.6g} Hz", style="dim"))
    return labels


def _recipe_rows(recipe: dict, unusable: str | None = None) -> list[list]:
    """Rows (without the target column) of one recipe: one per window, at least one."""
    windows = mapping(recipe.get("windows"))
    labels = [k for k in window_labels(windows) if isinstance(windows[k], dict)] or [None]
    names = [recipe.get("name", "?"), "weighted" if recipe.get("weighted") else ""]
    counts = _profile_counts(recipe)
    rows = []
    for index, label in enumerate(labels):
        window = windows[label] if label is not None else {}
        events = window.get("events") if label is not None else recipe.get("events")
        profile = (ProfileRow(counts, len(labels), index) if counts
                   else Text(unusable, style="bold yellow") if index == 0 and unusable
                   else Text("no events yet", style="dim") if index == 0
                   and recipe.get("profile") is not None else "")
        rows.append([str(names[index]) if index < len(names) else "", label or "-",
                     count_text(events), _sigma_cell(window.get("sigma_post_trials")),
                     profile])
    return rows


def _profile_counts(recipe: dict) -> list[float]:
    counts = [c for c in mapping(recipe.get("profile")).get("counts") or [] if is_number(c)]
    return counts if any(c > 0 for c in counts) else []


def _sigma_cell(sigma) -> Table:
    """A bar full at DETECTION_SIGMA, then the value ("no excess" below zero)."""
    cell = Table.grid(padding=(0, 1))
    text = sigma_text(sigma)
    known = is_number(sigma) and sigma >= 0
    style = ("bold green" if known and sigma >= DETECTION_SIGMA else
             "yellow" if known and sigma >= 3 else "dim" if not known else "")
    bar = ProgressBar(total=DETECTION_SIGMA, completed=min(sigma, DETECTION_SIGMA)
                      if known else 0.0, width=_BAR_WIDTH, complete_style="yellow",
                      finished_style="green")
    cell.add_row(bar, Text(text, style=style))
    return cell


def _clock_line(target: dict) -> Text:
    clock = target["clock"]
    verdict = str(clock.get("status") or "?")
    line = Text(f"clock {target.get('name') or '?'} ({clock.get('recipe', '?')}): ",
                no_wrap=True, overflow="ellipsis")
    line.append(verdict, style=_VERDICT_STYLE.get(verdict, ""))
    line.append(f" — {clock.get('kind', '?')}")
    first = (clock.get("lines") or [None])[0]
    if first:
        line.append(f" · {first}", style="dim")
    return line
