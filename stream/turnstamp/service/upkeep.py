"""Upkeep while running: reload changed models and templates, extend the tables.

Reloading compares file modification times; a file that fails to load keeps the
previous model in use and becomes a warning, never an error. Barycentre tables are
kept a day ahead of the latest event: a background thread builds them (never the
hot path) and the loop installs them when they are ready.
"""

from __future__ import annotations

from collections.abc import Iterable, MutableSequence
from concurrent.futures import Future, ThreadPoolExecutor
from pathlib import Path

from ..assemble import TableCache, load_phase_calculators
from ..config import TargetConfig
from ..core.pipeline import Pipeline
from ..core.tagger import TargetTagger
from ..core.timebase import NS_PER_DAY, NS_PER_S
from ..errors import InputError
from ..files.inputs import load_template

__all__ = ["EXTEND_BEFORE_NS", "model_files", "file_times", "Upkeep"]

EXTEND_BEFORE_NS = 12 * 3600 * NS_PER_S
"""Build the next day of tables once the latest event is this close to their end."""


def model_files(target: TargetConfig) -> list[Path]:
    """The spin-model files and the template file of a target."""
    return [Path(p) for p in (*target.models, *([target.template] if target.template else []))]


def file_times(targets: Iterable[TargetConfig]) -> dict[Path, float | None]:
    """Modification time of every model and template file (None when unreadable)."""
    return {path: _mtime(path) for target in targets for path in model_files(target)}


class Upkeep:
    """Model and template reload, and barycentre tables built ahead of need.

    Parameters
    ----------
    targets : sequence of TargetConfig
        The configured targets (their model and template files).
    pipeline : Pipeline
        The running pipeline; models, templates and tables are installed into it.
    tables : TableCache
        Builds (and caches) barycentre tables.
    warnings : mutable sequence of str
        Refused reloads are appended here.
    mtimes : dict of Path to float or None
        Modification times of the files as loaded (``file_times``).
    """

    def __init__(self, targets: Iterable[TargetConfig], pipeline: Pipeline, tables: TableCache,
                 warnings: MutableSequence[str], mtimes: dict[Path, float | None]):
        self.targets = tuple(targets)
        self.pipeline = pipeline
        self.tables = tables
        self.warnings = warnings
        self._mtimes = mtimes
        self._builder = ThreadPoolExecutor(max_workers=1, thread_name_prefix="tables")
        self._building: Future | None = None

    def reload_changed(self, force: bool = False) -> tuple[list[str], list[str]]:
        """Reload models and templates whose files changed (or all, with force).

        Returns (changes made, reloads refused); a refused reload keeps the
        previous model and is also appended to ``warnings``."""
        changes: list[str] = []
        refused: list[str] = []
        for target in self.targets:
            try:
                changes += self._reload(target, force)
            except (InputError, OSError) as exc:
                for path in target.models:
                    self._mtimes[Path(path)] = _mtime(path)
                refused.append(f"{target.name}: reload refused, previous model kept: {exc}")
        self.warnings.extend(refused)
        return changes, refused

    def _reload(self, target: TargetConfig, force: bool) -> list[str]:
        changes = []
        paths = [Path(p) for p in target.models]
        if force or any(_mtime(p) != self._mtimes.get(p) for p in paths):
            calculators = load_phase_calculators(paths)
            for path in paths:
                self._mtimes[path] = _mtime(path)
            table = self.pipeline.targets[target.name].tagger.table
            tagger = TargetTagger(target.name, calculators, table)
            restarted = self.pipeline.replace_models(target.name, tagger)
            changes.append(f"{target.name}: models reloaded ({', '.join(tagger.model_ids)})"
                           + ("; statistics restarted (new phase reference)"
                              if restarted else ""))
        template = Path(target.template) if target.template else None
        if template is not None and (force or _mtime(template) != self._mtimes.get(template)):
            self._mtimes[template] = _mtime(template)
            self.pipeline.replace_template(target.name, load_template(template))
            changes.append(f"{target.name}: template reloaded")
        return changes

    def extend_tables(self) -> None:
        """Install tables built in the background; start the next day when needed."""
        if self._building is not None:
            if not self._building.done():
                return
            for name, table in self._building.result():
                self.pipeline.targets[name].tagger.table.add(table)
            self._building = None
        pipeline = self.pipeline
        latest = max((m.latest_ns or 0 for ms in pipeline.moments.values() for m in ms),
                     default=0)
        stop = min(t.tagger.table.stop_ns for t in pipeline.targets.values())
        if latest and latest > stop - EXTEND_BEFORE_NS:
            jobs = [(name, t.position) for name, t in pipeline.targets.items()]

            def build():
                return [(name, self.tables.table(position, stop, stop + NS_PER_DAY))
                        for name, position in jobs]

            self._building = self._builder.submit(build)

    def close(self) -> None:
        """Stop building (a table being built is abandoned)."""
        self._builder.shutdown(wait=False, cancel_futures=True)


def _mtime(path) -> float | None:
    try:
        return Path(path).stat().st_mtime
    except OSError:
        return None
