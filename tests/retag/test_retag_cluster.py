"""``turnstamp retag`` on a local Dask cluster of two worker processes (loopback only):
the archive equals a single-process ``tag`` bit for bit, the merged statistics equal
those of the concatenated events, a rerun skips what is done, a bad file is reported
while the others complete, and a worker killed mid-write still yields every row once.

The physics is that of ``tag`` (tests/test_tagging.py holds it to the kernel and to
astropy); here the claim is that distributing it changes nothing.
"""

import functools
import json
import os
import signal
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq
import pytest

from turnstamp.core.timebase import NS_PER_DAY, NS_PER_S, Scale, parse_instant
from turnstamp.demo import data_file

MODEL = data_file("lantern.toml")
# about 12:00 TT, the boundary of two TT days (tests/test_tagging.py): a fragment
# spanning it needs two barycentre tables
BOUNDARY = parse_instant("2026-12-02T11:58:50.816")
NIGHTS = {"night=2026-12-01/part-0": (BOUNDARY - 15 * 3600 * NS_PER_S, 3000),
          "night=2026-12-01/part-1": (BOUNDARY - 600 * NS_PER_S, 2500),  # across the boundary
          "night=2026-12-02/part-0": (BOUNDARY + 9 * 3600 * NS_PER_S, 3500)}


def write_dataset(root: Path, parquet: bool = True, chunk: int = 1000) -> pa.Table:
    """A hive-partitioned dataset of a few files; their concatenation is returned."""
    rng = np.random.default_rng(13)
    tables, first = [], 0
    for name, (start, n) in NIGHTS.items():
        times = np.sort(start + rng.integers(0, 1200 * NS_PER_S, n))
        table = pa.table({"event_id": np.arange(first, first + n, dtype=np.int64),
                          "time_ns": times, "energy_kev": rng.uniform(1.0, 10.0, n)})
        first += n
        path = root / f"{name}.{'parquet' if parquet else 'arrow'}"
        path.parent.mkdir(parents=True, exist_ok=True)
        if parquet:
            pq.write_table(table, path, row_group_size=chunk)
        else:
            with pa.OSFile(str(path), "wb") as sink, pa.ipc.new_file(sink, table.schema) as w:
                w.write_table(table, max_chunksize=chunk)
        tables.append(table)
    return pa.concat_tables(tables)


@pytest.fixture(scope="module")
def client():
    from turnstamp.retag.cluster import cluster_client

    with cluster_client(workers=2, dashboard=False) as connected:
        yield connected


@pytest.fixture(scope="module")
def setup_env(demo_env):
    from turnstamp.files.inputs import load_spin_model
    from turnstamp.tagging.run import offline_target

    return functools.partial(offline_target, [load_spin_model(MODEL)]), demo_env


def run_retag(client, setup_env, dataset, out, **options):
    from turnstamp.retag.run import retag

    make_setup, env = setup_env
    return retag(dataset, out, make_setup(), env, Scale.UTC, client, **options)


def test_archive_equals_single_process_tag_bit_for_bit(tmp_path, client, setup_env):
    from turnstamp.tagging.run import tag_file, tag_table

    dataset = tmp_path / "events"
    events = write_dataset(dataset)
    summary = run_retag(client, setup_env, dataset, tmp_path / "out")
    assert summary.failed == [] and summary.totals.done == 3
    assert summary.totals.tagged == events.num_rows
    make_setup, env = setup_env
    for name in NIGHTS:  # each fragment: exactly the file `tag` writes of the same file
        single = tmp_path / f"single-{name.replace('/', '-')}.parquet"
        tag_file(dataset / f"{name}.parquet", single, make_setup(), env, Scale.UTC)
        ours = pq.read_table(tmp_path / "out" / f"{name}.parquet")
        assert ours.schema.metadata[b"fingerprint"] == summary_fingerprint(tmp_path / "out")
        assert b"lantern-2026a" in ours.schema.metadata[b"models"]
        for key in (b"model_fingerprint", b"site", b"ephemeris", b"software"):
            assert ours.schema.metadata[key]
        assert ours.replace_schema_metadata(None).equals(
            pq.read_table(single).replace_schema_metadata(None))
    # and the whole dataset, read back with its partitions, against `tag` of all events
    whole = ds.dataset(tmp_path / "out", format="parquet", partitioning="hive").to_table()
    assert "night" in whole.column_names  # the input's partitions are the output's
    whole = whole.sort_by("event_id")
    direct = tag_table(events, make_setup(), env, Scale.UTC)
    for column in ("event_id", "site_tt_ns", "barycentric_tdb_ns", "barycentric_correction_s",
                   "phase", "pulse_number", "weight", "recipe_flags", "quality_flags"):
        assert whole[column].equals(direct[column]), column


