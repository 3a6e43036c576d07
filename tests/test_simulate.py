# SPDX-License-Identifier: BSD-3-Clause
"""The night simulator: raw format (docs/raw_format.md), reproducibility, photon
statistics, lamp physics and truth, checked against the format document, standard
formulas and the truth file."""

import json
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits

from pipeline.errors import ConfigError
from pipeline.geometry import hour_angle_rad, uvw_from_enu
from pipeline.simulate import load_scenario, simulate_night
from pipeline.simulate.scenario import SCENARIO_DIR
from astropy.time import Time, TimeDelta

# Primary keywords of docs/raw_format.md and their types.
COMMON = {"DATE-OBS": str, "MJD-OBS": float, "EXPTIME": float, "OBJECT": str, "RA": float,
          "DEC": float, "RADESYS": str, "TELESCOP": str, "INSTRUME": str, "FRAMEKND": str,
          "SPECSET": str, "POLMODE": str, "SCDIT": float, "NFRAME": int, "FTPERIOD": float,
          "LAMPTEL": int, "STATION1": str, "STATION2": str, "STATION3": str, "STATION4": str,
          "FTOBJECT": str, "FTRA": float, "FTDEC": float, "AMBTEMP": float, "AMBPRES": float,
          "AMBHUM": float, "SEEING": float, "COHTIME": float, "EXPNO": int}
WITH_METROLOGY = {"lamp-scan", "sky", "calibrator", "science"}


def _files(night):
    return sorted(Path(night).glob("*.fits"))


def _truth(night):
    return json.loads((Path(night) / "truth.json").read_text())


def _science_minus_dark(night):
    """Truth, science channel and detector truth, the science file, its truth entry and
    its frames minus the mean dark of the same DIT (ADU)."""
    truth = _truth(night)
    ch = truth["instrument"]["channels"]["sci-low-joint"]
    det = truth["instrument"]["detectors"]["science"]
    sci = _by_kind(night, "science")[0]
    tf = truth["files"][sci.name]
    dit = fits.getheader(sci)["SCDIT"]
    dark = [f for f in _by_kind(night, "dark") if fits.getheader(f)["SCDIT"] == dit][0]
    frames = (fits.getdata(sci, "SCI_PIX").astype(float)
              - fits.getdata(dark, "SCI_PIX").astype(float).mean(0))
    return truth, ch, det, sci, tf, frames


def _by_kind(night, kind):
    return [f for f in _files(night) if fits.getheader(f)["FRAMEKND"] == kind]


def test_every_frame_kind_and_a_dark_for_every_dit(tiny_night, instrument):
    kinds = [fits.getheader(f)["FRAMEKND"] for f in _files(tiny_night)]
    for kind in ("dark", "flat", "lamp-beam", "lamp-scan", "sky", "calibrator", "science"):
        assert kind in kinds
    beams = sorted(fits.getheader(f)["LAMPTEL"] for f in _by_kind(tiny_night, "lamp-beam"))
    assert beams == [1, 2, 3, 4]
    dark_dits = {(h["SPECSET"], h["POLMODE"], h["SCDIT"])
                 for h in map(fits.getheader, _by_kind(tiny_night, "dark"))}
    for f in _files(tiny_night):
        h = fits.getheader(f)
        assert (h["SPECSET"], h["POLMODE"], h["SCDIT"]) in dark_dits, f.name
    # fringe-tracker darks: dark exposures carry FT frames at the fixed FT period
    for f in _by_kind(tiny_night, "dark"):
        assert len(fits.getdata(f, "FT_PIX")) > 0


