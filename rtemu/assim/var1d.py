"""1D-Var: optimal estimation of a batch of columns from radiances.

For each column the analysis minimises (factor 1/2 convention)

    J(x) = 1/2 (x - xb)^T B^-1 (x - xb) + 1/2 (y - H(x))^T R^-1 (y - H(x))

over the control vector x = (T [K] per level, ln q [1] per level, Ts [K][, emissivity
[1]]) (see :mod:`rtemu.assim._control`). With the 1/2 factor, J at the minimum is about
m/2 for m used observations when B and R are right, and its gradient is
g = B^-1 (x - xb) - H^T R^-1 (y - H(x)).

Iteration (Levenberg-Marquardt form of Gauss-Newton, Rodgers 2000 eq. 5.36, from memory):

    [(1 + gamma) B^-1 + H_i^T R^-1 H_i] dx = -g(x_i),   x_{i+1} = P(x_i + dx)

where H_i is the operator Jacobian at x_i chained to the control variables
(dBT/d ln q = q dBT/dq) and P the projection onto physical limits (T in 100-400 K,
1e-8 kg kg-1 <= q <= min(q_s(T, p), 0.1 kg kg-1), emissivity in [0, 1]). A trial step is
accepted when J does not increase and the operator does not flag (or return non-finite
values for) a used channel; then gamma is divided by ``lm_factor``, otherwise the step is
rejected and gamma multiplied by ``lm_factor``. With ``lm_damping=0`` (or None) this is
plain Gauss-Newton (Rodgers 2000 eq. 5.9, from memory): every valid step is accepted.

Convergence (tested at every accepted iterate, and at the background):

* step size: the undamped Gauss-Newton step from the iterate has
  d^2 = g^T S g < step_tol * n, with S = (B^-1 + H^T R^-1 H)^-1 (Rodgers 2000 section
  5.6.3, "d^2 << n"); d^2 / 2 is also the cost decrease the quadratic model still
  predicts; or
* cost decrease: the accepted step lowered J by less than cost_tol * max(m, 1) while
  d^2 < n (the second condition keeps a heavily damped, tiny step from passing for
  convergence).

Diagnostics at the analysis, with H the Jacobian there (Rodgers 2000, ch. 2-3):

* analysis error covariance S = (B^-1 + H^T R^-1 H)^-1 (eq. 2.27, from memory);
* averaging kernel A = S H^T R^-1 H = I - S B^-1 (A = G K, eq. 3.10, from memory);
* degrees of freedom for signal DFS = trace(A) (eq. 2.80).

Each iteration makes one batched operator call (with Jacobians) over all columns still
iterating; the per-column linear algebra is batched with numpy.

References
----------
Rodgers, C. D. (2000), Inverse Methods for Atmospheric Sounding: Theory and Practice,
World Scientific, doi:10.1142/3171.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import xarray as xr

from rtemu.assim import qc as _qc
from rtemu.assim._linalg import one_blas_thread
from rtemu.assim._control import (
    control_bounds,
    from_control,
    layout_for,
    read_columns,
    to_control,
    write_columns,
)
from rtemu.assim._operator import (
    control_jacobian,
    observation_error_variance,
    operator_channels,
    read_observations,
    run_operator,
)
from rtemu.assim.covariance import COL, ROW, check_b_matrix

CONVERGED = 0
MAX_ITERATIONS = 1
INVALID_TRIAL = 2
NO_OBSERVATIONS = 3
STATUS_VALUES = np.array([CONVERGED, MAX_ITERATIONS, INVALID_TRIAL, NO_OBSERVATIONS], dtype=np.int8)
STATUS_MEANINGS = "converged max_iterations invalid_trial no_observations"

COST_CONVENTION = "J = 1/2 (x-xb)^T B^-1 (x-xb) + 1/2 (y-H(x))^T R^-1 (y-H(x))"


@dataclasses.dataclass(frozen=True)
class Var1DResult:
    """Result of :func:`var1d`.

    Attributes
    ----------
    analysis : xarray.Dataset
        The background dataset with air_temperature [K], specific_humidity [kg kg-1],
        surface_temperature [K] (and surface_emissivity [1] when controlled) replaced by
        the analysis.
    diagnostics : xarray.Dataset
        Per column: ``cost`` (profile, iteration) [1], ``trial_cost``, ``converged``,
        ``status``, ``n_iterations``, ``n_used``, ``qc_reason`` (profile, channel),
        ``qc_count`` (qc_category), departures [K], ``averaging_kernel``,
        ``analysis_error_covariance`` (profile, control_row, control_col), ``dfs``,
        ``dfs_by_variable`` and the error standard deviations. See the developer notes.
    """

    analysis: xr.Dataset
    diagnostics: xr.Dataset

    @property
    def cost(self) -> xr.DataArray:
        return self.diagnostics["cost"]

    @property
    def converged(self) -> xr.DataArray:
        return self.diagnostics["converged"]

    @property
    def averaging_kernel(self) -> xr.DataArray:
        return self.diagnostics["averaging_kernel"]

    @property
    def dfs(self) -> xr.DataArray:
        return self.diagnostics["dfs"]

    @property
    def qc_reason(self) -> xr.DataArray:
        return self.diagnostics["qc_reason"]

    @property
    def qc_count(self) -> xr.DataArray:
        return self.diagnostics["qc_count"]


def _t(a: np.ndarray) -> np.ndarray:
    return np.swapaxes(a, -1, -2)


def _mv(m: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Batched matrix-vector product; ``m`` [N, n, k] or shared [1, n, k], ``v`` [N, k]."""
    return (m @ v[..., None])[..., 0]


