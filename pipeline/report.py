# SPDX-License-Identifier: BSD-3-Clause
"""The night's quality-control report: PNG figures and a self-contained ``index.html``.

Everything is drawn with matplotlib's Agg backend into ``WORK/report/``; the HTML
references the PNG files beside it and needs no network. Inputs are product
views (``view["name"]``, ``name in view``, ``view.attrs``): the ``binary``
products of the night, optionally earlier stages' products for calibration QC,
and the astrometry table.

Figures are content-addressed. Each figure is drawn by a function of one dict of
inputs only (arrays and the scalars it prints), gathered from the products first;
the PNG is kept in ``WORK/report/figure-cache/<kind>-<digest>.png``, the digest
covering those inputs, ``FIGURE_CODE_VERSION``, the matplotlib version and its rc
settings, and the report's file (``exposure_000.png``, ...) is a hard link to (or a
copy of) it. A report whose products changed only where a figure does not look (a
flag threshold that flips no flag) reuses the PNG. Cache entries and exposure figures
the current report does not use are removed when it is written. The exposure figures
are usually in the cache before the report runs: the ``figure`` stage draws each one
(:func:`exposure_figure`) as soon as its fit is done, beside the other fits.
"""

from __future__ import annotations

import html
import os
import shutil
import threading
from pathlib import Path

import numpy as np

from .digest import content_digest

__all__ = ["build_report", "exposure_figure", "FIGURE_CODE_VERSION", "CACHE_DIR"]

# Bump whenever the drawing code (``_ExposureFigure``, ``_draw_*``, the ``_*_inputs``
# gatherers and the helpers they call) changes what a figure looks like: it is part of
# every cache key.
FIGURE_CODE_VERSION = 3
CACHE_DIR = "figure-cache"
_DPI = 90
# zlib level 1: encoding an exposure figure 0.08 s instead of 0.12 s (level 6, the
# default), files 8 % larger.
_PNG_OPTIONS = {"compress_level": 1}
_TRIANGLES = [(0, 1, 2), (0, 1, 3), (0, 2, 3), (1, 2, 3)]
_BASELINES = [(0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3)]
# matplotlib is not thread-safe, and drawing holds the GIL anyway: one figure at a time
# per process (units of the threads scheduler draw exposure figures side by side).
_DRAW_LOCK = threading.RLock()


def _plt():
    import matplotlib
    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt
    return plt


# ---------------------------------------------------------------- content keys

_NOT_DRAWING = ("backend", "interactive", "keymap.", "toolbar", "webagg.", "savefig.directory")


def _style() -> str:
    """matplotlib's version and the rc settings that can change how a figure looks."""
    import matplotlib
    rc = matplotlib.rcParams     # (reading "backend" would resolve it: imports pyplot)
    return matplotlib.__version__ + repr(sorted((k, repr(rc[k])) for k in rc
                                                if not k.startswith(_NOT_DRAWING)))


def figure_key(kind: str, inputs: dict, style: str | None = None) -> str:
    """Hex digest of a figure's kind, its inputs, the drawing code's version and the
    matplotlib style (``_style()``, computed if not given)."""
    return content_digest([kind, FIGURE_CODE_VERSION, _DPI, _PNG_OPTIONS,
                           _style() if style is None else style], inputs)


