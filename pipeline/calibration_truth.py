# SPDX-License-Identifier: BSD-3-Clause
"""Spectral and combiner calibrations of a simulated night against its truth.json.

``python -m pipeline.calibration_truth NIGHT WORK [--json FILE]`` prints, per channel,
the errors of the ``wavecal`` and ``combiner`` products against the truth the
simulator wrote (docs/truth.md): effective wavelengths and bandwidths per pixel,
transmissions, contrasts and phase shifts at every wavelength, and the visibility
of an unresolved source (no atmosphere, no fringe-tracker residual) synthesised
here from the true combiner and inverted with the calibrated and with the nominal
P2VM.

The forward model below is written from the combiner equation of DEVELOPERS.md
and the truth's documented chromatic laws; it shares nothing with the simulator or
with the reduction's inverse code except the instrument description (which outputs
see which telescope pair, and the nominal phases and transmissions).
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

import numpy as np

from .instrument import Instrument, load_instrument
from .numerics.combiner_model import build_v2pm, weighted_pinv
from .store import ProductView, products_of

__all__ = ["true_laws", "unit_source_intensities", "visibilities", "nominal_p2vm",
           "channel_errors", "night_errors"]

BASELINES = [(0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3)]


def true_laws(law: dict, wave, pairs):
    """The true combiner's laws (docs/truth.md, ``combiner_laws``).

    wave : (output, n) m; pairs : (output, 2) telescopes of each output.
    Returns t (output, telescope, n) un-normalised transmissions, theta (output, n)
    rad, contrast (output, n).
    """
    wave = np.asarray(wave, float)
    xi = (wave - 2.2e-6) / 0.2e-6
    amp, tc = np.array(law["amp"]), np.array(law["t_chromatic"])
    ph, thn = np.array(law["theta_poly_rad"]), np.array(law["theta_nominal_rad"])
    n_out = len(pairs)
    t = np.zeros((n_out, 4, wave.shape[-1]))
    for k, (i, j) in enumerate(pairs):
        for a, tel in ((0, i), (1, j)):
            t[k, tel] = law["t_nominal"] * amp[k, a] * (1 + tc[k, a, 0] * xi[k]
                                                        + tc[k, a, 1] * xi[k] ** 2)
    theta = thn[:, None] + ph[:, :1] + ph[:, 1:2] * xi + ph[:, 2:3] * xi ** 2
    c = np.clip(np.array(law["contrast_c0"])[:, None] + np.array(law["contrast_c1"])[:, None] * xi,
                *law["contrast_clip"])
    return t, theta, c


def unit_source_intensities(t, theta, c, pairs, flux):
    """Outputs (output, n) for an unresolved source, no atmosphere: C_ij = sqrt(F_i F_j),
    V = 1, from I_k = t_ki F_i + t_kj F_j + 2 sqrt(t_ki t_kj) c_k Re(C_ij e^{i theta_k})."""
    inten = np.zeros((len(pairs), t.shape[-1]))
    for k, (i, j) in enumerate(pairs):
        coh = np.sqrt(flux[i] * flux[j])
        inten[k] = (t[k, i] * flux[i] + t[k, j] * flux[j]
                    + 2 * np.sqrt(t[k, i] * t[k, j]) * c[k] * np.real(coh * np.exp(1j * theta[k])))
    return inten


def visibilities(p2vm, inten):
    """Complex visibilities (baseline, wave) from a P2VM (wave, unknown, output)."""
    x = np.einsum("wuk,kw->uw", p2vm, inten)
    f = x[:4]
    coh = x[4:10] + 1j * x[10:]
    return np.stack([coh[b] / np.sqrt(f[i] * f[j]) for b, (i, j) in enumerate(BASELINES)])


def nominal_p2vm(instrument: Instrument, n_wave: int):
    """The uncalibrated P2VM: nominal shares, unit contrast, nominal phases (wave, 16, 24)."""
    comb = instrument.combiner
    pairs = comb.output_pair
    t = np.zeros((1, len(pairs), 4, n_wave))
    for k, (i, j) in enumerate(pairs):
        t[0, k, [i, j]] = comb.nominal_transmission
    t = t / t.sum(axis=1, keepdims=True)
    th = np.asarray(comb.output_nominal_phase_rad)[None, :, None] * np.ones((1, 1, n_wave))
    return weighted_pinv(build_v2pm(t, np.ones((1, len(pairs), n_wave)), th, pairs))[0]


def _rel(a, b):
    return np.asarray(a, float) / np.asarray(b, float) - 1


def channel_errors(truth: dict, label: str, wavecal, combiner, instrument: Instrument) -> dict:
    """Errors of one channel's calibrations against the truth (fractions and degrees)."""
    tr = truth["instrument"]["channels"][label]
    pairs = np.asarray(instrument.combiner.output_pair)
    out = {}
    rel_w = _rel(wavecal["wave_pixel"], tr["wave_pixel_m"])
    rel_b = _rel(wavecal["bandwidth_pixel"], tr["bandwidth_pixel_m"])
    out["wave_rel_rms"] = float(np.sqrt(np.nanmean(rel_w ** 2)))
    out["bandwidth_rel_rms"] = float(np.sqrt(np.nanmean(rel_b ** 2)))
    out["bandwidth_rel_max"] = float(np.nanmax(np.abs(rel_b)))
    n_pol = int(tr["n_pol"])
    per_pixel = label == "ft"          # calibrated per pixel; the pixel response is in t
    acc = {k: [] for k in ("t", "c", "ph", "amp", "vph", "nom_amp", "nom_ph")}
    for p in range(n_pol):
        if per_pixel:
            wave = np.asarray(tr["wave_pixel_m"], float)
        else:
            wave = np.broadcast_to(combiner["wave"], (len(pairs), combiner["wave"].size))
        t, theta, c = true_laws(tr["combiner_laws"][p], wave, pairs)
        if per_pixel:
            resp = np.asarray(truth["instrument"]["detectors"]["ft"]["pixel_response"], float)
            t = t * resp[:, None, :]
        share = t / t.sum(axis=0, keepdims=True)      # the product's documented normalisation
        k = np.arange(len(pairs))
        for a in (0, 1):
            acc["t"].append(_rel(combiner["transmission"][p][k, pairs[:, a]],
                                 share[k, pairs[:, a]]))
        acc["c"].append(_rel(combiner["contrast"][p], c))
        acc["ph"].append(np.rad2deg(np.angle(np.exp(1j * (combiner["phase_shift"][p] - theta)))))
        flux = np.array([1.0e5, 0.8e5, 1.2e5, 0.9e5])[:, None] * np.ones((1, wave.shape[1]))
        inten = unit_source_intensities(t, theta, c, pairs, flux)
        vis = visibilities(combiner["p2vm"][p], inten)
        acc["amp"].append(np.abs(vis) - 1)
        acc["vph"].append(np.rad2deg(np.angle(vis)))
        nom = visibilities(nominal_p2vm(instrument, wave.shape[1]), inten)
        acc["nom_amp"].append(np.abs(nom) - 1)
        acc["nom_ph"].append(np.rad2deg(np.angle(nom)))
    for name, key in (("transmission", "t"), ("contrast", "c"), ("phase_deg", "ph"),
                      ("unit_vis_amp", "amp"), ("unit_vis_phase_deg", "vph"),
                      ("nominal_vis_amp", "nom_amp"), ("nominal_vis_phase_deg", "nom_ph")):
        v = np.concatenate([np.ravel(a) for a in acc[key]])
        out[f"{name}_rms"] = float(np.sqrt(np.nanmean(v ** 2)))
        out[f"{name}_max"] = float(np.nanmax(np.abs(v)))
    return out


