"""An offline run of one file begun before its target is known.

``turnstamp tag`` spends its first few tenths of a second on one CPU, importing and
loading its configuration and site tables. ``FileTagging`` takes the steps that need
none of that first: it refuses outputs that may not be written, forks the statistics
helper while the process is still small and has a single thread (``aside``), and
starts reading the input (``inputs``), so that the first batches are decoded on the
second CPU during the start-up. ``tag`` then runs the file for the target once it
is loaded. This module imports numpy and pyarrow, not the configuration.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from pathlib import Path

from .aside import MomentsAside
from .inputs import SLICE_ROWS, open_events
from .outputs import check_outputs, rejects_path

__all__ = ["FileTagging"]


class FileTagging:
    """One input file on its way to one archive (module docstring); a context that ends
    the reading and the helper when it is left.

    Parameters
    ----------
    events, output, force, statistics_aside
        As for ``run.tag_file``.

    Raises
    ------
    EventFileError
        An output that may not be written, or an input that cannot be opened.
    """

    def __init__(self, events: Path, output: Path, force: bool = False,
                 statistics_aside: bool = False):
        self.started = time.perf_counter()
        self.events, self.output = events, output
        check_outputs(events, output, force)
        self.helper = MomentsAside.fork(SLICE_ROWS) if statistics_aside else None
        try:
            self.reader = open_events(events).start()  # after the fork (aside)
        except BaseException:
            self._close_helper()
            raise

    def tag(self, setup, env, scale, *, table_cache: Path | None = None, convention=None,
            on_batch: Callable[..., None] | None = None):
        """Tag the file for ``setup`` (as ``run.tag_file``); its ``TagSummary``."""
        from .run import TagRun, tag_into
        from .times import TimeConvention

        run = TagRun.start(setup, env, scale, table_cache, str(self.events), self.events.name,
                           convention or TimeConvention())
        return tag_into(self.reader, run, self.output, rejects_path(self.output),
                        self.started, on_batch, self.helper)

    def _close_helper(self) -> None:
        if self.helper is not None:
            self.helper.close()

    def __enter__(self) -> FileTagging:
        return self

    def __exit__(self, *exc) -> None:
        self.reader.close()
        self._close_helper()
