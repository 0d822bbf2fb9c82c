r"""Full-sky lensing on HEALPix maps (``maps: geometry: sphere``).

The spherical branch follows the flat one stage by stage, with its own shell building
and tracing and the statistics that make sense on the sphere:

``shells``      concentric shells around the observer, each a HEALPix map of the
                total-matter density contrast averaged over its radial extent
                (:mod:`raytrace.sky.shells`): tiled periodic boxes with a seeded
                rotation and shift per shell and realisation, user light-cone particle
                files, or user HEALPix density shells.
``trace``       Born convergence and multi-plane ray tracing on the sphere, shear from
                the spin-2 transform, the CMB-lensing completion
                (:mod:`raytrace.sky.tracing`, :mod:`raytrace.sky.cmb`).
``observe``     shape noise, galactic-band and star-hole masks, smoothing on HEALPix
                maps; HDF5 and HEALPix FITS (:mod:`raytrace.sky.survey`).
``measure``     pseudo-C_ell power spectra with a mask correction, PDF, moments, peaks
                and minima from HEALPix neighbours, written in the statistics-file
                layout the stack and forecast stages read (:mod:`raytrace.sky.statistics`).

Conventions shared by every module here: HEALPix maps in RING order (Górski et al.
2005), directions as unit 3-vectors in the map frame, local tangent basis
:math:`(\hat e_1, \hat e_2) = (\hat\theta, \hat\phi)` at each point, lengths in
comoving Mpc/h, angles in radians internally.

References
----------
Górski, K. M. et al. 2005, ApJ 622, 759 (HEALPix).
"""

from pathlib import Path as _Path


def is_sphere_file(path) -> bool:
    """True for the map, observed and shell files of the spherical branch."""
    p = _Path(path)
    if not p.exists():
        return False
    try:
        import h5py

        with h5py.File(p, "r") as f:
            return str(f.attrs.get("geometry", "flat")) == "sphere"
    except OSError:
        return False
