"""``turnstamp check CONFIG`` and the configuration's JSON Schema (issue 10).

The schema describes every key and agrees with the loader: the README's example and
the demo's configuration validate against it, and so does what the loader accepts.
"""

import json
import re
import tomllib
from pathlib import Path

import jsonschema
import pytest

from turnstamp.commands.check import tonight
from turnstamp.commands.main import main
from turnstamp.config import ServiceConfig, SiteConfig
from turnstamp.core.timebase import parse_instant
from turnstamp.demo import data_file
from turnstamp.demo.live import demo_config

ROOT = Path(__file__).resolve().parents[1]
SCHEMA = json.loads((ROOT / "schemas" / "config.schema.json").read_text())


def readme_config() -> str:
    """The configuration example of the README ("Running at the telescope")."""
    text = (ROOT / "README.md").read_text()
    blocks = re.findall(r"```toml\n(.*?)```", text, re.S)
    return next(b for b in blocks if "[[targets]]" in b)


def test_the_readme_example_and_the_demo_config_validate_against_the_schema(tmp_path):
    for text in (readme_config(), demo_config(tmp_path, 5555, 5556)):
        document = tomllib.loads(text)
        jsonschema.validate(document, SCHEMA)  # raises when they disagree
        assert document["targets"][0]["name"] == "lantern"


def test_an_energy_with_its_unit_validates_and_a_bare_number_does_not():
    base = {"site": {"name": "x", "latitude_deg": 1.0, "longitude_deg": 2.0, "height_m": 3.0},
            "targets": [{"name": "t", "models": ["m.toml"],
                         "recipes": [{"name": "r", "energy_min": "500 GeV"}]}]}
    jsonschema.validate(base, SCHEMA)
    ServiceConfig.model_validate(base)  # the loader agrees
    base["targets"][0]["recipes"][0]["energy_min"] = 500
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate(base, SCHEMA)
    with pytest.raises(ValueError, match="has no unit"):
        ServiceConfig.model_validate(base)


def test_every_key_of_the_schema_is_described():
    undescribed = []
    definitions = SCHEMA["$defs"]
    for owner, schema in [("ServiceConfig", SCHEMA), *definitions.items()]:
        for key, prop in schema.get("properties", {}).items():
            target = prop
            refs = [p["$ref"] for p in [prop, *prop.get("anyOf", [])] if "$ref" in p]
            if refs:
                target = {**definitions[refs[0].rsplit("/", 1)[1]], **prop}
            if not target.get("description"):
                undescribed.append(f"{owner}.{key}")
    assert not undescribed, undescribed


def test_check_the_demo_configuration_tonight(tmp_path, capsys):
    path = tmp_path / "demo.toml"
    path.write_text(demo_config(tmp_path / "out", 5555, 5556))
    assert main(["check", str(path), "--night", "2026-12-01"]) == 0
    out = capsys.readouterr().out
    assert "configuration" in out and "valid" in out
    assert "tonight: 2026-12-01T18:56:55Z to 2026-12-02T18:56:55Z" in out  # local mean noon
    assert "model lantern-2026a" in out and "covers tonight" in out
    assert "turnstamp watch --endpoint tcp://127.0.0.1:5556" in out
    assert "hard (energy >= 1 TeV, within 0.3 deg, score >= 0.5, weighted)" in out
    assert "ephemeris: JPL kernel" in out and out.rstrip().endswith("ready for tonight")


def test_check_names_a_target_without_a_model_valid_tonight(tmp_path, capsys):
    path = tmp_path / "demo.toml"
    path.write_text(demo_config(tmp_path / "out", 5555, 5556))
    assert main(["check", str(path), "--night", "2030-01-05", "--json"]) == 1
    found = json.loads(capsys.readouterr().out)
    assert not found["ready"]
    assert any(p.startswith("target lantern: no spin model is valid for any of tonight")
               for p in found["problems"])
    assert any("leap-second table expired" in w for w in found["warnings"])


def test_check_refuses_an_invalid_configuration_in_one_line(tmp_path, capsys):
    path = tmp_path / "bad.toml"
    path.write_text(readme_config().replace('energy_min = "1 TeV"', "energy_min = 1000"))
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err
    assert "energy_min" in err and "1000" in err and "Traceback" not in err


def test_check_warns_about_imprecise_digits_and_missing_files(tmp_path, capsys):
    model = tmp_path / "coarse.toml"
    model.write_text(Path(data_file("lantern.toml")).read_text().replace(
        '"311.370158241234"', '"311.37"'))
    path = tmp_path / "config.toml"
    path.write_text(f"""[site]
name = "Test Ridge"
latitude_deg = 10.0
longitude_deg = 20.0
height_m = 100.0

[[targets]]
name = "coarse"
models = ["{model}"]

[[targets]]
name = "missing"
models = ["nowhere.toml"]
template = "no-template.toml"
""")
    assert main(["check", str(path), "--night", "2026-12-01"]) == 1
    out = capsys.readouterr().out
    assert "frequency_hz = 311.37 is stated to ±0.005" in out
    assert "model nowhere.toml" in out or "nowhere.toml" in out
    assert "no-template.toml" in out


def test_tonight_runs_from_local_mean_noon_at_the_site():
    site = SiteConfig(name="x", latitude_deg=0.0, longitude_deg=90.0, height_m=0.0)
    start, stop = tonight(site, "2026-12-01")
    assert start == parse_instant("2026-12-01T06:00:00")  # noon at 90 deg east = 06:00 UTC
    assert stop - start == 86_400 * 10**9
    # at 03:00 UTC (09:00 local) the current night began the day before
    now = (parse_instant("2026-12-02T03:00:00") - parse_instant("1970-01-01T00:00:00")) / 1e9
    assert tonight(site, None, now_unix=now)[0] == parse_instant("2026-12-01T06:00:00")
