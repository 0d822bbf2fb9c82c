r"""Observational systematics of the tomographic source bins: shear calibration,
photometric-redshift errors and intrinsic alignments.

Model
-----
For tomographic bin :math:`i` the observed signal, before shape noise is added, is

.. math::
    \gamma^{\rm obs} = (1+m_i)\,[\gamma^{G}(n_i') + A_{\rm IA}\,\gamma^{I}(n_i')] + c_i, \qquad
    \kappa^{\rm obs} = (1+m_i)\,[\kappa^{G}(n_i') + A_{\rm IA}\,\kappa^{I}(n_i')],

or, with ``convergence_from_shear``, :math:`\kappa^{\rm obs}` is the Kaiser & Squires
(1993) inversion of the observed (biased, noisy, masked) shear. Here

- :math:`m_i`, :math:`c_i = (c_{1,i}, c_{2,i})`: multiplicative and additive shear bias
  (Heymans et al. 2006, the STEP convention :math:`\hat\gamma = (1+m)\gamma + c`). A
  constant :math:`c` has no E-mode convergence, so it does not enter :math:`\kappa`. The
  bias multiplies the signal only: the configured ``sigma_e`` is the dispersion of the
  *measured* ellipticities, so shape noise already is what the survey measures.
- :math:`n_i'(z) = s_i^{-1}\,n_i(\bar z_i + (z - \Delta z_i - \bar z_i)/s_i)`: the bin's
  n(z) with its mean moved by :math:`\Delta z_i` (``photoz.shift``) and its width
  multiplied by :math:`s_i` (``photoz.stretch``) about its mean :math:`\bar z_i`, as in
  the shift and stretch parametrisations of recent surveys (e.g. Hildebrandt et al. 2017
  for the shift; the stretch as in the DES year-3 analyses, from memory). It is evaluated
  on the n(z) grid, zero outside it, and renormalised; galaxies pushed beyond the grid are
  lost (a warning says how many).
- :math:`\gamma^I`, :math:`\kappa^I`: the intrinsic alignment of the bin's galaxies in the
  nonlinear (tidal) alignment model (Hirata & Seljak 2004; Bridle & King 2007):
  :math:`\gamma^I(\mathbf k) = -F(z)\,(k_x^2-k_y^2,\ 2k_xk_y)/k^2\,\delta(\mathbf k)`, with

  .. math:: F(z) = \frac{C_1\rho_{\rm crit}\,\Omega_m}{D(z)}\left(\frac{1+z}{1+z_{\rm pivot}}\right)^{\eta},

  :math:`C_1\rho_{\rm crit} = 0.0134` and :math:`D` the linear growth factor normalised to
  1 today (Bridle & King 2007; Joachimi et al. 2011 for the power law in redshift). Its
  E-mode convergence is :math:`\kappa^I = -F\delta`. The II power is
  :math:`A^2\int n_i n_j F^2 P/\chi^2\,d\chi` and the GI power
  :math:`-A\int (q_i n_j + n_i q_j) F P/\chi^2\,d\chi`: for :math:`A > 0` the galaxies
  point radially towards overdensities, while lensing shears them tangentially, so GI is
  negative.

What reruns when a value changes
--------------------------------
The trace stage traces each bin with its nominal n(z) (``photoz.shift``, ``photoz.stretch``)
and, when asked, extra maps that make every nuisance value a cheap recombination:

- with ``photoz.derivative_step`` :math:`h` (and ``photoz.stretch_derivative_step``), every
  bin also for :math:`\Delta z_i \pm h` (and :math:`s_i \pm h_s`), one bin at a time being
  independent maps (only extra weighted sums in the same tracing pass);
- with an ``intrinsic_alignment`` section, the unit-amplitude alignment maps of every bin
  and of every n(z) variant (for the configured ``eta`` and ``z_pivot``).

The observe stage then combines them with the nuisance values it is given (``m``, ``c1``,
``c2``, ``amplitude``, ``photoz.offset`` and ``photoz.stretch_offset``, each offset 0 or
plus or minus a traced step), so changing any of those reruns only observing and what
follows; changing ``shift``, ``stretch``, the steps, ``eta`` or ``z_pivot`` re-traces.

References
----------
Bridle, S. & King, L. 2007, New J. Phys. 9, 444.
Heymans, C. et al. 2006, MNRAS 368, 1323 (STEP).
Hildebrandt, H. et al. 2017, MNRAS 465, 1454.
Hirata, C. M. & Seljak, U. 2004, Phys. Rev. D 70, 063526.
Joachimi, B., Mandelbaum, R., Abdalla, F. B. & Bridle, S. L. 2011, A&A 527, A26.
Kaiser, N. & Squires, G. 1993, ApJ 404, 441.
"""

