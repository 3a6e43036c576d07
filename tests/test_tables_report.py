# SPDX-License-Identifier: BSD-3-Clause
"""binary, tables and report stages on synthetic calibrated products written by the store.

The calibrated observables are drawn here from pipeline.skymodel.binary_visibility
with noise, written as ``calibrate`` products, and the three recipes run on them
through the store's ProductView, without the engine.
"""

import json

import numpy as np
import pytest
from astropy.table import Table

from pipeline.geometry import uvw_from_enu
from pipeline.skymodel import MAS, binary_visibility
from pipeline.stage import Array, Inputs, Unit
from pipeline.store import ProductView, write_product
from recipes import binary, report, tables

WAVE = np.linspace(2.0e-6, 2.4e-6, 16)
PAIRS = [(0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3)]
TRI = [(0, 1, 2), (0, 1, 3), (0, 2, 3), (1, 2, 3)]
TRUTH = dict(dra=7.0, ddec=-5.0, ratio=0.3, x1=1.2, y1=0.8)


def _calibrated(instrument, rng, hour_deg, mjd):
    uvw = uvw_from_enu(instrument.baseline_enu_m, np.deg2rad(hour_deg), np.deg2rad(-28.0),
                       np.deg2rad(instrument.site.latitude_deg))[0]
    vis = binary_visibility(uvw[:, 0, None], uvw[:, 1, None], WAVE, dx_rad=TRUTH["dra"] * MAS,
                            dy_rad=TRUTH["ddec"] * MAS, flux_ratio=TRUTH["ratio"],
                            x1_rad=TRUTH["x1"] * MAS, y1_rad=TRUTH["y1"] * MAS,
                            bandwidth_m=WAVE / 22,
                            fibre_fwhm_rad_at_2p2um=instrument.fibre_fwhm_mas_at_2p2um * MAS)
    t3 = np.array([np.angle(vis[PAIRS.index((i, j))] * vis[PAIRS.index((j, k))]
                            * np.conj(vis[PAIRS.index((i, k))])) for i, j, k in TRI])
    e = 0.01
    pb, pt = ("pol", "baseline", "wave"), ("pol", "triangle", "wave")
    cov_b = np.broadcast_to(np.eye(WAVE.size) * e ** 2, (1, 6, WAVE.size, WAVE.size)).copy()
    return {
        "vis2": Array(np.abs(vis)[None] ** 2 + rng.normal(0, e, (1, 6, WAVE.size)), pb),
        "vis2_err": Array(np.full((1, 6, WAVE.size), e), pb),
        "vis2_cov": Array(cov_b, pb + ("wave2",)),
        "t3phi": Array(t3[None] + rng.normal(0, e, (1, 4, WAVE.size)), pt, "rad"),
        "t3phi_err": Array(np.full((1, 4, WAVE.size), e), pt, "rad"),
        "visphi": Array(np.angle(vis)[None] + rng.normal(0, e, (1, 6, WAVE.size)), pb, "rad"),
        "visphi_err": Array(np.full((1, 6, WAVE.size), e), pb, "rad"),
        "uvw": Array(uvw, ("baseline", "uvw"), "m"), "wave": Array(WAVE, ("wave",), "m"),
        "band": Array(WAVE / 22, ("wave",), "m"),
        "object": "HD-KESSA-7", "mjd": mjd, "setup": "low", "polmode": "joint",
        "ra_deg": 83.3, "dec_deg": -28.0, "frac_rejected": 0.05}


