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
iterating; the per-column linear algebra is batched with numpy. Steps are solved in
Woodbury form (C x C systems for C channels, never n x n, also with elements held at a
limit); what a step needs apart from the damping is built once per accepted iterate and
shared by the convergence test and every damped trial from it. The matrix diagnostics
are computed in one pass at the end.

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
    """Batched matrix-vector product; ``m`` [N, n, k], ``v`` [N, k]."""
    return (m @ v[..., None])[..., 0]


class _Covariance:
    """B and B^-1, shared by all columns ([1, n, n]) or per column ([N, n, n]).

    Products take the indices ``idx`` of the columns they are for; with a shared B a
    product over a batch of columns is one matrix-matrix product.
    """

    @one_blas_thread
    def __init__(self, b: np.ndarray):
        b = b[None] if b.ndim == 2 else b
        self.b = 0.5 * (b + _t(b))
        inv = np.linalg.inv(self.b)
        self.inv = 0.5 * (inv + _t(inv))
        self.shared = self.b.shape[0] == 1

    @one_blas_thread
    def times(self, v, idx):
        """B v for vectors ``v`` [k, n] of the columns ``idx``."""
        return v @ self.b[0] if self.shared else _mv(self.b[idx], v)

    @one_blas_thread
    def inv_times(self, v, idx):
        """B^-1 v for vectors ``v`` [k, n] of the columns ``idx``."""
        return v @ self.inv[0] if self.shared else _mv(self.inv[idx], v)

    @one_blas_thread
    def rows_times(self, m, idx):
        """M B for matrices ``m`` [k, C, n] of the columns ``idx`` (= (B M^T)^T)."""
        if self.shared:
            return (m.reshape(-1, m.shape[-1]) @ self.b[0]).reshape(m.shape)
        return m @ self.b[idx]

    def rows(self, order, idx):
        """Rows B[order[i], :] of the columns ``idx`` [k, r, n]."""
        if self.shared:
            return self.b[0][order]
        return np.take_along_axis(self.b[idx], order[:, :, None], axis=1)

    def diagonal(self, n_columns):
        return np.broadcast_to(np.einsum("pii->pi", self.b), (n_columns, self.b.shape[-1]))


def _gradient(binv_dx, h_tilde, hx, y, sqrt_w):
    """g = B^-1 (x - xb) - H^T R^-1 (y - H(x)) = B^-1 (x - xb) - H~^T R^-1/2 (y - H(x))
    [control units^-1], with B^-1 (x - xb) given."""
    d = np.where(sqrt_w > 0, y - hx, 0.0)
    return binv_dx - np.einsum("pcn,pc->pn", h_tilde, sqrt_w * d)


def _observation_cost(hx, y, weight):
    d = np.where(weight > 0, y - hx, 0.0)
    return 0.5 * np.einsum("pc,pc->p", weight, d * d)


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
def _step_system(grad, cov: _Covariance, idx, h_tilde, blocked, hb=None):
    """The parts of the Newton step from one iterate that do not depend on the damping.

    Sherman-Morrison-Woodbury identity (behind Rodgers 2000 eqs. 2.44-2.45, from memory):

        [s B^-1 + H~^T H~]^-1 g = (B g - B H~^T w) / s,  (H~ B H~^T + s I) w = H~ B g,

    so only C x C systems are solved (C channels), whatever the damping s. Holding the
    blocked elements b fixed leaves the free ones f with the prior precision
    (B^-1)_ff = (B_ff - B_fb B_bb^-1 B_bf)^-1 (block inversion, Schur complement): the
    same formula with B' = B - B_:b B_bb^-1 B_b: (zero on the blocked rows and columns)
    in place of B gives the step over f and 0 on b. Only the k blocked rows of B enter,
    as corrections of size n k C per column; no n x n system is formed.

    Parameters: ``grad`` g [k, n], ``h_tilde`` H~ = R^-1/2 H [k, C, n] and ``blocked``
    [k, n] of the columns ``idx``; ``hb`` = H~ B if already known (it is overwritten).
    Returns B' g [k, n], H~ B' g [k, C], H~ B' [k, C, n] and H~ B' H~^T [k, C, C].
    """
    if hb is None:
        hb = cov.rows_times(h_tilde, idx)
    gmat = hb @ _t(h_tilde)
    bg = cov.times(grad, idx)
    hbg = _mv(hb, grad)
    rows = np.flatnonzero(blocked.any(axis=1))
    if rows.size == 0:
        return bg, hbg, hb, gmat
    # Blocked indices first, padded to the largest count with identity rows of B_bb.
    blk = blocked[rows]
    k = int(blk.sum(axis=1).max())
    order = np.argsort(~blk, axis=1, kind="stable")[:, :k]
    mask = np.take_along_axis(blk, order, axis=1)
    b_rows = cov.rows(order, idx[rows]) * mask[:, :, None]  # B_b: [r, k, n]
    b_bb = np.take_along_axis(b_rows, order[:, None, :], axis=2) * mask[:, None, :]
    b_bb = b_bb + np.eye(k) * ~mask[:, None, :]
    hb_b = np.take_along_axis(hb[rows], order[:, None, :], axis=2) * mask[:, None, :]  # H~ B_:b
    bg_b = np.take_along_axis(bg[rows], order, axis=1) * mask  # B_b: g
    z = np.linalg.solve(b_bb, np.concatenate([_t(hb_b), bg_b[:, :, None]], axis=2))
    z_h, z_g = z[:, :, :-1], z[:, :, -1:]  # B_bb^-1 B_b: H~^T, B_bb^-1 B_b: g
    bg[rows] -= (_t(z_g) @ b_rows)[:, 0]
    hbg[rows] -= (_t(z_h) @ bg_b[:, :, None])[..., 0]
    hb[rows] -= _t(z_h) @ b_rows
    gmat[rows] -= hb_b @ z_h
    return bg, hbg, hb, gmat


