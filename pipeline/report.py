# SPDX-License-Identifier: BSD-3-Clause
"""The night's quality-control report: PNG figures and a self-contained ``index.html``.

Everything is drawn with matplotlib's Agg backend into ``WORK/report/``; the HTML
references the PNG files beside it and needs no network. Inputs are product
views (``view["name"]``, ``name in view``, ``view.attrs``): the ``binary``
products of the night, optionally earlier stages' products for calibration QC,
and the astrometry table.
"""

from __future__ import annotations

import html
import os
from pathlib import Path

import numpy as np

__all__ = ["build_report"]

_FLAG_COLOUR = {0: "#1a7f37"}


def _plt():
    import matplotlib
    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt
    return plt


def _save(fig, outdir: Path, name: str) -> str:
    path = outdir / name
    tmp = outdir / f".{name}.{os.getpid()}.tmp.png"
    fig.savefig(tmp, dpi=90, format="png")
    _plt().close(fig)
    os.replace(tmp, path)
    return name


def _spatial_freq(uvw, wave):
    """|B| / lambda in Mlambda, shape (baseline, wave)."""
    return np.hypot(uvw[:, 0], uvw[:, 1])[:, None] / wave[None, :] / 1e6


def _exposure_figure(view, outdir: Path, idx: int) -> str:
    plt = _plt()
    a = view.attrs
    uvw, wave = np.asarray(view["uvw"]), np.asarray(view["wave"])
    f = _spatial_freq(uvw, wave)
    fig, ax = plt.subplots(2, 3, figsize=(15, 8.5))
    # uv coverage (both signs of each baseline), coloured by wavelength.
    ax0 = ax[0, 0]
    for s in (1, -1):
        sc = ax0.scatter(s * uvw[:, 0, None] / wave / 1e6, s * uvw[:, 1, None] / wave / 1e6,
                         c=np.broadcast_to(wave * 1e6, f.shape), s=6, cmap="viridis")
    ax0.set_xlim(ax0.get_xlim()[::-1])
    ax0.set(xlabel="u [Mlambda] (East left)", ylabel="v [Mlambda]", title="uv coverage",
            aspect="equal")
    fig.colorbar(sc, ax=ax0, label="wavelength [um]")
    # V2 and model.
    v2, e2, m2 = view["vis2"], view["vis2_err"], view["model_vis2"]
    for p in range(v2.shape[0]):
        ax[0, 1].errorbar(f.ravel(), v2[p].ravel(), e2[p].ravel(), fmt=".", ms=2, lw=0.5,
                          alpha=0.6, label="data" if p == 0 else None)
    for b in range(f.shape[0]):
        ax[0, 1].plot(f[b], m2[b], "k-", lw=0.8, label="model" if b == 0 else None)
    ax[0, 1].set(xlabel="spatial frequency [Mlambda]", ylabel="V2", title="squared visibility")
    ax[0, 1].legend(fontsize=8)
    # Closure phases against the longest baseline of each triangle.
    tri = [(0, 1, 2), (0, 1, 3), (0, 2, 3), (1, 2, 3)]
    bl = [(0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3)]
    ft = np.array([np.max([f[bl.index(p)] for p in ((i, j), (j, k), (i, k))], axis=0)
                   for i, j, k in tri])
    t3, et, mt = view["t3phi"], view["t3phi_err"], view["model_t3phi"]
    for p in range(t3.shape[0]):
        ax[0, 2].errorbar(ft.ravel(), np.degrees(t3[p]).ravel(), np.degrees(et[p]).ravel(),
                          fmt=".", ms=2, lw=0.5, alpha=0.6)
    for t in range(ft.shape[0]):
        ax[0, 2].plot(ft[t], np.degrees(mt[t]), "k-", lw=0.8)
    ax[0, 2].set(xlabel="max spatial frequency of triangle [Mlambda]",
                 ylabel="closure phase [deg]", title="closure phases")
    # Normalised residuals.
    r2 = ((v2 - m2) / e2).ravel()
    rt = (np.angle(np.exp(1j * (t3 - mt))) / et).ravel()
    fb = np.broadcast_to(f, v2.shape).ravel()
    ftb = np.broadcast_to(ft, t3.shape).ravel()
    ax[1, 0].plot(fb, r2, ".", ms=3, label="V2")
    ax[1, 0].plot(ftb, rt, ".", ms=3, label="closure phase")
    if "visphi" in view:
        rp = (np.angle(np.exp(1j * (view["visphi"] - view["model_visphi"]))) / view["visphi_err"])
        ax[1, 0].plot(np.broadcast_to(f, rp.shape).ravel(), rp.ravel(), ".", ms=3,
                      label="referenced phase")
    for y in (-3, 3):
        ax[1, 0].axhline(y, color="grey", lw=0.6, ls="--")
    ax[1, 0].set(xlabel="spatial frequency [Mlambda]", ylabel="(data - model) / error",
                 title=f"residuals, chi2_red = {a.get('chi2_red', np.nan):.2f}")
    ax[1, 0].legend(fontsize=8)
    # chi2 map with the minima.
    cmap = view["chi2_map"]
    gx, gy = view["grid_dra"], view["grid_ddec"]
    best = np.nanmin(cmap)
    shown = (cmap - best) / max(1.0, float(a.get("chi2_red", 1.0)))
    im = ax[1, 1].imshow(shown, origin="lower", cmap="magma_r", vmin=0,
                         vmax=max(np.nanpercentile(shown, 25), 1.0),
                         extent=(gx[0], gx[-1], gy[0], gy[-1]))
    ax[1, 1].set_xlim(gx[-1], gx[0])   # East to the left, as on the sky
    mins = view["minima"]
    ax[1, 1].plot(mins[:, 0], mins[:, 1], "c+", ms=8, label="grid minima")
    ax[1, 1].plot(a.get("dra"), a.get("ddec"), "go", mfc="none", ms=10, label="best fit")
    if np.isfinite(a.get("runner_up_dra", np.nan)):
        ax[1, 1].plot(a["runner_up_dra"], a["runner_up_ddec"], "bs", mfc="none", ms=9,
                      label=f"runner-up (dchi2 {a.get('runner_up_dchi2', np.nan):.3g})")
    ax[1, 1].set(xlabel="dRA cos Dec [mas] (East left)", ylabel="dDec [mas]",
                 title="global search: (chi2 - chi2_min) / max(1, chi2_red)")
    ax[1, 1].legend(fontsize=7, loc="best", framealpha=0.5)
    fig.colorbar(im, ax=ax[1, 1])
    # Text summary.
    ax[1, 2].axis("off")
    lines = [f"{a.get('exposure', '')}  ({a.get('target', '')})",
             f"MJD {a.get('mjd', np.nan):.5f}",
             f"dRA  {a.get('dra', np.nan):.4f} +- {a.get('dra_err', np.nan):.4f} mas",
             f"dDec {a.get('ddec', np.nan):.4f} +- {a.get('ddec_err', np.nan):.4f} mas",
             f"corr {a.get('dra_ddec_corr', np.nan):.3f}",
             f"sep  {a.get('sep', np.nan):.4f} mas, PA {a.get('pa', np.nan):.3f} deg",
             f"flux ratio {a.get('flux_ratio', np.nan):.4g} "
             f"+- {a.get('flux_ratio_err', np.nan):.2g}",
             f"chi2_red {a.get('chi2_red', np.nan):.2f}, ndata {a.get('ndata', 0)}",
             f"errors from: {a.get('error_source', '?')} "
             f"(bootstrap: {a.get('bootstrap_kind', '?')})",
             f"flag {a.get('flag', -1)} {a.get('flag_names', '')}"]
    ax[1, 2].text(0.0, 1.0, "\n".join(lines), va="top", family="monospace", fontsize=9)
    fig.suptitle(f"{a.get('exposure', '')}: {a.get('target', '')}")
    # fixed margins: the figure's layout never changes, and an automatic layout costs
    # a third of the drawing time (one of these per exposure)
    fig.subplots_adjust(left=0.05, right=0.97, bottom=0.07, top=0.92, wspace=0.3,
                        hspace=0.32)
    return _save(fig, outdir, f"exposure_{idx:03d}.png")


