"""Tests of rtemu.assim: 1D-Var, ensemble updates, B estimation, R, quality control.

Reference solutions are textbook closed forms, written out here independently of the
code under test:

* optimal estimation (Rodgers 2000, Inverse Methods for Atmospheric Sounding, World
  Scientific): x_a = xb + B H^T (H B H^T + R)^-1 (y - H xb) (the "m-form" gain of eq. 2.44,
  equation number from memory), S = B - B H^T (H B H^T + R)^-1 H B, averaging kernel
  A = B H^T (H B H^T + R)^-1 H, DFS = trace(A) (eq. 2.80);
* the Kalman filter analysis step (Kalman 1960; e.g. Kalnay 2003, Atmospheric Modeling,
  Data Assimilation and Predictability, section 5.4, from memory): the same formulas with
  P^f in place of B, P^a = (I - K H) P^f.
"""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

from rtemu import assim
from rtemu.atmosphere import DEFAULT_SURFACE_PRESSURE_HPA, saturation_specific_humidity
from rtemu.assim import qc
from rtemu.assim._control import ControlLayout, from_control, read_columns, to_control, write_columns
from rtemu.assim.covariance import covariance_dataarray


# -- test operators -------------------------------------------------------------------------
class _StubInstrument:
    def __init__(self, ids, noise):
        self.channel_ids = tuple(ids)
        self._noise = np.asarray(noise, dtype=float)

    @property
    def noise_k(self):
        return self._noise.copy()


class LinearOperator:
    """BT = c + G_T T + G_z ln q + g_s Ts + g_e emissivity: linear in the control variables.

    It follows the operator protocol: the humidity Jacobian it reports is dBT/dq = G_z / q,
    so var1d's chain rule (q dBT/dq) must recover G_z. Being linear in ln q (not in q)
    makes the 1D-Var problem exactly linear in the control vector, so Gauss-Newton must
    reach the closed-form optimum in one step; a q-linear operator would not allow that.
    """

    def __init__(self, n_levels, n_channels=6, seed=1, flagged=()):
        rng = np.random.default_rng(seed)
        ids = [f"lin{i}" for i in range(n_channels)]
        self.instrument = _StubInstrument(ids, rng.uniform(0.2, 0.6, n_channels))
        self.channels = tuple(ids)
        self.g_t = rng.uniform(0.0, 0.3, (n_channels, n_levels))
        self.g_z = rng.uniform(-2.0, 0.0, (n_channels, n_levels))
        self.g_s = rng.uniform(0.0, 0.5, n_channels)
        self.g_e = rng.uniform(5.0, 20.0, n_channels)
        self.c0 = rng.uniform(-20.0, 20.0, n_channels)
        self.flagged = tuple(flagged)  # (profile, channel index) pairs given flag 2
        self.calls = 0

    def matrix(self, emissivity="none"):
        """H in control space [C, n] for the given emissivity layout."""
        parts = [self.g_t, self.g_z, self.g_s[:, None]]
        if emissivity == "scalar":
            parts.append(self.g_e[:, None])
        elif emissivity == "channel":
            parts.append(np.diag(self.g_e))
        return np.concatenate(parts, axis=1)

    def simulate(self, ds, jacobian=False):
        self.calls += 1
        t = ds["air_temperature"].transpose("profile", "level").values
        q = ds["specific_humidity"].transpose("profile", "level").values
        ts = ds["surface_temperature"].values
        em = ds["surface_emissivity"].values
        em = em if em.ndim == 2 else em[:, None]
        bt = self.c0 + t @ self.g_t.T + np.log(q) @ self.g_z.T + ts[:, None] * self.g_s + em * self.g_e
        n, c = bt.shape
        flag = np.zeros((n, c), np.int32)
        for p, ch in self.flagged:
            flag[p, ch] = 2
        pc, pcl = ("profile", "channel"), ("profile", "channel", "level")
        out = {"brightness_temperature": (pc, bt), "quality_flag": (pc, flag)}
        if jacobian:
            out["jacobian_air_temperature"] = (pcl, np.broadcast_to(self.g_t, (n, c, t.shape[1])).copy())
            out["jacobian_specific_humidity"] = (pcl, self.g_z[None] / q[:, None, :])
            out["jacobian_surface_temperature"] = (pc, np.broadcast_to(self.g_s, (n, c)).copy())
            out["jacobian_surface_emissivity"] = (pc, np.broadcast_to(self.g_e, (n, c)).copy())
        return xr.Dataset(out, coords={"channel": list(self.channels)})


def dry_columns(n_prof, n_lev, seed=0, emissivity_channels=None):
    """Columns far from every physical limit (relative humidity about 10 %)."""
    rng = np.random.default_rng(seed)
    p = np.geomspace(1000.0, 200.0, n_lev)
    t = 290.0 * (p / 1000.0) ** 0.19 + rng.normal(0.0, 1.0, (n_prof, n_lev))
    q = 0.1 * saturation_specific_humidity(t, p) * np.exp(rng.normal(0.0, 0.1, (n_prof, n_lev)))
    ds = xr.Dataset(
        {
            "air_pressure": ("level", p),
            "air_temperature": (("profile", "level"), t),
            "specific_humidity": (("profile", "level"), q),
            "surface_temperature": ("profile", t[:, 0] + 1.0),
            "sensor_zenith_angle": ("profile", np.zeros(n_prof)),
        }
    )
    if emissivity_channels is None:
        ds["surface_emissivity"] = ("profile", np.full(n_prof, 0.9))
    else:
        ds["surface_emissivity"] = (("profile", "channel"), np.full((n_prof, len(emissivity_channels)), 0.9))
        ds = ds.assign_coords(channel=list(emissivity_channels))
    return ds


def ar1_b(layout, sd_t=1.5, sd_lnq=0.1, sd_ts=2.0, sd_em=0.02, length=2.0):
    """Block-diagonal B with exponential vertical correlations (common practice)."""
    n_lev = layout.n_levels
    i = np.arange(n_lev)
    corr = np.exp(-np.abs(i[:, None] - i[None, :]) / length)
    b = np.zeros((layout.size, layout.size))
    b[layout.temperature, layout.temperature] = sd_t**2 * corr
    b[layout.ln_humidity, layout.ln_humidity] = sd_lnq**2 * corr
    b[layout.surface_temperature, layout.surface_temperature] = sd_ts**2
    e = layout.surface_emissivity
    b[e, e] = sd_em**2 * np.eye(layout.n_emissivity)
    return b


def control(ds, layout, channels=()):
    return to_control(read_columns(ds, ("profile",), tuple(channels), "test"), layout, "test")


def optimal_estimate(xb, b, h, r, y, hxb):
    """Closed form of Rodgers (2000) in m-form, one column at a time (see module docstring)."""
    xa, kernels, covs = [], [], []
    for k in range(len(xb)):
        gain = b @ h.T @ np.linalg.inv(h @ b @ h.T + np.diag(r))
        xa.append(xb[k] + gain @ (y[k] - hxb[k]))
        kernels.append(gain @ h)
        covs.append(b - gain @ h @ b)
    return np.array(xa), np.array(kernels), np.array(covs)