from __future__ import annotations

import copy
import warnings
from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np
import scipy.fft

from .errors import RaytraceError

KEY = "survey.systematics"

#: :math:`C_1\rho_{\rm crit}` of the nonlinear alignment model (Bridle & King 2007).
C1_RHO_CRIT = 0.0134
#: default pivot redshift of the alignment power law (Joachimi et al. 2011, from memory)
Z_PIVOT = 0.62

#: keys the trace stage depends on; every other key is read by the observe stage only
TRACE_KEYS = {"photoz": ("shift", "stretch", "derivative_step", "stretch_derivative_step"),
              "intrinsic_alignment": ("eta", "z_pivot")}
#: nuisance values a variant (or an explicit :class:`Nuisance`) may set
NUISANCE_KEYS = {"shear_bias": ("m", "c1", "c2"), "photoz": ("offset", "stretch_offset"),
                 "intrinsic_alignment": ("amplitude",)}

#: relative tolerance when matching a requested photo-z offset to a traced one
_OFFSET_RTOL = 1e-6


# ------------------------------------------------------------------------------------
# physics
def growth_factor(cosmo, z: np.ndarray | float) -> np.ndarray:
    r"""Linear growth factor :math:`D(z)`, normalised to :math:`D(0) = 1`.

    Solves :math:`D'' + (2 + d\ln E/d\ln a)\,D' = \tfrac32\Omega_m(a)\,D` in
    :math:`\ln a` (e.g. Peebles 1980, *The Large-Scale Structure of the Universe*, sec. 10),
    with :math:`E(a)` from astropy (radiation and massive neutrinos included) and
    :math:`\Omega_m(a) = \Omega_m a^{-3}/E^2` of all matter, from the growing mode
    :math:`D \propto a` at :math:`z = 200`. This is the scale-independent growth that the
    alignment model's convention uses; the neutrinos' scale dependence is left out.
    """
    z = np.asarray(z, dtype=float)
    if np.any(z < 0) or np.any(z > 20):
        raise RaytraceError(f"growth factor: redshift outside [0, 20] ({z.min():g} .. {z.max():g})")
    table = _growth_table(cosmo)
    return np.interp(np.log1p(z), table[0], table[1])


_GROWTH_CACHE: dict = {}


def _growth_table(cosmo):
    key = tuple(sorted(cosmo.as_dict().items()))
    if key not in _GROWTH_CACHE:
        from scipy.integrate import solve_ivp

        lna = np.linspace(np.log(1.0 / 201.0), 0.0, 2001)
        zz = np.expm1(-lna)
        e = cosmo.astropy.efunc(zz)
        dlne = np.gradient(np.log(e), lna)
        om = cosmo.Omega_m * np.exp(-3.0 * lna) / e**2

        def rhs(x, y):
            return [y[1], -(2.0 + np.interp(x, lna, dlne)) * y[1] + 1.5 * np.interp(x, lna, om) * y[0]]

        a0 = np.exp(lna[0])
        sol = solve_ivp(rhs, (lna[0], 0.0), [a0, a0], t_eval=lna, rtol=1e-10, atol=1e-14, method="DOP853")
        d = sol.y[0] / sol.y[0][-1]
        # table in ln(1+z) = -ln a, increasing
        _GROWTH_CACHE[key] = (-lna[::-1], d[::-1])
    return _GROWTH_CACHE[key]


