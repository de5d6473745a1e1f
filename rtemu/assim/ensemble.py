"""Ensemble analysis of columns: perturbed-observation EnKF and symmetric ETKF.

The state of each member is the control vector of :mod:`rtemu.assim._control`
(T [K], ln q [1], Ts [K][, emissivity [1]]); every column (profile) is analysed
independently with its own observations. Notation for one column, N members, state
anomalies X' [N, n] (rows x_k - xbar), simulated anomalies Y' [N, m] (rows
H(x_k) - mean_k H(x_k)), diagonal R:

* perturbed observations (Burgers et al. 1998):
  K = X'^T Y' / (N-1) [Y'^T Y' / (N-1) + R]^-1,  x_k^a = x_k + K (y + eps_k - H(x_k)),
  eps_k ~ N(0, R) drawn from a seeded numpy Generator;
* ensemble transform (Bishop et al. 2001), symmetric square-root form: with
  Yt = Y' R^-1/2 and C = Yt Yt^T [N, N],
  Pt = [(N-1) I + C]^-1,  wbar = Pt Yt R^-1/2 (y - ybar),  W = [(N-1) Pt]^1/2 (symmetric),
  x_k^a = xbar + X'^T (wbar + W[:, k]).
  It is computed from the thin SVD of Yt, so its cost grows like N m min(N, m), not N^3.

Multiplicative inflation rho multiplies the background covariance: the anomalies are
scaled by sqrt(rho) before H is applied (x_k <- xbar + sqrt(rho) (x_k - xbar)).
Humidity is analysed in ln q and the members are projected onto the physical limits
afterwards (see rtemu.assim._control.from_control).

References
----------
Burgers, G., van Leeuwen, P. J. and Evensen, G. (1998), Analysis scheme in the ensemble
Kalman filter, Mon. Wea. Rev. 126, 1719-1724,
doi:10.1175/1520-0493(1998)126<1719:ASITEK>2.0.CO;2.
Bishop, C. H., Etherton, B. J. and Majumdar, S. J. (2001), Adaptive sampling with the
ensemble transform Kalman filter. Part I: Theoretical aspects, Mon. Wea. Rev. 129,
420-436, doi:10.1175/1520-0493(2001)129<0420:ASWTET>2.0.CO;2.
Hunt, B. R., Kostelich, E. J. and Szunyogh, I. (2007), Efficient data assimilation for
spatiotemporal chaos: a local ensemble transform Kalman filter, Physica D 230, 112-126,
doi:10.1016/j.physd.2006.11.008 (the symmetric square root in weight space).
"""

from __future__ import annotations

import dataclasses
from typing import Literal

import numpy as np
import xarray as xr

from rtemu.assim import qc as _qc
from rtemu.assim._linalg import one_blas_thread
from rtemu.assim._control import from_control, layout_for, read_columns, to_control, write_columns
from rtemu.assim._operator import (
    observation_error_variance,
    operator_channels,
    read_observations,
    run_operator,
)

#: Default number of members when an ensemble is drawn (common practice: 40-100).
DEFAULT_ENSEMBLE_SIZE = 64

Method = Literal["perturbed", "transform"]


@dataclasses.dataclass(frozen=True)
class EnsembleResult:
    """Result of :func:`ensemble_update`.

    Attributes
    ----------
    analysis : xarray.Dataset
        The ensemble dataset with the controlled variables replaced by the analysis members.
    diagnostics : xarray.Dataset
        ``qc_reason`` (profile, channel), ``qc_count``, ``n_used`` (profile),
        ``departure_background`` = y - mean_k H(x_k) [K], ``background_spread`` =
        std_k H(x_k) [K], ``departure_std_background`` [K], ``observation_error_variance`` [K2].
    """

    analysis: xr.Dataset
    diagnostics: xr.Dataset

    @property
    def qc_reason(self) -> xr.DataArray:
        return self.diagnostics["qc_reason"]


def _mv(m, v):
    """Batched matrix-vector product: ``m`` [P, a, b], ``v`` [P, b] -> [P, a]."""
    return (m @ v[..., None])[..., 0]


