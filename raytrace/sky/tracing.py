r"""Born and multi-plane lensing on the sphere, from HEALPix density shells.

**Born.** The convergence of a source at :math:`\chi_s` is the lensing-kernel-weighted sum
of the shell contrasts (Born approximation along the unperturbed rays; the onion-shell
method of Fosalba et al. 2008),

.. math::
    \kappa(\hat n) = \sum_k W_k(\chi_s)\,\bar\delta_k(\hat n), \qquad
    W_k(\chi_s) = \tfrac32\Omega_m\Big(\frac{H_0}{c}\Big)^2
    \int_{\chi_{{\rm lo},k}}^{\min(\chi_{{\rm hi},k},\chi_s)} (1+z)\,\chi\,\frac{\chi_s-\chi}{\chi_s}\,d\chi,

the kernel integrated exactly over the part of the shell in front of the source (the same
weights as the flat Born maps, :class:`raytrace.tracing.SlabKernel`). The shear is then the
spin-2 transform of the convergence: with :math:`\kappa = \tfrac12\nabla^2\psi` and
:math:`\gamma_1 + i\gamma_2 = \tfrac12\eth\eth\psi`,

.. math::
    E_{\ell m} = \sqrt{\frac{(\ell+2)(\ell-1)}{\ell(\ell+1)}}\,\kappa_{\ell m}, \qquad B_{\ell m} = 0,

synthesised with ``healpy.alm2map_spin`` (healpy's sign convention: the spin-2 coefficients
are :math:`-(E + iB)`; Hu 2000, Castro et al. 2005 for the full-sky relations).

**Multi-plane.** Each shell is a thin lens at its centre :math:`\chi_k`. Its lensing potential
solves :math:`\nabla_\theta^2\phi_k = \chi_k^2\,3\Omega_m (H_0/c)^2 (1+z_k)\,\bar\delta_k\Delta\chi_k`
on the sphere, by ``map2alm`` and :math:`\phi_{\ell m} = -(\ldots)_{\ell m}/[\ell(\ell+1)]`
(the monopole of a shell does not deflect). The rays are followed in comoving 3-D space,
which has no coordinate singularity: a ray has position :math:`\mathbf r` and direction
:math:`\mathbf v = d\mathbf r/d\chi`; from shell to shell

.. math::
    \mathbf r_k = \mathbf r_{k-1} + (\chi_k - \chi_{k-1})\,\mathbf v_{k-1}, \qquad
    \mathbf v_k = \mathbf v_{k-1} - \frac{1}{\chi_k}\,\nabla_\theta\phi_k(\hat r_k),

the deflection being tangent to the sphere at the ray (the spherical form of the multiple-
lens-plane recursion of Schneider, Ehlers & Falco 1992, ch. 9, and Hilbert et al. 2009,
written in comoving coordinates as in :mod:`raytrace.tracing`; cf. Das & Bode 2008, Teyssier
et al. 2009, Becker 2013 for spherical implementations). The Jacobians
:math:`X_a = \partial\mathbf r/\partial\theta_a`, :math:`U_a = \partial\mathbf v/\partial\theta_a`
(:math:`a = 1, 2` along :math:`\hat\theta, \hat\phi` of the ray's start) follow
:math:`X_a \mathrel{+}= \Delta\chi\, U_a`, :math:`U_a \mathrel{-}= T_k X_a` with the tidal tensor
:math:`T_k = \chi_k^{-2} H(\phi_k)`, :math:`H` the covariant Hessian on the sphere, projected on
the tangent plane. At the source, :math:`\hat\beta = \mathbf r_s/|\mathbf r_s|` and

.. math:: A_{ij} = \hat e'_i \cdot \frac{P_\perp(\hat\beta) X_j}{|\mathbf r_s|},

where :math:`\hat e'_i` is the start basis parallel-transported along the great circle from
the ray's start to :math:`\hat\beta`, so that A measures distortion, not the turning of the
coordinate basis. The propagation is exact to first order in the deflection angles per
segment (the path length between shells is taken as :math:`\Delta\chi`).

Derivatives: ``alm2map_der1`` gives :math:`\nabla_\theta\phi`; the Hessian is
:math:`H_{\theta\theta} = \tfrac12\nabla^2\phi + Q`, :math:`H_{\phi\phi} = \tfrac12\nabla^2\phi - Q`,
:math:`H_{\theta\phi} = U`, with the Laplacian from :math:`-\ell(\ell+1)\phi_{\ell m}` and
(Q, U) the spin-2 synthesis of :math:`E_{\ell m} = -\tfrac12\sqrt{(\ell+2)!/(\ell-2)!}\,\phi_{\ell m}`
(checked against finite differences of the potential in the tests). Gradient and Hessian
are turned into Cartesian components at the pixel centres (3 + 6 maps, smooth across the
poles) and **interpolated bilinearly at the ray positions with healpy's
``get_interp_weights``** (the 4 nearest pixel centres, linear in :math:`\theta` between rings
and in :math:`\phi` along them), then projected on the tangent plane at the ray.

Conventions. Rays start at the HEALPix pixel centres (RING order); maps are the values at
those image positions. With :math:`(\hat e_1, \hat e_2) = (\hat\theta, \hat\phi)`,
:math:`A = \begin{pmatrix}1-\kappa-\gamma_1 & -\gamma_2+\omega\\ -\gamma_2-\omega & 1-\kappa+\gamma_1\end{pmatrix}`
as on the flat sky: positive :math:`\gamma_1` stretches images along :math:`\hat\theta`
(north–south), positive :math:`\gamma_2` along :math:`\hat\theta + \hat\phi`. These are exactly
healpy's spin-2 (Q, U) components, so ``map2alm_spin`` of :math:`(\gamma_1, \gamma_2)` gives
the E and B modes of the shear.

References
----------
Becker, M. R. 2013, MNRAS 435, 115.
Castro, P. G., Heavens, A. F. & Kitching, T. D. 2005, Phys. Rev. D 72, 023516.
Das, S. & Bode, P. 2008, ApJ 682, 1.
Fosalba, P., Gaztañaga, E., Castander, F. J. & Manera, M. 2008, MNRAS 391, 435.
Hilbert, S., Hartlap, J., White, S. D. M. & Schneider, P. 2009, A&A 499, 31.
Hu, W. 2000, Phys. Rev. D 62, 043007.
Schneider, P., Ehlers, J. & Falco, E. E. 1992, *Gravitational Lenses*, Springer.
Teyssier, R., Pires, S., Prunet, S. et al. 2009, A&A 497, 335.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np
from numba import njit

from ..config import PlaneSchedule
from ..cosmology import Cosmology
from ..errors import RaytraceError
from ..tracing import LensStep, SlabKernel, SourceBin, SourcePath, boundary_weights, lens_strength
from .pixels import npix, pixel_vectors, tangent_basis

ShellLoader = Callable[[int], np.ndarray]
"""load(k) -> the shell-averaged contrast map of shell k (npix,), RING."""

MAP_KEYS = ("kappa", "gamma1", "gamma2", "omega")


# ------------------------------------------------------------------------------------
# harmonic helpers
def default_lmax(nside: int) -> int:
    return 3 * int(nside) - 1


def _ell(lmax: int) -> np.ndarray:
    import healpy as hp

    return hp.Alm.getlm(lmax)[0].astype(float)


def kappa_to_e_factor(lmax: int) -> np.ndarray:
    r""":math:`\sqrt{(\ell+2)(\ell-1)/[\ell(\ell+1)]}` for :math:`\ell = 0 \dots` lmax (0 below 2)."""
    ell = np.arange(lmax + 1, dtype=float)
    f = np.zeros(lmax + 1)
    f[2:] = np.sqrt((ell[2:] + 2) * (ell[2:] - 1) / (ell[2:] * (ell[2:] + 1)))
    return f


def shear_from_kappa_alm(kappa_alm: np.ndarray, nside: int, lmax: int) -> tuple[np.ndarray, np.ndarray]:
    """(gamma1, gamma2) maps of a convergence given by its alm (pure E, see the module notes)."""
    import healpy as hp

    e = hp.almxfl(kappa_alm, kappa_to_e_factor(lmax))
    g1, g2 = hp.alm2map_spin([e, np.zeros_like(e)], nside, 2, lmax)
    return g1, g2


def shear_from_kappa(kappa: np.ndarray, *, lmax: int | None = None, iterations: int = 1) -> tuple[np.ndarray, np.ndarray]:
    """(gamma1, gamma2) of a HEALPix convergence map by the spin-2 transform."""
    import healpy as hp

    nside = hp.npix2nside(kappa.size)
    lmax = default_lmax(nside) if lmax is None else lmax
    return shear_from_kappa_alm(hp.map2alm(kappa, lmax=lmax, iter=iterations), nside, lmax)


def eb_spectra(gamma1: np.ndarray, gamma2: np.ndarray, *, lmax: int | None = None,
               iterations: int = 1) -> tuple[np.ndarray, np.ndarray]:
    """E- and B-mode power spectra of a shear field (healpy ``map2alm_spin``, spin 2)."""
    import healpy as hp

    nside = hp.npix2nside(gamma1.size)
    lmax = default_lmax(nside) if lmax is None else lmax
    e, b = hp.map2alm_spin([gamma1, gamma2], 2, lmax=lmax)
    for _ in range(iterations):  # Jacobi iterations, as healpy's map2alm(iter=...)
        r1, r2 = hp.alm2map_spin([e, b], nside, 2, lmax)
        de, db = hp.map2alm_spin([gamma1 - r1, gamma2 - r2], 2, lmax=lmax)
        e, b = e + de, b + db
    return hp.alm2cl(e), hp.alm2cl(b)


def shear_consistency(kappa: np.ndarray, gamma1: np.ndarray, gamma2: np.ndarray, *,
                      ell_range: tuple[int, int] | None = None) -> dict[str, float]:
    r"""How well traced shear matches the spin-2 transform of traced convergence.

    Returns ``relative_rms`` (pixel space: rms of the difference between the traced shear
    and the spin-2 transform of the traced convergence, over the rms of the traced shear),
    ``e_mismatch`` (harmonic space: :math:`\sum|E_{\ell m} - f_\ell\kappa_{\ell m}|^2 /
    \sum|E_{\ell m}|^2` over ``ell_range``), ``b_over_e`` (B- over E-mode power of the
    traced shear over ``ell_range``) and the range (default 2 .. nside, where the
    pixelisation and the interpolation of the tracer are small).
    """
    import healpy as hp

    nside = hp.npix2nside(kappa.size)
    lo, hi = ell_range or (2, nside)
    lmax = default_lmax(nside)
    kappa_alm = hp.map2alm(kappa, lmax=lmax, iter=1)
    t1, t2 = shear_from_kappa_alm(kappa_alm, nside, lmax)
    diff = np.sqrt(np.mean((gamma1 - t1) ** 2 + (gamma2 - t2) ** 2) / np.mean(gamma1**2 + gamma2**2))
    e, b = hp.map2alm_spin([gamma1, gamma2], 2, lmax=lmax)
    r1, r2 = hp.alm2map_spin([e, b], nside, 2, lmax)
    de, db = hp.map2alm_spin([gamma1 - r1, gamma2 - r2], 2, lmax=lmax)  # one Jacobi iteration
    e, b = e + de, b + db
    ell = hp.Alm.getlm(lmax)[0]
    weight = np.where(hp.Alm.getlm(lmax)[1] == 0, 1.0, 2.0) * ((ell >= lo) & (ell <= hi))
    pred = hp.almxfl(kappa_alm, kappa_to_e_factor(lmax))
    e_pow = np.sum(weight * np.abs(e) ** 2)
    return {"relative_rms": float(diff), "e_mismatch": float(np.sum(weight * np.abs(e - pred) ** 2) / e_pow),
            "b_over_e": float(np.sum(weight * np.abs(b) ** 2) / e_pow), "ell_min": int(lo), "ell_max": int(hi)}


# ------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Completion:
    """A Gaussian convergence added to one output map (the CMB completion): its alm."""

    index: int  # output map it is added to
    alm: np.ndarray
    lmax: int


def source_paths(schedule: PlaneSchedule, cosmo: Cosmology, chi_sources: Sequence[float]) -> list[SourcePath]:
    """Which shells lens each source (by distance); a source inside a shell gets a partial shell."""
    paths = []
    chi_last = float(schedule.chi_hi[-1])
    tol = 1e-6 * max(1.0, chi_last)
    for chi_s in chi_sources:
        full = int(np.searchsorted(schedule.chi_hi, chi_s + tol, side="right"))
        partial = None
        if full < schedule.n_planes and chi_s > schedule.chi_lo[full] + tol:
            lo = float(schedule.chi_lo[full])
            chi_p = 0.5 * (lo + chi_s)
            frac = (chi_s - lo) / float(schedule.thickness[full])
            partial = LensStep(full, chi_p, lens_strength(cosmo, float(cosmo.redshift_at(chi_p)), frac))
        paths.append(SourcePath(float(chi_s), full, partial))
    return paths


def check_reach(schedule: PlaneSchedule, chi_sources: Sequence[float], where: str) -> None:
    """Every source must lie within the shells (the CMB is completed separately)."""
    chi_last = float(schedule.chi_hi[-1])
    for chi in chi_sources:
        if chi > chi_last * (1 + 1e-9):
            raise RaytraceError(f"{where}: a source at {chi:.1f} Mpc/h lies beyond the last shell ({chi_last:.1f} Mpc/h)")


def born(cosmo: Cosmology, schedule: PlaneSchedule, load: ShellLoader, nside: int, *,
         chi_sources: Sequence[float], source_bins: Sequence[SourceBin] = (),
         completions: Sequence[Completion] = (), lmax: int | None = None, iterations: int = 1,
         log: Callable[[str], None] = lambda s: None) -> dict[str, np.ndarray]:
    """Born maps (n_sources + n_bins, npix): convergence summed over shells, shear by the spin-2 transform.

    ``chi_sources`` may lie beyond the shells (the CMB): the shells then lens it with its
    kernel and a :class:`Completion` adds the rest. ``omega`` is zero.
    """
    import healpy as hp

    lmax = default_lmax(nside) if lmax is None else lmax
    bin_chi = [cosmo.comoving_distance(b.z) for b in source_bins]
    chi_end = float(schedule.chi_hi[-1])
    kernel = SlabKernel(cosmo, chi_end)
    n_src, n_maps = len(chi_sources), len(chi_sources) + len(source_bins)
    kappa = np.zeros((n_maps, npix(nside)))
    t0 = time.perf_counter()
    chi_src = np.asarray(chi_sources, dtype=float)
    for k in range(schedule.n_planes):
        lo, hi = float(schedule.chi_lo[k]), float(schedule.chi_hi[k])
        w = list(kernel.weight(lo, hi, chi_src)) if n_src else []
        w += [float(np.sum(b.weights * kernel.weight(lo, hi, c))) for b, c in zip(source_bins, bin_chi)]
        if not any(w):
            continue
        delta = load(k)
        for i, wi in enumerate(w):
            if wi:
                kappa[i] += wi * delta
        log(f"shell {k + 1}/{schedule.n_planes} (Born, {time.perf_counter() - t0:.1f} s)")
    out = {key: np.zeros_like(kappa) for key in MAP_KEYS}
    out["kappa"] = kappa
    extra = {c.index: c for c in completions}
    for i in range(n_maps):
        alm = hp.map2alm(kappa[i], lmax=lmax, iter=iterations)
        if i in extra:
            c = extra[i]
            kappa[i] += hp.alm2map(c.alm, nside, lmax=c.lmax)
            alm = alm + _resize_alm(c.alm, c.lmax, lmax)
        out["gamma1"][i], out["gamma2"][i] = shear_from_kappa_alm(alm, nside, lmax)
    log(f"Born shear of {n_maps} maps by the spin-2 transform ({time.perf_counter() - t0:.1f} s)")
    return out


def _resize_alm(alm: np.ndarray, lmax_in: int, lmax_out: int) -> np.ndarray:
    import healpy as hp

    if lmax_in == lmax_out:
        return alm
    out = np.zeros(hp.Alm.getsize(lmax_out), dtype=np.complex128)
    ell, m = hp.Alm.getlm(lmax_out)
    keep = ell <= lmax_in
    out[keep] = alm[hp.Alm.getidx(lmax_in, ell[keep], m[keep])]
    return out


# ------------------------------------------------------------------------------------
# multi-plane
_BASES: dict[int, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}


def pixel_bases(nside: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pixel-centre unit vectors and their (e_theta, e_phi), cached for the last nside used."""
    if nside not in _BASES:
        _BASES.clear()
        n0 = pixel_vectors(nside)
        _BASES[nside] = (n0, *tangent_basis(n0))
    return _BASES[nside]