def nla_factor(cosmo, z: np.ndarray | float, eta: float = 0.0, z_pivot: float = Z_PIVOT) -> np.ndarray:
    r"""Unit-amplitude alignment factor :math:`F(z) = C_1\rho_{\rm crit}\Omega_m/D(z)\,[(1+z)/(1+z_{\rm pivot})]^\eta`.

    The intrinsic shear is :math:`\gamma^I = -A\,F\,(k_x^2-k_y^2, 2k_xk_y)/k^2\,\delta`
    (Hirata & Seljak 2004; amplitude convention of Bridle & King 2007; power law in redshift
    as in Joachimi et al. 2011).
    """
    z = np.asarray(z, dtype=float)
    return C1_RHO_CRIT * cosmo.Omega_m / growth_factor(cosmo, z) * ((1.0 + z) / (1.0 + z_pivot)) ** eta


def photoz_nz(z: np.ndarray, nz: np.ndarray, shift: float = 0.0, stretch: float = 1.0, *,
              key: str = f"{KEY}.photoz") -> tuple[np.ndarray, float]:
    r"""A bin's n(z) with its mean shifted by ``shift`` and its width scaled by ``stretch``.

    Returns :math:`n'(z) = s^{-1} n(\bar z + (z - \Delta z - \bar z)/s)` on the same grid
    (linear interpolation, zero outside the grid), renormalised to the trapezoid integral of ``nz``,
    and the fraction of galaxies lost beyond the grid's ends. ``shift = 0, stretch = 1``
    returns ``nz`` itself.
    """
    z = np.asarray(z, dtype=float)
    nz = np.asarray(nz, dtype=float)
    if shift == 0.0 and stretch == 1.0:
        return nz, 0.0
    if not stretch > 0:
        raise RaytraceError(f"{key}.stretch: must be positive, got {stretch!r}")
    total = np.trapezoid(nz, z)
    mean = np.trapezoid(z * nz, z) / total
    src = mean + (z - shift - mean) / stretch
    out = np.interp(src, z, nz, left=0.0, right=0.0) / stretch
    kept = np.trapezoid(out, z)
    if not kept > 0:
        raise RaytraceError(f"{key}: shift {shift:g} and stretch {stretch:g} move the whole bin off the n(z) grid")
    return out * (total / kept), float(max(0.0, 1.0 - kept / total))


def kaiser_squires(gamma1: np.ndarray, gamma2: np.ndarray) -> np.ndarray:
    r"""Convergence from shear on the periodic grid (Kaiser & Squires 1993).

    :math:`\hat\kappa = [(\ell_x^2-\ell_y^2)\hat\gamma_1 + 2\ell_x\ell_y\hat\gamma_2]/\ell^2` with
    the project's conventions (:math:`\gamma_1 = (\psi_{,xx}-\psi_{,yy})/2`,
    :math:`\gamma_2 = \psi_{,xy}`, arrays [iy, ix]); the mean (:math:`\ell = 0`) is set to 0
    and the B mode dropped. On a non-periodic patch (a light cone, a masked field) the
    inversion has the usual edge effects.
    """
    g1 = np.asarray(gamma1, dtype=float)
    g2 = np.asarray(gamma2, dtype=float)
    n_y, n_x = g1.shape
    ly = scipy.fft.fftfreq(n_y)[:, None]
    lx = scipy.fft.rfftfreq(n_x)[None, :]
    l2 = lx**2 + ly**2
    l2[0, 0] = 1.0
    k = ((lx**2 - ly**2) * scipy.fft.rfft2(g1) + 2.0 * lx * ly * scipy.fft.rfft2(g2)) / l2
    k[0, 0] = 0.0
    return scipy.fft.irfft2(k, s=(n_y, n_x))


# ------------------------------------------------------------------------------------
# settings
def per_bin(value: Any, n_bins: int, key: str, *, default: float) -> np.ndarray:
    """A number for every bin, or one value per bin; else a one-line error naming ``key``."""
    if value is None:
        return np.full(n_bins, float(default))
    if isinstance(value, (list, tuple, np.ndarray)):
        if len(value) != n_bins:
            raise RaytraceError(f"{key}: {len(value)} values for {n_bins} tomographic bin(s) "
                                f"(give one per bin, or one number for all)")
        arr = np.asarray(value, dtype=float)
    else:
        arr = np.full(n_bins, float(value))
    if not np.all(np.isfinite(arr)):
        raise RaytraceError(f"{key}: values must be finite numbers, got {value!r}")
    return arr


