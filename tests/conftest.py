import os

# Persistent JAX compilation cache: compiled histories are reused across test runs (CI
# keeps the folder between steps of one run); tests never depend on it.
os.environ.setdefault(
    "JAX_COMPILATION_CACHE_DIR", os.path.join(os.path.dirname(__file__), "..", ".jax_cache")
)
os.environ.setdefault("JAX_PERSISTENT_CACHE_MIN_COMPILE_TIME_SECS", "1")
os.environ.setdefault("JAX_PLATFORMS", "cpu")
# The tests are dominated by XLA compilation of the exact propagator (tens of seconds per
# distinct program, ~0.1 s per evaluation). Backend optimization level 0 and the classic
# (non-MLIR) CPU fusion emitters compile the exact propagator in 11 s instead of 26 s and
# run it ~2x slower: a net saving of CI time. Neither changes the float64 arithmetic the
# tolerances can see (no fast-math at any level). Set XLA_FLAGS yourself to test at the
# production settings.
os.environ.setdefault("XLA_FLAGS", "--xla_backend_optimization_level=0 --xla_cpu_use_fusion_emitters=false")


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
