# SPDX-License-Identifier: BSD-3-Clause
"""Pulls of calibrated V2 and closure phases against a simulated night's truth.

``python -m pipeline.truth_pulls NIGHT WORK [-v]`` reads every ``calibrate`` product
of ``WORK`` (the newest per exposure), evaluates the truth model of its exposure
(``pipeline.skymodel.binary_visibility`` with the truth file's companion offset,
flux ratio, primary offset and diameter, the fibre attenuation and the product's
bandwidths; docs/truth.md) and prints the mean and width of
(measured - model) / error over the night. A diagnostic for simulated nights
only: the reduction never reads the truth file.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

import numpy as np

from .instrument import load_instrument
from .skymodel import MAS, binary_visibility
from .store import ProductView

__all__ = ["model_visibility", "product_pulls", "night_pulls"]


def model_visibility(file_truth: dict, uvw, wave, band, instrument) -> np.ndarray:
    """Truth visibility (baseline, wave) of one exposure (truth file entry)."""
    t = file_truth
    x1, y1 = (v * MAS for v in t["primary_offset_mas"])
    return binary_visibility(
        uvw[:, :1], uvw[:, 1:2], wave, dx_rad=(t.get("companion_dra_mas") or 0.0) * MAS,
        dy_rad=(t.get("companion_ddec_mas") or 0.0) * MAS, flux_ratio=t.get("flux_ratio") or 0.0,
        x1_rad=x1, y1_rad=y1, diameter1_rad=(t.get("diameter_mas") or 0.0) * MAS,
        bandwidth_m=band, fibre_fwhm_rad_at_2p2um=instrument.fibre_fwhm_mas_at_2p2um * MAS)


def product_pulls(view, file_truth: dict, instrument) -> tuple[np.ndarray, np.ndarray]:
    """V2 pulls (pol, baseline, wave) and closure-phase pulls (pol, triangle, wave)."""
    m = model_visibility(file_truth, view["uvw"], view["wave"], view["band"], instrument)
    k = {b: n for n, b in enumerate(instrument.combiner.baselines)}
    t3 = np.array([np.angle(m[k[(a, b)]] * m[k[(b, c)]] * np.conj(m[k[(a, c)]]))
                   for a, b, c in instrument.combiner.triangles])
    r2 = (view["vis2"] - np.abs(m) ** 2) / view["vis2_err"]
    rt = np.angle(np.exp(1j * (view["t3phi"] - t3))) / view["t3phi_err"]
    return r2, rt


def night_pulls(night: Path, work: Path, *, verbose: bool = False) -> dict:
    """Pull statistics over every calibrated exposure of ``work``."""
    inst = load_instrument()
    truth = json.loads((Path(night) / "truth.json").read_text())
    newest: dict[str, Path] = {}
    for p in (Path(work) / "calibrate").glob("*.h5"):
        lab = p.name.split(".")[0]
        if lab not in newest or p.stat().st_mtime > newest[lab].stat().st_mtime:
            newest[lab] = p
    p2, pt = [], []
    for lab, p in sorted(newest.items()):
        view = ProductView(p)
        if "vis2" not in view:
            continue
        r2, rt = product_pulls(view, truth["files"][f"{lab}.fits"], inst)
        if verbose:
            print(f"{lab} {view.attrs.get('object', '')}: V2 {np.nanmean(r2):+.2f} "
                  f"+- {np.nanstd(r2):.2f}, T3 {np.nanmean(rt):+.2f} +- {np.nanstd(rt):.2f}")
        p2.append(r2.ravel())
        pt.append(rt.ravel())
    if not p2:
        raise SystemExit(f"no calibrate product in {work}")
    p2, pt = np.concatenate(p2), np.concatenate(pt)
    return {"n_exposure": len(newest), "n_vis2": int(np.isfinite(p2).sum()),
            "vis2_mean": float(np.nanmean(p2)), "vis2_std": float(np.nanstd(p2)),
            "t3phi_mean": float(np.nanmean(pt)), "t3phi_std": float(np.nanstd(pt))}


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("night", type=Path)
    ap.add_argument("work", type=Path)
    ap.add_argument("-v", "--verbose", action="store_true")
    a = ap.parse_args(argv)
    s = night_pulls(a.night, a.work, verbose=a.verbose)
    print(f"{s['n_exposure']} exposures: calibrated V2 pulls mean {s['vis2_mean']:+.2f} "
          f"width {s['vis2_std']:.2f} (n={s['n_vis2']}); closure phases mean "
          f"{s['t3phi_mean']:+.2f} width {s['t3phi_std']:.2f}")


if __name__ == "__main__":
    main()
