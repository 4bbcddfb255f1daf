"""``turnstamp schemas``: write the project's formats into ``schemas/`` so other tools
need not read our code (``--check``: exit 1 if a file is out of date).

JSON Schemas (from the pydantic models) for the service configuration, spin models,
pulse templates and the wire header; for every Arrow schema, a JSON description
(field, type, nullability, unit, meaning) and the schema itself in Arrow's own
serialisation (``.arrow-schema``, readable with ``pyarrow.ipc.read_schema``).
"""

from __future__ import annotations

import json
from pathlib import Path

__all__ = ["add_parser", "run", "schema_files", "write_schemas", "check_schemas"]


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("schemas", help="write the JSON/Arrow schemas (or check them)")
    p.add_argument("directory", nargs="?", default="schemas")
    p.add_argument("--write", action="store_true", help="(default) write the files")
    p.add_argument("--check", action="store_true", help="exit 1 if any file is out of date")
    p.set_defaults(run=run)


def run(args) -> int:
    if args.check:
        stale = check_schemas(Path(args.directory))
        for name in stale:
            print(f"out of date: {name}")
        return 1 if stale else 0
    for path in write_schemas(Path(args.directory)):
        print(path)
    return 0


def schema_files() -> dict[str, bytes]:
    from ..config import ServiceConfig
    from ..core.spin import SpinModel
    from ..core.template import PulseTemplate
    from ..files import schemas
    from ..retag.merge import STATISTICS_SCHEMA
    from ..wire.message import MessageHeader

    def dump(obj) -> bytes:
        return (json.dumps(obj, indent=2, sort_keys=True, ensure_ascii=False) + "\n").encode()

    files = {
        "config.schema.json": dump(ServiceConfig.model_json_schema()),
        "spin-model.schema.json": dump(SpinModel.model_json_schema()),
        "template.schema.json": dump(PulseTemplate.model_json_schema()),
        "wire-header.schema.json": dump(MessageHeader.model_json_schema()),
        "retag-statistics.schema.json": dump(STATISTICS_SCHEMA),
    }
    arrow = {"events": schemas.EVENTS, **schemas.OUTPUTS}
    for name, schema in arrow.items():
        meta = {k.decode(): v.decode() for k, v in (schema.metadata or {}).items()}
        files[f"{name}.arrow.json"] = dump({"name": name, **meta,
                                            "fields": schemas.field_docs(schema)})
        files[f"{name}.arrow-schema"] = schema.serialize().to_pybytes()
    return files


def write_schemas(directory: Path) -> list[Path]:
    directory.mkdir(parents=True, exist_ok=True)
    written = []
    for name, content in schema_files().items():
        path = directory / name
        path.write_bytes(content)
        written.append(path)
    return written


def check_schemas(directory: Path) -> list[str]:
    """Names of files that are missing or differ from what the code would write."""
    stale = []
    for name, content in schema_files().items():
        path = directory / name
        if not path.exists() or path.read_bytes() != content:
            stale.append(name)
    return stale