# -- humidity limits of the iterates --------------------------------------------------------
def test_humidity_bounds_respect_saturation_and_model_limit():
    t = np.array([[303.15, 250.0, 400.0, 50.0]])
    p = np.array([[1000.0, 500.0, 1.0, 500.0]])
    lo, hi = assim.humidity_bounds(t, p)
    # Saturation at 30 degC, 1000 hPa: e_s = 4.2470 kPa (CRC Handbook of Chemistry and
    # Physics, vapour pressure of water, from memory), q_s = 0.622 e / (p - 0.378 e)
    # (Wallace and Hobbs 2006, section 3.5) = 0.02685 kg kg-1.
    assert hi[0, 0] == pytest.approx(0.622 * 42.470 / (1000.0 - 0.378 * 42.470), rel=5e-3)
    assert hi[0, 1] < hi[0, 0]
    # e_s >> p at 400 K and 1 hPa: capped just inside the physical model's q < 0.1.
    assert 0.0999 < hi[0, 2] < 0.1
    # Cold air (clipped to the 100 K model limit) may leave no room above the lower bound.
    assert np.isfinite(hi).all() and (lo == 1e-8).all() and (hi >= lo).all() and hi[0, 3] == lo[0, 3]
    # With a 50 % cap the bound halves where saturation, not the model limit, binds.
    assert assim.humidity_bounds(t, p, 0.5)[1][0, 0] == pytest.approx(0.5 * hi[0, 0])


# -- 1D-Var against the closed form ---------------------------------------------------------
def _linear_case(n_prof=6, n_lev=8, emissivity="none", seed=3):
    op = LinearOperator(n_lev)
    channels = op.channels if emissivity == "channel" else None
    bg = dry_columns(n_prof, n_lev, emissivity_channels=channels)
    layout = ControlLayout(
        n_levels=n_lev, emissivity=emissivity,
        emissivity_channels=op.channels if emissivity == "channel" else (),
    )
    b = ar1_b(layout)
    rng = np.random.default_rng(seed)
    hxb = op.simulate(bg)["brightness_temperature"].values
    r = op.instrument.noise_k**2
    # Observations from a truth drawn from B, plus noise: a consistent linear-Gaussian case.
    h = op.matrix(emissivity)
    xb = control(bg, layout, op.channels)
    truth = xb + rng.standard_normal(xb.shape) @ np.linalg.cholesky(b).T
    y = hxb + (truth - xb) @ h.T + rng.standard_normal(hxb.shape) * np.sqrt(r)
    obs = xr.DataArray(y, dims=("profile", "channel"), coords={"channel": list(op.channels)})
    return op, bg, layout, b, h, r, y, hxb, xb, obs


@pytest.mark.parametrize("emissivity", ["none", "scalar", "channel"])
def test_var1d_gauss_newton_matches_optimal_estimation(emissivity):
    op, bg, layout, b, h, r, y, hxb, xb, obs = _linear_case(emissivity=emissivity)
    op.calls = 0
    res = assim.var1d(op, bg, obs, b_matrix=b, lm_damping=0.0, qc_threshold=None,
                      control_emissivity=emissivity != "none")
    xa_ref, a_ref, s_ref = optimal_estimate(xb, b, h, r, y, hxb)
    # The test only makes sense if the optimum lies inside the physical limits.
    assert np.allclose(from_control(xa_ref, read_columns(bg, ("profile",), op.channels, "bg"), layout)[1], xa_ref)
    xa = control(res.analysis, layout, op.channels)
    np.testing.assert_allclose(xa, xa_ref, rtol=0, atol=1e-9)
    d = res.diagnostics
    np.testing.assert_allclose(d["averaging_kernel"].values, a_ref, atol=1e-9)
    np.testing.assert_allclose(d["analysis_error_covariance"].values, s_ref, rtol=1e-8, atol=1e-12)
    np.testing.assert_allclose(d["dfs"].values, np.trace(a_ref, axis1=1, axis2=2), atol=1e-9)
    assert np.allclose(d["dfs_by_variable"].sum("control_group"), d["dfs"])
    # Linear problem: one Gauss-Newton step reaches the optimum; convergence is seen there.
    assert d["status"].values.tolist() == [0] * len(xb)
    assert d["n_iterations"].values.tolist() == [1] * len(xb)
    # One batched operator call per iteration (plus the first guess), not one per column.
    assert op.calls == 2
    # J at the optimum: 1/2 convention (module docstring of rtemu.assim.var1d).
    dxb, dep = xa_ref - xb, y - hxb - (xa_ref - xb) @ h.T
    j_ref = 0.5 * (np.einsum("pi,ij,pj->p", dxb, np.linalg.inv(b), dxb) + (dep**2 / r).sum(axis=1))
    np.testing.assert_allclose(d["cost"].isel(iteration=1).values, j_ref, rtol=1e-9)


def test_var1d_levenberg_marquardt_reaches_same_optimum_monotonically():
    op, bg, layout, b, h, r, y, hxb, xb, obs = _linear_case()
    res = assim.var1d(op, bg, obs, b_matrix=b, lm_damping=10.0, max_iter=40,
                      step_tol=1e-14, cost_tol=0.0, qc_threshold=None)
    xa_ref, _, _ = optimal_estimate(xb, b, h, r, y, hxb)
    xa = control(res.analysis, layout)
    np.testing.assert_allclose(xa, xa_ref, atol=1e-5)
    cost = res.cost.values
    steps = np.diff(cost, axis=1)
    assert (steps[np.isfinite(steps)] <= 0).all()
    # Heavy initial damping: several iterations were needed (the damping acted).
    assert (res.diagnostics["n_iterations"].values > 2).all()
    assert res.converged.values.all()


def _closed_form_over_used(xb, b, h, r, y, hxb, used):
    """Rodgers (2000) m-form optimum and S^-1 = B^-1 + H^T R^-1 H per column, used channels only."""
    xa, s_inv = [], []
    for k in range(len(xb)):
        u = used[k]
        ref, _, _ = optimal_estimate(xb[k:k + 1], b, h[u], r[u], y[k:k + 1, u], hxb[k:k + 1, u])
        xa.append(ref[0])
        s_inv.append(np.linalg.inv(b) + h[u].T @ np.diag(1.0 / r[u]) @ h[u])
    return np.array(xa), np.array(s_inv)