def shell_fields(delta: np.ndarray, chi: float, strength: float, thickness: float, *, lmax: int,
                 iterations: int = 1) -> np.ndarray:
    r"""Cartesian deflection (3) and tidal tensor (6: xx, yy, zz, xy, xz, yz) of one shell, (npix, 9) float32.

    The deflection is :math:`\nabla_\theta\phi/\chi`, the tidal tensor :math:`H(\phi)/\chi^2`, for
    :math:`\nabla_\theta^2\phi = \chi^2\,{\rm strength}\,\bar\delta\,\Delta\chi`.
    """
    import healpy as hp

    nside = hp.npix2nside(delta.size)
    source = hp.map2alm(delta, lmax=lmax, iter=iterations) * (chi**2 * strength * thickness)
    ell = _ell(lmax)
    source[ell == 0] = 0.0  # the monopole does not deflect
    with np.errstate(divide="ignore", invalid="ignore"):
        phi = np.where(ell > 0, -source / np.where(ell > 0, ell * (ell + 1), 1.0), 0.0)
    _, d_theta, d_phi = hp.alm2map_der1(phi, nside, lmax=lmax)
    lap = hp.alm2map(source, nside, lmax=lmax)
    e = phi * (-0.5 * np.sqrt(np.maximum((ell + 2) * (ell + 1) * ell * (ell - 1), 0.0)))
    q, u = hp.alm2map_spin([e, np.zeros_like(e)], nside, 2, lmax)
    h_tt, h_pp, h_tp = 0.5 * lap + q, 0.5 * lap - q, u
    _, et, ep = pixel_bases(nside)
    out = np.empty((delta.size, 9), dtype=np.float32)
    out[:, 0:3] = (d_theta[:, None] * et + d_phi[:, None] * ep) / chi
    inv2 = 1.0 / chi**2
    for c, (i, j) in enumerate(((0, 0), (1, 1), (2, 2), (0, 1), (0, 2), (1, 2))):
        out[:, 3 + c] = inv2 * (h_tt * et[:, i] * et[:, j] + h_pp * ep[:, i] * ep[:, j]
                                + h_tp * (et[:, i] * ep[:, j] + ep[:, i] * et[:, j]))
    return out