def test_raw_format_conformance(tiny_night, instrument):
    """Every documented keyword, extension and column, with its type and unit
    (docs/raw_format.md)."""
    n_out, n_wave = instrument.combiner.n_output, instrument.fringe_tracker.n_wave
    for f in _files(tiny_night):
        with fits.open(f) as hdul:
            h = hdul[0].header
            for key, typ in COMMON.items():
                assert key in h, (f.name, key)
                value = h[key]
                assert isinstance(value, typ) and not isinstance(value, bool) or \
                    typ is float and isinstance(value, int), (f.name, key, value)
            kind = h["FRAMEKND"]
            if kind == "calibrator":
                assert isinstance(h["CALDIAM"], float) and isinstance(h["CALDIAME"], float)
            if kind == "lamp-scan":
                assert h["SCANRATE"] > 0
            assert h["EXPTIME"] == pytest.approx(h["NFRAME"] * h["SCDIT"])
            assert h["TELESCOP"] == "KESSA-4T" and h["INSTRUME"] == "FOURFOLD"
            assert h["RADESYS"] == "ICRS"
            assert Time(h["DATE-OBS"]).mjd == pytest.approx(h["MJD-OBS"], abs=1e-8)
            names = [x.name for x in hdul]
            expected = ["PRIMARY", "SCI_PIX", "SCI_TIME", "FT_PIX"]
            expected += ["METROLOGY"] if kind in WITH_METROLOGY else []
            assert names == expected, f.name
            sci = hdul["SCI_PIX"]
            assert sci.header["BITPIX"] == 16 and sci.header["BZERO"] == 32768
            assert sci.header["BUNIT"] == "adu"
            data = sci.data
            assert data.dtype == np.uint16
            n_x = instrument.setup(h["SPECSET"]).n_x
            assert data.shape == (h["NFRAME"], instrument.detectors["science"].n_y, n_x)
            assert data.max() <= instrument.detectors["science"].saturation_adu
            st = hdul["SCI_TIME"]
            assert st.columns["T_START"].unit == "s" and st.columns["T_EXP"].unit == "s"
            assert len(st.data) == h["NFRAME"]
            np.testing.assert_allclose(st.data["T_EXP"], h["SCDIT"])
            ft = hdul["FT_PIX"]
            assert ft.columns["TIME"].unit == "s" and ft.columns["COUNTS"].unit == "adu"
            assert ft.header["TDIM2"] == f"({n_wave},{n_out})"
            counts = ft.data["COUNTS"]
            assert counts.dtype == np.uint16 and counts.shape[1:] == (n_out, n_wave)
            # frame end times on the FT clock
            np.testing.assert_allclose(np.diff(ft.data["TIME"]), h["FTPERIOD"], rtol=1e-9)
            if kind in WITH_METROLOGY:
                met = hdul["METROLOGY"]
                assert met.columns["PATH"].unit == "m" and met.columns["TIME"].unit == "s"
                assert met.data["PATH"].shape[1] == 4


def _mini_scenario(tmp_path):
    """The tiny scenario with a short scan, to simulate several nights quickly."""
    text = (SCENARIO_DIR / "tiny.toml").read_text()
    text = text.replace("scan_nframe = 250", "scan_nframe = 20")
    path = tmp_path / "mini.toml"
    path.write_text(text)
    return path


def test_reproducible_with_seed(tmp_path):
    scen = _mini_scenario(tmp_path)
    a = simulate_night(tmp_path / "a", scenario=scen, seed=5)
    b = simulate_night(tmp_path / "b", scenario=scen, seed=5)
    c = simulate_night(tmp_path / "c", scenario=scen, seed=6)
    fa, fb, fc = _files(a), _files(b), _files(c)
    assert [f.name for f in fa] == [f.name for f in fb] == [f.name for f in fc]
    for x, y in zip(fa, fb):
        assert x.read_bytes() == y.read_bytes(), x.name          # same seed: same bytes
    assert (a / "truth.json").read_text() == (b / "truth.json").read_text()
    differ = [not np.array_equal(fits.getdata(x, "SCI_PIX"), fits.getdata(y, "SCI_PIX"))
              for x, y in zip(fa, fc)]
    assert all(differ)                                            # another seed: other noise


def test_photon_transfer_gives_the_gain(tiny_night, instrument):
    """Photon transfer: for a Poisson signal, var(ADU) = mean(ADU - bias) / g + (rn/g)^2
    (standard detector relation, e.g. Janesick 2007, Photon Transfer, SPIE). Difference of
    two flat frames removes the fixed pattern (pixel response, bias pattern)."""
    det = instrument.detectors["science"]
    flat = fits.getdata(_by_kind(tiny_night, "flat")[0], "SCI_PIX").astype(float)
    dark = fits.getdata([f for f in _by_kind(tiny_night, "dark")
                         if fits.getheader(f)["SCDIT"] == fits.getheader(
                             _by_kind(tiny_night, "flat")[0])["SCDIT"]][0], "SCI_PIX")
    level = 0.5 * (flat[0] + flat[1]) - np.median(dark.astype(float), axis=0)
    var = 0.5 * (flat[0] - flat[1]) ** 2
    sel = level > 300                                # photon-dominated pixels
    assert sel.sum() > 200
    slope = np.polyfit(level[sel], var[sel] - (det.read_noise_e / det.gain_e_per_adu) ** 2, 1)[0]
    # slope = 1/g; with a few hundred pixels of single-difference variance the scatter
    # of the fitted slope is a few per cent: 10 % tolerance
    assert 1 / slope == pytest.approx(det.gain_e_per_adu, rel=0.10)


