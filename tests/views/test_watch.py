"""``turnstamp watch``: the status screens (plain text and rich), and the loop over a PUB
socket or a folder."""

from __future__ import annotations

import argparse
import io
import json
import re
import threading

import numpy as np
import pytest
import zmq

from turnstamp.core.timebase import parse_instant
from turnstamp.files.durable import atomic_write_json
from turnstamp.views.live import profile_bars, render_status, run_watch, watch_main
from turnstamp.views.live.screen import screen_text
from turnstamp.views.live.text import BLOCKS

ESCAPE = re.compile(r"\x1b")


def _profile(peak_bin: int, background: float, pulsed: float, bins: int = 32):
    """A pulse on a flat background: a narrow peak and a weaker interpulse (invented)."""
    phase = (np.arange(bins) + 0.5) / bins
    shape = np.exp(-0.5 * ((phase - (peak_bin + 0.5) / bins) / 0.03) ** 2) \
        + 0.4 * np.exp(-0.5 * ((phase - 0.47 - (peak_bin + 0.5) / bins) / 0.05) ** 2)
    counts = background + pulsed * shape / shape.sum()
    return {"counts": counts.tolist(), "errors": np.sqrt(counts).tolist()}


def make_status(**changes):
    """A status as the service writes it: two targets, the Ember clock check inconclusive."""
    status = {
        "format": "turnstamp.status", "version": 1,
        "computed_at_utc_ns": parse_instant("2026-12-02T02:04:05"),  # a UTC label
        "started_utc": "2026-12-02T02:00:00", "state": "running",
        "counters": {"messages_received": 48, "messages_rejected": 1,
                     "events_received": 477_090, "events_tagged": 470_001,
                     "events_filtered": 7_085, "events_rejected": 4,
                     "missing_messages": 2, "duplicate_messages": 0},
        "rejected_by_reason": {"bad_time": 4},
        "events_per_s": 1987.5,
        "sources": {"kestrel-builder-1": {"messages": 48, "events": 477_090,
                                          "last_sequence": 47, "missing": 2}},
        "targets": [
            {"name": "lantern", "model_ids": ["lantern-2026a"], "frequency_hz": 311.370158,
             "recipes": [
                 {"name": "all", "weighted": False, "events": 343_563, "events_per_s": 1431.5,
                  "windows": {
                      "cumulative": {"events": 343_563, "h": 437.21, "harmonics": 11,
                                     "sigma": 20.22, "sigma_post_trials": 20.18},
                      "5min": {"events": 343_563, "h": 437.21, "harmonics": 11,
                               "sigma": 20.22, "sigma_post_trials": 20.18},
                      "60min": {"events": 343_563, "h": 437.21, "harmonics": 11,
                                "sigma": 20.22, "sigma_post_trials": 20.18}},
                  "profile": _profile(0, 10_500, 18_000)},
                 {"name": "hard", "weighted": True, "events": 591, "events_per_s": 2.46,
                  "windows": {
                      "cumulative": {"events": 591, "h": 2213.4, "harmonics": 14,
                                     "sigma": 45.85, "sigma_post_trials": 45.84},
                      "5min": {"events": 591, "h": 2213.4, "harmonics": 14,
                               "sigma": 45.85, "sigma_post_trials": 45.84},
                      "60min": {"events": 591, "h": None, "harmonics": None,
                                "sigma": None, "sigma_post_trials": None}},
                  "profile": _profile(0, 0.5, 500)}],
             "clock": {"recipe": "all", "status": "OK", "kind": "none",
                       "lines": ["OK: no significant effect (tolerance 0.0200 cycles = 64.2 µs "
                                 "at 311.395 Hz).",
                                 "9 chunks, 9 used (detected, σ ≤ 0.1 cycles), span 0.06 h."]}},
            {"name": "ember", "model_ids": ["ember-2026a"], "frequency_hz": 8.123,
             "recipes": [{"name": "all", "weighted": False, "events": 0,
                          "windows": {"cumulative": {"events": 0, "h": 0.0, "harmonics": 1,
                                                     "sigma": 0.0, "sigma_post_trials": 0.0}},
                          "profile": {"counts": [0.0] * 32, "errors": [0.0] * 32}}],
             "clock": {"recipe": "all", "status": "FAIL", "kind": "offset",
                       "lines": ["FAIL: offset of 37 s (TAI read as UTC)."]}},
        ],
        "trials": 3,
        "warnings": ["leap-second table expires in 20 days"],
    }
    status.update(changes)
    return status


