"""Job resources from the configuration, and the atomic writes a resumed run relies on."""

from __future__ import annotations

import copy
import multiprocessing
import os
import socket
import subprocess
import sys
import time

import pytest
import yaml

from raytrace import config as rc
from raytrace import resources as rr
from raytrace.hdf5 import atomic_file, remove_stale_temporaries, temporary_path
from workflow_helpers import ROOT


def small() -> dict:
    return rc.validate(yaml.safe_load((ROOT / "config" / "small.yaml").read_text()))


def scaled(path: tuple[str, str], factor: int) -> dict:
    cfg = copy.deepcopy(small())
    cfg[path[0]][path[1]] *= factor
    return cfg


@pytest.mark.parametrize("path, rules", [
    (("suite", "particles_per_side"), ("simulate", "slice")),
    (("planes", "grid"), ("slice", "trace")),
    (("maps", "pixels"), ("trace", "observe", "measure", "observe_variant", "measure_variant", "plot_maps")),
])
def test_bigger_sizes_ask_for_more(path, rules):
    present = rr.rules_of(small())
    base = {r: rr.estimate(r, small()) for r in present}
    big = {r: rr.estimate(r, scaled(path, 4)) for r in present}
    for rule in present:
        if rule in rules:  # the stages that work on that size need more time and memory ...
            assert big[rule].cpu_s > base[rule].cpu_s and big[rule].memory_mb > base[rule].memory_mb, rule
        else:  # ... and no other stage changes
            assert big[rule] == base[rule], rule


def test_requests_grow_with_each_attempt_and_mpi_tasks_share_the_slicing():
    e = rr.estimate("trace", scaled(("maps", "pixels"), 16))  # 1024^2 maps: above the 10-minute floor
    assert e.runtime_min > rr.MIN_RUNTIME_MIN and e.mem_mb % 100 == 0 and e.mem_mb >= 1.2 * e.memory_mb
    assert e.request(3) == {"mem_mb": 3 * e.mem_mb, "runtime": 3 * e.runtime_min}
    cfg = scaled(("suite", "particles_per_side"), 16)  # 512^3 particles
    one, four = rr.estimate("slice", cfg), rr.estimate("slice", cfg, tasks=4)
    # the tasks share the particles; each holds its own accumulators and chunk, rank 0 the fields
    assert four.cpu_s < one.cpu_s and one.memory_mb < four.memory_mb < 4 * one.memory_mb
    # the fiducial's stack reads its 60 realisations, the others their 10
    assert rr.estimate("stack", small(), model="fiducial").cpu_s > rr.estimate("stack", small(), model="m_nu_zero").cpu_s
    assert rr.estimate("simulate", cfg).threads == 4 and rr.estimate("trace", cfg).threads == 1


def test_resources_command_prints_every_rule():
    proc = subprocess.run([sys.executable, "-m", "raytrace", "resources", str(ROOT / "config" / "small.yaml")],
                          capture_output=True, text=True, env=dict(os.environ, PYTHONPATH=str(ROOT)))
    assert proc.returncode == 0, proc.stderr
    rules = [line.split()[0] for line in proc.stdout.splitlines()[1:]]
    assert set(rules) == set(rr.rules_of(small())) and "shells" not in rules


def _write(path: str, byte: bytes, n: int, start: float) -> None:
    time.sleep(max(0.0, start - time.time()))
    with atomic_file(path) as tmp, open(tmp, "wb") as f:
        for _ in range(n // 4096):  # slowly, so that the two writers overlap
            f.write(byte * 4096)
            f.flush()


def test_two_writers_of_one_file_never_mix(tmp_path):
    # a job left running by a killed Snakemake and its rerun write the same file at once
    path = tmp_path / "out.h5"
    start = time.time() + 0.5
    ctx = multiprocessing.get_context("spawn")
    procs = [ctx.Process(target=_write, args=(str(path), b, 4 << 20, start)) for b in (b"a", b"b")]
    for p in procs:
        p.start()
    for p in procs:
        p.join()
        assert p.exitcode == 0
    data = path.read_bytes()
    assert len(data) == 4 << 20 and data in (b"a" * (4 << 20), b"b" * (4 << 20))
    assert not list(tmp_path.glob("out.h5.tmp*"))


def test_stale_temporaries_of_dead_processes_of_this_host_go(tmp_path):
    final = tmp_path / "r0000.h5"
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    host = socket.gethostname().split(".")[0]
    names = {"dead": f"r0000.h5.tmp.{host}.{dead.pid}", "alive": temporary_path(final).name,
             "other_host": f"r0000.h5.tmp.elsewhere.{dead.pid}", "old_style": "r0000.h5.tmp",
             "other_file": f"r0001.h5.tmp.{host}.{dead.pid}"}
    for name in names.values():
        (tmp_path / name).write_text("partial")
    removed = {p.name for p in remove_stale_temporaries(final)}
    assert removed == {names["dead"], names["old_style"]}
    assert {p.name for p in tmp_path.iterdir()} == {names["alive"], names["other_host"], names["other_file"]}


def test_full_sky_rules_are_sized_from_nside():
    sphere = rc.validate(yaml.safe_load((ROOT / "config" / "sphere_small.yaml").read_text()))
    present = rr.rules_of(sphere)
    assert {"shells", "trace_sphere"} <= set(present) and not {"slice", "trace"} & set(present)
    big = copy.deepcopy(sphere)
    big["maps"]["nside"] *= 4
    big["statistics"]["power_spectrum"]["ell_max"] = 3 * big["maps"]["nside"]
    big = rc.validate(big)
    for rule in ("shells", "trace_sphere", "observe", "measure"):
        small_e, big_e = rr.estimate(rule, sphere), rr.estimate(rule, big)
        assert big_e.cpu_s > small_e.cpu_s and big_e.memory_mb > small_e.memory_mb, rule
    # multi-plane holds the ray state: more memory per pixel than Born
    born = copy.deepcopy(big)
    born["maps"]["method"] = "born"
    assert rr.estimate("trace_sphere", born).memory_mb < rr.estimate("trace_sphere", big).memory_mb