@njit(cache=True, nogil=True)
def _drift(state, dchi, nhat):
    """r += dchi v, X_a += dchi U_a; nhat = r / |r|. state is (18, n): r, v, X1, X2, U1, U2."""
    for i in range(state.shape[1]):
        for c in range(3):
            state[c, i] += dchi * state[3 + c, i]
            state[6 + c, i] += dchi * state[12 + c, i]
            state[9 + c, i] += dchi * state[15 + c, i]
        r = math.sqrt(state[0, i] ** 2 + state[1, i] ** 2 + state[2, i] ** 2)
        for c in range(3):
            nhat[c, i] = state[c, i] / r


@njit(cache=True, nogil=True)
def _deflect(state, nhat, pix, wts, fields, strength):
    """v -= s P g, U_a -= s P T X_a with g, T interpolated (weights ``wts`` (4, n) at ``pix``)."""
    g = np.empty(3)
    t = np.empty(6)
    for i in range(state.shape[1]):
        for c in range(3):
            g[c] = 0.0
        for c in range(6):
            t[c] = 0.0
        for j in range(4):
            p = pix[j, i]
            w = wts[j, i]
            for c in range(3):
                g[c] += w * fields[p, c]
            for c in range(6):
                t[c] += w * fields[p, 3 + c]
        nx, ny, nz = nhat[0, i], nhat[1, i], nhat[2, i]
        gn = g[0] * nx + g[1] * ny + g[2] * nz
        state[3, i] -= strength * (g[0] - gn * nx)
        state[4, i] -= strength * (g[1] - gn * ny)
        state[5, i] -= strength * (g[2] - gn * nz)
        for a in range(2):
            x0, x1, x2 = state[6 + 3 * a, i], state[7 + 3 * a, i], state[8 + 3 * a, i]
            y0 = t[0] * x0 + t[3] * x1 + t[4] * x2
            y1 = t[3] * x0 + t[1] * x1 + t[5] * x2
            y2 = t[4] * x0 + t[5] * x1 + t[2] * x2
            yn = y0 * nx + y1 * ny + y2 * nz
            state[12 + 3 * a, i] -= strength * (y0 - yn * nx)
            state[13 + 3 * a, i] -= strength * (y1 - yn * ny)
            state[14 + 3 * a, i] -= strength * (y2 - yn * nz)


