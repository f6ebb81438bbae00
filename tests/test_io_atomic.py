"""All-or-nothing output directories (seqstate.io.atomic)."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from seqstate.errors import UsageError
from seqstate.io.atomic import OutputSet, atomic_text


def listing(root: Path) -> list[str]:
    return sorted(str(p.relative_to(root)) for p in root.rglob("*"))


def test_success_renames_every_file(tmp_path: Path) -> None:
    out = tmp_path / "run"
    with OutputSet(out) as outputs:
        handle = outputs.open_text("features.gff3")
        handle.write("##gff-version 3\n")
        binary = outputs.path("track.bw")
        assert binary.parent == out and binary.name.startswith(".track.bw.tmp-")
        binary.write_bytes(b"\x00\x01")
        assert listing(out) == sorted(
            [f".features.gff3.tmp-{os.getpid()}", f".track.bw.tmp-{os.getpid()}"]
        )
        assert outputs.final_path("features.gff3") == out / "features.gff3"
    assert listing(out) == ["features.gff3", "track.bw"]
    assert (out / "features.gff3").read_text() == "##gff-version 3\n"
    assert (out / "track.bw").read_bytes() == b"\x00\x01"


def test_text_output_uses_utf8_and_lf(tmp_path: Path) -> None:
    with OutputSet(tmp_path) as outputs:
        outputs.open_text("a.txt").write("é\n")
    assert (tmp_path / "a.txt").read_bytes() == "é\n".encode()


def test_success_replaces_existing_files(tmp_path: Path) -> None:
    (tmp_path / "a.txt").write_text("old")
    with OutputSet(tmp_path) as outputs:
        outputs.open_text("a.txt").write("new")
    assert (tmp_path / "a.txt").read_text() == "new"


def test_exception_leaves_nothing_and_keeps_old_files(tmp_path: Path) -> None:
    (tmp_path / "a.txt").write_text("old")
    with pytest.raises(RuntimeError, match="boom"):
        with OutputSet(tmp_path) as outputs:
            outputs.open_text("a.txt").write("half")
            outputs.path("b.bw").write_bytes(b"x")
            raise RuntimeError("boom")
    assert listing(tmp_path) == ["a.txt"]
    assert (tmp_path / "a.txt").read_text() == "old"


def test_keyboard_interrupt_removes_created_directories(tmp_path: Path) -> None:
    out = tmp_path / "new" / "deeper"
    with pytest.raises(KeyboardInterrupt):
        with OutputSet(out) as outputs:
            assert out.is_dir()
            outputs.open_text("a.txt").write("x")
            raise KeyboardInterrupt
    assert listing(tmp_path) == []


def test_created_directory_kept_if_something_else_was_put_there(tmp_path: Path) -> None:
    out = tmp_path / "new"
    with pytest.raises(ValueError):
        with OutputSet(out) as outputs:
            (out / "other.txt").write_text("not ours")
            outputs.open_text("a.txt")
            raise ValueError
    assert listing(tmp_path) == ["new", "new/other.txt"]


def test_directory_under_a_regular_file_is_a_usage_error(tmp_path: Path) -> None:
    blocker = tmp_path / "file.txt"
    blocker.write_text("x")
    target = blocker / "sub"
    with pytest.raises(UsageError) as info:
        with OutputSet(target):
            pass
    assert str(info.value).startswith(f"output directory '{target}' cannot be written: ")
    assert listing(tmp_path) == ["file.txt"]


def test_out_dir_that_is_a_file_is_a_usage_error(tmp_path: Path) -> None:
    blocker = tmp_path / "file.txt"
    blocker.write_text("x")
    with pytest.raises(UsageError, match="cannot be written"):
        with OutputSet(blocker):
            pass


def test_binary_output_never_written_is_an_error(tmp_path: Path) -> None:
    with pytest.raises(RuntimeError, match="never written"):
        with OutputSet(tmp_path) as outputs:
            outputs.open_text("a.txt").write("x")
            outputs.path("b.bw")
    assert listing(tmp_path) == []


@pytest.mark.parametrize("name", ["", "..", "sub/a.txt"])
def test_bad_names(tmp_path: Path, name: str) -> None:
    with OutputSet(tmp_path) as outputs:
        with pytest.raises(ValueError):
            outputs.open_text(name)


def test_same_name_twice(tmp_path: Path) -> None:
    with OutputSet(tmp_path) as outputs:
        outputs.open_text("a.txt")
        with pytest.raises(ValueError, match="already"):
            outputs.path("a.txt")


def test_use_outside_with_block(tmp_path: Path) -> None:
    with pytest.raises(RuntimeError, match="context manager"):
        OutputSet(tmp_path).open_text("a.txt")


def test_atomic_text_success(tmp_path: Path) -> None:
    target = tmp_path / "sub" / "sample.fa"
    with atomic_text(target) as handle:
        handle.write(">a\nACGT\n")
        assert not target.exists()
    assert target.read_text() == ">a\nACGT\n"
    assert listing(tmp_path) == ["sub", "sub/sample.fa"]


def test_atomic_text_failure_leaves_nothing(tmp_path: Path) -> None:
    target = tmp_path / "sub" / "sample.fa"
    with pytest.raises(OSError, match="disk"):
        with atomic_text(target) as handle:
            handle.write("partial")
            raise OSError("disk full")
    assert listing(tmp_path) == []


def test_atomic_text_on_a_directory(tmp_path: Path) -> None:
    with pytest.raises(UsageError, match="is a directory"):
        with atomic_text(tmp_path):
            pass
