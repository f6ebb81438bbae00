"""The Snakemake workflow (workflow/) on a real scheduler: a one-node SLURM cluster.

The ``slurm_cluster`` fixture starts SLURM from the Debian packages (``slurm-wlm``,
``munge``) on this machine for the session: a munge key and a ``munged`` on a socket
of its own, a minimal ``slurm.conf`` for the local host (its CPUs and memory, no
accounting), ``slurmctld`` and ``slurmd``, all in a temporary folder, on free ports, and
it goes on once ``sinfo`` shows the node idle; at the end it cancels the jobs left and
stops the daemons it started, by their PIDs.  The tests carry the ``slurm`` marker, which
the default run deselects (``addopts`` in pyproject.toml): they need the binaries and root
(``slurmd``), and run when asked for, ``python -m pytest -m slurm
tests/test_workflow_slurm.py``, as ``.ci/run`` does; there a missing binary, a missing root
or a cluster that does not start is a failure.

The workflow then runs through the profile ``workflow/profiles/slurm`` on the bundled
synthetic demo and two assemblies drawn here by ``seqstate sample`` (a fictional
organism; not real data).  What is checked: every job was a SLURM job (its log's first
line, written by the profile's job script, has the SLURM job ID of the log's name and
the CPUs and memory its rule asked for), one job cancelled with ``scancel`` leaves
exactly the work that depends on it to a rerun, the outputs equal those of a local
run byte for byte, and a further run submits nothing.
"""

from __future__ import annotations

import os
import re
import shlex
import shutil
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest
from click.testing import CliRunner

from seqstate.cli import main

REPO = Path(__file__).resolve().parent.parent
WORKFLOW = REPO / "workflow"
PROFILE = WORKFLOW / "profiles" / "slurm"
SEQSTATE = [sys.executable, "-m", "seqstate.cli"]
DAEMONS = ("munged", "slurmctld", "slurmd")
CLIENTS = ("sbatch", "squeue", "scancel", "scontrol", "sinfo")

pytestmark = [
    pytest.mark.slurm,
    # the test extra installs snakemake on Python 3.11 and later (snakemake 9 needs it)
    pytest.mark.skipif(sys.version_info < (3, 11), reason="snakemake 9 needs Python 3.11"),
]


# ---------------------------------------------------------------- the cluster


def _which(name: str) -> str | None:
    """A binary on PATH or in the sbin folders the Debian packages use."""
    return shutil.which(name) or shutil.which(name, path="/usr/sbin:/sbin")


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _memory_mb() -> int:
    """MemTotal of /proc/meminfo in MB."""
    for line in Path("/proc/meminfo").read_text().splitlines():
        if line.startswith("MemTotal:"):
            return int(line.split()[1]) // 1024
    raise RuntimeError("/proc/meminfo has no MemTotal line")


@dataclass
class Cluster:
    """A running one-node cluster: its folder, its slurm.conf and the clients' environment."""

    folder: Path
    conf: Path
    node: str
    cpus: int
    env: dict[str, str]

    def run(self, *args: str) -> str:
        result = subprocess.run(
            list(args), env=self.env, capture_output=True, text=True, timeout=60
        )
        assert result.returncode == 0, f"{args}: {result.stderr}"
        return result.stdout


