"""Jacobian-matched refinement of a channel's network (training with derivative targets).

Stage "training". scikit-learn's ``MLPRegressor`` fits brightness temperatures only; the
Jacobians an assimilation system uses are then whatever slopes the fit happens to have.
Where the physical sensitivity is small (window channels, very dry columns) those slopes
are mostly fitting noise. This module continues the fit of a trained network from its
scikit-learn weights with a loss that also asks for the physical Jacobians, and writes
the weights back, so the export and the graph are unchanged.

Loss of one channel (parameters theta: the network's weights and biases)::

    L(theta) = 1/(2N) sum_i (y_i - t_i)^2                       (brightness temperatures)
             + w/(2M) sum_j sum_p (scale * ydot_jp - r_jp)^2     (Jacobians, probed)
             + alpha/(2N) sum ||W||^2                             (the MLP's L2 penalty)

* y_i = mlp(u_i): the network's output for input u_i (standardised units), t_i the
  standardised target; N training profiles.
* Jacobian term over M profiles with physical Jacobians. The network's Jacobian with
  respect to the physical state (air temperature [K] and ln q [1] on the levels) is
  g_j^T G_j, with g_j = d mlp / d u at u_j and G_j = d u / d state. Each block of the
  physical Jacobian is divided by its norm (plus a small floor), so the term is the
  squared *relative* error that the accuracy benchmark reports, and dry or insensitive
  profiles count as much as the rest. The squared Frobenius norm over the 2L state
  directions is estimated with P fixed random probe vectors per profile
  (for an error matrix D, the sum over P probes v ~ N(0, I / P) of ||D v||^2 has mean
  ||D||_F^2): the directions
  u_dot_jp = G_j v_jp and the targets r_jp are computed once, before the fit, so one loss
  evaluation costs about P forward-and-back passes per Jacobian profile.
* ydot_jp = g_j . u_dot_jp is evaluated by forward tangent propagation through the
  layers (adot = (1 - a^2) * (adot_prev W)), and its gradient with respect to theta by
  reverse mode through that tangent pass (including the dependence of 1 - a^2 on theta).

The optimiser is scipy's L-BFGS-B on the flattened parameters, starting from the
scikit-learn solution.
"""

from __future__ import annotations

import numpy as np

__all__ = ["pack", "unpack", "network_tangent", "refinement_loss", "refine_network", "state_jacobian",
           "probe_directions", "probe_relative_error"]


def pack(coefs, intercepts) -> np.ndarray:
    """Flatten weights [n_in, n_out] and biases [n_out] (scikit-learn order) into one vector."""
    return np.concatenate([np.ravel(a) for pair in zip(coefs, intercepts) for a in pair])


def unpack(theta: np.ndarray, shapes) -> tuple[list, list]:
    """Inverse of :func:`pack` for layer shapes [(n_in, n_out), ...]."""
    coefs, intercepts, at = [], [], 0
    for n_in, n_out in shapes:
        coefs.append(theta[at:at + n_in * n_out].reshape(n_in, n_out))
        at += n_in * n_out
        intercepts.append(theta[at:at + n_out])
        at += n_out
    return coefs, intercepts


