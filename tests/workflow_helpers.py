"""Running the workflow from the tests: the tiny configuration, Snakemake calls, dry-run
parsing, and comparing the outputs of two runs."""

from __future__ import annotations

import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml

ROOT = Path(__file__).resolve().parents[1]


def tiny_config() -> dict:
    cfg = yaml.safe_load((ROOT / "config" / "small.yaml").read_text())
    cfg["output"] = "results"
    cfg["suite"]["models"] = {"fiducial": {}, "m_nu_zero": {"m_nu_eV": 0.0}}
    cfg["maps"]["realizations"] = 10  # one job of 10 per model and stage ...
    cfg["forecast"]["covariance_realizations"] = 20  # ... and two for the fiducial
    cfg["forecast"]["parameters"] = {"m_nu_eV": ["m_nu_zero"]}  # one-sided
    cfg["forecast"]["maps"] = ["bin1"]  # a data vector short enough for 20 realisations
    cfg["forecast"]["priors"] = {"sigma": {"m_nu_eV": 0.5}}
    cfg["forecast"]["nuisance"] = {"alignment": {"step": 0.5, "prior_sigma": 1.0}}  # two observe variants
    return cfg


def environment() -> dict[str, str]:
    """The tests' environment, with this checkout's package first for every job (also SLURM's)."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT)] + [p for p in env.get("PYTHONPATH", "").split(os.pathsep) if p])
    return env


def snakemake_command(workdir: Path, cfg: dict, *extra: str, profile: str = "laptop", cores: str = "2") -> list[str]:
    path = workdir / "config.yaml"
    path.write_text(yaml.safe_dump(cfg))
    return [sys.executable, "-m", "snakemake", "-s", str(ROOT / "Snakefile"), "-d", str(workdir),
            "--profile", str(ROOT / "profiles" / profile), "--cores", cores, "--configfile", str(path), *extra]


def snakemake(workdir: Path, cfg: dict, *extra: str, profile: str = "laptop", cores: str = "2"
              ) -> subprocess.CompletedProcess:
    return subprocess.run(snakemake_command(workdir, cfg, *extra, profile=profile, cores=cores), capture_output=True,
                          text=True, env=environment())


def planned_jobs(proc) -> dict[str, int]:
    """Rule -> job count from a dry run's 'Job stats' table."""
    text = proc.stdout + proc.stderr
    if "Nothing to be done" in text:
        return {}
    table = text.split("Job stats:", 1)[1]
    jobs = {}
    for line in table.splitlines()[3:]:
        m = re.match(r"^(\w+)\s+(\d+)\s*$", line.strip())
        if not m:
            break
        jobs[m.group(1)] = int(m.group(2))
    jobs.pop("total", None)
    return jobs


def planned_wildcards(proc, rule: str) -> list[dict[str, str]]:
    """The wildcards of every job of ``rule`` a dry run lists."""
    text = proc.stdout + proc.stderr
    found = []
    for block in re.split(r"\n(?=\s*(?:local)?rule \w+:)", text):
        if re.match(rf"\s*(?:local)?rule {rule}:", block):
            m = re.search(r"^\s*wildcards: (.*)$", block, re.M)
            found.append(dict(kv.split("=", 1) for kv in m.group(1).split(", ")) if m else {})
    return found


def seed_snapshots(reference: Path, work: Path) -> int:
    """Copy a finished run's demo snapshots, and Snakemake's records of them, into ``work``.

    A run seeded so starts from its simulation suite, as a run of user snapshots does: from
    slicing on. Returns the number of files copied.
    """
    import base64
    import shutil

    copied = 0
    for src in sorted((reference / "results" / "snapshots").rglob("*.hdf5")):
        dst = work / src.relative_to(reference)
        dst.parent.mkdir(parents=True, exist_ok=True)
        shutil.copy2(src, dst)
        copied += 1
    (work / ".snakemake" / "metadata").mkdir(parents=True, exist_ok=True)
    for record in (reference / ".snakemake" / "metadata").iterdir():
        name = base64.urlsafe_b64decode(record.name + "=" * (-len(record.name) % 4)).decode()
        if name.startswith("results/snapshots/"):
            shutil.copy2(record, work / ".snakemake" / "metadata" / record.name)
    return copied