def _slurm_conf(folder: Path, node: str, cpus: int, memory_mb: int, munge_socket: Path) -> str:
    ctld_port, d_port = _free_port(), _free_port()
    lines = {
        "ClusterName": "seqstate-test",
        "SlurmctldHost": f"{node}(127.0.0.1)",
        "SlurmctldPort": ctld_port,
        "SlurmdPort": d_port,
        "SlurmUser": "root",
        "SlurmdUser": "root",
        "AuthType": "auth/munge",
        "CredType": "cred/munge",
        "AuthInfo": f"socket={munge_socket}",
        "StateSaveLocation": folder / "state",
        "SlurmdSpoolDir": folder / "spool",
        "SlurmctldPidFile": folder / "slurmctld.pid",
        "SlurmdPidFile": folder / "slurmd.pid",
        "SlurmctldLogFile": folder / "slurmctld.log",
        "SlurmdLogFile": folder / "slurmd.log",
        "ProctrackType": "proctrack/linuxproc",
        "TaskPlugin": "task/none",
        "SelectType": "select/cons_tres",
        "SelectTypeParameters": "CR_Core_Memory",
        "JobAcctGatherType": "jobacct_gather/none",
        "AccountingStorageType": "accounting_storage/none",
        "JobCompType": "jobcomp/none",
        "MpiDefault": "none",
        "SwitchType": "switch/none",
        "MailProg": "/bin/true",
        "ReturnToService": 2,
        # a finished job stays known to scontrol (the profile's status.sh) this long
        "MinJobAge": 600,
        "SlurmdParameters": "config_overrides",
    }
    text = "".join(f"{k}={v}\n" for k, v in lines.items())
    text += (
        f"NodeName={node} NodeAddr=127.0.0.1 CPUs={cpus} RealMemory={memory_mb} State=UNKNOWN\n"
        f"PartitionName=test Nodes={node} Default=YES MaxTime=INFINITE State=UP\n"
    )
    return text


def _tail(path: Path, lines: int = 15) -> str:
    if not path.is_file():
        return f"({path.name}: none)"
    return f"{path.name}:\n" + "\n".join(path.read_text(errors="replace").splitlines()[-lines:])


def _stop(procs: list[subprocess.Popen]) -> None:
    """Stop the daemons this fixture started, by their PIDs, the last started first."""
    for proc in reversed(procs):
        if proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
            try:
                proc.wait(timeout=20)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(timeout=10)


def _start(folder: Path) -> tuple[Cluster, list[subprocess.Popen]]:
    """Start munged, slurmctld and slurmd in ``folder``; raise RuntimeError if it fails."""
    procs: list[subprocess.Popen] = []
    try:
        node = socket.gethostname().split(".")[0]
        cpus = len(os.sched_getaffinity(0))
        memory = max(500, int(_memory_mb() * 0.9))  # slurmd refuses a node claiming more
        for sub in ("state", "spool", "munge"):
            (folder / sub).mkdir(mode=0o700)
        (folder / "munge").chmod(0o755)  # munged wants its socket's folder open to all
        key = folder / "munge" / "munge.key"
        mungekey = _which("mungekey")
        if mungekey:
            subprocess.run([mungekey, "--create", "--keyfile", str(key)], check=True)
        else:  # older munge: a key is 1 KiB of random bytes
            key.write_bytes(os.urandom(1024))
        key.chmod(0o400)
        sock = folder / "munge" / "munge.sock"
        with open(folder / "daemons.out", "ab") as log:  # the daemons' own output
            procs.append(
                subprocess.Popen(
                    # -F: in the foreground (this PID is the daemon's); -f: a private
                    # temporary folder above the socket is allowed (a warning, not an error)
                    [
                        _which("munged") or "munged",
                        "-F",
                        "-f",
                        f"--socket={sock}",
                        f"--key-file={key}",
                        f"--log-file={folder / 'munge' / 'munged.log'}",
                        f"--pid-file={folder / 'munge' / 'munged.pid'}",
                        f"--seed-file={folder / 'munge' / 'munged.seed'}",
                    ],
                    stdout=log,
                    stderr=subprocess.STDOUT,
                )  # fmt: skip
            )
            _wait(lambda: sock.exists(), 20, "munged did not create its socket", folder, procs)
            conf = folder / "slurm.conf"
            conf.write_text(_slurm_conf(folder, node, cpus, memory, sock))
            env = dict(os.environ, SLURM_CONF=str(conf))
            for name, extra in (("slurmctld", []), ("slurmd", ["-N", node])):
                procs.append(
                    subprocess.Popen(
                        [_which(name) or name, "-D", "-f", str(conf), *extra],
                        stdout=log,
                        stderr=subprocess.STDOUT,
                        env=env,
                    )
                )
        cluster = Cluster(folder, conf, node, cpus, env)

        def idle() -> bool:
            r = subprocess.run(
                ["sinfo", "-h", "-N", "-o", "%N %t"],
                env=env, capture_output=True, text=True, timeout=20,
            )  # fmt: skip
            return r.returncode == 0 and r.stdout.split() == [node, "idle"]

        _wait(idle, 60, "sinfo does not show the node idle", folder, procs)
        return cluster, procs
    except BaseException:
        _stop(procs)
        raise


