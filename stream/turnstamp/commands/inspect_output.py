"""``turnstamp inspect``: summarise any output file or a whole output folder.

A file is an Arrow IPC file of turnstamp's (complete, or cut short and read to its
last complete batch) or a Parquet file (``turnstamp tag --out x.parquet``); a
folder is summarised stream by stream with its ``status.json``. Instants in the
text shown are calendar labels in their scale (``--json`` keeps the integers).
"""

from __future__ import annotations

import json
from pathlib import Path

from ..errors import InputError

__all__ = ["add_parser", "run", "inspect_path"]

_NOT_OUTPUT = {".toml": "a configuration or model file (turnstamp check CONFIG, turnstamp "
                        "model summary MODEL)",
               ".json": "a JSON file (turnstamp model summary MODEL for a spin model)",
               ".csv": "a text table", ".txt": "a text file"}
_SCALES = (("_utc_ns", "UTC"), ("_tdb_ns", "TDB"), ("_tt_ns", "TT"))


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("inspect", help="summarise an output file or folder",
                              description="Summarise an output file (Arrow IPC or Parquet) "
                                          "or a whole output folder.")
    p.add_argument("path", help="an output file (.arrow, .parquet) or an output folder")
    p.add_argument("--rows", type=int, default=5, help="rows to show per file")
    p.add_argument("--json", action="store_true", help="machine-readable output on stdout")
    p.set_defaults(run=run)


def run(args) -> int:
    if args.rows < 0:
        raise InputError("--rows", args.rows, "must be 0 or more")
    print(inspect_path(Path(args.path), rows=args.rows, as_json=args.json))
    return 0


def _read(path: Path):
    """(table, state) of an Arrow IPC or Parquet file; a clear error for anything else."""
    from ..errors import ArrowFileError
    from ..files.reader import read_arrow_file_report

    suffix = path.suffix.lower()
    if suffix in _NOT_OUTPUT:
        raise InputError("path", str(path), f"is {_NOT_OUTPUT[suffix]}, not an output file; "
                                            "inspect reads .arrow and .parquet outputs")
    if suffix == ".parquet":
        import pyarrow as pa
        import pyarrow.parquet as pq

        try:
            return pq.read_table(path), "complete (Parquet)"
        except (pa.ArrowException, OSError) as exc:
            raise InputError("path", str(path), f"cannot be read as Parquet: {exc}") from None
    try:
        table, info = read_arrow_file_report(path)
    except ArrowFileError as exc:
        raise InputError("path", str(path), f"{exc.problem}; inspect reads turnstamp's "
                                            ".arrow and .parquet outputs") from None
    return table, info.get("state") if isinstance(info, dict) else str(info)


def _summarise_file(path: Path, rows: int) -> dict:
    table, state = _read(path)
    meta = {k.decode(): v.decode() for k, v in (table.schema.metadata or {}).items()}
    head = table.slice(0, rows).to_pylist() if rows else []
    return {"file": str(path), "rows": table.num_rows, "columns": table.schema.names,
            "state": state,
            "metadata": {k: (v if len(v) < 200 else v[:200] + "...") for k, v in meta.items()},
            "first_rows": head}


def _readable(row: dict) -> dict:
    """A row with its instants (int ns since 2000-01-01T12:00:00) as calendar labels."""
    from ..core.timebase import format_instant

    out = {}
    for key, value in row.items():
        scale = next((s for suffix, s in _SCALES if key.endswith(suffix)), None)
        if scale and isinstance(value, int) and value:
            value = format_instant(value) + ("Z" if scale == "UTC" else f" {scale}")
        out[key] = value
    return out


def inspect_path(path: Path, rows: int = 5, as_json: bool = False) -> str:
    """A human-readable (or JSON) summary of an output file or folder."""
    if not path.exists():
        raise FileNotFoundError(f"{path}: no such file or folder")
    if path.is_file():
        summary = _summarise_file(path, rows)
        if as_json:
            return json.dumps(summary, indent=2, default=str)
        lines = [f"{summary['file']}: {summary['rows']:,} rows ({summary['state']})",
                 "columns: " + ", ".join(summary["columns"])]
        lines += [f"  {k}: {v}" for k, v in summary["metadata"].items()]
        lines += [f"  {_readable(row)}" for row in summary["first_rows"]]
        return "\n".join(lines)
    return _folder(path, as_json)


def _folder(path: Path, as_json: bool) -> str:
    files = sorted([*path.glob("*.arrow"), *path.glob("*.arrows"), *path.glob("*.parquet")])
    status = path / "status.json"
    if not files and not status.exists():
        raise InputError("path", str(path), "holds no output (.arrows, .arrow or .parquet files, "
                                            "status.json): not an output folder")
    streams: dict[str, dict] = {}
    for file in files:
        stem = file.name.split("-")[0].split(".")[0]
        summary = _summarise_file(file, 0)
        entry = streams.setdefault(stem, {"files": 0, "rows": 0, "partial": 0})
        entry["files"] += 1
        entry["rows"] += summary["rows"]
        entry["partial"] += not str(summary["state"]).startswith("complete")
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