class _FigureCache:
    """PNG files by content key in ``outdir/CACHE_DIR``; ``used`` records this report's."""

    def __init__(self, outdir: Path):
        self.outdir = outdir
        self.dir = outdir / CACHE_DIR
        self.dir.mkdir(parents=True, exist_ok=True)
        self.used: set[str] = set()
        self.style = _style()

    def entry(self, kind: str, inputs: dict, draw, keep: bool = False) -> Path:
        """The cached PNG of the figure ``draw(inputs)`` returns, drawn if missing (and
        closed after saving unless ``keep``: a reused figure)."""
        entry = self.dir / f"{kind}-{figure_key(kind, inputs, self.style)}.png"
        if not entry.is_file():
            with _DRAW_LOCK:
                fig = draw(inputs)
                tmp = self.dir / f".{entry.name}.{os.getpid()}.{threading.get_ident()}.tmp"
                try:
                    fig.savefig(tmp, dpi=_DPI, format="png", pil_kwargs=_PNG_OPTIONS)
                finally:
                    if not keep:
                        _plt().close(fig)
            os.replace(tmp, entry)
        self.used.add(entry.name)
        return entry

    def figure(self, name: str, kind: str, inputs: dict, draw, keep: bool = False) -> str:
        """Publish ``outdir/name``: the cached PNG of :meth:`entry`."""
        self._publish(self.entry(kind, inputs, draw, keep), self.outdir / name)
        return name

    def _publish(self, entry: Path, path: Path) -> None:
        try:
            if path.exists() and os.path.samefile(entry, path):
                return
        except OSError:
            pass
        tmp = self.outdir / f".{path.name}.{os.getpid()}.{threading.get_ident()}.tmp"
        tmp.unlink(missing_ok=True)
        try:
            os.link(entry, tmp)
        except OSError:                      # file system without hard links
            shutil.copyfile(entry, tmp)
        os.replace(tmp, path)

    def prune(self) -> None:
        """Remove cache entries (and leftovers of killed runs) this report did not use."""
        for p in self.dir.iterdir():
            if p.name not in self.used:
                p.unlink(missing_ok=True)


# ---------------------------------------------------------------- drawing helpers

def _bars(x, y, e):
    """Vertical error-bar segments (point, end, xy) from y - e to y + e."""
    x, y, e = (np.ravel(np.asarray(v, float)) for v in (x, y, e))
    return np.stack([np.column_stack([x, y - e]), np.column_stack([x, y + e])], axis=1)


def _data_with_errors(ax, x, y, e):
    """Points with vertical error bars for each leading index (polarisation) of y, e, as
    ``errorbar(fmt=".", ms=2, lw=0.5, alpha=0.6)`` draws them, from one collection of
    bars and one marker line per polarisation; returns the first polarisation's
    handle for a legend (drawn as errorbar's)."""
    from matplotlib.collections import LineCollection
    from matplotlib.container import ErrorbarContainer
    handle = None
    for p in range(y.shape[0]):
        colour = f"C{p}"
        bars = LineCollection(_bars(x, y[p], e[p]), colors=colour, linewidths=0.5,
                              alpha=0.6)
        ax.add_collection(bars, autolim=True)
        (points,) = ax.plot(np.ravel(x), np.ravel(y[p]), ".", color=colour, ms=2, alpha=0.6,
                            zorder=2.1)       # errorbar's: markers above lines and bars
        if handle is None:
            handle = ErrorbarContainer((points, (), (bars,)), has_yerr=True)
    return handle


def _spatial_freq(uvw, wave):
    """|B| / lambda in Mlambda, shape (baseline, wave)."""
    return np.hypot(uvw[:, 0], uvw[:, 1])[:, None] / wave[None, :] / 1e6


# ---------------------------------------------------------------- per exposure

_EXPOSURE_ARRAYS = ("uvw", "wave", "vis2", "vis2_err", "model_vis2", "t3phi", "t3phi_err",
                    "model_t3phi", "chi2_map", "grid_dra", "grid_ddec", "minima")
_EXPOSURE_PHASE = ("visphi", "visphi_err", "model_visphi")
_EXPOSURE_ATTRS = {"exposure": "", "target": "", "mjd": np.nan, "dra": np.nan,
                   "dra_err": np.nan, "ddec": np.nan, "ddec_err": np.nan,
                   "dra_ddec_corr": np.nan, "sep": np.nan, "pa": np.nan,
                   "flux_ratio": np.nan, "flux_ratio_err": np.nan, "chi2_red": np.nan,
                   "ndata": 0, "error_source": "?", "bootstrap_kind": "?", "flag": -1,
                   "flag_names": "", "runner_up_dra": np.nan, "runner_up_ddec": np.nan,
                   "runner_up_dchi2": np.nan}


