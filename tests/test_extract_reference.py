# SPDX-License-Identifier: BSD-3-Clause
"""The ``extract`` and ``reference`` stages on the simulated tiny night.

The master darks come from the ``dark`` stage on the night's dark frames. The
flat, wavelength and combiner products are built here from the simulator's
truth file (trace centres and widths, pixel wavelengths, per-output
transmissions, phase shifts and contrasts) with the combiner equation of
DEVELOPERS.md, so these tests check extraction and referencing alone,
independently of the calibration stages. The expected answers come from the
truth file (frame coherence, calibrator diameter and offset, metrology zero
points) and the standard uniform-disk formula.
"""

import json
from pathlib import Path

import numpy as np
import pytest
from astropy.time import Time
import astropy.units as u

from pipeline.errors import BadInput, MissingCalibration
from pipeline.geometry import hour_angle_rad, uvw_from_enu
from pipeline.inventory import Inventory, dark_label, ft_dark_label, sci_channel
from pipeline.rawio import RawExposure
from pipeline.skymodel import MAS, point_phasor, uniform_disk_visibility
from pipeline.stage import Inputs, Unit
from pipeline.store import ProductView, write_product
from recipes import dark, extract, reference

BASELINES = [(0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3)]
I, J = np.array(BASELINES).T


def v2pm_from_truth(trans, theta, contrast):
    """I_k = sum_i t_ki F_i + 2 sqrt(t_ki t_kj) c_k (Re C cos theta - Im C sin theta)
    (DEVELOPERS.md). trans (pol, output, tel, w); theta, contrast (pol, output, w)
    -> (pol, w, output, 16)."""
    n_pol, n_out, _, n_w = trans.shape
    v = np.zeros((n_pol, n_w, n_out, 16))
    v[..., :4] = trans.transpose(0, 3, 1, 2)
    for k in range(n_out):
        b = k // 4
        i, j = BASELINES[b]
        amp = 2 * np.sqrt(trans[:, k, i] * trans[:, k, j]) * contrast[:, k]
        v[:, :, k, 4 + b] = amp * np.cos(theta[:, k])
        v[:, :, k, 10 + b] = -amp * np.sin(theta[:, k])
    return v


def frame_uvw(ext, instrument):
    """(u, v, w) of every baseline at each science frame's mid-time, (frame, baseline, 3) m."""
    mid = ext["frame_start"] + 0.5 * ext["frame_exp"]
    t = Time(ext.attrs["date_obs"], scale="utc") + mid * u.s
    h = hour_angle_rad(t, ext.attrs["ra_deg"], instrument.site.longitude_deg)
    return uvw_from_enu(instrument.baseline_enu_m, h, np.deg2rad(ext.attrs["dec_deg"]),
                        np.deg2rad(instrument.site.latitude_deg))


def expected_phasor(ext, instrument, file_truth, night_truth):
    """Calibrator phasor about the science fibre (primary offset, pipeline.skymodel sign
    convention) times the metrology zero-point exp(2 pi i (c_j - c_i) / lambda),
    (frame, baseline, wave)."""
    uvw, wave = frame_uvw(ext, instrument), ext["wave"]
    x, y = (v * MAS for v in file_truth["primary_offset_mas"])
    zero = np.array(night_truth["instrument"]["metrology_zero_m"])
    return (point_phasor(uvw[..., 0, None], uvw[..., 1, None], wave, x, y)
            * np.exp(2j * np.pi * (zero[J] - zero[I])[:, None] / wave))


class Product(dict):
    """A stand-in product: arrays by name plus attributes."""

    def __init__(self, *args, attrs=None, **kw):
        super().__init__(*args, **kw)
        self.attrs = dict(attrs or {})


