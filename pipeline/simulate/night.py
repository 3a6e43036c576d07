# SPDX-License-Identifier: BSD-3-Clause
"""Simulate one night: plan the exposures, draw the true instrument, write every raw file
and ``truth.json``.

Entry point: :func:`simulate_night`. The phase model is the one of DEVELOPERS.md:
science coherent flux ~ V_sc exp(-2 pi i (r_j - r_i + d_j - d_i) / lambda), fringe tracker
~ V_ft exp(-2 pi i (r_j - r_i) / lambda), d_i = w_i(s_sc) - w_i(s_ft) + m_i with the
internal path m_i = -(w_i(s_sc) - w_i(s_ft)) + drift_i, metrology PATH_i = m_i + c_i + noise.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np

from ..instrument import load_instrument
from .combine import detected
from .detector import read_out
from .header import ft_pointing, primary_cards
from .light import DarkLight, LampLight, OnSkyLight, PixelFlatLight, timing
from .plan import Planned, plan_night
from .scenario import load_scenario
from .sky import field_components
from ..skymodel import fibre_coupling
from .world import SCAN_RATIOS, World
from .writer import write_exposure

__all__ = ["simulate_night", "plan_night", "SCAN_RATIOS"]

ON_SKY = ("sky", "calibrator", "science")
FT_CHUNK = 2000          # fringe-tracker frames per step


def _simulate_exposure(w: World, p: Planned, night: Path, seed: int) -> dict:
    """Write one raw file and return its truth entry."""
    e, inst, sc = p.exp, w.inst, w.sc
    rng = np.random.default_rng([seed, p.expno])
    ch = w.channels[(e.setup, e.polmode)]
    prof = w.profiles[(e.setup, e.polmode)]
    on_sky = e.kind in ON_SKY
    tim = timing(e, inst.fringe_tracker.frame_period_s,
                 None if on_sky or e.kind == "lamp-scan" else sc.sampling["calib_ft_max_s"])
    tg = w.targets.get(e.target) if e.target else None
    ft_pos = ft_pointing(tg) if tg is not None and on_sky else (0.0, 0.0)
    if on_sky:
        light = OnSkyLight(w, ch, e.kind, p.start, tg, ft_pos, tim, rng)
    elif e.kind == "dark":
        light = DarkLight(w)
    elif e.kind == "pixel-flat":
        light = PixelFlatLight(w, float(sc.calibration[e.setup].get("pixel_flat_e", 2.0e4)),
                               (inst.detectors["science"].n_y, ch.n_pix))
    else:
        step = sc.calibration[e.setup]["scan_step_um"] * 1e-6
        light = LampLight(w, ch, e.kind, e.lamp_beam, step, tim, rng)
    truth = {"kind": e.kind, "expno": p.expno, "setup": e.setup, "polmode": e.polmode,
             "channel": ch.label, "dit_s": e.dit, "nframe": e.nframe, "date_obs": p.start.isot,
             **light.truth}

    # fringe-tracker frames (all in memory: 288 bytes per millisecond)
    ft_counts = np.empty((tim.n_ft, inst.combiner.n_output, inst.fringe_tracker.n_wave),
                         np.uint16)
    for n0 in range(0, tim.n_ft, FT_CHUNK):
        n1 = min(tim.n_ft, n0 + FT_CHUNK)
        counts = np.broadcast_to(light.ft(n0, n1), (n1 - n0,) + ft_counts.shape[1:])
        ft_counts[n0:n1] = read_out(w.ft_det, counts, tim.period, rng)[0]

    # science cube, streamed chunk by chunk
    n_y = inst.detectors["science"].n_y
    window = (slice(0, n_y), slice(0, ch.n_pix))
    chunk = sc.sampling["chunk_frames"]
    cosmics = []

    def chunks():
        for f0 in range(0, e.nframe, chunk):
            f1 = min(e.nframe, f0 + chunk)
            if isinstance(light, PixelFlatLight):
                img = light.image(f0, f1)
            else:
                counts = detected(ch, *light.science(f0, f1))                 # (f, trace, x)
                counts = np.broadcast_to(counts, (f1 - f0,) + counts.shape[1:])
                img = np.einsum("ftx,tyx->fyx", counts, prof)
            raw, hits = read_out(w.sci_det, img, e.dit, rng, window=window)
            cosmics.extend([[h[0] + f0, h[1], h[2]] for h in hits])
            yield raw

    write_exposure(night / p.filename, primary_cards(w, p, tg, ft_pos, light.rate),
                   (e.nframe, n_y, ch.n_pix), chunks(), (tim.t_start, np.full(e.nframe, e.dit)),
                   tim.ft_time, ft_counts, light.metrology)
    truth["cosmic_hits"] = cosmics
    if on_sky and e.kind != "sky":
        truth.update(_target_truth(w, tg, tim.t_start, e.dit, truth["ft_events"]))
        truth["frame_coherence_2p2um"] = np.concatenate(light.coherence).round(5).tolist()
    return truth


def _target_truth(w, tg, t_start, dit, events):
    out = {"object": tg.name, "primary_offset_mas": list(tg.primary_offset_mas),
           "companion_dra_mas": tg.companion_mas[0] if tg.companion_mas else None,
           "companion_ddec_mas": tg.companion_mas[1] if tg.companion_mas else None,
           "flux_ratio": tg.flux_ratio, "diameter_mas": tg.diameter_mas,
           "kmag": tg.kmag, "ft_object": tg.ft_name, "ft_kmag": tg.ft_kmag,
           "ft_offset_arcsec": list(tg.ft_offset_arcsec)}
    comps = field_components(tg)
    out["coupling_2p2um"] = [float(fibre_coupling(c.x, c.y, 2.2e-6, w.fibre_fwhm)) for c in comps]
    rejected = []
    for f, t0 in enumerate(t_start):
        if any(ev["t_start"] < t0 + dit and ev["t_end"] > t0 for ev in events):
            rejected.append(f)
    out["rejected_frames"] = rejected
    return out


def _exposure_list(files: dict) -> list:
    """One flat record per file, in time order: the summary orbit-fit checks read."""
    from astropy.time import Time
    out = []
    for name, f in files.items():
        rec = {"file": name, "kind": f["kind"], "mjd": float(Time(f["date_obs"]).mjd)}
        if "primary_offset_mas" in f:
            rec.update({"object": f["object"], "companion_dra_mas": f["companion_dra_mas"],
                        "companion_ddec_mas": f["companion_ddec_mas"],
                        "flux_ratio": f["flux_ratio"],
                        "primary_dra_mas": f["primary_offset_mas"][0],
                        "primary_ddec_mas": f["primary_offset_mas"][1],
                        "diameter_mas": f["diameter_mas"]})
        out.append(rec)
    return sorted(out, key=lambda r: r["mjd"])


def _instrument_truth(w: _World) -> dict:
    out = {"channels": {}}
    for (setup, polmode), ch in list(w.channels.items()) + [(("ft", ""), w.ft)]:
        d = {"n_pol": ch.n_pol, "trace_output": ch.output.tolist(), "trace_pol": ch.pol.tolist(),
             "wave_pixel_m": ch.eff_wave.tolist(), "bandwidth_pixel_m": ch.bandwidth.tolist(),
             "lsf_fwhm_px": ch.lsf_fwhm_px.tolist(), "dispersion": ch.dispersion,
             "combiner_laws": [law.to_json() for law in ch.laws]}
        d.update({k: v.tolist() for k, v in ch.pixel_truth().items()})
        if ch.trace_y is not None:
            d["trace_y_px"] = ch.trace_y.round(4).tolist()
            d["trace_sigma_px"] = ch.trace_sigma.round(4).tolist()
        out["channels"][ch.label] = d
    for name, det in (("science", w.sci_det), ("ft", w.ft_det)):
        out.setdefault("detectors", {})[name] = {
            "gain_e_per_adu": det.gain, "read_noise_e": det.read_noise,
            "saturation_adu": det.saturation, "bias_mean_adu": float(det.bias.mean()),
            "hot_pixels": np.argwhere(det.hot).tolist(), "dead_pixels": np.argwhere(det.dead).tolist(),
            "hot_dark_e_per_s": det.dark[det.hot].round(3).tolist(),
            "pixel_response": det.response.round(5).tolist()}
    out["lamp_beam_factor"] = w.lamp_beam.tolist()
    out["metrology_zero_m"] = w.metro_zero.tolist()
    out["metrology_drift"] = {"form": "amp_m * sin(2 pi t / period_s + phase_rad), t in s "
                                      "since start_utc", "amp_m": w.drift_amp.tolist(),
                              "period_s": w.drift_period.tolist(),
                              "phase_rad": w.drift_phase.tolist()}
    return out


def simulate_night(night_dir, *, scenario: str | os.PathLike = "tiny", seed: int = 0) -> Path:
    """Write every raw FITS file of a simulated night and ``truth.json`` into ``night_dir``.

    Parameters
    ----------
    night_dir : str or os.PathLike, created if needed
    scenario : a name in ``calib/scenarios/`` (without ``.toml``) or a path to a TOML file
    seed : int, the whole night is a deterministic function of (scenario, seed)

    Returns
    -------
    pathlib.Path of ``night_dir``
    """
    sc = load_scenario(scenario)
    inst = load_instrument()
    night = Path(night_dir)
    night.mkdir(parents=True, exist_ok=True)
    plan = plan_night(sc, inst)
    world = World(sc, inst, seed, plan)
    files = {}
    for p in plan:
        files[p.filename] = _simulate_exposure(world, p, night, seed)
    truth = {"schema": "twinfield-truth/1", "scenario": sc.name, "seed": seed,
             "start_utc": sc.start_utc,
             "photometry": {"vega_k_flambda_w_m2_um": 4.5e-10, "note": "zero point from memory; "
                            "throughput an assumption", **sc.photometry},
             "instrument": _instrument_truth(world), "files": files,
             "exposures": _exposure_list(files)}
    tmp = night / "truth.json.part"
    tmp.write_text(json.dumps(truth, indent=1))
    os.replace(tmp, night / "truth.json")
    return night