def network_tangent(coefs, intercepts, u: np.ndarray, u_dot: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Output y [N] and directional derivatives ydot [N, P] of a tanh MLP.

    Parameters
    ----------
    coefs, intercepts : lists of arrays
        Layer weights [n_in, n_out] and biases [n_out] (tanh hidden layers, identity output).
    u : numpy.ndarray
        Inputs [N, n_in] (standardised units).
    u_dot : numpy.ndarray
        Directions [N, P, n_in] in input space.
    """
    a, a_dot = u, u_dot
    for k, (w, b) in enumerate(zip(coefs, intercepts)):
        h, h_dot = a @ w + b, a_dot @ w
        if k == len(coefs) - 1:
            return h[:, 0], h_dot[..., 0]
        a = np.tanh(h)
        a_dot = (1.0 - a * a)[:, None, :] * h_dot
    raise ValueError("network_tangent: no layers")


def refinement_loss(theta: np.ndarray, shapes, u: np.ndarray, t: np.ndarray, jac_rows: np.ndarray,
                    u_dot: np.ndarray, r: np.ndarray, *, weight: float, alpha: float, scale: float = 1.0):
    """Loss L(theta) of the module docstring and its gradient.

    Parameters
    ----------
    theta : numpy.ndarray
        Flattened parameters (:func:`pack`).
    shapes : sequence of (int, int)
        Layer shapes.
    u : numpy.ndarray
        Network inputs [N, n_in]; t [N] the standardised targets. The forward and backward
        passes run in u's dtype (float32 in training), losses and gradients are summed in
        float64.
    jac_rows : numpy.ndarray
        Distinct indices (into u) of the M profiles with Jacobian targets.
    u_dot : numpy.ndarray
        Probe directions in input space [M, P, n_in]; the tangent pass runs in its dtype
        (training uses float32: half the time, same fit).
    r : numpy.ndarray
        Target directional derivatives [M, P] (relative units: physical Jacobian minus the
        linear part's, over the physical norm, along the probes).
    weight : float
        w >= 0, the Jacobian term's weight [1].
    alpha : float
        L2 penalty on the weights (scikit-learn's ``alpha``) [1].
    scale : float
        Factor from the network's output to the units of r (the target standardisation
        divided by the physical norm is already in u_dot / r; here usually 1).

    Returns
    -------
    (float, numpy.ndarray)
        Loss [1] and gradient [len(theta)].
    """
    coefs, intercepts = unpack(theta, shapes)
    n, m = u.shape[0], jac_rows.size
    depth = len(coefs)
    # ---- primal forward on all profiles, in u's precision (sums in float64)
    pt = u.dtype
    pw = [w.astype(pt, copy=False) for w in coefs]
    pb = [b.astype(pt, copy=False) for b in intercepts]
    acts = [u]
    for k in range(depth - 1):
        acts.append(np.tanh(acts[-1] @ pw[k] + pb[k]))
    y = (acts[-1] @ pw[-1] + pb[-1])[:, 0]
    res = y.astype(float) - t
    loss = 0.5 * float(res @ res) / n + 0.5 * alpha * sum(float(np.sum(w * w)) for w in coefs) / n
    g_act = [None] * depth  # gradient with respect to each hidden activation (primal path)
    g_coefs = [None] * depth
    g_ints = [None] * depth
    gy = (res / n).astype(pt)
    g_coefs[-1] = (acts[-1].T @ gy[:, None]).astype(float)
    g_ints[-1] = np.array([gy.sum(dtype=float)])
    g_a = gy[:, None] * pw[-1][:, 0][None, :]
    # ---- tangent forward on the Jacobian profiles
    if weight > 0 and m:
        # in u_dot's precision (float32 halves the cost of this, the expensive part; the
        # sums below are accumulated in float64)
        ft = u_dot.dtype
        cw = [w.astype(ft, copy=False) for w in coefs]
        sub = [a[jac_rows].astype(ft, copy=False) for a in acts]
        dots = [u_dot]  # adot_k [M, P, n_k]
        hdots = [None]
        for k in range(depth - 1):
            hd = dots[-1] @ cw[k]
            d = 1.0 - sub[k + 1] ** 2
            hdots.append(hd)
            dots.append(d[:, None, :] * hd)
        ydot = dots[-1] @ cw[-1][:, 0]  # [M, P]
        e = scale * ydot.astype(float) - r
        loss += 0.5 * weight * float(np.sum(e * e)) / m
        g_ydot = ((weight / m) * scale * e).astype(ft)  # [M, P]
        g_coefs[-1] = g_coefs[-1] + (_flat(dots[-1]).T @ g_ydot.reshape(-1, 1)).astype(float)
        g_dot = g_ydot[..., None] * cw[-1][:, 0][None, None, :]  # d/d adot_{depth-1}
        g_sub = [np.zeros_like(s) for s in sub]  # extra gradient on the primal activations
        for k in range(depth - 1, 0, -1):
            d = 1.0 - sub[k] ** 2
            g_hd = g_dot * d[:, None, :]
            g_d = np.einsum("mpk,mpk->mk", g_dot, hdots[k])
            g_sub[k] += -2.0 * sub[k] * g_d
            g_w = (_flat(dots[k - 1]).T @ _flat(g_hd)).astype(float)  # one BLAS product over all (m, p)
            g_coefs[k - 1] = g_w if g_coefs[k - 1] is None else g_coefs[k - 1] + g_w
            g_dot = g_hd @ cw[k - 1].T
        for k in range(1, depth):
            extra = np.zeros_like(acts[k])
            extra[jac_rows] = g_sub[k]  # jac_rows are distinct
            g_act[k] = extra
    # ---- primal backward (with the tangent path's dependence on the activations)
    for k in range(depth - 1, 0, -1):
        if g_act[k] is not None:
            g_a = g_a + g_act[k]
        g_h = g_a * (1.0 - acts[k] ** 2)
        g_w = (acts[k - 1].T @ g_h).astype(float)
        g_coefs[k - 1] = g_w if g_coefs[k - 1] is None else g_coefs[k - 1] + g_w
        g_ints[k - 1] = g_h.sum(axis=0, dtype=float)
        g_a = g_h @ pw[k - 1].T
    for k in range(depth):
        g_coefs[k] = g_coefs[k] + alpha * coefs[k] / n
    return loss, pack(g_coefs, g_ints)


def refine_network(coefs, intercepts, u, t, jac_rows, u_dot, r, *, weight, alpha, max_iter, scale=1.0,
                   check_every=None, score=None):
    """Continue a network's fit with the Jacobian-matched loss (scipy L-BFGS-B).

    Parameters
    ----------
    coefs, intercepts : lists of arrays
        Starting weights (e.g. a fitted ``MLPRegressor``'s ``coefs_``/``intercepts_``).
    u, t, jac_rows, u_dot, r, weight, alpha, scale
        See :func:`refinement_loss`.
    max_iter : int
        Total L-BFGS iterations.
    check_every : int, optional
        Run ``score`` every so many iterations (the optimiser restarts its curvature
        memory there) and return the best-scoring weights; default: once at the end.
    score : callable, optional
        ``score(coefs, intercepts) -> float`` (lower is better), e.g. a validation loss.
        Without it the final weights are returned.

    Returns
    -------
    (coefs, intercepts, info)
        Weights (copies) and a dict with ``iterations``, ``best_iteration``,
        ``start_score`` and ``best_score`` (None without ``score``).
    """
    from scipy.optimize import minimize

    shapes = [w.shape for w in coefs]
    theta = pack(coefs, intercepts).astype(float)
    start = best = score(*unpack(theta, shapes)) if score is not None else None
    best_theta, best_it, done = theta.copy(), 0, 0
    chunk = check_every or max_iter
    while done < max_iter:
        asked = min(chunk, max_iter - done)
        result = minimize(lambda th: refinement_loss(th, shapes, u, t, jac_rows, u_dot, r, weight=weight,
                                                     alpha=alpha, scale=scale),
                          theta, jac=True, method="L-BFGS-B",
                          options={"maxiter": asked, "maxcor": 20, "ftol": 0.0,
                                   "gtol": 0.0})
        theta = result.x
        done += max(int(result.nit), 1)
        if score is None:
            best_theta, best_it = theta.copy(), done
        else:
            s = score(*unpack(theta, shapes))
            if s < best:
                best, best_theta, best_it = s, theta.copy(), done
        if result.nit < asked:
            break  # converged or the line search stalled
    c, b = unpack(best_theta, shapes)
    return ([w.copy() for w in c], [v.copy() for v in b],
            {"iterations": done, "best_iteration": best_it, "start_score": start, "best_score": best})


def state_jacobian(project, config, air_temperature, specific_humidity, surface_temperature,
                   sensor_zenith_angle, pressure_hpa, *, temperature_step: float = 1e-2,
                   log_humidity_step: float = 1e-3, chunk: int = 500) -> np.ndarray:
    """dz/d(state) of the shared compressed coordinates, by central differences.

    Parameters
    ----------
    project : callable
        x [N, F] -> z [N, K], affine (``FeatureTransform.project``).
    config : rtemu.features.FeatureConfig
    air_temperature, specific_humidity : array_like
        T [K], q [kg kg-1], shape (M, L), levels in the bundle's order.
    surface_temperature, sensor_zenith_angle : array_like
        [K], [degree], shape (M,).
    pressure_hpa : array_like
        [hPa], shape (L,).
    temperature_step, log_humidity_step : float
        Half-steps in T [K] and ln q [1]. The features are smooth (logs, exponentials,
        sums) so the O(h^2) truncation error is ~1e-6 relative or less; this matrix only
        shapes the training loss, never the exported Jacobians (those are exact, in the graph).
    chunk : int
        Profiles per batch (memory ~ chunk * F * 8 bytes per perturbation).

    Returns
    -------
    numpy.ndarray
        G [M, 2L, K]: rows 0..L-1 dz/dT_l [K-1], rows L..2L-1 dz/d ln q_l [1].
    """
    from rtemu.features import raw_features

    T = np.asarray(air_temperature, dtype=float)
    q = np.asarray(specific_humidity, dtype=float)
    ts = np.asarray(surface_temperature, dtype=float)
    zen = np.asarray(sensor_zenith_angle, dtype=float)
    m, n_levels = T.shape
    out = None
    for start in range(0, m, chunk):
        sl = slice(start, min(start + chunk, m))
        Tc, qc, tsc, zc = T[sl], q[sl], ts[sl], zen[sl]
        for j in range(2 * n_levels):
            level = j % n_levels
            pair = []
            for sign in (1.0, -1.0):
                Tp, qp = Tc, qc
                if j < n_levels:
                    Tp = Tc.copy()
                    Tp[:, level] += sign * temperature_step
                else:
                    qp = qc.copy()
                    qp[:, level] *= np.exp(sign * log_humidity_step)
                pair.append(project(raw_features(Tp, qp, tsc, zc, config, pressure_hpa)))
            step = temperature_step if j < n_levels else log_humidity_step
            d = (pair[0] - pair[1]) / (2.0 * step)
            if out is None:
                out = np.empty((m, 2 * n_levels, d.shape[1]))
            out[sl, j] = d
    return out


def probe_directions(state_jac: np.ndarray, jac_temperature: np.ndarray, jac_log_humidity: np.ndarray,
                     probes: np.ndarray, floor: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Probe directions and physical targets of one channel, relative to the physical norms.

    Parameters
    ----------
    state_jac : numpy.ndarray
        G [M, 2L, K] from :func:`state_jacobian`.
    jac_temperature : numpy.ndarray
        Physical dBT/dT [M, L] [K K-1].
    jac_log_humidity : numpy.ndarray
        Physical dBT/d ln q = q dBT/dq [M, L] [K].
    probes : numpy.ndarray
        V [M, 2L, P], entries ~ N(0, 1/P) (fixed for the fit).
    floor : float
        Added in quadrature to each block's norm [K K-1 or K], so that a profile with
        (almost) no physical sensitivity does not blow up the relative error.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray, numpy.ndarray)
        dz along the scaled probes [M, P, K]; physical directional derivatives along them
        [M, P] [1]; the per-row scale 1/norm [M, 2L].
    """
    n_levels = jac_temperature.shape[1]
    norm_t = np.sqrt(np.sum(np.asarray(jac_temperature, float) ** 2, axis=1) + floor**2)
    norm_q = np.sqrt(np.sum(np.asarray(jac_log_humidity, float) ** 2, axis=1) + floor**2)
    inv = np.concatenate([np.repeat((1.0 / norm_t)[:, None], n_levels, axis=1),
                          np.repeat((1.0 / norm_q)[:, None], n_levels, axis=1)], axis=1)  # [M, 2L]
    scaled = probes * inv[:, :, None]  # [M, 2L, P]
    directions = np.einsum("mik,mip->mpk", state_jac, scaled, optimize=True)
    phys = np.concatenate([jac_temperature, jac_log_humidity], axis=1)
    target = np.einsum("mi,mip->mp", phys, scaled)
    return directions, target, inv


def probe_relative_error(coefs, intercepts, u: np.ndarray, u_dot: np.ndarray, r: np.ndarray,
                         scale: float = 1.0) -> np.ndarray:
    """Per-profile probe estimate of sqrt(e_T^2 + e_q^2), the relative Jacobian errors [1].

    ``u`` [M, n_in] the Jacobian profiles' inputs, ``u_dot`` [M, P, n_in] and ``r`` [M, P]
    as in :func:`refinement_loss`. With r the physical target *minus* any other part of
    the model, this is the whole model's error.
    """
    _, ydot = network_tangent(coefs, intercepts, u, u_dot)
    return np.sqrt(np.sum((scale * ydot - r) ** 2, axis=1))


def _flat(a: np.ndarray) -> np.ndarray:
    """[M, P, n] -> [M P, n] (a view)."""
    return a.reshape(-1, a.shape[-1])