def calibrated_night(night, instrument):
    """Inventory, truth and the calibration products of a simulated night."""
    night = Path(night)
    truth = json.loads((night / "truth.json").read_text())
    inv = Inventory.scan(night)
    darks = inv.select("dark")

    def run_dark(meta, recs):
        out = dark.run(Inputs(Unit("d", meta=meta), [RawExposure(r.path) for r in recs], {},
                              instrument), dark.DarkParams())
        return Product({k: out[k].data for k in ("master", "read_noise", "valid")},
                       attrs={"n_frame": out["n_frame"]})

    sci_dark = run_dark({"channel": "sci", "dit": 0.1}, [r for r in darks if r.dit == 0.1])
    ft_dark = run_dark({"channel": "ft", "period": 0.001}, darks)
    ch = truth["instrument"]["channels"]["sci-low-joint"]
    wp = np.array(ch["wave_pixel_m"])
    grid = np.linspace(wp[:, 0].max(), wp[:, -1].min(), wp.shape[1] - 2)
    tr, th, co = (np.array(ch[k]) for k in ("transmission", "phase_shift_rad", "contrast"))
    # per-pixel truth of each output (joint: trace = output) interpolated to the grid
    tr_g = np.array([[[np.interp(grid, wp[k], tr[0, k, t]) for t in range(4)]
                      for k in range(24)]])
    th_g = np.array([[np.interp(grid, wp[k], th[0, k]) for k in range(24)]])
    co_g = np.array([[np.interp(grid, wp[k], co[0, k]) for k in range(24)]])
    resp = np.array(truth["instrument"]["detectors"]["science"]["pixel_response"])
    flat = Product(trace_y=np.array(ch["trace_y_px"]), profile_sigma=np.array(ch["trace_sigma_px"]),
                   pixel_response=resp[:, :wp.shape[1]], valid=np.ones((208, wp.shape[1]), bool))
    ft = truth["instrument"]["channels"]["ft"]
    ft_v2pm = v2pm_from_truth(*(np.array(ft[k]) for k in ("transmission", "phase_shift_rad",
                                                           "contrast")))
    products = {"dark": sci_dark, "ft_dark": ft_dark, "flat": flat,
                "wavecal": Product(wave_pixel=wp, wave_grid=grid),
                "combiner": Product(p2vm=np.linalg.pinv(v2pm_from_truth(tr_g, th_g, co_g))),
                "ft_combiner": Product(p2vm=np.linalg.pinv(ft_v2pm),
                                       wave=np.array(ft["wave_pixel_m"]).mean(0))}
    return dict(night=night, truth=truth, inv=inv, products=products)


@pytest.fixture(scope="module")
def night(tiny_night, instrument):
    return calibrated_night(tiny_night, instrument)


def upstream_units(inv):
    """Units the calibration stages would plan for this night (labels of DEVELOPERS.md)."""
    ch = [sci_channel(s, p) for s, p in inv.channels()]
    return {"dark": [Unit(dark_label(*k)) for k in inv.dark_groups()]
            + [Unit(ft_dark_label(k)) for k in inv.ft_dark_groups()],
            "flat": [Unit(c) for c in ch], "wavecal": [Unit(c) for c in ch],
            "combiner": [Unit(c) for c in ch] + [Unit("ft")]}


def extract_and_reference(night, rec, instrument, workdir, **ref_params):
    """Run both stages on one exposure through a written ``extract`` product."""
    units = extract.plan(night["inv"], extract.ExtractParams(), upstream_units(night["inv"]))
    unit = [x for x in units if x.label == rec.name][0]
    inputs = Inputs(unit, [RawExposure(p) for p in unit.raw], night["products"], instrument)
    out = extract.run(inputs, extract.ExtractParams(ft_frames_per_chunk=128))
    ext = ProductView(write_product(Path(workdir) / f"{rec.name}.h5", out, {"key": "k"}))
    ref = reference.run(Inputs(Unit(rec.name), [], {"extract": ext}, instrument),
                        reference.ReferenceParams(**ref_params))
    return unit, ext, {k: getattr(v, "data", v) for k, v in ref.items()}


@pytest.fixture(scope="module")
def calibrator(night, instrument, tmp_path_factory):
    rec = night["inv"].select("calibrator")[0]
    sky = night["inv"].select("sky")[0]
    unit, ext, ref = extract_and_reference(night, rec, instrument,
                                           tmp_path_factory.mktemp("extract"))
    assert unit.raw == (rec.path, sky.path)      # nearest sky of the same set-up and DIT
    return dict(rec=rec, ext=ext, ref=ref, truth=night["truth"]["files"][Path(rec.path).name])


