"""Shared helpers for the tests: small, fast scenarios that still contain every era."""

from __future__ import annotations

import functools

from backreact.config import parse_config

#: Grid small enough for CI (a history in milliseconds after compilation) that still has
#: inflation, reheating, radiation, matter and the late segment.
SMALL_GRID = {
    "grid.points_inflation": 81,
    "grid.points_reheating": 40,
    "grid.points_radiation_matter": 120,
    "grid.points_late": 60,
}


def make_config(text: str = "[inflation]\n", small: bool = True, **overrides):
    """Parse ``text`` and apply dotted-key overrides (``inflation__efolds=30`` style)."""
    cfg = parse_config(text)
    values = dict(SMALL_GRID) if small else {}
    values.update({k.replace("__", "."): v for k, v in overrides.items()})
    return cfg.with_overrides(values)


@functools.cache
def solved(text: str, small: bool = True, **overrides):
    """(model, history) for a config, cached across tests (numpy arrays)."""
    import equinox as eqx
    import jax
    import numpy as np

    from backreact.background import expansion_history, model_from_config

    cfg = make_config(text, small, **overrides)
    model = model_from_config(cfg)
    hist = eqx.filter_jit(expansion_history)(model)
    return cfg, model, jax.tree_util.tree_map(np.asarray, hist)