# ---------------------------------------------------------------- comparing two runs
COMPARED = (".h5", ".hdf5", ".fits", ".csv")


def output_files(workdir: Path) -> list[Path]:
    """The deterministic outputs of a run, relative to its folder: HDF5, FITS and CSV files
    (figures, HTML pages and logs carry dates, paths and versions)."""
    results = workdir / "results"
    return sorted(p.relative_to(workdir) for p in results.rglob("*") if p.is_file() and p.suffix in COMPARED)


def temporary_files(workdir: Path) -> list[Path]:
    return sorted(p.relative_to(workdir) for p in (workdir / "results").rglob("*.tmp*"))


def _datasets(path: Path) -> dict[str, np.ndarray]:
    out = {}
    with h5py.File(path, "r") as f:
        f.visititems(lambda name, obj: out.__setitem__(name, obj[()]) if isinstance(obj, h5py.Dataset) else None)
    return out


def _same_array(a, b) -> bool:
    a, b = np.asarray(a), np.asarray(b)
    if a.dtype != b.dtype or a.shape != b.shape:
        return False
    if a.dtype.kind == "O":
        return a.tolist() == b.tolist()
    return a.tobytes() == b.tobytes()


def file_difference(reference: Path, other: Path) -> str | None:
    """None when the data of two output files are identical, else what differs.

    HDF5: every dataset, byte for byte with its dtype and shape (attributes hold paths and
    times, so they are left out). FITS: the data of every HDU. CSV: the text.
    """
    suffix = reference.suffix
    try:
        if suffix in (".h5", ".hdf5"):
            a, b = _datasets(reference), _datasets(other)
            if set(a) != set(b):
                return f"datasets differ: {sorted(set(a) ^ set(b))}"
            bad = [k for k in a if not _same_array(a[k], b[k])]
            return f"data of {bad[:5]} differ" if bad else None
        if suffix == ".fits":
            from astropy.io import fits

            with fits.open(reference) as ha, fits.open(other) as hb:
                if len(ha) != len(hb):
                    return f"{len(ha)} HDUs against {len(hb)}"
                bad = [i for i, (x, y) in enumerate(zip(ha, hb)) if not _same_array(
                    np.asarray(x.data) if x.data is not None else 0, np.asarray(y.data) if y.data is not None else 0)]
                return f"data of HDUs {bad} differ" if bad else None
        if reference.read_bytes() != other.read_bytes():
            return "text differs"
        return None
    except OSError as exc:  # not readable: truncated or not a file of its kind
        return f"unreadable ({exc})"


def run_differences(reference: Path, other: Path, *, only_present: bool = False) -> list[str]:
    """Every output of ``reference`` that ``other`` lacks or holds different data in (and the
    outputs only ``other`` has); with ``only_present``, only the files ``other`` has."""
    ref, new = set(output_files(reference)), set(output_files(other))
    problems = [] if only_present else [f"{p}: missing" for p in sorted(ref - new)]
    problems += [f"{p}: not made by the reference run" for p in sorted(new - ref)]
    for p in sorted(ref & new):
        diff = file_difference(reference / p, other / p)
        if diff:
            problems.append(f"{p}: {diff}")
    return problems