@pytest.fixture(scope="module")
def night(tmp_path_factory, instrument):
    rng = np.random.default_rng(7)
    work = tmp_path_factory.mktemp("work")
    params = binary.BinaryParams(search_radius_mas=12.0, n_boot=8, n_start=3)
    views = []
    for k, hour in enumerate((-30.0, 0.0, 25.0)):
        label = f"FF_SCI_{k:03d}"
        cal = write_product(work / "calibrate" / f"{label}.c{k}.h5",
                            _calibrated(instrument, rng, hour, 61010.1 + hour / 360),
                            {"key": f"calibrate-c{k}"})
        unit = Unit(label=label, raw=(f"/night/{label}.fits",),
                    needs={"calibrated": ("calibrate", label)})
        out = binary.run(Inputs(unit=unit, raw=[], products={"calibrated": ProductView(cal)},
                                instrument=instrument, workdir=work), params)
        path = write_product(work / "binary" / f"{label}.b{k}.h5", out, {"key": f"binary-b{k}"})
        views.append(ProductView(path))
    qc = {"flat": {"profile_sigma": Array(1 + 0.02 * rng.normal(size=(24, 16)), ("trace", "x"))},
          "wavecal": {"wave_pixel": Array(np.broadcast_to(WAVE, (24, 16)).copy(), ("trace", "x"),
                                          "m"),
                      "wave_measured": Array(WAVE + 1e-10 * rng.normal(size=(24, 16)),
                                             ("trace", "x"), "m")},
          "combiner": {"condition": Array(3 + rng.random((1, 16)), ("pol", "wave"))},
          "reference": {"frame_valid": Array(rng.random((50, 6)) > 0.1, ("frame", "baseline")),
                        "label": "FF_SCI_000"}}
    qc_views = {s: ProductView(write_product(work / s / f"x.{s}.h5", d, {"key": s}))
                for s, d in qc.items()}
    return work, views, qc_views


def test_binary_product_recovers_truth(night):
    _, views, _ = night
    for v in views:
        a = v.attrs
        cov = np.array(json.loads(a["cov"]))
        d = np.array([a["dra"] - TRUTH["dra"], a["ddec"] - TRUTH["ddec"]])
        # 3-sigma ellipse: Mahalanobis d^2 < 11.8 (chi-square, 2 dof, 99.73 %; table value).
        assert d @ np.linalg.solve(cov, d) < 11.8
        assert abs(a["primary_dra"] - TRUTH["x1"]) < 3 * a["primary_dra_err"]
        assert a["bootstrap_kind"] == "covariance+channels" and a["has_phase"]
        assert json.loads(a["lmfit_params"])["dra"]["vary"] is True
        assert v["chi2_map"].shape == (v["grid_ddec"].size, v["grid_dra"].size)


def test_binary_rerun_reuses_the_kept_fit(night, instrument, monkeypatch):
    # The fixture's binary run kept each exposure's search, refinement and bootstraps in
    # WORK/binary/refined-cache. A flag threshold or the pointing error changed: the
    # stage re-summarises them without fitting; a parameter of the fit changed: it refits.
    # (The results equal a fresh fit's: tests/numerics/test_binary_fit.py.)
    import dataclasses
    from pipeline import binary_product as bp
    work, views, _ = night
    params = binary.BinaryParams(search_radius_mas=12.0, n_boot=8, n_start=3)
    label = "FF_SCI_000"
    unit = Unit(label=label, raw=(f"/night/{label}.fits",),
                needs={"calibrated": ("calibrate", label)})

    def run(p, workdir=work):
        cal = ProductView(work / "calibrate" / f"{label}.c0.h5")
        return binary.run(Inputs(unit=unit, raw=[], products={"calibrated": cal},
                                 instrument=instrument, workdir=workdir), p)
    kept = sorted((work / "binary" / binary.CACHE_DIR).glob("*.npz"))
    assert len(kept) == 6                         # per exposure: its search, its fit
    refits, searches = [], []
    monkeypatch.setattr(bp, "refine_binary", lambda obs, **kw: refits.append(kw) or
                        pytest.fail("refitted"))
    monkeypatch.setattr(bp, "grid_search", lambda obs, **kw: searches.append(kw) or
                        pytest.fail("searched"))
    same = run(params)
    first = views[0].attrs
    for k in ("dra", "ddec", "dra_err", "flux_ratio_err", "chi2", "lmfit_params", "flag"):
        assert same[k] == first[k], k
    assert np.array_equal(same["chi2_map"].data, views[0]["chi2_map"], equal_nan=True)
    looser = run(dataclasses.replace(params, ambiguous_dchi2=0.0, pointing_sigma_mas=6.0,
                                     phase_pointing_sigma_mas=2.0, chi2_red_max=1.0001))
    assert not looser["flag"] & 1                 # dchi2 / scale < 0 never holds
    assert looser["flux_ratio_err"] > same["flux_ratio_err"]
    assert bool(looser["flag"] & 8) == (looser["chi2_red"] > 1.0001)
    for k in ("dra", "ddec", "dra_err", "ddec_err", "chi2", "runner_up_dchi2"):
        assert looser[k] == same[k] or (k == "runner_up_dchi2" and np.isnan(same[k])), k
    assert refits == []
    with pytest.raises(pytest.fail.Exception, match="refitted"):
        run(dataclasses.replace(params, n_boot=9))
    # ... from the kept search (which a change of the search's own parameters redoes).
    assert len(refits) == 1 and refits[0]["n_boot"] == 9 and searches == []
    assert refits[0]["search"].chi2_map.shape == views[0]["chi2_map"].shape
    with pytest.raises(pytest.fail.Exception, match="searched"):
        run(dataclasses.replace(params, step_fraction=0.2))
    monkeypatch.undo()
    # Without the kept entries (the directory deleted) the stage fits again: same result.
    fresh = run(params, workdir=work / "elsewhere")
    assert fresh["dra"] == first["dra"] and fresh["flag"] == first["flag"]
    assert len(list((work / "elsewhere" / "binary" / binary.CACHE_DIR).glob("*.npz"))) == 2