def summary_fingerprint(out: Path) -> bytes:
    return json.loads((out / "_statistics.json").read_text())["provenance"]["fingerprint"] \
        .encode()


def test_merged_statistics_equal_those_of_the_concatenated_events(tmp_path, client,
                                                                  setup_env):
    from turnstamp.core.moments import PhaseMoments
    from turnstamp.core.timebase import Scale as S
    from turnstamp.tagging.run import tag_file

    dataset = tmp_path / "events"
    events = write_dataset(dataset)
    run_retag(client, setup_env, dataset, tmp_path / "out")
    saved = json.loads((tmp_path / "out" / "_statistics.json").read_text())
    from jsonschema import validate

    from turnstamp.retag.merge import STATISTICS_SCHEMA

    validate(saved, STATISTICS_SCHEMA)  # the file is what schemas/ says it is
    make_setup, env = setup_env
    pq.write_table(events, tmp_path / "all.parquet")
    single = tag_file(tmp_path / "all.parquet", tmp_path / "all-tagged.parquet", make_setup(),
                      env, S.UTC)
    expected = single.statistics["all"].total()
    total = PhaseMoments.from_state(saved["recipes"]["all"]["total"]["moments"])
    nights = [PhaseMoments.from_state(n["moments"]) for n in saved["recipes"]["all"]["nights"]]
    assert saved["events"] == saved["tagged"] == events.num_rows
    # counts and (unweighted) histograms are sums of integers: exact; the trigonometric
    # sums are added in another grouping, equal to rounding (1e-9 of the sum of weights,
    # the tolerance tests/core/test_moments.py holds the kernel to)
    for merged in (total, sum(nights[1:], nights[0])):
        assert merged.count == expected.count == events.num_rows
        np.testing.assert_array_equal(merged.hist_w, expected.hist_w)
        np.testing.assert_allclose(merged.cos_sums, expected.cos_sums, rtol=0,
                                   atol=1e-9 * expected.sum_w)
        np.testing.assert_allclose(merged.sin_sums, expected.sin_sums, rtol=0,
                                   atol=1e-9 * expected.sum_w)
    # night by night: one entry per TT day holding events, counted from the archive
    tt = pq.read_table(tmp_path / "all-tagged.parquet")["site_tt_ns"].to_numpy()
    days, counts = np.unique(tt // NS_PER_DAY, return_counts=True)
    assert [n["tt_start_ns"] for n in saved["recipes"]["all"]["nights"]] == \
        (days * NS_PER_DAY).tolist()
    assert [n.count for n in nights] == counts.tolist()
    assert saved["recipes"]["all"]["nights"][0]["night"] == "2026-12-01"


def test_a_second_run_skips_finished_fragments_and_a_new_model_redoes_them(tmp_path, client,
                                                                           setup_env):
    dataset = tmp_path / "events"
    write_dataset(dataset)
    out = tmp_path / "out"
    first = run_retag(client, setup_env, dataset, out)
    written = {p: p.stat().st_mtime_ns for p in out.rglob("*.parquet")}
    before = json.loads((out / "_statistics.json").read_text())
    second = run_retag(client, setup_env, dataset, out)
    assert (second.totals.done, second.totals.skipped) == (0, 3)
    assert {p: p.stat().st_mtime_ns for p in out.rglob("*.parquet")} == written
    after = json.loads((out / "_statistics.json").read_text())
    assert after["recipes"] == before["recipes"] and after["events"] == first.totals.events
    # an interrupted run resumes: a fragment whose mark is gone is done again, alone
    next(iter((out / "_fragments").rglob("*.json"))).unlink()
    third = run_retag(client, setup_env, dataset, out)
    assert (third.totals.done, third.totals.skipped) == (1, 2)
    assert json.loads((out / "_statistics.json").read_text())["recipes"] == before["recipes"]
    # another target name is another fingerprint: everything is re-tagged
    from turnstamp.retag.run import retag

    make_setup, env = setup_env
    renamed = retag(dataset, out, make_setup(name="lantern-b"), env, Scale.UTC, client)
    assert (renamed.totals.done, renamed.totals.skipped) == (3, 0)


def test_a_failing_fragment_is_reported_and_the_others_complete(tmp_path, client, setup_env):
    dataset = tmp_path / "events"
    events = write_dataset(dataset)
    bad = dataset / "night=2026-12-03" / "part-0.parquet"
    bad.parent.mkdir()
    unix = events.slice(0, 100).set_column(  # Unix nanoseconds where J2000 ones belong
        1, "time_ns", pa.array(events["time_ns"].to_numpy()[:100] + 946_728_000 * NS_PER_S))
    pq.write_table(unix, bad)
    summary = run_retag(client, setup_env, dataset, tmp_path / "out")
    assert [name for name, _ in summary.failed] == ["night=2026-12-03/part-0.parquet"]
    assert "time_ns" in summary.failed[0][1] and "unix" in summary.failed[0][1]
    assert summary.totals.done == 3 and summary.totals.tagged == events.num_rows
    assert not (tmp_path / "out" / "night=2026-12-03" / "part-0.parquet").exists()
    saved = json.loads((tmp_path / "out" / "_statistics.json").read_text())
    assert saved["fragments"]["failed"][0]["fragment"] == "night=2026-12-03/part-0.parquet"
    assert any("failed: night=2026-12-03/part-0.parquet" in line for line in summary.lines())


def die_mid_write(fragment, *args, marker_dir):
    """The re-tagging task, except that its first attempt at one fragment kills its
    own worker process after the first batch is handed to the writer."""
    from turnstamp.retag import work

    marker = Path(marker_dir) / "attempted"
    if fragment.relative.endswith("part-1.arrow") and not marker.exists():
        marker.touch()
        tag_into = work.tag_into

        def dying(reader, run, output, rejects, started, on_batch=None):
            def after_batch(rows, total=None):
                if rows:
                    os.kill(os.getpid(), signal.SIGKILL)
            return tag_into(reader, run, output, rejects, started, after_batch)

        work.tag_into = dying  # in this worker only, which dies with it
    return work.retag_fragment(fragment, *args)


def test_a_worker_killed_mid_run_still_yields_every_row_exactly_once(tmp_path, client,
                                                                     setup_env):
    import cloudpickle

    cloudpickle.register_pickle_by_value(sys.modules[__name__])  # workers lack tests/
    dataset = tmp_path / "events"
    events = write_dataset(dataset, parquet=False, chunk=500)  # several batches per file
    out = tmp_path / "out"
    summary = run_retag(client, setup_env, dataset, out,
                        work=functools.partial(die_mid_write, marker_dir=str(tmp_path)))
    assert (tmp_path / "attempted").exists()  # the victim did die once
    assert summary.failed == [] and summary.totals.done == 3
    archive = ds.dataset(out, format="parquet").to_table()
    ids = np.sort(archive["event_id"].to_numpy())
    np.testing.assert_array_equal(ids, np.sort(events["event_id"].to_numpy()))
    assert not list(out.rglob(".*.partial"))  # the dead attempt's partial file is gone
    assert summary.totals.tagged == events.num_rows