class _Covariance:
    """B and B^-1, shared by all columns ([1, n, n]) or per column ([N, n, n])."""

    @one_blas_thread
    def __init__(self, b: np.ndarray):
        self.b = b[None] if b.ndim == 2 else b
        inv = np.linalg.inv(self.b)
        self.inv = 0.5 * (inv + _t(inv))

    def pick(self, idx) -> "_Covariance":
        if self.b.shape[0] == 1:
            return self
        out = object.__new__(_Covariance)
        out.b, out.inv = self.b[idx], self.inv[idx]
        return out


def _scaled_jacobian(h, weight):
    """H~ = W^1/2 H: rows of rejected observations are zero [N, C, n]."""
    return h * np.sqrt(weight)[..., None]


@one_blas_thread
def _apply_inverse_hessian(v, cov: _Covariance, h_tilde, scale):
    """[scale B^-1 + H~^T H~]^-1 v by the Sherman-Morrison-Woodbury identity.

    With B_s = B / scale: B_s v - B_s H~^T (H~ B_s H~^T + I)^-1 H~ B_s v; only C x C
    systems (C channels) are solved, never n x n ones (the identity behind Rodgers 2000
    eqs. 2.44-2.45, from memory).
    """
    bht = (cov.b @ _t(h_tilde)) / scale[:, None, None]  # B_s H~^T [N, n, C]
    inner = h_tilde @ bht + np.eye(h_tilde.shape[1])
    bv = _mv(cov.b, v) / scale[:, None]
    return bv - _mv(bht, np.linalg.solve(inner, _mv(h_tilde, bv)[..., None])[..., 0])


@one_blas_thread
def _background_variance_in_bt(h, cov: _Covariance):
    """diag(H B H^T) [K2] per column and channel."""
    return np.einsum("pcn,pcn->pc", h, _t(cov.b @ _t(h)))


def _cost_terms(x, xb, cov: _Covariance, hx, y, weight):
    dxb = x - xb
    jb = 0.5 * np.einsum("pn,pn->p", dxb, _mv(cov.inv, dxb))
    d = np.where(weight > 0, y - hx, 0.0)
    jo = 0.5 * np.einsum("pc,pc->p", weight, d * d)
    return jb, jo


def _gradient(x, xb, cov: _Covariance, h, hx, y, weight):
    """g = B^-1 (x - xb) - H^T R^-1 (y - H(x)) [control units^-1]."""
    d = np.where(weight > 0, y - hx, 0.0)
    return _mv(cov.inv, x - xb) - np.einsum("pcn,pc->pn", h, weight * d)


def _blocked(x, grad, cols, layout):
    """Elements held at a physical limit: at the limit with descent (-g) pointing outward.

    This is the active set of a projected Newton method (Bertsekas 1982, SIAM J. Control
    Optim. 20, 221-246, doi:10.1137/0320018): those elements are fixed for the step and
    left out of the convergence test, so that an optimum on a limit (e.g. saturation)
    is recognised as one.
    """
    lo, hi = control_bounds(cols, layout)
    tol = 1e-9 * np.maximum(1.0, np.abs(x))
    return ((x >= hi - tol) & (grad < 0)) | ((x <= lo + tol) & (grad > 0))