def _exposure_inputs(view, a: dict) -> dict:
    """Everything the exposure figure draws or prints, and nothing else (``a``: the
    view's attributes)."""
    d = {n: np.asarray(view[n]) for n in _EXPOSURE_ARRAYS}
    if "visphi" in view:
        d.update({n: np.asarray(view[n]) for n in _EXPOSURE_PHASE})
    d["attrs"] = {k: a.get(k, default) for k, default in _EXPOSURE_ATTRS.items()}
    return d


class _ExposureFigure:
    """The per-exposure figure, made once and redrawn for each exposure.

    Axes, their labels, tick objects and the colour bars are created on the first
    exposure only; each call to ``draw`` removes the previous exposure's data artists
    and adds the new ones (making axes and ticks is most of a fresh figure's cost). The
    result is the figure that a fresh ``_ExposureFigure`` draws from the same inputs
    (tests compare the pixels).
    """

    def __init__(self):
        from matplotlib.figure import Figure
        # not a pyplot figure: kept for the life of the process without pyplot's registry
        self.fig = Figure(figsize=(15, 8.5))
        self.ax = self.fig.subplots(2, 3)
        ax = self.ax
        # Titles at a fixed height: the automatic placement measures every tick label
        # of the figure to avoid tick labels on top of the axes (none here) and a y-axis
        # offset text (top left corner, far from these centred titles; none on these
        # ranges).
        ax[0, 0].set(xlabel="u [Mlambda] (East left)", ylabel="v [Mlambda]", aspect="equal")
        ax[0, 0].set_title("uv coverage", y=1.0)
        ax[0, 1].set(xlabel="spatial frequency [Mlambda]", ylabel="V2")
        ax[0, 1].set_title("squared visibility", y=1.0)
        ax[0, 2].set(xlabel="max spatial frequency of triangle [Mlambda]",
                     ylabel="closure phase [deg]")
        ax[0, 2].set_title("closure phases", y=1.0)
        ax[1, 0].set(xlabel="spatial frequency [Mlambda]", ylabel="(data - model) / error")
        ax[1, 0].set_title(" ", y=1.0)
        ax[1, 1].set(xlabel="dRA cos Dec [mas] (East left)", ylabel="dDec [mas]")
        ax[1, 1].set_title("global search: (chi2 - chi2_min) / max(1, chi2_red)", y=1.0)
        ax[1, 2].axis("off")
        self.summary = ax[1, 2].text(0.0, 1.0, "", va="top", family="monospace", fontsize=9)
        self.suptitle = self.fig.suptitle(" ")
        # fixed margins: the figure's layout never changes, and an automatic layout costs
        # a third of the drawing time
        self.fig.subplots_adjust(left=0.05, right=0.97, bottom=0.07, top=0.92, wspace=0.3,
                                 hspace=0.32)
        self.colorbars = None

    def close(self):
        """Release the figure's drawing (no pyplot registry to leave)."""
        self.fig.clear()

    def _clear(self):
        for a_ in self.ax.ravel()[:5]:
            for art in [*a_.lines, *a_.collections, *a_.images]:
                art.remove()
            if a_.get_legend() is not None:
                a_.get_legend().remove()
            a_.relim()
            a_.set_autoscale_on(True)
            a_.set_prop_cycle(None)         # colours from the start of the cycle again

    def draw(self, d: dict):
        """Draw one exposure's inputs (``_exposure_inputs``); returns the figure."""
        self._clear()
        ax, fig = self.ax, self.fig
        a = d["attrs"]
        uvw, wave = d["uvw"], d["wave"]
        f = _spatial_freq(uvw, wave)
        # uv coverage (both signs of each baseline), coloured by wavelength.
        ax0 = ax[0, 0]
        u, v = uvw[:, 0, None] / wave / 1e6, uvw[:, 1, None] / wave / 1e6
        colour = np.broadcast_to(wave * 1e6, f.shape).ravel()
        sc = ax0.scatter(np.concatenate([u.ravel(), -u.ravel()]),
                         np.concatenate([v.ravel(), -v.ravel()]),
                         c=np.concatenate([colour, colour]), s=6, cmap="viridis")
        lo, hi = sorted(ax0.get_xlim())
        ax0.set_xlim(hi, lo)
        # V2 and model.
        v2, e2, m2 = d["vis2"], d["vis2_err"], d["model_vis2"]
        data = _data_with_errors(ax[0, 1], f, v2, e2)
        models = [ax[0, 1].plot(f[b], m2[b], "k-", lw=0.8)[0] for b in range(f.shape[0])]
        ax[0, 1].legend([models[0], data], ["model", "data"], fontsize=8)
        # Closure phases against the longest baseline of each triangle.
        ft = np.array([np.max([f[_BASELINES.index(p)] for p in ((i, j), (j, k), (i, k))],
                              axis=0) for i, j, k in _TRIANGLES])
        t3, et, mt = d["t3phi"], d["t3phi_err"], d["model_t3phi"]
        _data_with_errors(ax[0, 2], ft, np.degrees(t3), np.degrees(et))
        for t in range(ft.shape[0]):
            ax[0, 2].plot(ft[t], np.degrees(mt[t]), "k-", lw=0.8)
        # Normalised residuals.
        r2 = ((v2 - m2) / e2).ravel()
        rt = (np.angle(np.exp(1j * (t3 - mt))) / et).ravel()
        fb = np.broadcast_to(f, v2.shape).ravel()
        ftb = np.broadcast_to(ft, t3.shape).ravel()
        ax[1, 0].plot(fb, r2, ".", ms=3, label="V2")
        ax[1, 0].plot(ftb, rt, ".", ms=3, label="closure phase")
        if "visphi" in d:
            rp = np.angle(np.exp(1j * (d["visphi"] - d["model_visphi"]))) / d["visphi_err"]
            ax[1, 0].plot(np.broadcast_to(f, rp.shape).ravel(), rp.ravel(), ".", ms=3,
                          label="referenced phase")
        for y in (-3, 3):
            ax[1, 0].axhline(y, color="grey", lw=0.6, ls="--")
        ax[1, 0].set_title(f"residuals, chi2_red = {a['chi2_red']:.2f}", y=1.0)
        ax[1, 0].legend(fontsize=8)
        # chi2 map with the minima.
        cmap = d["chi2_map"]
        gx, gy = d["grid_dra"], d["grid_ddec"]
        best = np.nanmin(cmap)
        chi2_red = a["chi2_red"] if np.isfinite(a["chi2_red"]) else 1.0
        shown = (cmap - best) / max(1.0, float(chi2_red))
        im = ax[1, 1].imshow(shown, origin="lower", cmap="magma_r", vmin=0,
                             vmax=max(np.nanpercentile(shown, 25), 1.0),
                             extent=(gx[0], gx[-1], gy[0], gy[-1]))
        ax[1, 1].set_xlim(gx[-1], gx[0])   # East to the left, as on the sky
        mins = d["minima"]
        ax[1, 1].plot(mins[:, 0], mins[:, 1], "c+", ms=8, label="grid minima")
        ax[1, 1].plot(a["dra"], a["ddec"], "go", mfc="none", ms=10, label="best fit")
        if np.isfinite(a["runner_up_dra"]):
            ax[1, 1].plot(a["runner_up_dra"], a["runner_up_ddec"], "bs", mfc="none", ms=9,
                          label=f"runner-up (dchi2 {a['runner_up_dchi2']:.3g})")
        ax[1, 1].legend(fontsize=7, loc="best", framealpha=0.5)
        if self.colorbars is None:
            self.colorbars = (fig.colorbar(sc, ax=ax0, label="wavelength [um]"),
                              fig.colorbar(im, ax=ax[1, 1]))
        else:
            for cb, mappable in zip(self.colorbars, (sc, im)):
                cb.update_normal(mappable)
        # Text summary.
        self.summary.set_text("\n".join([
            f"{a['exposure']}  ({a['target']})",
            f"MJD {a['mjd']:.5f}",
            f"dRA  {a['dra']:.4f} +- {a['dra_err']:.4f} mas",
            f"dDec {a['ddec']:.4f} +- {a['ddec_err']:.4f} mas",
            f"corr {a['dra_ddec_corr']:.3f}",
            f"sep  {a['sep']:.4f} mas, PA {a['pa']:.3f} deg",
            f"flux ratio {a['flux_ratio']:.4g} +- {a['flux_ratio_err']:.2g}",
            f"chi2_red {a['chi2_red']:.2f}, ndata {a['ndata']}",
            f"errors from: {a['error_source']} (bootstrap: {a['bootstrap_kind']})",
            f"flag {a['flag']} {a['flag_names']}"]))
        self.suptitle.set_text(f"{a['exposure']}: {a['target']}")
        return fig


