"""Import JAX configured the way backreact needs it: float64 on the CPU.

Every module that uses JAX imports it through here, so x64 is on before the first
array is made (H spans more than 50 orders of magnitude; float32 would not do).
"""

import os

os.environ.setdefault("JAX_PLATFORMS", "cpu")

import jax  # noqa: E402

jax.config.update("jax_enable_x64", True)

import jax.numpy as jnp  # noqa: E402

__all__ = ["jax", "jnp"]
