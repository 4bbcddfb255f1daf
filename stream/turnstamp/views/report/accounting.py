"""The accounting of every event (ledger, rejects, service counters and the checks
that they reconcile) and the provenance of the night."""

from __future__ import annotations

import contextlib

from ... import __version__
from .night import NightFolder, config_targets, json_or_none
from .timegrid import ArchiveSummary

__all__ = ["accounting_data", "provenance_rows"]


_LEDGER_COLUMNS = ("events", "tagged", "filtered", "rejected", "missing_before")


_STATUS_COUNTERS = ("messages_received", "messages_rejected", "events_received",
                    "events_tagged", "events_filtered", "events_rejected", "missing_messages",
                    "duplicate_messages")


def accounting_data(night: NightFolder, archive: ArchiveSummary) -> dict:
    """Where every event went, per source, and the checks that the numbers reconcile.

    Parameters
    ----------
    night : NightFolder
        The folder (ledger, rejects, ``status.json``).
    archive : ArchiveSummary
        The archive's rows per target.

    Returns
    -------
    dict
        Per-source ledger sums and their total, refused messages and rejected
        events by reason, the service counters, the archive rows per target, the
        checks (name, ok, detail) and whether all of them pass.
    """
    ledger = night.table("ledger")
    sources, refused = _ledger_sources(ledger)
    total = _total(sources)
    rejects = _rejects(night.table("rejects"))
    running = (night.status or {}).get("state") == "running"
    checks = _ledger_checks(ledger is not None, night.table("rejects") is not None, total,
                            rejects, archive, running)
    counters = (night.status or {}).get("counters") or {}
    status_numbers = {k: counters.get(k) for k in _STATUS_COUNTERS} if counters else {}
    checks += _status_checks(counters, total, ledger is not None, running)
    return {"sources": sources, "total": total, "refused_messages_by_reason": refused,
            "rejected_by_reason": rejects["by_reason"],
            "rejected_single_events": rejects["single"],
            "rejected_in_messages": rejects["in_messages"],
            "status_counters": status_numbers,
            "status_rejected_by_reason": (night.status or {}).get("rejected_by_reason") or {},
            "archive_rows_by_target": dict(archive.rows_by_target),
            "tagged_with_problems": {t: archive.quality.of(t) for t in archive.rows_by_target
                                     if archive.quality.of(t)},
            "problem_lines": [line for t in sorted(archive.rows_by_target)
                              for line in archive.quality.lines(t)], "checks": checks,
            "reconciles": all(c["ok"] for c in checks)}


def _ledger_sources(ledger) -> tuple[dict[str, dict[str, int]], dict[str, int]]:
    """Ledger sums per source, and the refused messages per outcome."""
    sources: dict[str, dict[str, int]] = {}
    refused: dict[str, int] = {}
    if ledger is None:
        return sources, refused
    names = ["(header unreadable)" if s is None else str(s)
             for s in ledger["source"].to_pylist()]
    outcomes = ([str(o) for o in ledger["outcome"].to_pylist()]
                if "outcome" in ledger.schema.names else ["accepted"] * ledger.num_rows)
    values = {c: ledger[c].fill_null(0).to_numpy() for c in _LEDGER_COLUMNS}
    for index, name in enumerate(names):
        entry = sources.setdefault(name, {"messages": 0, "refused_messages": 0,
                                          **dict.fromkeys(_LEDGER_COLUMNS, 0)})
        entry["messages"] += 1
        if outcomes[index] != "accepted":
            entry["refused_messages"] += 1
            refused[outcomes[index]] = refused.get(outcomes[index], 0) + 1
        for c in _LEDGER_COLUMNS:
            entry[c] += int(values[c][index])
    return sources, refused


def _total(sources: dict[str, dict[str, int]]) -> dict[str, int]:
    return {c: sum(s[c] for s in sources.values())
            for c in ("messages", "refused_messages", *_LEDGER_COLUMNS)}


def _rejects(rejects) -> dict:
    """Rejects rows and events per (source, reason); single events apart from messages."""
    reasons: dict[str, dict[str, int]] = {}
    single = in_messages = 0
    rows = [] if rejects is None else \
        rejects.select(["source", "reason", "event_id", "events"]).to_pylist()
    for row in rows:
        key = f"{row['source'] or '(unknown)'}\t{row['reason']}"
        entry = reasons.setdefault(key, {"rows": 0, "events": 0})
        events = int(row["events"] or 0)
        entry["rows"] += 1
        entry["events"] += events
        if row["event_id"] is not None:
            single += events
        else:
            in_messages += events
    by_reason = [{"source": k.split("\t")[0], "reason": k.split("\t")[1], **v}
                 for k, v in sorted(reasons.items())]
    return {"by_reason": by_reason, "single": single, "in_messages": in_messages}


