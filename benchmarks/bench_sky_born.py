"""One full-sky Born map at nside 1024 from a 256^3-particle demo suite: time and peak memory.

Runs the workflow's own stages as separate processes, as Snakemake would: ``simulate``
(the demo snapshots, once; kept in benchmarks/output/), ``shells`` (tiling, one
realisation) and ``trace-sphere`` (Born convergence and the spin-2 shear of one source),
and prints each stage's wall time and peak memory from its log line. Default: 256^3
particles in a 512 Mpc/h box, snapshots at z = 0, 0.5, 1, shells of 128 Mpc/h, a source at
z = 1, nside 1024. The shell building is serial (one thread); the harmonic transforms use
healpy's default threading, stated below.
Run: python benchmarks/bench_sky_born.py [--quick] [--particles N] [--nside N] [--box L]
"""

from __future__ import annotations

import argparse
import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

FIDUCIAL = {"Omega_m": 0.3, "Omega_b": 0.049, "h": 0.68, "n_s": 0.965, "A_s": 2.1e-9, "m_nu_eV": 0.1}
HERE = Path(__file__).resolve().parent


def stage(args: list[str], env: dict) -> tuple[float, float, str]:
    proc = subprocess.run([sys.executable, "-m", "raytrace", *args], capture_output=True, text=True, env=env)
    if proc.returncode != 0:
        sys.exit(f"{args[0]} failed:\n{proc.stderr[-3000:]}")
    m = re.search(r"wall time ([\d.]+) s, peak memory ([\d.]+) MiB", proc.stderr)
    return float(m.group(1)), float(m.group(2)), proc.stderr


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="64^3 particles at nside 256")
    p.add_argument("--particles", type=int, default=256, help="particles per side (default 256)")
    p.add_argument("--nside", type=int, default=1024)
    p.add_argument("--box", type=float, default=512.0, help="box side in Mpc/h (default 512)")
    p.add_argument("--z-source", type=float, default=1.0)
    args = p.parse_args()
    if args.quick:
        args.particles, args.nside = 64, 256
    out = HERE / "output" / f"sky_born_{args.particles}_{args.box:g}"
    env = dict(os.environ, OMP_NUM_THREADS=os.environ.get("OMP_NUM_THREADS", "1"))
    print(f"threads: shell kernel serial; OMP_NUM_THREADS={env['OMP_NUM_THREADS']} (healpy transforms); "
          f"cores={os.cpu_count()}")
    zs = [0.0, 0.5, 1.0]
    snap_dir = out / "snapshots"
    files = [str(snap_dir / f"snap_{i:03d}.{j}.hdf5") for i in range(len(zs)) for j in range(2)]
    if not all(Path(f).exists() for f in files):
        settings = {"box_mpc_h": args.box, "particles_per_side": args.particles, "files_per_snapshot": 2,
                    "lpt_order": 2, "snapshot_redshifts": zs, "cosmology": FIDUCIAL, "seed": 1}
        t, mem, _ = stage(["simulate", "--model", "fiducial", "--settings", json.dumps(settings),
                           "--outdir", str(snap_dir)], env)
        print(f"demo suite (not part of the map): {args.particles}^3 particles x {len(zs)} snapshots, "
              f"{t:.1f} s, {mem:.0f} MiB")
    shells = out / "shells.h5"
    maps = out / "maps.h5"
    shell_settings = {"shells": {"kind": "tile", "thickness_mpc_h": 128.0, "species": [1], "chunk_particles": 2097152,
                                 "blocks_per_side": 8},
                      "nside": args.nside, "cosmology": FIDUCIAL, "seed": 1, "reach_z": args.z_source,
                      "randomize": True, "snapshot_redshifts": zs, "files_per_snapshot": 2}
    t_shells, m_shells, log = stage(["shells", "--model", "fiducial", "--realization", "0", "--settings",
                                     json.dumps(shell_settings), "--snapshots", *files, "--output", str(shells)], env)
    images = sum(int(n) for n in re.findall(r"Mpc/h: (\d+) images", log))
    trace_settings = {"cosmology": FIDUCIAL, "seed": 1, "sources": None,
                      "maps": {"geometry": "sphere", "nside": args.nside, "method": "born",
                               "source_redshifts": [args.z_source], "cmb_lensing": False}}
    t_trace, m_trace, _ = stage(["trace-sphere", "--model", "fiducial", "--realization", "0", "--settings",
                                 json.dumps(trace_settings), "--shells", str(shells), "--output", str(maps)], env)
    size = shells.stat().st_size / 2**20
    print(f"full-sky Born map, nside {args.nside} ({12 * args.nside**2} pixels), source z = {args.z_source}, "
          f"{args.particles}^3 particles in a {args.box:g} Mpc/h box:")
    print(f"  shells       {t_shells:8.1f} s  peak {m_shells:7.0f} MiB  ({images / 1e9:.2f} G particle images, "
          f"{images / t_shells / 1e6:.1f} M/s; shell file {size:.0f} MiB)")
    print(f"  trace (Born) {t_trace:8.1f} s  peak {m_trace:7.0f} MiB  (kappa, shear by the spin-2 transform, "
          f"E/B diagnostics)")
    print(f"  total        {t_shells + t_trace:8.1f} s  peak {max(m_shells, m_trace):7.0f} MiB")
    shutil.rmtree(out / "tmp", ignore_errors=True)
    shells.unlink()
    maps.unlink()


if __name__ == "__main__":
    main()