@one_blas_thread
def _newton_solve(grad, cov: _Covariance, h_tilde, scale, blocked):
    """[scale B^-1 + H~^T H~]^-1 g over the free elements; blocked elements get 0.

    Columns without blocked elements use the Woodbury form (C x C solves); the others
    solve the n x n system with the blocked rows and columns replaced by the identity.
    """
    out = np.empty_like(grad)
    free = ~blocked.any(axis=1)
    if free.any():
        f = np.flatnonzero(free)
        out[f] = _apply_inverse_hessian(grad[f], cov.pick(f), h_tilde[f], scale[f])
    if not free.all():
        c = np.flatnonzero(~free)
        fixed = blocked[c]
        keep = ~fixed
        hessian = scale[c][:, None, None] * cov.pick(c).inv + _t(h_tilde[c]) @ h_tilde[c]
        hessian = hessian * (keep[:, :, None] & keep[:, None, :]) + np.eye(grad.shape[1]) * fixed[:, :, None]
        rhs = np.where(fixed, 0.0, grad[c])
        out[c] = np.linalg.solve(hessian, rhs[..., None])[..., 0]
    return out


def _gauss_newton_d2(grad, cov: _Covariance, h_tilde, blocked):
    """d^2 = g^T (B^-1 + H^T R^-1 H)^-1 g of the undamped step over the free elements [1]."""
    step = _newton_solve(grad, cov, h_tilde, np.ones(len(grad)), blocked)
    return np.einsum("pn,pn->p", grad, step)


