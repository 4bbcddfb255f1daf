"""An offline run's statistics summed in a helper process, beside the tagging.

Theory of operation
-------------------
A run's statistics (the trigonometric moments and phase histograms of its tagged
events, a third of the tagging's time) depend only on a few archive columns of each
batch. A second thread cannot add them in parallel to any profit: numpy hands the
interpreter lock back and forth at every one of the moments' many small calls, and
two threads on two CPUs spent more time passing it than they saved. A process has a
lock of its own.

``MomentsAside.fork`` forks one helper as early as it can: a command forks it
first of all, while its process is small and has a single thread, and tells it the
run's recipes and empty totals (``begin``) once it has loaded them; the helper
imports what it needs meanwhile. For each batch the tagging process copies the
columns the moments need (TT time, phase, recipe and quality flags, and the weight
when a recipe uses it: 24–32 bytes an event) into one of two slots of shared memory
and goes on with the next batch; the helper adds them to its totals, in input order,
and hands the slot back. These are the additions the run would make itself, in the
same order (a slot holds a whole batch of a run), so the totals are the same to the
last bit. At the end the helper sends its totals (``TimeBinnedMoments.to_state``)
and the memory it held alone, and exits.

Where processes cannot be forked, or only one CPU is there to use, ``fork`` returns
None and the run sums in its own process. A failure of the helper (its error, or its
death) is raised in the run at its next batch or at ``finish``; the helper ends when
the run's end of the pipe closes, however the run ends.

A fork copies the forking thread alone, and a lock that another thread held at that
instant stays held in the copy: so the helper touches nothing but numpy, the core's
moments, its pipes and the shared memory, and leaves by ``os._exit`` (no flushing of
the standard streams, no exit handlers); it is forked before the run starts its own
threads, and before the input's first pages are read (the run writing into pages it
shared with the helper would copy each). Only a program
of its own asks for one (``turnstamp tag``), never a library call inside a server or
a cluster worker.
"""

from __future__ import annotations

import mmap
import multiprocessing
import os
import signal
from collections.abc import Iterable

import numpy as np

from ..core.timebinned import TimeBinnedMoments

__all__ = ["MomentsAside"]

_SLOTS = 2
_FIELDS = (("site_tt_ns", np.int64), ("phase", np.float64), ("recipe_flags", np.uint32),
           ("quality_flags", np.uint32), ("weight", np.float64))


def _cpus() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # no affinity outside Linux
        return os.cpu_count() or 1


def _own_memory_kb() -> int:
    """Resident memory this process holds alone, shared with no other (kB; 0 where
    ``/proc`` does not say): what a helper adds to the run's."""
    try:
        with open("/proc/self/smaps_rollup") as rollup:
            return sum(int(line.split()[1]) for line in rollup
                       if line.startswith(("Private_Clean:", "Private_Dirty:")))
    except OSError:
        return 0


class _Slots:
    """``_SLOTS`` column sets of ``rows`` events each, in memory shared with the helper
    (an anonymous shared mapping, inherited by the fork)."""

    def __init__(self, rows: int):
        self.rows = rows
        size = rows * sum(np.dtype(dtype).itemsize for _, dtype in _FIELDS)
        self.memory = mmap.mmap(-1, size * _SLOTS)  # pages untouched (no weights) stay free
        self.views = []
        for slot in range(_SLOTS):
            offset, views = slot * size, {}
            for name, dtype in _FIELDS:
                views[name] = np.frombuffer(self.memory, dtype, rows, offset)
                offset += rows * np.dtype(dtype).itemsize
            self.views.append(views)

    def columns(self, slot: int, n: int, weighted: bool) -> dict[str, np.ndarray]:
        return {name: view[:n] for name, view in self.views[slot].items()
                if weighted or name != "weight"}