def test_var1d_defaults_reach_the_closed_form_optimum():
    """With every setting at its default, Levenberg-Marquardt ends at the linear optimum.

    For a linear problem d^2 = (x - xa)^T S^-1 (x - xa) exactly (Rodgers 2000, section
    5.6.3, from memory), so the default step tolerance (d^2 < 1e-6 n) bounds the distance
    to the closed form in units of the analysis error. Before the defaults were changed
    (lm_damping 1, step_tol 1e-2, cost_tol 1e-3) this case stopped 0.1-0.3 K away.
    """
    op, bg, layout, b, h, r, y, hxb, xb, obs = _linear_case(n_prof=12, seed=5)
    res = assim.var1d(op, bg, obs, b_matrix=b)
    used = res.qc_reason.values == qc.USED
    xa_ref, s_inv = _closed_form_over_used(xb, b, h, r, y, hxb, used)
    xa = control(res.analysis, layout)
    assert res.converged.values.all()
    dist2 = np.einsum("pi,pij,pj->p", xa - xa_ref, s_inv, xa - xa_ref)
    assert (dist2 < 1e-6 * layout.size).all()
    assert np.abs(xa - xa_ref)[:, layout.temperature].max() < 1e-3  # [K]
    assert np.abs(xa - xa_ref)[:, layout.surface_temperature].max() < 1e-3  # [K]
    assert np.abs(xa - xa_ref)[:, layout.ln_humidity].max() < 1e-4  # [1]
    # Damping still acts: J never increases from one accepted iterate to the next.
    steps = np.diff(res.cost.values, axis=1)
    assert (steps[np.isfinite(steps)] <= 0).all()


def test_var1d_accepts_labelled_b_and_rejects_mismatched_layout():
    op, bg, layout, b, h, r, y, hxb, xb, obs = _linear_case()
    labelled = covariance_dataarray(b, layout)
    shuffled = labelled.isel(control_row=slice(None, None, -1), control_col=slice(None, None, -1))
    res_a = assim.var1d(op, bg, obs, b_matrix=labelled, lm_damping=0.0)
    res_b = assim.var1d(op, bg, obs, b_matrix=shuffled, lm_damping=0.0)
    xr.testing.assert_allclose(res_a.analysis, res_b.analysis)
    with pytest.raises(ValueError, match="control elements do not match"):
        assim.var1d(op, bg, obs, b_matrix=labelled, control_emissivity=True)
    with pytest.raises(ValueError, match="positive definite"):
        assim.var1d(op, bg, obs, b_matrix=-b)
    with pytest.raises(ValueError, match="shape"):
        assim.var1d(op, bg, obs, b_matrix=b[:-1, :-1])


def test_var1d_rejects_bad_input():
    op, bg, layout, b, h, r, y, hxb, xb, obs = _linear_case()
    wet = bg.copy()
    q = wet["specific_humidity"].values.copy()
    q[2, 3] = 0.0
    wet["specific_humidity"] = (("profile", "level"), q)
    with pytest.raises(ValueError, match=r"specific_humidity.*profile index 2"):
        assim.var1d(op, wet, obs, b_matrix=b)
    bad = obs.copy()
    bad[4, 1] = np.inf
    with pytest.raises(ValueError, match=r"infinite.*profile index 4"):
        assim.var1d(op, bg, bad, b_matrix=b)
    with pytest.raises(ValueError, match="no channel"):
        assim.var1d(op, bg, obs.isel(channel=slice(1, None)), b_matrix=b)


# -- quality control --------------------------------------------------------------------------
def test_qc_rejects_flagged_gross_and_missing_with_reasons_and_counts():
    op, bg, layout, b, h, r, y, hxb, xb, obs = _linear_case()
    op.flagged = ((0, 2),)
    y_bad = y.copy()
    y_bad[1, 3] += 60.0  # gross error: far beyond 5 sqrt(HBH^T + R)
    y_bad[2, 0] = np.nan
    obs_bad = obs.copy(data=y_bad)
    res = assim.var1d(op, bg, obs_bad, b_matrix=b, lm_damping=0.0, qc_threshold=5.0)
    d = res.diagnostics
    reason = d["qc_reason"].values
    assert reason[0, 2] == qc.OPERATOR_FLAG
    assert reason[1, 3] == qc.DEPARTURE
    assert reason[2, 0] == qc.MISSING
    expected = np.zeros_like(reason)
    expected[0, 2], expected[1, 3], expected[2, 0] = qc.OPERATOR_FLAG, qc.DEPARTURE, qc.MISSING
    np.testing.assert_array_equal(reason, expected)
    counts = dict(zip(d["qc_category"].values, d["qc_count"].values))
    assert counts == {"used": reason.size - 3, "missing": 1, "operator_flag": 1, "departure": 1}
    assert d["n_used"].values.tolist() == [5, 5, 5, 6, 6, 6]
    # The rejected observations do not enter: analysis = closed form without them.
    for k in range(3):
        keep = reason[k] == qc.USED
        xa_ref, _, _ = optimal_estimate(xb[k:k + 1], b, h[keep], r[keep], y_bad[k:k + 1, keep], hxb[k:k + 1, keep])
        np.testing.assert_allclose(control(res.analysis, layout)[k], xa_ref[0], atol=1e-9)
    # Expected departure spread: sqrt(H B H^T + R)_ii, written out directly.
    np.testing.assert_allclose(d["departure_std_background"].values[3],
                               np.sqrt(np.diag(h @ b @ h.T) + r), rtol=1e-12)


def test_qc_threshold_is_configurable():
    op, bg, layout, b, h, r, y, hxb, xb, obs = _linear_case()
    std = np.sqrt(np.diag(h @ b @ h.T) + r)
    y2 = hxb.copy()
    y2[0, 0] += 3.5 * std[0]
    obs2 = obs.copy(data=y2)
    strict = assim.var1d(op, bg, obs2, b_matrix=b, qc_threshold=3.0)
    loose = assim.var1d(op, bg, obs2, b_matrix=b, qc_threshold=5.0)
    assert strict.qc_reason.values[0, 0] == qc.DEPARTURE
    assert loose.qc_reason.values[0, 0] == qc.USED


def test_column_without_usable_observations_keeps_background():
    op, bg, layout, b, h, r, y, hxb, xb, obs = _linear_case()
    y2 = y.copy()
    y2[3] = np.nan
    res = assim.var1d(op, bg, obs.copy(data=y2), b_matrix=b)
    d = res.diagnostics
    assert d["status"].values[3] == 3 and d["n_used"].values[3] == 0 and d["dfs"].values[3] == 0
    np.testing.assert_allclose(control(res.analysis, layout)[3], xb[3])
    np.testing.assert_allclose(d["analysis_error_covariance"].values[3], b, rtol=1e-10)