def test_bad_calibrated_product_names_the_file(tmp_path, instrument, rng):
    from pipeline.errors import BadInput
    d = _calibrated(instrument, rng, 0.0, 61010.0)
    del d["t3phi"]
    path = write_product(tmp_path / "calibrate" / "broken.k.h5", d, {"key": "k"})
    unit = Unit(label="broken", raw=("/night/broken.fits",),
                needs={"calibrated": ("calibrate", "broken")})
    with pytest.raises(BadInput, match=r"broken\.k\.h5.*t3phi"):
        binary.run(Inputs(unit=unit, raw=[], products={"calibrated": ProductView(path)},
                          instrument=instrument, workdir=tmp_path), binary.BinaryParams())


def test_product_without_errors_names_the_problem(tmp_path, instrument, rng):
    from pipeline.errors import BadInput
    d = _calibrated(instrument, rng, 0.0, 61010.0)
    for k in ("vis2_err", "t3phi_err"):
        d[k] = Array(d[k].data * np.nan, d[k].axes)
    path = write_product(tmp_path / "noerr.k.h5", d, {"key": "k"})
    unit = Unit(label="noerr", raw=("/night/noerr.fits",))
    with pytest.raises(BadInput, match=r"noerr\.k\.h5: only 0 usable V2 and 0 closure"):
        binary.run(Inputs(unit=unit, raw=[], products={"calibrated": ProductView(path)},
                          instrument=instrument, workdir=tmp_path), binary.BinaryParams())


def test_tables_written_and_read_back(night, instrument):
    work, views, _ = night
    unit = Unit(label="night", needs={f"exp{k}": ("binary", "x") for k in range(3)})
    out = tables.run(Inputs(unit=unit, raw=[], products={f"exp{k}": v for k, v in enumerate(views)},
                            instrument=instrument, workdir=work), tables.TablesParams())
    assert out["n_rows"] == 3
    required = ["exposure", "target", "mjd", "jyear", "dra", "ddec", "dra_err", "ddec_err",
                "dra_ddec_corr", "sep", "sep_err", "pa", "pa_err", "flux_ratio",
                "flux_ratio_err", "chi2_red", "ndata", "flag", "primary_dra", "primary_ddec",
                "primary_dra_err", "primary_ddec_err", "ellipse_major", "ellipse_minor",
                "ellipse_pa"]
    units = {"mjd": "d", "jyear": "yr", "dra": "mas", "ddec_err": "mas", "sep": "mas",
             "pa": "deg", "pa_err": "deg", "ellipse_pa": "deg", "primary_ddec": "mas"}
    for ext in ("ecsv", "fits"):
        t = Table.read(work / f"astrometry.{ext}")
        assert set(required) <= set(t.colnames) and len(t) == 3
        for c, unit_ in units.items():
            assert str(t[c].unit) == unit_, (ext, c)
        assert t.meta["CODEVER"] and len(t.meta["CFGHASH"]) == 16
        assert "East of North" in t.meta["CONVENT"]
        # Julian epoch by its definition (IAU): J2000.0 + (JD - 2451545.0) / 365.25.
        np.testing.assert_allclose(t["jyear"], 2000 + (t["mjd"] + 2400000.5 - 2451545.0)
                                   / 365.25, atol=1e-9)
        np.testing.assert_allclose(np.hypot(t["dra"], t["ddec"]), t["sep"], rtol=1e-12)
        assert list(t["exposure"]) == [f"FF_SCI_{k:03d}.fits" for k in range(3)]
    csv = Table.read(work / "astrometry.csv", format="ascii.csv")
    assert set(required) <= set(csv.colnames) and len(csv) == 3