def _night_figure(table, outdir: Path) -> str | None:
    if table is None or len(table) == 0:
        return None
    plt = _plt()
    t = table
    good = np.asarray(t["flag"]) == 0
    fig, ax = plt.subplots(2, 3, figsize=(15, 7), sharex=True)
    hours = (np.asarray(t["mjd"]) - np.floor(np.nanmin(t["mjd"]))) * 24
    for a_, col, scale, unit in ((ax[0, 0], "dra", 1e3, "uas"), (ax[0, 1], "ddec", 1e3, "uas"),
                                 (ax[0, 2], "sep", 1e3, "uas"), (ax[1, 0], "pa", 1.0, "deg"),
                                 (ax[1, 1], "flux_ratio", 1.0, "")):
        y, e = np.asarray(t[col], float), np.asarray(t[col + "_err"], float)
        ref = np.nanmedian(y)
        y, e = (y - ref) * scale, e * scale
        a_.errorbar(hours[good], y[good], e[good], fmt="o", ms=4)
        if (~good).any():
            a_.errorbar(hours[~good], y[~good], e[~good], fmt="x", color="red", ms=6)
        a_.axhline(0, color="grey", lw=0.6)
        a_.set_title(f"{col} - {ref:.5g}", fontsize=9)
        a_.set_ylabel(f"{col} - median [{unit}]")
    ax[1, 2].plot(hours[good], np.asarray(t["chi2_red"])[good], "o")
    ax[1, 2].plot(hours[~good], np.asarray(t["chi2_red"])[~good], "x", color="red")
    ax[1, 2].axhline(1, color="grey", lw=0.6)
    ax[1, 2].set_ylabel("reduced chi2")
    for a_ in ax[1]:
        a_.set_xlabel("hours since MJD floor (UTC)")
    fig.suptitle("astrometry of the night (red crosses: flagged)")
    fig.tight_layout()
    return _save(fig, outdir, "night_astrometry.png")


