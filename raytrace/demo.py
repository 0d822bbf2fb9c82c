r"""Synthetic simulation suite: Lagrangian-perturbation-theory particle snapshots.

For each model and snapshot redshift the particles start on a regular lattice and are
displaced with first- (Zel'dovich 1970) or second-order Lagrangian perturbation theory
(2LPT; Bouchet et al. 1995, Scoccimarro 1998) of a Gaussian field whose power spectrum
is camb's linear cold-matter (cdm + baryon) spectrum at that redshift. The white-noise
field is drawn once from the run's seed, so every snapshot of every model shares the
same phases (paired simulations): differences between models are then free of cosmic
variance to first order.

Notes
-----
With :math:`\nabla^2\phi^{(1)} = \delta_L` (the linear density at the snapshot
redshift), the displacement is

.. math::
    \Psi = -\nabla\phi^{(1)} - \tfrac{3}{7}\nabla\phi^{(2)}, \qquad
    \nabla^2\phi^{(2)} = \sum_{i>j}\left[\phi^{(1)}_{,ii}\phi^{(1)}_{,jj} - (\phi^{(1)}_{,ij})^2\right],

using the Einstein–de Sitter approximation :math:`D_2 = -\tfrac{3}{7}D_1^2`
(Bouchet et al. 1995). Particles carry the cold-matter mass
:math:`\Omega_{cb}\rho_{\rm crit}L^3/N^3`, and ``Omega0`` in the header is the total
matter density, so slicing the cold matter alone adds the neutrinos as a uniform
background (see :mod:`raytrace.planes`).

With ``neutrino_particles`` a second species (``PartType2``) of :math:`N^3` particles
of mass :math:`\Omega_\nu\rho_{\rm crit}L^3/N^3` starts on the same lattice and is
displaced to first order by the neutrino density
:math:`\delta_\nu(\mathbf k) = [T_\nu(k, z)/T_{cb}(k, z)]\,\delta_{cb}(\mathbf k)`,
with camb's transfer functions at the snapshot redshift and the same white-noise
phases (linear theory: neutrinos follow the cold-matter potential wells on large
scales and free-stream out of them on small ones; their thermal motions are not
sampled). A model with massless neutrinos gets no neutrino particles.

References
----------
Zel'dovich, Ya. B. 1970, A&A 5, 84.
Bouchet, F. R., Colombi, S., Hivon, E. & Juszkiewicz, R. 1995, A&A 296, 575.
Scoccimarro, R. 1998, MNRAS 299, 1097.
"""

from __future__ import annotations

from pathlib import Path
from typing import Callable, Sequence

import numpy as np
import scipy.fft

from .cosmology import Cosmology
from .snapshots import RHO_CRIT_1E10_MSUN_H_PER_MPC_H3
from .snapshots.hdf5 import write_snapshot
from .snapshots.legacy_binary import write_snapshot_legacy

#: particle species of the demo's neutrinos (PartType2 in the HDF5 layout)
NEUTRINO_SPECIES = 2


def snapshot_paths(directory: str | Path, index: int, n_files: int, fmt: str = "hdf5") -> list[Path]:
    """File names of snapshot ``index`` of a demo model (one name for every stage).

    HDF5 files are ``snap_<index>.<file>.hdf5``, legacy binary ones ``snap_<index>.<file>``.
    """
    d = Path(directory)
    suffix = ".hdf5" if fmt == "hdf5" else ""
    return [d / f"snap_{index:03d}.{j}{suffix}" for j in range(n_files)]


def phases_seed(seed: int) -> np.random.SeedSequence:
    """Seed stream of the initial white noise (shared by all models and snapshots)."""
    return np.random.SeedSequence([int(seed), 0])


def _wavenumbers(n: int, box: float):
    k = 2.0 * np.pi * scipy.fft.fftfreq(n, d=box / n)
    kr = 2.0 * np.pi * scipy.fft.rfftfreq(n, d=box / n)
    return k[:, None, None], k[None, :, None], kr[None, None, :]


def white_noise_modes(n: int, seed: int, workers: int = 1) -> np.ndarray:
    """Fourier transform of unit-variance white noise on an n^3 lattice (shared phases)."""
    rng = np.random.default_rng(phases_seed(seed))
    return scipy.fft.rfftn(rng.standard_normal((n, n, n)), workers=workers)