def _wait(check, seconds: float, what: str, folder: Path, procs: list[subprocess.Popen]) -> None:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if check():
            return
        dead = [p.args[0] for p in procs if p.poll() is not None]
        if dead:
            break
        time.sleep(0.2)
    else:
        dead = []
    logs = "\n".join(_tail(folder / n) for n in ("daemons.out", "slurmctld.log", "slurmd.log"))
    raise RuntimeError(f"{what} after {seconds} s" + (f" ({dead} exited)" if dead else "") + logs)


@pytest.fixture(scope="session")
def slurm_cluster(tmp_path_factory) -> Iterator[Cluster]:
    """A one-node SLURM cluster for the session (see the module docstring)."""
    missing = [n for n in DAEMONS + CLIENTS if _which(n) is None]
    assert not missing, (
        f"SLURM cannot start: {', '.join(missing)} not installed (Debian: apt-get install "
        "slurm-wlm munge); these tests run only when asked for (-m slurm)"
    )
    assert os.geteuid() == 0, "SLURM cannot start: slurmd needs root"
    folder = tmp_path_factory.mktemp("slurm")
    if len(str(folder / "munge" / "munge.sock")) > 100:  # a UNIX socket path is short
        folder = Path(__import__("tempfile").mkdtemp(prefix="seqstate-slurm-"))
    try:
        cluster, procs = _start(folder)
    except (RuntimeError, OSError, subprocess.SubprocessError) as exc:
        pytest.fail(f"the SLURM cluster did not start: {exc}")
    try:
        yield cluster
    finally:
        subprocess.run(["scancel", "--full", "--quiet", "--partition=test"],
                       env=cluster.env, capture_output=True, timeout=30)  # fmt: skip
        _stop(procs)


def test_cluster_runs_a_job_with_its_cpus_and_memory(slurm_cluster, tmp_path):
    """An sbatch job runs on the node with the CPUs and memory it asked for."""
    log = tmp_path / "job.log"
    job = slurm_cluster.run(
        "sbatch", "--parsable", "--cpus-per-task=1", "--mem=100", f"--output={log}",
        "--wrap", "echo $SLURM_JOB_ID $SLURM_CPUS_PER_TASK $SLURM_MEM_PER_NODE",
    ).strip()  # fmt: skip
    status = PROFILE / "status.sh"
    deadline = time.monotonic() + 60
    while (state := slurm_cluster.run(str(status), job).strip()) == "running":
        assert time.monotonic() < deadline, "the job did not finish in 60 s"
        time.sleep(0.2)
    assert state == "success"
    assert log.read_text().split() == [job, "1", "100"]
    # the profile's status command: a job SLURM never had reads as failed
    assert slurm_cluster.run(str(status), "999999").strip() == "failed"


# ---------------------------------------------------------------- the workflow through it


def seqstate(*args: object) -> None:
    """seqstate in this process (its compiled kernels are loaded once)."""
    result = CliRunner().invoke(main, [str(a) for a in args])
    assert result.exit_code == 0, result.output


def snakemake(
    workdir: Path, sheet: Path, *extra: str, env: dict[str, str] | None = None
) -> list[str]:
    """The workflow's command line (as tests/test_workflow.py runs it)."""
    return [
        sys.executable, "-m", "snakemake",
        "-s", str(WORKFLOW / "Snakefile"),
        "--configfile", str(WORKFLOW / "config.yaml"),
        "--directory", str(workdir),
        "--config", f"samples={sheet}",
        "seqstate=" + " ".join(shlex.quote(p) for p in SEQSTATE),
        "scatter={'group_bases': 100000, 'max_groups': 3}",
        *extra,
    ]  # fmt: skip


def on_slurm(workdir: Path, sheet: Path, *extra: str) -> list[str]:
    """The workflow through the profile; job states polled every second (the test is short)."""
    return snakemake(
        workdir, sheet, "--profile", str(PROFILE), "--seconds-between-status-checks", "1", *extra
    )


