import os

# Persistent JAX compilation cache: compiled histories are reused across test runs (CI
# keeps the folder between steps of one run); tests never depend on it.
os.environ.setdefault(
    "JAX_COMPILATION_CACHE_DIR", os.path.join(os.path.dirname(__file__), "..", ".jax_cache")
)
os.environ.setdefault("JAX_PERSISTENT_CACHE_MIN_COMPILE_TIME_SECS", "1")
os.environ.setdefault("JAX_PLATFORMS", "cpu")
