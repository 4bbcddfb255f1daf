"""The HTML page: one self-contained document, figures embedded as base64 PNG."""

from __future__ import annotations

import base64
import html
import json

import numpy as np

from .figuredata import finite
from .night import NightFolder, json_or_none

__all__ = [
    "escape",
    "safe_name",
    "page_html",
    "target_html",
    "accounting_html",
    "provenance_html",
]


_CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", "DejaVu Sans", sans-serif;
       margin: 1.5em auto; max-width: 1180px; color: #1a1a1a; line-height: 1.4; }
h1 { font-size: 1.6em; margin-bottom: 0.2em; } h2 { border-bottom: 2px solid #0072B2;
     padding-bottom: 0.2em; margin-top: 2em; } h3 { margin-top: 1.4em; }
.meta { color: #444; } figure { margin: 1em 0; } figure img { max-width: 100%;
     height: auto; border: 1px solid #ddd; } figcaption { color: #444; font-size: 0.92em; }
.notes { background: #fff8e1; border-left: 4px solid #E69F00; padding: 0.5em 1em; }
.bad { color: #fff; background: #D55E00; padding: 0.4em 0.8em; font-weight: bold; }
.good { color: #006b4f; font-weight: bold; }
table { border-collapse: collapse; margin: 0.6em 0; font-size: 0.95em; }
th, td { border: 1px solid #ccc; padding: 0.25em 0.6em; text-align: right; }
th { background: #eef4fa; } td.text, th.text { text-align: left; }
.verdict { border-left: 4px solid #ccc; padding-left: 1em; }
.verdict pre, details pre { white-space: pre-wrap; font-size: 0.88em; background: #f6f6f6;
     padding: 0.6em; } .status { font-size: 1.3em; font-weight: bold; }
.OK { color: #009E73; } .WARN { color: #B07A00; } .FAIL { color: #D55E00; }
"""

# Counts the images the browser decoded, after load, into data attributes of <html>:
# a check that every embedded picture opens (used by the headless-browser test).
_IMAGE_CHECK = """<script>
window.addEventListener("load", function () {
  var images = Array.prototype.slice.call(document.images);
  var loaded = images.filter(function (i) { return i.complete && i.naturalWidth > 0; });
  document.documentElement.setAttribute("data-images-total", String(images.length));
  document.documentElement.setAttribute("data-images-loaded", String(loaded.length));
});
</script>"""


def escape(value) -> str:
    return html.escape(str(value))


def _number(value) -> str:
    if value is None:
        return "–"
    if isinstance(value, (int, np.integer)):
        return f"{int(value):,}"
    return f"{float(value):,.2f}"


def _figure_html(figure: dict) -> str:
    encoded = base64.b64encode(figure["png"]).decode("ascii")
    return (f'<figure id="{escape(figure["id"])}">'
            f'<img src="data:image/png;base64,{encoded}" alt="{escape(figure["alt"])}">'
            f"<figcaption>{escape(figure['caption'])} (also saved as {escape(figure['file'])})"
            "</figcaption></figure>")


def accounting_html(acc: dict, night: NightFolder) -> str:
    out = ["<h2>Accounting</h2>"]
    if acc["sources"]:
        header = ("<tr><th class=text>source</th><th>messages</th><th>refused messages</th>"
                  "<th>events received</th><th>tagged</th><th>filtered</th><th>rejected</th>"
                  "<th>missing messages</th></tr>")
        body = []
        for name, s in [*sorted(acc["sources"].items()), ("total", acc["total"])]:
            cells = "".join(f"<td>{_number(s[c])}</td>" for c in (
                "messages", "refused_messages", "events", "tagged", "filtered", "rejected",
                "missing_before"))
            tag = "th" if name == "total" else "td"
            body.append(f"<tr><{tag} class=text>{escape(name)}</{tag}>{cells}</tr>")
        out.append(f'<table id="accounting-ledger">{header}{"".join(body)}</table>')
    else:
        out.append("<p>No ledger: the events received and filtered are not known here.</p>")
    if acc["refused_messages_by_reason"]:
        rows = "".join(f"<tr><td class=text>{escape(k)}</td><td>{_number(v)}</td></tr>"
                       for k, v in sorted(acc["refused_messages_by_reason"].items()))
        out.append("<table><tr><th class=text>messages refused whole, by reason</th>"
                   f"<th>messages</th></tr>{rows}</table>")
    if acc["archive_rows_by_target"]:
        rows = "".join(f"<tr><td class=text>{escape(t)}</td><td>{_number(n)}</td></tr>"
                       for t, n in sorted(acc["archive_rows_by_target"].items()))
        out.append("<table><tr><th class=text>target</th><th>archive rows</th></tr>"
                   f"{rows}</table>")
    if acc.get("problem_lines"):
        items = "".join(f"<li{' class=bad' if 'validity' in line else ''}>{escape(line)}</li>"
                        for line in acc["problem_lines"])
        out.append(f'<p>Archive rows tagged with a quality problem:</p><ul id="accounting-'
                   f'problems">{items}</ul>')
    if acc["rejected_by_reason"]:
        rows = "".join(f"<tr><td class=text>{escape(r['source'])}</td><td class=text>"
                       f"{escape(r['reason'])}</td><td>{_number(r['events'])}</td>"
                       f"<td>{_number(r['rows'])}</td></tr>" for r in acc["rejected_by_reason"])
        out.append('<table id="accounting-rejects"><tr><th class=text>source</th>'
                   "<th class=text>reason</th><th>events</th><th>rows</th></tr>"
                   f"{rows}</table>")
    elif night.table("rejects") is None:
        out.append("<p>No rejects stream.</p>")
    if acc["status_counters"]:
        rows = "".join(f"<tr><td class=text>{escape(k.replace('_', ' '))}</td>"
                       f"<td>{_number(v)}</td></tr>" for k, v in acc["status_counters"].items())
        reasons = "".join(f"<tr><td class=text>rejected: {escape(k)}</td><td>{_number(v)}</td>"
                          "</tr>" for k, v in acc["status_rejected_by_reason"].items())
        out.append("<h3>Service counters (status.json)</h3><table id=accounting-status>"
                   f"<tr><th class=text>counter</th><th>value</th></tr>{rows}{reasons}"
                   "</table>")
    if acc["checks"]:
        items = "".join(
            f"<li><span class={'good' if c['ok'] else 'bad'}>{'OK' if c['ok'] else 'MISMATCH'}"
            f"</span> {escape(c['name'])}: {escape(c['detail'])}</li>" for c in acc["checks"])
        if not acc["reconciles"]:
            out.append('<p class="bad">The numbers do not reconcile: see the checks below.'
                       "</p>")
        out.append(f"<ul>{items}</ul>")
    return "\n".join(out)


def provenance_html(rows, night: NightFolder) -> str:
    body = "".join(f"<tr><th class=text>{escape(k)}</th><td class=text>"
                   f"{escape(v).replace(chr(10), '<br>')}</td></tr>" for k, v in rows)
    files = "".join(f"<tr><td class=text>{escape(stem)}</td><td>{_number(e['files'])}</td>"
                    f"<td>{_number(e['rows'])}</td><td>{_number(e['partial'])}</td></tr>"
                    for stem, e in night.files.items())
    config = json_or_none(night.metadata.get("config"))
    config_text = json.dumps(config, indent=2) if config is not None else \
        night.metadata.get("config") or "not recorded"
    other = {k: v for k, v in night.metadata.items() if k not in {
        "software", "site", "ephemeris", "earth_orientation", "leap_seconds", "clock_chain",
        "table", "config"}}
    other_text = "\n".join(f"{k}: {v}" for k, v in sorted(other.items()))
    return ("<h2>Provenance</h2><table id=provenance>" + body + "</table>"
            "<table><tr><th class=text>stream</th><th>files</th><th>rows</th>"
            f"<th>open or cut short</th></tr>{files}</table>"
            f"<details><summary>configuration</summary><pre>{escape(config_text)}</pre></details>"
            f"<details><summary>all file metadata</summary><pre>{escape(other_text)}</pre>"
            "</details>")


def page_html(title: str, header: str, body: list[str], refresh: float | None) -> str:
    refresh_tag = (f'<meta http-equiv="refresh" content="{refresh:g}">'
                   if refresh else "")
    return (f"<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
            f"{refresh_tag}<title>{escape(title)}</title><style>{_CSS}</style></head>"
            f"<body>{header}\n" + "\n".join(body) + f"\n{_IMAGE_CHECK}</body></html>\n")


def target_html(target, recipes, figures, clock_figure, clock, profiles, curves) -> str:
    out = [f'<h2 id="target-{escape(safe_name(target))}">Target {escape(target)}</h2>',
           f"<p>Recipes: {escape(', '.join(recipes))}.</p>"]
    rows = []
    for recipe in recipes:
        s = curves.get(recipe)
        p = profiles.get(recipe)
        cumulative = (s or {}).get("windows", {}).get("cumulative")
        sigma = post = None
        if cumulative is not None and len(cumulative["h_sigma"]):
            sigma, post = cumulative["h_sigma"][-1], cumulative["h_sigma_post_trials"][-1]
        shift = finite((p or {}).get("template_shift_us"))
        rows.append(f"<tr><td class=text>{escape(recipe)}</td>"
                    f"<td>{_number(p['events'] if p else None)}</td>"
                    f"<td>{_number(p['sum_weights'] if p else None)}</td>"
                    f"<td>{'–' if sigma is None or not np.isfinite(sigma) else f'{sigma:.2f}'}"
                    f"</td><td>{'–' if post is None or not np.isfinite(post) else f'{post:.2f}'}"
                    f"</td><td>{'–' if shift is None else f'{shift:+.1f}'}</td></tr>")
    out.append("<table><tr><th class=text>recipe</th><th>events</th><th>sum of weights</th>"
               "<th>σ (cumulative)</th><th>σ after trials</th><th>template offset (µs)</th>"
               f"</tr>{''.join(rows)}</table>")
    for figure in figures:
        if figure is clock_figure:
            continue
        out.append(_figure_html(figure))
    if clock is not None:
        verdict = (f'<div class=verdict><div class="status {escape(clock["status"])}">'
                   f'{escape(clock["status"])} ({escape(clock["kind"])})</div>'
                   f"<p>Recipe {escape(clock['recipe'])}; tolerance "
                   + (f"{clock['tolerance_us']:.1f} µs" if clock["tolerance_us"] else "?")
                   + (f" at {clock['frequency_hz']:.6f} Hz" if clock["frequency_hz"] else "")
                   + f"</p><pre>{escape(clock['summary'])}</pre></div>")
        figure_part = _figure_html(clock_figure) if clock_figure else \
            "<p>No chunk offsets yet.</p>"
        out.append(f"<h3>Clock-chain check</h3><div class=clock>{figure_part}{verdict}</div>")
    return "\n".join(out)


def safe_name(name: str) -> str:
    return "".join(c if c.isalnum() or c in "-_." else "_" for c in name)
