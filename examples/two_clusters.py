"""A user data model: inputs from a mixture of two Gaussian clusters.

  x = s mu + z,   s = +-1 with probability 1/2 each,   z ~ N(0, I_N),

with a fixed mean vector mu of norm |mu| = SEPARATION * sqrt(N) along a random direction
(drawn once from ``run.seed``; every seed sees the same clusters). Along mu the clusters
are SEPARATION * sqrt(N) apart against unit noise, so a student's local field
lambda = w . x / sqrt(N) = s (w . mu) / sqrt(N) + Gaussian is bimodal at O(1): the inputs
are not Gaussian, and the overlap error (the Gaussian formula evaluated at the measured
Q, R, T) need not match the measured test error (docs/equations.md, section 5.9).

Two factories (see README.md for the protocol):

* ``python:examples.two_clusters:inputs``: the teacher acts on the inputs themselves
  (c = x), so Omega = Phi = E[c c^T] = I + mu mu^T, given exactly;
* ``python:examples.two_clusters:cluster_labels``: the label is the cluster sign s itself
  (no teacher: R, T and the overlap error are NaN).

The mixture is centred (E[x] = 0), so E[x x^T] is also the covariance.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np

from harness.data.user import UserData

SEPARATION = 1.0
"""|mu| / sqrt(N): the half-distance between the clusters in units of the noise, times sqrt(N)."""
MEAN_KEY_INDEX = 7_001
"""fold_in index, on PRNGKey(run.seed), of the key drawing the direction of mu."""


def cluster_mean(scenario: dict) -> np.ndarray:
    """mu, float64 [N], with |mu|^2 = SEPARATION^2 N."""
    n = scenario["data"]["input_dim"]
    key = jax.random.fold_in(jax.random.PRNGKey(scenario["run"]["seed"]), MEAN_KEY_INDEX)
    direction = np.asarray(jax.random.normal(key, (n,), jnp.float64))
    return SEPARATION * np.sqrt(n) * direction / np.linalg.norm(direction)


def _sampler(mu: np.ndarray, dtype):
    """sample(key, n) -> (x [n, N], s [n]) as a pure JAX function."""
    mean = jnp.asarray(mu, dtype)

    def sample(key, count):
        sign_key, noise_key = jax.random.split(key)
        s = 2.0 * jax.random.bernoulli(sign_key, 0.5, (count,)).astype(dtype) - 1.0
        z = jax.random.normal(noise_key, (count, mean.shape[0]), dtype)
        return s[:, None] * mean + z, s

    return sample


def second_moment(mu: np.ndarray) -> np.ndarray:
    """E[x x^T] = I + mu mu^T (E[s^2] = 1, s independent of z)."""
    return np.eye(len(mu)) + np.outer(mu, mu)


def inputs(scenario: dict, dtype) -> UserData:
    """Teacher-student data on mixture inputs: the teacher reads x (c = x)."""
    mu = cluster_mean(scenario)
    draw = _sampler(mu, dtype)

    def sample(key, count):
        x, _ = draw(key, count)
        return x, x

    omega = second_moment(mu)
    return UserData(sample, omega=omega, phi=omega, latent_cov=omega)


def cluster_labels(scenario: dict, dtype) -> UserData:
    """Classification of the two clusters: the label is the cluster sign s = +-1."""
    mu = cluster_mean(scenario)
    return UserData(_sampler(mu, dtype), labels=True, omega=second_moment(mu))
