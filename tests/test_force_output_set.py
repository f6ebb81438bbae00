"""--force replaces the whole output set an earlier run owns (the one its run report lists).

A second ``annotate --force`` into the same folder with the same stem and other outputs
(``--tracks none`` after ``--tracks bedgraph``) leaves no file of the first run that its
own run report does not list; files the first run did not write, or that were changed
since it wrote them, are kept.
"""

from __future__ import annotations

import json

import pytest
from click.testing import CliRunner

from seqstate.cli import main
from seqstate.io import atomic

FASTA = ">r1\nACGCGCGCGTTTACGCGCGCGAATATATATTACGCGCGCGCGCGCGATATATAT\n"


def _annotate(tmp_path, *extra):
    return CliRunner().invoke(
        main, ["annotate", str(tmp_path / "in.fa"), "-o", str(tmp_path / "out"), "-q", *extra]
    )


def _listed(out):
    return sorted(json.loads((out / "in.run.json").read_text())["outputs"])


def _files(out):
    return sorted(p.name for p in out.iterdir())


@pytest.fixture
def first_run(tmp_path):
    (tmp_path / "in.fa").write_text(FASTA)
    result = _annotate(tmp_path, "--tracks", "bedgraph", "--min-length", "1")
    assert result.exit_code == 0, result.output
    out = tmp_path / "out"
    assert "in.CpG_island.bedgraph" in _files(out)
    return out


def test_force_with_other_tracks_leaves_only_the_new_set(tmp_path, first_run):
    result = _annotate(tmp_path, "--tracks", "none", "--min-length", "1", "--force")
    assert result.exit_code == 0, result.output
    assert _files(first_run) == _listed(first_run)
    assert "in.CpG_island.bedgraph" not in _files(first_run)


def test_without_force_nothing_is_replaced(tmp_path, first_run):
    before = {p.name: p.read_bytes() for p in first_run.iterdir()}
    result = _annotate(tmp_path, "--tracks", "none")
    assert result.exit_code == 2
    assert {p.name: p.read_bytes() for p in first_run.iterdir()} == before


def test_files_the_run_did_not_write_or_that_changed_are_kept(tmp_path, first_run):
    (first_run / "notes.txt").write_text("mine\n")
    track = first_run / "in.CpG_island.bedgraph"
    track.write_text(track.read_text() + "# edited by hand\n")
    result = _annotate(tmp_path, "--tracks", "none", "--force")
    assert result.exit_code == 0, result.output
    assert (first_run / "notes.txt").read_text() == "mine\n"
    assert track.read_text().endswith("# edited by hand\n")


def test_a_listed_name_outside_the_folder_is_never_touched(tmp_path, first_run):
    # a run report edited to list a path out of the folder: only plain names count
    secret = tmp_path / "secret.txt"
    secret.write_text("keep\n")
    report = json.loads((first_run / "in.run.json").read_text())
    report["outputs"].append("../secret.txt")
    report["output_sha256"]["../secret.txt"] = atomic._sha256(secret)
    (first_run / "in.run.json").write_text(json.dumps(report))
    result = _annotate(tmp_path, "--tracks", "none", "--force")
    assert result.exit_code == 0, result.output
    assert secret.read_text() == "keep\n"


def test_a_failed_commit_puts_the_earlier_set_back(tmp_path, first_run, monkeypatch):
    before = {p.name: p.read_bytes() for p in first_run.iterdir()}
    real_replace = atomic.os.replace
    calls = []

    def failing(src, dst, *args, **kwargs):
        calls.append(dst)
        if len(calls) == 2:  # after the stale track was removed and one file moved
            raise OSError(28, "No space left on device")
        return real_replace(src, dst, *args, **kwargs)

    monkeypatch.setattr(atomic.os, "replace", failing)
    result = _annotate(tmp_path, "--tracks", "none", "--force")
    monkeypatch.undo()
    assert result.exit_code != 0
    assert {p.name: p.read_bytes() for p in first_run.iterdir()} == before


def test_two_racing_force_runs_leave_one_whole_set(tmp_path, first_run):
    # the commits take turns (folder lock), and each reads the earlier report inside it
    import subprocess
    import sys

    procs = [
        subprocess.Popen(
            [sys.executable, "-m", "seqstate", "annotate", "in.fa", "-o", "out", "-q"]
            + ["--tracks", tracks, "--force"],
            cwd=tmp_path,
            stderr=subprocess.PIPE,
            text=True,
        )
        for tracks in ("none", "bedgraph", "none")
    ]
    codes = [(p.communicate(timeout=300)[1], p.returncode) for p in procs]
    assert [c for _, c in codes] == [0, 0, 0], codes
    assert _files(first_run) == _listed(first_run)