def _trace_sums(frames, trace_y):
    """Sum of each trace over +-2 rows around its truth centre, (frame, trace, x)."""
    n_f, n_y, n_x = frames.shape
    out = np.zeros((n_f, trace_y.shape[0], n_x))
    for k, ty in enumerate(trace_y):
        for x in range(n_x):
            y0 = int(round(ty[x]))
            out[:, k, x] = frames[:, max(0, y0 - 2):y0 + 3, x].sum(1)
    return out


def test_single_beam_lamp_lights_only_its_pairs(tiny_night, instrument):
    truth = _truth(tiny_night)
    ch = truth["instrument"]["channels"]["sci-low-joint"]
    trace_y = np.array(ch["trace_y_px"])
    pair = instrument.combiner.output_pair
    beams = _by_kind(tiny_night, "lamp-beam")
    dit = fits.getheader(beams[0])["SCDIT"]
    dark = [f for f in _by_kind(tiny_night, "dark") if fits.getheader(f)["SCDIT"] == dit][0]
    dark_s = _trace_sums(fits.getdata(dark, "SCI_PIX").astype(float), trace_y).mean(0)
    dark_ft = fits.getdata(dark, "FT_PIX")["COUNTS"].astype(float).mean(0)
    for f in beams:
        beam = fits.getheader(f)["LAMPTEL"] - 1
        s = _trace_sums(fits.getdata(f, "SCI_PIX").astype(float), trace_y).mean(0) - dark_s
        lit = (pair == beam).any(1)
        # read noise 6 ADU x sqrt(5 rows) / sqrt(3 frames) ~ 8 ADU per column: unlit
        # traces stay below 40 ADU per column, lit ones are hundreds of ADU above
        assert np.abs(np.median(s[~lit], axis=1)).max() < 40
        assert np.median(s[lit], axis=1).min() > 200
        ft = fits.getdata(f, "FT_PIX")["COUNTS"].astype(float).mean(0) - dark_ft
        assert np.abs(ft[~lit]).max() < 5 and ft[lit].min() > 100


def test_scan_fringe_period_is_the_truth_wavelength(tiny_night, instrument):
    """Fourier-transform spectroscopy: the fringe of pixel x against the metrology OPD
    PATH_j - PATH_i peaks at wavenumber 1/lambda_eff (truth)."""
    f = _by_kind(tiny_night, "lamp-scan")[0]
    ch = _truth(tiny_night)["instrument"]["channels"]["sci-low-joint"]
    trace_y, wave = np.array(ch["trace_y_px"]), np.array(ch["wave_pixel_m"])
    with fits.open(f) as h:
        frames = h["SCI_PIX"].data.astype(float)
        t = h["SCI_TIME"].data["T_START"] + h["SCI_TIME"].data["T_EXP"] / 2
        met_t, path = h["METROLOGY"].data["TIME"], h["METROLOGY"].data["PATH"]
    sig = np.linspace(0.35e6, 0.6e6, 2501)         # step 100 m^-1: 2e-4 of 1/lambda
    for k in (9, 14, 22):               # outputs of baselines (0,3), (1,2), (2,3)
        i, j = instrument.combiner.output_pair[k]
        opd = np.interp(t, met_t, path[:, j]) - np.interp(t, met_t, path[:, i])
        for x in (4, 12, 20):
            y = int(round(trace_y[k, x]))
            s = frames[:, y, x] - frames[:, y, x].mean()
            power = np.abs(np.exp(2j * np.pi * np.outer(sig, opd)) @ s)
            # the fringe spectrum is the channel bandpass (FWHM ~4 % of lambda); its peak
            # sits within ~0.3 % of the flux-weighted mean wavelength (bandpass asymmetry
            # in wavenumber and the lamp slope are second order): 0.5 % tolerance
            assert 1 / sig[power.argmax()] == pytest.approx(wave[k, x], rel=5e-3)


