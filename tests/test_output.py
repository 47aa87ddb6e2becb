"""Tests of result output: atomic writes, JSON conversion and aligned tables.

The atomic-write check kills a writer process mid-way (POSIX ``os.replace``
is atomic on one file system) and checks the old file survives intact.
"""

import json
import subprocess
import sys
import textwrap

import numpy as np
import pandas as pd
import pytest

from treeprobe.errors import TreeprobeError
from treeprobe.output import atomic_write, dumps_json, format_table


def test_atomic_write_replaces_whole_file(tmp_path):
    target = tmp_path / "out.txt"
    target.write_text("old\n")
    atomic_write(target, lambda h: h.write("new\n"))
    assert target.read_text() == "new\n"
    assert [p.name for p in tmp_path.iterdir()] == ["out.txt"]
    # Same permissions as a file made by open(): readable by others unless the umask says otherwise.
    plain = tmp_path / "plain.txt"
    plain.write_text("x")
    assert (target.stat().st_mode & 0o777) == (plain.stat().st_mode & 0o777)


def test_atomic_write_keeps_old_file_when_writer_fails(tmp_path):
    target = tmp_path / "out.txt"
    target.write_text("old\n")

    def failing(handle):
        handle.write("half")
        raise RuntimeError("disk full")

    with pytest.raises(RuntimeError):
        atomic_write(target, failing)
    assert target.read_text() == "old\n"
    assert [p.name for p in tmp_path.iterdir()] == ["out.txt"]


def test_atomic_write_survives_killed_writer(tmp_path):
    target = tmp_path / "out.txt"
    target.write_text("old\n")
    script = textwrap.dedent(
        f"""
        import os, signal
        from treeprobe.output import atomic_write
        def write(h):
            h.write("x" * 100000)
            h.flush()
            os.kill(os.getpid(), signal.SIGKILL)
        atomic_write({str(target)!r}, write)
        """
    )
    proc = subprocess.run([sys.executable, "-c", script], capture_output=True)
    assert proc.returncode != 0
    assert target.read_text() == "old\n"


def test_atomic_write_missing_folder(tmp_path):
    with pytest.raises(TreeprobeError, match="does not exist"):
        atomic_write(tmp_path / "nope" / "x.txt", lambda h: h.write("x"))


def test_json_converts_numpy_and_nan():
    frame = pd.DataFrame({"a": np.array([1, 2], dtype=np.int64), "b": [np.nan, 0.5], "c": [True, False]})
    parsed = json.loads(dumps_json({"rows": frame, "arr": np.arange(2), "x": np.float32(1.5)}))
    assert parsed == {"rows": [{"a": 1, "b": None, "c": True}, {"a": 2, "b": 0.5, "c": False}], "arr": [0, 1], "x": 1.5}


def test_format_table_aligns_and_marks_missing():
    frame = pd.DataFrame({"feature": ["a", "bbbb"], "gain": [1234.5678, np.nan], "splits": [3, 12]})
    text = format_table(frame, max_rows=1)
    lines = text.splitlines()
    assert lines[0].split() == ["feature", "gain", "splits"]
    assert "1,235" in lines[2] and lines[2].endswith("3")
    assert lines[-1] == "... 1 more rows"
    assert format_table(frame).splitlines()[3].split()[1] == "-"
