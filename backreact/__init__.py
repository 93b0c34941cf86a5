"""backreact: self-consistent expansion histories sourced by inflationary memory.

The public API is re-exported here lazily, so that ``import backreact`` (and config
validation) does not import JAX; the first use of a JAX-backed name imports it.
"""

from __future__ import annotations

import importlib
from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("backreact")
except PackageNotFoundError:  # running from a source tree without installation
    __version__ = "0+unknown"

_LAZY = {
    "load_config": "backreact.config",
    "parse_config": "backreact.config",
    "ConfigError": "backreact.config",
    "Config": "backreact.config",
    "FlatLCDM": "backreact.reference",
    "RunRecord": "backreact.io",
    "read_run": "backreact.io",
    "write_run": "backreact.io",
    "RunFileError": "backreact.io",
    "ExpansionModel": "backreact.background",
    "History": "backreact.background",
    "expansion_history": "backreact.background",
    "model_from_config": "backreact.background",
    "run_scenario": "backreact.run",
    "HubbleTable": "backreact.tables",
    "TableError": "backreact.tables",
    "read_hubble_table": "backreact.tables",
    "write_hubble_table": "backreact.tables",
    "shipped_table": "backreact.tables",
    "chi_square": "backreact.tables",
    "compare_run": "backreact.compare",
    "matching_lcdm": "backreact.compare",
    "RunHubble": "backreact.compare",
    "plot_runs": "backreact.plot",
    "RunResult": "backreact.run",
}

__all__ = sorted(_LAZY) + ["__version__"]


def __getattr__(name: str):
    if name in _LAZY:
        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'backreact' has no attribute {name!r}")


def __dir__():
    return __all__