def test_extract_product_contents(calibrator):
    ext = calibrator["ext"]
    n_frame = calibrator["rec"].nframe
    assert ext["flux"].shape == (n_frame, 1, 4, 22) and ext.axes("flux")[0] == "frame"
    assert ext["coherent"].dtype.kind == "c"
    assert ext["ft_coherent"].shape == (n_frame * 100, 6, 6)   # 1 kHz over n x 0.1 s
    assert np.isfinite(ext["coherent"]).all() and (ext["flux"] > 0).all()
    assert ext.attrs["background"] == "sky"
    assert (ext["coherent_var"] > 0).all() and (ext["ft_coherent_var"][:10] > 0).all()
    # times and metrology copied from the raw file (docs/raw_format.md: 1 ms FT frames)
    np.testing.assert_allclose(np.diff(ext["ft_time"]), 1e-3, rtol=1e-6)
    assert ext["metrology_path"].shape[1] == 4 and ext["station_enu"].shape == (4, 3)


def test_noise_is_honest_on_sky(night, instrument):
    """A sky exposure has no fringes: its coherent fluxes are pure noise, so their scatter
    must equal the propagated variance (detector noise through optimal extraction,
    resampling and the P2VM, plus the noise of the subtracted master dark)."""
    inv = night["inv"]
    rec = inv.select("sky")[0]
    unit = [x for x in extract.plan(inv, extract.ExtractParams(), upstream_units(inv))
            if x.label == rec.name][0]
    out = extract.run(Inputs(unit, [RawExposure(p) for p in unit.raw], night["products"],
                             instrument), extract.ExtractParams())
    c, v = out["coherent"].data, out["coherent_var"].data
    z = np.concatenate([(c.real / np.sqrt(v)).ravel(), (c.imag / np.sqrt(v)).ravel()])
    # 264 x N values (N frames), neighbouring wavelengths correlated by the resampling
    # (effective number ~ half): the std is known to <~3 %, so [0.9, 1.1] is > 3 sigma
    assert 0.9 < z.std() < 1.1, z.std()
    fc, fv = out["ft_coherent"].data.compute(), out["ft_coherent_var"].data.compute()
    zf = np.concatenate([(fc.real / np.sqrt(fv)).ravel(), (fc.imag / np.sqrt(fv)).ravel()])
    assert 0.96 < zf.std() < 1.04, zf.std()            # 7200 N values: +-4 % is > 4 sigma
    # the exposure mean: the per-frame noise averages down, the subtracted master's does not
    # (it is the same in every frame), so var(mean) = (var - var_common) / N + var_common
    vc, n = out["coherent_var_common"].data, c.shape[0]
    assert vc.shape == c.shape[1:] and (vc > 0).all() and (vc < v.min(axis=0)).all()
    # a pure-noise pixel: the master's variance is 1/n_frame (4 dark frames) of a frame's
    # own, so the common part is 1/(1 + 4) of coherent_var, a little less with the sky light
    assert 0.12 < np.median(vc / v.mean(axis=0)) < 0.21
    vm = (v.mean(axis=0) - vc) / n + vc
    cm = c.mean(axis=0)
    zm = np.concatenate([(cm.real / np.sqrt(vm)).ravel(), (cm.imag / np.sqrt(vm)).ravel()])
    # 264 values (~130 independent): the std is known to ~6 %; without the common term
    # the width would be sqrt((1/N + 1/4) / (1.25/N)), 1.26 for N = 4 frames, 1.55 for 8
    assert 0.85 < zm.std() < 1.15, zm.std()
    naive = np.concatenate([(cm.real / np.sqrt(v.mean(axis=0) / n)).ravel(),
                            (cm.imag / np.sqrt(v.mean(axis=0) / n)).ravel()])
    assert naive.std() > zm.std() * 1.1, (naive.std(), zm.std())