@one_blas_thread
def perturbed_observation_update(x, hx, y, r, weight, eps):
    """Stochastic EnKF analysis with perturbed observations, batched over columns.

    Parameters
    ----------
    x : array_like [P, N, n]
        Background members (control vectors) [K, 1].
    hx : array_like [P, N, m]
        H(x_k) [K].
    y : array_like [P, m]
        Observations [K] (any value where ``weight`` is 0).
    r : array_like [m]
        Observation error variances [K2].
    weight : array_like [P, m]
        1 where the observation is used, 0 where not [1].
    eps : array_like [P, N, m]
        Observation perturbations drawn from N(0, R) [K].

    Returns
    -------
    numpy.ndarray [P, N, n]
        Analysis members.
    """
    n_mem = x.shape[1]
    xa = x - x.mean(axis=1, keepdims=True)
    ya = (hx - hx.mean(axis=1, keepdims=True)) * weight[:, None, :]
    pht = np.swapaxes(xa, 1, 2) @ ya / (n_mem - 1)  # P^f H^T
    s = np.swapaxes(ya, 1, 2) @ ya / (n_mem - 1)
    s = s + np.eye(len(r))[None] * r  # unused rows: Y' = 0 so S = diag(R) there
    innovation = np.where(weight[:, None, :] > 0, y[:, None, :] + eps - hx, 0.0)
    z = np.linalg.solve(s, np.swapaxes(innovation, 1, 2))  # [P, m, N]
    return x + np.swapaxes(pht @ z, 1, 2)


@one_blas_thread
def transform_update(x, hx, y, r, weight):
    """Deterministic ETKF analysis (symmetric square root), batched over columns.

    Parameters
    ----------
    x : array_like [P, N, n]
        Background members [K, 1].
    hx : array_like [P, N, m]
        H(x_k) [K].
    y : array_like [P, m]
        Observations [K].
    r : array_like [m]
        Observation error variances [K2].
    weight : array_like [P, m]
        1 where the observation is used, 0 where not [1].

    Returns
    -------
    numpy.ndarray [P, N, n]
        Analysis members.
    """
    n_mem = x.shape[1]
    xbar = x.mean(axis=1, keepdims=True)
    xa = x - xbar
    ybar = hx.mean(axis=1)
    inv_sqrt_r = np.where(weight > 0, 1.0 / np.sqrt(r), 0.0)  # [P, m]
    yt = (hx - ybar[:, None, :]) * inv_sqrt_r[:, None, :]  # [P, N, m]
    d = np.where(weight > 0, y - ybar, 0.0) * inv_sqrt_r  # [P, m]
    # Thin SVD Yt = V s U^T: C = Yt Yt^T = V s^2 V^T; outside span(V) C is zero.
    v, s, ut = np.linalg.svd(yt, full_matrices=False)  # v [P, N, k], s [P, k], ut [P, k, m]
    lam = s**2
    # Stacked matrix products (BLAS) in place of multi-operand einsums.
    wbar = _mv(v, s / (lam + n_mem - 1) * _mv(ut, d))  # [P, N]
    # W = I + V diag(sqrt((N-1)/(lam+N-1)) - 1) V^T  (eigenvalue 0 outside span(V) -> 1)
    f = np.sqrt((n_mem - 1) / (lam + n_mem - 1)) - 1.0
    vtx = np.swapaxes(v, 1, 2) @ xa  # [P, k, n]
    anomalies = xa + v @ (f[:, :, None] * vtx)
    increment_mean = (wbar[:, None, :] @ xa)[:, 0]
    return xbar + increment_mean[:, None, :] + anomalies