def night_errors(night_dir, work_dir, *, instrument: Instrument | None = None) -> dict:
    """{channel label: errors} for every channel that has wavecal and combiner products."""
    instrument = instrument or load_instrument()
    truth = json.loads((Path(night_dir) / "truth.json").read_text())
    out = {}
    for label in truth["instrument"]["channels"]:
        wc, cb = products_of(work_dir, "wavecal", label), products_of(work_dir, "combiner", label)
        if wc and cb:
            out[label] = channel_errors(truth, label, ProductView(wc[-1]), ProductView(cb[-1]),
                                        instrument)
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(prog="python -m pipeline.calibration_truth", description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("night_dir")
    ap.add_argument("work_dir")
    ap.add_argument("--json", help="also write the figures to this file")
    args = ap.parse_args(argv)
    res = night_errors(args.night_dir, args.work_dir)
    if not res:
        print("no wavecal/combiner products found")
        return 1
    keys = list(next(iter(res.values())))
    print(f"{'figure':28s}" + "".join(f"{lab:>20s}" for lab in res))
    for k in keys:
        pct = not k.startswith(("phase", "unit_vis_phase", "nominal_vis_phase"))
        row = "".join(f"{v[k] * (100 if pct else 1):>19.3g}{'%' if pct else ' '}"
                      for v in res.values())
        print(f"{k:28s}{row}")
    if args.json:
        Path(args.json).write_text(json.dumps(res, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