_PROCESS_FIGURE: list = []      # this process's _ExposureFigure, made on first use


def _draw_exposure(d: dict):
    """Draw on this process's exposure figure (the caller holds ``_DRAW_LOCK``)."""
    if not _PROCESS_FIGURE:
        _PROCESS_FIGURE.append(_ExposureFigure())
    return _PROCESS_FIGURE[0].draw(d)


def exposure_figure(outdir, view, attrs=None) -> str:
    """Draw the figure of one ``binary`` product into the report's figure cache,
    ``outdir/figure-cache`` (``outdir``: ``WORK/report``), unless it is there already;
    returns the cache entry's file name. :func:`build_report` then finds it drawn: the
    exposures' figures can be drawn as their fits finish, not all at the end.

    Parameters
    ----------
    outdir : path of the report
    view : product view of a ``binary`` product
    attrs : its attributes, if already read
    """
    cache = _FigureCache(Path(outdir))
    inputs = _exposure_inputs(view, view.attrs if attrs is None else attrs)
    return cache.entry("exposure", inputs, _draw_exposure, keep=True).name


# ---------------------------------------------------------------- night level

_NIGHT_COLUMNS = ("mjd", "flag", "chi2_red", "dra", "dra_err", "ddec", "ddec_err", "sep",
                  "sep_err", "pa", "pa_err", "flux_ratio", "flux_ratio_err")


