"""Archives written around the page cache hold exactly the bytes they were given,
whether the file system takes direct I/O, refuses it, or the disk turns out slow."""

import errno
import os

import numpy as np
import pyarrow as pa
import pytest

from turnstamp.tagging import directfile
from turnstamp.tagging.directfile import CHUNK, DirectFile


def _pieces():
    """Writes of awkward sizes: empty, one byte, across and exactly at chunk edges."""
    rng = np.random.default_rng(5)
    sizes = [0, 1, CHUNK - 1, 1, CHUNK, 3 * CHUNK + 7, 4095, 4097, 12]
    return [rng.integers(0, 256, n, dtype=np.uint8).tobytes() for n in sizes]


def _write(path, pieces):
    file = DirectFile(path)
    for piece in pieces:
        assert file.write(piece) == len(piece)
    assert file.tell() == sum(map(len, pieces))
    file.close()
    file.close()  # twice is harmless (pyarrow's writers may close their sink too)
    return file


def test_bytes_are_exactly_those_written(tmp_path):
    pieces = _pieces()
    _write(tmp_path / "a.bin", pieces)
    assert (tmp_path / "a.bin").read_bytes() == b"".join(pieces)


def test_a_file_system_refusing_direct_io_gets_the_same_bytes(tmp_path, monkeypatch):
    real_open = os.open

    def refusing(path, flags, mode=0o777):
        if flags & getattr(os, "O_DIRECT", 0):
            raise OSError(errno.EINVAL, "Invalid argument")
        return real_open(path, flags, mode)

    monkeypatch.setattr(os, "open", refusing)
    pieces = _pieces()
    file = _write(tmp_path / "b.bin", pieces)
    assert not file.direct
    assert (tmp_path / "b.bin").read_bytes() == b"".join(pieces)


def test_a_refused_direct_write_goes_on_through_the_page_cache(tmp_path, monkeypatch):
    """Some file systems accept O_DIRECT on opening and refuse the writes."""
    real_write = os.write
    refused = []

    def refusing(fd, data):
        import fcntl

        if fcntl.fcntl(fd, fcntl.F_GETFL) & getattr(os, "O_DIRECT", 0):
            refused.append(len(data))
            raise OSError(errno.EINVAL, "Invalid argument")
        return real_write(fd, data)

    monkeypatch.setattr(os, "write", refusing)
    pieces = _pieces()
    file = _write(tmp_path / "c.bin", pieces)
    assert (tmp_path / "c.bin").read_bytes() == b"".join(pieces)
    assert refused or not hasattr(os, "O_DIRECT")
    assert not file.direct


def test_a_slow_disk_hands_the_rest_to_the_page_cache(tmp_path, monkeypatch):
    """Once direct writes take most of the time, the file goes on through the page
    cache; nothing written before or after is lost or moved."""
    monkeypatch.setattr(directfile, "_JUDGED_AFTER_S", 0.0)
    monkeypatch.setattr(directfile, "BUSY", 0.0)
    pieces = _pieces()
    file = DirectFile(tmp_path / "d.bin")
    if not file.direct:
        pytest.skip("no direct I/O on this file system")
    file.write(pieces[5])  # three whole chunks: the first goes direct, then it is judged
    assert not file.direct
    for piece in pieces[6:]:
        file.write(piece)
    file.close()
    assert (tmp_path / "d.bin").read_bytes() == b"".join([pieces[5], *pieces[6:]])


def test_arrow_and_parquet_writers_through_it_give_their_usual_files(tmp_path):
    """The same table written by pyarrow to an ordinary file and through DirectFile."""
    import pyarrow.parquet as pq

    n = 3 * CHUNK // 16 + 5
    table = pa.table({"a": np.arange(n, dtype=np.int64), "b": np.linspace(0, 1, n)})
    with pa.ipc.new_file(str(tmp_path / "plain.arrow"), table.schema) as writer:
        writer.write_table(table)
    with pa.PythonFile(DirectFile(tmp_path / "direct.arrow"), mode="w") as sink, \
            pa.ipc.new_file(sink, table.schema) as writer:
        writer.write_table(table)
    assert (tmp_path / "direct.arrow").read_bytes() == (tmp_path / "plain.arrow").read_bytes()
    pq.write_table(table, tmp_path / "plain.parquet")
    with pa.PythonFile(DirectFile(tmp_path / "direct.parquet"), mode="w") as sink:
        pq.write_table(table, sink)
    assert pq.read_table(tmp_path / "direct.parquet").equals(table)
    assert (tmp_path / "direct.parquet").read_bytes() == \
        (tmp_path / "plain.parquet").read_bytes()
