# SPDX-License-Identifier: BSD-3-Clause
"""Numeric kernels are pure: pipeline/numerics/* import no storage, scheduling or path
modules (h5py, dask, pathlib, os, astropy.io...) and open no files (DEVELOPERS.md, "numerics/ holds pure kernels")."""

import ast
from pathlib import Path

import pytest

NUMERICS = sorted((Path(__file__).parents[1] / "pipeline" / "numerics").glob("*.py"))
FORBIDDEN_MODULES = {"h5py", "dask", "distributed", "pathlib", "os", "shutil", "io", "pickle",
                     "tempfile", "glob", "tomllib"}
FORBIDDEN_CALLS = {"open", "save", "savez", "savez_compressed", "load", "loadtxt", "savetxt",
                   "genfromtxt", "fromfile", "tofile", "memmap", "writeto", "getdata"}


def _violations(path: Path) -> list[str]:
    tree = ast.parse(path.read_text(), filename=str(path))
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            names = [node.module or ""] if node.level == 0 else []
        else:
            names = []
        for name in names:
            if name.split(".")[0] in FORBIDDEN_MODULES or name.startswith("astropy.io"):
                found.append(f"line {node.lineno}: imports {name}")
        if isinstance(node, ast.Call):
            f = node.func
            name = f.id if isinstance(f, ast.Name) else f.attr if isinstance(f, ast.Attribute) else ""
            if name in FORBIDDEN_CALLS:
                found.append(f"line {node.lineno}: calls {name}()")
    return found


@pytest.mark.parametrize("path", NUMERICS, ids=lambda p: p.name)
def test_numerics_module_is_pure(path):
    assert _violations(path) == []


def test_the_lint_catches_violations(tmp_path):
    bad = tmp_path / "bad.py"
    bad.write_text("import h5py\nfrom dask import array\nimport numpy as np\n"
                   "x = np.load('f.npy')\nwith open('f') as fh: pass\n")
    assert len(_violations(bad)) == 4
