"""A numba cache that cannot be written gives one warning line, never a traceback.

The decision (:func:`seqstate.engine.jitcache.plan_cache`) is tested with a fake
probe (as root every folder is writable, so the non-root case is simulated);
the whole path is tested in subprocesses where numba is told to look only at
``NUMBA_CACHE_DIR`` (``NUMBA_CACHE_LOCATOR_CLASSES``, a numba setting) and that
folder lies under a regular file, so it can be neither created nor written.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numba

from seqstate.engine import jitcache

ROOT = Path(__file__).resolve().parent.parent
SNIPPET = (
    "from seqstate.engine import api, jitcache\n"
    "from seqstate.io.tables import load_model\n"
    "t = api.prepare(load_model('cpg-island'))\n"
    "print(round(api.loglik(t, api.encode(t, 'ACGCGTTAGCGCA')), 6), jitcache.CACHE)\n"
)


def test_plan_keeps_numbas_choice_when_it_can_be_written():
    plan = jitcache.plan_cache(lambda folder: folder is None, ["/x"])
    assert plan == jitcache.CachePlan(None, True, None)


def test_plan_falls_back_to_a_writable_folder_with_one_warning():
    tried = []

    def works(folder):
        tried.append(folder)
        return folder == "/tmp/b"

    plan = jitcache.plan_cache(works, ["/tmp/a", "/tmp/b", "/tmp/c"])
    assert tried == [None, "/tmp/a", "/tmp/b"]
    assert plan.cache_dir == "/tmp/b" and plan.enabled
    assert plan.warning.startswith("warning: ") and "\n" not in plan.warning
    assert "/tmp/b" in plan.warning


def test_plan_switches_the_cache_off_when_nothing_can_be_written():
    plan = jitcache.plan_cache(lambda folder: False, ["/tmp/a"])
    assert plan.cache_dir is None and not plan.enabled
    assert plan.warning.startswith("warning: ") and "\n" not in plan.warning


def test_configure_prints_one_line_and_leaves_no_failed_folder_behind(monkeypatch, capsys):
    monkeypatch.delenv("NUMBA_CACHE_DIR", raising=False)
    monkeypatch.setattr(numba.config, "CACHE_DIR", "")
    plan = jitcache.configure(works=lambda folder: False, fallbacks=["/nonexistent/x"])
    err = capsys.readouterr().err
    assert not plan.enabled
    assert err.count("\n") == 1 and err.startswith("warning: ")
    assert "NUMBA_CACHE_DIR" not in os.environ and numba.config.CACHE_DIR == ""


def test_numba_probe_reports_an_uncreatable_folder(tmp_path):
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder\n")
    assert not jitcache._numba_can_cache(str(blocker / "cache"))


def _run(tmp_path, env_extra):
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder\n")
    env = dict(os.environ)
    env.update(
        PYTHONPATH=str(ROOT),
        NUMBA_CACHE_DIR=str(blocker / "numba-cache"),
        NUMBA_CACHE_LOCATOR_CLASSES="UserProvidedCacheLocator",
        TMPDIR=str(tmp_path),
    )
    env.update(env_extra)
    return subprocess.run(
        [sys.executable, "-c", SNIPPET], env=env, capture_output=True, text=True, timeout=600
    )


def test_unwritable_cache_folder_falls_back_to_a_temporary_folder(tmp_path):
    """Before the fix: RuntimeError 'cannot cache function ...: no locator available'."""
    out = _run(tmp_path, {})
    assert out.returncode == 0, out.stderr
    assert "Traceback" not in out.stderr
    lines = out.stderr.splitlines()
    fallback = tmp_path / f"seqstate-numba-cache-{os.getuid()}"
    assert len(lines) == 1 and lines[0].startswith("warning: ") and str(fallback) in lines[0]
    assert out.stdout.split()[1] == "True"
    assert any(fallback.rglob("*.nbi"))  # the compiled kernel was cached there


def test_no_writable_cache_folder_at_all_compiles_without_cache(tmp_path):
    (tmp_path / f"seqstate-numba-cache-{os.getuid()}").write_text("a file, not a folder\n")
    out = _run(tmp_path, {})
    assert out.returncode == 0, out.stderr
    assert "Traceback" not in out.stderr
    lines = out.stderr.splitlines()
    assert len(lines) == 1 and lines[0].startswith("warning: ") and "every run" in lines[0]
    assert out.stdout.split()[1] == "False"
