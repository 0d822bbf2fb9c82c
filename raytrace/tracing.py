r"""Flat-sky ray tracing through lens planes: multi-plane and Born approximation.

Geometry (comoving, flat universe). A ray leaves the observer in direction
:math:`\boldsymbol\theta`; its transverse comoving position :math:`\mathbf x` and
direction :math:`\mathbf u = d\mathbf x/d\chi` obey, for thin planes at :math:`\chi_k`,

.. math::
    \mathbf x_{k} = \mathbf x_{k-1} + (\chi_k - \chi_{k-1})\,\mathbf u_{k-1}, \qquad
    \mathbf u_k = \mathbf u_{k-1} - \nabla\psi_k(\mathbf x_k),

with :math:`\mathbf x_0 = 0`, :math:`\mathbf u_0 = \boldsymbol\theta`, and the plane's
lensing potential :math:`\nabla^2\psi_k = 3\Omega_m (H_0/c)^2 (1+z_k)\,\bar\delta_k\,\Delta\chi_k`.
Differentiating with respect to :math:`\boldsymbol\theta` carries the Jacobians
:math:`X = \partial\mathbf x/\partial\boldsymbol\theta` and
:math:`U = \partial\mathbf u/\partial\boldsymbol\theta` along:
:math:`X_k = X_{k-1} + \Delta\chi\,U_{k-1}`, :math:`U_k = U_{k-1} - T_k X_k` with the
tidal matrix :math:`T_k = \partial_i\partial_j\psi_k`. At a source at :math:`\chi_s`
the distortion matrix is :math:`A = X_s/\chi_s`. This is the multiple-lens-plane
recursion of Schneider, Ehlers & Falco (1992, ch. 9) and Hilbert et al. (2009, sec.
2.2), written in comoving positions. The Born approximation evaluates the same planes on
the unperturbed rays, :math:`A = I - \sum_k \frac{\chi_k(\chi_s-\chi_k)}{\chi_s} T_k(\chi_k\boldsymbol\theta)`,
so :math:`\kappa = \sum_k \tfrac32\Omega_m (H_0/c)^2 (1+z_k)\frac{\chi_k(\chi_s-\chi_k)}{\chi_s}\bar\delta_k\Delta\chi_k`.

Conventions. :math:`A = \begin{pmatrix}1-\kappa-\gamma_1 & -\gamma_2+\omega\\
-\gamma_2-\omega & 1-\kappa+\gamma_1\end{pmatrix}` (Hilbert et al. 2009, eq. 6,
from memory), i.e. :math:`\kappa = 1 - (A_{xx}+A_{yy})/2`, :math:`\gamma_1 = (A_{yy}-A_{xx})/2`,
:math:`\gamma_2 = -(A_{xy}+A_{yx})/2`, :math:`\omega = (A_{xy}-A_{yx})/2`. In the weak
limit :math:`\gamma_1 = (\psi_{,xx}-\psi_{,yy})/2`, :math:`\gamma_2 = \psi_{,xy}`: positive
:math:`\gamma_1` stretches images along x (map axis 1), positive :math:`\gamma_2`
along the diagonal x = y. Map arrays are [iy, ix]; pixel [i, j] is the ray with
:math:`\theta_y = (i+\tfrac12)\Delta - F/2`, :math:`\theta_x = (j+\tfrac12)\Delta - F/2`.

Slabs and sources. In the multi-plane recursion each slab is a thin lens at its centre;
for a source inside a slab, the part of the slab in front of it acts as a thin lens at its
own centre with its share of the slab's mass. In the Born approximation each slab's
contrast is evaluated on the unperturbed rays at the slab centre, and its weight is the
lensing kernel integrated exactly over the part of the slab in front of the source,
:math:`\tfrac32\Omega_m (H_0/c)^2\int (1+z)\chi(\chi_s-\chi)/\chi_s\,d\chi` (equal to the
thin-lens value to second order in the slab thickness).

Source distributions. A tomographic bin with redshift distribution :math:`n(z)` is, in the
Born approximation, the map whose slab weights are :math:`\int dz\, n(z) W_k(z)` (exact in
the kernel, by quadrature on the n(z) grid). In the multi-plane case the bin is the
n(z)-weighted sum of the maps of sources at the slab boundaries, each galaxy's weight
shared linearly between the two boundaries that bracket it.

Intrinsic alignments. Besides the lensing maps the tracer can project the planes' tidal
field with a bin's n(z) and the nonlinear alignment weight (:class:`AlignmentBin`): the
unit-amplitude intrinsic shear and its E-mode convergence of each bin (see :func:`trace`).

Interpolation: the planes' potential derivatives are interpolated bilinearly (cell
centres at :math:`(i+\tfrac12)` cells) at the ray positions.

References
----------
Schneider, P., Ehlers, J. & Falco, E. E. 1992, *Gravitational Lenses*, Springer.
Hilbert, S., Hartlap, J., White, S. D. M. & Schneider, P. 2009, A&A 499, 31.
Hirata, C. M. & Seljak, U. 2004, Phys. Rev. D 70, 063526.
Bridle, S. & King, L. 2007, New J. Phys. 9, 444.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Sequence

import numpy as np
from numba import njit

from .config import PlaneSchedule
from .cosmology import C_KM_S, Cosmology
from .errors import RaytraceError

#: H0/c in h/Mpc
H0_OVER_C = 100.0 / C_KM_S

N_STATE = 12  # x, y, ux, uy, Xxx, Xxy, Xyx, Xyy, Uxx, Uxy, Uyx, Uyy


@dataclass(frozen=True)
class PlaneChoice:
    """How one realisation uses each plane: per-plane arrays of equal length."""

    snapshot: np.ndarray
    axis: np.ndarray
    slab: np.ndarray
    shift: np.ndarray  # (n, 2) Mpc/h, x and y
    flip: np.ndarray  # (n, 2) +1 or -1


def realization_seed(seed: int, realization: int) -> np.random.SeedSequence:
    """Seed stream of one realisation's plane choices (the same in every model)."""
    return np.random.SeedSequence([int(seed), 1, int(realization)])