# -- observation error -------------------------------------------------------------------------
def test_observation_error_variance_adds_emulator_error_in_quadrature():
    op = LinearOperator(4, n_channels=3)
    noise = op.instrument.noise_k
    np.testing.assert_allclose(assim.observation_error_variance(op), noise**2)
    emu = {"lin0": 0.3, "lin1": 0.4, "lin2": 0.0}
    np.testing.assert_allclose(assim.observation_error_variance(op, emulator_error=emu),
                               noise**2 + np.array([0.09, 0.16, 0.0]))
    np.testing.assert_allclose(assim.observation_error_variance(op, emulator_error=[0.3, 0.4, 0.0]),
                               noise**2 + np.array([0.09, 0.16, 0.0]))
    # 3-4-5 triangle: sqrt(0.3^2 + 0.4^2) = 0.5
    got = assim.observation_error_variance(op, observation_error=[0.3, 0.3, 0.3], emulator_error=[0.4, 0.4, 0.4])
    np.testing.assert_allclose(np.sqrt(got), 0.5)
    with pytest.raises(ValueError, match=r"emulator_error.*lin2"):
        assim.observation_error_variance(op, emulator_error={"lin0": 0.1, "lin1": 0.1})
    with pytest.raises(ValueError, match="observation_error"):
        assim.observation_error_variance(op, observation_error=[0.1, -0.1, 0.1])


# -- background error covariance --------------------------------------------------------------
def _ar1(p, rho):
    i = np.arange(p)
    return rho ** np.abs(i[:, None] - i[None, :])


def test_shrinkage_intensity_matches_published_formula_written_out():
    rng = np.random.default_rng(0)
    sd = np.arange(1.0, 8.0)
    x = rng.multivariate_normal(np.zeros(7), _ar1(7, 0.5) * np.outer(sd, sd), size=25)
    # Schaefer and Strimmer (2005), target D: standardise, then per pair (i, j):
    # w_kij = z_ki z_kj, Var(r_ij) = n/(n-1)^3 sum_k (w_kij - wbar_ij)^2, r_ij = n/(n-1) wbar_ij.
    n = len(x)
    z = (x - x.mean(0)) / x.std(0, ddof=1)
    w = z[:, :, None] * z[:, None, :]
    wbar = w.mean(0)
    var_r = n / (n - 1) ** 3 * ((w - wbar) ** 2).sum(0)
    r = n / (n - 1) * wbar
    off = ~np.eye(7, dtype=bool)
    expected = np.clip(var_r[off].sum() / (r[off] ** 2).sum(), 0, 1)
    assert assim.shrinkage_intensity_to_diagonal(x) == pytest.approx(expected, rel=1e-12)


def test_shrunk_covariance_is_well_conditioned_and_closer_to_truth():
    rng = np.random.default_rng(1)
    p, n = 40, 20
    sd = np.linspace(0.5, 3.0, p)
    truth = _ar1(p, 0.7) * np.outer(sd, sd)
    err_sample, err_shrunk = [], []
    for _ in range(10):
        x = rng.multivariate_normal(np.zeros(p), truth, size=n)
        s = np.cov(x, rowvar=False)
        b, lam = assim.shrunk_covariance(x)
        assert 0 < lam < 1
        np.testing.assert_allclose(np.diag(b), np.diag(s))  # variances kept
        assert np.linalg.eigvalsh(b).min() > 0  # the sample covariance is singular (n < p)
        assert np.linalg.matrix_rank(s) < p
        err_sample.append(np.linalg.norm(s - truth))
        err_shrunk.append(np.linalg.norm(b - truth))
    assert np.mean(err_shrunk) < np.mean(err_sample)


def test_shrinkage_vanishes_for_many_samples_of_strong_correlation():
    rng = np.random.default_rng(2)
    x = rng.multivariate_normal(np.zeros(5), _ar1(5, 0.9), size=20000)
    _, lam = assim.shrunk_covariance(x)
    assert lam < 0.01
    b, lam = assim.shrunk_covariance(x, shrinkage=0.25)
    s = np.cov(x, rowvar=False)
    d = np.sqrt(np.diag(s))
    np.testing.assert_allclose(b, (0.75 * s / np.outer(d, d) + 0.25 * np.eye(5)) * np.outer(d, d))
    with pytest.raises(ValueError, match="shrinkage"):
        assim.shrunk_covariance(x, shrinkage=1.5)
    with pytest.raises(ValueError, match="no spread"):
        assim.shrunk_covariance(np.c_[x[:, :2], np.ones(len(x))])


def test_estimate_background_covariance_uses_the_control_vector():
    states = dry_columns(60, 5, seed=4)
    b = assim.estimate_background_covariance(states, shrinkage=0.0)
    assert b.dims == ("control_row", "control_col")
    assert list(b["control_row"].values[:2]) == ["air_temperature[0]", "air_temperature[1]"]
    assert b["control_row"].values[5] == "ln_specific_humidity[0]"
    t = states["air_temperature"].values
    lnq = np.log(states["specific_humidity"].values)
    ts = states["surface_temperature"].values[:, None]
    np.testing.assert_allclose(b.values, np.cov(np.c_[t, lnq, ts], rowvar=False), rtol=1e-10)
    assert b.attrs["shrinkage_intensity"] == 0.0 and b.attrs["n_samples"] == 60


# -- ensemble updates against the Kalman filter -------------------------------------------------
def _ensemble_case(n_members, seed=0, n_lev=5, n_prof=2):
    op = LinearOperator(n_lev, n_channels=4, seed=7)
    bg = dry_columns(n_prof, n_lev, seed=5)
    layout = ControlLayout(n_levels=n_lev)
    b = ar1_b(layout, sd_lnq=0.05)
    ens = assim.sample_ensemble(bg, b, n_members=n_members, seed=seed)
    h = op.matrix()
    xb = control(bg, layout)
    r = op.instrument.noise_k**2
    rng = np.random.default_rng(100 + seed)
    hxb = op.simulate(bg)["brightness_temperature"].values
    # Innovations consistent with B and R: truth drawn from B, observation noise from R.
    truth = xb + rng.standard_normal(xb.shape) @ np.linalg.cholesky(b).T
    y = hxb + (truth - xb) @ h.T + rng.standard_normal(hxb.shape) * np.sqrt(r)
    obs = xr.DataArray(y, dims=("profile", "channel"), coords={"channel": list(op.channels)})
    return op, bg, layout, b, h, xb, r, y, hxb, ens, obs


def _members(ens, layout):
    n_mem, n_prof = ens.sizes["member"], ens.sizes["profile"]
    cols = read_columns(ens, ("profile", "member"), (), "ens")
    return to_control(cols, layout, "ens").reshape(n_prof, n_mem, -1)


def _kf(xb_k, b, h, r, y_k, hxb_k):
    gain = b @ h.T @ np.linalg.inv(h @ b @ h.T + np.diag(r))
    return xb_k + gain @ (y_k - hxb_k), (np.eye(len(b)) - gain @ h) @ b, gain


def test_sample_ensemble_has_the_requested_statistics():
    op, bg, layout, b, h, xb, r, y, hxb, ens, obs = _ensemble_case(4000)
    assert ens.sizes["member"] == 4000
    x = _members(ens, layout)
    # 5-sigma bounds: sample mean error sd = sqrt(B_ii / N) (common practice).
    assert (np.abs(x.mean(1) - xb) < 5 * np.sqrt(np.diag(b) / 4000)).all()
    default = assim.sample_ensemble(bg, b)
    assert default.sizes["member"] == assim.DEFAULT_ENSEMBLE_SIZE == 64