@njit(cache=True, nogil=True)
def _distortion(state, dchi, n0, e1, e2, out):
    """Distortion matrix (A11, A12, A21, A22) at a source dchi beyond the rays' last shell."""
    d = np.empty((2, 3))
    for i in range(state.shape[1]):
        rx = state[0, i] + dchi * state[3, i]
        ry = state[1, i] + dchi * state[4, i]
        rz = state[2, i] + dchi * state[5, i]
        r = math.sqrt(rx * rx + ry * ry + rz * rz)
        bx, by, bz = rx / r, ry / r, rz / r
        for a in range(2):
            x0 = state[6 + 3 * a, i] + dchi * state[12 + 3 * a, i]
            x1 = state[7 + 3 * a, i] + dchi * state[13 + 3 * a, i]
            x2 = state[8 + 3 * a, i] + dchi * state[14 + 3 * a, i]
            xn = x0 * bx + x1 * by + x2 * bz
            d[a, 0] = (x0 - xn * bx) / r
            d[a, 1] = (x1 - xn * by) / r
            d[a, 2] = (x2 - xn * bz) / r
        # parallel transport of the start basis along the great circle n0 -> beta (Rodrigues)
        px, py, pz = n0[i, 0], n0[i, 1], n0[i, 2]
        kx, ky, kz = py * bz - pz * by, pz * bx - px * bz, px * by - py * bx
        s = math.sqrt(kx * kx + ky * ky + kz * kz)
        c = px * bx + py * by + pz * bz
        for b in range(2):
            if b == 0:
                ex, ey, ez = e1[i, 0], e1[i, 1], e1[i, 2]
            else:
                ex, ey, ez = e2[i, 0], e2[i, 1], e2[i, 2]
            if s > 1e-15:
                ux, uy, uz = kx / s, ky / s, kz / s
                ke = ux * ex + uy * ey + uz * ez
                cx, cy, cz = uy * ez - uz * ey, uz * ex - ux * ez, ux * ey - uy * ex
                ex, ey, ez = (ex * c + cx * s + ux * ke * (1 - c), ey * c + cy * s + uy * ke * (1 - c),
                              ez * c + cz * s + uz * ke * (1 - c))
            for a in range(2):
                out[2 * b + a, i] = ex * d[a, 0] + ey * d[a, 1] + ez * d[a, 2]


