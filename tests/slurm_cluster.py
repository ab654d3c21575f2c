"""A throw-away one-node SLURM cluster for tests: munged, slurmctld and slurmd as root.

Debian's ``slurm-wlm`` and ``munge`` (installed by scripts/bootstrap.sh). Everything lives in
one temporary directory: the munge key and socket, ``slurm.conf`` (``proctrack/linuxproc``,
``task/none``, ``select/cons_tres``, the node as ``slurmd -C`` reports it, free ports), the
state and spool folders and the logs. :func:`start_local_slurm` raises
:class:`SlurmUnavailableError` with the reason when the daemons cannot start (not root, packages
missing, the node never comes up); :meth:`LocalSlurm.stop` shuts them down.
"""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import time
from dataclasses import dataclass, field
from pathlib import Path

__all__ = ["LocalSlurm", "SlurmUnavailableError", "start_local_slurm"]

COMMANDS = ("munged", "slurmctld", "slurmd", "sbatch", "squeue", "sinfo", "scontrol")


class SlurmUnavailableError(RuntimeError):
    """The local cluster cannot run here; the message says why."""


@dataclass
class LocalSlurm:
    directory: Path
    env: dict[str, str]
    processes: list[subprocess.Popen] = field(default_factory=list)

    def run(self, *args: str, timeout: float = 30) -> subprocess.CompletedProcess:
        return subprocess.run(list(args), env=self.env, capture_output=True, text=True,
                              timeout=timeout, check=False)

    def wait_for_jobs(self, job_ids: list[str], timeout: float = 240) -> None:
        """Poll squeue until none of ``job_ids`` is queued or running."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            result = self.run("squeue", "-h", "-o", "%i %T", "-j", ",".join(job_ids))
            if result.returncode == 0 and not result.stdout.strip():
                return
            if result.returncode != 0 and "Invalid job id" in result.stderr:
                return  # purged: finished long ago
            time.sleep(1)
        raise TimeoutError(f"jobs {job_ids} still queued after {timeout} s:\n"
                           + self.run("squeue").stdout)

    def job_states(self, job_id: str) -> list[str]:
        """States of a finished (or running) job and its array tasks, from scontrol."""
        result = self.run("scontrol", "show", "job", job_id)
        return [word.split("=", 1)[1] for word in result.stdout.split()
                if word.startswith("JobState=")]

    def log(self, name: str) -> str:
        path = self.directory / name
        return path.read_text(errors="replace") if path.exists() else ""

    def stop(self) -> None:
        self.run("scontrol", "shutdown", timeout=20)
        for process in self.processes:
            try:
                process.wait(timeout=15)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait(timeout=5)
        subprocess.run(["munged", "--stop", f"--socket={self.directory / 'munge.sock'}"],
                       capture_output=True, check=False, timeout=20)


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def _node_line(hostname: str) -> str:
    result = subprocess.run(["slurmd", "-C"], capture_output=True, text=True, check=False,
                            timeout=30)
    first = result.stdout.splitlines()[0] if result.stdout else ""
    if result.returncode != 0 or not first.startswith("NodeName="):
        raise SlurmUnavailableError(f"slurmd -C failed: {result.stderr.strip()}")
    words = [w for w in first.split() if not w.startswith("NodeName=")]
    return f"NodeName={hostname} NodeAddr=127.0.0.1 " + " ".join(words) + " State=UNKNOWN"


def start_local_slurm(directory: Path, timeout: float = 60) -> LocalSlurm:
    """Start the cluster in ``directory`` and wait until its node is idle."""
    if os.geteuid() != 0:
        raise SlurmUnavailableError("the local SLURM daemons run as root; this test runs as "
                               f"uid {os.geteuid()}")
    missing = [c for c in COMMANDS if shutil.which(c) is None]
    if missing:
        raise SlurmUnavailableError(f"missing {', '.join(missing)}: install Debian's slurm-wlm "
                               "and munge (scripts/bootstrap.sh does, as root)")
    directory = Path(directory)
    for sub in ("state", "spool"):
        (directory / sub).mkdir(parents=True, exist_ok=True)
    key = directory / "munge.key"
    key.write_bytes(os.urandom(1024))
    key.chmod(0o400)
    sock = directory / "munge.sock"
    munge = subprocess.run(
        ["munged", "--force", f"--socket={sock}", f"--key-file={key}",
         f"--log-file={directory / 'munged.log'}", f"--pid-file={directory / 'munged.pid'}",
         f"--seed-file={directory / 'munged.seed'}"],
        capture_output=True, text=True, check=False, timeout=30)
    if munge.returncode != 0:
        raise SlurmUnavailableError(f"munged did not start: {munge.stderr.strip()}")
    hostname = socket.gethostname().split(".")[0]
    conf = directory / "slurm.conf"
    conf.write_text("\n".join([
        "ClusterName=gaplinetest",
        f"SlurmctldHost={hostname}(127.0.0.1)",
        f"SlurmctldPort={_free_port()}",
        f"SlurmdPort={_free_port()}",
        "SlurmUser=root",
        "SlurmdUser=root",
        "AuthType=auth/munge",
        "CredType=cred/munge",
        f"AuthInfo=socket={sock}",
        f"StateSaveLocation={directory / 'state'}",
        f"SlurmdSpoolDir={directory / 'spool'}",
        f"SlurmctldPidFile={directory / 'slurmctld.pid'}",
        f"SlurmdPidFile={directory / 'slurmd.pid'}",
        f"SlurmctldLogFile={directory / 'slurmctld.log'}",
        f"SlurmdLogFile={directory / 'slurmd.log'}",
        "ProctrackType=proctrack/linuxproc",
        "TaskPlugin=task/none",
        "SelectType=select/cons_tres",
        "SelectTypeParameters=CR_Core",
        "SchedulerType=sched/backfill",
        "SchedulerParameters=sched_interval=2",
        "ReturnToService=2",
        "MpiDefault=none",
        "JobAcctGatherType=jobacct_gather/none",
        "AccountingStorageType=accounting_storage/none",
        "SwitchType=switch/none",
        "MinJobAge=600",
        _node_line(hostname),
        f"PartitionName=debug Nodes={hostname} Default=YES MaxTime=INFINITE State=UP",
        "",
    ]))
    env = dict(os.environ, SLURM_CONF=str(conf))
    cluster = LocalSlurm(directory=directory, env=env)
    for daemon in (["slurmctld", "-D", "-i"], ["slurmd", "-D", "-N", hostname]):
        out = open(directory / f"{daemon[0]}.out", "w")  # noqa: SIM115 - kept by the daemon
        cluster.processes.append(subprocess.Popen([*daemon, "-f", str(conf)], env=env,
                                                  stdout=out, stderr=subprocess.STDOUT))
        time.sleep(0.5)
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        state = cluster.run("sinfo", "-h", "-o", "%T").stdout.strip()
        if state == "idle":
            return cluster
        if any(p.poll() is not None for p in cluster.processes):
            break
        time.sleep(0.5)
    logs = (cluster.log("slurmctld.log")[-400:] + cluster.log("slurmd.log")[-400:]).strip()
    cluster.stop()
    raise SlurmUnavailableError(f"the SLURM node did not become idle in {timeout:.0f} s: {logs}")