@one_blas_thread
def _damped_step(system, scale, blocked):
    """[scale B^-1 + H~^T H~]^-1 g over the free elements, blocked elements 0 [k, n].

    ``system`` is the output of :func:`_step_system` for these columns.
    """
    bg, hbg, hb, gmat = system
    inner = gmat + scale[:, None, None] * np.eye(gmat.shape[-1])
    w = np.linalg.solve(inner, hbg[..., None])  # [k, C, 1]
    step = (bg - (_t(w) @ hb)[:, 0]) / scale[:, None]
    step[blocked] = 0.0
    return step


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
    everything = np.arange(n_prof)

    # First guess and quality control.
    raw = run_operator(operator, cols_b, channels, jacobian=True)
    raw["flag"] = raw["flag"] & ~tolerated_bits
    h_xb = raw["bt"]
    h = control_jacobian(raw, cols_b, layout)
    finite_h = np.isfinite(h).all(axis=-1)
    h[~finite_h] = 0.0
    hb_xb = cov.rows_times(h, everything)  # H B
    departure_std = np.sqrt(np.einsum("pcn,pcn->pc", h, hb_xb) + r)  # sqrt(H B H^T + R)_ii
    flag = np.where(finite_h, raw["flag"], raw["flag"] | 1)
    reason = _qc.screen(y, h_xb, flag, departure_std, qc_threshold)
    used = reason == _qc.USED
    weight = np.where(used, 1.0 / r, 0.0)
    sqrt_w = np.sqrt(weight)
    n_used = used.sum(axis=1)

    # Per-column state at the current iterate. The observation side is kept as
    # H~ = R^-1/2 H (rows of unused observations zero), and everything the steps from an
    # iterate need except the damping (the step system) is built once per iterate.
    x = xb.copy()
    cols = cols_b
    hx = np.where(used, h_xb, 0.0)
    h_tilde = h * sqrt_w[..., None]
    del h
    binv_dx = np.zeros_like(x)  # B^-1 (x - xb)
    cost_now = _observation_cost(hx, y, weight)
    cost = np.full((n_prof, max_iter + 1), np.nan)
    trial_cost = np.full((n_prof, max_iter + 1), np.nan)
    cost[:, 0] = trial_cost[:, 0] = cost_now
    gamma = np.full(n_prof, gamma0)
    status = np.full(n_prof, MAX_ITERATIONS, dtype=np.int8)
    n_iter = np.zeros(n_prof, dtype=np.int64)
    n_rejected = np.zeros(n_prof, dtype=np.int64)
    grad = np.zeros_like(x)
    blocked = np.zeros(x.shape, dtype=bool)
    system = (np.zeros_like(x), np.zeros(used.shape), np.zeros_like(h_tilde),
              np.zeros(used.shape + used.shape[1:]))

    def new_iterate(idx, hb=None):
        """Gradient, active set and step system at the iterates of ``idx``; returns d^2."""
        grad[idx] = _gradient(binv_dx[idx], h_tilde[idx], hx[idx], y[idx], sqrt_w[idx])
        blocked[idx] = _blocked(x[idx], grad[idx], cols.subset(idx), layout)
        parts = _step_system(grad[idx], cov, idx, h_tilde[idx], blocked[idx], hb)
        for whole, part in zip(system, parts):
            whole[idx] = part
        # d^2 = g^T (B^-1 + H^T R^-1 H)^-1 g of the undamped step over the free elements
        undamped = _damped_step(parts, np.ones(len(idx)), blocked[idx])
        return np.einsum("pn,pn->p", grad[idx], undamped)

    status[n_used == 0] = NO_OBSERVATIONS
    active = n_used > 0
    idx = np.flatnonzero(active)
    if idx.size:
        done = new_iterate(idx, hb_xb[idx] * sqrt_w[idx, :, None]) < step_tol * n_ctl
        status[idx[done]] = CONVERGED
        active[idx[done]] = False
    del hb_xb

    for it in range(1, max_iter + 1):
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        dx = -_damped_step([part[idx] for part in system], 1.0 + gamma[idx], blocked[idx])
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
        trial_dxb = trial_x - xb[idx]
        trial_binv_dx = cov.inv_times(trial_dxb, idx)
        tjb = 0.5 * np.einsum("pn,pn->p", trial_dxb, trial_binv_dx)
        tjo = _observation_cost(trial_hx, y[idx], weight[idx])
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
        binv_dx[acc] = trial_binv_dx[accept]
        hx[acc] = trial_hx[accept]
        # Unused rows may hold non-finite values: select first (inf * 0 is NaN).
        h_tilde[acc] = np.where(u[accept, :, None], trial_h[accept], 0.0) * sqrt_w[acc, :, None]
        cost_now[acc] = tj[accept]
        cols = _replace_columns(cols, acc, trial_cols.subset(np.flatnonzero(accept)))
        gamma[acc] /= lm_factor if damped else 1.0
        rej = idx[~accept]
        if damped:
            gamma[rej] *= lm_factor
            n_rejected[rej] += 1
        cost[idx, it] = cost_now[idx]

        if acc.size:
            d2 = new_iterate(acc)
            small_decrease = (decrease >= 0) & (decrease < cost_tol * np.maximum(n_used[acc], 1))
            done = (d2 < step_tol * n_ctl) | (small_decrease & (d2 < n_ctl))
            status[acc[done]] = CONVERGED
            active[acc[done]] = False

    analysis = write_columns(background, cols, ("profile",), control_emissivity)
    diagnostics = _diagnostics(
        background=background, channels=channels, layout=layout, cov=cov,
        h_tilde=h_tilde, system=system, blocked=blocked, y=y, h_xb=h_xb, hx=hx, used=used, reason=reason,
        departure_std=departure_std, r=r, cost_background=0.5 * np.einsum("pn,pn->p", x - xb, binv_dx),
        cost_observation=_observation_cost(hx, y, weight), cost=cost, trial_cost=trial_cost,
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
def _analysis_matrices(cov: _Covariance, h_tilde, system, blocked, matrices: bool):
    """diag(A), diag(S) and, with ``matrices``, A and S at the analysis, in one batched pass.

    m-form (Rodgers 2000 eq. 2.44 gain, from memory): G~ = B H~^T (H~ B H~^T + I)^-1,
    A = G~ H~, S = B - G~ H~ B = (I - A) B; no n x n inverse is needed. ``h_tilde`` =
    R^-1/2 H at the analysis [N, C, n]; ``system`` and ``blocked`` are the step system
    and active set there: without blocked elements its H~ B and H~ B H~^T are the
    unconditioned ones and are reused.
    """
    hb, gmat = system[2].copy(), system[3].copy()
    rows = np.flatnonzero(blocked.any(axis=1))
    if rows.size:
        hb[rows] = cov.rows_times(h_tilde[rows], rows)
        gmat[rows] = hb[rows] @ _t(h_tilde[rows])
    # With L L^T = H~ B H~^T + I: G~^T = L^-T L^-1 H~ B and G~ H~ B = M^T M, M = L^-1 H~ B
    # (C x C factors only; S = B - M^T M is symmetric up to the BLAS summation order,
    # exactly so with OpenBLAS).
    l_inv = np.linalg.inv(np.linalg.cholesky(gmat + np.eye(gmat.shape[-1])))
    m = l_inv @ hb
    gain_t = _t(l_inv) @ m
    diag_a = np.einsum("pcn,pcn->pn", gain_t, h_tilde)
    kernel = s_hat = None
    if matrices:
        kernel = _t(gain_t) @ h_tilde
        s_hat = _t(m) @ m
        np.subtract(cov.b, s_hat, out=s_hat)
        s_diag = np.einsum("pii->pi", s_hat)
    else:
        s_diag = cov.diagonal(len(hb)) - np.einsum("pcn,pcn->pn", m, m)
    return diag_a, s_diag, kernel, s_hat


def _diagnostics(*, background, channels, layout, cov, h_tilde, system, blocked, y, h_xb, hx, used,
                 reason, departure_std, r, cost_background, cost_observation, cost, trial_cost,
                 status, n_iter, n_rejected, gamma, diagnostic_matrices, settings) -> xr.Dataset:
    diag_a, s_diag, kernel, s_hat = _analysis_matrices(cov, h_tilde, system, blocked, diagnostic_matrices)
    groups = np.array(layout.groups)
    group_names = list(dict.fromkeys(layout.groups))
    dfs_by = np.stack([diag_a[:, groups == g].sum(axis=1) for g in group_names], axis=1)
    jb, jo = cost_background, cost_observation
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
        "background_error_std": (("profile", ROW), np.sqrt(cov.diagonal(len(h_tilde))),
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
