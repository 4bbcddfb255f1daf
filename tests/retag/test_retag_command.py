"""``turnstamp retag`` on the command line: bad input ends in one line naming the
option or field (exit status 2) before any worker starts; a whole run through the
command, with its own local cluster, prints the JSON summary."""

import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from turnstamp.commands.main import main
from turnstamp.core.timebase import NS_PER_S, parse_instant
from turnstamp.demo import data_file

MODEL = data_file("lantern.toml")
SITE = data_file("corvid-ridge.toml")


def retag(*args):
    return main(["retag", *map(str, args), "--model", str(MODEL), "--site", str(SITE),
                 "--quiet"])


def small_dataset(root, columns=("event_id", "time_ns")):
    start = parse_instant("2026-12-01T21:00:00")
    for night in range(2):
        n = 500
        values = {"event_id": np.arange(night * n, (night + 1) * n, dtype=np.int64),
                  "time_ns": start + night * 86_400 * NS_PER_S
                  + np.arange(n, dtype=np.int64) * NS_PER_S}
        path = root / f"night={night}" / "events.parquet"
        path.parent.mkdir(parents=True)
        pq.write_table(pa.table({c: values[c] for c in columns}), path)
    return root


@pytest.mark.parametrize("case, words", [
    ("missing", "DATASET"), ("empty", "holds no Parquet"), ("columns", "no column time_ns"),
    ("inside", "inside the dataset"), ("workers", "--workers"),
    ("both", "applies to the local cluster only"),
])
def test_bad_input_is_one_line_and_exit_status_2(tmp_path, capsys, case, words):
    data = tmp_path / "data"
    extra = []
    if case == "empty":
        data.mkdir()
    elif case == "columns":
        small_dataset(data, columns=("event_id",))
    elif case != "missing":
        small_dataset(data)
    out = data / "out" if case == "inside" else tmp_path / "out"
    if case == "workers":
        extra = ["--workers", "0"]
    elif case == "both":
        extra = ["--workers", "2", "--scheduler", "tcp://127.0.0.1:1"]
    assert retag(data, "--out-dir", out, *extra) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("turnstamp retag: ") and words in err and "\n" not in err


def test_a_model_that_is_no_spin_model_is_refused(tmp_path, capsys):
    data = small_dataset(tmp_path / "data")
    code = main(["retag", str(data), "--out-dir", str(tmp_path / "out"), "--model",
                 str(data_file("lantern-template.toml")), "--site", str(SITE), "--quiet"])
    assert code == 2
    assert "lantern-template.toml" in capsys.readouterr().err


def test_a_whole_run_through_the_command(tmp_path, capsys):
    data = small_dataset(tmp_path / "data")
    assert retag(data, "--out-dir", tmp_path / "out", "--workers", "2", "--json") == 0
    summary = json.loads(capsys.readouterr().out)
    assert (summary["fragments"], summary["done"], summary["failed"]) == (2, 2, [])
    assert summary["events"] == summary["tagged"] == 1000 and summary["workers"] == 2
    assert (tmp_path / "out" / "night=1" / "events.parquet").exists()
