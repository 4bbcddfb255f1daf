"""The Docker files, read (no Docker engine here): one image for both compose services,
the output volume writable by the container's user, the ports exposed, a .dockerignore,
and command lines that our own parser accepts (issue 10)."""

import json
import re
from pathlib import Path

from turnstamp.commands.main import build_parser
from turnstamp.config import load_config

ROOT = Path(__file__).resolve().parents[1]
DOCKERFILE = (ROOT / "docker" / "Dockerfile").read_text()
COMPOSE = (ROOT / "docker" / "compose.yaml").read_text()


def commands() -> list[list[str]]:
    """The ``command:`` lists of the compose file (YAML flow sequences are JSON here)."""
    return [json.loads(block) for block in re.findall(r"command:\s*(\[.*?\])", COMPOSE, re.S)]


def test_compose_command_lines_parse_with_our_command_line():
    found = commands()
    assert [c[0] for c in found] == ["run", "simulate", "retag"]
    for argv in found:
        build_parser().parse_args(argv)  # SystemExit on an unknown option
    config = load_config(ROOT / "docker" / "service.toml")
    assert config.output.directory == Path("/data/out")


def test_one_image_for_every_service():
    assert COMPOSE.count("build:") == 1
    images = re.findall(r"image:\s*(\S+)", COMPOSE)
    assert len(images) == 5 and len(set(images)) == 1


def test_the_dask_scheduler_and_workers_serve_the_retag_job():
    entrypoints = [json.loads(block) for block in
                   re.findall(r"entrypoint:\s*(\[.*?\])", COMPOSE, re.S)]
    scheduler = next(e for e in entrypoints if e[:2] == ["dask", "scheduler"])
    worker = next(e for e in entrypoints if e[:2] == ["dask", "worker"])
    port = scheduler[scheduler.index("--port") + 1]
    address = f"tcp://scheduler:{port}"
    assert worker[2] == address and worker[worker.index("--nthreads") + 1] == "1"
    retag = next(c for c in commands() if c[0] == "retag")
    assert retag[retag.index("--scheduler") + 1] == address
    # the job and the workers see the same volume: workers write what the job reads
    out = retag[retag.index("--out-dir") + 1]
    assert out.startswith("/data/") and COMPOSE.count("turnstamp-data:/data") >= 3
    # the `dask` command the image runs is installed by the project's own dependencies
    import tomllib

    project = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    assert any(d.startswith("distributed") for d in project["dependencies"])


def test_the_output_volume_is_writable_by_the_containers_user():
    user = re.search(r"^USER (\S+)", DOCKERFILE, re.M).group(1)
    chown = re.search(r"chown (\S+):\S+ /data", DOCKERFILE)
    assert chown and chown.group(1) == user != "root"
    # ownership must be set before the VOLUME line (later changes to /data are discarded)
    assert DOCKERFILE.index("chown") < DOCKERFILE.index("VOLUME")
    assert "turnstamp-data:/data" in COMPOSE


def test_the_publish_and_control_ports_are_exposed_and_published():
    config = load_config(ROOT / "docker" / "service.toml")
    exposed = set(re.search(r"^EXPOSE (.+)$", DOCKERFILE, re.M).group(1).split())
    for endpoint in (config.output.publish_endpoint, config.control.endpoint,
                     config.intake.endpoints[0]):
        port = endpoint.rsplit(":", 1)[1]
        assert port in exposed
        assert f'"127.0.0.1:{port}:{port}"' in COMPOSE  # on the host's loopback only


def test_a_dockerignore_keeps_the_context_small():
    ignored = [line.strip() for line in (ROOT / ".dockerignore").read_text().splitlines()
               if line.strip() and not line.startswith("#")]
    for entry in (".git", ".venv", "tests", "turnstamp-demo"):
        assert entry in ignored
    copied = " ".join(re.findall(r"^COPY (.+?) \S+$", DOCKERFILE, re.M)).split()
    assert sorted(copied) == ["README.md", "pyproject.toml", "stream"]
    assert not set(copied) & set(ignored)