def test_contrast_loss_matches_truth(calibrator):
    """Per-frame contrast loss at 2.2 um against the simulator's frame coherence."""
    ref, truth = calibrator["ref"], calibrator["truth"]
    wave = calibrator["ext"]["wave"]
    k = np.argmin(np.abs(wave - 2.2e-6))
    expected = np.array(truth["frame_coherence_2p2um"])
    # the truth is |<sqrt(rho_i rho_j) exp(i phi)>| / sqrt(<rho_i><rho_j>) at 2.2 um (the FT
    # flux weighting estimates the coupling rho); FT phase noise at SNR ~15 (~15 nm of path)
    # and FT photometric noise leave ~0.5 % per frame: measured <= 0.016 on three seeds
    np.testing.assert_allclose(ref["contrast_loss"][:, :, k], expected, atol=0.025)
    assert expected.min() < 0.9                       # a real loss is being measured


def test_calibrator_is_point_like_after_correction(calibrator, instrument):
    ref, ext, truth = calibrator["ref"], calibrator["ext"], calibrator["truth"]
    assert ref["frame_valid"].all()                   # the tiny night has no FT events
    assert ref["ft_rejected_fraction"] == [0.0] * 6
    flux, c, loss = ext["flux"][:, 0], ref["coherent_ref"][:, 0], ref["contrast_loss"]
    # ratio of sums over frames (as the averaging stage does), per baseline and wavelength
    v = (np.abs(c).sum(0) / (loss * np.sqrt(flux[:, I] * flux[:, J])).sum(0))
    wave = ext["wave"]
    uvw = frame_uvw(ext, instrument).mean(axis=0)
    # uniform disk 2 J1(x)/x with the true diameter (Born & Wolf 8.5.2, pipeline.skymodel)
    v_ud = uniform_disk_visibility(uvw[:, 0, None], uvw[:, 1, None], wave,
                                   truth["diameter_mas"] * MAS)
    ratio = np.median(v / v_ud, axis=1)
    # |V| per frame and wavelength has ~3 % noise, so the median over 22 wavelengths of
    # the 4-frame ratio of sums is good to ~1 %; the truth-built P2VM (interpolated to
    # the grid) adds < 1 %. Hence [0.97, 1.03] (3 sigma).
    assert np.all((ratio > 0.97) & (ratio < 1.03)), ratio
    # without the contrast-loss correction it is visibly lower (frame coherence < 0.9)
    v_raw = np.abs(c).sum(0) / np.sqrt(flux[:, I] * flux[:, J]).sum(0)
    assert np.median(v_raw / v_ud) < np.median(ratio) - 0.05


def test_referenced_phase_equals_sky_phase(calibrator, night, instrument):
    """Referencing removes the residual path and the dual-field delay: what remains is the
    calibrator's own phase plus the metrology zero-point (truth)."""
    ref, ext = calibrator["ref"], calibrator["ext"]
    expected = expected_phasor(ext, instrument, calibrator["truth"], night["truth"])
    dphi = np.angle(ref["coherent_ref"][:, 0] * np.conj(expected))
    # per frame and wavelength: science phase noise (SNR ~ 30) and FT path noise
    # (~15 nm -> 0.04 rad) -> 0.25 rad is > 4 sigma; the mean is much tighter
    assert np.abs(dphi).max() < 0.25
    assert np.abs(np.angle(np.exp(1j * dphi).mean(axis=(0, 2)))).max() < 0.05
    # the metrology term is exercised: its zero points alone are tens of radians
    zero = np.array(night["truth"]["instrument"]["metrology_zero_m"])
    assert np.abs(2 * np.pi * (zero[J] - zero[I]) / ext["wave"].mean()).max() > 10


def test_bad_combiner_product_names_the_file(night, instrument):
    rec = night["inv"].select("calibrator")[0]
    products = dict(night["products"])
    products["combiner"] = Product(p2vm=np.zeros((1, 5, 16, 24)))
    inputs = Inputs(Unit(rec.name), [RawExposure(rec.path)], products, instrument)
    with pytest.raises(BadInput, match="p2vm"):
        extract.run(inputs, extract.ExtractParams())


