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
1e-8 kg kg-1 <= q <= min(q_s(T, p), 0.1 kg kg-1), emissivity in [0, 1]). A step that
would take a free element across a limit is first shortened to land on the first limit
it meets (see :func:`_fraction_to_limit`). A trial step is accepted when J does not
increase and the operator does not flag (or return non-finite values for) a used
channel. gamma follows the gain ratio rho = (decrease of J) / (decrease the Gauss-Newton
model predicts for the step) (Fletcher's rule, thresholds from memory): divided by
``lm_factor`` after an accepted step with rho >= 0.75, kept for 0.25 <= rho < 0.75,
multiplied by ``lm_factor`` after an accepted step with rho < 0.25 and after a rejected
one. With ``lm_damping=0`` (or None) this is plain Gauss-Newton (Rodgers 2000 eq. 5.9,
from memory): every valid step is accepted.

Convergence (d^2 tested at every accepted iterate, and at the background):

* step size: the undamped Gauss-Newton step from the iterate has
  d^2 = g^T S g < step_tol * n, with S = (B^-1 + H^T R^-1 H)^-1 (Rodgers 2000 section
  5.6.3, "d^2 << n"). For a linear problem d^2 = (x - xa)^T S^-1 (x - xa) exactly, so
  the default 1e-6 puts the iterate within ~1e-3 sqrt(n) analysis standard deviations
  of the optimum; or
* cost resolution: a step from the iterate was rejected although the decrease the
  quadratic model still predicts there, d^2 / 2, is below cost_tol * max(m, 1) for m
  used observations (a float32 operator resolves J to ~1e-4; the default 1e-5 per
  observation stops there instead of damping to max_iter).

Active set: an element at a physical limit is held there when descent points outward
or when the undamped step would leave the limit; a ln q held on its saturation limit
moves with the temperature of its level (d ln q = d ln q_s/dT dT), so an optimum on a
saturated level is reached, not approached by clipped steps. With a
``surface_air_pressure`` in the background, every operator call sees that ground, and the
T and ln q of the levels under it that the operator drops (zero Jacobians) are held at
the background for the whole minimisation.

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
    humidity_ceiling_slope,
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

DEFAULT_MAX_ITER = 10
DEFAULT_LM_DAMPING = 0.1
DEFAULT_LM_FACTOR = 10.0
DEFAULT_COST_TOL = 1e-5
DEFAULT_STEP_TOL = 1e-6

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


def _at_limits(x, cols, layout):
    """Elements at their upper and at their lower physical limit [k, n] (bool, bool)."""
    lo, hi = control_bounds(cols, layout)
    tol = 1e-9 * np.maximum(1.0, np.abs(x))
    return x >= hi - tol, x <= lo + tol


def _saturation_slope(at_upper, cols, layout):
    """Slope [k, n] of the ln q limit with the temperature of its level [K-1], on the ln q
    elements at their upper limit (0 elsewhere).

    The ln q ceiling of a saturated level moves with that level's temperature, so a step
    that holds ln q fixed while T changes would leave the limit (and be clipped by the
    projection, which raises J by more than the step gains): the optimum on a saturated
    level is only reached when the step keeps ln q on its limit, d ln q = slope dT.
    """
    slope = np.zeros(at_upper.shape)
    lnq = layout.ln_humidity
    rows = np.flatnonzero(at_upper[:, lnq].any(axis=1))
    if rows.size:
        ceiling = humidity_ceiling_slope(cols.subset(rows))
        slope[rows, lnq] = np.where(at_upper[rows, lnq], ceiling, 0.0)
    return slope


def _active_set(problem, idx, x, grad, cols, h_tilde, hb):
    """Blocked elements, their coupling and the step system at the iterates of ``idx``.

    The active set of a projected Newton method (Bertsekas 1982, SIAM J. Control Optim.
    20, 221-246, doi:10.1137/0320018): an element at a limit is held there for the step
    when descent (-g) points outward, and then also when the undamped step over the
    remaining elements would leave the limit (for a ln q on its saturation limit: d ln q
    > slope dT). Blocked elements are left out of the convergence test, so that an
    optimum on a limit (e.g. saturation) is recognised as one.
    """
    held = problem.held[idx]
    at_hi, at_lo = _at_limits(x, cols, problem.layout)
    at_hi &= ~held
    at_lo &= ~held
    slope_hi = _saturation_slope(at_hi, cols, problem.layout)
    blocked = held | (at_hi & (grad < 0)) | (at_lo & (grad > 0))
    system = list(_step_system(grad, problem.cov, idx, h_tilde, blocked, hb,
                               (slope_hi * blocked, problem.partner)))
    dx = -_damped_step(system, np.ones(len(idx)), blocked, (slope_hi * blocked, problem.partner))
    for _ in range(2):  # one more element blocked per pass is enough in practice
        outward = ((at_hi & (dx - slope_hi * dx[:, problem.partner] > 0)) | (at_lo & (dx < 0))) & ~blocked
        rows = np.flatnonzero(outward.any(axis=1))
        if rows.size == 0:
            break
        blocked[rows] |= outward[rows]
        coupling = (slope_hi[rows] * blocked[rows], problem.partner)
        parts = _step_system(grad[rows], problem.cov, idx[rows], h_tilde[rows], blocked[rows], None, coupling)
        for whole, part in zip(system, parts):
            whole[rows] = part
        dx[rows] = -_damped_step(parts, np.ones(rows.size), blocked[rows], coupling)
    return blocked, slope_hi * blocked, system, dx


def _fraction_to_limit(x, dx, cols, layout, blocked):
    """Largest fraction (<= 1) [k] of the steps ``dx`` [k, n] that keeps every free element
    inside its physical limits, to first order.

    An element that is not at a limit but whose step crosses one would be clipped by the
    projection, which bends the step away from the direction the model made it descend
    along; such a trial is often rejected, damped until it no longer reaches the limit,
    and the iterates then approach an optimum on the limit one damping cycle at a time.
    Shortened to the first limit it meets, the step stays a descent direction and lands
    the element on its limit, where the active set takes it over at the next iterate (the
    step-back to the boundary of projected Newton methods, Bertsekas 1982). The ln q
    ceiling moves with T: it is crossed when d ln q > slope dT.
    """
    lo, hi = control_bounds(cols, layout)
    slope = np.zeros_like(x)
    slope[:, layout.ln_humidity] = humidity_ceiling_slope(cols)
    partner = _partner(layout)
    at_hi, at_lo = _at_limits(x, cols, layout)
    free = ~blocked & ~at_hi & ~at_lo
    up = dx - slope * dx[:, partner]  # rate of approach to the upper limit
    with np.errstate(divide="ignore", invalid="ignore"):
        to_hi = np.where(free & (up > 0), (hi - x) / up, np.inf)
        to_lo = np.where(free & (dx < 0), (lo - x) / dx, np.inf)
    return np.clip(np.minimum(to_hi, to_lo).min(axis=1), 0.0, 1.0)


def _partner(layout):
    """Index of the element each control element is coupled to: ln q[i] -> T[i], else itself."""
    partner = np.arange(layout.size)
    partner[layout.ln_humidity] = np.arange(layout.n_levels)
    return partner


@one_blas_thread
def _step_system(grad, cov: _Covariance, idx, h_tilde, blocked, hb=None, coupling=None):
    """The parts of the Newton step from one iterate that do not depend on the damping.

    Sherman-Morrison-Woodbury identity (behind Rodgers 2000 eqs. 2.44-2.45, from memory):

        [s B^-1 + H~^T H~]^-1 g = (B g - B H~^T w) / s,  (H~ B H~^T + s I) w = H~ B g,

    so only C x C systems are solved (C channels), whatever the damping s. Holding the
    blocked elements fixed is a set of linear constraints C^T dx = 0 (one column c per
    blocked element: its unit vector, or with ``coupling`` e_lnq - slope e_T for a ln q
    held on a saturation limit that moves with T). The step over the remaining subspace
    is the same formula with B' = B - B C (C^T B C)^-1 C^T B (B conditioned on the
    constraints; for unit vectors the Schur complement of the blocked elements) in
    place of B. Only the k blocked rows C^T B enter, as corrections of size n k C per
    column; no n x n system is formed.

    Parameters: ``grad`` g [k, n], ``h_tilde`` H~ = R^-1/2 H [k, C, n] and ``blocked``
    [k, n] of the columns ``idx``; ``hb`` = H~ B if already known (it is overwritten);
    ``coupling`` = (slope [k, n] [K-1], partner [n]) from :func:`_active_set`
    and :func:`_partner`, or None (plain bounds).
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
    # Blocked indices first, padded to the largest count with identity rows of C^T B C.
    blk = blocked[rows]
    k = int(blk.sum(axis=1).max())
    order = np.argsort(~blk, axis=1, kind="stable")[:, :k]
    mask = np.take_along_axis(blk, order, axis=1)
    sl = pair = None
    if coupling is not None:
        slope, partner = coupling
        sl = np.take_along_axis(slope[rows], order, axis=1) * mask
        if sl.any():
            pair = partner[order]
        else:
            sl = None

    b_rows = cov.rows(order, idx[rows])
    if sl is not None:
        b_rows = b_rows - sl[:, :, None] * cov.rows(pair, idx[rows])
    b_rows = b_rows * mask[:, :, None]  # C^T B [r, k, n]
    b_cc = np.take_along_axis(b_rows, order[:, None, :], axis=2)  # C^T B C
    if sl is not None:
        b_cc = b_cc - sl[:, None, :] * np.take_along_axis(b_rows, pair[:, None, :], axis=2)
    b_cc = b_cc * mask[:, None, :] + np.eye(k) * ~mask[:, None, :]
    hb_c = h_tilde[rows] @ _t(b_rows)  # H~ B C [r, C, k]: a product, cheaper than a gather
    bg_c = _mv(b_rows, grad[rows])  # C^T B g [r, k]
    z = np.linalg.solve(b_cc, np.concatenate([_t(hb_c), bg_c[:, :, None]], axis=2))
    z_h, z_g = z[:, :, :-1], z[:, :, -1:]  # (C^T B C)^-1 C^T B H~^T, (C^T B C)^-1 C^T B g
    bg[rows] -= (_t(z_g) @ b_rows)[:, 0]
    hbg[rows] -= (_t(z_h) @ bg_c[:, :, None])[..., 0]
    hb[rows] -= _t(z_h) @ b_rows
    gmat[rows] -= hb_c @ z_h
    return bg, hbg, hb, gmat


@one_blas_thread
def _damped_step(system, scale, blocked, coupling=None):
    """[scale B^-1 + H~^T H~]^-1 g over the free subspace [k, n].

    ``system`` is the output of :func:`_step_system` for these columns (with the same
    ``coupling``). Blocked elements get exactly 0, or slope x the step of their partner
    when coupled (the formula gives that up to rounding).
    """
    bg, hbg, hb, gmat = system
    inner = gmat + scale[:, None, None] * np.eye(gmat.shape[-1])
    w = np.linalg.solve(inner, hbg[..., None])  # [k, C, 1]
    step = (bg - (_t(w) @ hb)[:, 0]) / scale[:, None]
    step[blocked] = 0.0
    if coupling is not None:
        slope, partner = coupling
        coupled = slope != 0
        if coupled.any():
            step[coupled] = (slope * step[:, partner])[coupled]
    return step


# -- settings and iteration state -----------------------------------------------------------
@dataclasses.dataclass(frozen=True)
class _Settings:
    """The options of :func:`var1d`, checked once (see its docstring)."""

    max_iter: int = DEFAULT_MAX_ITER
    lm_damping: float | None = DEFAULT_LM_DAMPING
    lm_factor: float = DEFAULT_LM_FACTOR
    qc_threshold: float | None = _qc.DEFAULT_THRESHOLD
    control_emissivity: bool = False
    accept_flags: int = 0
    cost_tol: float = DEFAULT_COST_TOL
    step_tol: float = DEFAULT_STEP_TOL
    diagnostic_matrices: bool = True

    def __post_init__(self):
        if self.max_iter < 0:
            raise ValueError(f"max_iter must be >= 0, got {self.max_iter}")
        if self.gamma0 < 0 or not np.isfinite(self.gamma0):
            raise ValueError(f"lm_damping must be >= 0 or None, got {self.lm_damping}")
        if self.damped and not self.lm_factor > 1:
            raise ValueError(f"lm_factor must be > 1, got {self.lm_factor}")
        for name in ("cost_tol", "step_tol"):
            value = getattr(self, name)
            if not (np.isfinite(value) and value >= 0):
                raise ValueError(f"{name} must be finite and >= 0, got {value}")

    @property
    def gamma0(self) -> float:
        return 0.0 if self.lm_damping is None else float(self.lm_damping)

    @property
    def damped(self) -> bool:
        return self.gamma0 > 0

    def attrs(self, tolerated_bits: int) -> dict:
        """The settings as attributes of the diagnostics dataset."""
        return dict(
            max_iter=self.max_iter, lm_damping=self.gamma0, lm_factor=self.lm_factor,
            qc_threshold="none" if self.qc_threshold is None else float(self.qc_threshold),
            accept_flags=tolerated_bits, cost_tol=self.cost_tol, step_tol=self.step_tol,
            control_emissivity=int(self.control_emissivity),
        )


@dataclasses.dataclass
class _Problem:
    """What does not change during the minimisation."""

    operator: object
    channels: tuple
    layout: object
    xb: np.ndarray  # [N, n] background control vectors
    cov: _Covariance
    y: np.ndarray  # [N, C] [K], NaN missing
    r: np.ndarray  # [C] [K2]
    tolerated_bits: int
    partner: np.ndarray  # [n], see _partner
    cols_b: object  # Columns of the background
    held: np.ndarray  # [N, n] elements under the ground, held at the background

    def run(self, cols):
        """Operator output at ``cols`` with the tolerated flag bits cleared, and H [k, C, n]."""
        raw = run_operator(self.operator, cols, self.channels, jacobian=True)
        raw["flag"] = raw["flag"] & ~self.tolerated_bits
        return raw, control_jacobian(raw, cols, self.layout)


@dataclasses.dataclass
class _Screening:
    """The first-guess check: which observations are used, and with what weight."""

    h_xb: np.ndarray  # [N, C] H(xb) [K]
    departure_std: np.ndarray  # [N, C] sqrt(H B H^T + R)_ii [K]
    reason: np.ndarray  # [N, C] qc reason codes
    used: np.ndarray  # [N, C] bool
    weight: np.ndarray  # [N, C] R^-1 of used observations, else 0 [K-2]
    sqrt_w: np.ndarray  # [N, C] [K-1]
    n_used: np.ndarray  # [N]


@dataclasses.dataclass
class _Iterates:
    """Per-column state at the current (last accepted) iterate, and the histories.

    The observation side is kept as H~ = R^-1/2 H (rows of unused observations zero);
    ``system`` holds what the steps from the iterate need apart from the damping.
    """

    x: np.ndarray  # [N, n]
    cols: object  # Columns at x
    hx: np.ndarray  # [N, C] H(x), 0 where unused [K]
    h_tilde: np.ndarray  # [N, C, n]
    binv_dx: np.ndarray  # [N, n] B^-1 (x - xb)
    cost_now: np.ndarray  # [N]
    gamma: np.ndarray  # [N]
    grad: np.ndarray  # [N, n]
    blocked: np.ndarray  # [N, n]
    slope: np.ndarray  # [N, n] saturation coupling [K-1]
    system: list  # 4 arrays, see _step_system
    d2: np.ndarray  # [N] g^T S g at the iterate
    active: np.ndarray  # [N] still iterating
    status: np.ndarray  # [N]
    n_iter: np.ndarray  # [N]
    n_rejected: np.ndarray  # [N]
    cost: np.ndarray  # [N, max_iter + 1] accepted cost per iteration
    trial_cost: np.ndarray  # [N, max_iter + 1]

    def coupling(self, idx, problem):
        return self.slope[idx], problem.partner


def var1d(
    operator,
    background: xr.Dataset,
    observations,
    *,
    b_matrix,
    observation_error=None,
    emulator_error=None,
    max_iter: int = DEFAULT_MAX_ITER,
    lm_damping: float | None = DEFAULT_LM_DAMPING,
    lm_factor: float = DEFAULT_LM_FACTOR,
    qc_threshold: float | None = _qc.DEFAULT_THRESHOLD,
    control_emissivity: bool = False,
    accept_flags: int = 0,
    cost_tol: float = DEFAULT_COST_TOL,
    step_tol: float = DEFAULT_STEP_TOL,
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
    settings = _Settings(
        max_iter=max_iter, lm_damping=lm_damping, lm_factor=lm_factor, qc_threshold=qc_threshold,
        control_emissivity=control_emissivity, accept_flags=accept_flags, cost_tol=cost_tol,
        step_tol=step_tol, diagnostic_matrices=diagnostic_matrices,
    )
    problem = _read_problem(operator, background, observations, b_matrix, observation_error,
                            emulator_error, settings)
    screening, state = _first_guess(problem, settings)
    for it in range(1, settings.max_iter + 1):
        idx = np.flatnonzero(state.active)
        if idx.size == 0:
            break
        _iterate(problem, screening, state, idx, it, settings)
    analysis = write_columns(background, state.cols, ("profile",), settings.control_emissivity)
    diagnostics = _diagnostics(background, problem, screening, state, settings)
    return Var1DResult(analysis=analysis, diagnostics=diagnostics)


def _read_problem(operator, background, observations, b_matrix, observation_error, emulator_error,
                  settings: _Settings) -> _Problem:
    channels = operator_channels(operator)
    tolerated_bits = _qc.check_accept_flags(settings.accept_flags)
    cols_b = read_columns(background, ("profile",), channels, "background")
    layout = layout_for(cols_b, settings.control_emissivity)
    xb = to_control(cols_b, layout, "background")
    cov = _Covariance(check_b_matrix(b_matrix, layout, xb.shape[0]))
    y = read_observations(observations, channels, xb.shape[0], background.coords.get("profile"))
    r = observation_error_variance(operator, observation_error, emulator_error)
    return _Problem(operator=operator, channels=channels, layout=layout, xb=xb, cov=cov, y=y, r=r,
                    tolerated_bits=tolerated_bits, partner=_partner(layout), cols_b=cols_b,
                    held=_held(cols_b, layout))


def _held(cols, layout):
    """Control elements [N, n] held at the background: T and ln q of the levels under the
    ground (:meth:`Columns.below_ground`). Their Jacobians are zero, so only B's
    correlations would move them, to values no operator call ever sees."""
    held = np.zeros((cols.n, layout.size), dtype=bool)
    below = cols.below_ground()
    held[:, layout.temperature] = below
    held[:, layout.ln_humidity] = below
    return held


def _first_guess(problem: _Problem, settings: _Settings) -> tuple[_Screening, _Iterates]:
    """Operator call at the background, quality control, and the first iterate."""
    cols_b, cov = problem.cols_b, problem.cov
    n_prof = len(problem.xb)
    everything = np.arange(n_prof)
    raw, h = problem.run(cols_b)
    finite_h = np.isfinite(h).all(axis=-1)
    h[~finite_h] = 0.0
    hb = cov.rows_times(h, everything)  # H B
    departure_std = np.sqrt(np.einsum("pcn,pcn->pc", h, hb) + problem.r)  # sqrt(H B H^T + R)_ii
    flag = np.where(finite_h, raw["flag"], raw["flag"] | 1)
    reason = _qc.screen(problem.y, raw["bt"], flag, departure_std, settings.qc_threshold)
    used = reason == _qc.USED
    weight = np.where(used, 1.0 / problem.r, 0.0)
    sqrt_w = np.sqrt(weight)
    screening = _Screening(h_xb=raw["bt"], departure_std=departure_std, reason=reason, used=used,
                           weight=weight, sqrt_w=sqrt_w, n_used=used.sum(axis=1))

    hx = np.where(used, raw["bt"], 0.0)
    h *= sqrt_w[..., None]
    cost_now = _observation_cost(hx, problem.y, weight)
    cost = np.full((n_prof, settings.max_iter + 1), np.nan)
    trial_cost = cost.copy()
    cost[:, 0] = trial_cost[:, 0] = cost_now
    x = problem.xb.copy()
    state = _Iterates(
        x=x, cols=cols_b, hx=hx, h_tilde=h, binv_dx=np.zeros_like(x), cost_now=cost_now,
        gamma=np.full(n_prof, settings.gamma0), grad=np.zeros_like(x),
        blocked=np.zeros(x.shape, dtype=bool), slope=np.zeros_like(x),
        system=[np.zeros_like(x), np.zeros(used.shape), np.zeros_like(h), np.zeros(used.shape + used.shape[1:])],
        d2=np.full(n_prof, np.nan), active=screening.n_used > 0,
        status=np.where(screening.n_used > 0, MAX_ITERATIONS, NO_OBSERVATIONS).astype(np.int8),
        n_iter=np.zeros(n_prof, dtype=np.int64), n_rejected=np.zeros(n_prof, dtype=np.int64),
        cost=cost, trial_cost=trial_cost,
    )
    idx = np.flatnonzero(state.active)
    if idx.size:
        _new_iterate(problem, screening, state, idx, hb[idx] * sqrt_w[idx, :, None])
        _stop(state, idx[state.d2[idx] < settings.step_tol * problem.xb.shape[1]], CONVERGED)
    return screening, state


@one_blas_thread  # once here instead of in each of the ~5 linear-algebra calls below
def _new_iterate(problem, screening, state: _Iterates, idx, hb=None):
    """Gradient, active set, step system and d^2 at the iterates of ``idx``."""
    grad = _gradient(state.binv_dx[idx], state.h_tilde[idx], state.hx[idx], problem.y[idx],
                     screening.sqrt_w[idx])
    blocked, slope, parts, dx = _active_set(problem, idx, state.x[idx], grad, state.cols.subset(idx),
                                            state.h_tilde[idx], hb)
    state.grad[idx], state.blocked[idx], state.slope[idx] = grad, blocked, slope
    for whole, part in zip(state.system, parts):
        whole[idx] = part
    # d^2 = g^T (B^-1 + H^T R^-1 H)^-1 g = -g^T dx of the undamped step over the free subspace
    state.d2[idx] = -np.einsum("pn,pn->p", grad, dx)


def _stop(state: _Iterates, columns, status):
    state.status[columns] = status
    state.active[columns] = False


@dataclasses.dataclass
class _Trial:
    """The projected states tried from the iterates of some columns, and what they cost."""

    cols: object  # Columns
    x: np.ndarray  # [k, n]
    hx: np.ndarray  # [k, C] H(x), 0 where unused [K]
    h: np.ndarray  # [k, C, n] H (raw rows, unweighted)
    binv_dx: np.ndarray  # [k, n]
    cost: np.ndarray  # [k], NaN when invalid
    valid: np.ndarray  # [k] finite and unflagged on every used channel


def _try_step(problem, screening, state: _Iterates, idx) -> _Trial:
    """One damped step from the iterates of ``idx``, projected, and one operator call there."""
    step = _damped_step([part[idx] for part in state.system], 1.0 + state.gamma[idx],
                        state.blocked[idx], state.coupling(idx, problem))
    step *= _fraction_to_limit(state.x[idx], -step, state.cols.subset(idx), problem.layout,
                               state.blocked[idx])[:, None]
    cols, x = from_control(state.x[idx] - step, state.cols.subset(idx), problem.layout, problem.held[idx])
    raw, h = problem.run(cols)
    u = screening.used[idx]
    valid = (
        (np.isfinite(raw["bt"]) | ~u).all(axis=1)
        & ((raw["flag"] == 0) | ~u).all(axis=1)
        & (np.isfinite(h).all(axis=-1) | ~u).all(axis=1)
    )
    hx = np.where(u, raw["bt"], 0.0)
    dxb = x - problem.xb[idx]
    binv_dx = problem.cov.inv_times(dxb, idx)
    cost = 0.5 * np.einsum("pn,pn->p", dxb, binv_dx) + _observation_cost(hx, problem.y[idx], screening.weight[idx])
    return _Trial(cols=cols, x=x, hx=hx, h=h, binv_dx=binv_dx, cost=np.where(valid, cost, np.nan), valid=valid)


def _move_to(state: _Iterates, screening, idx, trial: _Trial, accept):
    """Make the accepted trials the iterates of their columns."""
    acc = idx[accept]
    state.x[acc] = trial.x[accept]
    state.binv_dx[acc] = trial.binv_dx[accept]
    state.hx[acc] = trial.hx[accept]
    # Unused rows may hold non-finite values: select first (inf * 0 is NaN).
    state.h_tilde[acc] = (np.where(screening.used[acc, :, None], trial.h[accept], 0.0)
                          * screening.sqrt_w[acc, :, None])
    state.cost_now[acc] = trial.cost[accept]
    state.cols = _replace_columns(state.cols, acc, trial.cols.subset(np.flatnonzero(accept)))


def _iterate(problem, screening, state: _Iterates, idx, it, settings: _Settings):
    """One iteration of the columns ``idx``: try a step, accept or reject, test convergence."""
    trial = _try_step(problem, screening, state, idx)
    state.trial_cost[idx, it] = trial.cost
    state.n_iter[idx] = it
    if settings.damped:
        # Gain ratio: the decrease of J over the decrease the Gauss-Newton model predicts.
        # Where J curves more than the model (strongly nonlinear columns), dividing gamma
        # after every accepted step alternates overlong rejected steps with accepted ones.
        dx = trial.x - state.x[idx]
        hdx = np.einsum("pcn,pn->pc", state.h_tilde[idx], dx)
        quad = np.einsum("pn,pn->p", dx, problem.cov.inv_times(dx, idx)) + np.einsum("pc,pc->p", hdx, hdx)
        predicted = -np.einsum("pn,pn->p", state.grad[idx], dx) - 0.5 * quad
        with np.errstate(divide="ignore", invalid="ignore"):
            gain = (state.cost_now[idx] - trial.cost) / predicted
        accept = trial.valid & (trial.cost <= state.cost_now[idx])
    else:
        accept = trial.valid
        _stop(state, idx[~trial.valid], INVALID_TRIAL)
    _move_to(state, screening, idx, trial, accept)
    state.cost[idx, it] = state.cost_now[idx]
    acc = idx[accept]
    if settings.damped:
        good = accept & ~(gain < 0.75)
        poor = accept & (gain < 0.25)
        state.gamma[idx[good]] /= settings.lm_factor
        state.gamma[idx[~accept | poor]] *= settings.lm_factor
        state.n_rejected[idx[~accept]] += 1
        # A rejected step leaves the iterate (and its d^2) as it was: it has converged
        # when the cost no longer resolves the decrease still predicted there.
        rej = idx[~accept & trial.valid]
        _stop(state, rej[_unresolved(state.d2[rej], screening.n_used[rej], settings)], CONVERGED)
    if acc.size:
        _new_iterate(problem, screening, state, acc)
        _stop(state, acc[state.d2[acc] < settings.step_tol * problem.xb.shape[1]], CONVERGED)


def _unresolved(d2, n_used, settings: _Settings):
    """The decrease the quadratic model still predicts, d^2 / 2, is below the cost
    resolution cost_tol * max(m, 1) (m used observations)."""
    return 0.5 * d2 < settings.cost_tol * np.maximum(n_used, 1)


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
    hb, gmat = system[2], system[3]
    rows = np.flatnonzero(blocked.any(axis=1))
    if rows.size:
        hb, gmat = hb.copy(), gmat.copy()
        hb[rows] = cov.rows_times(h_tilde[rows], rows)
        gmat[rows] = hb[rows] @ _t(h_tilde[rows])
    # With L L^T = H~ B H~^T + I, M = L^-1 H~ B and N = L^-1 H~: G~ = M^T L^-1,
    # A = G~ H~ = M^T N and S = B - M^T M (C x C factors only; both products in one
    # matrix product M^T [M | N]).
    n = hb.shape[-1]
    l_inv = np.linalg.inv(np.linalg.cholesky(gmat + np.eye(gmat.shape[-1])))
    if not matrices:
        m, n_ = l_inv @ hb, l_inv @ h_tilde
        s_diag = cov.diagonal(len(hb)) - np.einsum("pcn,pcn->pn", m, m)
        return np.einsum("pcn,pcn->pn", m, n_), s_diag, None, None
    mn = l_inv @ np.concatenate([hb, h_tilde], axis=2)  # [N, C, 2n]
    m = mn[..., :n]
    both = _t(m) @ mn  # [N, n, 2n]: M^T M | M^T N
    s_hat, kernel = both[..., :n], both[..., n:]  # views: no copies of N n^2 arrays
    np.subtract(cov.b, s_hat, out=s_hat)
    return np.einsum("pii->pi", kernel), np.einsum("pii->pi", s_hat), kernel, s_hat


def _diagnostics(background, problem: _Problem, screening: _Screening, state: _Iterates,
                 settings: _Settings) -> xr.Dataset:
    layout, cov, channels = problem.layout, problem.cov, problem.channels
    y, hx, used, r = problem.y, state.hx, screening.used, problem.r
    h_xb, reason, departure_std = screening.h_xb, screening.reason, screening.departure_std
    cost, trial_cost, status = state.cost, state.trial_cost, state.status
    diagnostic_matrices = settings.diagnostic_matrices
    cost_background = 0.5 * np.einsum("pn,pn->p", state.x - problem.xb, state.binv_dx)
    cost_observation = _observation_cost(hx, y, screening.weight)
    diag_a, s_diag, kernel, s_hat = _analysis_matrices(cov, state.h_tilde, state.system, state.blocked,
                                                       diagnostic_matrices)
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
        "n_iterations": ("profile", state.n_iter, {"long_name": "operator calls after the first guess"}),
        "n_rejected_steps": ("profile", state.n_rejected, {"long_name": "Levenberg-Marquardt steps rejected"}),
        "final_lm_damping": ("profile", state.gamma, {"long_name": "Levenberg-Marquardt gamma at the end", "units": "1"}),
        "step_size_d2": ("profile", state.d2, {
            "long_name": "d^2 = g^T S g, the undamped Gauss-Newton step size at the analysis "
                         "(NaN: no observations)", "units": "1"}),
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
        "background_error_std": (("profile", ROW), np.sqrt(cov.diagonal(len(y))),
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
    ds.attrs.update({f"setting_{k}": v for k, v in settings.attrs(problem.tolerated_bits).items()})
    ds.attrs["cost_convention"] = COST_CONVENTION
    return ds
