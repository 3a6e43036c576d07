# SPDX-License-Identifier: BSD-3-Clause
"""The twinfield command: sub-commands, JSON status, documented exit codes, one-line errors."""

import json
import os
import socket
import subprocess
import sys

import pytest

import pipeline.engine as engine
from pipeline.cli import main
from rawfactory import small_night, write_raw
from recipes import dark, inventory


@pytest.fixture(autouse=True)
def my_stages(monkeypatch):
    """Only the inventory and dark stages (the small night has no real lamp signal)."""
    monkeypatch.setattr(engine, "_stages", lambda: [inventory.STAGE, dark.STAGE])


@pytest.fixture
def night(tmp_path, rng):
    return small_night(tmp_path / "night", rng)


def test_reduce_status_rerun(night, tmp_path, capsys):
    work = tmp_path / "work"
    assert main(["reduce", str(night), "-o", str(work)]) == 0
    assert "3 product(s) computed" in capsys.readouterr().out
    assert main(["status", str(work), "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert all(set(r) == {"stage", "name", "key", "state", "path"} for r in rows)
    assert {(r["stage"], r["name"], r["state"]) for r in rows} == {
        ("inventory", "night", "current"), ("dark", "sci-low-joint-dit1", "current"),
        ("dark", "ft-period1ms", "current")}
    assert main(["rerun", str(work), "dark"]) == 0
    assert "2 product(s) computed, 1 reused" in capsys.readouterr().out
    assert main(["status", str(work)]) == 0
    assert "3 current" in capsys.readouterr().out


def test_exit_codes(night, tmp_path, capsys, rng):
    work = tmp_path / "work"
    bad_cfg = tmp_path / "c.toml"
    bad_cfg.write_text("[dark]\nkapa = 3\n")
    assert main(["reduce", str(night), "-o", str(work), "--config", str(bad_cfg)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "c.toml" in err and "kapa" in err   # one line, no traceback
    assert main(["rerun", str(tmp_path / "nowork"), "dark"]) == 2
    capsys.readouterr()
    # Plan time: a science exposure with no dark of its DIT -> 3.
    write_raw(night / "long.fits", "science", rng=rng, dit=5.0, mjd=61000.3, expno=99)
    assert main(["plan", str(night)]) == 3
    assert "MISSING long.fits: no dark of DIT 5 s" in capsys.readouterr().out
    # Strict inventory refuses to reduce with missing calibrations -> 3.
    strict = tmp_path / "strict.toml"
    strict.write_text("[inventory]\nstrict = true\n")
    assert main(["reduce", str(night), "-o", str(work), "--config", str(strict)]) == 3
    # Otherwise the branch fails and the rest goes on -> 1 ... here nothing consumes
    # the science file, so only a broken dark makes a failed branch.
    write_raw(night / "dark_9.fits", "dark", rng=rng, dit=9.0, header_extra={"NFRAME": 7, "EXPTIME": 63.0}, expno=98)
    assert main(["reduce", str(night), "-o", str(work)]) == 1
    assert "FAILED dark/sci-low-joint-dit9" in capsys.readouterr().out
    # Locked work directory -> 4.
    (work / engine.LOCK_FILE).write_text(json.dumps({"pid": os.getpid(),
                                                     "host": socket.gethostname()}))
    assert main(["reduce", str(night), "-o", str(work)]) == 4
    assert "another reduction" in capsys.readouterr().err
    # --debug adds the traceback.
    assert main(["--debug", "reduce", str(night), "-o", str(work)]) == 4
    assert "Traceback" in capsys.readouterr().err
    with pytest.raises(SystemExit) as info:
        main(["reduce", str(night)])                 # missing -o: usage error
    assert info.value.code == 2


def test_simulate_is_wired(monkeypatch, tmp_path, capsys):
    calls = []
    import pipeline.simulate as sim
    monkeypatch.setattr(sim, "simulate_night", lambda d, scenario, seed: calls.append(
        (d, scenario, seed)))
    assert main(["simulate", str(tmp_path / "n"), "--scenario", "tiny", "--seed", "4"]) == 0
    assert calls == [(tmp_path / "n", "tiny", 4)]


def test_module_entry_point():
    out = subprocess.run([sys.executable, "-m", "pipeline.cli", "--help"], capture_output=True,
                         text=True, check=True)
    assert "exit codes" in out.stdout and "reduce" in out.stdout
