"""Low-dimensional, smooth profile parametrisation: piecewise-linear (hat) functions on knots.

A profile's commands on the control grid are ``u = Phi @ theta`` per muscle, with ``theta`` the
knot values. Hat functions keep every command a convex combination of two knot values, so a
pressure box on the knots is exactly a box on the commands, and the coarse knot spacing acts as
the learning filter (a low-pass on the update, Bristow, Tharayil & Alleyne 2006).
"""
from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class HatBasis:
    """Hat functions on ``n_knots`` equally spaced knots spanning ``n_samples`` control samples."""

    n_samples: int
    n_knots: int

    @classmethod
    def for_grid(cls, n_samples: int, dt: float, knot_spacing: float) -> "HatBasis":
        """Knots about every ``knot_spacing`` seconds over ``n_samples`` samples of ``dt``."""
        span = (n_samples - 1) * dt
        return cls(n_samples, max(2, int(round(span / knot_spacing)) + 1))

    @property
    def n_params(self) -> int:
        """Parameters of a two-muscle profile (knots of A, then knots of B)."""
        return 2 * self.n_knots

    def matrix(self) -> np.ndarray:
        """``Phi`` (n_samples, n_knots): sample i is ``sum_j Phi[i, j] theta_j`` (read-only, built
        once per basis size)."""
        return _hat_matrix(self.n_samples, self.n_knots)

    def expand(self, theta) -> np.ndarray:
        """Commands (n_samples, 2) from parameters (2 n_knots,)."""
        theta = np.asarray(theta, dtype=float).reshape(2, self.n_knots)
        return self.matrix() @ theta.T

    def project_commands(self, commands) -> np.ndarray:
        """Least-squares knot values (2 n_knots,) of commands (n_samples, 2)."""
        phi = self.matrix()
        theta, *_ = np.linalg.lstsq(phi, np.asarray(commands, dtype=float), rcond=None)
        return theta.T.reshape(-1)

    def adjoint(self, sample_gradient) -> np.ndarray:
        """Gradient with respect to the parameters from one with respect to the commands (n_samples, 2)."""
        return (self.matrix().T @ np.asarray(sample_gradient, dtype=float)).T.reshape(-1)


@functools.lru_cache(maxsize=32)
def _hat_matrix(n_samples: int, n_knots: int) -> np.ndarray:
    pos = np.linspace(0.0, n_knots - 1, n_samples)
    left = np.minimum(np.floor(pos).astype(int), n_knots - 2)
    frac = pos - left
    phi = np.zeros((n_samples, n_knots))
    rows = np.arange(n_samples)
    phi[rows, left] = 1.0 - frac
    phi[rows, left + 1] += frac
    phi.flags.writeable = False
    return phi