def var1d(
    operator,
    background: xr.Dataset,
    observations,
    *,
    b_matrix,
    observation_error=None,
    emulator_error=None,
    max_iter: int = 10,
    lm_damping: float | None = 1.0,
    lm_factor: float = 10.0,
    qc_threshold: float | None = _qc.DEFAULT_THRESHOLD,
    control_emissivity: bool = False,
    accept_flags: int = 0,
    cost_tol: float = 1e-3,
    step_tol: float = 1e-2,
    diagnostic_matrices: bool = True,
) -> Var1DResult:
    """1D-Var analysis of a batch of columns.

    Parameters
    ----------
    operator : observation operator
        Any object with ``channels``, ``instrument`` and ``simulate(dataset, jacobian)``
        (see the package docstring).
    background : xarray.Dataset
        Background columns xb in the input schema (dims profile, level[, channel]);
        specific_humidity must be > 0 [kg kg-1].
    observations : xarray.DataArray or Dataset
        Observed brightness_temperature (profile, channel) [K]; NaN = missing.
    b_matrix : xarray.DataArray or array_like
        Background error covariance in control space, [n, n] or [N, n, n] (see
        :func:`rtemu.assim.estimate_background_covariance`) [K2, K, 1].
    observation_error : mapping, DataArray or array_like [C], optional
        Observation error standard deviation [K]; default the instrument noise.
    emulator_error : mapping, DataArray or array_like [C], optional
        Operator (emulator) error standard deviation [K], added to R in quadrature.
    max_iter : int
        Maximum number of iterations (operator calls after the first guess).
    lm_damping : float or None
        Initial Levenberg-Marquardt gamma [1]; 0 or None: plain Gauss-Newton.
    lm_factor : float
        Factor dividing gamma after an accepted step and multiplying it after a rejected one [1].
    qc_threshold : float or None
        First-guess check threshold in standard deviations of the expected departure [1];
        None switches the check off.
    control_emissivity : bool
        Also analyse surface emissivity (one element, or one per channel when the
        background's surface_emissivity has a channel dim).
    accept_flags : int
        quality_flag bits that do not make an observation unusable (e.g.
        ``rtemu.flags.PHYSICS_FALLBACK``: the value was recomputed by the physical
        model); default 0: any nonzero flag rejects.
    cost_tol, step_tol : float
        Convergence tolerances [1] (see the module docstring).
    diagnostic_matrices : bool
        Store the averaging kernel and analysis error covariance matrices (N n^2 values
        each); the DFS and error standard deviations are always stored.

    Returns
    -------
    Var1DResult
    """
    channels = operator_channels(operator)
    if max_iter < 0:
        raise ValueError(f"max_iter must be >= 0, got {max_iter}")
    gamma0 = 0.0 if lm_damping is None else float(lm_damping)
    if gamma0 < 0 or not np.isfinite(gamma0):
        raise ValueError(f"lm_damping must be >= 0 or None, got {lm_damping}")
    damped = gamma0 > 0
    if damped and not lm_factor > 1:
        raise ValueError(f"lm_factor must be > 1, got {lm_factor}")
    tolerated_bits = _qc.check_accept_flags(accept_flags)

    cols_b = read_columns(background, ("profile",), channels, "background")
    layout = layout_for(cols_b, control_emissivity)
    xb = to_control(cols_b, layout, "background")
    n_prof, n_ctl = xb.shape
    cov = _Covariance(check_b_matrix(b_matrix, layout, n_prof))
    y = read_observations(observations, channels, n_prof, background.coords.get("profile"))
    r = observation_error_variance(operator, observation_error, emulator_error)

    # First guess and quality control.
    raw = run_operator(operator, cols_b, channels, jacobian=True)
    raw["flag"] = raw["flag"] & ~tolerated_bits
    h_xb = raw["bt"]
    h = control_jacobian(raw, cols_b, layout)
    finite_h = np.isfinite(h).all(axis=-1)
    h = np.where(finite_h[..., None], h, 0.0)
    departure_std = np.sqrt(_background_variance_in_bt(h, cov) + r)
    flag = np.where(finite_h, raw["flag"], raw["flag"] | 1)
    reason = _qc.screen(y, h_xb, flag, departure_std, qc_threshold)
    used = reason == _qc.USED
    weight = np.where(used, 1.0 / r, 0.0)
    h = np.where(used[..., None], h, 0.0)
    n_used = used.sum(axis=1)

    x = xb.copy()
    cols = cols_b
    hx = np.where(used, h_xb, 0.0)
    jb, jo = _cost_terms(x, xb, cov, hx, y, weight)
    cost_now = jb + jo
    cost = np.full((n_prof, max_iter + 1), np.nan)
    trial_cost = np.full((n_prof, max_iter + 1), np.nan)
    cost[:, 0] = trial_cost[:, 0] = cost_now
    gamma = np.full(n_prof, gamma0)
    status = np.full(n_prof, MAX_ITERATIONS, dtype=np.int8)
    n_iter = np.zeros(n_prof, dtype=np.int64)
    n_rejected = np.zeros(n_prof, dtype=np.int64)

    status[n_used == 0] = NO_OBSERVATIONS
    active = n_used > 0
    idx = np.flatnonzero(active)
    if idx.size:
        grad = _gradient(x[idx], xb[idx], cov.pick(idx), h[idx], hx[idx], y[idx], weight[idx])
        blocked = _blocked(x[idx], grad, cols.subset(idx), layout)
        d2 = _gauss_newton_d2(grad, cov.pick(idx), _scaled_jacobian(h[idx], weight[idx]), blocked)
        done = d2 < step_tol * n_ctl
        status[idx[done]] = CONVERGED
        active[idx[done]] = False

    for it in range(1, max_iter + 1):
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        grad = _gradient(x[idx], xb[idx], cov.pick(idx), h[idx], hx[idx], y[idx], weight[idx])
        blocked = _blocked(x[idx], grad, cols.subset(idx), layout)
        dx = -_newton_solve(
            grad, cov.pick(idx), _scaled_jacobian(h[idx], weight[idx]), 1.0 + gamma[idx], blocked
        )
        trial_cols, trial_x = from_control(x[idx] + dx, cols.subset(idx), layout)
        raw = run_operator(operator, trial_cols, channels, jacobian=True)
        raw["flag"] = raw["flag"] & ~tolerated_bits
        trial_h = control_jacobian(raw, trial_cols, layout)
        u = used[idx]
        valid = (
            (np.isfinite(raw["bt"]) | ~u).all(axis=1)
            & ((raw["flag"] == 0) | ~u).all(axis=1)
            & (np.isfinite(trial_h).all(axis=-1) | ~u).all(axis=1)
        )
        trial_hx = np.where(u, raw["bt"], 0.0)
        trial_h = np.where(u[..., None], trial_h, 0.0)
        tjb, tjo = _cost_terms(trial_x, xb[idx], cov.pick(idx), trial_hx, y[idx], weight[idx])
        tj = np.where(valid, tjb + tjo, np.nan)
        trial_cost[idx, it] = tj
        n_iter[idx] = it
        if damped:
            accept = valid & (tj <= cost_now[idx])
        else:
            accept = valid
            stopped = idx[~valid]
            status[stopped] = INVALID_TRIAL
            active[stopped] = False

        acc = idx[accept]
        decrease = cost_now[acc] - tj[accept]
        x[acc] = trial_x[accept]
        hx[acc] = trial_hx[accept]
        h[acc] = trial_h[accept]
        cost_now[acc] = tj[accept]
        cols = _replace_columns(cols, acc, trial_cols.subset(np.flatnonzero(accept)))
        gamma[acc] /= lm_factor if damped else 1.0
        rej = idx[~accept]
        if damped:
            gamma[rej] *= lm_factor
            n_rejected[rej] += 1
        cost[idx, it] = cost_now[idx]

        if acc.size:
            grad = _gradient(x[acc], xb[acc], cov.pick(acc), h[acc], hx[acc], y[acc], weight[acc])
            blocked = _blocked(x[acc], grad, cols.subset(acc), layout)
            d2 = _gauss_newton_d2(grad, cov.pick(acc), _scaled_jacobian(h[acc], weight[acc]), blocked)
            small_decrease = (decrease >= 0) & (decrease < cost_tol * np.maximum(n_used[acc], 1))
            done = (d2 < step_tol * n_ctl) | (small_decrease & (d2 < n_ctl))
            status[acc[done]] = CONVERGED
            active[acc[done]] = False

    analysis = write_columns(background, cols, ("profile",), control_emissivity)
    diagnostics = _diagnostics(
        background=background, channels=channels, layout=layout, cov=cov,
        h=h, weight=weight, y=y, h_xb=h_xb, hx=hx, used=used, reason=reason,
        departure_std=departure_std, r=r, x=x, xb=xb, cost=cost, trial_cost=trial_cost,
        status=status, n_iter=n_iter, n_rejected=n_rejected, gamma=gamma,
        diagnostic_matrices=diagnostic_matrices, settings=dict(
            max_iter=max_iter, lm_damping=gamma0, lm_factor=lm_factor,
            qc_threshold="none" if qc_threshold is None else float(qc_threshold),
            accept_flags=tolerated_bits,
            cost_tol=cost_tol, step_tol=step_tol,
            control_emissivity=int(control_emissivity),
        ),
    )
    return Var1DResult(analysis=analysis, diagnostics=diagnostics)


