"""One way to write a file whole (contenders.cleanup.write_whole), used by every writer."""

import os

import pytest

from contenders import cleanup
from contenders.cleanup import write_whole


def test_text_bytes_and_writer_land_whole_with_the_usual_mode(tmp_path):
    target = tmp_path / "summary.json"
    write_whole(target, "é\r\n")                   # text: UTF-8, line ends as given
    assert target.read_bytes() == "é\r\n".encode("utf-8")
    write_whole(target, b"\x00\x01")
    assert target.read_bytes() == b"\x00\x01"
    write_whole(target, lambda tmp: tmp.write_bytes(b"from a writer"))
    assert target.read_bytes() == b"from a writer"
    umask = os.umask(0o022)
    os.umask(umask)
    assert (target.stat().st_mode & 0o777) == 0o666 & ~umask
    assert [p.name for p in tmp_path.iterdir()] == ["summary.json"]


def test_a_failed_write_keeps_the_old_file_and_leaves_nothing(tmp_path):
    target = tmp_path / "fit.nc"
    target.write_text("old")
    seen = []

    def half_then_fail(tmp):
        tmp.write_text("half")
        seen.append(tmp in cleanup._PATHS)       # registered while it is written
        raise OSError("disk full")

    with pytest.raises(OSError, match="disk full"):
        write_whole(target, half_then_fail)
    assert seen == [True]
    assert target.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["fit.nc"]
    assert not cleanup._PATHS


def test_the_store_listing_reads_the_writer_from_the_temporary_name(tmp_path):
    """``contenders store`` keeps the temporary files of live processes and removes the rest;
    it must read the process, not the thread, from ``.NAME.PID.THREAD.tmp`` (it read the
    thread and stopped on an OverflowError before this was fixed)."""
    from contenders.pipeline.store_contents import read, writer_pid

    names = []
    write_whole(tmp_path / "a.nc", lambda tmp: names.append(tmp.name) or tmp.write_bytes(b""))
    assert writer_pid(names[0]) == os.getpid()
    assert writer_pid(".fit.12.nc.345.tmp") == 345            # the form of earlier versions
    assert writer_pid(".fit.12.nc.345.140653153880960.tmp") == 345
    assert writer_pid("fit.nc") is None and writer_pid(".fit.nc.tmp") is None
    (tmp_path / f".live.nc.{os.getpid()}.140653153880960.tmp").write_bytes(b"x")
    (tmp_path / ".gone.nc.4194999.140653153880960.tmp").write_bytes(b"y")   # above 2**22, Linux's largest pid_max
    contents = read(tmp_path)
    assert [p.name for p in contents.busy] == [f".live.nc.{os.getpid()}.140653153880960.tmp"]
    assert [p.name for p in contents.debris] == [".gone.nc.4194999.140653153880960.tmp"]
