"""``turnstamp report``: a night report as one self-contained HTML page and PNG figures.

The report reads an output folder, never the service: the Arrow streams
(``archive``, ``significance``, ``profiles``, ``clock``, ``ledger``, ``rejects``,
read with ``files.reader`` so that open files of a live folder count up to their
last complete batch), ``status.json`` when present, and the provenance in the
files' schema metadata. A folder written by ``turnstamp tag`` holds one file of
archive schema under any name (and perhaps its rejects); the report then builds
what the archive alone allows (profile and significance from the tagged phases)
and says what is missing.

Per target the report draws the pulse profile (two cycles), the phase-time map
(phase against time as an image), significance against time and the clock-chain
check; then the accounting of every event and the provenance.
``report-data.json`` beside the page holds the numbers behind every figure, so
that tests (and people) can check a figure against the Arrow files without
reading pixels.

matplotlib is an optional extra (``pip install 'turnstamp[report]'``); it is
imported only when a report is built, with the Agg renderer (no display).

Modules: ``night`` reads the folder, ``timegrid`` reduces the archive to a time
grid, ``content`` gathers what every section needs, ``figuredata`` and
``accounting`` compute the numbers, ``figures`` draws them, ``section`` puts one
target together, ``page`` writes the HTML, ``build`` assembles the report and
``command`` is ``turnstamp report``.
"""

from __future__ import annotations

from ...errors import ReportError
from .build import build_report
from .command import report_main
from .figures import OKABE_ITO
from .night import NightFolder, load_night
from .timegrid import GRID_S

__all__ = [
    "OKABE_ITO",
    "GRID_S",
    "ReportError",
    "NightFolder",
    "load_night",
    "build_report",
    "report_main",
]