def _section(settings: Mapping | None, name: str) -> dict:
    return dict((settings or {}).get(name) or {})


def trace_settings(systematics: Mapping | None) -> dict | None:
    """The part of ``survey.systematics`` the trace stage depends on (None when nothing).

    Passing only these keys to the trace rule means that changing a nuisance value the
    observe stage applies (``m``, ``c1``, ``c2``, ``amplitude``, offsets, variants) never
    re-traces.
    """
    neutral = {"shift": 0.0, "stretch": 1.0}  # values that leave the traced n(z) as it is
    out = {}
    for name, keys in TRACE_KEYS.items():
        if systematics and name in systematics and systematics[name] is not None:
            sec = _section(systematics, name)
            sub = {k: sec[k] for k in keys if k in sec and not _all_equal(sec[k], neutral.get(k))}
            if name == "intrinsic_alignment" or sub:
                out[name] = sub  # an alignment section asks for alignment maps, even if empty
    return out or None


def nominal_trace_settings(systematics: Mapping | None, traced: Mapping | None) -> dict | None:
    """``traced`` (from :func:`trace_settings`) without what only nuisance variants use.

    The derivative-step bins are dropped when every nominal photo-z offset is zero, and the
    alignment maps when the nominal amplitude is zero: maps no nominal observation reads.
    The workflow traces them only for the realisations the variants observe.
    """
    if not traced:
        return None
    out = {k: dict(v) for k, v in traced.items()}
    pz = _section(systematics, "photoz")
    if "photoz" in out:
        if _all_equal(pz.get("offset", 0.0), 0.0):
            out["photoz"].pop("derivative_step", None)
        if _all_equal(pz.get("stretch_offset", 0.0), 0.0):
            out["photoz"].pop("stretch_derivative_step", None)
        if not out["photoz"]:
            del out["photoz"]
    ia = _section(systematics, "intrinsic_alignment")
    if "intrinsic_alignment" in out and float(ia.get("amplitude", 0.0)) == 0.0:
        del out["intrinsic_alignment"]
    return out or None


def _all_equal(value: Any, neutral: float | None) -> bool:
    if neutral is None:
        return False
    values = value if isinstance(value, (list, tuple)) else [value]
    return all(float(v) == neutral for v in values)


def observe_settings(systematics: Mapping | None, variant: str | None = None, *,
                     values: Mapping | None = None) -> dict | None:
    """``survey.systematics`` as one observe job uses it: without ``variants`` and
    ``variant_models``, with nuisance values put in key by key: those of the named
    variant of ``systematics``, or ``values`` (a mapping like one variant) if given."""
    if not systematics and values is None:
        return None
    base = {k: copy.deepcopy(v) for k, v in (systematics or {}).items() if k not in ("variants", "variant_models")}
    if values is None and variant is not None:
        variants = (systematics or {}).get("variants") or {}
        if variant not in variants:
            raise RaytraceError(f"{KEY}.variants.{variant}: no such variant")
        values = variants[variant]
    where = f"{KEY}.variants.{variant}" if variant is not None else "nuisance values"
    for name, section in (values or {}).items():
        if name not in NUISANCE_KEYS:
            raise RaytraceError(f"{where}.{name}: not a nuisance section ({sorted(NUISANCE_KEYS)})")
        unknown = set(section or {}) - set(NUISANCE_KEYS[name])
        if unknown:
            raise RaytraceError(f"{where}.{name}.{sorted(unknown)[0]}: not a nuisance value")
        sec = dict(base.get(name) or {})
        sec.update(section or {})
        base[name] = sec
    return base


