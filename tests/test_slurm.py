"""The workflow on a real scheduler: the tiny configuration through ``--profile profiles/slurm``
on a single-node SLURM cluster started on localhost (tests/slurm_cluster.py), against the
laptop run of the same configuration. The cluster run starts from the laptop run's demo
snapshots, as a run of a user's simulation suite does: slicing and everything after it go
through the scheduler (the snapshot generator is the demo's stand-in for the N-body runs).

Without SLURM's packages or root the cluster cannot start and these tests are skipped with
the reason; ``RAYTRACE_REQUIRE_SLURM=1`` (set by ``.ci/run``) turns that skip into a failure.
The test cluster has no accounting database, so only this run overrides the profile: it
checks job states with ``squeue`` instead of ``sacct``, names no account (the plugin would
validate it with ``sacctmgr``), submits to the test partition and asks for at most the
node's two CPUs. Everything else is the profile's.
"""

from __future__ import annotations

import os
import re
import socket
import subprocess
import time
from types import SimpleNamespace

import pytest

import slurm_cluster
from workflow_helpers import (ROOT, check_killed, check_resume, kill_during_trace, run_differences, seed_snapshots,
                              snakemake, snakemake_command, temporary_files)

REQUIRE = os.environ.get("RAYTRACE_REQUIRE_SLURM") == "1"


@pytest.fixture(scope="module")
def cluster(tmp_path_factory):
    try:
        c = slurm_cluster.start(tmp_path_factory.mktemp("slurm"))
    except slurm_cluster.Unavailable as exc:
        if REQUIRE:
            pytest.fail(f"RAYTRACE_REQUIRE_SLURM=1, but no SLURM test cluster could start: {exc}")
        pytest.skip(f"no SLURM test cluster on this machine: {exc} (RAYTRACE_REQUIRE_SLURM=1 makes this a failure)")
    yield c
    c.stop()


def cluster_overrides(cluster) -> list[str]:
    """Command-line options for the test cluster only (see the module notes)."""
    return ["--default-resources", f"slurm_partition={cluster.partition}", "--slurm-status-command", "squeue",
            "--slurm-init-seconds-before-status-checks", "2"]


def minutes(limit: str) -> int:
    """SLURM's time limit ([days-]hours:minutes:seconds or minutes:seconds) in minutes."""
    days, _, rest = limit.rpartition("-")
    parts = [int(x) for x in rest.split(":")]
    while len(parts) < 3:
        parts.insert(0, 0)
    h, m, s = parts
    return (int(days or 0) * 24 + h) * 60 + m + (s > 0)


def scheduler_jobs(cluster, run_id: str) -> list[dict[str, str]]:
    keys = ("id", "name", "state", "comment", "memory", "limit", "cpus")
    rows = cluster.squeue("%i", "%j", "%T", "%k", "%m", "%l", "%C")
    return [dict(zip(keys, r)) for r in rows if r[1] == run_id]


def run_id_of(text: str) -> str:
    m = re.search(r"SLURM run ID: (\S+)", text)
    assert m, "the SLURM executor did not report a run ID"
    return m.group(1)


@pytest.fixture(scope="module")
def slurm_run(cluster, finished_run, tmp_path_factory):
    reference, cfg = finished_run
    work = tmp_path_factory.mktemp("slurm_run")
    assert seed_snapshots(reference, work) == 12  # 2 models x 3 snapshots x 2 files
    t0 = time.perf_counter()
    proc = snakemake(work, cfg, *cluster_overrides(cluster), profile="slurm", cores=str(cluster.cpus))
    wall = time.perf_counter() - t0
    text = proc.stdout + proc.stderr
    assert proc.returncode == 0, text[-4000:]
    run_id = run_id_of(text)
    return SimpleNamespace(work=work, wall_s=wall, text=text, run_id=run_id, jobs=scheduler_jobs(cluster, run_id))


def test_the_scheduler_ran_every_job(slurm_run):
    jobs = slurm_run.jobs
    # the scheduler's own records: every job of this run finished there
    assert jobs and all(j["state"] == "COMPLETED" for j in jobs), jobs
    kinds = [re.match(r"rule_([a-z]+)", j["comment"]).group(1) for j in jobs]
    # ungrouped: one job per snapshot; grouped: the batches and the summary
    assert kinds.count("slice") == 6, kinds
    assert kinds.count("batch") >= 1 and kinds.count("summary") >= 1, kinds
    assert len(jobs) == len(kinds) <= 10  # 28 workflow jobs in at most 10 submissions
    # nothing but the target rule ran on the submitting machine
    assert re.findall(r"localrule (\w+):", slurm_run.text) == ["all"]
    assert "28 of 28 steps (100%) done" in slurm_run.text