def _qc_figure(qc: dict, binaries, outdir: Path) -> str | None:
    """Calibration QC from whatever earlier products are given (by stage name)."""
    plt = _plt()
    panels = []
    for v in qc.get("flat", []):
        if "profile_sigma" in v:
            panels.append((f"trace cross-profile sigma [px] ({v.attrs.get('label', '')})",
                           v["profile_sigma"], "trace"))
    for v in qc.get("wavecal", []):
        if "wave_measured" in v and "wave_pixel" in v:
            res = (np.asarray(v["wave_measured"], float) - np.asarray(v["wave_pixel"], float))
            panels.append((f"wavelength-law residuals [nm] ({v.attrs.get('label', '')})",
                           res * 1e9, "trace"))
        elif "wave_pixel" in v:
            w = np.asarray(v["wave_pixel"], float)
            panels.append(("trace wavelength minus median of traces [nm]",
                           (w - np.nanmedian(w, axis=0)) * 1e9, "trace"))
    for v in qc.get("combiner", []):
        if "condition" in v:
            panels.append((f"combiner condition number ({v.attrs.get('label', '')})",
                           np.asarray(v["condition"]), "pol"))
    rej = [("_".join(str(v.attrs.get("label", "")).split("_")[-2:]),
            1 - np.asarray(v["frame_valid"], bool).mean())
           for v in qc.get("reference", []) if "frame_valid" in v]
    if not rej:      # else the science exposures' own record (calibrate product attribute)
        rej = [(b.attrs.get("exposure", ""), b.attrs.get("frac_rejected", np.nan))
               for b in binaries]
    if not panels and not any(np.isfinite(r[1]) for r in rej):
        return None
    n = len(panels) + 1
    ncol = min(3, n)
    nrow = int(np.ceil(n / ncol))
    fig, ax = plt.subplots(nrow, ncol, figsize=(5 * ncol, 3.6 * nrow),
                           squeeze=False)
    ax = ax.ravel()
    for a_, (title, data, kind) in zip(ax, panels):
        data = np.atleast_2d(data)
        for row in data.reshape(-1, data.shape[-1]):
            a_.plot(row, lw=0.6)
        a_.set(title=title, xlabel="pixel / channel")
    a_ = ax[len(panels)]
    names = [r[0] for r in rej]
    a_.bar(range(len(rej)), [r[1] for r in rej], color="tab:orange")
    a_.set_xticks(range(len(rej)), names, rotation=70, fontsize=6)
    a_.set(title="fraction of frames rejected", ylim=(0, 1))
    for extra in ax[len(panels) + 1:]:
        extra.axis("off")
    fig.tight_layout()
    return _save(fig, outdir, "calibration_qc.png")


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
                 failed=()) -> Path:
    """Write the figures and ``index.html`` into ``outdir``; returns the HTML path.

    Parameters
    ----------
    outdir : path, created if needed (``WORK/report``)
    binaries : sequence of ``binary`` product views, in time order
    table : astropy Table of the night's astrometry (``pipeline.astrometry_table``) or None
    qc : mapping stage name -> list of product views (``flat``, ``wavecal``, ``combiner``,
        ``reference``), or None
    """
    outdir = Path(outdir)
    outdir.mkdir(parents=True, exist_ok=True)
    figs = []
    night = _night_figure(table, outdir)
    if night:
        figs.append(("Astrometry of the night", night))
    qcfig = _qc_figure(qc or {}, binaries, outdir)
    if qcfig:
        figs.append(("Calibration quality control", qcfig))
    for k, b in enumerate(binaries):
        figs.append((f"Exposure {b.attrs.get('exposure', k)}", _exposure_figure(b, outdir, k)))
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
    return path
