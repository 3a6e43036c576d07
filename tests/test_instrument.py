# SPDX-License-Identifier: BSD-3-Clause
"""The instrument model loader: the real file, and broken files that must raise
ConfigError naming the file and the field."""

import numpy as np
import pytest

from pipeline.errors import ConfigError
from pipeline.instrument import DEFAULT_INSTRUMENT, load_instrument


def test_real_file_loads(instrument):
    inst = load_instrument(DEFAULT_INSTRUMENT)
    assert inst.n_telescope == 4 and inst.combiner.n_output == 24
    assert inst.combiner.baselines == ((0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3))
    # B_ij = P_j - P_i
    p = inst.station_enu_m
    np.testing.assert_allclose(inst.baseline_enu_m[2], p[3] - p[0])
    # baselines 40-130 m (product brief)
    length = np.linalg.norm(inst.baseline_enu_m, axis=1)
    assert length.min() > 40 and length.max() < 130
    for name in ("low", "medium"):
        w = inst.setup(name).nominal_wavelength_m()
        assert 1.9e-6 < w.min() and w.max() < 2.5e-6         # K band
    assert inst.fringe_tracker.nominal_wavelength_m().size == inst.fringe_tracker.n_wave
    assert set(inst.detectors) >= {"science", "ft"}


def _edit(tmp_path, old, new):
    text = DEFAULT_INSTRUMENT.read_text()
    assert old in text
    path = tmp_path / "broken.toml"
    path.write_text(text.replace(old, new, 1))
    return path


@pytest.mark.parametrize("old,new,field", [
    ("latitude_deg = -37.41\n", "", "site.latitude_deg"),
    ("diameter_m = 8.1", 'diameter_m = "big"', "telescope.diameter_m"),
    ("n_wave = 6", "n_wave = 6.5", "fringe_tracker.n_wave"),
    ("gain_e_per_adu = 2.0", "gain_e_per_adu = -2.0", "detectors.science.gain_e_per_adu"),
    ("saturation_adu = 60000", "saturation_adu = 70000", "detectors.science.saturation_adu"),
    ('polarisation = ["joint", "split"]', 'polarisation = ["both"]', "setups.low.polarisation"),
    ("baselines = [[0, 1], [0, 2]", "baselines = [[0, 2], [0, 1]", "combiner.baselines"),
])
def test_broken_field_is_named(tmp_path, old, new, field):
    path = _edit(tmp_path, old, new)
    with pytest.raises(ConfigError) as exc:
        load_instrument(path)
    assert str(path) in str(exc.value) and field in str(exc.value)


def test_missing_section(tmp_path):
    path = _edit(tmp_path, "[metrology]\nlaser_vacuum_wavelength_m = 1.5504e-6\n", "")
    with pytest.raises(ConfigError, match=r"broken\.toml.*\[metrology\]"):
        load_instrument(path)


def test_bad_toml(tmp_path):
    path = _edit(tmp_path, "[site]", "[site")
    with pytest.raises(ConfigError, match=r"broken\.toml.*not valid TOML"):
        load_instrument(path)


def test_missing_file(tmp_path):
    with pytest.raises(ConfigError, match=r"nothing\.toml.*not found"):
        load_instrument(tmp_path / "nothing.toml")