def test_truth_targets_match_the_scenario(tiny_night):
    sc = load_scenario("tiny")
    truth = _truth(tiny_night)
    sci = [v for v in truth["files"].values() if v["kind"] == "science"]
    cal = [v for v in truth["files"].values() if v["kind"] == "calibrator"]
    assert sci and cal
    for v in sci:
        tg = sc.targets[v["object"]]
        assert (v["companion_dra_mas"], v["companion_ddec_mas"]) == tg.companion_mas
        assert v["primary_offset_mas"] == list(tg.primary_offset_mas)
        # Pogson's relation: flux ratio 10^(-0.4 dK)
        assert v["flux_ratio"] == pytest.approx(10 ** (-0.4 * tg.companion_dkmag))
    for v in cal:
        tg = sc.targets[v["object"]]
        # drawn within the catalogue error: 5 sigma is a generous bound for one draw
        assert abs(v["diameter_mas"] - tg.cal_diameter_mas) < 5 * tg.cal_diameter_err_mas


def test_metrology_follows_the_phase_model(tiny_night, instrument):
    """DEVELOPERS.md phase model: D_ij = B.(s_sc - s_ft) + PATH_j - PATH_i equals the true
    drift difference plus the metrology zero difference (truth), at the nm level."""
    truth = _truth(tiny_night)
    inst_t = truth["instrument"]
    zero = np.array(inst_t["metrology_zero_m"])
    dr = inst_t["metrology_drift"]
    t0 = Time(truth["start_utc"])
    lat = np.deg2rad(instrument.site.latitude_deg)
    for f in _by_kind(tiny_night, "science") + _by_kind(tiny_night, "calibrator"):
        with fits.open(f) as h:
            hd = h[0].header
            tm, path = h["METROLOGY"].data["TIME"], h["METROLOGY"].data["PATH"]
        start = Time(hd["DATE-OBS"])
        t = start + TimeDelta(tm, format="sec")
        w = []
        for ra, dec in ((hd["RA"], hd["DEC"]), (hd["FTRA"], hd["FTDEC"])):
            hh = hour_angle_rad(t, ra, instrument.site.longitude_deg)
            w.append(uvw_from_enu(instrument.station_enu_m, hh, np.deg2rad(dec), lat)[..., 2])
        d = w[0] - w[1] + path
        tn = (start - t0).to_value("s") + tm
        drift = np.array(dr["amp_m"]) * np.sin(2 * np.pi * tn[:, None] / np.array(dr["period_s"])
                                               + np.array(dr["phase_rad"]))
        # metrology noise 2 nm rms plus the sidereal-rate linearisation inside the
        # simulator (< 1 nm over seconds): 20 nm bound
        np.testing.assert_allclose(d - drift - zero, 0.0, atol=20e-9)


def test_hot_and_dead_pixels_show_in_the_frames(tiny_night):
    truth = _truth(tiny_night)["instrument"]["detectors"]["science"]
    darks = _by_kind(tiny_night, "dark")
    long = max(darks, key=lambda f: fits.getheader(f)["SCDIT"])
    d = fits.getdata(long, "SCI_PIX").astype(float).mean(0)
    n_x = d.shape[1]
    hot = [(y, x) for y, x in truth["hot_pixels"] if x < n_x]
    rate = [r for (y, x), r in zip(truth["hot_pixels"], truth["hot_dark_e_per_s"]) if x < n_x]
    dit = fits.getheader(long)["SCDIT"]
    gain = truth["gain_e_per_adu"]
    med = np.median(d)
    for (y, x), r in zip(hot, rate):
        if r * dit / gain > 5:          # only hot pixels well above the read noise
            assert d[y, x] - med > 0.5 * r * dit / gain
    flat = fits.getdata(_by_kind(tiny_night, "flat")[0], "SCI_PIX").astype(float).mean(0)
    for y, x in truth["dead_pixels"]:
        if x < n_x:
            assert abs(flat[y, x] - med) < 30     # reads bias only


def test_bad_scenario_names_file_and_field(tmp_path):
    with pytest.raises(ConfigError, match="not found"):
        load_scenario(tmp_path / "nope.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text((SCENARIO_DIR / "tiny.toml").read_text().replace(
        'ft_kmag = 7.5', 'ft_kmag = "bright"'))
    with pytest.raises(ConfigError, match=r"bad\.toml.*ft_kmag"):
        load_scenario(bad)
    bad.write_text((SCENARIO_DIR / "tiny.toml").read_text() + "\n[sampling]\nfoo = 1\n")
    with pytest.raises(ConfigError, match=r"bad\.toml.*sampling\.foo"):
        load_scenario(bad)


