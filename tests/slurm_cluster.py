"""A single-node SLURM cluster on localhost, for the tests and the scheduling benchmark.

Debian's packages (``apt-get install -y slurmctld slurmd slurm-client munge``) and root are
needed: munged authenticates, slurmctld schedules and slurmd runs the jobs on this machine.
There is no accounting database (``sacct`` does not work), so runs must check job states
with ``squeue``; finished jobs stay visible there for ``MinJobAge`` seconds. The
configuration goes to ``/etc/slurm/slurm.conf``, the only place the jobs' own ``srun``
calls find it (the executor plugin's job step drops ``SLURM_CONF``); a file there that this
module did not write is never replaced. :func:`start` raises :class:`Unavailable` with the
reason when a cluster cannot be started.
"""

from __future__ import annotations

import os
import shutil
import signal
import socket
import subprocess
import time
from dataclasses import dataclass, field
from pathlib import Path

CONF = Path("/etc/slurm/slurm.conf")
MARK = "# raytrace single-node test cluster (tests/slurm_cluster.py)"
PARTITION = "debug"
MUNGE_KEY = Path("/etc/munge/munge.key")
MUNGE_SOCKET = Path("/run/munge/munge.socket.2")
PACKAGES = "apt-get install -y slurmctld slurmd slurm-client munge"
COMMANDS = ("slurmctld", "slurmd", "sbatch", "squeue", "sinfo", "scontrol", "munged", "munge")


class Unavailable(RuntimeError):
    """A test cluster cannot be started here (the message says why)."""


@dataclass
class Cluster:
    workdir: Path
    node: str
    partition: str = PARTITION
    cpus: int = 2
    processes: list[subprocess.Popen] = field(default_factory=list)
    wrote_conf: bool = False

    def squeue(self, *fields: str) -> list[list[str]]:
        """Every job the controller still knows (running or finished), one list per job."""
        out = subprocess.run(["squeue", "--states=all", "--noheader", f"--format={'|'.join(fields)}"],
                             capture_output=True, text=True, check=True).stdout
        return [line.split("|") for line in out.splitlines() if line.strip()]

    def stop(self) -> None:
        """Stop the daemons this cluster started (each by its process group) and remove its file."""
        for proc in reversed(self.processes):
            if proc.poll() is None:
                os.killpg(proc.pid, signal.SIGTERM)
        deadline = time.monotonic() + 15
        for proc in reversed(self.processes):
            try:
                proc.wait(timeout=max(0.1, deadline - time.monotonic()))
            except subprocess.TimeoutExpired:
                os.killpg(proc.pid, signal.SIGKILL)
                proc.wait()
        self.processes.clear()
        if self.wrote_conf and CONF.exists() and CONF.read_text().startswith(MARK):
            CONF.unlink()


def _run(*cmd: str, timeout: float = 20) -> subprocess.CompletedProcess:
    return subprocess.run(list(cmd), capture_output=True, text=True, timeout=timeout)


def _memory_mb() -> int:
    for line in Path("/proc/meminfo").read_text().splitlines():
        if line.startswith("MemTotal:"):
            return int(line.split()[1]) // 1024
    raise Unavailable("cannot read MemTotal from /proc/meminfo")


def slurm_conf(workdir: Path, node: str, cpus: int, memory_mb: int) -> str:
    return f"""{MARK}
ClusterName=raytrace-test
SlurmctldHost={node}(127.0.0.1)
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
StateSaveLocation={workdir}/state
SlurmdSpoolDir={workdir}/spool
SlurmctldPidFile={workdir}/slurmctld.pid
SlurmdPidFile={workdir}/slurmd.pid
SlurmctldLogFile={workdir}/slurmctld.log
SlurmdLogFile={workdir}/slurmd.log
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
SelectType=select/cons_tres
SelectTypeParameters=CR_Core_Memory
SchedulerType=sched/backfill
AccountingStorageType=accounting_storage/none
JobAcctGatherType=jobacct_gather/none
JobCompType=jobcomp/none
MpiDefault=none
# finished jobs stay visible to squeue (the runs' status command) for 10 minutes
MinJobAge=600
DefMemPerCPU=1000
ReturnToService=2
# the node is what this file says, whatever the hardware (CI machines differ)
SlurmdParameters=config_overrides
NodeName={node} NodeAddr=127.0.0.1 CPUs={cpus} RealMemory={memory_mb} State=UNKNOWN
PartitionName={PARTITION} Nodes={node} Default=YES MaxTime=INFINITE State=UP
"""