def test_plans(night):
    inv = night["inv"]
    units = {x.label: x for x in extract.plan(inv, extract.ExtractParams(), upstream_units(inv))}
    on_sky = inv.select(("science", "calibrator", "sky"))
    assert set(units) == {r.name for r in on_sky}
    sky = inv.select("sky")[0]
    assert units[sky.name].raw == (sky.path,)          # a sky is not sky-subtracted
    assert units[sky.name].needs["ft_combiner"] == ("combiner", "ft")
    assert units[sky.name].meta["missing"] == []
    refs = reference.plan(inv, reference.ReferenceParams(), {})
    assert {x.label for x in refs} == {r.name for r in inv.select(("science", "calibrator"))}
    with pytest.raises(ValueError, match="clip"):
        extract.ExtractParams(clip=2.0)
    with pytest.raises(ValueError, match="max_group_delay_um"):
        reference.ReferenceParams(max_group_delay_um=100.0)


def test_missing_calibration_fails_its_exposure_only(night, instrument):
    inv = night["inv"]
    up = upstream_units(inv)
    up["combiner"] = [x for x in up["combiner"] if x.label == "ft"]   # no science combiner
    unit = extract.plan(inv, extract.ExtractParams(), up)[0]
    assert unit.meta["missing"] == ["combiner/sci-low-joint"]
    with pytest.raises(MissingCalibration, match="combiner/sci-low-joint") as err:
        extract.run(Inputs(unit, [RawExposure(p) for p in unit.raw], {}, instrument),
                    extract.ExtractParams())
    assert err.value.path == unit.raw[0]


EVENT_SEQUENCE = """
[[sequence]]
kind = "calibrator"
target = "Kessa-C1"
setup = "low"
dit = 0.1
nframe = 40
gap_s = 0.0
"""


@pytest.fixture(scope="module")
def events(instrument, tmp_path_factory):
    """A 4 s calibrator exposure with frequent fringe jumps and lock losses: the tiny
    scenario with the event rates raised to 40 per minute each (seed 1 draws four lock
    losses and two jumps of telescope 0)."""
    import re
    from pipeline.instrument import CALIB_DIR
    from pipeline.simulate import simulate_night
    text = (CALIB_DIR / "scenarios" / "tiny.toml").read_text()
    text, n = re.subn(r"(?m)^(jump|lockloss)_rate_per_min = .*$", r"\1_rate_per_min = 40.0", text)
    assert n == 2, "tiny.toml no longer sets both event rates"
    text = text[:text.index("[[sequence]]")] + EVENT_SEQUENCE
    root = tmp_path_factory.mktemp("events")
    (root / "events.toml").write_text(text.replace('name = "tiny"', 'name = "tiny-events"'))
    path = simulate_night(root / "night", scenario=root / "events.toml", seed=1)
    night = calibrated_night(path, instrument)
    rec = night["inv"].select("calibrator")[0]
    _, ext, ref = extract_and_reference(night, rec, instrument, root)
    return dict(night=night, ext=ext, ref=ref, truth=night["truth"]["files"][Path(rec.path).name])


def test_lock_losses_and_jumps_are_rejected(events, instrument):
    ref, ext, truth = events["ref"], events["ext"], events["truth"]
    valid = ref["frame_valid"]
    start, exp = ext["frame_start"], ext["frame_exp"]
    kinds = {e["kind"] for e in truth["ft_events"]}
    assert kinds == {"lock_loss", "jump"}
    # truth: a frame overlapping an event is spoilt on every baseline (lock loss) or on the
    # three baselines of the jumping telescope (its path moved by one FT wavelength)
    expected_bad = np.zeros(valid.shape, bool)
    for e in truth["ft_events"]:
        hit = (e["t_start"] < start + exp) & (e["t_end"] > start)
        tels = range(4) if e["telescope"] < 0 else [e["telescope"]]
        on = np.array([i in tels or j in tels for i, j in BASELINES])
        expected_bad |= hit[:, None] & on[None, :]
    assert not (valid & expected_bad).any()            # every spoilt frame is rejected
    # the guard band and running-median window (about 20 FT frames) may spill into the
    # next frame: allow a few false rejections, never more than 10 % of the clean frames
    false = ~valid & ~expected_bad
    assert false.sum() <= 0.1 * (~expected_bad).sum()
    # their exclusion matters: the kept frames have the sky phase, the rejected do not
    expected = expected_phasor(ext, instrument, truth, events["night"]["truth"])
    dphi = np.abs(np.angle(ref["coherent_ref"][:, 0] * np.conj(expected)))   # (frame, bl, w)
    assert dphi[np.broadcast_to(valid[..., None], dphi.shape)].max() < 0.25
    assert dphi[np.broadcast_to(expected_bad[..., None], dphi.shape)].max() > 1.0
    assert ref["lock_loss_fraction"] > 0 and ref["fringe_jump_fraction"] > 0
    assert max(ref["frame_rejected_fraction"]) > 0.3