def test_jobs_ask_the_scheduler_for_the_computed_resources(slurm_run, finished_run):
    from raytrace import config as rc
    from raytrace import resources as rr

    cfg = rc.validate(finished_run[1])
    est = {rule: rr.estimate(rule, cfg) for rule in rr.RULES}
    for job in slurm_run.jobs:
        kind = re.match(r"rule_([a-z]+)", job["comment"]).group(1)
        asked = (int(job["memory"].rstrip("M")), minutes(job["limit"]), int(job["cpus"]))
        if kind == "slice":
            assert asked == (est[kind].mem_mb, est[kind].runtime_min, est[kind].threads), job
        else:  # a group job: its chains one after another, at most two jobs side by side
            members = {"batch": ("trace", "observe", "measure"),
                       "summary": ("stack", "forecast", "plot_statistics")}[kind]
            assert asked[0] >= max(est[r].mem_mb for r in members), job
            assert asked[1] >= sum(est[r].runtime_min for r in members), job
            assert asked[2] <= 2, job


def test_slurm_jobs_ran_this_checkout(slurm_run):
    # the jobs' environment reached them through sbatch: the package under test, on this node
    log = (slurm_run.work / "logs/trace/fiducial_b000.log").read_text()
    assert f"from {ROOT / 'raytrace'} on {socket.gethostname()}" in log, log[-500:]


def test_slurm_run_equals_the_laptop_run(slurm_run, finished_run, capsys):
    laptop, _ = finished_run
    assert run_differences(laptop, slurm_run.work) == []
    assert len(list((slurm_run.work / "results").rglob("*.h5"))) > 100
    assert (slurm_run.work / "results/forecast/errors.csv").read_text() == (
        laptop / "results/forecast/errors.csv").read_text()  # the forecast numbers
    assert temporary_files(slurm_run.work) == []
    with capsys.disabled():  # (benchmarks/bench_cluster.py compares two runs from scratch)
        print(f"\n[wall time] tiny configuration: SLURM profile from the snapshots {slurm_run.wall_s:.0f} s, "
              f"laptop profile from scratch {finished_run.wall_s:.0f} s")


@pytest.mark.slow
def test_slurm_run_killed_and_resumed_equals_the_laptop_run(cluster, finished_run, tmp_path):
    # Snakemake (the submitting process) is killed; the scheduler's jobs run on. As README
    # says, the user cancels them (a job finishing without Snakemake leaves no record of its
    # settings), removes the lock and resumes; the resumed run makes the cancelled jobs again.
    # (The default suite kills and resumes a laptop run: tests/test_workflow.py.)
    from raytrace import config as rc

    reference, cfg = finished_run
    seed_snapshots(reference, tmp_path)
    overrides = cluster_overrides(cluster)
    command = snakemake_command(tmp_path, cfg, *overrides, profile="slurm", cores=str(cluster.cpus))
    killed = kill_during_trace(command, tmp_path, rc.realizations_per_job(rc.validate(cfg)))
    check_killed(reference, tmp_path, killed)
    run_id = run_id_of((tmp_path / "killed_run.log").read_text())
    assert any(j["state"] == "RUNNING" for j in scheduler_jobs(cluster, run_id))  # it outlived Snakemake
    subprocess.run(["scancel", "--name", run_id], check=True)
    deadline = time.monotonic() + 60
    while any(j["state"] in ("RUNNING", "PENDING", "COMPLETING") for j in scheduler_jobs(cluster, run_id)):
        assert time.monotonic() < deadline, scheduler_jobs(cluster, run_id)
        time.sleep(0.5)
    check_resume(reference, tmp_path, cfg, killed,
                 lambda: snakemake(tmp_path, cfg, *overrides, profile="slurm", cores=str(cluster.cpus)))
    jobs = scheduler_jobs(cluster, run_id)
    assert any(j["state"] == "CANCELLED" for j in jobs), jobs