def test_plain_rendering_shows_the_numbers_and_no_escape_codes():
    text = render_status(make_status(), width=100, color=False)
    assert not ESCAPE.search(text)
    assert text.isascii()  # plain mode: ASCII only ("sigma", '#' bars)
    assert all(len(line) <= 100 for line in text.splitlines())
    assert ("477,090 received = 470,001 tagged + 7,085 filtered + 4 rejected  (adds up)"
            in text)
    assert "1,987.5 events/s" in text and "bad_time 4" in text
    assert "messages 48 received, 1 refused, 2 missing, 0 duplicate" in text
    assert "kestrel-builder-1: 48 messages" in text and "missing 2" in text
    # sigma pre- and post-trials per window, in window order
    all_rows = [line for line in text.splitlines() if line.strip().startswith(
        ("cumulative", "5min", "60min"))]
    assert re.search(r"cumulative\s+343,563\s+437\.2\s+11\s+20\.22\s+20\.18", all_rows[0])
    assert re.search(r"60min\s+591\s+-\s+-\s+-\s+-", text)  # nulls shown as '-'
    assert "sigma post-trials" in text
    # the clock verdicts and their first lines
    assert "clock check (recipe all): OK - none" in text
    assert "clock check (recipe all): FAIL - offset" in text
    assert "warnings:" in text and "leap-second table expires" in text
    assert "updated 2026-12-02 02:04:05 UTC" in text
    assert "tolerance 0.0200 cycles = 64.2 us at 311.395 Hz" in text  # ASCII spelling
    assert "profile: no events yet" in text  # ember's empty profile


def test_the_profile_is_drawn_as_bars_over_two_cycles():
    status = make_status()
    plain = render_status(status, width=100).splitlines()
    start = next(i for i, line in enumerate(plain) if "profile, two cycles (32 bins" in line)
    bars = plain[start + 1:start + 6]
    assert all(len(line) == 4 + 64 for line in bars)  # indent + 2 x 32 bins
    assert set("".join(bars)) <= set(" .:#")
    top = bars[0][4:]
    # the main peak (bin 0) is the tallest bar, once per cycle
    assert top[0] == "#" and top[32] == "#" and top[16] == " "
    assert bars[-1][4:].count("#") == 64  # the lowest bin fills one row
    axis = plain[start + 6]
    assert axis.strip().startswith("+") and axis.count("+") == 3

    fancy = render_status(status, width=100, color=True)  # the rich screen, with styles
    assert "\x1b[" in fancy and "█" in fancy and "σ (trials)" in fancy
    assert "\x1b[32mOK\x1b[0m" in fancy and "\x1b[1;31mFAIL\x1b[0m" in fancy
    unicode_plain = render_status(status, width=100, color=False, blocks=True)
    assert not ESCAPE.search(unicode_plain) and "█" in unicode_plain


def test_a_significance_below_zero_reads_no_excess_never_minus_infinity():
    status = make_status()
    ember = status["targets"][1]["recipes"][0]["windows"]["cumulative"]
    ember.update(sigma=float("-inf"), sigma_post_trials=-0.4)  # chance gives more
    # the service's JSON carries -inf as -Infinity (json.dumps): read it back the same way
    status = json.loads(json.dumps(status))
    plain = render_status(status, width=100)
    assert re.search(r"cumulative\s+0\s+0\.0\s+1\s+no excess\s+no excess", plain)
    screen = screen_text(status, width=80, styles=False)
    ember_row = next(line for line in screen.splitlines() if line.startswith("ember"))
    assert "no excess" in ember_row
    for text in (plain, screen, render_status(status, color=True)):
        assert "inf" not in text.lower()


