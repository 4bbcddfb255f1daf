"""The house rules that keep the tree readable: concept-sized modules, the linter's
limits on function size, and tests that stand on the repository alone."""

import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "stream" / "turnstamp"
MAX_MODULE_LINES = 400  # one concept per file (DEVELOPERS.md, "The house")


def test_every_module_is_concept_sized():
    long = {str(path.relative_to(ROOT)): n for path in PACKAGE.rglob("*.py")
            if (n := len(path.read_text(encoding="utf-8").splitlines())) > MAX_MODULE_LINES}
    assert not long, f"modules over {MAX_MODULE_LINES} lines: {long}"


@pytest.mark.skipif(shutil.which("ruff") is None and not Path(sys.executable).with_name(
    "ruff").exists(), reason="ruff not installed (pip install -e '.[test]')")
def test_the_linter_passes_with_its_complexity_and_statement_limits():
    ruff = Path(sys.executable).with_name("ruff")
    command = [str(ruff) if ruff.exists() else "ruff", "check", "stream", "tests"]
    result = subprocess.run(command, cwd=ROOT, capture_output=True, text=True)
    assert result.returncode == 0, result.stdout[-3000:]


def test_tests_name_their_sources_and_need_nothing_outside_the_repository():
    outside = re.compile(r"\.\./shared|REFERENCES\.md")
    offenders = [f"{path.relative_to(ROOT)}:{number}"
                 for path in (ROOT / "tests").rglob("*.py") if path.name != "test_house.py"
                 for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1)
                 if outside.search(line)]
    assert not offenders, offenders


# What each room may import from the package (DEVELOPERS.md, "The map"). Top-level
# modules count as rooms of their own; commands/ may import everything.
ALLOWED = {
    "core": {"errors"},
    "wire": {"core", "errors", "files"},
    "files": {"core", "errors"},
    "config": {"endpoints", "errors", "files"},
    "endpoints": set(),
    "assemble": {"config", "core", "errors", "files", "__init__"},
    "tagging": {"assemble", "config", "core", "errors", "files", "wire"},
    "archiveclock": {"assemble", "config", "core", "errors", "files"},
    "service": {"assemble", "config", "core", "errors", "files", "wire", "__init__"},
    "views": {"core", "errors", "files", "__init__"},
    "demo": {"assemble", "config", "core", "errors", "files", "views", "wire"},
    "bench": {"assemble", "config", "core", "demo", "errors", "files", "service", "tagging",
              "wire"},
}


def _imported_rooms(path: Path) -> set[str]:
    import ast

    module = path.relative_to(PACKAGE).with_suffix("").parts
    package = module[:-1]
    rooms = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom) and node.level:
            base = package[:len(package) - node.level + 1]
            target = [*base, *(node.module.split(".") if node.module else [])]
            rooms.add(target[0] if target else "__init__")
        elif isinstance(node, ast.ImportFrom) and (node.module or "").startswith("turnstamp."):
            rooms.add(node.module.split(".")[1])
    return rooms


def test_each_room_imports_only_what_the_map_allows():
    wrong = {}
    for path in PACKAGE.rglob("*.py"):
        parts = path.relative_to(PACKAGE).parts
        room = parts[0] if len(parts) > 1 else path.stem
        if room in ALLOWED:
            extra = _imported_rooms(path) - ALLOWED[room] - {room}
            if extra:
                wrong[str(path.relative_to(ROOT))] = sorted(extra)
    assert not wrong, wrong
