"""Jacobian-matched refinement (rtemu.jacobian_fit) and its use in training.

External references: scipy.optimize.check_grad (finite-difference gradient check),
scikit-learn's own MLPRegressor forward pass, analytic derivatives of sin/cos/products
(any calculus text), and the physical model's Jacobians (rtemu.physics, itself checked
against finite differences and textbook cases in test_physics.py).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import check_grad

from rtemu.features import FeatureConfig, FeatureTransform, raw_features
from rtemu.jacobian_fit import (
    network_tangent,
    pack,
    probe_directions,
    probe_relative_error,
    refine_network,
    refinement_loss,
    state_jacobian,
)


def _random_net(rng, sizes):
    shapes = list(zip(sizes[:-1], sizes[1:]))
    return ([rng.normal(0, 0.6, s) for s in shapes], [rng.normal(0, 0.3, s[1]) for s in shapes]), shapes


@pytest.mark.parametrize("sizes", [(5, 7, 1), (5, 7, 6, 1), (4, 3, 5, 4, 1)])
def test_loss_gradient_matches_finite_differences(sizes):
    """Reverse mode through the tangent pass, checked by scipy.optimize.check_grad."""
    rng = np.random.default_rng(1)
    (coefs, ints), shapes = _random_net(rng, sizes)
    u, t = rng.normal(size=(20, sizes[0])), rng.normal(size=20)
    rows = np.array([1, 4, 7, 9, 13])
    u_dot, r = rng.normal(size=(5, 3, sizes[0])), rng.normal(size=(5, 3))

    def f(th):
        return refinement_loss(th, shapes, u, t, rows, u_dot, r, weight=0.7, alpha=0.01, scale=1.3)[0]

    def g(th):
        return refinement_loss(th, shapes, u, t, rows, u_dot, r, weight=0.7, alpha=0.01, scale=1.3)[1]

    theta = pack(coefs, ints)
    # check_grad takes forward differences (error ~ epsilon * curvature): a wrong term would
    # be off by O(|g|), the truncation is ~1e-6 |g|
    err = check_grad(f, g, theta, epsilon=1e-7)
    assert err < 1e-5 * max(1.0, np.linalg.norm(g(theta)))


@pytest.mark.filterwarnings("ignore::sklearn.exceptions.ConvergenceWarning")
def test_tangent_matches_sklearn_forward_and_finite_differences():
    from sklearn.neural_network import MLPRegressor

    rng = np.random.default_rng(2)
    u = rng.normal(size=(200, 4))
    mlp = MLPRegressor(hidden_layer_sizes=(6, 5), activation="tanh", solver="lbfgs", max_iter=50,
                       random_state=0).fit(u, np.sin(u[:, 0]) * u[:, 1])
    direction = rng.normal(size=(200, 2, 4))
    y, ydot = network_tangent(mlp.coefs_, mlp.intercepts_, u, direction)
    np.testing.assert_allclose(y, mlp.predict(u), rtol=1e-12, atol=1e-12)
    h = 1e-6
    for p in range(2):
        fd = (mlp.predict(u + h * direction[:, p]) - mlp.predict(u - h * direction[:, p])) / (2 * h)
        np.testing.assert_allclose(ydot[:, p], fd, rtol=1e-5, atol=1e-7)


def test_refinement_teaches_the_derivatives_of_a_known_function():
    """f(u) = sin(2 u0) cos(u1) + 0.3 u0 u1 with analytic gradient (calculus): after the
    refinement the network's gradient on held-out points is much closer to the truth."""
    from sklearn.neural_network import MLPRegressor

    rng = np.random.default_rng(3)

    def f(u):
        return np.sin(2 * u[:, 0]) * np.cos(u[:, 1]) + 0.3 * u[:, 0] * u[:, 1]

    def grad(u):
        return np.stack([2 * np.cos(2 * u[:, 0]) * np.cos(u[:, 1]) + 0.3 * u[:, 1],
                         -np.sin(2 * u[:, 0]) * np.sin(u[:, 1]) + 0.3 * u[:, 0]], axis=1)

    u = rng.uniform(-1.5, 1.5, size=(300, 2))
    t = f(u) + rng.normal(0, 0.02, 300)  # noisy values: the fit's slopes follow the noise
    mlp = MLPRegressor(hidden_layer_sizes=(24, 24), activation="tanh", solver="lbfgs", max_iter=400,
                       alpha=1e-6, random_state=0).fit(u, t)
    rows = np.arange(300)
    probes = rng.normal(size=(300, 4, 2)) / 2.0
    r = np.einsum("mk,mpk->mp", grad(u), probes)
    test = rng.uniform(-1.4, 1.4, size=(500, 2))
    axes = np.broadcast_to(np.eye(2), (500, 2, 2))

    def gradient_error(coefs, ints):
        _, g = network_tangent(coefs, ints, test, axes)
        return np.median(np.linalg.norm(g - grad(test), axis=1) / np.linalg.norm(grad(test), axis=1))

    before = gradient_error(mlp.coefs_, mlp.intercepts_)
    coefs, ints, info = refine_network(mlp.coefs_, mlp.intercepts_, u, t, rows, probes, r, weight=1.0,
                                       alpha=1e-6, max_iter=300)
    after = gradient_error(coefs, ints)
    assert info["iterations"] > 0
    assert after < 0.5 * before, (before, after)
    # the values stay as good (within the noise)
    y, _ = network_tangent(coefs, ints, test, axes)
    assert np.sqrt(np.mean((y - f(test)) ** 2)) < 0.05


