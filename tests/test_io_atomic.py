"""All-or-nothing output directories (seqstate.io.atomic)."""

from __future__ import annotations

import errno
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from seqstate.errors import UsageError
from seqstate.io import atomic
from seqstate.io.atomic import (
    OutputSet,
    atomic_folder,
    atomic_text,
    check_outputs,
    recover_folder,
)


def listing(root: Path) -> list[str]:
    return sorted(str(p.relative_to(root)) for p in root.rglob("*"))


def test_success_renames_every_file(tmp_path: Path) -> None:
    out = tmp_path / "run"
    with OutputSet(out) as outputs:
        handle = outputs.open_text("features.gff3")
        handle.write("##gff-version 3\n")
        binary = outputs.path("track.bw")
        stage = f".seqstate-stage-{os.getpid()}"
        assert binary == out / stage / "track.bw"
        binary.write_bytes(b"\x00\x01")
        assert listing(out) == [stage, f"{stage}/features.gff3", f"{stage}/track.bw"]
        assert outputs.final_path("features.gff3") == out / "features.gff3"
    assert listing(out) == ["features.gff3", "track.bw"]
    assert (out / "features.gff3").read_text() == "##gff-version 3\n"
    assert (out / "track.bw").read_bytes() == b"\x00\x01"


def test_text_output_uses_utf8_and_lf(tmp_path: Path) -> None:
    with OutputSet(tmp_path) as outputs:
        outputs.open_text("a.txt").write("é\n")
    assert (tmp_path / "a.txt").read_bytes() == "é\n".encode()


def test_success_replaces_existing_files_only_with_force(tmp_path: Path) -> None:
    (tmp_path / "a.txt").write_text("old")
    with pytest.raises(UsageError, match="already exists: use --force"):
        with OutputSet(tmp_path) as outputs:
            outputs.open_text("a.txt").write("new")
    assert (tmp_path / "a.txt").read_text() == "old"
    assert listing(tmp_path) == ["a.txt"]
    with OutputSet(tmp_path, force=True) as outputs:
        outputs.open_text("a.txt").write("new")
    assert (tmp_path / "a.txt").read_text() == "new"
    assert listing(tmp_path) == ["a.txt"]


def test_exception_leaves_nothing_and_keeps_old_files(tmp_path: Path) -> None:
    (tmp_path / "a.txt").write_text("old")
    with pytest.raises(RuntimeError, match="boom"):
        with OutputSet(tmp_path, force=True) as outputs:
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


# ---------------------------------------------------------------- the overwrite rule
def test_rule_existing_output_needs_force(tmp_path: Path) -> None:
    out = tmp_path / "x.fa"
    check_outputs([out])  # absent: fine
    out.write_text("mine")
    with pytest.raises(UsageError, match=f"output '{out}' already exists: use --force"):
        check_outputs([out])
    check_outputs([out], force=True)


@pytest.mark.parametrize("force", [False, True])
def test_rule_output_that_is_an_input_is_refused_even_with_force(tmp_path: Path, force) -> None:
    inp = tmp_path / "x.fa"
    inp.write_text(">a\nACGT\n")
    link = tmp_path / "link.fa"
    link.symlink_to(inp)
    for spelling in (inp, tmp_path / "." / "x.fa", link):
        with pytest.raises(UsageError) as info:
            check_outputs([spelling], [inp], force=force)
        assert f"output '{spelling}' is the input '{inp}'" in info.value.format()
    # an input that does not exist yet still counts, by resolved path
    with pytest.raises(UsageError, match="is the input"):
        check_outputs([tmp_path / "sub" / ".." / "new.fa"], [tmp_path / "new.fa"], force=force)


@pytest.mark.parametrize("force", [False, True])
def test_rule_two_outputs_of_one_run_that_are_one_file(tmp_path: Path, force) -> None:
    a = tmp_path / "x.fa"
    with pytest.raises(UsageError, match="are the same file") as info:
        check_outputs([a, tmp_path / "." / "x.fa"], force=force)
    assert str(a) in info.value.format()


