"""``turnstamp inspect``: summarise any output file or a whole output folder."""

from __future__ import annotations

import json
from pathlib import Path

__all__ = ["add_parser", "run", "inspect_path"]


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("inspect", help="summarise an output file or folder")
    p.add_argument("path")
    p.add_argument("--rows", type=int, default=5, help="rows to show per file")
    p.add_argument("--json", action="store_true")
    p.set_defaults(run=run)


def run(args) -> int:
    print(inspect_path(Path(args.path), rows=args.rows, as_json=args.json))
    return 0


def _summarise_file(path: Path, rows: int) -> dict:
    from ..files.reader import read_arrow_file_report

    table, info = read_arrow_file_report(path)
    meta = {k.decode(): v.decode() for k, v in (table.schema.metadata or {}).items()}
    head = table.slice(0, rows).to_pylist() if rows else []
    return {"file": str(path), "rows": table.num_rows, "columns": table.schema.names,
            "state": info.get("state") if isinstance(info, dict) else str(info),
            "metadata": {k: (v if len(v) < 200 else v[:200] + "...") for k, v in meta.items()},
            "first_rows": head}


def inspect_path(path: Path, rows: int = 5, as_json: bool = False) -> str:
    """A human-readable (or JSON) summary of an Arrow output file or folder."""
    if not path.exists():
        raise FileNotFoundError(f"{path}: no such file or folder")
    if path.is_file():
        summary = _summarise_file(path, rows)
        if as_json:
            return json.dumps(summary, indent=2, default=str)
        lines = [f"{summary['file']}: {summary['rows']} rows ({summary['state']})",
                 "columns: " + ", ".join(summary["columns"])]
        lines += [f"  {k}: {v}" for k, v in summary["metadata"].items()]
        lines += [f"  {row}" for row in summary["first_rows"]]
        return "\n".join(lines)
    streams: dict[str, dict] = {}
    for file in sorted(path.glob("*.arrow")):
        stem = file.name.split("-")[0]
        summary = _summarise_file(file, 0)
        entry = streams.setdefault(stem, {"files": 0, "rows": 0, "partial": 0})
        entry["files"] += 1
        entry["rows"] += summary["rows"]
        entry["partial"] += summary["state"] not in ("complete", None)
    status = path / "status.json"
    result = {"folder": str(path), "streams": streams,
              "status": json.loads(status.read_text()) if status.exists() else None}
    if as_json:
        return json.dumps(result, indent=2, default=str)
    lines = [f"{path}:"]
    for stem, entry in streams.items():
        note = f", {entry['partial']} open/partial" if entry["partial"] else ""
        lines.append(f"  {stem:13s} {entry['files']} file(s), {entry['rows']:,} rows{note}")
    if result["status"]:
        counters = result["status"].get("counters", {})
        lines.append("  status: " + ", ".join(f"{k} {v:,}" for k, v in counters.items()
                                               if isinstance(v, int)))
    return "\n".join(lines)
