"""Scheduling overhead: wall time of a configuration under the SLURM profile over the laptop's.

Both runs start from nothing in temporary folders, one after the other, on this machine: the
laptop profile with its cores, and the SLURM profile on a single-node cluster started on
localhost (tests/slurm_cluster.py; needs Debian's slurmctld, slurmd, slurm-client and munge
packages, and root), with the test cluster's overrides (squeue for job states, no account,
two CPUs per job). The extra time is the executor's: a Snakemake start inside every job, and
its status checks (every 2 s after a job finished, 10 s more each time none did).
Run as ``python benchmarks/bench_cluster.py [--config config/small.yaml]``; without a
cluster it says why and exits with status 0, so run_all.py goes on.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import yaml

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tests"))

import slurm_cluster  # noqa: E402
from workflow_helpers import run_differences, snakemake  # noqa: E402


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--config", default=str(ROOT / "config" / "small.yaml"))
    args = parser.parse_args()
    cfg = yaml.safe_load(Path(args.config).read_text())
    cfg["output"] = "results"
    with tempfile.TemporaryDirectory(prefix="bench_cluster_") as tmp:
        tmp = Path(tmp)
        try:
            cluster = slurm_cluster.start(tmp / "cluster")
        except slurm_cluster.Unavailable as exc:
            print(f"bench_cluster: skipped, no SLURM test cluster: {exc}")
            return
        try:
            walls = {}
            for name, extra in (("laptop", []), ("slurm", ["--default-resources", f"slurm_partition={cluster.partition}",
                                                            "--slurm-status-command", "squeue",
                                                            "--slurm-init-seconds-before-status-checks", "2"])):
                work = tmp / name
                work.mkdir()
                t0 = time.perf_counter()
                proc = snakemake(work, cfg, *extra, profile=name, cores=str(cluster.cpus))
                walls[name] = time.perf_counter() - t0
                if proc.returncode != 0:
                    sys.exit(f"bench_cluster: the {name} run failed:\n{(proc.stdout + proc.stderr)[-3000:]}")
            same = not run_differences(tmp / "laptop", tmp / "slurm")
        finally:
            cluster.stop()
    print(f"configuration {args.config}: laptop profile {walls['laptop']:.0f} s, SLURM profile {walls['slurm']:.0f} s "
          f"on 2 cores; ratio {walls['slurm'] / walls['laptop']:.2f} (target < 3); "
          f"outputs {'identical' if same else 'DIFFER'}")


if __name__ == "__main__":
    main()