def test_report_html_and_pngs(night, instrument):
    work, views, qc = night
    needs = {f"binary:{k}": ("binary", "x") for k in range(3)}
    prods = {f"binary:{k}": v for k, v in enumerate(views)}
    prods.update({f"{s}:0": v for s, v in qc.items()})
    out = report.run(Inputs(unit=Unit(label="night", needs=needs), raw=[], products=prods,
                            instrument=instrument, workdir=work), report.ReportParams())
    page = (work / "report" / "index.html").read_text()
    assert out["index_html"].endswith("index.html") and "http" not in page.replace(
        "<!DOCTYPE html>", "")                  # self-contained: no network references
    pngs = sorted(p.name for p in (work / "report").glob("*.png"))
    assert len(pngs) == 3 + 2                   # one per exposure, night, calibration QC
    for name in pngs:
        assert f'src="{name}"' in page
        data = (work / "report" / name).read_bytes()
        # PNG signature (PNG specification, ISO/IEC 15948, section 5.2).
        assert data[:8] == b"\x89PNG\r\n\x1a\n"
        import matplotlib.image
        img = matplotlib.image.imread(work / "report" / name)
        assert img.ndim == 3 and img.shape[0] > 100 and img.shape[1] > 100


@pytest.fixture(scope="module")
def tiny_reduced(request):
    night, work, summary = request.getfixturevalue("tiny_work")   # shared (conftest.py)
    truth = json.loads((night / "truth.json").read_text())
    fits = [ProductView(p).attrs for p in sorted((work / "binary").glob("*.h5"))]
    return summary, work, [(a, truth["files"][a["exposure"]]) for a in fits]


@pytest.mark.slow
def test_tiny_night_astrometry_end_to_end(tiny_reduced):
    # Simulated `tiny` night against its truth file (docs/truth.md): the companion offset
    # within the 3-sigma ellipse (Mahalanobis d^2 < 11.8, 2 dof); tables and report written.
    summary, work, fits = tiny_reduced
    assert not [f for f in summary.failed if f[0] in ("binary", "tables", "report")]
    assert fits
    for a, t in fits:
        d = np.array([a["dra"] - t["companion_dra_mas"], a["ddec"] - t["companion_ddec_mas"]])
        d2 = d @ np.linalg.solve(np.array(json.loads(a["cov"])), d)
        print(f"{a['exposure']}: d = {d} mas, d2 = {d2:.2f}, errors {a['dra_err']:.4f} "
              f"{a['ddec_err']:.4f} mas, flux ratio {a['flux_ratio']:.4f} +- "
              f"{a['flux_ratio_err']:.4f} (truth {t['flux_ratio']:.4f}), flag {a['flag']}")
        assert d2 < 11.8
    assert (work / "astrometry.ecsv").is_file() and (work / "report" / "index.html").is_file()


@pytest.mark.slow
def test_tiny_night_flux_ratio_end_to_end(tiny_reduced):
    # Flux ratio within 3 sigma of the truth; its error includes the fibre-pointing term
    # (the calibrators' own pointing offsets enter through the phase zero-point).
    _, _, fits = tiny_reduced
    for a, t in fits:
        assert abs(a["flux_ratio"] - t["flux_ratio"]) < 3 * a["flux_ratio_err"]


# ---------------------------------------------------------------- report figure cache

def _variant(view, path, attrs=None, point=None, datasets=None):
    """A copy of a product with some attributes and/or datasets replaced, and/or one
    array element moved (``point`` = (dataset, index, added value))."""
    import shutil

    import h5py
    shutil.copyfile(view.path, path)
    with h5py.File(path, "r+") as f:
        for k, v in (attrs or {}).items():
            f.attrs[k] = v
        for k, v in (datasets or {}).items():
            del f[k]
            f[k] = v
        if point is not None:
            name, index, delta = point
            data = f[name][()]
            data[index] += delta
            f[name][...] = data
    return ProductView(path)


def _count_exposure_draws(monkeypatch):
    from pipeline import report as rep
    drawn = []
    draw = rep._ExposureFigure.draw

    def counting(self, d):
        drawn.append(d["attrs"]["exposure"])
        return draw(self, d)
    monkeypatch.setattr(rep._ExposureFigure, "draw", counting)
    return drawn