def _ledger_checks(has_ledger: bool, has_rejects: bool, total: dict[str, int], rejects: dict,
                   archive: ArchiveSummary, running: bool) -> list[dict]:
    if not has_ledger:
        return []
    parts = total["tagged"] + total["filtered"] + total["rejected"]
    checks = [{"name": "ledger: received = tagged + filtered + rejected",
               "ok": total["events"] == parts,
               "detail": f"{total['events']:,} = {total['tagged']:,} + "
                         f"{total['filtered']:,} + {total['rejected']:,}"
                         + ("" if total["events"] == parts else f" (sum {parts:,})")}]
    if has_rejects or total["rejected"]:
        single, in_messages = rejects["single"], rejects["in_messages"]
        checks.append({"name": "ledger rejected = events in the rejects stream",
                       "ok": total["rejected"] in (single, single + in_messages),
                       "detail": f"ledger {total['rejected']:,}, rejects stream {single:,} "
                                 "single events"
                                 + (f" + {in_messages:,} in refused messages"
                                    if in_messages else "")})
    if len(archive.rows_by_target) == 1:
        rows = next(iter(archive.rows_by_target.values()))
        checks.append({"name": "archive rows = ledger tagged (one target)",
                       "ok": rows == total["tagged"] or running,
                       "detail": f"archive {rows:,}, ledger {total['tagged']:,}"
                       + (" (live folder: streams read at slightly different moments)"
                          if running and rows != total["tagged"] else "")})
    return checks


def _status_checks(counters: dict, total: dict[str, int], has_ledger: bool,
                   running: bool) -> list[dict]:
    if not counters:
        return []
    got = [counters.get(k) for k in ("events_received", "events_tagged", "events_filtered",
                                     "events_rejected")]
    checks = []
    if all(isinstance(v, int) for v in got):
        checks.append({"name": "status.json: received = tagged + filtered + rejected",
                       "ok": got[0] == got[1] + got[2] + got[3],
                       "detail": f"{got[0]:,} = {got[1]:,} + {got[2]:,} + {got[3]:,}"})
    if has_ledger and not running and isinstance(got[1], int):
        checks.append({"name": "status.json tagged = ledger tagged (stopped service)",
                       "ok": got[1] == total["tagged"],
                       "detail": f"status {got[1]:,}, ledger {total['tagged']:,}"})
    return checks


def _site_text(text: str | None) -> str | None:
    site = json_or_none(text)
    if not isinstance(site, dict):
        return text
    if site.get("orbit_file"):
        return f"{site.get('name')}: orbit table {site['orbit_file']}"
    return (f"{site.get('name')}: latitude {site.get('latitude_deg')}°, longitude "
            f"{site.get('longitude_deg')}°, height {site.get('height_m')} m")


def _table_text(text: str | None) -> str | None:
    table = json_or_none(text)
    if not isinstance(table, dict):
        return text
    pieces = table if "segment_ns" not in table and all(isinstance(v, dict) for v in
                                                          table.values()) else {"": table}
    out = []
    for name, p in pieces.items():
        try:
            minutes = int(p["segment_ns"]) / 60e9
            accuracy = f"Chebyshev segments of {minutes:g} min, degree {p.get('degree')}"
        except (KeyError, TypeError, ValueError):
            accuracy = "segment and degree not recorded"
        extra = f"; Shapiro delay of {p['shapiro_bodies']}" if p.get("shapiro_bodies") else ""
        out.append((f"{name}: " if name else "") + accuracy + extra)
    return "; ".join(out)


def _model_lines(night: NightFolder, archive: ArchiveSummary, targets) -> list[str]:
    from ...files.inputs import load_spin_model

    meta = night.metadata
    listed = json_or_none(meta.get("models"))
    config = config_targets(meta)
    lines = []
    for target in targets:
        ids: list[str] = []
        if isinstance(listed, dict) and target in listed:
            value = listed[target]
            ids = value.split(",") if isinstance(value, str) else [str(v) for v in value]
        elif isinstance(meta.get("models"), str) and listed is None and \
                (meta.get("target") in (None, target)):
            ids = [m for m in meta["models"].split(",") if m]
        for m in sorted(archive.model_ids.get(target, ())):
            if m not in ids:
                ids.append(m)
        validity = {}
        for path in (config.get(target) or {}).get("models") or []:
            with contextlib.suppress(Exception):
                model = load_spin_model(path)
                validity[model.model_id] = (f"valid MJD {model.validity.start_mjd_tdb} to "
                                            f"{model.validity.end_mjd_tdb} (TDB)")
        parts = [f"{m} ({validity.get(m, 'validity not recorded in the output')})"
                 for m in ids] or ["none recorded"]
        lines.append(f"{target}: " + ", ".join(parts))
    return lines


def provenance_rows(night: NightFolder, archive: ArchiveSummary, targets) -> list[tuple[str, str]]:
    meta = night.metadata
    rows = [
        ("software", meta.get("software") or "not recorded"),
        ("site", _site_text(meta.get("site")) or "not recorded"),
        ("spin models", "\n".join(_model_lines(night, archive, targets))),
        ("ephemeris", meta.get("ephemeris") or "not recorded"),
        ("Earth orientation", meta.get("earth_orientation") or "not recorded"),
        ("leap seconds", meta.get("leap_seconds") or "not recorded"),
        ("clock chain", meta.get("clock_chain") or "not recorded"),
        ("barycentre table", _table_text(meta.get("table")) or "not recorded"),
        ("report", f"turnstamp {__version__} report of {night.folder} ({night.mode} output)"),
    ]
    if meta.get("turnstamp.recovered"):
        rows.append(("recovered files", meta["turnstamp.recovered"]))
    return rows