@pytest.mark.parametrize("method", ["perturbed", "transform"])
def test_large_ensemble_matches_kalman_filter(method):
    n_mem = 5000
    op, bg, layout, b, h, xb, r, y, hxb, ens, obs = _ensemble_case(n_mem)
    res = assim.ensemble_update(op, ens, obs, method=method, seed=11, qc_threshold=None)
    xa = _members(res.analysis, layout)
    for k in range(len(xb)):
        mean_kf, pa_kf, gain = _kf(xb[k], b, h, r, y[k], hxb[k])
        mean = xa[k].mean(0)
        cov = np.cov(xa[k], rowvar=False)
        # Tolerances are 5 standard deviations of the sampling error of an N-member
        # estimate (over 8 seeds x 2 columns the largest error seen was 1.9 sd for the
        # mean and 2.4 sd for the covariance):
        # * covariance: Wishart, Var(S_ij) = (S_ii S_jj + S_ij^2) / (N-1) (e.g. Anderson
        #   2003, An Introduction to Multivariate Statistical Analysis, from memory), taken
        #   with B, which bounds the analysis covariance and the gain-estimate error;
        # * mean: the background-mean error, sd sqrt(B_ii / N), plus the gain-estimate error
        #   times the innovation, bounded by sqrt(B_ii / N) |S^-1/2 d| with S = HBH^T + R.
        s_chol = np.linalg.cholesky(h @ b @ h.T + np.diag(r))
        d_norm = np.linalg.norm(np.linalg.solve(s_chol, y[k] - hxb[k]))
        tol_mean = 5 * np.sqrt(np.diag(b) / n_mem) * (1 + d_norm)
        tol_cov = 5 * np.sqrt((np.outer(np.diag(b), np.diag(b)) + b**2) / (n_mem - 1))
        assert (np.abs(mean - mean_kf) < tol_mean).all()
        assert (np.abs(cov - pa_kf) < tol_cov).all()
        # The covariance check can fail: without perturbed observations the perturbed
        # filter would give (I-KH) B (I-KH)^T, too small by K R K^T (Burgers et al. 1998).
        assert (np.abs(gain @ np.diag(r) @ gain.T) > tol_cov).any()


def test_transform_update_is_exact_for_the_ensemble_statistics():
    op, bg, layout, b, h, xb, r, y, hxb, ens, obs = _ensemble_case(30, seed=3)
    for inflation in (1.0, 1.7):
        res = assim.ensemble_update(op, ens, obs, method="transform", inflation=inflation, qc_threshold=None)
        xf, xa = _members(ens, layout), _members(res.analysis, layout)
        for k in range(len(xb)):
            mean_f = xf[k].mean(0)
            pf = inflation * np.cov(xf[k], rowvar=False)
            mean_kf, pa_kf, _ = _kf(mean_f, pf, h, r, y[k], h @ (mean_f - xb[k]) + hxb[k])
            np.testing.assert_allclose(xa[k].mean(0), mean_kf, atol=1e-8)
            np.testing.assert_allclose(np.cov(xa[k], rowvar=False), pa_kf, atol=1e-10)


def test_perturbed_update_is_deterministic_given_a_seed_and_single_column_works():
    op, bg, layout, b, h, xb, r, y, hxb, ens, obs = _ensemble_case(64)
    a = assim.ensemble_update(op, ens, obs, method="perturbed", seed=5)
    a2 = assim.ensemble_update(op, ens, obs, method="perturbed", seed=5)
    c = assim.ensemble_update(op, ens, obs, method="perturbed", seed=6)
    xr.testing.assert_identical(a.analysis, a2.analysis)
    assert not np.allclose(a.analysis["air_temperature"].values, c.analysis["air_temperature"].values)
    one = assim.ensemble_update(op, ens.isel(profile=1), obs.isel(profile=1), method="transform")
    both = assim.ensemble_update(op, ens, obs, method="transform")
    assert "profile" not in one.analysis["air_temperature"].dims
    np.testing.assert_allclose(one.analysis["air_temperature"].values,
                               both.analysis["air_temperature"].isel(profile=1).values, atol=1e-10)
    with pytest.raises(ValueError, match="inflation"):
        assim.ensemble_update(op, ens, obs, inflation=0.5)
    with pytest.raises(ValueError, match="method"):
        assim.ensemble_update(op, ens, obs, method="other")


def test_ensemble_qc_rejects_gross_error_and_flag():
    op, bg, layout, b, h, xb, r, y, hxb, ens, obs = _ensemble_case(64)
    n_mem = ens.sizes["member"]
    op.flagged = ((0 * n_mem + 3, 1),)  # member 3 of profile 0, channel lin1 (flat column order)
    y2 = y.copy()
    y2[1, 2] += 100.0
    res = assim.ensemble_update(op, ens, obs.copy(data=y2), method="transform")
    reason = res.qc_reason.values
    assert reason[0, 1] == qc.OPERATOR_FLAG and reason[1, 2] == qc.DEPARTURE
    assert (reason == qc.USED).sum() == reason.size - 2
    assert res.diagnostics["n_used"].values.tolist() == [3, 3]


# -- 1D-Var with the physical model ------------------------------------------------------------
def _physical_case(n_prof=100, seed=0, sd_t=1.5, sd_lnq=0.3, ground=DEFAULT_SURFACE_PRESSURE_HPA):
    """Synthetic truth, obs = H(truth) + noise, background = truth + error drawn from B.

    ``ground``: surface_air_pressure [hPa] of every column (truth and background), by
    default the standard sea-level pressure: the default grid reaches 1100 hPa, below any
    ground, and its bottom levels are meant to be cut off by a surface_air_pressure (see
    rtemu.atmosphere.default_pressure_grid); None puts the ground at 1100 hPa."""
    from rtemu.atmosphere import default_pressure_grid, us_standard_atmosphere_1976
    from rtemu.runtime import PhysicalOperator

    op = PhysicalOperator("demo-sounder")  # an invented instrument (see its description)
    rng = np.random.default_rng(seed)
    p = default_pressure_grid()
    n_lev = len(p)
    layout = ControlLayout(n_levels=n_lev)
    b = ar1_b(layout, sd_t=sd_t, sd_lnq=sd_lnq, sd_ts=2.0, length=3.0)
    chol = np.linalg.cholesky(b)
    t = (us_standard_atmosphere_1976(p) + rng.uniform(-10, 10, (n_prof, 1)) * (p / p[0])
         + (rng.standard_normal((n_prof, layout.size)) @ chol.T)[:, :n_lev])
    rh = rng.uniform(0.3, 0.8, (n_prof, 1)) * (p / p[0]) ** 0.3
    with np.errstate(invalid="ignore"):  # q_s is infinite where e_s > p, aloft
        q = np.where(p < 100.0, 4e-6, np.maximum(rh * saturation_specific_humidity(t, p), 4e-6))
    truth = xr.Dataset({
        "air_pressure": ("level", p),
        "air_temperature": (("profile", "level"), t),
        "specific_humidity": (("profile", "level"), q),
        "surface_temperature": ("profile", t[:, 0] + rng.normal(0.0, 2.0, n_prof)),
        "surface_emissivity": ("profile", rng.uniform(0.6, 0.95, n_prof)),
        "sensor_zenith_angle": ("profile", rng.uniform(0.0, 50.0, n_prof)),
    })
    if ground is not None:
        truth["surface_air_pressure"] = ("profile", np.broadcast_to(np.asarray(ground, float), (n_prof,)))
    x_true = control(truth, layout)
    cols = read_columns(truth, ("profile",), (), "truth")
    bg_cols, x_bg = from_control(x_true + rng.standard_normal(x_true.shape) @ chol.T, cols, layout)
    background = write_columns(truth, bg_cols, ("profile",), False)
    simulated = op.simulate(truth)["brightness_temperature"]
    obs = simulated + rng.standard_normal(simulated.shape) * op.instrument.noise_k
    return op, background, obs, b, layout, x_true, x_bg