def _maps_from_a(a: np.ndarray) -> dict[str, np.ndarray]:
    a11, a12, a21, a22 = a
    return {"kappa": 1.0 - 0.5 * (a11 + a22), "gamma1": 0.5 * (a22 - a11), "gamma2": -0.5 * (a12 + a21),
            "omega": 0.5 * (a12 - a21)}


class _Rays:
    """Ray state (18, n): r, v, X1, X2, U1, U2 (3 each), rays starting at the pixel centres."""

    def __init__(self, nside: int):
        self.nside = nside
        self.n0, self.e1, self.e2 = pixel_bases(nside)
        n = self.n0.shape[0]
        self.state = np.zeros((18, n))
        self.state[3:6] = self.n0.T
        self.state[12:15] = self.e1.T
        self.state[15:18] = self.e2.T
        self.nhat = np.empty((3, n))
        self.chi = 0.0

    def copy(self) -> "_Rays":
        other = object.__new__(_Rays)
        other.__dict__.update(self.__dict__)
        other.state = self.state.copy()
        other.nhat = self.nhat.copy()
        return other

    def lens(self, chi: float, fields: np.ndarray, strength: float) -> None:
        import healpy as hp

        _drift(self.state, chi - self.chi, self.nhat)
        self.chi = chi
        theta, phi = hp.vec2ang(self.nhat.T)
        pix, wts = hp.get_interp_weights(self.nside, theta, phi)
        _deflect(self.state, self.nhat, np.ascontiguousarray(pix), np.ascontiguousarray(wts), fields, strength)

    def maps(self, chi_s: float) -> dict[str, np.ndarray]:
        a = np.empty((4, self.state.shape[1]))
        _distortion(self.state, chi_s - self.chi, self.n0, self.e1, self.e2, a)
        return _maps_from_a(a)


