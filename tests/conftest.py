"""Shared fixtures of the engine and model-table tests.

* a fixed-seed hypothesis profile (``derandomize=True``, no deadline, modest
  example counts) so that runs are reproducible and fast;
* ``random_model``: the one builder of random models (tests/helpers.py, the
  tests' own random parameters, never results of the code under test);
* ``random_sequence``: the one record sampler (tests/helpers.py): uniform
  letters over an alphabet with unknown and soft-masked symbols mixed in, or,
  with ``model=``, a record drawn from the model's own chain;
* ``held_run``: starts ``python -m seqstate ...`` held at a named point of the run
  (``SEQSTATE_TEST_HOLD``, :func:`seqstate.io.atomic.hold_point`) and returns once
  it is held, so a test sends its signal at a known moment, never after a sleep;
* ``chromium``: the headless Chromium binary; a test using it is skipped when there is
  none, except in CI (``CI=true``), where a missing browser is a failure;
* ``kernel``: runs a test once with the engine's specialised kernels allowed
  (its normal dispatch) and once with the generic kernels only (the in-process
  equivalent of ``SEQSTATE_KERNELS=generic``).
"""

from __future__ import annotations

import contextlib
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest
from helpers import random_model as build_random_model
from helpers import sample_record
from hypothesis import settings

settings.register_profile(
    "seqstate", derandomize=True, deadline=None, max_examples=50, print_blob=True
)
settings.load_profile("seqstate")

DATA = Path(__file__).resolve().parent / "data"
REPO = Path(__file__).resolve().parent.parent


@contextlib.contextmanager
def engine_kernels(kind: str):
    """Within the block: 'specialised' (the engine may pick its specialised kernels) or
    'generic' (the generic kernels only, as with SEQSTATE_KERNELS=generic)."""
    from seqstate.engine import api

    old = api._USE_SMALL
    api._USE_SMALL = kind != "generic"
    try:
        yield kind
    finally:
        api._USE_SMALL = old


@pytest.fixture(params=["specialised", "generic"])
def kernel(request):
    """Run the test under both kernel families (see engine_kernels)."""
    with engine_kernels(request.param):
        yield request.param


@pytest.fixture(scope="session")
def kernel_switch():
    """The engine_kernels context manager, for tests that draw the kernel family."""
    return engine_kernels


@pytest.fixture(scope="session")
def random_model():
    """Factory: ``random_model(rng, n_states=..., order=..., ...)`` (helpers.random_model)."""
    return build_random_model


@pytest.fixture(scope="session")
def random_sequence():
    """Factory: ``random_sequence(rng, n, alphabet, p_unknown, p_lower, model=...)``
    (helpers.sample_record)."""
    return sample_record


@pytest.fixture(scope="session")
def data_dir() -> Path:
    """The tests' data folder (tests/data)."""
    return DATA


@pytest.fixture(scope="session")
def repo_dir() -> Path:
    """The repository root (models/ and models/build.py live there)."""
    return REPO


@pytest.fixture
def held_run(tmp_path):
    """Factory: ``held_run(args, point)`` starts ``python -m seqstate *args`` with
    ``SEQSTATE_TEST_HOLD=point:FLAG`` and returns the process once it is held there
    (the flag file exists); fails if the run ends or two minutes pass first."""
    started = []

    def start(args, point):
        flag = tmp_path / f"held-{point}-{len(started)}"
        env = dict(os.environ, PYTHONPATH=str(REPO), SEQSTATE_TEST_HOLD=f"{point}:{flag}")
        proc = subprocess.Popen(
            [sys.executable, "-m", "seqstate", *map(str, args)],
            env=env,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        started.append(proc)
        deadline = time.monotonic() + 120
        while not flag.exists():
            if proc.poll() is not None or time.monotonic() > deadline:
                proc.kill()
                out, err = proc.communicate()
                pytest.fail(f"the run never reached the point {point!r}: {err}")
            time.sleep(0.01)  # waiting for a condition, not guessing a duration
        assert flag.read_text().strip() == str(proc.pid)
        return proc

    yield start
    for proc in started:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()


@pytest.fixture(scope="session")
def chromium() -> str:
    """The path of headless Chromium (``chromium`` or ``chromium-browser`` on PATH).
    Without one the test is skipped, but in CI (``CI`` set to true, as CI services do)
    it fails: there the browser test must run, not vanish silently."""
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    pytest.fail("headless Chromium is not installed (.ci/run installs it)")