def _mahalanobis(err, b):
    return np.einsum("pi,ij,pj->p", err, np.linalg.inv(b), err)


def test_steps_that_cross_a_limit_land_on_it():
    """A free ln q whose step crosses its saturation limit is shortened to land on it: with
    T fixed, at the fraction (ln q_s - ln q) / d ln q; a step along the limit (d ln q =
    d ln q_s/dT dT) is not shortened; the T range cuts like any bound, except for an
    element the active set holds (blocked)."""
    from rtemu.assim._control import humidity_ceiling_slope
    from rtemu.assim.var1d import _fraction_to_limit

    p = np.array([900.0, 500.0])
    t = np.array([[285.0, 250.0]])
    q_s = saturation_specific_humidity(t, p)
    truth = xr.Dataset({
        "air_pressure": ("level", p),
        "air_temperature": (("profile", "level"), t),
        "specific_humidity": (("profile", "level"), q_s * np.array([[0.5, 0.2]])),
        "surface_temperature": ("profile", [288.0]),
        "surface_emissivity": ("profile", [0.9]),
        "sensor_zenith_angle": ("profile", [0.0]),
    })
    cols = read_columns(truth, ("profile",), (), "test")
    layout = ControlLayout(n_levels=2)
    x = to_control(cols, layout, "test")
    none = np.zeros((1, layout.size), dtype=bool)
    gap = np.log(2.0)  # ln q_s - ln q at level 0
    dx = np.zeros((1, layout.size))
    dx[0, 2] = 4.0 * gap
    np.testing.assert_allclose(_fraction_to_limit(x, dx, cols, layout, none), 0.25, rtol=1e-12)
    slope = humidity_ceiling_slope(cols)[0, 0]
    dx[0, 0], dx[0, 2] = 10.0, 10.0 * slope  # moves along the saturation curve (first order)
    dx[0, 2] -= 1e-9
    assert _fraction_to_limit(x, dx, cols, layout, none) == 1.0
    dx[:] = 0.0
    dx[0, 1] = 200.0  # T 250 K -> 450 K: cut at the 400 K limit (the ceiling of ln q rises)
    np.testing.assert_allclose(_fraction_to_limit(x, dx, cols, layout, none), 150.0 / 200.0, rtol=1e-12)
    blocked = none.copy()
    blocked[0, 1] = True
    assert _fraction_to_limit(x, dx, cols, layout, blocked) == 1.0


def test_var1d_over_terrain_sees_the_ground_and_holds_the_levels_under_it():
    """With surface_air_pressure, every operator call of the 1D-Var sees the ground: its
    analysis departures are those of the operator run on the analysis dataset (which
    carries the ground); and T, ln q of the levels the operator drops under the ground
    (zero Jacobians) stay at the background, where B's correlations alone would move them."""
    rng = np.random.default_rng(7)
    ground = rng.uniform(700.0, 1000.0, 12)  # hPa, mountains to lowlands (invented)
    op, background, obs, b, layout, x_true, x_bg = _physical_case(n_prof=12, seed=7, ground=ground)
    res = assim.var1d(op, background, obs, b_matrix=b)
    assert res.converged.values.all()
    assert "surface_air_pressure" in res.analysis
    out = op.simulate(res.analysis)
    used = res.qc_reason.values == qc.USED
    dep = (obs - out["brightness_temperature"]).values
    np.testing.assert_allclose(res.diagnostics["departure_analysis"].values[used], dep[used], atol=1e-9)
    p = background["air_pressure"].values
    nearest = np.array([p[p >= g].min() for g in ground])  # still enters the ground's values
    under = p[None, :] > nearest[:, None]
    assert under.sum(axis=1).min() >= 1
    x_an = control(res.analysis, layout)
    lev = layout.n_levels
    for part in (slice(0, lev), slice(lev, 2 * lev)):
        np.testing.assert_array_equal(x_an[:, part][under], x_bg[:, part][under])
        assert (np.abs(x_an[:, part] - x_bg[:, part])[~under] > 1e-6).any()


def test_var1d_on_physical_model_converges_and_beats_background():
    op, background, obs, b, layout, x_true, x_bg = _physical_case()
    res = assim.var1d(op, background, obs, b_matrix=b, max_iter=30)
    d = res.diagnostics
    assert d["status"].values.tolist() == [0] * len(x_true)  # all converged
    assert d["n_iterations"].values.max() <= 10
    cost = d["cost"].values
    steps = np.diff(cost, axis=1)
    assert (steps[np.isfinite(steps)] <= 0).all()  # monotone with LM damping
    final = cost[np.arange(len(cost)), d["n_iterations"].values]
    assert (final < cost[:, 0]).all()
    x_an = control(res.analysis, layout)
    n_lev = layout.n_levels
    err_bg, err_an = x_bg - x_true, x_an - x_true
    assert np.sqrt((err_an[:, :n_lev] ** 2).mean()) < np.sqrt((err_bg[:, :n_lev] ** 2).mean())
    assert np.sqrt((err_an[:, n_lev:2 * n_lev] ** 2).mean()) < np.sqrt((err_bg[:, n_lev:2 * n_lev] ** 2).mean())
    m_bg, m_an = _mahalanobis(err_bg, b).mean(), _mahalanobis(err_an, b).mean()
    assert m_an < m_bg
    # Optimal estimation theory (Rodgers 2000, section 2.4, from memory):
    # E[(xa - xt)^T B^-1 (xa - xt)] = trace(B^-1 S) = n - DFS. The sample mean over 100
    # columns has sd <= sqrt(2 n / 100); allow 4 sd.
    n = layout.size
    assert abs(m_an - (n - d["dfs"].values.mean())) < 4 * np.sqrt(2 * n / len(x_true))
    # J at the minimum is about m/2 with the 1/2 convention (chi-square, m degrees of freedom).
    j_per_obs = (d["cost_background"] + d["cost_observation"]).sum() / d["n_used"].sum()
    assert 0.35 < float(j_per_obs) < 0.65


