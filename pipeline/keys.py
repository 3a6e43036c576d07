# SPDX-License-Identifier: BSD-3-Clause
"""Content keys of products: a deterministic hash of everything a product depends on.

key = tokenize(stage name, stage version, parameters, unit label and meta,
identities of the raw files read, keys of the upstream products), with dask's
``tokenize`` in deterministic mode. Raw files enter by identity (path, size,
mtime, header hash), never by pixel content, so keys are known without
reading or recomputing anything.
"""

from __future__ import annotations

import dataclasses
import json

from dask.base import tokenize

__all__ = ["params_dict", "params_json", "unit_key"]


def params_dict(params) -> dict:
    """A params dataclass (or mapping, or None) as a plain sorted dict."""
    if params is None:
        return {}
    if dataclasses.is_dataclass(params):
        params = dataclasses.asdict(params)
    return {k: params[k] for k in sorted(params)}


def params_json(params) -> str:
    return json.dumps(params_dict(params), sort_keys=True, default=repr)


def unit_key(stage: str, version: str, params, label: str, meta, raw_identities,
             upstream_keys) -> str:
    """The content key of one unit's product (32 hex digits).

    Parameters
    ----------
    stage, version : str
    params : params dataclass instance (or mapping)
    label : str, the unit's label
    meta : mapping, the unit's meta
    raw_identities : sequence of tuple, (path, size, mtime_ns, header sha256) per raw file
    upstream_keys : mapping role -> key of each upstream product
    """
    return tokenize("twinfield-product", stage, version, params_dict(params), label,
                    dict(meta), [tuple(i) for i in raw_identities],
                    {k: upstream_keys[k] for k in sorted(upstream_keys)},
                    ensure_deterministic=True)
