# SPDX-License-Identifier: BSD-3-Clause
"""Photon rates of stars, lamp and thermal background; the coherent sky of a field.

Numbers from memory (not from a catalogue): the K-band zero point of Vega,
f_lambda(2.2 um) ~ 4.5e-10 W m^-2 um^-1, with a Rayleigh-Jeans slope
(f_lambda ~ lambda^-4, photon density ~ lambda^-3) across the band. The overall
throughput (atmosphere, telescope, relay optics, combiner, detector quantum
efficiency; ~1 %) is an assumption of the scenario, not a measured figure.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..skymodel import MAS, fibre_coupling, point_phasor, uniform_disk_visibility

__all__ = ["VEGA_K_FLAMBDA", "star_photon_density", "planck_photon_shape", "Component",
           "field_components", "coupled_sky"]

H_PLANCK = 6.62607015e-34
C_LIGHT = 299792458.0
K_BOLTZ = 1.380649e-23
VEGA_K_FLAMBDA = 4.5e-10 * 1e6   # W m^-2 m^-1 at 2.2 um (from memory, see module doc)


def star_photon_density(kmag: float, wave_m, *, area_m2: float, throughput: float):
    """Detected photon rate density of a star of K magnitude ``kmag`` through one telescope
    (before injection into the fibre), photons s^-1 per metre of wavelength."""
    wave = np.asarray(wave_m)
    n22 = VEGA_K_FLAMBDA * 2.2e-6 / (H_PLANCK * C_LIGHT)    # photons s^-1 m^-2 m^-1
    return n22 * (wave / 2.2e-6) ** -3 * 10 ** (-0.4 * kmag) * area_m2 * throughput


def planck_photon_shape(wave_m, temperature_k: float):
    """Planck photon density shape lambda^-4 / (exp(hc / lambda k T) - 1), 1 at 2.2 um."""
    def f(w):
        return w ** -4 / np.expm1(H_PLANCK * C_LIGHT / (w * K_BOLTZ * temperature_k))
    return f(np.asarray(wave_m)) / f(2.2e-6)


@dataclass(frozen=True)
class Component:
    """A point or uniform-disk source: flux relative to the primary, position about the
    fibre centre (radians, x East, y North), uniform-disk diameter (radians)."""
    flux: float
    x: float
    y: float
    diameter: float = 0.0


def field_components(target) -> list[Component]:
    """The sources of a science field about the science fibre's commanded pointing."""
    x1, y1 = (v * MAS for v in target.primary_offset_mas)
    comps = [Component(1.0, x1, y1, target.diameter_mas * MAS)]
    if target.companion_mas is not None:
        dx, dy = (v * MAS for v in target.companion_mas)
        comps.append(Component(target.flux_ratio, x1 + dx, y1 + dy))
    return comps


def coupled_sky(comps, wave_m, u_m, v_m, fibre_fwhm_rad: float):
    """Fibre-coupled flux and coherent flux of a field, relative to the primary's flux.

    Parameters
    ----------
    comps : list of Component
    wave_m : ndarray, wavelengths, any shape
    u_m, v_m : ndarray, broadcastable with wave_m, metres
    fibre_fwhm_rad : fibre acceptance FWHM at 2.2 um, radians

    Returns
    -------
    flux : ndarray, shape of wave_m, sum_k F_k kappa_k(lambda)
    coherent : ndarray complex, broadcast shape, sum_k F_k kappa_k V_k(u, v) phasor_k
    """
    flux = 0.0
    coh = 0.0
    for c in comps:
        kappa = c.flux * fibre_coupling(c.x, c.y, wave_m, fibre_fwhm_rad)
        vis = point_phasor(u_m, v_m, wave_m, c.x, c.y)
        if c.diameter:
            vis = vis * uniform_disk_visibility(u_m, v_m, wave_m, c.diameter)
        flux = flux + kappa
        coh = coh + kappa * vis
    return flux, coh