def test_var1d_levenberg_marquardt_handles_a_strongly_nonlinear_case():
    # Larger background errors: humidity often at saturation, Jacobians change a lot.
    # (Since saturated ln q moves along its limit with T, 3 K / 0.5 no longer sends plain
    # Gauss-Newton uphill here; 4 K / 0.7 does.)
    op, background, obs, b, layout, x_true, x_bg = _physical_case(seed=1, sd_t=4.0, sd_lnq=0.7)
    lm = assim.var1d(op, background, obs, b_matrix=b, max_iter=30)
    gn = assim.var1d(op, background, obs, b_matrix=b, max_iter=30, lm_damping=0.0)
    steps_gn = np.diff(gn.cost.values, axis=1)
    assert (steps_gn[np.isfinite(steps_gn)] > 0).any()  # plain Gauss-Newton goes uphill here
    steps_lm = np.diff(lm.cost.values, axis=1)
    assert (steps_lm[np.isfinite(steps_lm)] <= 0).all()
    assert lm.converged.values.all()
    assert (lm.diagnostics["n_rejected_steps"].values > 0).any()
    x_an = control(lm.analysis, layout)
    assert _mahalanobis(x_an - x_true, b).mean() < _mahalanobis(x_bg - x_true, b).mean()


def test_var1d_defaults_converge_on_the_physical_model():
    """Defaults end at the optimum of J on the nonlinear physical model, saturation included.

    Two checks: the gradient of J at the default analysis, written out densely here from
    the operator's own Jacobian there, g = B^-1 (x - xb) - H^T R^-1 (y - H(x)), has
    d^2 = g^T (B^-1 + H^T R^-1 H)^-1 g < 1e-6 n (Rodgers 2000 section 5.6.3, from memory)
    in every column with no element at a physical limit; and every column, on a limit or
    not, is within 5 % of its analysis error standard deviation of a run with tolerances
    tightened by six orders (in the linear limit d^2 < 1e-6 n bounds each element by
    ~1 % of it; the old defaults stopped up to ~40 % away).
    """
    from rtemu.assim._control import control_bounds

    op, background, obs, b, layout, x_true, x_bg = _physical_case(n_prof=40, seed=1, sd_t=3.0, sd_lnq=0.5)
    res = assim.var1d(op, background, obs, b_matrix=b)
    ref = assim.var1d(op, background, obs, b_matrix=b, max_iter=60, step_tol=1e-12, cost_tol=0.0)
    assert res.converged.values.all() and ref.converged.values.all()
    x_an, x_ref = control(res.analysis, layout), control(ref.analysis, layout)
    sigma_a = ref.diagnostics["analysis_error_std"].values
    assert (np.abs(x_an - x_ref) < 0.05 * sigma_a).all()
    j = (res.diagnostics["cost_background"] + res.diagnostics["cost_observation"]).values
    j_ref = (ref.diagnostics["cost_background"] + ref.diagnostics["cost_observation"]).values
    assert (j - j_ref < 1e-3).all()

    # The levels deeper than the nearest one at or under the ground never reach the operator
    # and stay at the background: the optimum is that of J over the other elements.
    p_lev = background["air_pressure"].values
    under = p_lev > p_lev[p_lev >= DEFAULT_SURFACE_PRESSURE_HPA].min()
    free = ~np.concatenate([under, under, [False]])
    np.testing.assert_array_equal(x_an[:, ~free], x_bg[:, ~free])
    cols = read_columns(res.analysis, ("profile",), (), "analysis")
    lo, hi = control_bounds(cols, layout)
    interior = ((x_an > lo + 1e-6) & (x_an < hi - 1e-6))[:, free].all(axis=1)
    assert interior.sum() >= 10  # enough columns for the check to mean something
    out = op.simulate(res.analysis, jacobian=True)
    used = res.qc_reason.values == qc.USED
    r = op.instrument.noise_k**2
    b_inv = np.linalg.inv(b)
    for p in np.flatnonzero(interior):
        u = used[p]
        h = np.concatenate([
            out["jacobian_air_temperature"].values[p],
            out["jacobian_specific_humidity"].values[p] * cols.humidity[p],  # d/d ln q = q d/dq
            out["jacobian_surface_temperature"].values[p][:, None],
        ], axis=1)[u][:, free]
        dep = (obs.values[p] - out["brightness_temperature"].values[p])[u]
        g = (b_inv @ (x_an[p] - x_bg[p]))[free] - h.T @ (dep / r[u])
        d2 = g @ np.linalg.solve(b_inv[np.ix_(free, free)] + h.T @ (h / r[u][:, None]), g)
        assert d2 < 1e-6 * free.sum()


def test_per_channel_emissivity_follows_channel_labels_not_positions():
    op, bg, layout, b, h, r, y, hxb, xb, obs = _linear_case(emissivity="channel")
    res = assim.var1d(op, bg, obs, b_matrix=covariance_dataarray(b, layout), lm_damping=0.0,
                      control_emissivity=True)
    reversed_bg = bg.isel(channel=slice(None, None, -1))
    res_rev = assim.var1d(op, reversed_bg, obs.isel(channel=slice(None, None, -1)),
                          b_matrix=covariance_dataarray(b, layout), lm_damping=0.0, control_emissivity=True)
    em = res.analysis["surface_emissivity"]
    em_rev = res_rev.analysis["surface_emissivity"]
    assert list(em_rev["channel"].values) == list(reversed_bg["channel"].values)
    xr.testing.assert_allclose(em, em_rev.sel(channel=em["channel"]))
    assert not np.allclose(em.values, em_rev.values)  # the order really differs
    with pytest.raises(ValueError, match="surface_emissivity channels"):
        assim.var1d(op, bg.isel(channel=slice(1, None)), obs, b_matrix=b, control_emissivity=True)


@pytest.mark.parametrize("method", ["perturbed", "transform"])
def test_ensemble_update_on_physical_model_improves_the_mean(method):
    op, background, obs, b, layout, x_true, x_bg = _physical_case(n_prof=30, seed=2)
    ens = assim.sample_ensemble(background, b, seed=3)  # default size 64
    res = assim.ensemble_update(op, ens, obs, method=method, seed=4)
    n_lev = layout.n_levels

    def mean_error(ds):
        cols = read_columns(ds, ("profile", "member"), (), "ens")
        return to_control(cols, layout, "ens").reshape(30, 64, -1).mean(axis=1) - x_true

    err_f, err_a = mean_error(ens), mean_error(res.analysis)
    for part in (slice(0, n_lev), slice(n_lev, 2 * n_lev), slice(2 * n_lev, 2 * n_lev + 1)):
        assert np.sqrt((err_a[:, part] ** 2).mean()) < np.sqrt((err_f[:, part] ** 2).mean())
    # Spread shrinks where observed: surface temperature (window channels).
    ts = layout.surface_temperature
    spread = lambda ds: to_control(read_columns(ds, ("profile", "member"), (), "e"), layout, "e").reshape(
        30, 64, -1)[:, :, ts].std(axis=1).mean()
    assert spread(res.analysis) < 0.8 * spread(ens)


