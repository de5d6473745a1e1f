"""Shared profile compression of the emulators: principal components of T and ln q.

Every channel's network sees the same compressed profile z besides its own gray-absorber
features (:mod:`rtemu.gray`). The raw profile is x = [T (L levels) [K], ln(max(q, q_floor))
(L levels)]; each block is standardised per level, projected on its leading principal
components and divided by the spread of its first component (not whitened: a component
keeps its natural, decreasing variance, so the network's weight decay damps the
directions the training set barely spans). The whole map is affine, z = (x - x_ref) A + a0,
and so is each block's residual off its PCA subspace, r = (x - x_ref) R + r0, which the
novelty flag uses together with the squared (diagonal) Mahalanobis distance sum z^2/var(z).

References
----------
Jolliffe, I. T. (2002). Principal Component Analysis, 2nd ed., Springer. (PCA, sec. 3.)
"""

from __future__ import annotations

import dataclasses

import numpy as np

__all__ = ["HUMIDITY_FLOOR", "ProfileCompression", "raw_profile", "fit_compression"]

#: q floor of the logarithm of the profile block [kg kg-1].
HUMIDITY_FLOOR = 1e-9


def raw_profile(air_temperature, specific_humidity) -> np.ndarray:
    """x = [T, ln(max(q, q_floor))] [K], [1], shape (N, 2L)."""
    T = np.asarray(air_temperature, dtype=float)
    q = np.asarray(specific_humidity, dtype=float)
    return np.concatenate([T, np.log(np.maximum(q, HUMIDITY_FLOOR))], axis=1)


@dataclasses.dataclass
class ProfileCompression:
    """The fitted affine maps of the shared compression (all float64 arrays).

    Attributes
    ----------
    center : numpy.ndarray
        x_ref [2L], the training mean rounded to float32 (exact in the bundle).
    projection : numpy.ndarray
        A [2L, K].
    offset : numpy.ndarray
        a0 [K].
    reconstruction : numpy.ndarray
        R [2L, 2L]: the standardised blocks minus their PCA reconstruction.
    reconstruction_offset : numpy.ndarray
        r0 [2L].
    component_variance : numpy.ndarray
        var(z_k) over the training set [K].
    """

    center: np.ndarray
    projection: np.ndarray
    offset: np.ndarray
    reconstruction: np.ndarray
    reconstruction_offset: np.ndarray
    component_variance: np.ndarray

    @property
    def n_components(self) -> int:
        return self.projection.shape[1]

    @property
    def n_levels(self) -> int:
        return self.center.size // 2

    def project(self, x) -> np.ndarray:
        """z [N, K] of raw profiles x [N, 2L]."""
        return (np.asarray(x, dtype=float) - self.center) @ self.projection + self.offset

    def novelty_scores(self, x) -> np.ndarray:
        """[N, 3]: sum z^2/var(z) and the squared reconstruction error of the T and ln q blocks [1]."""
        x = np.asarray(x, dtype=float)
        z = self.project(x)
        r = (x - self.center) @ self.reconstruction + self.reconstruction_offset
        L = self.n_levels
        return np.stack([np.sum(z**2 / self.component_variance, axis=1), np.sum(r[:, :L] ** 2, axis=1),
                         np.sum(r[:, L:] ** 2, axis=1)], axis=1)


def fit_compression(x, temperature_components: int, humidity_components: int) -> ProfileCompression:
    """Fit the compression on training raw profiles ``x`` [N, 2L] (see :func:`raw_profile`)."""
    x = np.asarray(x, dtype=float)
    L = x.shape[1] // 2
    center = x.mean(axis=0).astype(np.float32).astype(float)
    d = x - center
    scale = d.std(axis=0)
    scale = np.where(scale > 1e-12, scale, 1.0)  # a constant level (e.g. clipped q) stays unscaled
    s = d / scale
    A = np.zeros((2 * L, temperature_components + humidity_components))
    R = np.zeros((2 * L, 2 * L))
    offsets, recon_offsets, col = [], [], 0
    for block, k in ((slice(0, L), temperature_components), (slice(L, 2 * L), humidity_components)):
        m = s[:, block].mean(axis=0)
        _, sv, vt = np.linalg.svd(s[:, block] - m, full_matrices=False)
        V = vt[:k].T  # [L, k]
        spread = sv[0] / np.sqrt(s.shape[0]) if sv[0] > 0 else 1.0
        A[block, col:col + k] = V / scale[block, None] / spread
        offsets.append(-(m @ V) / spread)
        P = np.eye(L) - V @ V.T  # residual off the subspace: (s - m) (I - V V^T)
        R[block, block] = P / scale[block, None]
        recon_offsets.append(-(m @ P))
        col += k
    comp = ProfileCompression(center=center, projection=A, offset=np.concatenate(offsets), reconstruction=R,
                              reconstruction_offset=np.concatenate(recon_offsets),
                              component_variance=np.ones(A.shape[1]))
    comp.component_variance = np.maximum(comp.project(x).var(axis=0), 1e-30)
    return comp
