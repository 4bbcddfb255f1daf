"""The files in schemas/ are what the code would write now, and they describe the data."""

import json
from pathlib import Path

import pyarrow as pa

from turnstamp.commands.schemas import check_schemas
from turnstamp.files import schemas

SCHEMAS = Path(__file__).resolve().parents[2] / "schemas"


def test_schema_files_are_up_to_date():
    stale = check_schemas(SCHEMAS)
    assert not stale, f"run `make schemas` (or `turnstamp schemas --write schemas`): {stale}"


def test_every_output_field_documents_its_meaning():
    for name, schema in {"events": schemas.EVENTS, **schemas.OUTPUTS}.items():
        described = json.loads((SCHEMAS / f"{name}.arrow.json").read_text())
        assert [f["name"] for f in described["fields"]] == schema.names
        assert all(f["description"] for f in described["fields"]), name
        # the serialised Arrow schema round-trips
        data = (SCHEMAS / f"{name}.arrow-schema").read_bytes()
        assert pa.ipc.read_schema(pa.py_buffer(data)).equals(schema, check_metadata=False)


def test_json_schemas_validate_the_shipped_examples():
    import tomllib

    import jsonschema

    from turnstamp.demo import data_file

    for example, schema in (("lantern.toml", "spin-model"), ("ember.toml", "spin-model"),
                            ("lantern-template.toml", "template")):
        data = tomllib.loads(Path(data_file(example)).read_text())
        jsonschema.validate(data, json.loads((SCHEMAS / f"{schema}.schema.json").read_text()))
    config = tomllib.loads((SCHEMAS.parent / "docker" / "service.toml").read_text())
    jsonschema.validate(config, json.loads((SCHEMAS / "config.schema.json").read_text()))