def choose_planes(
    schedule: PlaneSchedule, n_slabs: int, box_mpc_h: float, seed: int, realization: int, randomize: bool = True
) -> PlaneChoice:
    """Draw axis, slab, periodic shift and flips of every plane from a seeded generator.

    With ``randomize=False`` every plane is used as it is: projected along the box's
    third axis, the slab that the line of sight crosses at that distance, no shift, no
    flip (a straight, periodic light cone through the box).
    """
    n = schedule.n_planes
    rng = np.random.default_rng(realization_seed(seed, realization))
    axis = rng.integers(0, 3, size=n)
    slab = rng.integers(0, n_slabs, size=n)
    shift = rng.uniform(0.0, box_mpc_h, size=(n, 2))
    flip = rng.choice(np.array([-1, 1]), size=(n, 2))
    if not randomize:
        t = box_mpc_h / n_slabs
        axis = np.full(n, 2)
        slab = (np.floor(schedule.chi_lo / t + 1e-9).astype(int)) % n_slabs
        shift = np.zeros((n, 2))
        flip = np.ones((n, 2), dtype=int)
    return PlaneChoice(schedule.snapshot.copy(), axis, slab, shift, flip)


# ------------------------------------------------------------------------------------
# compiled kernels
@njit(cache=True, nogil=True, inline="always")
def _bilinear_setup(px, py, inv_cell, grid):
    ux = px * inv_cell - 0.5
    uy = py * inv_cell - 0.5
    fx0 = np.floor(ux)
    fy0 = np.floor(uy)
    fx = ux - fx0
    fy = uy - fy0
    ix0 = int(fx0) % grid
    iy0 = int(fy0) % grid
    ix1 = ix0 + 1 if ix0 + 1 < grid else 0
    iy1 = iy0 + 1 if iy0 + 1 < grid else 0
    return ix0, ix1, iy0, iy1, fx, fy


