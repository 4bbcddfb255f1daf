"""The numerical core must not pull in the shell's transport or file libraries."""

import subprocess
import sys

# Every module of the core, so that one missed by the discovery below still fails here.
CORE_MODULES = [
    "accounting", "barycentre", "batch", "binarydelay", "chain", "clock", "clock.apparent",
    "clock.check", "clock.chunks", "clock.diagnose", "clock.joint", "clock.mistakes",
    "clock.numbers", "clock.rating", "clock.robust", "clock.series", "clock.smear",
    "clock.verdict", "clock.wobble", "clock.wording", "correctiontable", "cycles", "earth",
    "binnedarrays", "emission", "eventfit", "flags", "harmonicsums", "intervalsegments", "kepler",
    "moments", "momentstate", "orbit", "peaks",
    "periodicity", "phase", "pipeline", "profile", "readout", "recipemoments", "refold",
    "significance", "simulate",
    "spin", "stacking", "tagger", "targets", "template", "templatefit", "templatelikelihood",
    "templatenoise", "timebase", "timebinned", "twofloat",
]


def test_core_imports_neither_zmq_nor_pyarrow():
    code = (
        "import importlib, pkgutil, sys\n"
        "import turnstamp.core as core\n"
        "names = [m.name for m in pkgutil.walk_packages(core.__path__, 'turnstamp.core.')]\n"
        f"names += ['turnstamp.core.' + m for m in {CORE_MODULES!r}]\n"
        "for name in names:\n"
        "    importlib.import_module(name)\n"
        "found = sorted(set(names))\n"
        "bad = sorted(n for n in ('zmq', 'pyarrow') if n in sys.modules)\n"
        "print(','.join(bad))\n"
        "print(len(found))\n"
    )
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                            check=True)
    bad, count = result.stdout.splitlines()
    assert bad == "", f"core imported: {bad}"
    assert int(count) == len(CORE_MODULES), "a core module is missing from CORE_MODULES"