def check_settings(systematics: Mapping | None, n_bins: int, *, has_sources: bool = True) -> None:
    """Every check of ``survey.systematics`` a schema cannot express, as one-line errors."""
    if not systematics:
        return
    if not has_sources:
        raise RaytraceError(f"{KEY}: systematics act on tomographic bins; configure survey.sources")
    sb = _section(systematics, "shear_bias")
    m = per_bin(sb.get("m"), n_bins, f"{KEY}.shear_bias.m", default=0.0)
    if np.any(m <= -1):
        raise RaytraceError(f"{KEY}.shear_bias.m: must exceed -1, got {sb.get('m')!r}")
    for c in ("c1", "c2"):
        per_bin(sb.get(c), n_bins, f"{KEY}.shear_bias.{c}", default=0.0)
    pz = _section(systematics, "photoz")
    per_bin(pz.get("shift"), n_bins, f"{KEY}.photoz.shift", default=0.0)
    s = per_bin(pz.get("stretch"), n_bins, f"{KEY}.photoz.stretch", default=1.0)
    if np.any(s <= 0):
        raise RaytraceError(f"{KEY}.photoz.stretch: must be positive, got {pz.get('stretch')!r}")
    steps = traced_offsets(pz)
    for name, offsets in (("offset", pz.get("offset")), ("stretch_offset", pz.get("stretch_offset"))):
        _check_offsets(per_bin(offsets, n_bins, f"{KEY}.photoz.{name}", default=0.0), name, steps)
    for v, values in (systematics.get("variants") or {}).items():
        merged = observe_settings(systematics, v)
        try:
            check_settings({k: x for k, x in merged.items()}, n_bins)
        except RaytraceError as exc:
            raise RaytraceError(str(exc).replace(KEY, f"{KEY}.variants.{v}", 1)) from None
    nu = Nuisance.from_settings(systematics, n_bins)
    if np.any((nu.offset != 0) & (nu.stretch_offset != 0)):
        raise RaytraceError(f"{KEY}.photoz: a bin cannot take an offset and a stretch_offset at once "
                            f"(the variants traced change one of them at a time)")


def traced_offsets(photoz: Mapping) -> dict[str, float]:
    """The derivative steps of ``photoz`` that the trace stage adds (name -> step)."""
    out = {}
    for name, key in (("offset", "derivative_step"), ("stretch_offset", "stretch_derivative_step")):
        step = photoz.get(key)
        if step is not None:
            if not (float(step) > 0 and np.isfinite(step)):
                raise RaytraceError(f"{KEY}.photoz.{key}: must be a positive number, got {step!r}")
            out[name] = float(step)
    return out


def _check_offsets(values: np.ndarray, name: str, steps: Mapping[str, float]) -> None:
    step = steps.get(name)
    step_key = "derivative_step" if name == "offset" else "stretch_derivative_step"
    for i, v in enumerate(values):
        if v == 0.0:
            continue
        if step is None or not np.isclose(abs(v), step, rtol=_OFFSET_RTOL, atol=0.0):
            have = f"0 or +-{step:g}" if step is not None else f"0 (no photoz.{step_key})"
            raise RaytraceError(f"{KEY}.photoz.{name}: {v:g} for bin {i} was not traced (traced: {have}); "
                                f"set photoz.{step_key} and re-trace")


