"""The end state the crash benchmark (``bench.crash``) checks in an output folder.

Every event id sent exactly once in the archive; the counters of the final status
equal what the files hold; no closed file changed since it was first seen closed;
every file opens with pyarrow, and with pandas, polars and duckdb where installed.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from ..files.reader import read_stream, stream_files
from ..files.schemas import OUTPUTS

__all__ = ["check_folder", "open_with_readers"]


def check_folder(out: Path, closed: dict, changed: list, events_sent: int) -> dict:
    """The end state: events once, counters = files, closed files unchanged, readable."""
    archive = read_stream(out, "archive")
    ledger = read_stream(out, "ledger")
    rejects = read_stream(out, "rejects")
    ids = archive["event_id"].to_numpy()
    unique = np.unique(ids)
    expected = np.arange(events_sent, dtype=np.uint64)
    counters = json.loads((out / "status.json").read_text())["counters"]
    files = {
        "events_received": int(ledger["events"].to_numpy().sum()),
        "events_tagged": archive.num_rows,
        "events_rejected": int(np.asarray(rejects["events"].to_numpy(), dtype=np.int64).sum()),
        "messages_received": ledger.num_rows,
    }
    readers = open_with_readers(out)
    outcomes = np.array(ledger["outcome"].to_pylist(), dtype=object)
    return {
        "crash_duplicate_messages_refused": int((outcomes == "duplicate_message").sum()),
        "crash_archive_rows": archive.num_rows,
        "crash_events_archived_twice": int(ids.size - unique.size),
        "crash_events_lost": int(np.setdiff1d(expected, unique).size),
        "crash_events_not_sent_archived": int(np.setdiff1d(unique, expected).size),
        "crash_counters_equal_files": all(counters.get(k) == v for k, v in files.items()),
        "crash_counters": {k: counters.get(k) for k in files},
        "crash_files": files,
        "crash_closed_files": len(closed),
        "crash_closed_files_changed": changed,
        "crash_readers": readers,
    }


def open_with_readers(out: Path) -> dict:
    """Files that each downstream reader opened, of all closed files in ``out``."""
    import importlib

    import pyarrow as pa

    paths = [p for stem in OUTPUTS for p in stream_files(out, stem)]
    opened = {"files": len(paths), "pyarrow": 0}
    libraries = {}
    for name in ("pandas", "polars", "duckdb"):
        try:
            libraries[name] = importlib.import_module(name)
            opened[name] = 0
        except ImportError:
            opened[name] = "not installed"
    for path in paths:
        with pa.memory_map(str(path)) as source:
            arrow_table = pa.ipc.open_stream(source).read_all()
        opened["pyarrow"] += 1
        if "pandas" in libraries:
            arrow_table.to_pandas()
            opened["pandas"] += 1
        if "polars" in libraries:
            libraries["polars"].read_ipc_stream(path)
            opened["polars"] += 1
        if "duckdb" in libraries:
            libraries["duckdb"].sql("SELECT count(*) FROM arrow_table").fetchall()
            opened["duckdb"] += 1
    return opened
