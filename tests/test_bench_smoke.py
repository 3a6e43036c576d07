# SPDX-License-Identifier: BSD-3-Clause
"""Smoke tests of the `make bench` helpers on tiny data (no timing assertions)."""

import json
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np

from pipeline import bench
from pipeline.simulate.scenario import SCENARIO_DIR


def test_scaled_scenario_multiplies_on_sky_frames_only():
    text = (SCENARIO_DIR / "tiny.toml").read_text()
    orig, big = tomllib.loads(text), tomllib.loads(bench.scaled_scenario_text(text, 4))
    # truth: the original file as parsed by tomllib; on-sky nframe x4, the rest unchanged
    assert [e["nframe"] * 4 for e in orig["sequence"]] == [e["nframe"] for e in big["sequence"]]
    assert big["calibration"] == orig["calibration"]
    assert big["targets"] == orig["targets"]


_RSS_PROBE = """
import json, numpy as np
from pathlib import Path
from pipeline import bench
blob = np.ones(20_000_000 // 8)                  # 20 MB resident while we look
rss = bench.tree_rss_bytes(__import__("os").getpid())
status = Path("/proc/self/status").read_text()
vm_rss = int(next(l for l in status.splitlines() if l.startswith("VmRSS")).split()[1]) * 1024
print(json.dumps([rss, vm_rss, blob.nbytes]))
"""


def test_tree_rss_matches_proc_status():
    # A fresh interpreter, so that no child process (a test's leftover pool) adds to
    # the tree's memory. Independent source: the kernel's VmRSS of that process;
    # 5 % covers pages touched between the two reads.
    out = subprocess.run([sys.executable, "-c", _RSS_PROBE], capture_output=True,
                         text=True, check=True, cwd=Path(__file__).parents[1])
    rss, vm_rss, blob = json.loads(out.stdout)
    assert abs(rss - vm_rss) <= 0.05 * vm_rss
    assert rss > blob


def test_nominal_p2vm_inverts_the_v2pm(instrument):
    from pipeline.numerics.combiner_model import build_v2pm
    p2vm = bench._nominal_p2vm(instrument, 5)
    assert p2vm.shape == (1, 5, 16, 24)
    comb = instrument.combiner
    pairs = comb.output_pair
    t = np.zeros((1, 24, 4, 5))
    t[:, np.arange(24), pairs[:, 0]] = 1.0
    t[:, np.arange(24), pairs[:, 1]] = 1.0
    t /= t.sum(axis=1, keepdims=True)
    c = np.full((1, 24, 5), comb.nominal_contrast)
    ph = np.broadcast_to(comb.output_nominal_phase_rad[None, :, None], c.shape)
    v2pm = build_v2pm(t, c, ph, pairs)
    # definition of a left inverse: P2VM V2PM = identity (16 unknowns); 1e-9: rounding
    np.testing.assert_allclose(p2vm[0] @ v2pm[0], np.broadcast_to(np.eye(16), (5, 16, 16)),
                               atol=1e-9)


def test_kernel_benchmarks_tiny():
    out = bench.kernel_benchmarks(ft_frames=64, sc_frames=1, min_s=0.0, binary_repeat=1,
                                  binary_radius_mas=3.0)
    for key in ("ft_frames_per_s_core", "sc_pixels_per_s_core", "binary_search_s"):
        assert np.isfinite(out[key]) and out[key] > 0
    assert out["kernel_sizes"]["sc_pixels_per_frame"] == 208 * 256   # calib/instrument.toml


def test_io_floor_counts_every_byte(tiny_night, tmp_path):
    work = tmp_path / "work"
    (work / "stage").mkdir(parents=True)
    (work / "stage" / "a.h5").write_bytes(b"x" * 1000)
    (work / "b.json").write_bytes(b"y" * 24)
    io = bench.io_floor(tiny_night, work, scratch=tmp_path / "scratch")
    # truth: file sizes from the file system
    assert io["raw_bytes"] == bench.night_bytes(tiny_night)
    assert io["product_bytes"] == 1024 and io["product_files"] == 2
    assert 0 < io["raw_data_bytes"] <= io["raw_bytes"]
    assert not (tmp_path / "scratch").exists()


def test_child_answers_and_table(tmp_path):
    res = bench.run_child({"what": "kernels",
                           "kw": {"ft_frames": 16, "sc_frames": 1, "min_s": 0.0,
                                  "binary_repeat": 1, "binary_radius_mas": 2.0}})
    assert res["returncode"] == 0 and res["tree_peak_rss_bytes"] > 0
    text = bench._table({**res, "io_floor_ratio": 2.0, "cores": 2,
                         "reduce_stage_seconds": {"wavecal": {"units": 3, "cpu_s": 22.0,
                                                              "wall_s": 23.9},
                                                  "binary": {"units": 25, "cpu_s": 23.9,
                                                             "wall_s": 24.2}}})
    assert "io_floor_ratio" in text and "met" in text
    # the stages by CPU, largest first
    assert text.index("binary") < text.index("wavecal") and "   23.9     24.2" in text


def test_change_param_moves_a_binary_parameter_to_a_new_value(tmp_path):
    from pipeline.config import load_params
    from recipes import STAGES
    config = tmp_path / "bench-params.toml"
    config.write_text("[binary]\nambiguous_dchi2 = 10.0\n")
    assert bench._change_param(config, "ambiguous_dchi2", 2.0) == 12.0
    assert bench._change_param(config, "n_boot", 1) == 51      # from BinaryParams' default
    assert bench._change_param(config, "n_boot", 1) == 52
    # truth: the file as the reduction reads it (tomllib through pipeline.config)
    assert tomllib.loads(config.read_text()) == {"binary": {"ambiguous_dchi2": 12.0,
                                                            "n_boot": 52}}
    params = load_params(STAGES, [config])["binary"]
    assert (params.ambiguous_dchi2, params.n_boot) == (12.0, 52)
