# SPDX-License-Identifier: BSD-3-Clause
"""Monte-Carlo validation of the astrometric errors: ``make validate``.

Simulates a small scenario under many seeds, reduces each night with every stage,
and compares each science exposure's ``binary`` product with the simulator's truth
file. Reports the mean and width (standard deviation) of the pulls
(recovered - true) / error of dRA, dDec and the flux ratio, the fraction of
exposures inside their 3-sigma error ellipse (Mahalanobis d^2 < 11.8 for 2 degrees
of freedom) and the median precision, into ``build/validate.json``. The statistics
cover the unflagged fits (flag 0), the ones meant for orbit fitters; the flagged
fraction is reported beside them.

Honest errors give pulls of mean 0 and width 1; with N pulls the width is known to
about 1/sqrt(2N) (0.09 for 60 pulls), hence the acceptance band 0.75-1.33 and a mean
within +-0.25.

Usage: ``python -m pipeline.validate [--seeds 30] [--scenario validate] [--out build]
[--pointing-sigma-mas 2]``
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
import tempfile
from pathlib import Path

import numpy as np

__all__ = ["pulls_of_night", "main"]


def pulls_of_night(night: Path, work: Path) -> list[dict]:
    """Per science exposure of a reduced night: pulls, Mahalanobis d^2, errors, flags."""
    from .store import ProductView
    truth = json.loads((night / "truth.json").read_text())
    out = []
    for path in sorted((work / "binary").glob("*.h5")):
        with ProductView(path) as view:
            a = view.attrs
        t = truth["files"].get(a["exposure"])
        if t is None or t.get("companion_dra_mas") is None:
            continue
        d = np.array([a["dra"] - t["companion_dra_mas"], a["ddec"] - t["companion_ddec_mas"]])
        cov = np.array(json.loads(a["cov"]))
        out.append({"exposure": a["exposure"], "flag": int(a["flag"]),
                    "pull_dra": float(d[0] / a["dra_err"]),
                    "pull_ddec": float(d[1] / a["ddec_err"]),
                    "pull_flux_ratio": float((a["flux_ratio"] - t["flux_ratio"])
                                             / a["flux_ratio_err"]),
                    "d2": float(d @ np.linalg.solve(cov, d)),
                    "dra_err_mas": float(a["dra_err"]), "ddec_err_mas": float(a["ddec_err"])})
    return out


def _stages():
    import importlib
    import recipes
    names = [s.name for s in recipes.STAGES]
    extra = [importlib.import_module(f"recipes.{n}").STAGE
             for n in ("average", "calibrate", "binary", "tables", "report") if n not in names]
    return list(recipes.STAGES) + extra


def _pointed_scenario(scenario, seed: int, sigma_mas: float, tmp: Path):
    """The scenario with every ``primary_offset_mas`` drawn from N(0, sigma) per axis:
    a pointing error that changes from night to night, as the fibre-pointing term of the
    flux-ratio error assumes (a fixed offset would test only its bias)."""
    if sigma_mas <= 0:
        return scenario
    import re
    from .instrument import CALIB_DIR
    path = Path(scenario) if Path(scenario).suffix == ".toml" else (
        CALIB_DIR / "scenarios" / f"{scenario}.toml")
    rng = np.random.default_rng([seed, 7919])
    text = re.sub(r"primary_offset_mas = \[[^\]]*\]",
                  lambda m: "primary_offset_mas = [%.4f, %.4f]" % tuple(rng.normal(0, sigma_mas, 2)),
                  path.read_text())
    out = tmp / f"{path.stem}-seed{seed}.toml"
    out.write_text(text)
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(prog="python -m pipeline.validate",
                                 description=__doc__.split("\n")[0])
    ap.add_argument("--seeds", type=int, default=30)
    ap.add_argument("--first-seed", type=int, default=100)
    ap.add_argument("--scenario", default="validate")
    ap.add_argument("--out", default="build")
    ap.add_argument("--pointing-sigma-mas", type=float, default=2.0,
                    help="draw every target's offset from its pointing per seed from "
                         "N(0, sigma) per axis (the [binary] pointing_sigma_mas the flux-ratio "
                         "error assumes); 0 keeps the scenario's offsets")
    args = ap.parse_args(argv)
    from .engine import reduce
    from .simulate import simulate_night
    rows, failures = [], []
    tmp = Path(tempfile.mkdtemp(prefix="twinfield-validate-"))
    try:
        for seed in range(args.first_seed, args.first_seed + args.seeds):
            night, work = tmp / f"night{seed}", tmp / f"work{seed}"
            scenario = _pointed_scenario(args.scenario, seed, args.pointing_sigma_mas, tmp)
            simulate_night(night, scenario=scenario, seed=seed)
            summary = reduce(night, work, stages=_stages(), progress=False)
            failures += [f"seed {seed}: {f}" for f in summary.failed]
            rows += [{"seed": seed, **r} for r in pulls_of_night(night, work)]
            shutil.rmtree(night), shutil.rmtree(work)
            print(f"seed {seed}: {len(rows)} exposures so far", file=sys.stderr)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    report = {"scenario": args.scenario, "n_seeds": args.seeds, "n_exposures": len(rows),
              "failures": failures[:20], "n_failures": len(failures)}
    good = [r for r in rows if r["flag"] == 0]      # flagged fits are not for orbit fitting
    report["n_unflagged"] = len(good)
    for key in ("pull_dra", "pull_ddec", "pull_flux_ratio"):
        v = np.array([r[key] for r in good])
        report[key] = {"mean": float(np.mean(v)) if v.size else None,
                       "width": float(np.std(v)) if v.size else None}
    if good:
        report["inside_3sigma_ellipse"] = float(np.mean([r["d2"] < 11.8 for r in good]))
        report["median_error_uas"] = float(np.median(
            [np.hypot(r["dra_err_mas"], r["ddec_err_mas"]) for r in good]) * 1e3)
    if rows:
        report["flagged_fraction"] = float(np.mean([r["flag"] != 0 for r in rows]))
    ok = bool(good) and all(report[k]["width"] is not None and 0.75 <= report[k]["width"] <= 1.33
                            and abs(report[k]["mean"]) <= 0.25
                            for k in ("pull_dra", "pull_ddec", "pull_flux_ratio"))
    report["pass"] = ok
    Path(args.out).mkdir(parents=True, exist_ok=True)
    (Path(args.out) / "validate.json").write_text(json.dumps({"summary": report, "rows": rows},
                                                             indent=1))
    print(json.dumps(report, indent=1))
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
