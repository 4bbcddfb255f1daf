"""Reading complete and partial Arrow files, and the layout they rely on.

The layout facts relied upon (a stream is a schema message, dictionary and batch
messages, then the 8-byte end-of-stream marker 0xFFFFFFFF 0x00000000) are from the
Arrow columnar format specification, "IPC Streaming Format"; the tests below check
them against pyarrow rather than trusting them.
"""

from __future__ import annotations

import os

import pyarrow as pa
from arrow_samples import (
    archive_columns,
    three_batch_file,
)

from turnstamp.errors import ArrowFileError
from turnstamp.files.reader import read_arrow_file_report, scan_stream
from turnstamp.files.schemas import OUTPUTS
from turnstamp.files.writer import RotatingArrowWriter


def test_file_layout_is_as_documented(tmp_path):
    path, (end1, end2, end3), full, ids = three_batch_file(tmp_path)
    data = path.read_bytes()
    assert path.suffix == ".arrows" and data[:4] == b"\xff\xff\xff\xff"  # a stream
    assert full == end3 + 8 and data[end3:] == b"\xff\xff\xff\xff\0\0\0\0"  # end-of-stream
    assert pa.ipc.open_stream(data).read_all().column("event_id").to_pylist() == ids
    # the part written before close() is a stream too, and reads without the marker
    partial = pa.ipc.open_stream(data[:end2]).read_all()
    assert partial.column("event_id").to_pylist() == ids[:8]
    # the reader finds the record batches exactly where the writer left them
    scan = scan_stream(path)
    assert scan.ends == [end1, end2, end3] and scan.closed and not scan.problem


def test_truncation_inside_the_header_raises_our_error_only(tmp_path):
    path, (end1, _, _), _, ids = three_batch_file(tmp_path)
    data = path.read_bytes()
    target = tmp_path / "cut.arrows"
    target.write_bytes(data[:end1])
    for cut in sorted({*range(0, 400), *range(400, end1, 7), end1 - 1}, reverse=True):
        os.truncate(target, cut)  # schema, then sampled through the first batch
        try:
            table, info = read_arrow_file_report(target)
        except ArrowFileError:
            continue
        assert table.num_rows in (0, 4) and info.batches == table.num_rows // 4


def test_info_reads_as_complete_or_partial(tmp_path):
    writer = RotatingArrowWriter(tmp_path, "archive", OUTPUTS["archive"])
    writer.write(archive_columns(0, 3))
    _, info = read_arrow_file_report(writer.current_file)
    assert (info.state, str(info)) == (
        "partial", "partial: 1 complete batches, 0 bytes ignored (message_boundary)")
    writer.close()
    _, info = read_arrow_file_report(writer.files()[0])
    assert (info.state, str(info), info.format) == ("complete", "complete", "stream")


def test_file_format_input_is_read_too(tmp_path):
    # input files (orbit tracks, event files) may come in the IPC file format
    table = pa.table({"tt_ns": [1, 2, 3], "x_m": [0.5, 1.5, 2.5]})
    target = tmp_path / "orbit.arrow"
    with pa.OSFile(str(target), "wb") as sink, pa.ipc.new_file(sink, table.schema) as out:
        out.write_table(table)
    read, info = read_arrow_file_report(target)
    assert read.equals(table) and (info.complete, info.format) == (True, "file")


def test_unreadable_complete_message_is_corruption_not_truncation(tmp_path):
    # a frame whose metadata is all there but that pyarrow cannot verify: nothing is
    # missing, so it is not a cut
    path, (_, _, end3), _, ids = three_batch_file(tmp_path)
    garbage = b"\xff\xff\xff\xff" + (16).to_bytes(4, "little") + bytes(16)
    target = tmp_path / path.name
    target.write_bytes(path.read_bytes()[:end3] + garbage)
    table, info = read_arrow_file_report(target)
    assert (info.tail, info.batches, info.bytes_ignored) == ("corrupt", 3, len(garbage))
    assert table.column("event_id").to_pylist() == ids