def multi_plane(cosmo: Cosmology, schedule: PlaneSchedule, load: ShellLoader, nside: int, *,
                chi_sources: Sequence[float], source_bins: Sequence[SourceBin] = (),
                completions: Sequence[Completion] = (), lmax: int | None = None, iterations: int = 1,
                log: Callable[[str], None] = lambda s: None) -> dict[str, np.ndarray]:
    """Multi-plane maps (n_sources + n_bins, npix) of kappa, gamma1, gamma2, omega (module notes).

    Tomographic bins are the n(z)-weighted sums of the maps of sources at the shell far
    edges, each galaxy's weight shared linearly between the two edges around it (as on the
    flat sky). A :class:`Completion` is added in the Born approximation.
    """
    import healpy as hp

    lmax = default_lmax(nside) if lmax is None else lmax
    paths = source_paths(schedule, cosmo, chi_sources)
    bin_chi = [cosmo.comoving_distance(b.z) for b in source_bins]
    boundary_w = np.array([boundary_weights(schedule.chi_hi, c, b.weights) for b, c in zip(source_bins, bin_chi)])
    n_src = len(paths)
    n_maps = n_src + len(source_bins)
    n_needed = max([p.full + (p.partial is not None) for p in paths] + [0])
    if len(source_bins):
        n_needed = max(n_needed, int(np.max(np.nonzero(boundary_w.sum(axis=0))[0], initial=-1)) + 1)
    out = {key: np.zeros((n_maps, npix(nside))) for key in MAP_KEYS}
    rays = _Rays(nside)
    t0 = time.perf_counter()

    def record(i: int, r: _Rays, chi_s: float, weight: float = 1.0, add: bool = False):
        for key, value in r.maps(chi_s).items():
            if add:
                out[key][i] += weight * value
            else:
                out[key][i] = value

    for i, p in enumerate(paths):
        if p.full == 0 and p.partial is None:
            record(i, rays, p.chi_s)
    for k in range(n_needed):
        lo, hi = float(schedule.chi_lo[k]), float(schedule.chi_hi[k])
        delta = load(k)
        strength = lens_strength(cosmo, float(schedule.z[k]))
        empty = not np.any(delta)  # an empty shell does not lens: the rays only drift through it
        fields = None if empty else shell_fields(delta, float(schedule.chi[k]), 1.0, hi - lo, lmax=lmax,
                                                 iterations=iterations)
        for i, p in enumerate(paths):
            if p.partial is not None and p.partial.plane == k:
                if empty:
                    record(i, rays, p.chi_s)
                else:
                    branch = rays.copy()
                    branch.lens(p.partial.chi, fields, p.partial.strength)
                    record(i, branch, p.chi_s)
        if any(k < p.full for p in paths) or (len(source_bins) and np.any(boundary_w[:, k:] > 0)):
            if not empty:
                rays.lens(float(schedule.chi[k]), fields, strength)
            for i, p in enumerate(paths):
                if p.full == k + 1 and p.partial is None:
                    record(i, rays, p.chi_s)
            for b in range(len(source_bins)):
                if boundary_w[b, k] > 0:
                    record(n_src + b, rays, hi, boundary_w[b, k], add=True)
        log(f"shell {k + 1}/{n_needed} (multi-plane, {time.perf_counter() - t0:.1f} s)")
    for c in completions:
        kappa_g = hp.alm2map(c.alm, nside, lmax=c.lmax)
        g1, g2 = shear_from_kappa_alm(c.alm, nside, c.lmax)
        out["kappa"][c.index] += kappa_g
        out["gamma1"][c.index] += g1
        out["gamma2"][c.index] += g2
    return out
