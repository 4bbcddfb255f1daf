"""Reading an output folder: the small streams, ``status.json`` and the provenance in
the files' schema metadata (the archive itself is reduced in ``timegrid``)."""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pyarrow as pa

from ...errors import ArrowFileError, ReportError
from ...files import schemas
from ...files.reader import read_arrow_file, read_arrow_file_report, stream_files

__all__ = [
    "NightFolder",
    "load_night",
    "metadata_of",
    "read_any",
    "json_or_none",
    "recipes_from_metadata",
    "config_targets",
]


@dataclass
class NightFolder:
    """Everything read from one output folder (archive reduced separately)."""

    folder: Path
    mode: str  # "service" (stream files) or "tagging" (one archive-schema file)
    archive_files: list[Path]
    metadata: dict[str, str]
    tables: dict[str, pa.Table | None]  # stem -> rows, None when the stream is absent
    status: dict | None
    files: dict[str, dict[str, int]]  # stem -> files, rows, partial
    notes: list[str] = field(default_factory=list)

    def table(self, stem: str) -> pa.Table | None:
        table = self.tables.get(stem)
        return table if table is not None and table.num_rows else None


def metadata_of(schema: pa.Schema) -> dict[str, str]:
    return {k.decode(errors="replace"): v.decode(errors="replace")
            for k, v in (schema.metadata or {}).items()}


def read_any(path: Path) -> pa.Table:
    if path.suffix.lower() == ".parquet":
        import pyarrow.parquet as pq

        return pq.read_table(path)
    return read_arrow_file(path)


def _is_schema(table: pa.Table, schema: pa.Schema) -> bool:
    return set(schema.names) <= set(table.schema.names)


def load_night(output_dir: Path) -> NightFolder:
    """Read the small streams, ``status.json`` and provenance of an output folder.

    Parameters
    ----------
    output_dir : Path
        A service output folder (live or finished) or a folder holding the output
        of ``turnstamp tag`` (an archive-schema ``.arrow``/``.parquet`` file).

    Returns
    -------
    NightFolder

    Raises
    ------
    FileNotFoundError
        The folder does not exist.
    ReportError
        The folder holds no turnstamp output at all.
    """
    folder = Path(output_dir)
    if not folder.is_dir():
        raise FileNotFoundError(f"{folder}: no such output folder")
    streams = _read_streams(folder)
    archive_files = stream_files(folder, "archive")
    mode = "service"
    if not archive_files and not any(streams.files.get(s) for s in schemas.OUTPUTS):
        archive_files = _read_tagging_output(folder, streams)
        mode = "tagging"
    status = _read_status(folder, streams.notes)
    night = NightFolder(folder, mode, archive_files, streams.metadata, streams.tables, status,
                        streams.files, streams.notes)
    _note_missing(night)
    return night


@dataclass
class _Streams:
    """The stream files of a folder as read so far."""

    tables: dict[str, pa.Table | None] = field(default_factory=dict)
    files: dict[str, dict[str, int]] = field(default_factory=dict)
    metadata: dict[str, str] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)


def _read_streams(folder: Path) -> _Streams:
    """Every stream's rows (not the archive's) and file counts; the newest metadata."""
    streams = _Streams()
    newest: dict[str, dict[str, str]] = {}  # stem -> metadata of its newest file
    for stem in schemas.OUTPUTS:
        paths = stream_files(folder, stem)
        if not paths:
            streams.tables[stem] = None
            continue
        table, entry, metadata = _read_stream(stem, paths, streams.notes)
        streams.tables[stem] = table
        streams.files[stem] = entry
        if metadata is not None:
            newest[stem] = metadata
    for stem in reversed(schemas.OUTPUTS):  # the archive's provenance wins
        streams.metadata.update(newest.get(stem, {}))
    return streams


def _read_stream(stem: str, paths: list[Path], notes: list[str]):
    """One stream's files: its rows (None for the archive), counts, newest metadata."""
    partial = rows = 0
    pieces = []
    metadata = None
    for path in paths:
        try:
            table, info = read_arrow_file_report(path)
        except (ArrowFileError, OSError) as exc:  # OSError: rotated away meanwhile
            notes.append(f"{path.name} skipped: {exc}")
            continue
        partial += not info.complete
        rows += table.num_rows
        if stem != "archive":
            pieces.append(table)
        metadata = metadata_of(table.schema)
    entry = {"files": len(paths), "rows": rows, "partial": partial}
    if stem == "archive":
        return None, entry, metadata
    if not pieces:
        return schemas.OUTPUTS[stem].empty_table(), entry, metadata
    return pa.concat_tables(pieces, promote_options="permissive"), entry, metadata


