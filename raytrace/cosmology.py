r"""Background cosmology (astropy) and linear matter power spectra (camb).

Parameter convention (used by every configuration key and function here):

- ``Omega_m`` is the *total* matter density today: cold dark matter + baryons +
  massive neutrinos, :math:`\Omega_m = \Omega_c + \Omega_b + \Omega_\nu`.
- ``m_nu_eV`` is the sum of the neutrino masses, split into three degenerate mass
  states of :math:`m_\nu/3` each, with :math:`N_{\rm eff} = 3.044` and
  :math:`T_{\rm CMB} = 2.7255` K. :math:`\Omega_\nu h^2` is taken from camb, so the
  two libraries describe exactly the same universe; it is close to
  :math:`\sum m_\nu / 93.14\,{\rm eV}` (Lesgourgues & Pastor 2006).
- astropy's ``Om0`` excludes neutrinos (astropy adds them through ``Onu0`` with the
  full relativistic-to-non-relativistic transition), so we pass
  ``Om0 = Omega_m - Omega_nu``. At late times neutrinos of these masses are
  non-relativistic and :math:`\Omega_m(z)` includes them.
- The universe is flat: the dark-energy density closes the budget.
- ``A_s`` is the amplitude of the primordial curvature power at the pivot
  0.05/Mpc, ``n_s`` its tilt.

References
----------
Lesgourgues, J. & Pastor, S. 2006, Phys. Rep. 429, 307.
Lewis, A., Challinor, A. & Lasenby, A. 2000, ApJ 538, 473 (camb).
"""

from __future__ import annotations

from dataclasses import dataclass, asdict
from functools import cached_property
from typing import Mapping

import numpy as np

from .errors import RaytraceError

#: speed of light in km/s (exact, SI definition)
C_KM_S = 299792.458
N_EFF = 3.044
T_CMB_K = 2.7255
#: neutrino masses are split into this many degenerate states
N_MASSIVE_NU = 3

PARAMETER_NAMES = ("Omega_m", "Omega_b", "h", "n_s", "A_s", "m_nu_eV")


