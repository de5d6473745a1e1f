"""The shared profile compression (rtemu.features) against scikit-learn's PCA."""

from __future__ import annotations

import numpy as np
from sklearn.decomposition import PCA
from sklearn.preprocessing import StandardScaler

from rtemu.features import fit_compression, raw_profile


def _profiles(n=300, L=12, seed=0):
    rng = np.random.default_rng(seed)
    base = np.linspace(290, 220, L)
    T = base + rng.normal(0, 4, (n, 1)) + rng.normal(0, 1, (n, L)) * np.linspace(1, 0.2, L)
    q = np.exp(np.linspace(-4.5, -13, L) + rng.normal(0, 0.5, (n, 1)) + 0.1 * rng.normal(size=(n, L)))
    return T, q


def test_coordinates_are_scikit_learn_pca_coordinates():
    T, q = _profiles()
    x = raw_profile(T, q)
    comp = fit_compression(x, 4, 3)
    z = comp.project(x)
    for block, cols in ((slice(0, 12), slice(0, 4)), (slice(12, 24), slice(4, 7))):
        s = StandardScaler().fit_transform(x[:, block])
        ref = PCA(n_components=cols.stop - cols.start, svd_solver="full").fit(s).transform(s)
        ref = ref / ref[:, 0].std()
        got = z[:, cols]
        signs = np.sign(np.sum(got * ref, axis=0))  # PCA axes are defined up to sign
        np.testing.assert_allclose(got * signs, ref, atol=1e-6)


def test_reconstruction_error_is_scikit_learns():
    T, q = _profiles()
    x = raw_profile(T, q)
    comp = fit_compression(x, 3, 2)
    scores = comp.novelty_scores(x)
    s = StandardScaler().fit_transform(x[:, :12])
    pca = PCA(n_components=3, svd_solver="full").fit(s)
    resid = s - pca.inverse_transform(pca.transform(s))
    np.testing.assert_allclose(scores[:, 1], np.sum(resid**2, axis=1), rtol=1e-6, atol=1e-9)
    # Mahalanobis term: on average one per component over the training set
    np.testing.assert_allclose(scores[:, 0].mean(), 5.0, rtol=1e-6)
