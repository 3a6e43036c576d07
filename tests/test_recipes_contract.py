# SPDX-License-Identifier: BSD-3-Clause
"""Contract every stage in recipes.STAGES must meet (one test per stage)."""

import dataclasses
import json
import re
import typing

import pytest

import recipes
from pipeline.config import DEFAULT_CONFIG, load_params
from pipeline.inventory import Inventory
from pipeline.keys import unit_key
from pipeline.stage import Stage, Unit
from rawfactory import small_night

STAGES = list(recipes.STAGES)
SAFE_LABEL = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.+-]*$")


@pytest.fixture(scope="module")
def planned(tmp_path_factory):
    """Plan every stage in order on a small night; returns {stage name: units}."""
    import numpy as np
    night = small_night(tmp_path_factory.mktemp("contract"), np.random.default_rng(5))
    inv = Inventory.scan(night)
    params = load_params(STAGES, [DEFAULT_CONFIG])
    upstream = {}
    for stage in STAGES:
        upstream[stage.name] = list(stage.plan(inv, params[stage.name], dict(upstream)) or [])
    return upstream


def test_names_and_order():
    names = [s.name for s in STAGES]
    assert len(set(names)) == len(names) and names[:2] == ["inventory", "dark"]
    for i, stage in enumerate(STAGES):
        assert isinstance(stage, Stage)
        assert set(stage.after) <= set(names[:i]), f"{stage.name}: after names a later stage"


def test_default_config_matches_every_stage():
    params = load_params(STAGES, [DEFAULT_CONFIG])
    assert set(params) == {s.name for s in STAGES}


@pytest.mark.parametrize("stage", STAGES, ids=lambda s: s.name)
def test_stage_contract(stage, planned):
    assert isinstance(stage.version, str) and stage.version
    assert SAFE_LABEL.match(stage.name)
    assert stage.granularity in typing.get_args(typing.Literal["night", "setup", "exposure"])
    assert stage.doc, "one line for `twinfield plan`"
    # Params: a frozen dataclass whose every field is typed and has a default.
    cls = stage.params
    assert dataclasses.is_dataclass(cls) and cls.__dataclass_params__.frozen
    hints = typing.get_type_hints(cls)
    for f in dataclasses.fields(cls):
        assert f.name in hints
        assert (f.default is not dataclasses.MISSING
                or f.default_factory is not dataclasses.MISSING), f"{f.name} has no default"
    p = cls()
    for f in dataclasses.fields(cls)[:1]:
        with pytest.raises(dataclasses.FrozenInstanceError):
            setattr(p, f.name, getattr(p, f.name))
    # plan: a list of Units with unique, file-name-safe labels, needs on earlier stages,
    # JSON-able meta; keys deterministic.
    units = planned[stage.name]
    assert all(isinstance(u, Unit) for u in units)
    labels = [u.label for u in units]
    assert len(set(labels)) == len(labels)
    earlier = {s.name for s in STAGES[:STAGES.index(stage)]}
    for u in units:
        assert SAFE_LABEL.match(u.label), u.label
        json.dumps(dict(u.meta))
        for role, (sname, label) in dict(u.needs).items():
            assert sname in earlier and label in {x.label for x in planned[sname]}, \
                f"{stage.name}/{u.label} needs {sname}/{label}"
        k = unit_key(stage.name, stage.version, p, u.label, u.meta, [], {})
        assert k == unit_key(stage.name, stage.version, cls(), u.label, dict(u.meta), [], {})