@pytest.fixture(scope="module")
def bright_night(tmp_path_factory):
    """tiny, with a bright binary (and a bright fringe-tracker star) observed longer and
    the per-output dispersion errors off (so the 24 outputs share lambda(x) and a column
    is one wavelength)."""
    tmp_path = tmp_path_factory.mktemp("bright")
    text = (SCENARIO_DIR / "tiny.toml").read_text()
    text = text.replace("scan_nframe = 250", "scan_nframe = 10")
    text = text.replace("kmag = 7.0\nprimary", "kmag = 3.5\nprimary")
    text = text.replace("ft_kmag = 7.5", "ft_kmag = 3.0")
    old = 'target = "Kessa-B1"\nsetup = "low"\ndit = 0.1\nnframe = 8'
    assert text.count(old) == 2                       # sky, then science
    head, _, tail = text.rpartition(old)
    text = head + 'target = "Kessa-B1"\nsetup = "low"\ndit = 0.5\nnframe = 6' + tail
    text = text.replace("[lamp]", "[errors]\ndispersion_shift_px = 0.0\ndispersion_scale = 0.0\n"
                                  "dispersion_quad_px = 0.0\n\n[lamp]")
    (tmp_path / "bright.toml").write_text(text)
    return simulate_night(tmp_path / "night", scenario=tmp_path / "bright.toml", seed=11)


def test_closure_phases_match_the_binary_formula(bright_night, instrument):
    """Closure phases of the simulated frames, inverted with the truth combiner, against
    the closed-form binary visibility with fibre attenuation and the analytic Gaussian
    smearing envelope (pipeline.skymodel.binary_visibility). Closure phases are free of
    the fringe-tracking residuals, the metrology drift and the injection, so this checks
    the sky, the geometry, the combiner model and the bandpass integration together."""
    from scipy.special import erf
    from pipeline.skymodel import MAS, binary_visibility
    truth, ch, det, sci, tf, frames = _science_minus_dark(bright_night)
    n_f, _, n_x = frames.shape
    resp = np.array(det["pixel_response"])[:, :n_x]
    ty, tsig = np.array(ch["trace_y_px"]), np.array(ch["trace_sigma_px"])
    flux = np.zeros((n_f, 24, n_x))                  # box extraction over +-3 rows
    for k in range(24):
        for x in range(n_x):
            rows = np.arange(int(round(ty[k, x])) - 3, int(round(ty[k, x])) + 4)
            edges = np.r_[rows - 0.5, rows[-1] + 0.5]
            prof = np.diff(0.5 * (1 + erf((edges - ty[k, x]) / (np.sqrt(2) * tsig[k, x]))))
            good = resp[rows, x] > 0
            flux[:, k, x] = ((frames[:, rows[good], x] / resp[rows[good], x]).sum(1)
                             / prof[good].sum())
    t, c, th = (np.array(ch[n])[0] for n in ("transmission", "contrast", "phase_shift_rad"))
    pair, obl = instrument.combiner.output_pair, instrument.combiner.output_baseline
    wave, bw = np.array(ch["wave_pixel_m"]), np.array(ch["bandwidth_pixel_m"])
    uvw = np.array(tf["uvw_mid_m"])
    bidx = {b: n for n, b in enumerate(instrument.combiner.baselines)}
    for x in range(2, n_x - 2, 3):
        m = np.zeros((24, 16))                        # DEVELOPERS.md unknown order
        for k, (i, j) in enumerate(pair):
            a = 2 * np.sqrt(t[k, i, x] * t[k, j, x]) * c[k, x]
            m[k, [i, j]] = t[k, i, x], t[k, j, x]
            m[k, 4 + obl[k]], m[k, 10 + obl[k]] = a * np.cos(th[k, x]), -a * np.sin(th[k, x])
        sol = np.linalg.lstsq(m, flux[:, :, x].T, rcond=None)[0]
        coh = sol[4:10] + 1j * sol[10:16]                            # (baseline, frame)
        vis = binary_visibility(
            uvw[:, 0], uvw[:, 1], wave[:, x].mean(), dx_rad=tf["companion_dra_mas"] * MAS,
            dy_rad=tf["companion_ddec_mas"] * MAS, flux_ratio=tf["flux_ratio"],
            x1_rad=tf["primary_offset_mas"][0] * MAS, y1_rad=tf["primary_offset_mas"][1] * MAS,
            bandwidth_m=bw[:, x].mean(), fibre_fwhm_rad_at_2p2um=instrument.fibre_fwhm_mas_at_2p2um * MAS)
        for a, b, cc in instrument.combiner.triangles:
            ab, bc, ac = bidx[(a, b)], bidx[(b, cc)], bidx[(a, cc)]
            meas = np.angle((coh[ab] * coh[bc] * np.conj(coh[ac])).sum())
            model = np.angle(vis[ab] * vis[bc] * np.conj(vis[ac]))
            # photon noise is negligible here (5e5 e- per frame and output); the model
            # differs from the simulation by the analytic Gaussian envelope versus the
            # numerical bandpass integration (chromatic fibre coupling and transmission
            # inside the ~90 nm channel, mean wavelength versus mean wavenumber): ~1 deg
            # seen, 2.5 deg tolerance against closure phases of up to ~15 deg
            assert np.rad2deg(abs(np.angle(np.exp(1j * (meas - model))))) < 2.5, (x, a, b, cc)