def ensemble_update(
    operator,
    ensemble: xr.Dataset,
    observations,
    *,
    method: Method = "transform",
    inflation: float = 1.0,
    seed: int | np.random.Generator | None = 0,
    observation_error=None,
    emulator_error=None,
    qc_threshold: float | None = _qc.DEFAULT_THRESHOLD,
    control_emissivity: bool = False,
    accept_flags: int = 0,
    member_dim: str = "member",
) -> EnsembleResult:
    """Ensemble Kalman analysis of an ensemble of columns.

    Parameters
    ----------
    operator : observation operator
        Any object with ``channels``, ``instrument`` and ``simulate(dataset, jacobian)``.
    ensemble : xarray.Dataset
        Members along ``member_dim``, columns along ``profile`` (optional for one column),
        in the input schema; specific_humidity > 0 [kg kg-1].
    observations : xarray.DataArray or Dataset
        brightness_temperature (profile, channel) or (channel) for one column [K]; NaN = missing.
    method : {"perturbed", "transform"}
        * ``"perturbed"``: stochastic EnKF with perturbed observations (Burgers et al. 1998).
        * ``"transform"``: deterministic ETKF, symmetric square root (Bishop et al. 2001).
    inflation : float
        Multiplicative covariance inflation rho >= 1 [1] (1: none).
    seed : int, numpy.random.Generator or None
        Random source of the observation perturbations ("perturbed" only).
    observation_error, emulator_error : mapping, DataArray or array_like [C], optional
        Standard deviations [K] as in :func:`rtemu.assim.observation_error_variance`.
    qc_threshold : float or None
        First-guess check of |y - mean_k H(x_k)| against qc_threshold sqrt(var_k H(x_k) + R)
        [1]; None: off. A channel flagged (or non-finite) for any member of a column is
        not used in that column (reason ``operator_flag``).
    control_emissivity : bool
        Also update surface emissivity.
    accept_flags : int
        quality_flag bits that do not make an observation unusable (see
        :func:`rtemu.assim.var1d`); default 0: any nonzero flag rejects.
    member_dim : str
        Name of the member dimension.

    Returns
    -------
    EnsembleResult
    """
    channels = operator_channels(operator)
    if method not in ("perturbed", "transform"):
        raise ValueError(f"method must be 'perturbed' or 'transform', got {method!r}")
    if not (np.isfinite(inflation) and inflation >= 1.0):
        raise ValueError(f"inflation must be a finite number >= 1, got {inflation}")
    if not isinstance(ensemble, xr.Dataset) or member_dim not in ensemble.dims:
        raise ValueError(f"ensemble: must be an xarray.Dataset with a {member_dim!r} dimension")
    n_mem = ensemble.sizes[member_dim]
    if n_mem < 2:
        raise ValueError(f"ensemble: {n_mem} member(s) (rule: at least two)")
    single = "profile" not in ensemble.dims
    ds = ensemble.expand_dims("profile") if single else ensemble
    n_prof = ds.sizes["profile"]
    column_dims = ("profile", member_dim)

    cols = read_columns(ds, column_dims, channels, "ensemble")
    layout = layout_for(cols, control_emissivity)
    x = to_control(cols, layout, "ensemble").reshape(n_prof, n_mem, layout.size)
    if inflation != 1.0:
        mean = x.mean(axis=1, keepdims=True)
        x = mean + np.sqrt(inflation) * (x - mean)
        cols, flat = from_control(x.reshape(n_prof * n_mem, -1), cols, layout)
        x = flat.reshape(n_prof, n_mem, -1)

    y = read_observations(observations, channels, n_prof, None if single else ds.coords.get("profile"))
    r = observation_error_variance(operator, observation_error, emulator_error)
    raw = run_operator(operator, cols, channels, jacobian=False)
    hx = raw["bt"].reshape(n_prof, n_mem, -1)
    flag = (raw["flag"] & ~_qc.check_accept_flags(accept_flags)).reshape(n_prof, n_mem, -1)
    member_bad = (flag != 0) | ~np.isfinite(hx)
    hx_mean = np.where(member_bad.any(axis=1), np.nan, hx.mean(axis=1))
    spread = np.where(member_bad.any(axis=1), np.nan, hx.std(axis=1, ddof=1))
    departure_std = np.sqrt(spread**2 + r)
    reason = _qc.screen(y, hx_mean, member_bad.any(axis=1).astype(int), departure_std, qc_threshold)
    used = reason == _qc.USED
    weight = used.astype(float)
    hx_safe = np.where(used[:, None, :], hx, 0.0)

    if method == "perturbed":
        rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
        eps = rng.standard_normal(hx.shape) * np.sqrt(r)
        xa = perturbed_observation_update(x, hx_safe, y, r, weight, eps)
    else:
        xa = transform_update(x, hx_safe, y, r, weight)

    new_cols, _ = from_control(xa.reshape(n_prof * n_mem, -1), cols, layout)
    analysis = write_columns(ds, new_cols, column_dims, control_emissivity)
    diagnostics = _diagnostics(ds, channels, reason, used, y, hx_mean, spread, departure_std, r,
                               method, inflation, n_mem)
    diagnostics.attrs["accept_flags"] = _qc.check_accept_flags(accept_flags)
    if single:
        analysis = analysis.isel(profile=0)
        diagnostics = diagnostics.isel(profile=0)
    return EnsembleResult(analysis=analysis, diagnostics=diagnostics)