def lpt_displacement(
    noise_k: np.ndarray,
    box: float,
    power: Callable[[np.ndarray], np.ndarray],
    order: int = 2,
    workers: int = 1,
) -> np.ndarray:
    """Displacement field (3, n, n, n) in the units of ``box`` for the given linear power.

    ``power(k)`` is the linear power spectrum (box units cubed) at wavenumbers k
    (inverse box units). Modes on the Nyquist planes are set to zero so that every
    derivative field is real.
    """
    n = noise_k.shape[0]
    k0, k1, k2 = _wavenumbers(n, box)
    ksq = k0**2 + k1**2 + k2**2
    kmag = np.sqrt(ksq)
    amp = np.zeros_like(kmag)
    nz = kmag > 0
    amp[nz] = np.sqrt(power(kmag[nz]) * n**3 / box**3)
    delta_k = noise_k * amp
    if n % 2 == 0:
        delta_k[n // 2, :, :] = 0
        delta_k[:, n // 2, :] = 0
        delta_k[:, :, n // 2] = 0
    inv_k2 = np.zeros_like(ksq)
    inv_k2[nz] = 1.0 / ksq[nz]
    ks = (k0, k1, k2)
    irfft = lambda a: scipy.fft.irfftn(a, s=(n, n, n), workers=workers)  # noqa: E731
    psi = np.empty((3, n, n, n))
    for i in range(3):
        psi[i] = irfft(1j * ks[i] * inv_k2 * delta_k)
    if order >= 2:
        phi_k = delta_k * inv_k2  # minus the potential: phi_,ij = IFFT(k_i k_j delta / k^2)
        d = {}
        for i in range(3):
            for j in range(i, 3):
                d[i, j] = irfft(ks[i] * ks[j] * phi_k)
        source = (
            d[0, 0] * d[1, 1] - d[0, 1] ** 2 + d[0, 0] * d[2, 2] - d[0, 2] ** 2 + d[1, 1] * d[2, 2] - d[1, 2] ** 2
        )
        del d
        source_k = scipy.fft.rfftn(source, workers=workers)
        for i in range(3):
            psi[i] += irfft((3.0 / 7.0) * 1j * ks[i] * inv_k2 * source_k)
    return psi


def particle_positions(psi: np.ndarray, box: float) -> np.ndarray:
    """Lattice points (i + 1/2) L/n displaced by ``psi``, wrapped into the box, (n^3, 3) float32."""
    n = psi.shape[1]
    q = (np.arange(n) + 0.5) * (box / n)
    pos = np.empty((n**3, 3), dtype=np.float64)
    grids = np.meshgrid(q, q, q, indexing="ij")
    for i in range(3):
        pos[:, i] = (grids[i] + psi[i]).ravel()
    pos = np.mod(pos, box).astype(np.float32)
    pos[pos >= box] = 0.0  # float32 rounding of values just below the box side
    return pos


def cold_particle_mass(cosmo: Cosmology, box: float, n: int) -> float:
    """Mass of one cold particle in 1e10 Msun/h."""
    return cosmo.Omega_cb * RHO_CRIT_1E10_MSUN_H_PER_MPC_H3 * box**3 / n**3


def neutrino_particle_mass(cosmo: Cosmology, box: float, n: int) -> float:
    r"""Mass of one neutrino particle in 1e10 Msun/h (:math:`\Omega_\nu` from camb)."""
    return cosmo.Omega_nu * RHO_CRIT_1E10_MSUN_H_PER_MPC_H3 * box**3 / n**3


def generate_model(
    cosmo: Cosmology,
    *,
    box_mpc_h: float,
    particles_per_side: int,
    snapshot_redshifts: Sequence[float],
    seed: int,
    directory: str | Path,
    files_per_snapshot: int = 2,
    lpt_order: int = 2,
    neutrino_particles: bool = False,
    fmt: str = "hdf5",
    workers: int = 1,
    log: Callable[[str], None] = lambda s: None,
) -> list[list[Path]]:
    """Write every snapshot of one model; returns the file lists, one per snapshot.

    ``fmt`` is ``hdf5`` or ``legacy-binary`` (float32 positions, little-endian, plain
    block order, Mpc/h); both hold the same particles.
    """
    if fmt not in ("hdf5", "legacy-binary"):
        raise ValueError(f"fmt must be 'hdf5' or 'legacy-binary', got {fmt!r}")
    zs = sorted(float(z) for z in snapshot_redshifts)
    power = cosmo.linear_power(zs, kmax_h_mpc=max(30.0, 2 * np.pi * particles_per_side / box_mpc_h * 1.8))
    noise_k = white_noise_modes(particles_per_side, seed, workers)
    masses = {1: cold_particle_mass(cosmo, box_mpc_h, particles_per_side)}
    with_nu = neutrino_particles and cosmo.m_nu_eV > 0
    if with_nu:
        masses[NEUTRINO_SPECIES] = neutrino_particle_mass(cosmo, box_mpc_h, particles_per_side)
    written = []
    for i, z in enumerate(zs):
        psi = lpt_displacement(noise_k, box_mpc_h, lambda k, z=z: power.cb(z, k), lpt_order, workers)
        positions = {1: particle_positions(psi, box_mpc_h)}
        del psi
        if with_nu:
            # same phases, amplitude scaled by T_nu / T_cb (> 0 at every k), first order
            p_nu = lambda k, z=z: power.cb(z, k) * power.nu_over_cb(z, k) ** 2  # noqa: E731
            psi = lpt_displacement(noise_k, box_mpc_h, p_nu, 1, workers)
            positions[NEUTRINO_SPECIES] = particle_positions(psi, box_mpc_h)
            del psi
        paths = snapshot_paths(directory, i, files_per_snapshot, fmt)
        header = dict(redshift=z, omega_m=cosmo.Omega_m, omega_lambda=1.0 - cosmo.Omega_m, h=cosmo.h)
        if fmt == "hdf5":
            write_snapshot(paths, positions, masses, box_mpc_h=box_mpc_h, **header)
        else:
            write_snapshot_legacy(paths, positions, masses, box=box_mpc_h, **header)
        written.append(paths)
        log(f"snapshot {i} (z = {z:g}): {particles_per_side}^3 particles"
            f"{' of each of species 1 and 2' if with_nu else ''} written to {paths[0].parent}")
    return written