@dataclass(frozen=True)
class Nuisance:
    """Explicit nuisance values for the observe stage, one entry per tomographic bin.

    ``offset`` and ``stretch_offset`` select a traced n(z) variant of each bin: 0 is the
    nominal n(z), plus or minus the trace stage's ``derivative_step`` (or
    ``stretch_derivative_step``) the variants. ``amplitude`` is :math:`A_{\\rm IA}`.
    """

    m: np.ndarray
    c1: np.ndarray
    c2: np.ndarray
    offset: np.ndarray
    stretch_offset: np.ndarray
    amplitude: float = 0.0
    convergence_from_shear: bool = False

    @classmethod
    def none(cls, n_bins: int) -> "Nuisance":
        z = np.zeros(n_bins)
        return cls(z, z.copy(), z.copy(), z.copy(), z.copy())

    @classmethod
    def from_settings(cls, systematics: Mapping | None, n_bins: int) -> "Nuisance":
        """From ``survey.systematics`` (as :func:`observe_settings` returns it)."""
        s = systematics or {}
        sb, pz, ia = _section(s, "shear_bias"), _section(s, "photoz"), _section(s, "intrinsic_alignment")
        return cls(
            m=per_bin(sb.get("m"), n_bins, f"{KEY}.shear_bias.m", default=0.0),
            c1=per_bin(sb.get("c1"), n_bins, f"{KEY}.shear_bias.c1", default=0.0),
            c2=per_bin(sb.get("c2"), n_bins, f"{KEY}.shear_bias.c2", default=0.0),
            offset=per_bin(pz.get("offset"), n_bins, f"{KEY}.photoz.offset", default=0.0),
            stretch_offset=per_bin(pz.get("stretch_offset"), n_bins, f"{KEY}.photoz.stretch_offset", default=0.0),
            amplitude=float(ia.get("amplitude", 0.0) or 0.0),
            convergence_from_shear=bool(s.get("convergence_from_shear", False)),
        )

    def replace(self, **values) -> "Nuisance":
        """A copy with some values replaced; per-bin values may be numbers or sequences."""
        n = len(self.m)
        out = {f: getattr(self, f) for f in self.__dataclass_fields__}
        for k, v in values.items():
            if k not in out:
                raise RaytraceError(f"nuisance: unknown value {k!r} (one of {sorted(out)})")
            if k in ("amplitude",):
                out[k] = float(v)
            elif k == "convergence_from_shear":
                out[k] = bool(v)
            else:
                out[k] = per_bin(v, n, f"nuisance.{k}", default=0.0)
        return Nuisance(**out)

    @property
    def n_bins(self) -> int:
        return len(self.m)

    def is_null(self) -> bool:
        """True when observing with these values leaves every map as it was traced."""
        return (not self.convergence_from_shear and self.amplitude == 0.0
                and not any(np.any(a != 0) for a in (self.m, self.c1, self.c2, self.offset, self.stretch_offset)))


# ------------------------------------------------------------------------------------
# what the trace stage traces
@dataclass(frozen=True)
class PhotozVariant:
    """One n(z) variant of every bin: the nominal shift and stretch plus these offsets."""

    name: str
    offset: float
    stretch_offset: float
    nz: np.ndarray  # (n_bins, n_z)


@dataclass(frozen=True)
class TracePlan:
    """The n(z) of every bin the trace stage traces, and the alignment weights.

    ``nz`` are the nominal distributions (after ``photoz.shift`` and ``stretch``),
    ``variants`` the n(z) variants, ``alignment`` whether alignment maps are traced (for
    the nominal n(z) and every variant), with ``eta`` and ``z_pivot``.
    """

    z: np.ndarray
    nz: np.ndarray
    shift: np.ndarray
    stretch: np.ndarray
    variants: list[PhotozVariant] = field(default_factory=list)
    alignment: bool = False
    eta: float = 0.0
    z_pivot: float = Z_PIVOT

    @property
    def n_bins(self) -> int:
        return self.nz.shape[0]

    def all_nz(self) -> list[np.ndarray]:
        """Every traced n(z): the nominal bins, then each variant's bins."""
        return [self.nz[i] for i in range(self.n_bins)] + [v.nz[i] for v in self.variants for i in range(self.n_bins)]

    def source_bins(self):
        from .tracing import SourceBin

        return [SourceBin.from_nz(self.z, nz) for nz in self.all_nz()]

    def alignment_bins(self, cosmo):
        from .tracing import AlignmentBin

        if not self.alignment:
            return []
        f = nla_factor(cosmo, self.z, self.eta, self.z_pivot)
        out = []
        for nz in self.all_nz():
            n = nz / np.trapezoid(nz, self.z)
            out.append(AlignmentBin(self.z, n * f))
        return out


