"""Atomic small files (checkpoint, status): whole old or whole new, permissions kept."""

from __future__ import annotations

import json
import os

import pytest

from turnstamp.files.durable import atomic_write_json, atomic_write_text


def test_atomic_write_json_round_trip_and_permissions(tmp_path):
    target = tmp_path / "checkpoint.json"
    atomic_write_json(target, {"archive": ["archive-20261201T200000Z-00001.arrow", 12]})
    target.chmod(0o640)
    atomic_write_json(target, {"archive": ["archive-20261201T200000Z-00001.arrow", 13]})
    assert json.loads(target.read_text()) == {
        "archive": ["archive-20261201T200000Z-00001.arrow", 13]}
    assert target.stat().st_mode & 0o777 == 0o640
    atomic_write_text(tmp_path / "status.txt", "running\n")
    assert (tmp_path / "status.txt").read_text() == "running\n"
    assert sorted(os.listdir(tmp_path)) == ["checkpoint.json", "status.txt"]


def test_atomic_write_json_crash_before_replace_keeps_the_old_file(tmp_path, monkeypatch):
    target = tmp_path / "checkpoint.json"
    atomic_write_json(target, {"batches": 12})
    old = target.read_bytes()

    def crash(*args, **kwargs):
        raise OSError("simulated crash between the temporary write and the replace")

    monkeypatch.setattr(os, "replace", crash)
    with pytest.raises(OSError, match="simulated crash"):
        atomic_write_json(target, {"batches": 13})
    monkeypatch.undo()
    assert target.read_bytes() == old
    assert os.listdir(tmp_path) == ["checkpoint.json"]  # temporary file removed
    with pytest.raises(TypeError):
        atomic_write_json(target, {"not json": object()})
    assert target.read_bytes() == old