def _night_inputs(table) -> dict | None:
    if table is None or len(table) == 0:
        return None
    return {c: np.asarray(table[c], float) for c in _NIGHT_COLUMNS}


def _draw_night(t: dict):
    plt = _plt()
    good = t["flag"] == 0
    fig, ax = plt.subplots(2, 3, figsize=(15, 7), sharex=True)
    hours = (t["mjd"] - np.floor(np.nanmin(t["mjd"]))) * 24
    for a_, col, scale, unit in ((ax[0, 0], "dra", 1e3, "uas"), (ax[0, 1], "ddec", 1e3, "uas"),
                                 (ax[0, 2], "sep", 1e3, "uas"), (ax[1, 0], "pa", 1.0, "deg"),
                                 (ax[1, 1], "flux_ratio", 1.0, "")):
        y, e = t[col], t[col + "_err"]
        ref = np.nanmedian(y)
        y, e = (y - ref) * scale, e * scale
        a_.errorbar(hours[good], y[good], e[good], fmt="o", ms=4)
        if (~good).any():
            a_.errorbar(hours[~good], y[~good], e[~good], fmt="x", color="red", ms=6)
        a_.axhline(0, color="grey", lw=0.6)
        a_.set_title(f"{col} - {ref:.5g}", fontsize=9)
        a_.set_ylabel(f"{col} - median [{unit}]")
    ax[1, 2].plot(hours[good], t["chi2_red"][good], "o")
    ax[1, 2].plot(hours[~good], t["chi2_red"][~good], "x", color="red")
    ax[1, 2].axhline(1, color="grey", lw=0.6)
    ax[1, 2].set_ylabel("reduced chi2")
    for a_ in ax[1]:
        a_.set_xlabel("hours since MJD floor (UTC)")
    fig.suptitle("astrometry of the night (red crosses: flagged)")
    fig.tight_layout()
    return fig