def _pixels(fig):
    import matplotlib.image
    from io import BytesIO
    buf = BytesIO()
    fig.savefig(buf, dpi=90, format="png")
    buf.seek(0)
    return matplotlib.image.imread(buf)


def test_reused_exposure_figure_draws_what_a_fresh_one_draws(night, tmp_path):
    # The reference is the figure drawn from scratch: redrawing another exposure on a
    # used figure must leave nothing of the previous one (limits, colours, colour bars,
    # runner-up marker, legends). The other exposure has two polarisations, another
    # wavelength range and no runner-up.
    from pipeline import report as rep
    _, views, _ = night
    two = {n: np.concatenate([views[2][n], views[2][n] * 0.98]) for n in
           ("vis2", "vis2_err", "t3phi", "t3phi_err")}
    other = _variant(views[2], tmp_path / "other.h5",
                     attrs={"runner_up_dra": np.nan, "chi2_red": 3.5},
                     datasets={"wave": views[2]["wave"] * 0.8, **two})
    inputs = [rep._exposure_inputs(v, v.attrs) for v in (views[0], other)]
    fresh = rep._ExposureFigure()
    expected = _pixels(fresh.draw(inputs[0]))
    fresh.close()
    used = rep._ExposureFigure()
    previous = _pixels(used.draw(inputs[1]))
    again = _pixels(used.draw(inputs[0]))
    used.close()
    assert previous.shape == expected.shape and np.abs(previous - expected).max() > 0
    np.testing.assert_array_equal(again, expected)


def test_figure_key_covers_every_drawn_value(night):
    # Each array element and each printed attribute the figure is drawn from enters the
    # key: moving any one of them by one floating-point step (numpy.nextafter) gives a
    # new key, so the cache cannot serve a figure of other values.
    from pipeline import report as rep
    _, views, _ = night
    d = rep._exposure_inputs(views[0], views[0].attrs)
    key = rep.figure_key("exposure", d)
    assert rep.figure_key("exposure", rep._exposure_inputs(views[0], views[0].attrs)) == key
    rng = np.random.default_rng(3)
    for name, value in d.items():
        if name == "attrs":
            continue
        moved = {**d, name: value.copy()}
        i = tuple(rng.integers(0, n) for n in value.shape)
        moved[name][i] = np.nextafter(moved[name][i], np.inf)
        assert rep.figure_key("exposure", moved) != key, name
    for name, value in d["attrs"].items():
        new = value + "x" if isinstance(value, str) else (
            value + 1 if isinstance(value, int) else np.nextafter(value, np.inf))
        assert rep.figure_key("exposure", {**d, "attrs": {**d["attrs"], name: new}}) != key
    assert rep.figure_key("night", d) != key


def test_report_redraws_exactly_the_figures_whose_values_changed(night, tmp_path,
                                                                  monkeypatch):
    import os

    from pipeline import report as rep
    _, views, _ = night
    out = tmp_path / "report"
    names = [f"exposure_{k:03d}.png" for k in range(3)]
    drawn = _count_exposure_draws(monkeypatch)

    def build(vs):
        drawn.clear()
        rep.build_report(out, vs)
        page = (out / "index.html").read_text()
        assert all(f'src="{n}"' in page for n in names)
        return [e for e in drawn], {n: os.stat(out / n) for n in names}, {
            n: (out / n).read_bytes() for n in names}

    first, st0, png0 = build(views)
    assert len(first) == 3
    # Products whose only change the figures do not show (their content key, as after
    # a rerun of the fit with a flag threshold that flips no flag): nothing is drawn and
    # the report's files are the same files (same inode, same modification time).
    rekeyed = [_variant(v, tmp_path / f"k{k}.h5", attrs={"key": f"other-{k}"})
               for k, v in enumerate(views)]
    again, st1, _ = build(rekeyed)
    assert again == []
    for n in names:
        assert (st1[n].st_ino, st1[n].st_mtime_ns) == (st0[n].st_ino, st0[n].st_mtime_ns)
    # A changed best-fit position (printed and plotted) and a changed flag (printed)
    # redraw those two exposures only; the third is the same file.
    moved = _variant(views[0], tmp_path / "dra.h5", attrs={"dra": views[0].attrs["dra"] + 0.5})
    flagged = _variant(views[1], tmp_path / "flag.h5", attrs={"flag": 8})
    changed, st2, png2 = build([moved, flagged, views[2]])
    assert changed == [views[0].attrs["exposure"], views[1].attrs["exposure"]]
    for n in names[:2]:
        assert st2[n].st_ino != st0[n].st_ino and png2[n] != png0[n]
    assert st2[names[2]].st_ino == st0[names[2]].st_ino
    # One squared visibility moved: that exposure alone is redrawn.
    point = _variant(views[2], tmp_path / "v2.h5", point=("vis2", (0, 0, 0), 0.05))
    changed, st3, png3 = build([moved, flagged, point])
    assert changed == [views[2].attrs["exposure"]] and png3[names[2]] != png0[names[2]]
    assert [st3[n].st_ino for n in names[:2]] == [st2[n].st_ino for n in names[:2]]
    # Cache entries the report no longer shows are gone; each figure is one entry (the
    # exposures' three, and the frame-rejection figure from the binaries' attributes).
    cached = sorted(p.name for p in (out / rep.CACHE_DIR).glob("exposure-*"))
    assert len(cached) == 3 and len(list((out / rep.CACHE_DIR).iterdir())) == 4
    assert {os.stat(out / rep.CACHE_DIR / c).st_ino for c in cached} == {
        st3[n].st_ino for n in names}
    # A new version of the drawing code redraws everything.
    monkeypatch.setattr(rep, "FIGURE_CODE_VERSION", rep.FIGURE_CODE_VERSION + 1)
    changed, _, _ = build([moved, flagged, point])
    assert len(changed) == 3