def test_rule_empty_name_and_folder(tmp_path: Path) -> None:
    with pytest.raises(UsageError, match="not a file name"):
        check_outputs([""])
    with pytest.raises(UsageError, match="is a directory"):
        check_outputs([tmp_path], force=True)
    check_outputs([None, "-"], ["-"])  # standard input/output are not files


def test_output_set_refuses_an_input(tmp_path: Path) -> None:
    inp = tmp_path / "in.txt"
    inp.write_text("keep")
    with pytest.raises(UsageError, match="is the input"):
        with OutputSet(tmp_path, force=True, inputs=[inp]) as outputs:
            outputs.open_text("in.txt").write("lost")
    assert inp.read_text() == "keep"
    assert listing(tmp_path) == ["in.txt"]


def test_output_set_with_paths_in_several_folders(tmp_path: Path) -> None:
    a, b = tmp_path / "one" / "a.txt", tmp_path / "two" / "deep" / "b.txt"
    with OutputSet() as outputs:
        outputs.open_text(a).write("a")
        outputs.open_text(b).write("b")
        assert not a.exists() and not b.exists()
    assert (a.read_text(), b.read_text()) == ("a", "b")
    assert listing(tmp_path) == ["one", "one/a.txt", "two", "two/deep", "two/deep/b.txt"]


# ---------------------------------------------------------------- the commit
def _is_commit_rename(src, dst, folder: Path) -> bool:
    """A staged output being renamed into ``folder`` (not the journal)."""
    src, dst = Path(src), Path(dst)
    return (
        src.parent.name.startswith(atomic.STAGE_PREFIX)
        and not src.name.startswith(".")
        and dst.parent == folder
    )


def _three_old_files(folder: Path) -> None:
    for name in ("a.txt", "b.txt", "c.txt"):
        (folder / name).write_text(f"old {name}")


def _contents(folder: Path) -> dict[str, str]:
    return {p.name: p.read_text() for p in folder.iterdir() if p.is_file()}


@pytest.mark.parametrize("error", [OSError(errno.EIO, "I/O error"), KeyboardInterrupt()])
def test_failure_in_the_middle_of_the_renames_puts_the_old_set_back(
    tmp_path: Path, monkeypatch, error
) -> None:
    _three_old_files(tmp_path)
    (tmp_path / "other.txt").write_text("not ours")
    real_replace = os.replace
    calls = []

    def failing_replace(src, dst):
        if _is_commit_rename(src, dst, tmp_path):
            calls.append(dst)
            if len(calls) == 2:  # the first file is already in place
                raise error
        return real_replace(src, dst)

    monkeypatch.setattr(atomic.os, "replace", failing_replace)
    with pytest.raises((UsageError, KeyboardInterrupt)):
        with OutputSet(tmp_path, force=True) as outputs:
            for name in ("a.txt", "b.txt", "c.txt", "d.txt"):
                outputs.open_text(name).write(f"new {name}")
    assert len(calls) == 2
    assert _contents(tmp_path) == {
        "a.txt": "old a.txt",
        "b.txt": "old b.txt",
        "c.txt": "old c.txt",
        "other.txt": "not ours",
    }
    assert listing(tmp_path) == ["a.txt", "b.txt", "c.txt", "other.txt"]


def test_signal_during_a_slow_commit_acts_after_it(tmp_path: Path, monkeypatch) -> None:
    """SIGTERM sent while the renames run (each delayed) is held until the set is complete."""
    _three_old_files(tmp_path)
    real_replace = os.replace
    seen_during = []

    def slow_replace(src, dst):
        if _is_commit_rename(src, dst, tmp_path):
            if not seen_during:
                os.kill(os.getpid(), signal.SIGTERM)
            time.sleep(0.05)
            seen_during.append(sorted(_contents(tmp_path).values()))
        return real_replace(src, dst)

    def on_term(signum, frame):
        raise KeyboardInterrupt

    old = signal.signal(signal.SIGTERM, on_term)
    monkeypatch.setattr(atomic.os, "replace", slow_replace)
    try:
        with pytest.raises(KeyboardInterrupt):
            with OutputSet(tmp_path, force=True) as outputs:
                for name in ("a.txt", "b.txt", "c.txt"):
                    outputs.open_text(name).write(f"new {name}")
    finally:
        signal.signal(signal.SIGTERM, old)
    assert len(seen_during) == 3  # every rename ran; the interrupt came after them
    assert _contents(tmp_path) == {n: f"new {n}" for n in ("a.txt", "b.txt", "c.txt")}
    assert listing(tmp_path) == ["a.txt", "b.txt", "c.txt"]