def test_accept_flags_lets_chosen_flag_bits_through():
    op, bg, layout, b, h, r, y, hxb, xb, obs = _linear_case()
    op.flagged = ((0, 2),)  # the stub sets bit 2
    strict = assim.var1d(op, bg, obs, b_matrix=b)
    lenient = assim.var1d(op, bg, obs, b_matrix=b, accept_flags=2)
    other_bit = assim.var1d(op, bg, obs, b_matrix=b, accept_flags=8)
    assert strict.qc_reason.values[0, 2] == qc.OPERATOR_FLAG
    assert lenient.qc_reason.values[0, 2] == qc.USED
    assert other_bit.qc_reason.values[0, 2] == qc.OPERATOR_FLAG
    with pytest.raises(ValueError, match="accept_flags"):
        assim.var1d(op, bg, obs, b_matrix=b, accept_flags=-1)


# -- fast paths against dense linear algebra -------------------------------------------------
def _spd(rng, n):
    a = rng.standard_normal((n, n))
    return a @ a.T + n * np.eye(n)


@pytest.mark.parametrize("shared_b", [True, False])
def test_active_set_step_equals_the_reduced_newton_system(shared_b):
    """The Woodbury step with B conditioned on the blocked elements is the projected step.

    Reference: a projected Newton step (Bertsekas 1982, SIAM J. Control Optim. 20, 221)
    holds the blocked elements at 0 and solves the Newton system over the free ones,
    [s (B^-1)_ff + (H~^T H~)_ff] dx_f = g_f; written out here with dense inverses.
    """
    from rtemu.assim.var1d import _Covariance, _damped_step, _step_system

    rng = np.random.default_rng(7)
    n, c, n_cols = 15, 4, 6
    b = _spd(rng, n) if shared_b else np.stack([_spd(rng, n) for _ in range(n_cols + 2)])
    idx = np.arange(n_cols) if shared_b else np.array([7, 0, 3, 5, 2, 6])  # a subset, out of order
    h_tilde = rng.standard_normal((n_cols, c, n))
    grad = rng.standard_normal((n_cols, n))
    blocked = rng.random((n_cols, n)) < 0.3
    blocked[0] = False  # nothing blocked
    blocked[1] = False
    blocked[1, 4] = True  # one element
    blocked[2] = True
    blocked[2, 5] = False  # all but one
    blocked[3] = True  # all
    scale = rng.uniform(1.0, 100.0, n_cols)
    step = _damped_step(_step_system(grad, _Covariance(b), idx, h_tilde, blocked), scale, blocked)
    for p in range(n_cols):
        bp = b if shared_b else b[idx[p]]
        free = ~blocked[p]
        hessian = scale[p] * np.linalg.inv(bp) + h_tilde[p].T @ h_tilde[p]
        ref = np.zeros(n)
        if free.any():
            ref[free] = np.linalg.solve(hessian[np.ix_(free, free)], grad[p, free])
        np.testing.assert_allclose(step[p], ref, rtol=1e-9, atol=1e-12)
        assert (step[p][blocked[p]] == 0.0).all()


class _RelabelledOutput(LinearOperator):
    """The same linear operator, returning channels reversed and dims in another order."""

    def simulate(self, ds, jacobian=False):
        out = super().simulate(ds, jacobian)
        return out.isel(channel=slice(None, None, -1)).transpose("channel", ...)


def test_var1d_reads_operator_outputs_by_label_not_position():
    op, bg, layout, b, h, r, y, hxb, xb, obs = _linear_case()
    relabelled = _RelabelledOutput(layout.n_levels)  # same seed: same matrices as op
    res = assim.var1d(relabelled, bg, obs, b_matrix=b, lm_damping=0.0, qc_threshold=None)
    # Closed form of Rodgers (2000), as in test_var1d_gauss_newton_matches_optimal_estimation.
    xa_ref, a_ref, s_ref = optimal_estimate(xb, b, h, r, y, hxb)
    np.testing.assert_allclose(control(res.analysis, layout), xa_ref, rtol=0, atol=1e-9)
    np.testing.assert_allclose(res.averaging_kernel.values, a_ref, atol=1e-9)
    s = res.diagnostics["analysis_error_covariance"].values
    np.testing.assert_allclose(s, s_ref, rtol=1e-8, atol=1e-12)
    np.testing.assert_allclose(s, np.swapaxes(s, 1, 2), rtol=0, atol=1e-12 * np.abs(s).max())
    np.testing.assert_allclose(res.diagnostics["departure_background"].values, y - hxb, atol=1e-9)


def test_diagnostics_without_matrices_keep_the_same_dfs_and_errors():
    op, bg, layout, b, h, r, y, hxb, xb, obs = _linear_case()
    full = assim.var1d(op, bg, obs, b_matrix=b, lm_damping=0.0, qc_threshold=None)
    lean = assim.var1d(op, bg, obs, b_matrix=b, lm_damping=0.0, qc_threshold=None,
                       diagnostic_matrices=False)
    assert "averaging_kernel" not in lean.diagnostics
    _, a_ref, s_ref = optimal_estimate(xb, b, h, r, y, hxb)  # Rodgers (2000) m-form
    np.testing.assert_allclose(lean.dfs.values, np.trace(a_ref, axis1=1, axis2=2), atol=1e-9)
    np.testing.assert_allclose(lean.diagnostics["analysis_error_std"].values,
                               np.sqrt(np.einsum("pii->pi", s_ref)), rtol=1e-8)
    np.testing.assert_allclose(lean.diagnostics["analysis_error_std"].values,
                               full.diagnostics["analysis_error_std"].values, rtol=1e-10)


def test_one_blas_thread_limits_blas_inside_and_restores_it_after():
    threadpoolctl = pytest.importorskip("threadpoolctl")
    from rtemu.assim import _linalg

    controlled = {lib.filepath for lib in _linalg._controller().lib_controllers if lib.user_api == "blas"}
    assert controlled  # numpy's BLAS at least

    def threads():
        return {i["filepath"]: i["num_threads"] for i in threadpoolctl.threadpool_info()
                if i["filepath"] in controlled}

    before = threads()

    @_linalg.one_blas_thread
    def inner():
        return threads()

    @_linalg.one_blas_thread
    def outer():
        return inner(), threads()

    nested, own = outer()
    assert set(nested.values()) == set(own.values()) == {1}
    assert threads() == before