def _qc_inputs(qc: dict, binary_attrs) -> dict | None:
    """Calibration QC panels from whatever earlier products are given (by stage name);
    ``binary_attrs``: the science exposures' attributes."""
    panels = []
    for v in qc.get("flat", []):
        if "profile_sigma" in v:
            panels.append([f"trace cross-profile sigma [px] ({v.attrs.get('label', '')})",
                           np.asarray(v["profile_sigma"])])
    for v in qc.get("wavecal", []):
        if "wave_measured" in v and "wave_pixel" in v:
            res = (np.asarray(v["wave_measured"], float) - np.asarray(v["wave_pixel"], float))
            panels.append([f"wavelength-law residuals [nm] ({v.attrs.get('label', '')})",
                           res * 1e9])
        elif "wave_pixel" in v:
            w = np.asarray(v["wave_pixel"], float)
            panels.append(["trace wavelength minus median of traces [nm]",
                           (w - np.nanmedian(w, axis=0)) * 1e9])
    for v in qc.get("combiner", []):
        if "condition" in v:
            panels.append([f"combiner condition number ({v.attrs.get('label', '')})",
                           np.asarray(v["condition"])])
    rej = [["_".join(str(v.attrs.get("label", "")).split("_")[-2:]),
            float(1 - np.asarray(v["frame_valid"], bool).mean())]
           for v in qc.get("reference", []) if "frame_valid" in v]
    if not rej:      # else the science exposures' own record (calibrate product attribute)
        rej = [[str(a.get("exposure", "")), float(a.get("frac_rejected", np.nan))]
               for a in binary_attrs]
    if not panels and not any(np.isfinite(r[1]) for r in rej):
        return None
    return {"panels": panels, "rejected": rej}


def _draw_qc(d: dict):
    plt = _plt()
    panels, rej = d["panels"], d["rejected"]
    n = len(panels) + 1
    ncol = min(3, n)
    nrow = int(np.ceil(n / ncol))
    fig, ax = plt.subplots(nrow, ncol, figsize=(5 * ncol, 3.6 * nrow), squeeze=False)
    ax = ax.ravel()
    for a_, (title, data) in zip(ax, panels):
        data = np.atleast_2d(data)
        for row in data.reshape(-1, data.shape[-1]):
            a_.plot(row, lw=0.6)
        a_.set(title=title, xlabel="pixel / channel")
    a_ = ax[len(panels)]
    a_.bar(range(len(rej)), [r[1] for r in rej], color="tab:orange")
    a_.set_xticks(range(len(rej)), [r[0] for r in rej], rotation=70, fontsize=6)
    a_.set(title="fraction of frames rejected", ylim=(0, 1))
    for extra in ax[len(panels) + 1:]:
        extra.axis("off")
    fig.tight_layout()
    return fig


def _verdict(table) -> tuple[str, str]:
    if table is None or len(table) == 0:
        return "no science exposure was fitted", "#b35900"
    n, bad = len(table), int(np.sum(np.asarray(table["flag"]) != 0))
    err = np.nanmedian(np.hypot(table["dra_err"], table["ddec_err"])) * 1e3
    chi = np.nanmedian(table["chi2_red"])
    text = (f"{n} science exposure(s), {bad} flagged; median position error {err:.1f} uas; "
            f"median chi2_red {chi:.2f}")
    return text, ("#1a7f37" if bad == 0 and 0.3 < chi < 3 else "#b35900")


