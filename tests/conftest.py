import os

# Persistent JAX compilation cache: compiled histories are reused across test runs (CI
# keeps the folder between steps of one run); tests never depend on it.
os.environ.setdefault(
    "JAX_COMPILATION_CACHE_DIR", os.path.join(os.path.dirname(__file__), "..", ".jax_cache")
)
os.environ.setdefault("JAX_PERSISTENT_CACHE_MIN_COMPILE_TIME_SECS", "1")
os.environ.setdefault("JAX_PLATFORMS", "cpu")


def pytest_collection_modifyitems(config, items):
    """Tests marked slow (full convergence studies) run only with BACKREACT_SLOW=1; CI runs
    the reduced form (the k-density and stop-point convergence stay in the default set)."""
    import pytest

    if os.environ.get("BACKREACT_SLOW") == "1":
        return
    skip = pytest.mark.skip(reason="slow convergence study: set BACKREACT_SLOW=1 to run it")
    for item in items:
        if "slow" in item.keywords:
            item.add_marker(skip)
