# SPDX-License-Identifier: BSD-3-Clause
"""The ``twinfield`` command (also ``python -m pipeline.cli``).

Exit codes: 0 success; 1 some branches failed (or unreadable raw files); 2 usage or
configuration error; 3 missing calibrations at plan time (``plan``; ``reduce`` with
``[inventory] strict = true``); 4 the work directory is locked by another reduction.
Errors are one line on stderr; ``--debug`` adds the traceback.
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
from pathlib import Path

from .errors import BadInput, ConfigError, TwinfieldError

__all__ = ["main", "EXIT_OK", "EXIT_FAILED", "EXIT_USAGE", "EXIT_MISSING", "EXIT_LOCKED"]

EXIT_OK, EXIT_FAILED, EXIT_USAGE, EXIT_MISSING, EXIT_LOCKED = 0, 1, 2, 3, 4


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="twinfield", description=(
        "Reduce a night of dual-field interferometric frames to binary astrometry."),
        epilog="exit codes: 0 ok, 1 some branches failed, 2 usage/config error, "
               "3 missing calibrations, 4 work directory locked")
    p.add_argument("--debug", action="store_true", help="show tracebacks, verbose log")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    s = sub.add_parser("simulate", help="write a simulated night of raw frames")
    s.add_argument("night_dir")
    s.add_argument("--scenario", default="tiny", help="scenario name in calib/scenarios or a path")
    s.add_argument("--seed", type=int, default=1)

    s = sub.add_parser("plan", help="classify the night's files and show what will be made")
    s.add_argument("night_dir")
    s.add_argument("--config", action="append", help="TOML parameter overrides (repeatable)")

    s = sub.add_parser("reduce", help="reduce a night into a work directory")
    s.add_argument("night_dir")
    s.add_argument("-o", "--output", dest="workdir", required=True, help="work directory")
    s.add_argument("--config", action="append", help="TOML parameter overrides (repeatable)")
    s.add_argument("--scheduler", default="threads",
                   help="threads (default), processes, or tcp://HOST:PORT of a dask cluster")
    s.add_argument("--workers", type=int, default=None, help="local worker count")
    s.add_argument("--force", action="append", default=[], metavar="STAGE",
                   help="recompute this stage and its dependents even if current")
    s.add_argument("--no-helper-processes", dest="helper_processes", action="store_false",
                   help="threads scheduler: run every unit on its thread, none in "
                        "helper processes (e.g. to debug a fit or a figure)")

    s = sub.add_parser("status", help="state of every product of a work directory")
    s.add_argument("workdir")
    s.add_argument("--json", action="store_true", help="machine-readable list")

    s = sub.add_parser("rerun", help="recompute one stage and what depends on it")
    s.add_argument("workdir")
    s.add_argument("stage")
    s.add_argument("--scheduler", default="threads")
    s.add_argument("--workers", type=int, default=None)
    s.add_argument("--no-helper-processes", dest="helper_processes", action="store_false",
                   help="threads scheduler: run every unit on its thread, none in "
                        "helper processes (e.g. to debug a fit or a figure)")
    return p


def _cmd_simulate(args) -> int:
    from .simulate import simulate_night
    simulate_night(Path(args.night_dir), scenario=args.scenario, seed=args.seed)
    print(f"simulated night written to {args.night_dir}")
    return EXIT_OK


def _cmd_plan(args) -> int:
    from .engine import build_plan, plan_report
    import tempfile
    with tempfile.TemporaryDirectory() as tmp:
        plan = build_plan(args.night_dir, tmp, config=args.config)
    print(plan_report(plan))
    if plan.inventory.bad:
        return EXIT_FAILED
    return EXIT_MISSING if plan.inventory.problems() else EXIT_OK


def _report(summary, workdir) -> int:
    print(summary.text())
    work = Path(workdir)
    for what, path in (("astrometry table", work / "astrometry.ecsv"),
                       ("  (also FITS)", work / "astrometry.fits"),
                       ("  (also CSV)", work / "astrometry.csv"),
                       ("QC report", work / "report" / "index.html"),
                       ("OIFITS files", work / "oifits")):
        if path.exists():
            print(f"{what + ':':<18s} {path.resolve()}")
    return summary.exit_code


def _cmd_reduce(args) -> int:
    from .engine import reduce
    return _report(reduce(args.night_dir, args.workdir, config=args.config,
                          scheduler=args.scheduler, workers=args.workers,
                          force=tuple(args.force), debug=args.debug,
                          helper_processes=args.helper_processes), args.workdir)


def _cmd_rerun(args) -> int:
    from .engine import rerun
    return _report(rerun(args.workdir, args.stage, scheduler=args.scheduler,
                         workers=args.workers, debug=args.debug,
                         helper_processes=args.helper_processes), args.workdir)


def _cmd_status(args) -> int:
    from .engine import status
    rows = status(args.workdir)
    if args.json:
        print(json.dumps(rows, indent=1))
        return EXIT_OK
    from .store import read_failure
    counts = {}
    for r in rows:
        counts[r["state"]] = counts.get(r["state"], 0) + 1
        print(f"{r['state']:<8s} {r['stage']:<10s} {r['name']:<40s} {r['key'][:12]}")
        if r["state"] == "failed" and r["key"]:
            why = read_failure(args.workdir, r["stage"], r["name"], r["key"])
            print(f"         {why}")
    print(", ".join(f"{n} {s}" for s, n in sorted(counts.items())))
    return EXIT_OK


def main(argv=None) -> int:
    parser = _parser()
    args = parser.parse_args(argv)          # usage errors exit 2 (argparse)
    from .engine import Locked, MissingCalibrations, log
    console = logging.StreamHandler(sys.stderr)     # what is missing, before the heavy work
    console.setLevel(logging.DEBUG if args.debug else logging.WARNING)
    console.addFilter(lambda record: not getattr(record, "file_only", False))
    console.setFormatter(logging.Formatter("twinfield: %(levelname)s: %(message)s"))
    log.addHandler(console)
    try:
        return {"simulate": _cmd_simulate, "plan": _cmd_plan, "reduce": _cmd_reduce,
                "status": _cmd_status, "rerun": _cmd_rerun}[args.command](args)
    except BrokenPipeError:                 # output piped into `head` and the like
        import os
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return EXIT_OK
    except Exception as exc:
        if args.debug:
            import traceback
            traceback.print_exc()
        code = (EXIT_LOCKED if isinstance(exc, Locked) else
                EXIT_MISSING if isinstance(exc, MissingCalibrations) else
                EXIT_USAGE if isinstance(exc, (ConfigError, BadInput)) else
                EXIT_FAILED if isinstance(exc, TwinfieldError) else EXIT_FAILED)
        kind = "error" if isinstance(exc, TwinfieldError) else f"internal error ({type(exc).__name__})"
        print(f"twinfield: {kind}: {exc}", file=sys.stderr)
        return code
    except KeyboardInterrupt:
        print("twinfield: interrupted", file=sys.stderr)
        return 130
    finally:
        log.removeHandler(console)


if __name__ == "__main__":
    sys.exit(main())
