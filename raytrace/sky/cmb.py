r"""CMB-lensing convergence: the source at last scattering, completed beyond the shells.

The shells reach the highest snapshot redshift :math:`z_{\rm top}`, at comoving distance
:math:`\chi_{\rm end}` (the far edge of the last shell). The CMB is lensed by everything
out to the last-scattering surface at :math:`\chi_*` (redshift :math:`z_*` of camb's
``zstar``). The convergence is split at :math:`\chi_{\rm end}`:

.. math::
    \kappa_{\rm CMB} = \underbrace{\int_0^{\chi_{\rm end}} q_*(\chi)\,\delta\,d\chi}_{\rm shells}
      + \underbrace{\int_{\chi_{\rm end}}^{\chi_*} q_*(\chi)\,\delta\,d\chi}_{\kappa_G},
    \qquad q_*(\chi) = \tfrac32\Omega_m (H_0/c)^2 (1+z)\,\chi\,\frac{\chi_*-\chi}{\chi_*}.

The first part is traced through the shells like any source (Born or multi-plane, with
the source at :math:`\chi_*`). The second is a Gaussian random field with the linear-theory
power of the remaining range in the Limber approximation (Limber 1953; LoVerde &
Afshordi 2008 for :math:`\ell + 1/2`),

.. math::
    C_\ell^{G} = \int_{\chi_{\rm end}}^{\chi_*} \frac{q_*^2(\chi)}{\chi^2}\,
    P_{\rm lin}\!\Big(\frac{\ell+1/2}{\chi}, z(\chi)\Big)\,d\chi,

with camb's linear total-matter power (neutrinos included), distances and redshifts. In
the Limber approximation density fluctuations in disjoint radial ranges are uncorrelated,
so :math:`\kappa_G` is drawn independently of the shells; its random phases depend only on
the seed and the realisation, never on the model, so every model of a realisation shares
them (paired, like the plane choices and the noise). Its shear is the spin-2 transform of
:math:`\kappa_G`, and it is added to the traced maps in the Born approximation (the
lensing of the traced part by the far range and vice versa is second order). Its
coefficients are multiplied by the HEALPix pixel window
(:func:`raytrace.sky.pixels.pixel_window`), so that the whole map is a pixel average like
the shells' part (whose particles are binned into pixels).

The sum's power is checked against camb's lensing-potential power converted to
convergence, :math:`C_\ell^{\kappa\kappa} = [\ell(\ell+1)]^2 C_\ell^{\phi\phi}/4`
(e.g. Lewis & Challinor 2006, eq. 5.8).

References
----------
Limber, D. N. 1953, ApJ 117, 134.
LoVerde, M. & Afshordi, N. 2008, Phys. Rev. D 78, 123506.
Lewis, A. & Challinor, A. 2006, Phys. Rep. 429, 1.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..cosmology import C_KM_S, Cosmology

H0_OVER_C = 100.0 / C_KM_S

#: first element of the seed of the Gaussian completion (demo phases 0, planes 1, shells 2)
CMB_STREAM = 4

#: label of the CMB-lensing map in every file
CMB_LABEL = "cmb"


@dataclass(frozen=True)
class LastScattering:
    z: float
    chi_mpc_h: float


def last_scattering(cosmo: Cosmology) -> LastScattering:
    """Redshift of last scattering (camb ``zstar``) and its comoving distance in Mpc/h."""
    import camb

    results = camb.get_background(cosmo.camb_params([0.0]))
    z = float(results.get_derived_params()["zstar"])
    return LastScattering(z, float(results.comoving_radial_distance(z)) * cosmo.h)


def remainder_power(cosmo: Cosmology, chi_min: float, lmax: int, *, n_chi: int = 600) -> np.ndarray:
    r""":math:`C_\ell^G` for :math:`\ell = 0 \dots` ``lmax`` (see the module notes); :math:`C_0 = C_1 = 0`."""
    import camb

    pars = cosmo.camb_params([0.0])
    background = camb.get_background(pars)
    h = cosmo.h
    z_star = float(background.get_derived_params()["zstar"])
    chi_star = float(background.comoving_radial_distance(z_star)) * h
    if chi_min >= chi_star:
        return np.zeros(lmax + 1)
    # sample densely where the kernel and the growth change (in log(chi_star - chi) near the end)
    chi = np.unique(np.concatenate([np.linspace(chi_min, chi_star, n_chi)[:-1],
                                    chi_star - np.geomspace(1e-3, chi_star - chi_min, n_chi // 3)]))
    chi = chi[(chi >= chi_min) & (chi < chi_star)]
    z = np.asarray(background.redshift_at_comoving_radial_distance(chi / h))
    z_lo = max(float(z.min()) - 1e-3, 0.0)
    zs = np.unique(np.concatenate([np.linspace(z_lo, 4.0, 12), np.geomspace(4.0, 20.0, 6), np.geomspace(20.0, z_star + 1.0, 6)]))
    zs = zs[zs >= z_lo]
    kmax = (lmax + 0.5) / chi_min
    power = camb.get_matter_power_interpolator(
        pars, zs=zs, kmax=min(max(kmax, 1.0), 10.0), nonlinear=False, var1="delta_tot", var2="delta_tot",
        hubble_units=True, k_hunit=True, extrap_kmax=max(20.0, 2 * kmax), log_interp=True,
    )
    q = 1.5 * cosmo.Omega_m * H0_OVER_C**2 * (1 + z) * chi * (chi_star - chi) / chi_star
    cl = np.zeros(lmax + 1)
    for ell in range(2, lmax + 1):
        p = power.P(z, (ell + 0.5) / chi, grid=False)
        cl[ell] = np.trapezoid(q**2 / chi**2 * p, chi)
    return cl


def camb_kappa_power(cosmo: Cosmology, lmax: int) -> np.ndarray:
    r"""camb's CMB-lensing convergence power :math:`[\ell(\ell+1)]^2 C_\ell^{\phi\phi}/4`, linear theory."""
    import camb

    pars = cosmo.camb_params([0.0])
    pars.set_for_lmax(max(lmax, 200), lens_potential_accuracy=1)
    pars.NonLinear = camb.model.NonLinear_none
    results = camb.get_results(pars)
    phi = results.get_lens_potential_cls(lmax, raw_cl=True)[:, 0]
    ell = np.arange(len(phi), dtype=float)
    return (ell * (ell + 1)) ** 2 / 4.0 * phi


def gaussian_alm(cl: np.ndarray, seed: int, realization: int) -> np.ndarray:
    """healpy-ordered alm of a Gaussian field of power ``cl``; phases from (seed, realisation) only.

    :math:`a_{\\ell 0} = \\sqrt{C_\\ell}\\,g`, :math:`a_{\\ell m} = \\sqrt{C_\\ell/2}(g_1 + i g_2)`
    for :math:`m > 0` with unit normal deviates g (a real field's independent coefficients).
    """
    import healpy as hp

    lmax = len(cl) - 1
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), CMB_STREAM, int(realization)]))
    ell, m = hp.Alm.getlm(lmax)
    g = rng.standard_normal((2, ell.size))
    amp = np.sqrt(np.maximum(cl, 0.0))[ell]
    return np.where(m == 0, amp * g[0], amp * np.sqrt(0.5) * (g[0] + 1j * g[1])).astype(np.complex128)