def _daemon(cmd: list[str], log: Path) -> subprocess.Popen:
    with open(log, "wb") as out:
        return subprocess.Popen(cmd, stdout=out, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
                                start_new_session=True)


def _tail(path: Path, n: int = 5) -> str:
    return " | ".join(path.read_text(errors="replace").splitlines()[-n:]) if path.exists() else "(no log)"


def start(workdir: Path, *, cpus: int = 2, timeout: float = 60) -> Cluster:
    """Start munged (unless running), slurmctld and slurmd; return once the node is idle."""
    import importlib.util

    if importlib.util.find_spec("snakemake_executor_plugin_slurm") is None:
        raise Unavailable('the SLURM executor plugin is not installed (pip install -e ".[slurm]")')
    missing = [c for c in COMMANDS if shutil.which(c) is None]
    if missing:
        raise Unavailable(f"SLURM is not installed (missing {', '.join(missing)}); install it with `{PACKAGES}`")
    if os.geteuid() != 0:
        raise Unavailable("starting slurmctld and slurmd needs root")
    if CONF.exists() and not CONF.read_text().startswith(MARK):
        raise Unavailable(f"{CONF} belongs to another SLURM installation; it is left alone")
    workdir = Path(workdir)
    for sub in ("state", "spool"):
        (workdir / sub).mkdir(parents=True, exist_ok=True)
    node = socket.gethostname().split(".")[0]
    cluster = Cluster(workdir, node, cpus=cpus)
    try:
        # munge: a key (once per machine), then the daemon unless one already answers
        if _run("munge", "-n").returncode != 0:
            if not MUNGE_KEY.exists():
                made = _run("mungekey", "-c", "-k", str(MUNGE_KEY))
                if made.returncode != 0:
                    raise Unavailable(f"mungekey -c failed: {made.stderr.strip()}")
                shutil.chown(MUNGE_KEY, "munge", "munge")
                MUNGE_KEY.chmod(0o600)
            for d, mode in ((MUNGE_SOCKET.parent, 0o755), (Path("/var/log/munge"), 0o700), (Path("/var/lib/munge"), 0o700)):
                d.mkdir(parents=True, exist_ok=True)
                shutil.chown(d, "munge", "munge")
                d.chmod(mode)
            cluster.processes.append(_daemon(["runuser", "-u", "munge", "--", "munged", "-F"], workdir / "munged.out"))
            for _ in range(50):
                if _run("munge", "-n").returncode == 0:
                    break
                time.sleep(0.1)
            else:
                raise Unavailable(f"munged did not start: {_tail(workdir / 'munged.out')}")
        if _run("scontrol", "ping").returncode == 0 and CONF.exists():
            raise Unavailable("a SLURM controller is already running with the test configuration; stop it first")
        CONF.parent.mkdir(parents=True, exist_ok=True)
        CONF.write_text(slurm_conf(workdir, node, cpus, int(_memory_mb() * 0.9)))
        cluster.wrote_conf = True
        cluster.processes.append(_daemon(["slurmctld", "-D", "-i"], workdir / "slurmctld.out"))
        cluster.processes.append(_daemon(["slurmd", "-D", "-N", node], workdir / "slurmd.out"))
        deadline = time.monotonic() + timeout
        state = ""
        while time.monotonic() < deadline:
            for proc, name in zip(cluster.processes[-2:], ("slurmctld", "slurmd")):
                if proc.poll() is not None:
                    raise Unavailable(f"{name} exited ({proc.returncode}): {_tail(workdir / (name + '.out'))}")
            state = _run("sinfo", "--noheader", "--format=%T").stdout.strip()
            if state == "idle":
                return cluster
            time.sleep(0.2)
        raise Unavailable(f"the node did not become idle in {timeout:.0f} s (state {state!r}): "
                          f"{_tail(workdir / 'slurmctld.log')}")
    except BaseException:
        cluster.stop()
        raise
