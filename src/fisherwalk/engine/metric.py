"""A metric: the one type for the geometry a sampler moves in.

Dense today: the shape S with S Sᵀ the proposal covariance up to a scale (random walk)
or the inverse mass matrix (gradient samplers), and the lower factor L of the precision
P = L Lᵀ the walker believes (H, the observed Fisher information, unless a warm-up
re-estimated it). Samplers use only the operations below (whiten, unwhiten, the inverse
mass matrix, the spectrum, the record), so a diagonal or low-rank-plus-diagonal metric
can be added as another kind with the same operations without touching a sampler.

The whitening map is z = W⁻¹ (theta - mode), W the lower Cholesky factor of S Sᵀ: the
factor BlackJAX itself takes of a dense ``inverse_mass_matrix``
(``blackjax.mcmc.metrics.gaussian_euclidean``), so that a sampler run on z with an
identity metric follows BlackJAX's own trajectory on theta.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
from scipy.linalg import cholesky as _host_cholesky
from scipy.linalg import solve_triangular

__all__ = ["Metric", "spectrum_of", "whitening_factor", "to_whitened"]


def spectrum_of(shape, cholesky) -> np.ndarray:
    """Eigenvalues of A = Sᵀ P S with P = L Lᵀ: the squared singular values of Lᵀ S."""
    m = np.asarray(cholesky).T @ np.asarray(shape)
    return np.sort(np.linalg.svd(m, compute_uv=False) ** 2)


def whitening_factor(cholesky) -> np.ndarray:
    """W = lower Cholesky factor of H⁻¹ from L (L Lᵀ = H), computed on the host.

    H⁻¹ = L⁻ᵀ L⁻¹ is formed by one triangular solve; W is what BlackJAX computes from a
    dense ``inverse_mass_matrix`` (``metrics.gaussian_euclidean``), which makes the
    whitened chains match BlackJAX's original-coordinate ones key for key.
    """
    chol = np.asarray(cholesky)
    shape = solve_triangular(chol, np.eye(chol.shape[0], dtype=chol.dtype), lower=True).T
    inverse = shape @ shape.T
    return _host_cholesky(0.5 * (inverse + inverse.T), lower=True)


def to_whitened(positions, mode, whitening) -> np.ndarray:
    """(..., d) original positions -> whitened z = W⁻¹ (theta - mode), on the host."""
    centred = np.asarray(positions) - np.asarray(mode)
    flat = centred.reshape(-1, centred.shape[-1])
    z = solve_triangular(np.asarray(whitening), flat.T, lower=True).T
    return z.reshape(centred.shape)


class Metric(NamedTuple):
    """A dense metric: S (S Sᵀ the inverse mass matrix) and L (L Lᵀ = P)."""

    shape: np.ndarray  # (d, d) S
    whitening: np.ndarray  # (d, d) lower L, L Lᵀ = P, the precision the walker believes
    kind: str  # "fisher", "diagonal", "identity", "user", "saved" or "warm-up"

    @property
    def dim(self) -> int:
        return int(np.shape(self.shape)[0])

    @property
    def inverse_mass_matrix(self) -> np.ndarray:
        """S Sᵀ, BlackJAX's dense ``inverse_mass_matrix`` (symmetrised)."""
        s = np.asarray(self.shape)
        m = s @ s.T
        return 0.5 * (m + m.T)

    @property
    def spectrum(self) -> np.ndarray:
        """(d,) eigenvalues of A = Sᵀ P S, ascending (all ones when S Sᵀ = P⁻¹)."""
        return spectrum_of(self.shape, self.whitening)

    def precision_cholesky(self, matched: bool) -> np.ndarray:
        """Lower C with C Cᵀ = (S Sᵀ)⁻¹ (L itself when the metric matches P)."""
        if matched:
            return np.asarray(self.whitening)
        return np.linalg.cholesky(np.linalg.inv(self.inverse_mass_matrix))

    def factor(self, matched: bool) -> np.ndarray:
        """W, lower, W Wᵀ = S Sᵀ: the whitening map theta = mode + W z of the samplers
        that run on z (from the precision's factor, as BlackJAX takes it from a dense
        inverse mass matrix)."""
        return whitening_factor(self.precision_cholesky(matched))

    def whiten(self, positions, mode, factor) -> np.ndarray:
        """(..., d) theta -> z = W⁻¹ (theta - mode), W = ``factor`` (lower), on the host."""
        return to_whitened(positions, mode, factor)

    def unwhiten(self, z, mode, factor) -> np.ndarray:
        """(..., d) z -> theta = mode + W z, on the host."""
        return np.asarray(mode) + np.asarray(z) @ np.asarray(factor).T

    def record(self) -> dict:
        """The metric's fields for a tuning record (plain arrays)."""
        return {"shape_kind": str(self.kind), "shape": np.asarray(self.shape),
                "whitening": np.asarray(self.whitening)}