def run_env(cluster: Cluster) -> dict[str, str]:
    out = dict(cluster.env)
    out["PYTHONPATH"] = os.pathsep.join([str(REPO), out.get("PYTHONPATH", "")]).rstrip(os.pathsep)
    return out


def rule_resources() -> dict[str, tuple[int, int]]:
    """Threads and mem_mb of the submitted rules, from workflow/config.yaml (`resources:`)."""
    import yaml  # a dependency of snakemake

    table = yaml.safe_load((WORKFLOW / "config.yaml").read_text())["resources"]
    rules = {"index": "index", "annotate_group": "annotate", "merge": "merge", "compare": "compare"}
    return {rule: (table[key]["threads"], table[key]["mem_mb"]) for rule, key in rules.items()}


LOG_NAME = re.compile(r"(?P<rule>[a-z_]+)-(?P<wildcards>.*)-(?P<job>[0-9]+)\.log")


def job_logs(workdir: Path) -> dict[Path, dict[str, str]]:
    """The profile's job logs (slurm-logs/RULE/RULE-WILDCARDS-JOBID.log), parsed."""
    out = {}
    for path in sorted((workdir / "slurm-logs").glob("*/*.log")):
        m = LOG_NAME.fullmatch(path.name)
        assert m and m["rule"] == path.parent.name, path
        out[path] = m.groupdict()
    return out


def check_slurm_jobs(
    logs: dict[Path, dict[str, str]], resources: dict[str, tuple[int, int]]
) -> None:
    """Each log's first line is the job script's: the log's SLURM job ID, the rule's
    CPUs and memory (the SLURM_* variables slurmstepd sets in a job)."""
    for path, fields in logs.items():
        first = path.read_text().splitlines()[0]
        threads, mem_mb = resources[fields["rule"]]
        assert first.startswith("seqstate-slurm-job: ") and first.split()[1:] == [
            "id", fields["job"], "node", first.split()[4], "cpus", str(threads),
            "mem_mb", str(mem_mb),
        ], (path, first)  # fmt: skip


def output_files(workdir: Path) -> dict[str, bytes]:
    results = workdir / "results"
    return {
        p.relative_to(results).as_posix(): p.read_bytes()
        for p in sorted(results.rglob("*"))
        if p.is_file()
    }


def job_started(cluster: Cluster, job: str) -> bool:
    """Whether a running job's script has begun: its log has the job script's first line."""
    text = cluster.run("scontrol", "show", "job", "-o", job)
    m = re.search(r"StdOut=(\S+)", text)
    if m is None or "JobState=RUNNING" not in text:
        return False
    try:
        return Path(m[1]).read_text().startswith("seqstate-slurm-job: ")
    except FileNotFoundError:
        return False


@pytest.fixture(scope="module")
def inputs(tmp_path_factory) -> Path:
    """The sample sheet: the demo, "big" (8 records, scattered into 3 groups), "small"."""
    data = tmp_path_factory.mktemp("wf-slurm-data")
    seqstate("sample", "cpg-island", "--length", 80000, "--records", 2, "--seed", 11,
             "--prefix", "bigA", "-o", data / "a.fa")  # fmt: skip
    seqstate("sample", "cpg-island", "--length", 20000, "--records", 6, "--seed", 12,
             "--prefix", "bigB", "-o", data / "b.fa")  # fmt: skip
    (data / "big.fa").write_text((data / "a.fa").read_text() + (data / "b.fa").read_text())
    seqstate("sample", "cpg-island", "--length", 15000, "--records", 2, "--seed", 13,
             "--prefix", "smol", "-o", data / "small.fa")  # fmt: skip
    demo = REPO / "examples"
    sheet = data / "samples.tsv"
    sheet.write_text(
        "assembly\tfasta\tmodel\treference\n"
        f"cex_draft1\t{demo / 'cex_draft1.fa.gz'}\tcpg-island\t{demo / 'cex_draft1.truth.gff3'}\n"
        "big\tbig.fa\t\t\n"
        "small\tsmall.fa\tcpg-island\t\n"
    )
    return sheet