def sample_ensemble(
    background: xr.Dataset,
    b_matrix,
    *,
    n_members: int = DEFAULT_ENSEMBLE_SIZE,
    seed: int | np.random.Generator | None = 0,
    control_emissivity: bool = False,
    channels=None,
    member_dim: str = "member",
) -> xr.Dataset:
    """Draw an ensemble around background columns: x_k = P(xb + L z_k), B = L L^T, z_k ~ N(0, I).

    Parameters
    ----------
    background : xarray.Dataset
        Columns (dims profile, level[, channel]) in the input schema; q > 0 [kg kg-1].
    b_matrix : xarray.DataArray or array_like
        Covariance in control space [n, n] or [N, n, n] [K2, K, 1].
    n_members : int
        Ensemble size (default 64).
    seed : int, numpy.random.Generator or None
        Random source.
    control_emissivity : bool
        Perturb surface emissivity too (B must then include it).
    channels : sequence of str, optional
        Channel order of a per-channel emissivity (default the dataset's channel coordinate).
    member_dim : str
        Name of the new member dimension.

    Returns
    -------
    xarray.Dataset
        The background repeated along ``member_dim`` (first dim) with perturbed
        air_temperature [K], specific_humidity [kg kg-1], surface_temperature [K]
        (and surface_emissivity [1]); members are projected onto the physical limits.
    """
    from rtemu.assim.covariance import check_b_matrix

    if n_members < 2:
        raise ValueError(f"n_members must be >= 2, got {n_members}")
    if channels is None:
        channels = tuple(str(c) for c in background["channel"].values) if "channel" in background.coords else ()
    channels = tuple(channels)
    if "channel" in background["surface_emissivity"].dims and not channels:
        channels = tuple(str(i) for i in range(background.sizes["channel"]))
    cols = read_columns(background, ("profile",), channels, "background")
    layout = layout_for(cols, control_emissivity)
    xb = to_control(cols, layout, "background")
    n_prof, n_ctl = xb.shape
    b = np.broadcast_to(check_b_matrix(b_matrix, layout, n_prof), (n_prof, n_ctl, n_ctl))
    chol = np.linalg.cholesky(b)
    rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
    z = rng.standard_normal((n_prof, n_members, n_ctl))
    x = xb[:, None, :] + np.einsum("pij,pkj->pki", chol, z)
    rep = cols.subset(np.repeat(np.arange(n_prof), n_members))
    new_cols, _ = from_control(x.reshape(n_prof * n_members, n_ctl), rep, layout)
    template = background.expand_dims({member_dim: n_members}).copy(deep=True)
    return write_columns(template, new_cols, ("profile", member_dim), control_emissivity).transpose(
        member_dim, ...
    )


def _diagnostics(ds, channels, reason, used, y, hx_mean, spread, departure_std, r, method, inflation, n_mem):
    pc = ("profile", "channel")
    coords = {
        "channel": ("channel", np.array(channels, dtype=object)),
        "qc_category": ("qc_category", np.array(_qc.REASON_MEANINGS.split(), dtype=object)),
    }
    if "profile" in ds.coords:
        coords["profile"] = ds.coords["profile"]
    data = {
        "qc_reason": (pc, reason, _qc.reason_attrs()),
        "qc_count": ("qc_category", _qc.reason_counts(reason).values,
                     {"long_name": "number of observations per quality-control reason"}),
        "n_used": ("profile", used.sum(axis=1), {"long_name": "observations used"}),
        "departure_background": (pc, y - hx_mean, {
            "long_name": "first-guess departure y - mean_k H(x_k)", "units": "K"}),
        "background_spread": (pc, spread, {"long_name": "ensemble standard deviation of H(x_k)", "units": "K"}),
        "departure_std_background": (pc, departure_std, {
            "long_name": "expected departure standard deviation sqrt(var_k H(x_k) + R)", "units": "K"}),
        "observation_error_variance": ("channel", r, {"long_name": "diagonal of R", "units": "K2"}),
    }
    out = xr.Dataset(data, coords=coords)
    out.attrs.update({"method": method, "inflation": float(inflation), "n_members": int(n_mem)})
    return out