@pytest.fixture(scope="module")
def reduced(request):
    """The tiny night through the engine, from raw frames to ``reference``, with the
    pipeline's own darks, flats, wavelength and combiner calibrations."""
    return request.getfixturevalue("tiny_work")     # shared (tests/conftest.py)


def test_engine_calibrator_point_like(reduced, instrument):
    night, work, summary = reduced
    assert not [f for f in summary.failed if f[0] in ("extract", "reference")], summary.failed
    truth = json.loads((night / "truth.json").read_text())
    rec = [r for r in Inventory.scan(night).records if r.kind == "calibrator"][0]
    (ext,) = [ProductView(p) for p in (work / "extract").glob(f"{rec.name}.*.h5")]
    (ref,) = [ProductView(p) for p in (work / "reference").glob(f"{rec.name}.*.h5")]
    t = truth["files"][f"{rec.name}.fits"]
    wave = ext["wave"]
    flux, c, loss = ext["flux"][:, 0], ref["coherent_ref"][:, 0], ref["contrast_loss"]
    v = np.abs(c).sum(0) / (loss * np.sqrt(flux[:, I] * flux[:, J])).sum(0)
    uvw = frame_uvw(ext, instrument).mean(axis=0)
    v_ud = uniform_disk_visibility(uvw[:, 0, None], uvw[:, 1, None], wave, t["diameter_mas"] * MAS)
    ratio = np.median(v / v_ud, axis=1)
    # as test_calibrator_is_point_like_after_correction, plus the calibration stages' own
    # errors (contrast and transmission from 3-4 lamp frames, ~1 %): [0.96, 1.03]
    assert np.all((ratio > 0.96) & (ratio < 1.03)), ratio
    k = np.argmin(np.abs(wave - 2.2e-6))
    np.testing.assert_allclose(loss[:, :, k], np.array(t["frame_coherence_2p2um"]), atol=0.025)
    # referencing with the pipeline's P2VMs: the phase is the same in every frame (the
    # zero-point now also holds the instrumental phases, calibrated later on a star)
    dphi = np.angle(c * np.conj(c.mean(axis=0)))
    assert np.abs(dphi).max() < 0.25
    assert ref["frame_valid"][()].all()