@njit(cache=True, nogil=True, inline="always")
def _interp(f, ix0, ix1, iy0, iy1, fx, fy):
    return (1.0 - fy) * ((1.0 - fx) * f[iy0, ix0] + fx * f[iy0, ix1]) + fy * ((1.0 - fx) * f[iy1, ix0] + fx * f[iy1, ix1])


@njit(cache=True, nogil=True)
def multiplane_step(state, dchi, f1x, f1y, fxx, fyy, fxy, box, shift_x, shift_y, flip_x, flip_y, strength):
    """Drift every ray by ``dchi`` and deflect it at a plane (state is (12, n_rays))."""
    grid = f1x.shape[0]
    inv_cell = grid / box
    half = 0.5 * box
    sxy = flip_x * flip_y
    for r in range(state.shape[1]):
        x = state[0, r] + dchi * state[2, r]
        y = state[1, r] + dchi * state[3, r]
        Xxx = state[4, r] + dchi * state[8, r]
        Xxy = state[5, r] + dchi * state[9, r]
        Xyx = state[6, r] + dchi * state[10, r]
        Xyy = state[7, r] + dchi * state[11, r]
        px = (flip_x * x + shift_x + half) % box
        py = (flip_y * y + shift_y + half) % box
        ix0, ix1, iy0, iy1, fx, fy = _bilinear_setup(px, py, inv_cell, grid)
        gx = flip_x * _interp(f1x, ix0, ix1, iy0, iy1, fx, fy)
        gy = flip_y * _interp(f1y, ix0, ix1, iy0, iy1, fx, fy)
        txx = _interp(fxx, ix0, ix1, iy0, iy1, fx, fy)
        tyy = _interp(fyy, ix0, ix1, iy0, iy1, fx, fy)
        txy = sxy * _interp(fxy, ix0, ix1, iy0, iy1, fx, fy)
        state[0, r] = x
        state[1, r] = y
        state[2, r] -= strength * gx
        state[3, r] -= strength * gy
        state[4, r] = Xxx
        state[5, r] = Xxy
        state[6, r] = Xyx
        state[7, r] = Xyy
        state[8, r] -= strength * (txx * Xxx + txy * Xyx)
        state[9, r] -= strength * (txx * Xxy + txy * Xyy)
        state[10, r] -= strength * (txy * Xxx + tyy * Xyx)
        state[11, r] -= strength * (txy * Xxy + tyy * Xyy)


@njit(cache=True, nogil=True)
def born_tidal(theta_x, theta_y, chi, fxx, fyy, fxy, box, shift_x, shift_y, flip_x, flip_y, out):
    """Tidal matrix (Txx, Tyy, Txy) of one plane on the unperturbed rays, into out (3, n)."""
    grid = fxx.shape[0]
    inv_cell = grid / box
    half = 0.5 * box
    sxy = flip_x * flip_y
    for r in range(theta_x.shape[0]):
        px = (flip_x * chi * theta_x[r] + shift_x + half) % box
        py = (flip_y * chi * theta_y[r] + shift_y + half) % box
        ix0, ix1, iy0, iy1, fx, fy = _bilinear_setup(px, py, inv_cell, grid)
        out[0, r] = _interp(fxx, ix0, ix1, iy0, iy1, fx, fy)
        out[1, r] = _interp(fyy, ix0, ix1, iy0, iy1, fx, fy)
        out[2, r] = sxy * _interp(fxy, ix0, ix1, iy0, iy1, fx, fy)


# ------------------------------------------------------------------------------------
def ray_grid(field_deg: float, pixels: int) -> tuple[np.ndarray, np.ndarray]:
    """Ray directions (radians) at pixel centres, flattened in [iy, ix] order."""
    field = np.deg2rad(field_deg)
    d = field / pixels
    c = (np.arange(pixels) + 0.5) * d - 0.5 * field
    ty, tx = np.meshgrid(c, c, indexing="ij")
    return tx.ravel().copy(), ty.ravel().copy()