def test_the_rich_screen_fits_80_by_24_with_the_totals_first():
    text = screen_text(make_status(), width=80, styles=False, note="no update for 5 s")
    lines = text.splitlines()
    assert len(lines) <= 24 and all(len(line) <= 80 for line in lines)
    assert lines[0].startswith("╭─ turnstamp ● running · updated 2026-12-02 02:04:05 UTC")
    # the totals are the first thing in the panel: headers, then the numbers in order
    assert re.search(r"received\s+tagged\s+filtered\s+rejected\s+events/s", lines[1])
    assert re.search(r"477,090\s+470,001\s+7,085\s+4\s+1,987\.5\s+adds up", lines[2])
    first_target = next(i for i, line in enumerate(lines) if line.startswith("lantern"))
    assert first_target > 2 and "no update for 5 s" in text
    assert "messages 48 (1 refused, 2 missing, 0 duplicate) · rejected bad_time 4" in text
    # a row per window, the significance after trials beside a bar, the profile as blocks
    rows = [line for line in lines if re.search(r"\b(cumulative|5min|60min)\b", line)]
    assert len(rows) == 7
    assert re.search(r"lantern\s+all\s+cumulative\s+343,563\s+━+ 20\.18\s+[█▁-▇ ]+$", rows[0])
    assert re.search(r"hard\s+cumulative\s+591\s+━+ 45\.84", rows[3])
    assert re.search(r"60min\s+591\s+-", rows[5])
    assert "311.37 Hz" in lines[first_target + 1]
    assert "ember" in rows[6] and "no events yet" in rows[6]
    assert "clock lantern (all): OK — none" in text
    assert "clock ember (all): FAIL — offset · FAIL: offset of 37 s" in text
    assert lines[-1] == "! leap-second table expires in 20 days"
    assert "DOES NOT ADD UP" in screen_text(
        {"counters": {"events_received": 3, "events_tagged": 1, "events_filtered": 1,
                      "events_rejected": 0}}, styles=False)
    assert "turnstamp ● unknown" in screen_text({}, styles=False)


def test_profile_bars_fit_a_narrow_screen_and_keep_the_shape():
    counts = np.r_[np.full(31, 100.0), 400.0]
    bars = profile_bars(counts, rows=4, width=30, blocks=True)
    assert all(len(line) <= 30 for line in bars[:4])
    assert bars[0].rstrip().endswith("█") and set(bars[3]) == {BLOCKS[8]}
    assert profile_bars([]) == []
    flat = profile_bars([5.0] * 8, rows=2, blocks=False)
    assert flat[0] == "#" * 16  # a flat profile is a full block of bars, not an error


def test_missing_keys_and_odd_values_do_not_break_the_screen():
    assert "turnstamp" in render_status({})
    odd = {"state": "stopped", "counters": {"events_received": 10, "events_tagged": 3,
                                            "events_filtered": 3, "events_rejected": 3},
           "targets": [{"name": "lantern", "recipes": [{"name": "all", "windows": None,
                                                        "profile": None}], "clock": None},
                       "not a dict"],
           "warnings": None, "computed_at_utc_ns": "yesterday"}
    text = render_status(odd, width=80)
    assert "(DOES NOT ADD UP)" in text and "lantern" in text
    narrow = render_status(make_status(), width=50)
    assert all(len(line) <= 50 for line in narrow.splitlines())
    assert "..." in narrow


class Publisher:
    """A stand-in for the service's PUB socket on loopback: sends a status every 20 ms."""

    def __init__(self, statuses):
        self.context = zmq.Context()
        self.socket = self.context.socket(zmq.PUB)
        self.socket.setsockopt(zmq.LINGER, 0)
        port = self.socket.bind_to_random_port("tcp://127.0.0.1")
        self.endpoint = f"tcp://127.0.0.1:{port}"
        self.statuses = statuses
        self.stop = threading.Event()
        self.sent = 0
        self.thread = threading.Thread(target=self._run, daemon=True)

    def _run(self):
        while not self.stop.is_set() and self.sent < 500:  # bounded: 10 s at most
            status = self.statuses[min(self.sent, len(self.statuses) - 1)]
            self.socket.send_multipart([b"noise", b"not for us"])
            self.socket.send_multipart([b"status", json.dumps(status).encode()])
            self.sent += 1
            self.stop.wait(0.02)

    def __enter__(self):
        self.thread.start()
        return self

    def __exit__(self, *exc):
        self.stop.set()
        self.thread.join(5)
        self.socket.close(linger=0)
        self.context.term()


def test_once_reads_one_status_from_the_publisher():
    with Publisher([make_status()]) as publisher:
        out = io.StringIO()
        assert run_watch(endpoint=publisher.endpoint, once=True, out=out, timeout_s=10) == 0
    text = out.getvalue()
    assert not ESCAPE.search(text)  # a StringIO is not a terminal
    assert "477,090 received" in text and "lantern" in text and "20.18" in text
    assert text.count("turnstamp * running") == 1


def test_the_loop_prints_plain_blocks_of_the_newest_status():
    statuses = [make_status(events_per_s=float(i)) for i in range(1, 400)]
    with Publisher(statuses) as publisher:
        out = io.StringIO()
        assert run_watch(endpoint=publisher.endpoint, out=out, max_frames=3,
                         interval_s=0.2) == 0
    blocks = out.getvalue().split("\n\nturnstamp ")
    assert len(blocks) == 3 and not ESCAPE.search(out.getvalue())
    rates = [float(m.replace(",", "")) for m in
             re.findall(r"rate +([\d,.]+) events/s", out.getvalue())]
    assert rates == sorted(rates) and len(set(rates)) == 3  # each block newer than the last