# ------------------------------------------------------------------ kill and resume
def kill_during_trace(command: list[str], work: Path, per_job: int, timeout: float = 1200) -> tuple[str, str]:
    """Start Snakemake, SIGKILL it (and every process it started) while a trace job is
    half-way through its batch; return that batch's (model, batch). Its output goes to
    ``work/killed_run.log``."""
    import psutil

    with open(work / "killed_run.log", "wb") as log:
        proc = subprocess.Popen(command, stdout=log, stderr=subprocess.STDOUT, env=environment(),
                                start_new_session=True)
    digits = 4 - (len(str(per_job)) - 1)
    deadline = time.monotonic() + timeout
    try:
        while time.monotonic() < deadline:
            if proc.poll() is not None:
                pytest.fail(f"Snakemake ended ({proc.returncode}) before a trace batch was caught half-way")
            for model_dir in sorted((work / "results/maps").glob("*")):
                done: dict[str, int] = {}
                for f in model_dir.glob("r*.h5"):
                    done[f.name[1:1 + digits]] = done.get(f.name[1:1 + digits], 0) + 1
                partial = [b for b, n in done.items() if 0 < n < per_job]
                if partial:
                    return model_dir.name, partial[0]
            time.sleep(0.05)
        pytest.fail(f"no trace batch was caught half-way in {timeout:.0f} s")
    finally:
        children = psutil.Process(proc.pid).children(recursive=True) if proc.poll() is None else []
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
        for child in children:
            try:
                child.kill()
            except psutil.NoSuchProcess:
                pass
        proc.wait()


def check_killed(reference: Path, work: Path, killed: tuple[str, str]) -> None:
    """Right after the kill: every output under its final name is complete."""
    model, batch = killed
    assert run_differences(reference, work, only_present=True) == []
    assert any((work / "results/maps" / model).glob(f"r{batch}*.h5"))  # the half-done batch left files


def check_resume(reference: Path, work: Path, cfg: dict, killed: tuple[str, str], resume) -> None:
    """Unlock, see the half-done batch planned again, resume, and compare with ``reference``."""
    model, batch = killed
    # nothing under a final name is unfinished: every output present is the complete file
    assert run_differences(reference, work, only_present=True) == []
    # a killed Snakemake leaves its lock; the user removes it (README, "Resume") and reruns
    assert snakemake(work, cfg, "--unlock").returncode == 0
    dry = snakemake(work, cfg, "-n")
    assert {"model": model, "batch": batch} in planned_wildcards(dry, "trace"), dry.stdout[-3000:]
    proc = resume()
    assert proc.returncode == 0, (proc.stdout + proc.stderr)[-4000:]
    assert run_differences(reference, work) == []
    # the killed job's temporary files went when the files were written again
    assert temporary_files(work) == []
    # and Snakemake holds its record of every output, so later changes rerun exactly
    text = (lambda p: p.stdout + p.stderr)(snakemake(work, cfg, "-n"))
    assert "Nothing to be done" in text and "missing provenance/metadata" not in text, text[-2000:]


def check_kill_and_resume(reference: Path, work: Path, cfg: dict, killed: tuple[str, str], resume) -> None:
    check_killed(reference, work, killed)
    check_resume(reference, work, cfg, killed, resume)


def check_jobs_within_requests(work: Path, full: dict) -> set[str]:
    """Every job's record in ``logs/benchmarks`` (peak memory, CPU time) fits in what its rule
    asks for (raytrace/resources.py: the memory request, the CPU estimate times the time factor);
    returns the rules seen. The wall time on a shared machine says little, so CPU time is used."""
    import csv

    from raytrace import resources as rr

    seen = set()
    for tsv in (work / "logs/benchmarks").rglob("*.tsv"):
        rule = tsv.parent.name
        model = next((m for m in full["suite"]["models"] if tsv.stem.startswith(m)), None)
        want = rr.estimate(rule, full, model=model)
        with open(tsv) as f:
            row = next(csv.DictReader(f, delimiter="\t"))
        assert float(row["max_rss"]) <= want.mem_mb, (tsv, row["max_rss"], want)
        assert float(row["cpu_time"]) <= want.cpu_s * rr.TIME_FACTOR, (tsv, row["cpu_time"], want)
        seen.add(rule)
    return seen