def test_workflow_on_slurm(slurm_cluster, inputs, tmp_path):
    """Through SLURM: a job cancelled, the rerun does only what depends on it, the outputs
    equal a local run's byte for byte, and a further run submits nothing."""
    pytest.importorskip("snakemake_executor_plugin_cluster_generic")
    env = run_env(slurm_cluster)
    local, remote = tmp_path / "local", tmp_path / "slurm"
    started = time.monotonic()
    result = subprocess.run(
        snakemake(local, inputs, "--cores", "2"),
        env=env, capture_output=True, text=True, timeout=600,
    )  # fmt: skip
    assert result.returncode == 0, result.stderr[-3000:]
    local_seconds = time.monotonic() - started

    # 1. through SLURM, with no retry; the first annotate job seen running is cancelled
    started = time.monotonic()
    proc = subprocess.Popen(
        on_slurm(remote, inputs, "--retries", "0"),
        env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
    )  # fmt: skip
    cancelled = None
    try:
        deadline = time.monotonic() + 300
        while cancelled is None and proc.poll() is None and time.monotonic() < deadline:
            queue = slurm_cluster.run("squeue", "-h", "-o", "%i %j %T").split("\n")
            for line in queue:
                parts = line.split()
                if parts[1:] == ["seqstate-annotate_group", "RUNNING"]:
                    if job_started(slurm_cluster, parts[0]):
                        slurm_cluster.run("scancel", parts[0])
                        cancelled = parts[0]
                    break
            time.sleep(0.1)
        first_out, _ = proc.communicate(timeout=300)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert cancelled is not None, "no annotate job was seen in the queue:\n" + first_out[-3000:]
    assert proc.returncode != 0, first_out[-3000:]  # a job failed: the run says so
    assert f"external jobid '{cancelled}'" in first_out
    # it was killed part way, not after it ended
    assert "JobState=CANCELLED" in slurm_cluster.run("scontrol", "show", "job", "-o", cancelled)
    first_seconds = time.monotonic() - started
    logs = job_logs(remote)
    (lost,) = [f for f in logs.values() if f["job"] == cancelled]
    asm = re.fullmatch(r"asm=([^,]+),g=g[0-9]+", lost["wildcards"])
    assert asm, lost
    lost_asm = asm[1]
    assert not (remote / "results" / "summary.tsv").exists()

    # 2. the rerun submits the cancelled job and what needs its output, nothing else
    started = time.monotonic()
    result = subprocess.run(
        on_slurm(remote, inputs), env=env, capture_output=True, text=True, timeout=600
    )
    assert result.returncode == 0, (result.stdout + result.stderr)[-3000:]
    second_seconds = time.monotonic() - started
    new = {p: f for p, f in job_logs(remote).items() if p not in logs}
    expected = {("annotate_group", lost["wildcards"]), ("merge", f"asm={lost_asm}")}
    if lost_asm == "cex_draft1":  # the one with a reference
        expected.add(("compare", "asm=cex_draft1"))
    assert {(f["rule"], f["wildcards"]) for f in new.values()} == expected
    every = job_logs(remote)
    # every job of the workflow ran as a SLURM job (split and summary run where snakemake runs)
    resources = rule_resources()
    assert {f["rule"] for f in every.values()} == set(resources)
    check_slurm_jobs(every, resources)

    # 3. the outputs equal the local run's, byte for byte
    ours, theirs = output_files(remote), output_files(local)
    assert sorted(ours) == sorted(theirs)
    for name in ours:
        assert ours[name] == theirs[name], name

    # 4. a further run submits nothing
    result = subprocess.run(
        on_slurm(remote, inputs), env=env, capture_output=True, text=True, timeout=600
    )
    assert result.returncode == 0, result.stderr[-3000:]
    assert "Nothing to be done" in result.stdout + result.stderr
    assert "external jobid" not in result.stdout + result.stderr
    assert job_logs(remote).keys() == every.keys()
    assert slurm_cluster.run("squeue", "-h").strip() == ""
    print(
        f"local run {local_seconds:.1f} s; on SLURM: first run (one job cancelled) "
        f"{first_seconds:.1f} s, rerun {second_seconds:.1f} s, {len(every)} SLURM jobs"
    )