def test_fringe_tracker_sees_an_unresolved_star(bright_night, instrument):
    """Fringe-tracker frames inverted with the truth combiner: a point source at the fibre
    centre has V^2 = 1 (times the sub-millisecond jitter loss, exp(-4 pi^2 var / lambda^2)
    of a Gaussian path jitter) and zero closure phase."""
    truth = _truth(bright_night)
    ch = truth["instrument"]["channels"]["ft"]
    sci = _by_kind(bright_night, "science")[0]
    dark = _by_kind(bright_night, "dark")[0]
    counts = fits.getdata(sci, "FT_PIX")["COUNTS"].astype(float)
    counts -= fits.getdata(dark, "FT_PIX")["COUNTS"].astype(float).mean(0)
    counts /= np.array(truth["instrument"]["detectors"]["ft"]["pixel_response"])
    t, c, th = (np.array(ch[n])[0] for n in ("transmission", "contrast", "phase_shift_rad"))
    pair, obl = instrument.combiner.output_pair, instrument.combiner.output_baseline
    bidx = {b: n for n, b in enumerate(instrument.combiner.baselines)}
    for p in range(counts.shape[2]):
        # the FT outputs' wavelengths differ by a fraction of a pixel: each output's own
        # truth row is used, which is exact for the incoherent part
        m = np.zeros((24, 16))
        for k, (i, j) in enumerate(pair):
            a = 2 * np.sqrt(t[k, i, p] * t[k, j, p]) * c[k, p]
            m[k, [i, j]] = t[k, i, p], t[k, j, p]
            m[k, 4 + obl[k]], m[k, 10 + obl[k]] = a * np.cos(th[k, p]), -a * np.sin(th[k, p])
        sol = np.linalg.lstsq(m, counts[:, :, p].T, rcond=None)[0]
        f, coh = sol[:4], sol[4:10] + 1j * sol[10:16]
        for n, (i, j) in enumerate(instrument.combiner.baselines):
            v2 = np.mean(np.abs(coh[n]) ** 2) / np.mean(f[i] * f[j])
            # jitter loss at 200 nm rms / 1 ms with 20 ms correlation: < 1 %; wavelength
            # offsets of the four outputs (<0.2 px of 84 nm) mix in < 2 %: 5 % tolerance
            assert v2 == pytest.approx(1.0, abs=0.05), (p, i, j)
        for a, b, cc in instrument.combiner.triangles:
            bis = (coh[bidx[(a, b)]] * coh[bidx[(b, cc)]] * np.conj(coh[bidx[(a, cc)]])).sum()
            # ~1600 e- per pixel and ms: closure phases good to a fraction of a degree;
            # 2 deg allows for the same output-wavelength mixing
            assert abs(np.rad2deg(np.angle(bis))) < 2.0, (p, a, b, cc)