def _read_tagging_output(folder: Path, streams: _Streams) -> list[Path]:
    """The archive-schema files of ``turnstamp tag`` output (and any rejects beside)."""
    archive_files, extra_rejects = [], []
    for path in sorted([*folder.glob("*.arrow"), *folder.glob("*.parquet")]):
        if path.name.startswith("."):
            continue
        try:
            table = read_any(path)
        except (ArrowFileError, OSError, pa.ArrowException) as exc:
            streams.notes.append(f"{path.name} skipped: {exc}")
            continue
        if not metadata_of(table.schema).get("software", "").startswith("turnstamp"):
            streams.notes.append(f"{path.name} skipped: not written by turnstamp")
            continue
        if _is_schema(table, schemas.ARCHIVE):
            archive_files.append(path)
            streams.metadata = streams.metadata or metadata_of(table.schema)
            entry = streams.files.setdefault("archive", {"files": 0, "rows": 0, "partial": 0})
            entry["files"] += 1
            entry["rows"] += table.num_rows
        elif _is_schema(table, schemas.REJECTS):
            extra_rejects.append(table.select(schemas.REJECTS.names))
    if not archive_files:
        raise ReportError(f"{folder}: not a turnstamp output folder: no stream files "
                          "(archive-*.arrows, significance-*.arrows, ...) and no archive written "
                          "by turnstamp tag; give the service's output.directory or the folder "
                          "of a turnstamp tag --out file")
    if extra_rejects:
        rejects = pa.concat_tables(extra_rejects, promote_options="permissive")
        streams.tables["rejects"] = rejects
        streams.files["rejects"] = {"files": len(extra_rejects), "rows": rejects.num_rows,
                                    "partial": 0}
    return archive_files


def _read_status(folder: Path, notes: list[str]) -> dict | None:
    """``status.json`` as a dict; None (and a note when unreadable) otherwise."""
    path = folder / "status.json"
    if not path.exists():
        return None
    try:
        status = json.loads(path.read_text(encoding="utf-8"))
        if not isinstance(status, dict):
            raise ValueError("not a JSON object")
    except (OSError, ValueError) as exc:
        notes.append(f"status.json unreadable: {exc}")
        return None
    return status


def _note_missing(night: NightFolder) -> None:
    if night.mode == "tagging":
        night.notes.append(
            "Offline tagging output (one archive-schema file): the profile, phase-time map and "
            "significance curve are computed here from the archive rows (cumulative only, "
            "unweighted unless the recipe says otherwise); there are no sliding windows, "
            "no template fit, no clock-chain check and no ledger of received messages.")
        return
    missing = {"archive": "no phase-time map (and no profile if the profiles stream is missing)",
               "significance": "significance curve computed from the archive (cumulative only)",
               "profiles": "profile computed from the archive phases (no template fit)",
               "clock": "no clock-chain check",
               "ledger": "accounting without the per-message ledger",
               "rejects": "no list of rejected events by reason"}
    for stem, consequence in missing.items():
        if night.tables.get(stem) is None and stem != "archive" or \
                stem == "archive" and not night.archive_files:
            night.notes.append(f"No {stem} stream in the folder: {consequence}.")
    partial = [f"{stem} ({entry['partial']})" for stem, entry in night.files.items()
               if entry.get("partial")]
    if partial:
        night.notes.append("Open or cut-short files read up to their last complete batch: "
                           + ", ".join(partial) + ".")


def json_or_none(text: str | None) -> Any:
    if not text:
        return None
    try:
        return json.loads(text)
    except ValueError:
        return None


def recipes_from_metadata(meta: dict[str, str]) -> dict[str, list[str]]:
    """Recipe names in bit order per target, from one file's metadata."""
    by_target = json_or_none(meta.get("recipes_by_target"))
    if isinstance(by_target, dict):
        return {str(k): [str(r) for r in (v.split(",") if isinstance(v, str) else v)]
                for k, v in by_target.items()}
    recipes = meta.get("recipes")
    parsed = json_or_none(recipes)
    if isinstance(parsed, dict):
        return {str(k): [str(r) for r in (v.split(",") if isinstance(v, str) else v)]
                for k, v in parsed.items()}
    if recipes and meta.get("target"):
        return {meta["target"]: [r for r in recipes.split(",") if r]}
    config = json_or_none(meta.get("config"))
    if isinstance(config, dict) and isinstance(config.get("targets"), list):
        return {str(t.get("name")): [str(r.get("name")) for r in t.get("recipes") or
                                     [{"name": "all"}]]
                for t in config["targets"] if isinstance(t, dict)}
    return {}


def config_targets(meta: dict[str, str]) -> dict[str, dict]:
    config = json_or_none(meta.get("config"))
    if isinstance(config, dict) and isinstance(config.get("targets"), list):
        return {str(t.get("name")): t for t in config["targets"] if isinstance(t, dict)}
    return {}