def _serve(slots: _Slots, orders, replies, theirs) -> None:
    """The helper: take the recipes (whether each weights its events) and the empty
    totals, add each slot it is given to the totals and hand the slot back; at the end
    (``None``), send the totals' states and the memory it holds alone. ``theirs``: the
    run's ends of the pipes, inherited by the fork and closed here, so that the run's
    end closing is seen here."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the run's to handle
    try:
        for end in theirs:
            end.close()
        from ..core import recipemoments  # light: beside the run's own start-up

        weighted, states = orders.recv()
        totals = [TimeBinnedMoments.from_state(state) for state in states]
        while (order := orders.recv()) is not None:
            slot, n = order
            c = slots.columns(slot, n, any(weighted))
            recipemoments.add_recipe_moments(totals, weighted, c["site_tt_ns"], c["phase"],
                                             c.get("weight"), c["recipe_flags"],
                                             c["quality_flags"])
            replies.send(slot)
        replies.send(([total.to_state() for total in totals], _own_memory_kb()))
    except EOFError:  # the run ended without asking for the totals
        pass
    except Exception as exc:  # handed to the run, which raises it
        try:
            replies.send(exc)
        except Exception:  # the run is gone too
            pass
    finally:
        os._exit(0)  # module docstring: nothing of the parent's is flushed or run


class MomentsAside:
    """The helper process of one run (module docstring); made by ``start``."""

    def __init__(self, rows: int):
        self._slots = _Slots(rows)
        self._free = list(range(_SLOTS))
        self._weighted = False  # a recipe uses weights: set by ``begin``
        context = multiprocessing.get_context("fork")
        orders, self._orders = context.Pipe(duplex=False)  # (receiving end, sending end)
        self._replies, replies = context.Pipe(duplex=False)
        self._process = context.Process(
            target=_serve, args=(self._slots, orders, replies, (self._orders, self._replies)),
            name="tag-moments", daemon=True)
        self._process.start()
        self.own_memory_kb = 0  # the helper's memory, shared with no other: at ``finish``
        orders.close()  # the helper's ends: its death is seen here as the pipe's end
        replies.close()

    @classmethod
    def fork(cls, rows: int) -> MomentsAside | None:
        """A helper that will add batches handed over ``rows`` events at a time, once it
        has been told its recipes (``begin``); None where it would not pay (one CPU)
        or cannot be (no fork)."""
        if _cpus() < 2 or "fork" not in multiprocessing.get_all_start_methods():
            return None
        return cls(rows)

    @classmethod
    def start(cls, recipes, totals: Iterable[TimeBinnedMoments],
              rows: int) -> MomentsAside | None:
        """``fork``, then ``begin``."""
        helper = cls.fork(rows)
        if helper is not None:
            helper.begin(recipes, totals)
        return helper

    def begin(self, recipes, totals: Iterable[TimeBinnedMoments]) -> None:
        """Tell the helper the run's recipes (whether each weights its events: all it
        needs of them) and the totals to add to (copies of them)."""
        weighted = [recipe.use_weights for recipe in recipes]
        self._weighted = any(weighted)
        self._send((weighted, [total.to_state() for total in totals]))

    def _ended_early(self) -> RuntimeError:
        self._process.join(timeout=1)
        return RuntimeError("the statistics helper process ended early (exit status "
                            f"{self._process.exitcode})")

    def _send(self, order) -> None:
        try:
            self._orders.send(order)
        except BrokenPipeError:
            raise self._ended_early() from None

    def _reply(self):
        try:
            reply = self._replies.recv()
        except EOFError:
            raise self._ended_early() from None
        if isinstance(reply, BaseException):
            raise reply
        return reply

    def add(self, columns: dict[str, np.ndarray]) -> None:
        """Hand over a batch's archive columns (waits while both slots are busy)."""
        n = len(columns["phase"])
        for lo in range(0, n, self._slots.rows):
            if not self._free:
                self._free.append(self._reply())
            slot = self._free.pop()
            rows = min(self._slots.rows, n - lo)
            for name, view in self._slots.columns(slot, rows, self._weighted).items():
                view[:] = columns[name][lo : lo + rows]
            self._send((slot, rows))

    def finish(self) -> list[TimeBinnedMoments]:
        """The totals, once the helper has added every batch handed over."""
        self._send(None)
        while isinstance(reply := self._reply(), int):
            pass  # a slot handed back
        self._process.join()
        states, self.own_memory_kb = reply
        return [TimeBinnedMoments.from_state(state) for state in states]

    def close(self) -> None:
        """End the helper (at once after a failure; it has already ended after
        ``finish``)."""
        self._orders.close()
        self._process.join(timeout=5)
        if self._process.is_alive():
            self._process.kill()
            self._process.join()
        self._replies.close()