def test_extraction_weights_reproduce_optimal_extraction(rng):
    """The weights used for the common-noise variance are those of the optimal extraction
    (Horne 1986, PASP 98, 609): applied to a frame they give its fluxes, and a fixed error
    image of per-pixel variance vc added to every frame moves the exposure's mean flux with
    variance sum_y w^2 vc (checked by extracting 200 such draws)."""
    from pipeline.extract_frames import _extraction_weights
    from pipeline.numerics.extraction import optimal_extract
    from pipeline.numerics.traces import trace_profiles
    n_t, n_y, n_x, rn = 4, 50, 10, 5.0
    # traces 10 px apart, 1 px wide: no overlap (the weights neglect it)
    prof = trace_profiles(np.repeat(np.arange(10.0, 50.0, 10.0)[:, None], n_x, 1),
                          np.full((n_t, n_x), 1.0), n_y=n_y)
    flux = rng.uniform(200, 2000, size=(1, n_t, n_x))
    clean = np.einsum("kyx,fkx->fyx", prof, flux)
    frames = clean + rng.normal(size=(3,) + clean.shape[1:]) * np.sqrt(rn ** 2 + clean)
    var_pix = np.full((n_y, n_x), rn ** 2)
    ok = np.ones(frames.shape, bool)
    ext = optimal_extract(frames, prof, read_noise=rn, clip=50.0)
    w1 = _extraction_weights(ext.flux[:1], prof, var_pix, ok[:1])
    # the last fit used the previous iteration's model variance: ~1e-4 differences
    np.testing.assert_allclose(np.einsum("kyx,yx->kx", w1, frames[0]), ext.flux[0], rtol=1e-3)
    w_bar = _extraction_weights(ext.flux, prof, var_pix, ok) / 3
    predicted = np.einsum("kyx,yx->kx", w_bar ** 2, np.full((n_y, n_x), 4.0))
    shifts = [optimal_extract(frames + e, prof, read_noise=rn, clip=50.0).flux.mean(axis=0)
              - ext.flux.mean(axis=0) for e in rng.normal(size=(200, n_y, n_x)) * 2.0]
    measured = np.var(shifts, axis=0)
    # 200 draws x 40 values: the mean variance is known to ~2 %; allow 6 %
    np.testing.assert_allclose(measured.mean(), predicted.mean(), rtol=0.06)


def test_sky_background_is_the_master_dark_estimator_and_computed_once(tiny_night, tmp_path):
    """The sky subtracted from every on-sky exposure is the clipped mean of the master-dark
    estimator (numerics.darks.master_dark), computed once per file and process; a file
    that changes is read again."""
    import os
    import shutil
    from pipeline.extract_frames import _blocks, sky_background
    from pipeline.numerics.darks import master_dark
    sky_path = tmp_path / next(Path(tiny_night).glob("*_sky_*.fits")).name
    shutil.copy(next(Path(tiny_night).glob("*_sky_*.fits")), sky_path)
    raw = RawExposure(sky_path)
    pix = raw.science_pixels(16)
    expected = master_dark(lambda: _blocks(pix), dit=raw.dit).master
    first = sky_background(raw)
    np.testing.assert_array_equal(first, expected)
    assert sky_background(RawExposure(sky_path)) is first            # kept, not recomputed
    assert not first.flags.writeable
    st = os.stat(sky_path)
    os.utime(sky_path, ns=(st.st_atime_ns, st.st_mtime_ns + 10**9))  # touched: read again
    assert sky_background(RawExposure(sky_path)) is not first


def test_extraction_weights_return_the_fluxes_and_add_over_frames():
    # Optimal-extraction weights w = P V^-1 / sum_y P^2 V^-1 (Horne 1986, PASP 98, 609)
    # applied to a noise-free frame of separated traces give back each trace's flux, in
    # every column a trace covers; over frames the weights add (here two frames).
    from pipeline.extract_frames import _extraction_weights
    from pipeline.numerics.traces import trace_profiles
    rng = np.random.default_rng(2)
    n_y, n_x, n_tr = 60, 40, 4
    centres = np.linspace(8, 52, n_tr)[:, None] + 0.3 * np.sin(np.arange(n_x) / 7)
    prof = trace_profiles(centres, np.full((n_tr, n_x), 1.3), n_y=n_y)
    flux = rng.uniform(200, 2000, (2, n_tr, n_x))
    var_pix = rng.uniform(20, 40, (n_y, n_x))
    valid = np.ones((2, n_y, n_x), bool)
    valid[1, 30, 5] = False                                   # a bad pixel in frame 1
    both = _extraction_weights(flux, prof, var_pix, valid)
    for f in range(2):
        w = _extraction_weights(flux[f:f + 1], prof, var_pix, valid[f:f + 1])
        image = np.einsum("kyx,kx->yx", prof, flux[f]) * valid[f]
        np.testing.assert_allclose(np.einsum("kyx,yx->kx", w, image), flux[f], rtol=1e-9)
        both = both - w
    np.testing.assert_allclose(both, 0.0, atol=1e-12)