@dataclass(frozen=True)
class LensStep:
    """One thin lens as the tracer applies it: plane index, distance, strength."""

    plane: int
    chi: float
    strength: float  # multiplies the stored potential derivatives


@dataclass(frozen=True)
class SourcePath:
    """The lenses in front of one source: full planes then at most one partial plane."""

    chi_s: float
    full: int  # number of full planes in front (planes 0 .. full-1)
    partial: LensStep | None


def lens_strength(cosmo: Cosmology, z: float, fraction: float = 1.0) -> float:
    r""":math:`3\Omega_m (H_0/c)^2 (1+z)` times the fraction of the slab's thickness used."""
    return 3.0 * cosmo.Omega_m * H0_OVER_C**2 * (1.0 + z) * fraction


def source_paths(cosmo: Cosmology, schedule: PlaneSchedule, source_redshifts: Sequence[float]) -> list[SourcePath]:
    """Which planes lens each source; a source inside a slab gets a partial plane."""
    paths = []
    chi_last = schedule.chi_hi[-1]
    tol = 1e-6 * max(1.0, float(chi_last))
    for zs in source_redshifts:
        chi_s = float(cosmo.comoving_distance(zs))
        if chi_s > chi_last + tol:
            raise RaytraceError(
                f"maps.source_redshifts: source at z = {zs} lies beyond the last lens plane "
                f"(z = {float(cosmo.redshift_at(chi_last)):.3f})"
            )
        full = int(np.searchsorted(schedule.chi_hi, chi_s + tol, side="right"))
        partial = None
        if full < schedule.n_planes and chi_s > schedule.chi_lo[full] + tol:
            lo = schedule.chi_lo[full]
            chi_p = 0.5 * (lo + chi_s)
            frac = (chi_s - lo) / schedule.thickness[full]
            partial = LensStep(full, chi_p, lens_strength(cosmo, float(cosmo.redshift_at(chi_p)), frac))
        paths.append(SourcePath(chi_s, full, partial))
    return paths


class SlabKernel:
    r"""Exact Born weights of slabs: :math:`\tfrac32\Omega_m (H_0/c)^2\int_{\chi_{lo}}^{\min(\chi_{hi},\chi_s)}(1+z)\chi(\chi_s-\chi)/\chi_s\,d\chi`.

    Cumulative integrals of :math:`(1+z)\chi` and :math:`(1+z)\chi^2` on a 0.25 Mpc/h
    grid make the weight of any slab for any source an interpolation.
    """

    def __init__(self, cosmo: Cosmology, chi_max: float):
        from scipy.integrate import cumulative_trapezoid

        n = int(chi_max / 0.25) + 2
        self.chi = np.linspace(0.0, chi_max * 1.0001, n)
        one_z = 1.0 + cosmo.redshift_at(self.chi)
        self.a = cumulative_trapezoid(one_z * self.chi, self.chi, initial=0.0)
        self.b = cumulative_trapezoid(one_z * self.chi**2, self.chi, initial=0.0)
        self.factor = 1.5 * cosmo.Omega_m * H0_OVER_C**2

    def weight(self, lo: float, hi: float, chi_s: np.ndarray) -> np.ndarray:
        """Weight of the slab [lo, hi] for sources at ``chi_s`` (0 for sources in front of it)."""
        chi_s = np.atleast_1d(np.asarray(chi_s, dtype=float))
        u = np.clip(chi_s, lo, hi)
        da = np.interp(u, self.chi, self.a) - np.interp(lo, self.chi, self.a)
        db = np.interp(u, self.chi, self.b) - np.interp(lo, self.chi, self.b)
        with np.errstate(divide="ignore", invalid="ignore"):
            w = self.factor * (da - db / chi_s)
        return np.where(chi_s > lo, w, 0.0)


