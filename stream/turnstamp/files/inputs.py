"""The input files: our own TOML/JSON spin-model and template files, with exact decimals."""

from __future__ import annotations

import json
import tomllib
from decimal import Decimal
from pathlib import Path
from typing import TypeVar

from pydantic import BaseModel, ValidationError

from ..errors import InputError, ModelError

__all__ = ["read_mapping", "validate", "load_spin_model", "load_template"]

M = TypeVar("M", bound=BaseModel)


def read_mapping(path: str | Path) -> dict:
    """Parse a TOML or JSON file; decimals keep every digit (``parse_float=Decimal``)."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ModelError("path", str(path), f"cannot read: {exc.strerror or exc}") from None
    try:
        if path.suffix.lower() == ".json":
            return json.loads(text, parse_float=Decimal)
        return tomllib.loads(text, parse_float=Decimal)
    except (tomllib.TOMLDecodeError, json.JSONDecodeError) as exc:
        raise ModelError("path", str(path), f"not valid {path.suffix[1:].upper()}: {exc}") from None


def validate(model: type[M], data: dict, source: str, error: type[InputError] = ModelError) -> M:
    """Validate ``data``; on failure raise ``error`` naming every bad field and value."""
    try:
        return model.model_validate(data)
    except ValidationError as exc:
        problems = []
        for item in exc.errors():
            where = ".".join(str(part) for part in item["loc"]) or "(top level)"
            value = item.get("input")
            if not item["loc"]:  # the file as a whole (e.g. a file of another kind)
                problems.append(item["msg"].removeprefix("Value error, "))
            elif item["type"] == "missing":
                problems.append(f"{where}: required field missing")
            elif item["type"] == "extra_forbidden":
                problems.append(f"{where} = {value!r}: unknown field")
            else:
                shown = value if not isinstance(value, dict) else "{...}"
                problems.append(f"{where} = {shown!r}: {item['msg']}")
        first = exc.errors()[0]
        field = ".".join(str(p) for p in first["loc"]) or "(top level)"
        raise error(field, first.get("input"), first["msg"],
                    message=f"{source}: " + "; ".join(problems)) from None


def load_spin_model(path: str | Path):
    """A ``SpinModel`` from a TOML or JSON file."""
    from ..core.spin import SpinModel

    return validate(SpinModel, read_mapping(path), str(path))


def load_template(path: str | Path):
    """A ``PulseTemplate`` from a TOML or JSON file."""
    from ..core.template import PulseTemplate

    return validate(PulseTemplate, read_mapping(path), str(path))
