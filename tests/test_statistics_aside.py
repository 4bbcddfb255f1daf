"""The statistics of an offline run added up in a helper process are those the run
would add up itself, bit for bit; the helper's failures reach the run, and it never
outlives it."""

from pathlib import Path

import numpy as np
import pytest

from turnstamp.core import recipemoments
from turnstamp.core.accounting import EXCLUDED_FROM_STATISTICS
from turnstamp.core.recipemoments import add_recipe_moments
from turnstamp.core.targets import Recipe
from turnstamp.core.timebase import NS_PER_DAY
from turnstamp.demo import data_file
from turnstamp.tagging import aside
from turnstamp.tagging.aside import MomentsAside
from turnstamp.tagging.batchtag import StatisticsShape

RECIPES = [Recipe("all"), Recipe("weighted", use_weights=True), Recipe("cut", min_score=0.5)]
WEIGHTED = [recipe.use_weights for recipe in RECIPES]


def _batches(n_batches=4, rows=2500, seed=9):
    """Archive columns of a few batches spanning a TT day boundary, some rows outside
    the model's validity, the third recipe taking about half the rows."""
    rng = np.random.default_rng(seed)
    start = 9_500 * NS_PER_DAY - 3600 * 10**9
    for _ in range(n_batches):
        tt = np.sort(start + rng.integers(0, 2 * 3600 * 10**9, rows))
        flags = np.full(rows, 0b011, np.uint32) | np.where(rng.random(rows) < 0.5, 0b100, 0)
        quality = np.where(rng.random(rows) < 0.05, int(EXCLUDED_FROM_STATISTICS), 0)
        yield {"site_tt_ns": tt, "phase": rng.random(rows), "weight": rng.random(rows),
               "recipe_flags": flags.astype(np.uint32),
               "quality_flags": quality.astype(np.uint32)}


def _totals():
    return [StatisticsShape().moments() for _ in RECIPES]


def _needs_a_helper(started):
    if started is None:
        pytest.skip("no helper process here (one CPU or no fork)")
    return started


def _both_ways(rows):
    """The totals of the same batches added here and by a helper of ``rows``-event slots."""
    here = _totals()
    helper = _needs_a_helper(MomentsAside.start(RECIPES, _totals(), rows=rows))
    try:
        for columns in _batches():
            add_recipe_moments(here, WEIGHTED, columns["site_tt_ns"], columns["phase"],
                               columns["weight"], columns["recipe_flags"],
                               columns["quality_flags"])
            helper.add(columns)
        there = helper.finish()
        assert helper.own_memory_kb > 0 or not Path("/proc/self/smaps_rollup").exists()
        return here, there
    finally:
        helper.close()


def test_the_helper_adds_what_the_run_would_to_the_last_bit():
    here, there = _both_ways(rows=2500)  # a batch a slot, as a run hands them over
    assert [t.to_state() for t in there] == [t.to_state() for t in here]
    assert len(there[0].intervals()) == 2  # both sides of the day boundary


def test_batches_larger_than_a_slot_are_handed_over_in_pieces():
    here, there = _both_ways(rows=1000)  # 2500-row batches in three pieces
    for one, other in zip(here, there, strict=True):
        a, b = one.total(), other.total()
        assert a.count == b.count and a.sum_w == pytest.approx(b.sum_w, rel=1e-15)
        for name in ("cos_sums", "sin_sums", "hist_w", "hist_w2"):  # to rounding
            np.testing.assert_allclose(getattr(a, name), getattr(b, name), rtol=0,
                                       atol=1e-12 * a.sum_w, err_msg=name)


def _hand_over_everything(helper):
    for columns in _batches():
        helper.add(columns)
    return helper.finish()


@pytest.fixture
def helper():
    """A helper begun with ``RECIPES`` and 1000-event slots, ended after the test."""
    started = _needs_a_helper(MomentsAside.start(RECIPES, _totals(), rows=1000))
    yield started
    started.close()


def test_an_error_in_the_helper_is_raised_in_the_run(monkeypatch):
    def failing(*args):
        raise ValueError("phases must be finite")

    monkeypatch.setattr(recipemoments, "add_recipe_moments", failing)  # what the helper imports
    started = _needs_a_helper(MomentsAside.start(RECIPES, _totals(), rows=1000))
    try:  # started after the patch: the fork copies it
        with pytest.raises(ValueError, match="phases must be finite"):
            _hand_over_everything(started)
    finally:
        started.close()


def test_a_helper_that_dies_is_reported_not_waited_for(helper):
    helper._process.kill()
    helper._process.join()
    with pytest.raises(RuntimeError, match="ended early"):
        _hand_over_everything(helper)


def test_the_helper_ends_with_the_run(helper):
    helper.add(next(_batches()))
    helper.close()  # a run that failed: no totals asked for
    assert not helper._process.is_alive()


def test_a_helper_forked_before_its_recipes_are_known_adds_the_same():
    """``turnstamp tag`` forks first and tells the recipes later (``begin``)."""
    here = _totals()
    helper = _needs_a_helper(MomentsAside.fork(rows=2500))
    try:
        helper.begin(RECIPES, _totals())
        for columns in _batches():
            add_recipe_moments(here, WEIGHTED, columns["site_tt_ns"], columns["phase"],
                               columns["weight"], columns["recipe_flags"],
                               columns["quality_flags"])
            helper.add(columns)
        assert [t.to_state() for t in helper.finish()] == [t.to_state() for t in here]
    finally:
        helper.close()


def test_a_helper_never_begun_ends_with_the_run():
    """A command that fails while loading its configuration never tells the recipes."""
    helper = _needs_a_helper(MomentsAside.fork(rows=1000))
    helper.close()
    assert helper._process.exitcode == 0


def test_no_helper_where_it_would_not_pay(monkeypatch):
    monkeypatch.setattr(aside, "_cpus", lambda: 1)
    assert MomentsAside.start(RECIPES, _totals(), rows=1000) is None


def test_tag_gives_the_same_statistics_with_and_without_the_helper(tmp_path, demo_env):
    import pyarrow as pa

    from turnstamp.core.timebase import Scale, parse_instant
    from turnstamp.files.inputs import load_spin_model
    from turnstamp.tagging.run import offline_target, tag_file

    rng = np.random.default_rng(4)
    start = parse_instant("2026-12-02T01:00:00")
    times = np.sort(rng.integers(start, start + 3 * 3600 * 10**9, 300_000))
    source = tmp_path / "events.arrow"
    table = pa.table({"event_id": np.arange(times.size, dtype=np.uint64), "time_ns": times})
    with pa.ipc.new_file(str(source), table.schema) as writer:
        writer.write_table(table, max_chunksize=70_000)
    runs = {}
    for helped in (False, True):
        setup = offline_target([load_spin_model(data_file("lantern.toml"))])
        summary = tag_file(source, tmp_path / f"{helped}.arrow", setup, demo_env, Scale.UTC,
                           statistics_aside=helped)
        runs[helped] = ({name: t.to_state() for name, t in summary.statistics.items()},
                        (tmp_path / f"{helped}.arrow").read_bytes())
    assert runs[True] == runs[False]
