"""What a re-tagging run does: the dataset's fragments, where each output goes, and
which fragments are already done.

A dataset is a folder of Parquet or Arrow IPC files (hive-style ``key=value``
folders welcome; files and folders starting with ``.`` or ``_`` are not data, as
``pyarrow.dataset`` has it), or one such file. Each file is a fragment, re-tagged
as a whole by one worker into the output folder at the same relative place
(``OUT/night=2026-12-01/part-0.parquet``), so the output is a partitioned Parquet
dataset with the input's partitions. Beside the data, under names the dataset
readers skip:

* ``OUT/_rejects/RELATIVE.rejects.arrow``: the fragment's refused events;
* ``OUT/_fragments/RELATIVE.json``: the fragment's completion mark, written after
  its archive is in place: the run's fingerprint, the input's size, the accounting
  and the statistics partials (so that a resumed run merges them unchanged).

A fragment is done when its mark has this run's fingerprint and the input's size,
and its archive exists; anything else is (re)done, its archive replaced whole.
The fingerprint hashes everything that determines the archive's rows: the spin
models, the target and its recipes, the site and its tables, the ephemeris, the
barycentre tables' settings and the time convention.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from pathlib import Path

from ..errors import EventFileError, InputError

__all__ = ["Fragment", "Plan", "plan_run", "fingerprint", "model_fingerprint", "read_mark",
           "FORMATS"]

FORMATS = {".parquet": "parquet", ".arrow": "ipc", ".arrows": "ipc", ".feather": "ipc",
           ".ipc": "ipc"}
REQUIRED = ("event_id", "time_ns")


@dataclass(frozen=True)
class Fragment:
    """One input file and its outputs (absolute paths, as strings for the workers)."""

    path: str
    relative: str
    output: str
    rejects: str
    mark: str
    size: int


@dataclass
class Plan:
    """The fragments to do, and the marks of those already done (``relative`` -> mark)."""

    todo: list[Fragment]
    done: dict[str, dict]
    format: str


def model_fingerprint(models_json: list[str]) -> str:
    """A hash of the spin models (their canonical JSON), in order."""
    return hashlib.sha256("\n".join(models_json).encode()).hexdigest()[:32]


def fingerprint(metadata: dict[str, str], models_json: list[str]) -> str:
    """A hash of what determines the archive's rows: the models and the run's
    provenance (``tagging.run.run_metadata``) but for the software version and the
    input's name."""
    kept = {k: v for k, v in metadata.items() if k not in ("software", "input")}
    text = json.dumps({"models": models_json, "provenance": kept}, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()[:32]


def _is_data(path: Path, root: Path) -> bool:
    parts = path.relative_to(root).parts
    return path.is_file() and not any(p.startswith((".", "_")) for p in parts)


def _files(dataset: Path) -> list[Path]:
    if not dataset.exists():
        raise InputError("DATASET", str(dataset), "no such file or folder")
    if dataset.is_file():
        return [dataset]
    return sorted(p for p in dataset.rglob("*") if _is_data(p, dataset))


def _format(files: list[Path], dataset: Path) -> str:
    kinds = {FORMATS.get(p.suffix.lower()) for p in files}
    if not files or kinds == {None}:
        raise InputError("DATASET", str(dataset), "holds no Parquet (.parquet) or Arrow IPC "
                         "(.arrow, .arrows, .feather) files")
    if len(kinds) > 1:
        names = sorted({p.suffix for p in files})
        raise InputError("DATASET", str(dataset), f"mixes file kinds {names}; a dataset is "
                         "all Parquet or all Arrow IPC")
    return kinds.pop()


def _check_columns(files: list[Path], fmt: str, dataset: Path) -> None:
    """Refuse a dataset whose schema lacks the event columns (read from its files'
    metadata, as ``pyarrow.dataset`` unifies it; no data is read)."""
    import pyarrow as pa
    import pyarrow.dataset as ds

    try:
        names = ds.dataset([str(p) for p in files], format=fmt).schema.names
    except (OSError, pa.ArrowException) as exc:
        raise EventFileError("DATASET", str(dataset), f"cannot read as a dataset: {exc}") \
            from None
    missing = [c for c in REQUIRED if c not in names]
    if missing:
        raise EventFileError("DATASET", str(dataset), f"has no column {', '.join(missing)} "
                             f"(needs {', '.join(REQUIRED)}); columns: {names}")


def _check_out(dataset: Path, out: Path) -> None:
    data, target = dataset.resolve(), out.resolve()
    if target == data or data in target.parents:
        raise InputError("--out", str(out), "lies inside the dataset; choose a folder "
                         "outside it")
    if out.exists() and not out.is_dir():
        raise InputError("--out", str(out), "is a file; give a folder")


def read_mark(path: Path) -> dict | None:
    """A fragment's completion mark, or None when there is none (or it is unreadable)."""
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


def _fragment(path: Path, dataset: Path, out: Path) -> Fragment:
    relative = path.name if dataset.is_file() else path.relative_to(dataset).as_posix()
    stem = relative[: -len(path.suffix)] if path.suffix else relative
    return Fragment(str(path.resolve()), relative, str((out / f"{stem}.parquet").resolve()),
                    str((out / "_rejects" / f"{stem}.rejects.arrow").resolve()),
                    str((out / "_fragments" / f"{stem}.json").resolve()), path.stat().st_size)


def plan_run(dataset: Path, out: Path, run_fingerprint: str) -> Plan:
    """The fragments of ``dataset`` to re-tag into ``out`` and those already done.

    Raises
    ------
    InputError
        A missing dataset, one without Parquet or Arrow files or without the event
        columns, or an output folder inside the dataset.
    """
    files = _files(dataset)
    fmt = _format(files, dataset)
    files = [p for p in files if FORMATS.get(p.suffix.lower()) == fmt]
    _check_columns(files, fmt, dataset)
    _check_out(dataset, out)
    todo, done = [], {}
    for path in files:
        fragment = _fragment(path, dataset, out)
        mark = read_mark(Path(fragment.mark))
        if (mark is not None and mark.get("fingerprint") == run_fingerprint
                and mark.get("source_bytes") == fragment.size and Path(fragment.output).exists()):
            done[fragment.relative] = mark
        else:
            todo.append(fragment)
    return Plan(todo, done, fmt)