def test_once_gives_up_when_nothing_is_published():
    context = zmq.Context()
    silent = context.socket(zmq.PUB)
    port = silent.bind_to_random_port("tcp://127.0.0.1")
    try:
        out = io.StringIO()
        assert run_watch(endpoint=f"tcp://127.0.0.1:{port}", once=True, out=out,
                         timeout_s=0.3) == 1
        assert out.getvalue() == ""
    finally:
        silent.close(linger=0)
        context.term()


def test_folder_mode_reads_status_json(tmp_path, capsys):
    atomic_write_json(tmp_path / "status.json", make_status(state="stopped"))
    out = io.StringIO()
    assert run_watch(folder=tmp_path, once=True, out=out) == 0
    assert "turnstamp * stopped" in out.getvalue()
    assert "the service has stopped" in out.getvalue()
    args = argparse.Namespace(endpoint=None, folder=str(tmp_path), once=True)
    assert watch_main(args) == 0
    assert "477,090 received" in capsys.readouterr().out
    empty = tmp_path / "empty"
    empty.mkdir()
    assert run_watch(folder=empty, once=True, out=io.StringIO(), timeout_s=0.3) == 1


class FakeTerminal(io.StringIO):
    """A text stream that says it is a terminal, and keeps what was drawn on it."""

    def isatty(self):
        return True


CONTROL = re.compile(r"\x1b\[[0-9;?]*[A-Za-z]")


def test_a_terminal_gets_the_rich_screen_redrawn_in_place(tmp_path):
    atomic_write_json(tmp_path / "status.json", make_status())
    out = FakeTerminal()
    assert run_watch(folder=tmp_path, out=out, width=80, max_frames=2, interval_s=0.05) == 0
    drawn = out.getvalue()
    assert "\x1b[?25l" in drawn  # the cursor hidden while the screen is redrawn in place
    assert "\x1b[32m" in drawn  # colour
    visible = CONTROL.sub("", drawn)
    assert visible.count("╭─ turnstamp ● running") >= 2  # the same screen, drawn again
    assert "477,090" in visible and "adds up" in visible
    once = FakeTerminal()
    assert run_watch(folder=tmp_path, out=once, width=80, once=True) == 0
    assert "\x1b[?25l" not in once.getvalue()  # once: printed, not redrawn
    assert CONTROL.sub("", once.getvalue()).count("╭─ turnstamp") == 1


def test_ascii_on_a_terminal_is_plain_text_in_place(tmp_path):
    atomic_write_json(tmp_path / "status.json", make_status())
    out = FakeTerminal()
    assert run_watch(folder=tmp_path, out=out, width=80, blocks=False, max_frames=1) == 0
    visible = CONTROL.sub("", out.getvalue())
    assert visible.isascii() and "╭" not in visible
    assert "477,090 received = 470,001 tagged + 7,085 filtered + 4 rejected" in visible
    assert all(len(line) <= 80 for line in visible.splitlines())


@pytest.mark.parametrize("endpoint, folder", [(None, None), ("tcp://127.0.0.1:1", "x")])
def test_watch_main_needs_exactly_one_source(endpoint, folder, capsys):
    args = argparse.Namespace(endpoint=endpoint, folder=folder, once=True)
    assert watch_main(args) == 2
    assert "--endpoint" in capsys.readouterr().err


def test_events_outside_validity_are_said_on_a_screen_that_still_fits_80_by_24():
    status = make_status(tagged_with_problems={"OUTSIDE_MODEL_VALIDITY": 120_000,
                                               "EARTH_ORIENTATION_PREDICTED": 470_001},
                         warnings=["ember: 120,000 events outside the validity window of its "
                                   "spin model", "second", "leap-second table expires soon"])
    status["targets"][1]["excluded_from_statistics"] = 120_000
    text = screen_text(status, width=80, styles=False, note="no update for 5 s")
    lines = text.splitlines()
    assert len(lines) <= 24 and all(len(line) <= 80 for line in lines)
    assert re.search(r"477,090\s+470,001\s+7,085\s+4", lines[2])  # the totals first
    assert "tagged with a problem: 120,000 outside model validity (not in statistics)" in text
    ember = next(line for line in lines if line.startswith("ember"))
    assert "120,000 outside validity" in ember and "no events yet" not in text
    assert "predicted" not in text  # a few ns: not called a problem
    plain = render_status(status, width=80)
    assert "profile: none usable: 120,000 outside model validity" in plain