@dataclass(frozen=True)
class SourceBin:
    """A redshift distribution on a grid; ``weights`` are its quadrature weights (sum 1)."""

    z: np.ndarray
    weights: np.ndarray

    @classmethod
    def from_nz(cls, z: np.ndarray, nz: np.ndarray) -> "SourceBin":
        z = np.asarray(z, dtype=float)
        nz = np.asarray(nz, dtype=float)
        dz = np.diff(z)
        w = np.zeros_like(z)  # trapezoid-rule weights
        w[:-1] += 0.5 * dz
        w[1:] += 0.5 * dz
        w *= nz
        total = w.sum()
        if not total > 0:
            raise RaytraceError("survey.sources: a tomographic bin holds no galaxies")
        return cls(z, w / total)


@dataclass(frozen=True)
class AlignmentBin:
    r"""The intrinsic-alignment weight of a source bin on a redshift grid.

    ``weight`` is :math:`n(z)\,F(z)`: the bin's redshift distribution (unit integral over
    ``z``) times the unit-amplitude alignment factor of the nonlinear alignment model
    (:func:`raytrace.systematics.nla_factor`). The weight of slab k is
    :math:`W_k = \int_{z(\chi_{lo})}^{z(\chi_{hi})} n F\,dz\,/\,t_k` (trapezoid rule on the
    grid, linear between grid points), the slab's galaxies over its thickness.
    """

    z: np.ndarray
    weight: np.ndarray

    def slab_weights(self, z_lo: np.ndarray, z_hi: np.ndarray, thickness: np.ndarray) -> np.ndarray:
        """W_k of slabs spanning [z_lo, z_hi] of comoving thickness ``thickness``."""
        z = np.asarray(self.z, dtype=float)
        w = np.asarray(self.weight, dtype=float)
        cum = np.concatenate([[0.0], np.cumsum(0.5 * (w[1:] + w[:-1]) * np.diff(z))])
        return (np.interp(z_hi, z, cum) - np.interp(z_lo, z, cum)) / thickness