def _replace_columns(cols, index, new):
    if index.size == 0:
        return cols
    out = dataclasses.replace(
        cols,
        temperature=cols.temperature.copy(),
        humidity=cols.humidity.copy(),
        surface_temperature=cols.surface_temperature.copy(),
        emissivity=cols.emissivity.copy(),
    )
    out.temperature[index] = new.temperature
    out.humidity[index] = new.humidity
    out.surface_temperature[index] = new.surface_temperature
    out.emissivity[index] = new.emissivity
    return out


@one_blas_thread
def _diagnostics(*, background, channels, layout, cov, h, weight, y, h_xb, hx, used,
                 reason, departure_std, r, x, xb, cost, trial_cost, status, n_iter, n_rejected,
                 gamma, diagnostic_matrices, settings) -> xr.Dataset:
    # m-form (Rodgers 2000 eq. 2.44 gain, from memory): G~ = B H~^T (H~ B H~^T + I)^-1,
    # A = G~ H~, S = B - G~ H~ B = (I - A) B; no n x n inverse is needed.
    h_tilde = _scaled_jacobian(h, weight)
    b_full = np.broadcast_to(cov.b, (len(h),) + cov.b.shape[1:])
    bht = cov.b @ _t(h_tilde)
    inner = h_tilde @ bht + np.eye(h_tilde.shape[1])
    gain = _t(np.linalg.solve(inner, _t(bht)))  # inner is symmetric
    diag_a = np.einsum("pnc,pcn->pn", gain, h_tilde)
    if diagnostic_matrices:
        kernel = gain @ h_tilde
        s_hat = cov.b - gain @ _t(bht)  # (I - A) B with H~ B = (B H~^T)^T
        s_hat = 0.5 * (s_hat + _t(s_hat))
        s_diag = np.einsum("pii->pi", s_hat)
    else:
        s_diag = np.einsum("pii->pi", b_full) - np.einsum("pnc,pcn->pn", gain, _t(bht))
    groups = np.array(layout.groups)
    group_names = list(dict.fromkeys(layout.groups))
    dfs_by = np.stack([diag_a[:, groups == g].sum(axis=1) for g in group_names], axis=1)
    jb, jo = _cost_terms(x, xb, cov, hx, y, weight)
    dep_an = np.where(np.isnan(y), np.nan, y - np.where(used, hx, np.nan))

    coords = {
        "channel": ("channel", np.array(channels, dtype=object)),
        ROW: (ROW, np.array(layout.labels, dtype=object)),
        COL: (COL, np.array(layout.labels, dtype=object)),
        "iteration": ("iteration", np.arange(cost.shape[1])),
        "control_group": ("control_group", np.array(group_names, dtype=object)),
        "qc_category": ("qc_category", np.array(_qc.REASON_MEANINGS.split(), dtype=object)),
    }
    if "profile" in background.coords:
        coords["profile"] = background.coords["profile"]
    pc = ("profile", "channel")
    status_attrs = {"flag_values": STATUS_VALUES, "flag_meanings": STATUS_MEANINGS,
                    "long_name": "how the minimisation ended"}
    data = {
        "cost": (("profile", "iteration"), cost, {
            "long_name": "cost function of the accepted iterate (iteration 0: background)",
            "units": "1", "convention": COST_CONVENTION}),
        "trial_cost": (("profile", "iteration"), trial_cost, {
            "long_name": "cost function of the state tried at each iteration (NaN: invalid trial)",
            "units": "1", "convention": COST_CONVENTION}),
        "cost_background": ("profile", jb, {"long_name": "background term of J at the analysis", "units": "1"}),
        "cost_observation": ("profile", jo, {"long_name": "observation term of J at the analysis", "units": "1"}),
        "converged": ("profile", np.isin(status, (CONVERGED, NO_OBSERVATIONS)),
                      {"long_name": "minimisation converged (or nothing to minimise)"}),
        "status": ("profile", status, status_attrs),
        "n_iterations": ("profile", n_iter, {"long_name": "operator calls after the first guess"}),
        "n_rejected_steps": ("profile", n_rejected, {"long_name": "Levenberg-Marquardt steps rejected"}),
        "final_lm_damping": ("profile", gamma, {"long_name": "Levenberg-Marquardt gamma at the end", "units": "1"}),
        "n_used": ("profile", used.sum(axis=1), {"long_name": "observations used"}),
        "qc_reason": (pc, reason, _qc.reason_attrs()),
        "qc_count": ("qc_category", _qc.reason_counts(reason).values,
                     {"long_name": "number of observations per quality-control reason"}),
        "departure_background": (pc, y - h_xb, {"long_name": "first-guess departure y - H(xb)", "units": "K"}),
        "departure_std_background": (pc, departure_std, {
            "long_name": "expected standard deviation of the first-guess departure, sqrt(H B H^T + R)_ii",
            "units": "K"}),
        "departure_analysis": (pc, dep_an, {"long_name": "analysis departure y - H(xa), used observations",
                                            "units": "K"}),
        "observation_error_variance": ("channel", r, {"long_name": "diagonal of R", "units": "K2"}),
        "dfs": ("profile", diag_a.sum(axis=1),
                {"long_name": "degrees of freedom for signal, trace(A)", "units": "1"}),
        "dfs_by_variable": (("profile", "control_group"), dfs_by,
                            {"long_name": "partial trace of the averaging kernel per variable", "units": "1"}),
        "background_error_std": (("profile", ROW), np.sqrt(np.einsum("pii->pi", b_full)),
                                 {"long_name": "sqrt(diag(B))", "units": "K or 1 (see control_row)"}),
        "analysis_error_std": (("profile", ROW), np.sqrt(s_diag),
                               {"long_name": "sqrt(diag(S)), S analysis error covariance",
                                "units": "K or 1 (see control_row)"}),
    }
    if diagnostic_matrices:
        data["averaging_kernel"] = (("profile", ROW, COL), kernel, {
            "long_name": "averaging kernel A = S H^T R^-1 H at the analysis", "units": "1"})
        data["analysis_error_covariance"] = (("profile", ROW, COL), s_hat, {
            "long_name": "analysis error covariance S = (B^-1 + H^T R^-1 H)^-1", "units": "K2, K or 1"})
    ds = xr.Dataset(data, coords=coords)
    ds.attrs.update({f"setting_{k}": v for k, v in settings.items()})
    ds.attrs["cost_convention"] = COST_CONVENTION
    return ds
