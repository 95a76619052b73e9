"""harness: online-SGD simulations of two-layer networks held against their order-parameter ODEs."""

import jax

# The theory and every order parameter are computed in float64; simulations choose their
# own dtype explicitly (run.dtype), so enabling 64-bit types here changes no default draw.
jax.config.update("jax_enable_x64", True)

__version__ = "0.1.0"
