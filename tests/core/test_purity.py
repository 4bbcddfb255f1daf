"""The numerical core must not pull in the shell's transport or file libraries."""

import subprocess
import sys

CORE_MODULES = ["twofloat", "timebase", "earth", "barycentre", "spin", "orbit", "stats",
                "profile", "template", "clockcheck", "pipeline", "simulate"]


def test_core_imports_neither_zmq_nor_pyarrow():
    code = (
        "import importlib, pkgutil, sys\n"
        "import turnstamp.core as core\n"
        "for m in pkgutil.iter_modules(core.__path__):\n"
        "    importlib.import_module('turnstamp.core.' + m.name)\n"
        "bad = sorted(n for n in ('zmq', 'pyarrow') if n in sys.modules)\n"
        "print(','.join(bad))\n"
    )
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                            check=True)
    assert result.stdout.strip() == "", f"core imported: {result.stdout.strip()}"