def build_report(outdir, binaries, *, table=None, qc=None, title="twinfield night report",
                 failed=(), binary_attrs=None) -> Path:
    """Write the figures and ``index.html`` into ``outdir``; returns the HTML path.

    Parameters
    ----------
    outdir : path, created if needed (``WORK/report``); figures are cached in
        ``outdir/figure-cache`` (module docstring)
    binaries : sequence of ``binary`` product views, in time order
    table : astropy Table of the night's astrometry (``pipeline.astrometry_table``) or None
    qc : mapping stage name -> list of product views (``flat``, ``wavecal``, ``combiner``,
        ``reference``), or None
    binary_attrs : the ``binaries``' attributes (``view.attrs``), if already read
    """
    outdir = Path(outdir)
    outdir.mkdir(parents=True, exist_ok=True)
    cache = _FigureCache(outdir)
    figs = []
    night = _night_inputs(table)
    if night is not None:
        figs.append(("Astrometry of the night",
                     cache.figure("night_astrometry.png", "night", night, _draw_night)))
    if binary_attrs is None:
        binary_attrs = [b.attrs for b in binaries]
    qc_in = _qc_inputs(qc or {}, binary_attrs)
    if qc_in is not None:
        figs.append(("Calibration quality control",
                     cache.figure("calibration_qc.png", "qc", qc_in, _draw_qc)))
    for k, (b, a) in enumerate(zip(binaries, binary_attrs)):
        figs.append((f"Exposure {a.get('exposure', k)}",
                     cache.figure(f"exposure_{k:03d}.png", "exposure",
                                  _exposure_inputs(b, a), _draw_exposure, keep=True)))
    verdict, colour = _verdict(table)
    rows = ""
    if table is not None:
        cols = ["exposure", "target", "mjd", "dra", "dra_err", "ddec", "ddec_err", "sep", "pa",
                "flux_ratio", "chi2_red", "flag"]
        rows = "<tr>" + "".join(f"<th>{c}</th>" for c in cols) + "</tr>\n"
        for r in table:
            style = "" if r["flag"] == 0 else ' style="background:#fde2e1"'
            rows += f"<tr{style}>" + "".join(
                f"<td>{html.escape(str(r[c]) if isinstance(r[c], str) else f'{r[c]:.6g}')}</td>"
                for c in cols) + "</tr>\n"
    meta = "" if table is None else html.escape(
        f"code {table.meta.get('CODEVER', '?')}, configuration {table.meta.get('CFGHASH', '?')}. "
        f"Flags: {table.meta.get('FLAGS', '')}. {table.meta.get('CONVENT', '')}")
    if failed:      # exposures (or QC inputs) whose reduction failed upstream: said, not hidden
        rows += "".join(f'<tr style="background:#f4b6b2"><td colspan="{len(cols)}">NOT REDUCED '
                        f"{html.escape(str(m))}</td></tr>\n" for m in failed)
    body = "\n".join(f'<h2>{html.escape(t)}</h2>\n'
                     f'<img src="{html.escape(f)}" alt="{html.escape(t)}">'
                     for t, f in figs)
    page = f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{html.escape(title)}</title>
<style>body{{font-family:sans-serif;margin:1.5em}} img{{max-width:100%}}
table{{border-collapse:collapse;font-size:0.85em}} td,th{{border:1px solid #ccc;padding:2px 6px}}
.verdict{{padding:0.6em;color:white;background:{colour}}}</style></head>
<body><h1>{html.escape(title)}</h1>
<p class="verdict">{html.escape(verdict)}</p>
<table>{rows}</table>
<p><small>{meta}</small></p>
{body}
</body></html>
"""
    path = outdir / "index.html"
    tmp = outdir / f".index.{os.getpid()}.tmp.html"
    tmp.write_text(page, encoding="utf-8")
    os.replace(tmp, path)
    cache.prune()
    shown = {f for _, f in figs}
    for old in outdir.glob("exposure_*.png"):    # of an earlier report with more exposures
        if old.name not in shown:
            old.unlink(missing_ok=True)
    return path