def test_disk_full_inside_the_block_is_one_usage_error(tmp_path: Path) -> None:
    with pytest.raises(UsageError) as info:
        with OutputSet(tmp_path) as outputs:
            outputs.open_text("a.txt").write("x")
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
    assert info.value.format() == (
        f"output folder '{tmp_path}' cannot be written: No space left on device"
    )
    assert listing(tmp_path) == []


# ---------------------------------------------------------------- stale runs
def _dead_pid() -> int:
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def test_next_run_removes_what_dead_runs_left(tmp_path: Path) -> None:
    dead = _dead_pid()
    stage = tmp_path / f".seqstate-stage-{dead}"
    stage.mkdir()
    (stage / "a.txt").write_text("half written")
    (tmp_path / f".b.txt.tmp-{dead}").write_text("old-style temporary file of an output")
    other = tmp_path / f".notes.txt.tmp-{dead}"  # not a name this run writes: not ours
    other.write_text("another program's file")
    alive = tmp_path / f".seqstate-stage-{os.getppid()}"  # a live process: left alone
    alive.mkdir()
    (tmp_path / "user.txt").write_text("mine")
    with OutputSet(tmp_path) as outputs:
        outputs.open_text("b.txt").write("b")
    assert listing(tmp_path) == sorted([alive.name, other.name, "b.txt", "user.txt"])


def test_next_run_finishes_a_commit_whose_journal_was_written(tmp_path: Path) -> None:
    dead = _dead_pid()
    (tmp_path / "a.txt").write_text("new a")  # renamed before the process was killed
    (tmp_path / "b.txt").write_text("old b")
    stage = tmp_path / f".seqstate-stage-{dead}"
    stage.mkdir()
    (stage / "b.txt").write_text("new b")
    (stage / ".old-a.txt").write_text("old a")
    (stage / "COMMIT").write_text(json.dumps(["a.txt", "b.txt"]))
    assert recover_folder(tmp_path) == [stage.name]
    assert _contents(tmp_path) == {"a.txt": "new a", "b.txt": "new b"}
    assert listing(tmp_path) == ["a.txt", "b.txt"]


def test_atomic_folder_checks_the_staged_files_before_committing(tmp_path: Path) -> None:
    out = tmp_path / "model"
    seen: list[list[str]] = []

    def check(stage: Path) -> None:
        # every file is staged, nothing is in place yet
        assert stage.parent == out and stage.name == f".seqstate-stage-{os.getpid()}"
        seen.append(listing(stage))
        assert (stage / "b.tsv").read_text() == "two\n"
        assert listing(out) == [stage.name, f"{stage.name}/a.toml", f"{stage.name}/b.tsv"]

    got = atomic_folder(out, [("a.toml", "one\n"), ("b.tsv", "two\n")], check=check)
    assert got == out and seen == [["a.toml", "b.tsv"]]
    assert listing(out) == ["a.toml", "b.tsv"]
    # an existing output needs force; another file of the folder is never touched
    (out / "notes.txt").write_text("mine\n")
    with pytest.raises(UsageError, match="already exists"):
        atomic_folder(out, [("a.toml", "new\n")])

    def refuse(stage: Path) -> None:
        raise RuntimeError("does not read back")

    with pytest.raises(RuntimeError, match="does not read back"):
        atomic_folder(out, [("a.toml", "new\n"), ("b.tsv", "new\n")], force=True, check=refuse)
    # a failing check leaves every file as it was, and no staging folder
    assert listing(out) == ["a.toml", "b.tsv", "notes.txt"]
    assert (out / "a.toml").read_text() == "one\n"
    atomic_folder(out, [("a.toml", "new\n")], force=True)
    assert (out / "a.toml").read_text() == "new\n" and (out / "b.tsv").read_text() == "two\n"
