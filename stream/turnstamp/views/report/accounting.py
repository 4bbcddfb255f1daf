"""The accounting of every event (ledger, rejects, service counters and the checks
that they reconcile) and the provenance of the night."""

from __future__ import annotations

import contextlib

from ... import __version__
from .night import NightFolder, config_targets, json_or_none
from .timegrid import ArchiveSummary

__all__ = ["accounting_data", "provenance_rows"]


_LEDGER_COLUMNS = ("events", "tagged", "filtered", "rejected", "missing_before")


def accounting_data(night: NightFolder, archive: ArchiveSummary) -> dict:
    sources: dict[str, dict[str, int]] = {}
    ledger = night.table("ledger")
    refused: dict[str, int] = {}
    if ledger is not None:
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
    total = {"messages": sum(s["messages"] for s in sources.values()),
             "refused_messages": sum(s["refused_messages"] for s in sources.values())}
    for c in _LEDGER_COLUMNS:
        total[c] = sum(s[c] for s in sources.values())
    reasons: dict[str, dict[str, int]] = {}
    event_rejects = 0
    message_rejects = 0
    rejects = night.table("rejects")
    if rejects is not None:
        for row in rejects.select(["source", "reason", "event_id", "events"]).to_pylist():
            key = f"{row['source'] or '(unknown)'}\t{row['reason']}"
            entry = reasons.setdefault(key, {"rows": 0, "events": 0})
            entry["rows"] += 1
            entry["events"] += int(row["events"] or 0)
            if row["event_id"] is not None:
                event_rejects += int(row["events"] or 0)
            else:
                message_rejects += int(row["events"] or 0)
    by_reason = [{"source": k.split("\t")[0], "reason": k.split("\t")[1], **v}
                 for k, v in sorted(reasons.items())]
    checks = []
    running = (night.status or {}).get("state") == "running"
    if ledger is not None:
        parts = total["tagged"] + total["filtered"] + total["rejected"]
        checks.append({"name": "ledger: received = tagged + filtered + rejected",
                       "ok": total["events"] == parts,
                       "detail": f"{total['events']:,} = {total['tagged']:,} + "
                                 f"{total['filtered']:,} + {total['rejected']:,}"
                                 + ("" if total["events"] == parts else
                                    f" (sum {parts:,})")})
        if rejects is not None or total["rejected"]:
            ok = total["rejected"] in (event_rejects, event_rejects + message_rejects)
            checks.append({"name": "ledger rejected = events in the rejects stream",
                           "ok": ok, "detail": f"ledger {total['rejected']:,}, rejects "
                           f"stream {event_rejects:,} single events"
                           + (f" + {message_rejects:,} in refused messages"
                              if message_rejects else "")})
        if len(archive.rows_by_target) == 1:
            rows = next(iter(archive.rows_by_target.values()))
            checks.append({"name": "archive rows = ledger tagged (one target)",
                           "ok": rows == total["tagged"] or running,
                           "detail": f"archive {rows:,}, ledger {total['tagged']:,}"
                           + (" (live folder: streams read at slightly different moments)"
                              if running and rows != total["tagged"] else "")})
    counters = (night.status or {}).get("counters") or {}
    status_numbers = {}
    if counters:
        status_numbers = {k: counters.get(k) for k in (
            "messages_received", "messages_rejected", "events_received", "events_tagged",
            "events_filtered", "events_rejected", "missing_messages", "duplicate_messages")}
        got = [counters.get(k) for k in ("events_received", "events_tagged",
                                         "events_filtered", "events_rejected")]
        if all(isinstance(v, int) for v in got):
            checks.append({"name": "status.json: received = tagged + filtered + rejected",
                           "ok": got[0] == got[1] + got[2] + got[3],
                           "detail": f"{got[0]:,} = {got[1]:,} + {got[2]:,} + {got[3]:,}"})
        if ledger is not None and not running and isinstance(got[1], int):
            checks.append({"name": "status.json tagged = ledger tagged (stopped service)",
                           "ok": got[1] == total["tagged"],
                           "detail": f"status {got[1]:,}, ledger {total['tagged']:,}"})
    return {"sources": sources, "total": total, "refused_messages_by_reason": refused,
            "rejected_by_reason": by_reason,
            "rejected_single_events": event_rejects, "rejected_in_messages": message_rejects,
            "status_counters": status_numbers,
            "status_rejected_by_reason": (night.status or {}).get("rejected_by_reason") or {},
            "archive_rows_by_target": dict(archive.rows_by_target), "checks": checks,
            "reconciles": all(c["ok"] for c in checks)}


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
    from ...io.files import load_spin_model

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