def test_report_stage_rerun_draws_nothing(night, instrument, tmp_path, monkeypatch):
    # The whole stage twice on the same products: the second run draws no figure (the
    # exposure figures, the night's astrometry and the calibration QC are all reused).
    from pipeline import report as rep
    work, views, qc = night
    prods = {f"binary:{k}": v for k, v in enumerate(views)}
    prods.update({f"{s}:0": v for s, v in qc.items()})
    unit = Unit(label="night", needs={f"binary:{k}": ("binary", "x") for k in range(3)})
    drawn = _count_exposure_draws(monkeypatch)
    figures = []
    for name in ("_draw_night", "_draw_qc"):
        monkeypatch.setattr(rep, name, lambda d, f=getattr(rep, name), n=name:
                            figures.append(n) or f(d))
    for _ in range(2):
        drawn.clear(), figures.clear()
        report.run(Inputs(unit=unit, raw=[], products=prods, instrument=instrument,
                          workdir=tmp_path), report.ReportParams())
        pngs = sorted(p.name for p in (tmp_path / "report").glob("*.png"))
        assert pngs == ["calibration_qc.png"] + [f"exposure_{k:03d}.png" for k in range(3)] + [
            "night_astrometry.png"]
        if _ == 0:
            assert len(drawn) == 3 and sorted(figures) == ["_draw_night", "_draw_qc"]
    assert drawn == [] and figures == []


def test_figure_stage_draws_what_the_report_publishes(night, instrument, tmp_path,
                                                       monkeypatch):
    # The figure units, run side by side on threads as the threads scheduler runs them,
    # draw each exposure's figure once into the report's cache; the report then draws no
    # exposure figure and publishes those very files, each byte for byte the figure the
    # report draws on its own.
    import os
    from concurrent.futures import ThreadPoolExecutor

    from pipeline import report as rep
    from recipes import figure
    _, views, _ = night
    rep.build_report(tmp_path / "alone", views)
    drawn = _count_exposure_draws(monkeypatch)

    def figure_unit(k):
        inputs = Inputs(unit=Unit(label=f"e{k}", needs={"fit": ("binary", "x")}), raw=[],
                        products={"fit": views[k]}, instrument=instrument, workdir=tmp_path)
        return figure.run(inputs, figure.FigureParams())["cache_entry"]

    with ThreadPoolExecutor(3) as pool:
        entries = list(pool.map(figure_unit, range(3)))
    assert len(drawn) == 3 and len(set(entries)) == 3
    drawn.clear()
    assert figure_unit(1) == entries[1] and drawn == []        # a rerun draws nothing
    rep.build_report(tmp_path / "report", views)
    assert drawn == []
    for k, entry in enumerate(entries):
        name = f"exposure_{k:03d}.png"
        published = tmp_path / "report" / name
        assert os.path.samefile(published, tmp_path / "report" / rep.CACHE_DIR / entry)
        assert published.read_bytes() == (tmp_path / "alone" / name).read_bytes()