def test_state_jacobian_of_a_linear_feature_set_is_the_projection():
    """Without kernels or water path the features are [T, ln q, Ts, sec]: dz/dT_l and
    dz/d ln q_l are rows of the folded projection (exact algebra)."""
    rng = np.random.default_rng(4)
    L, n = 6, 40
    p = np.geomspace(1000.0, 10.0, L)
    T = 250 + rng.normal(0, 5, (n, L))
    q = np.exp(rng.normal(-7, 1, (n, L)))
    ts, zen = T[:, 0] + 1.0, rng.uniform(0, 60, n)
    cfg = FeatureConfig(humidity="log", temperature_components=3, humidity_components=3)
    tr = FeatureTransform(config=cfg, n_levels=L).fit(raw_features(T, q, ts, zen, cfg))
    G = state_jacobian(tr.project, cfg, T[:5], q[:5], ts[:5], zen[:5], p, chunk=2)
    np.testing.assert_allclose(G[:, :L], np.broadcast_to(tr.projection_[:L], (5, L, tr.n_components)),
                               rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(G[:, L:], np.broadcast_to(tr.projection_[L:2 * L], (5, L, tr.n_components)),
                               rtol=1e-6, atol=1e-9)


def test_probes_estimate_the_relative_error():
    """With many probes (E[v v^T] = I, a Hutchinson-type estimator) the probe estimate of
    the error of a wrong Jacobian approaches sqrt(e_T^2 + e_q^2) computed directly."""
    rng = np.random.default_rng(5)
    m, L, K, P = 30, 4, 3, 4000
    G = rng.normal(size=(m, 2 * L, K))
    jt, jq = rng.normal(size=(m, L)), rng.normal(size=(m, L))
    probes = rng.normal(size=(m, 2 * L, P)) / np.sqrt(P)
    d, target, inv = probe_directions(G, jt, jq, probes, floor=1e-3)
    # a "network" that is linear in z with gradient w: its Jacobian is G w
    w = rng.normal(size=K)
    coefs, ints = [w[:, None]], [np.zeros(1)]
    est = probe_relative_error(coefs, ints, np.zeros((m, K)), d, target)
    model = np.einsum("mik,k->mi", G, w)
    e_t = np.linalg.norm(model[:, :L] - jt, axis=1) * inv[:, 0]
    e_q = np.linalg.norm(model[:, L:] - jq, axis=1) * inv[:, L]
    np.testing.assert_allclose(est, np.hypot(e_t, e_q), rtol=0.08)


# ---- in training ---------------------------------------------------------------------------
RECIPE = """
name = "tiny-jacobian"
[training]
seed = 0
validation_fraction = 0.2
max_profiles = 900
jacobian_profiles = 500
jacobian_validation_profiles = 150
jacobian_probes = 8
[features]
humidity = "log"
temperature_components = 8
humidity_components = 8
[network]
hidden_layers = [12]
alpha = 1e-5
max_iter = 150
early_stopping = false
check_every = 150
jacobian_weight = {weight}
jacobian_max_iter = 150
jacobian_check_every = 50
"""


@pytest.fixture(scope="module")
def jacobian_data(tmp_path_factory):
    from rtemu.sampling import sample_to_netcdf

    root = tmp_path_factory.mktemp("jacfit")
    train = sample_to_netcdf("demo-sounder", root / "train.nc", count=900, seed=21, jacobian=True,
                             progress=False)
    test = sample_to_netcdf("demo-sounder", root / "test.nc", count=300, seed=22, jacobian=True,
                            progress=False)
    return root, train, test


def _median_jacobian_errors(bundle_path, test_path, channel):
    import xarray as xr

    from rtemu.bundle import make_session

    ds = xr.open_dataset(test_path)
    flip = ds["air_pressure"].values[0] < ds["air_pressure"].values[-1]
    order = slice(None, None, -1) if flip else slice(None)
    ok = (ds["quality_flag"].values == 0).all(axis=1)
    feeds = {
        "air_temperature": ds["air_temperature"].values[ok][:, order].astype(np.float32),
        "specific_humidity": ds["specific_humidity"].values[ok][:, order].astype(np.float32),
        "surface_temperature": ds["surface_temperature"].values[ok].astype(np.float32),
        "surface_emissivity": ds["surface_emissivity"].sel(channel=[channel]).values[ok].astype(np.float32),
        "sensor_zenith_angle": ds["sensor_zenith_angle"].values[ok].astype(np.float32),
    }
    names = ["jacobian_air_temperature", "jacobian_specific_humidity"]
    out = dict(zip(names, make_session(bundle_path, outputs=names).run(names, feeds)))
    q = feeds["specific_humidity"].astype(float)
    errors = []
    for name, factor in zip(names, (1.0, q)):
        phys = ds[name].sel(channel=channel).values[ok][:, order] * factor
        emu = out[name][:, 0].astype(float) * factor
        errors.append(np.median(np.linalg.norm(emu - phys, axis=1) / np.linalg.norm(phys, axis=1)))
    ds.close()
    return errors


def test_training_with_the_jacobian_term_improves_the_bundle_jacobians(jacobian_data):
    """Same data, seed and network; the Jacobian term lowers the exported graph's Jacobian
    errors against the physical model on an independent test set."""
    from rtemu.bundle import describe, read_bundle
    from rtemu.export import train_to_onnx

    root, train, test = jacobian_data
    channel = "mw-h2"
    errors = {}
    for weight in (0.0, 1.0):
        recipe = root / f"w{weight}.toml"
        recipe.write_text(RECIPE.format(weight=weight))
        out = root / f"w{weight}.onnx"
        train_to_onnx(train, recipe, out, channels=[channel], workers=1, progress=False)
        errors[weight] = _median_jacobian_errors(out, test, channel)
    stats = read_bundle(root / "w1.0.onnx").channel_stats[channel]
    assert stats["jacobian_iterations"] > 0 and stats["jacobian_profiles"] == 500
    assert "jacobian_iterations" not in read_bundle(root / "w0.0.onnx").channel_stats[channel]
    line = [ln for ln in describe(root / "w1.0.onnx").splitlines() if ln.strip().startswith(channel)]
    assert line and "150 it," in line[0] and "->" in line[0]
    (t0, q0), (t1, q1) = errors[0.0], errors[1.0]
    assert t1 < 0.8 * t0 and q1 < 0.8 * q0, errors


def test_jacobian_term_needs_jacobians_in_the_data(tmp_path):
    from rtemu.export import train_to_onnx
    from rtemu.sampling import sample_to_netcdf

    data = sample_to_netcdf("demo-sounder", tmp_path / "t.nc", count=60, seed=3, progress=False)
    (tmp_path / "r.toml").write_text(RECIPE.format(weight=1.0))
    with pytest.raises(ValueError, match=r"jacobian_specific_humidity.*jacobian_weight > 0.*--jacobian"):
        train_to_onnx(data, tmp_path / "r.toml", tmp_path / "m.onnx", channels=["mw-h2"], workers=1,
                      progress=False)
    assert not (tmp_path / "m.onnx").exists()