@dataclass(frozen=True)
class Cosmology:
    """A flat cosmology with massive neutrinos; see the module docstring for conventions."""

    Omega_m: float
    Omega_b: float
    h: float
    n_s: float
    A_s: float
    m_nu_eV: float

    @classmethod
    def from_mapping(cls, params: Mapping[str, float], where: str = "suite.fiducial") -> "Cosmology":
        missing = [k for k in PARAMETER_NAMES if k not in params]
        if missing:
            raise RaytraceError(f"{where}.{missing[0]}: missing cosmological parameter")
        cosmo = cls(**{k: float(params[k]) for k in PARAMETER_NAMES})
        if cosmo.Omega_b >= cosmo.Omega_m - cosmo.Omega_nu:
            raise RaytraceError(f"{where}.Omega_b: {cosmo.Omega_b} leaves no cold dark matter (Omega_m = {cosmo.Omega_m})")
        return cosmo

    def as_dict(self) -> dict[str, float]:
        return asdict(self)

    # --- neutrinos -------------------------------------------------------------------
    @cached_property
    def omnuh2(self) -> float:
        """:math:`\\Omega_\\nu h^2` of the massive neutrinos today, as camb computes it."""
        if self.m_nu_eV == 0.0:
            return 0.0
        import camb

        pars = camb.CAMBparams()
        pars.set_cosmology(
            H0=100 * self.h, ombh2=0.02, omch2=0.1, mnu=self.m_nu_eV, nnu=N_EFF,
            num_massive_neutrinos=N_MASSIVE_NU, neutrino_hierarchy="degenerate", TCMB=T_CMB_K,
        )
        return float(pars.omnuh2)

    @property
    def Omega_nu(self) -> float:
        return self.omnuh2 / self.h**2

    @property
    def f_nu(self) -> float:
        """Neutrino fraction of the matter density, :math:`f_\\nu = \\Omega_\\nu/\\Omega_m`."""
        return self.Omega_nu / self.Omega_m

    @property
    def Omega_cb(self) -> float:
        """Cold dark matter plus baryons."""
        return self.Omega_m - self.Omega_nu

    # --- background ------------------------------------------------------------------
    @cached_property
    def astropy(self):
        """The equivalent ``astropy.cosmology.FlatLambdaCDM``."""
        from astropy.cosmology import FlatLambdaCDM

        m_nu = [self.m_nu_eV / N_MASSIVE_NU] * N_MASSIVE_NU
        return FlatLambdaCDM(
            H0=100 * self.h, Om0=self.Omega_cb, Ob0=self.Omega_b, Tcmb0=T_CMB_K, Neff=N_EFF, m_nu=m_nu
        )

    @cached_property
    def _distance_table(self) -> tuple[np.ndarray, np.ndarray]:
        r""":math:`\chi(z) = (c/H_0)\int_0^z dz'/E(z')` on a fine grid, from astropy's :math:`1/E(z)`.

        astropy's vectorised ``inv_efunc`` (massive neutrinos included) integrated with
        the cumulative Simpson rule: relative error below 1e-8 on this grid, and far
        cheaper than one quadrature per redshift.
        """
        from scipy.integrate import cumulative_simpson

        z = np.concatenate([np.linspace(0.0, 3.0, 6001), np.linspace(3.0, 20.0, 3401)[1:]])
        inv_e = self.astropy.inv_efunc(z)
        chi = np.empty_like(z)
        lo = z <= 3.0
        chi[lo] = cumulative_simpson(inv_e[lo], x=z[lo], initial=0.0)
        hi_z = np.concatenate([[3.0], z[~lo]])
        chi[~lo] = chi[lo][-1] + cumulative_simpson(self.astropy.inv_efunc(hi_z), x=hi_z, initial=0.0)[1:]
        return z, chi * C_KM_S / 100.0  # in Mpc/h

    def comoving_distance(self, z: np.ndarray | float) -> np.ndarray:
        """Line-of-sight comoving distance in Mpc/h (flat: equal to the transverse one)."""
        zt, chi = self._distance_table
        z = np.asarray(z, dtype=float)
        if np.any(z > zt[-1]):
            raise RaytraceError(f"redshift {float(z.max())} beyond the supported range (z <= {zt[-1]})")
        return np.interp(z, zt, chi)

    def redshift_at(self, chi_mpc_h: np.ndarray | float) -> np.ndarray:
        """Inverse of :meth:`comoving_distance`."""
        zt, chi = self._distance_table
        return np.interp(np.asarray(chi_mpc_h, dtype=float), chi, zt)

    # --- camb ------------------------------------------------------------------------
    def camb_params(self, redshifts=(0.0,), kmax_h_mpc: float = 30.0):
        """camb parameters for this cosmology and linear matter power at ``redshifts``."""
        import camb

        pars = camb.CAMBparams()
        pars.set_cosmology(
            H0=100 * self.h,
            ombh2=self.Omega_b * self.h**2,
            omch2=(self.Omega_cb - self.Omega_b) * self.h**2,
            mnu=self.m_nu_eV,
            nnu=N_EFF,
            num_massive_neutrinos=N_MASSIVE_NU if self.m_nu_eV > 0 else 0,
            neutrino_hierarchy="degenerate",
            TCMB=T_CMB_K,
            omk=0.0,
        )
        pars.InitPower.set_params(As=self.A_s, ns=self.n_s)
        zs = sorted(set(float(z) for z in redshifts), reverse=True)
        pars.set_matter_power(redshifts=zs, kmax=kmax_h_mpc * self.h * 1.2, nonlinear=False)
        pars.NonLinear = camb.model.NonLinear_none
        return pars

    def linear_power(self, redshifts, kmax_h_mpc: float = 30.0) -> "LinearPower":
        """Linear power spectra of cold matter + baryons and of total matter (camb)."""
        import camb

        zs = np.atleast_1d(np.asarray(redshifts, dtype=float))
        zgrid = np.unique(np.concatenate([zs, [0.0], np.linspace(0, zs.max() + 0.01, 8)]))
        pars = self.camb_params(zgrid, kmax_h_mpc)
        results = camb.get_results(pars)
        interp = {}
        for name, var in (("cb", "delta_nonu"), ("total", "delta_tot")):
            interp[name] = results.get_matter_power_interpolator(
                nonlinear=False, var1=var, var2=var, hubble_units=True, k_hunit=True,
                extrap_kmax=kmax_h_mpc * 10, silent=True,
            )
        return LinearPower(interp, results)


class LinearPower:
    """Linear matter power in (Mpc/h)^3 at wavenumbers in h/Mpc, from camb."""

    def __init__(self, interp: dict, results):
        self._interp = interp
        self.results = results

    def cb(self, z: float, k_h_mpc: np.ndarray) -> np.ndarray:
        """Cold dark matter + baryons."""
        return self._interp["cb"].P(z, k_h_mpc)

    def total(self, z: float, k_h_mpc: np.ndarray) -> np.ndarray:
        """Total matter including massive neutrinos."""
        return self._interp["total"].P(z, k_h_mpc)

    def nu_over_cb(self, z: float, k_h_mpc: np.ndarray) -> np.ndarray:
        r"""Ratio of camb's massive-neutrino to cold-matter transfer functions, :math:`T_\nu/T_{cb}`.

        Taken at the computed redshift nearest ``z`` (snapshot redshifts are computed
        exactly), interpolated linearly in :math:`\ln k` and held constant beyond the
        computed wavenumbers (1 on large scales, where neutrinos cluster like cold matter).
        """
        data = self._transfer()
        zs = np.asarray(self.results.transfer_redshifts)
        iz = int(np.argmin(np.abs(zs - z)))
        k = data.transfer_z("k/h", iz)
        ratio = data.transfer_z("delta_nu", iz) / data.transfer_z("delta_nonu", iz)
        return np.interp(np.log(np.asarray(k_h_mpc, dtype=float)), np.log(k), ratio)

    def _transfer(self):
        if not hasattr(self, "_transfer_data"):
            self._transfer_data = self.results.get_matter_transfer_data()
        return self._transfer_data