def test_scenario_set_up_must_exist(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text((SCENARIO_DIR / "tiny.toml").read_text().replace(
        'polmode', 'x').replace('setup = "low"\ndit = 0.1', 'setup = "low"\npolmode = "both"\ndit = 0.1', 1))
    with pytest.raises(ConfigError, match=r"bad\.toml.*polarisation mode 'both'"):
        simulate_night(tmp_path / "n", scenario=bad)
    bad.write_text((SCENARIO_DIR / "tiny.toml").read_text().replace('setup = "low"', 'setup = "high"'))
    with pytest.raises(ConfigError, match=r"bad\.toml.*set-up 'high'"):
        simulate_night(tmp_path / "n", scenario=bad)


def test_photometry_and_contrast_loss_of_the_science_frames(bright_night, instrument):
    """Inverted science frames against a photometry computed here from the constants:
    F_i = n_ph(lambda) x area x throughput x <injection_i> x sum_k F_k kappa_k x |dlambda/dx|
    x DIT, with n_ph from Vega's K zero point (4.5e-10 W m^-2 um^-1, from memory, the value
    the simulator states) and a lambda^-3 photon slope; and |C_ij| / sqrt(F_i F_j) equals
    |V_binary| times the truth contrast loss of each frame."""
    from scipy.special import erf
    from pipeline.skymodel import MAS, binary_visibility
    h_planck, c_light = 6.62607015e-34, 299792458.0
    truth, ch, det, sci, tf, frames = _science_minus_dark(bright_night)
    dit = fits.getheader(sci)["SCDIT"]
    x = 12                                                   # a column near 2.2 um
    resp = np.array(det["pixel_response"])[:, x]
    ty, tsig = np.array(ch["trace_y_px"])[:, x], np.array(ch["trace_sigma_px"])[:, x]
    flux = np.zeros((frames.shape[0], 24))
    for k in range(24):
        rows = np.arange(int(round(ty[k])) - 3, int(round(ty[k])) + 4)
        edges = np.r_[rows - 0.5, rows[-1] + 0.5]
        prof = np.diff(0.5 * (1 + erf((edges - ty[k]) / (np.sqrt(2) * tsig[k]))))
        good = resp[rows] > 0
        flux[:, k] = (frames[:, rows[good], x] / resp[rows[good]]).sum(1) / prof[good].sum()
    flux *= det["gain_e_per_adu"]
    t, c, th = (np.array(ch[n])[0][..., x] for n in ("transmission", "contrast", "phase_shift_rad"))
    m = np.zeros((24, 16))
    for k, (i, j) in enumerate(instrument.combiner.output_pair):
        b = instrument.combiner.output_baseline[k]
        a = 2 * np.sqrt(t[k, i] * t[k, j]) * c[k]
        m[k, [i, j]] = t[k, i], t[k, j]
        m[k, 4 + b], m[k, 10 + b] = a * np.cos(th[k]), -a * np.sin(th[k])
    sol = np.linalg.lstsq(m, flux.T, rcond=None)[0]
    f, coh = sol[:4], sol[4:10] + 1j * sol[10:16]            # (telescope, frame), (baseline, frame)
    lam = np.array(ch["wave_pixel_m"])[:, x].mean()
    dldx = abs(np.gradient(np.array(ch["wave_pixel_m"]).mean(0))[x])
    n_ph = 4.5e-10 * 1e6 * lam / (h_planck * c_light) * (lam / 2.2e-6) ** -3
    sc = load_scenario(bright_night.parent / "bright.toml")
    tg = sc.targets[tf["object"]]
    fwhm = instrument.fibre_fwhm_mas_at_2p2um * lam / 2.2e-6
    x1, y1 = tf["primary_offset_mas"]
    x2, y2 = x1 + tf["companion_dra_mas"], y1 + tf["companion_ddec_mas"]
    kappa = (np.exp(-4 * np.log(2) * (x1 ** 2 + y1 ** 2) / fwhm ** 2)
             + tf["flux_ratio"] * np.exp(-4 * np.log(2) * (x2 ** 2 + y2 ** 2) / fwhm ** 2))
    expected = (n_ph * 10 ** (-0.4 * tg.kmag) * np.pi * (instrument.telescope_diameter_m / 2) ** 2
                * sc.photometry["throughput"] * np.array(tf["mean_injection"]) * kappa * dldx * dit)
    # photon noise ~1e-3; the pixel's bandpass average of the lambda^-3 slope, the fibre
    # coupling and the transmission versus their values at the mean wavelength: < 1 %
    np.testing.assert_allclose(f.mean(1), expected, rtol=0.02)
    vis = binary_visibility(
        np.array(tf["uvw_mid_m"])[:, 0], np.array(tf["uvw_mid_m"])[:, 1], lam,
        dx_rad=tf["companion_dra_mas"] * MAS, dy_rad=tf["companion_ddec_mas"] * MAS,
        flux_ratio=tf["flux_ratio"], x1_rad=x1 * MAS, y1_rad=y1 * MAS,
        bandwidth_m=np.array(ch["bandwidth_pixel_m"])[:, x].mean(),
        fibre_fwhm_rad_at_2p2um=instrument.fibre_fwhm_mas_at_2p2um * MAS)
    bl = np.array(instrument.combiner.baselines)
    measured = np.abs(coh) / np.sqrt(f[bl[:, 0]] * f[bl[:, 1]])          # (baseline, frame)
    loss = np.array(tf["frame_coherence_2p2um"]).T                      # (baseline, frame)
    # contrast loss tabulated at 2.2 um, column at ~2.21 um: the loss scales as
    # exp(-2 pi^2 s^2 / lambda^2), a < 0.5 % change; smearing-envelope approximation ~1 %
    np.testing.assert_allclose(measured, np.abs(vis)[:, None] * loss, rtol=0.03)


def test_residual_path_statistics(rng):
    """AR(1) residuals: per-baseline rms as requested, autocorrelation exp(-lag/tau) (the
    AR(1) autocorrelation function); a fringe jump shifts one telescope by the FT
    wavelength for its interval."""
    from pipeline.simulate.turbulence import injection, residuals
    knobs = dict(load_scenario("tiny").tracking, residual_rms_nm=200.0, corr_ms=20.0)
    dt = 2.5e-4
    r, events = residuals(rng, 400_000, dt, knobs, 2.2e-6)            # 100 s, no events
    assert events == []
    d = r[:, 3] - r[:, 0]
    # 100 s / 20 ms ~ 5000 correlation times: rms known to ~2 %, 5 % tolerance
    assert d.std() == pytest.approx(200e-9, rel=0.05)
    lag = int(0.02 / dt)
    acf = np.corrcoef(d[:-lag], d[lag:])[0, 1]
    assert acf == pytest.approx(np.exp(-1), abs=0.05)
    jumpy = dict(knobs, jump_rate_per_min=60.0, jump_duration_s=[0.5, 0.5])
    r2, ev = residuals(np.random.default_rng(4), 40_000, dt, jumpy, 2.2e-6)   # 10 s
    jumps = [e for e in ev if e["kind"] == "jump"]
    assert jumps and all(abs(e["offset_m"]) == 2.2e-6 for e in jumps)
    e = jumps[0]
    inside = slice(int(e["t_start"] / dt) + 1, int(e["t_end"] / dt) - 1)
    others = [j for j in jumps[1:] if j["telescope"] == e["telescope"]
              and j["t_start"] < e["t_end"] and j["t_end"] > e["t_start"]]
    if not others:
        # mean of the shifted stretch: the jump plus 200/sqrt(2) nm AR(1) noise
        assert r2[inside, e["telescope"]].mean() == pytest.approx(e["offset_m"], abs=0.4e-6)
    rho = injection(rng, 400_000, dt, dict(mean=0.45, log_sigma=0.25, corr_ms=40.0))
    # lognormal with the -s^2/2 shift keeps the mean; 100 s / 40 ms: ~2 % precision
    np.testing.assert_allclose(rho.mean(0), 0.45, rtol=0.05)


def test_truth_exposure_list(tiny_night):
    """The flat `exposures` list of truth.json (docs/truth.md) agrees with `files`."""
    import json
    from astropy.time import Time
    truth = json.loads((tiny_night / "truth.json").read_text())
    exps = truth["exposures"]
    assert [e["file"] for e in exps] == sorted(truth["files"], key=lambda n: Time(
        truth["files"][n]["date_obs"]).mjd)
    for e in exps:
        f = truth["files"][e["file"]]
        assert e["kind"] == f["kind"]
        assert abs(e["mjd"] - Time(f["date_obs"]).mjd) < 1e-9
        if e["kind"] == "science":
            assert (e["companion_dra_mas"], e["companion_ddec_mas"]) == (
                f["companion_dra_mas"], f["companion_ddec_mas"])
            assert [e["primary_dra_mas"], e["primary_ddec_mas"]] == f["primary_offset_mas"]
            assert e["flux_ratio"] == f["flux_ratio"]