def boundary_weights(chi_boundaries: np.ndarray, chi_gal: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """Share each galaxy's weight linearly between the two slab boundaries around it.

    ``chi_boundaries`` are the far edges of the slabs; the observer (chi = 0, no lensing)
    is the boundary in front of the first slab and takes the share of galaxies in front
    of it. Returns (n_boundaries,) weights; what falls on the observer is dropped.
    """
    edges = np.concatenate([[0.0], chi_boundaries])
    j = np.clip(np.searchsorted(edges, chi_gal, side="right"), 1, len(edges) - 1)
    frac = (chi_gal - edges[j - 1]) / (edges[j] - edges[j - 1])
    out = np.zeros(len(edges))
    np.add.at(out, j, weights * frac)
    np.add.at(out, j - 1, weights * (1.0 - frac))
    return out[1:]


def distortion_to_maps(A: np.ndarray, pixels: int) -> dict[str, np.ndarray]:
    """kappa, gamma1, gamma2, omega from A given as rows (Axx, Axy, Ayx, Ayy)."""
    axx, axy, ayx, ayy = A
    maps = {
        "kappa": 1.0 - 0.5 * (axx + ayy),
        "gamma1": 0.5 * (ayy - axx),
        "gamma2": -0.5 * (axy + ayx),
        "omega": 0.5 * (axy - ayx),
    }
    return {k: v.reshape(pixels, pixels) for k, v in maps.items()}


PlaneLoader = Callable[[int, int, int, Sequence[str]], Sequence[np.ndarray]]
"""loader(snapshot, axis, slab, names) -> the named (grid, grid) derivative arrays."""


def trace(
    cosmo: Cosmology,
    schedule: PlaneSchedule,
    choice: PlaneChoice,
    load: PlaneLoader,
    *,
    box_mpc_h: float,
    field_deg: float,
    pixels: int,
    source_redshifts: Sequence[float],
    method: str = "multi-plane",
    source_bins: Sequence[SourceBin] = (),
    alignment_bins: Sequence[AlignmentBin] = (),
    log: Callable[[str], None] = lambda s: None,
) -> dict[str, np.ndarray]:
    r"""Convergence, shear and rotation maps, each (n_sources + n_bins, pixels, pixels) float64.

    The first ``len(source_redshifts)`` maps are the single source redshifts, the others
    the ``source_bins`` in order.

    With ``alignment_bins`` the result also holds ``ia_kappa``, ``ia_gamma1``, ``ia_gamma2``
    (n_alignment_bins, pixels, pixels): the unit-amplitude intrinsic shear of each bin in the
    nonlinear alignment model, :math:`\gamma^I = -F\,(\partial_x^2-\partial_y^2,\,
    2\partial_x\partial_y)\,\nabla^{-2}\delta` (Hirata & Seljak 2004; Bridle & King 2007),
    projected with the bin's n(z), and its E-mode convergence :math:`\kappa^I = -F\delta`
    (the Kaiser-Squires inverse of :math:`\gamma^I`). The slab's contrast and tides are
    :math:`\bar\delta = (\phi_{,xx}+\phi_{,yy})/t` and :math:`(\phi_{,xx}-\phi_{,yy},
    2\phi_{,xy})/t` (the plane's potential solves :math:`\nabla^2\phi = \bar\delta t`), so
    slab k adds :math:`-W_k\,(T_{xx}+T_{yy},\ T_{xx}-T_{yy},\ 2T_{xy})` with the weights of
    :meth:`AlignmentBin.slab_weights`. The tides are read where the rays cross the slab's
    plane: on the unperturbed rays (Born) or on the deflected ones (multi-plane). This is
    the Limber-level projection: each slab's galaxies see the slab-averaged tidal field.
    The lensing maps do not depend on whether alignment maps are asked for.
    """
    if method not in ("multi-plane", "born"):
        raise RaytraceError(f"maps.method: unknown method {method!r} (multi-plane | born)")
    paths = source_paths(cosmo, schedule, source_redshifts)
    bins = list(source_bins)
    chi_last = float(schedule.chi_hi[-1])
    bin_chi = []
    for b, sb in enumerate(bins):
        chi_gal = cosmo.comoving_distance(sb.z)
        if np.any((chi_gal > chi_last * (1 + 1e-9)) & (sb.weights > 0)):
            raise RaytraceError(
                f"survey.sources: the n(z) of bin {b} extends beyond the last lens plane "
                f"(z = {float(cosmo.redshift_at(chi_last)):.3f}); lower survey.sources.z_max"
            )
        if not np.any((chi_gal > schedule.chi_hi[0]) & (sb.weights > 0)):
            raise RaytraceError(f"survey.sources: the n(z) of bin {b} has no support beyond the first lens plane")
        bin_chi.append(chi_gal)
    z_lo, z_hi = cosmo.redshift_at(schedule.chi_lo), cosmo.redshift_at(schedule.chi_hi)
    ia_w = np.zeros((len(alignment_bins), schedule.n_planes))
    for b, ab in enumerate(alignment_bins):
        support = np.asarray(ab.z)[np.asarray(ab.weight) != 0]
        if support.size and support.max() > float(z_hi[-1]) * (1 + 1e-9):
            raise RaytraceError(
                f"survey.sources: the n(z) of alignment bin {b} extends beyond the last lens plane "
                f"(z = {float(z_hi[-1]):.3f}); lower survey.sources.z_max"
            )
        ia_w[b] = ab.slab_weights(z_lo, z_hi, schedule.thickness)
    n_src = len(paths)
    n_needed = max([p.full + (p.partial is not None) for p in paths] + [0])
    for chi_gal, sb in zip(bin_chi, bins):
        reach = chi_gal[sb.weights > 0].max()
        n_needed = max(n_needed, int(np.searchsorted(schedule.chi_lo, reach, side="left")))
    if np.any(ia_w != 0):
        n_needed = max(n_needed, int(np.nonzero(np.any(ia_w != 0, axis=0))[0].max()) + 1)
    n_needed = min(max(n_needed, 1), schedule.n_planes)
    tx, ty = ray_grid(field_deg, pixels)
    strengths = [lens_strength(cosmo, float(schedule.z[k])) for k in range(schedule.n_planes)]
    n_maps = n_src + len(bins)
    out = {k: np.zeros((n_maps, pixels, pixels)) for k in ("kappa", "gamma1", "gamma2", "omega")}
    if len(alignment_bins):
        out.update({k: np.zeros((len(alignment_bins), pixels, pixels)) for k in ("ia_kappa", "ia_gamma1", "ia_gamma2")})
    t0 = time.perf_counter()

    def add_alignment(k: int, tidal: np.ndarray, trace_sum=None, trace_diff=None) -> None:
        used = np.nonzero(ia_w[:, k])[0]
        if not used.size:
            return
        t_sum = (tidal[0] + tidal[1]).reshape(pixels, pixels) if trace_sum is None else trace_sum
        t_diff = (tidal[0] - tidal[1]).reshape(pixels, pixels) if trace_diff is None else trace_diff
        t_xy = tidal[2].reshape(pixels, pixels)
        for b in used:
            wb = ia_w[b, k]
            out["ia_kappa"][b] -= wb * t_sum
            out["ia_gamma1"][b] -= wb * t_diff
            out["ia_gamma2"][b] -= 2.0 * wb * t_xy

    def plane_fields(k: int, names: Sequence[str]):
        return load(int(choice.snapshot[k]), int(choice.axis[k]), int(choice.slab[k]), names)

    def geometry(k: int):
        return (box_mpc_h, float(choice.shift[k, 0]), float(choice.shift[k, 1]),
                float(choice.flip[k, 0]), float(choice.flip[k, 1]))

    if method == "born":
        tidal = np.empty((3, tx.size))
        kernel = SlabKernel(cosmo, chi_last)
        chi_src = np.array([p.chi_s for p in paths])
        for k in range(n_needed):
            lo, hi = float(schedule.chi_lo[k]), float(schedule.chi_hi[k])
            # Born weight per unit slab contrast -> per unit lap(phi) = contrast * thickness,
            # in the form w (Txx + Tyy) / 2 = kappa
            to_tidal = 2.0 / (hi - lo)
            w = list(kernel.weight(lo, hi, chi_src) * to_tidal) if n_src else []
            w += [float(np.sum(sb.weights * kernel.weight(lo, hi, c))) * to_tidal for sb, c in zip(bins, bin_chi)]
            if not any(w) and not np.any(ia_w[:, k]):
                continue
            fxx, fyy, fxy = plane_fields(k, ("d2phi_dxx", "d2phi_dyy", "d2phi_dxy"))
            born_tidal(tx, ty, float(schedule.chi[k]), fxx, fyy, fxy, *geometry(k), tidal)
            # the same sums for every map (each product below is formed as before: scalar first)
            t_sum = (tidal[0] + tidal[1]).reshape(pixels, pixels)
            t_diff = (tidal[0] - tidal[1]).reshape(pixels, pixels)
            t_xy = tidal[2].reshape(pixels, pixels)
            add_alignment(k, tidal, t_sum, t_diff)
            for i, wi in enumerate(w):
                if wi == 0.0:
                    continue
                out["kappa"][i] += 0.5 * wi * t_sum
                out["gamma1"][i] += 0.5 * wi * t_diff
                out["gamma2"][i] += wi * t_xy
            log(f"plane {k + 1}/{n_needed} (Born, {time.perf_counter() - t0:.1f} s)")
        return out

    state = np.zeros((N_STATE, tx.size))
    state[2], state[3] = tx, ty
    state[8], state[11] = 1.0, 1.0  # U = I, X = 0 at the observer
    chi_cur = 0.0
    names = ("dphi_dx", "dphi_dy", "d2phi_dxx", "d2phi_dyy", "d2phi_dxy")

    def maps_at(st: np.ndarray, chi_from: float, chi_s: float) -> dict[str, np.ndarray]:
        X = st[4:8] + (chi_s - chi_from) * st[8:12]
        return distortion_to_maps(X / chi_s, pixels)

    def record(i: int, st: np.ndarray, chi_from: float):
        for key, value in maps_at(st, chi_from, paths[i].chi_s).items():
            out[key][i] = value

    # multi-plane bins: n(z)-weighted sources at the slab boundaries
    boundary_w = np.array([boundary_weights(schedule.chi_hi, c, sb.weights) for sb, c in zip(bins, bin_chi)])

    for i, p in enumerate(paths):
        if p.full == 0 and p.partial is None:
            record(i, state, 0.0)
    for k in range(n_needed):
        fields = plane_fields(k, names)
        for i, p in enumerate(paths):
            if p.partial is not None and p.partial.plane == k:
                branch = state.copy()
                multiplane_step(branch, p.partial.chi - chi_cur, *fields, *geometry(k), p.partial.strength)
                record(i, branch, p.partial.chi)
        if any(k < p.full for p in paths) or (bins and np.any(boundary_w[:, k:] > 0)) or np.any(ia_w[:, k:]):
            multiplane_step(state, float(schedule.chi[k]) - chi_cur, *fields, *geometry(k), strengths[k])
            chi_cur = float(schedule.chi[k])
            if np.any(ia_w[:, k]):
                # tides where the deflected rays cross this plane (state holds x, y at chi_k)
                tidal = np.empty((3, tx.size))
                born_tidal(state[0], state[1], 1.0, fields[2], fields[3], fields[4], *geometry(k), tidal)
                add_alignment(k, tidal)
            for i, p in enumerate(paths):
                if p.full == k + 1 and p.partial is None:
                    record(i, state, chi_cur)
            if bins and np.any(boundary_w[:, k] > 0):
                at_edge = maps_at(state, chi_cur, float(schedule.chi_hi[k]))
                for b in range(len(bins)):
                    for key, value in at_edge.items():
                        out[key][n_src + b] += boundary_w[b, k] * value
        log(f"plane {k + 1}/{n_needed} (multi-plane, {time.perf_counter() - t0:.1f} s)")
    return out


class PlaneFiles:
    """Reads plane derivatives from the per-snapshot HDF5 files, keeping files open."""

    def __init__(self, files: Sequence[str | Path]):
        import h5py

        from .hdf5 import open_input

        self.paths = [Path(f) for f in files]
        self._files: dict[int, "h5py.File"] = {}
        self._open = open_input
        self.attrs = []
        for p in self.paths:
            with open_input(p) as f:
                for key in ("box_mpc_h", "thickness_mpc_h", "grid", "n_slabs", "redshift"):
                    if key not in f.attrs:
                        raise RaytraceError(f"{p}: not a plane file (attribute {key} missing)")
                self.attrs.append(dict(f.attrs))
        first = self.attrs[0]
        for p, a in zip(self.paths, self.attrs):
            for key in ("box_mpc_h", "thickness_mpc_h", "grid"):
                if a[key] != first[key]:
                    raise RaytraceError(f"{p}: {key} = {a[key]} differs from {self.paths[0]} ({first[key]})")

    @property
    def box_mpc_h(self) -> float:
        return float(self.attrs[0]["box_mpc_h"])

    @property
    def n_slabs(self) -> int:
        return int(self.attrs[0]["n_slabs"])

    def __call__(self, snapshot: int, axis: int, slab: int, names: Sequence[str]):
        if snapshot not in self._files:
            self._files[snapshot] = self._open(self.paths[snapshot])
        f = self._files[snapshot]
        return [np.ascontiguousarray(f[n][axis, slab]) for n in names]

    def close(self) -> None:
        for f in self._files.values():
            f.close()
        self._files.clear()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