def plan_trace(z: np.ndarray, nz: np.ndarray, settings: Mapping | None) -> TracePlan:
    """What to trace for tomographic bins ``nz`` (n_bins, n_z) on grid ``z`` given the
    trace part of ``survey.systematics`` (:func:`trace_settings`)."""
    s = settings or {}
    n_bins = nz.shape[0]
    pz = _section(s, "photoz")
    shift = per_bin(pz.get("shift"), n_bins, f"{KEY}.photoz.shift", default=0.0)
    stretch = per_bin(pz.get("stretch"), n_bins, f"{KEY}.photoz.stretch", default=1.0)
    if np.any(stretch <= 0):
        raise RaytraceError(f"{KEY}.photoz.stretch: must be positive, got {pz.get('stretch')!r}")

    def moved(ds: float, dst: float, label: str) -> np.ndarray:
        out = np.empty_like(nz)
        for i in range(n_bins):
            sh, st = shift[i] + ds, stretch[i] + dst
            if not st > 0:
                raise RaytraceError(f"{KEY}.photoz.stretch_derivative_step: stretch {stretch[i]:g} {label} "
                                    f"is not positive for bin {i}")
            out[i], lost = photoz_nz(z, nz[i], sh, st)
            if lost > 0.01:
                warnings.warn(f"{KEY}.photoz: bin {i} {label}: {100 * lost:.1f}% of the galaxies fall off the "
                              f"n(z) grid (z = {z[0]:g} .. {z[-1]:g}) and are dropped", stacklevel=3)
        return out

    nominal = moved(0.0, 0.0, "(nominal)")
    variants = []
    steps = traced_offsets(pz)
    if "offset" in steps:
        h = steps["offset"]
        variants += [PhotozVariant("shift_plus", h, 0.0, moved(h, 0.0, f"shifted by +{h:g}")),
                     PhotozVariant("shift_minus", -h, 0.0, moved(-h, 0.0, f"shifted by -{h:g}"))]
    if "stretch_offset" in steps:
        h = steps["stretch_offset"]
        variants += [PhotozVariant("stretch_plus", 0.0, h, moved(0.0, h, f"stretched by +{h:g}")),
                     PhotozVariant("stretch_minus", 0.0, -h, moved(0.0, -h, f"stretched by -{h:g}"))]
    ia = s.get("intrinsic_alignment")
    ia = dict(ia) if ia is not None else None
    return TracePlan(z, nominal, shift, stretch, variants, alignment=ia is not None,
                     eta=float((ia or {}).get("eta", 0.0)), z_pivot=float((ia or {}).get("z_pivot", Z_PIVOT)))


def write_traced_systematics(group, plan: TracePlan, maps: Mapping[str, np.ndarray], n_src: int) -> None:
    """Store what :func:`plan_trace` asked the tracer for in a trace file's ``bins`` group.

    ``maps`` is the result of :func:`raytrace.tracing.trace` with the plan's source bins
    (nominal bins first, then each variant's) and alignment bins in the same order. Layout:
    ``bins/intrinsic_alignment/{kappa,gamma1,gamma2}`` [bin, iy, ix] (unit amplitude) and
    ``bins/photoz_variants/<name>/{kappa,gamma1,gamma2,nz}`` with attributes ``offset`` and
    ``stretch_offset`` (and its own ``intrinsic_alignment`` group).
    """
    from .hdf5 import write_dataset

    n = plan.n_bins
    group.attrs["photoz_shift"] = plan.shift
    group.attrs["photoz_stretch"] = plan.stretch

    def write_maps(g, prefix: str, index: int, description: str) -> None:
        for key in ("kappa", "gamma1", "gamma2"):
            data = maps[prefix + key][index * n:(index + 1) * n].astype(np.float32)
            write_dataset(g, key, data, "1", axes="[bin, iy, ix]", description=description)

    def write_alignment(parent, index: int) -> None:
        if plan.alignment:
            g = parent.create_group("intrinsic_alignment")
            write_maps(g, "ia_", index, "unit-amplitude intrinsic alignment (nonlinear alignment model)")
            g.attrs["eta"] = plan.eta
            g.attrs["z_pivot"] = plan.z_pivot
            g.attrs["c1_rho_crit"] = C1_RHO_CRIT

    write_alignment(group, 0)
    if plan.variants:
        vg = group.create_group("photoz_variants")
        for v, var in enumerate(plan.variants, start=1):
            g = vg.create_group(var.name)
            for key in ("kappa", "gamma1", "gamma2"):
                data = maps[key][n_src + v * n:n_src + (v + 1) * n].astype(np.float32)
                write_dataset(g, key, data, "1", axes="[bin, iy, ix]")
            write_dataset(g, "nz", var.nz, "1", axes="[bin, z]", description="true-redshift n(z) of this variant")
            g.attrs["offset"] = var.offset
            g.attrs["stretch_offset"] = var.stretch_offset
            write_alignment(g, v)
