"""Learned effective gray absorbers: a few gray Schwarzschild models per channel.

Each emulated channel carries K gray absorbers whose coefficients are fitted to the
training file's brightness temperatures (:func:`rtemu.training.fit_gray_absorbers`);
nothing of the model that made the file enters them. Absorber a of a channel has, per
layer j (between levels j and j + 1, levels surface-first), the optical depth::

    tau_aj = sec(theta) (dp_j / p_0) sum_g k_ag (pbar_j / p_0)^alpha_ag (Tbar_j / T_0)^beta_ag qbar_j^m_g

over three terms g (dry, m = 0; water vapour, m = 1; self-continuum, m = 2), with layer
means pbar, Tbar, qbar (q floored at ``HUMIDITY_FLOOR``) and thickness dp [hPa]. With
t_i = exp(-sum_{j >= i} tau_j) (level i to space) and u_i = t_0^2 / t_i (surface to space
via level i, the reflected path), the channel's radiance is the weighted sum of the
absorbers' gray radiances (Schwarzschild equation, layer-mean Planck radiance B_j,
specular surface, the same slant path up and down)::

    R_a = e B(Ts) t_0 + sum_j B_j (t_j+1 - t_j) + (1 - e) sum_j B_j (u_j - u_j+1)
    R   = sum_a w_a R_a  (w_a > 0, sum 1),  BT_gray = B^-1(R)

and each absorber also yields three temperature-valued features for the channel's
network: the transmittance-weighted temperature f_a = sum_j Tbar_j (t_j+1 - t_j) + Ts t_0,
the column transmittance g_a = t_0 and the reflected sky r_a = sum_j Tbar_j (u_j - u_j+1).

The reverse-mode derivative of any combination J = lR R_a + lf f_a + lg g_a + lr r_a with
respect to the optical depths is (c_i = sum_{j >= i} tau_j, X_j = lR B_j + lf Tbar_j,
Y_j = lR (1 - e) B_j + lr Tbar_j, S = lR e B(Ts) + lf Ts + lg, V = sum_j Y_j (u_j - u_j+1))::

    dJ/dtau_j = sum_{i <= j} (t_i X_i + u_i Y_i) - sum_{i < j} (t_i+1 X_i + u_i+1 Y_i) - 2 V - S t_0

(derived from dt_i/dc_i = -t_i, du_i/dc_i = u_i for i > 0, du_i/dc_0 = -2 u_i + u_0 [i = 0]).
The bundle graph evaluates exactly these equations (:mod:`rtemu._graph`).

References
----------
Liou, K. N. (2002). An Introduction to Atmospheric Radiation, 2nd ed., Academic Press,
sec. 4.2 (Schwarzschild equation for a plane-parallel, non-scattering atmosphere).
"""

from __future__ import annotations

import numpy as np

from rtemu.planck import planck

__all__ = ["REFERENCE_PRESSURE_HPA", "REFERENCE_TEMPERATURE_K", "HUMIDITY_FLOOR", "GAS_POWERS",
           "layer_means", "surface_weights", "collapse_to_surface", "gray_forward", "gray_tau_adjoint", "inverse_planck"]

#: p_0 of the layer thickness and pressure scaling [hPa].
REFERENCE_PRESSURE_HPA = 1013.25
#: T_0 of the temperature scaling [K].
REFERENCE_TEMPERATURE_K = 260.0
#: Floor of the layer-mean specific humidity inside the logarithm [kg kg-1].
HUMIDITY_FLOOR = 1e-9
#: Powers m_g of qbar in the three terms (dry, water vapour, self-continuum) [1].
GAS_POWERS = np.array([0.0, 1.0, 2.0])


def layer_means(values):
    """Layer means (x_j + x_j+1) / 2 of level values [any unit], (..., L) -> (..., L - 1)."""
    values = np.asarray(values, dtype=float)
    return 0.5 * (values[..., :-1] + values[..., 1:])


def surface_weights(pressure_hpa, surface_air_pressure):
    """Weights of the levels in the value at the surface pressure, and the collapse mask.

    Linear interpolation in ln p between the two levels around ps (hat functions; a
    surface pressure outside the grid is clamped to its end levels).

    Parameters
    ----------
    pressure_hpa : array_like
        Level grid [hPa], (L,), surface-first.
    surface_air_pressure : array_like
        ps [hPa], (N,).

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        Weights w [1] (N, L) (sum 1) and the mask m = (p >= ps) [1] (N, L) of the levels at
        and below the surface.
    """
    x = np.log(np.asarray(pressure_hpa, dtype=float))
    xs = np.log(np.asarray(surface_air_pressure, dtype=float))[:, None]
    up, down = hat_slopes(x)
    rise = (xs - up[0]) / up[1]
    fall = (down[0] - xs) / down[1]
    w = np.clip(np.minimum(rise, fall), 0.0, 1.0)
    mask = (np.asarray(pressure_hpa, dtype=float)[None, :] >= np.exp(xs)).astype(float)
    return w, mask


def hat_slopes(log_pressure):
    """((x_up, dx_up), (x_down, dx_down)) [1], (L,) each, of the interpolation hats in ln p:
    level i's weight is min((x - x_up) / dx_up, (x_down - x) / dx_down) clipped to [0, 1]
    (the end levels get a far-away neighbour so that their weight stays 1 beyond the grid)."""
    x = np.asarray(log_pressure, dtype=float)
    far = 1e3
    x_up = np.append(x[1:], x[-1] - far)  # the next level up (lower pressure)
    x_down = np.insert(x[:-1], 0, x[0] + far)  # the next level down
    return (x_up, x - x_up), (x_down, x_down - x)


def collapse_to_surface(air_temperature, specific_humidity, pressure_hpa, surface_air_pressure):
    """Terrain: levels at and below ps move to ps, with T and q interpolated there in ln p.

    Returns T [K], q [kg kg-1] and p [hPa], each (N, L); with ps at the grid's bottom the
    profile is unchanged (the layers below the surface then have zero thickness).
    """
    T = np.asarray(air_temperature, dtype=float)
    q = np.asarray(specific_humidity, dtype=float)
    ps = np.asarray(surface_air_pressure, dtype=float)
    w, m = surface_weights(pressure_hpa, ps)
    t_s = (w * T).sum(axis=1, keepdims=True)
    q_s = (w * q).sum(axis=1, keepdims=True)
    p = np.minimum(np.asarray(pressure_hpa, dtype=float)[None, :], ps[:, None])
    return T + m * (t_s - T), q + m * (q_s - q), p


def inverse_planck(a, b, radiance):
    """Brightness temperature [K] of ``radiance`` [a's units]: T = b / ln(1 + a / R)."""
    return b / np.log1p(a / radiance)


def gray_forward(params: dict, a: float, b: float, air_temperature, specific_humidity, surface_temperature,
                 surface_emissivity, sec_zenith, pressure_hpa) -> dict:
    """One channel's gray absorbers for N profiles.

    Parameters
    ----------
    params : dict
        ``log_k`` [K, 3] (ln k [1]), ``pressure_exponent`` [K, 3] [1],
        ``temperature_exponent`` [K, 3] [1], ``weights`` [K] (positive, sum 1) [1].
    a, b : float
        The channel's Planck constants (:func:`rtemu.planck.planck_coefficients`) [radiance
        units], [K].
    air_temperature, specific_humidity : array_like
        [K], [kg kg-1], (N, L), levels surface-first.
    surface_temperature, surface_emissivity, sec_zenith : array_like
        [K], [1], [1], (N,).
    pressure_hpa : array_like
        Level pressures [hPa], (L,) or (N, L) (terrain: levels at and below the surface
        moved to the surface pressure).

    Returns
    -------
    dict
        ``brightness_temperature`` [K] (N,), ``radiance`` (N,) and ``absorber_radiance``
        (N, K) [a's units], ``features`` [K] / [1] (N, 3K): f_1..K, g_1..K, r_1..K, and the
        intermediates :func:`gray_tau_adjoint` needs.
    """
    T = np.asarray(air_temperature, dtype=float)
    q = np.asarray(specific_humidity, dtype=float)
    ts = np.asarray(surface_temperature, dtype=float)
    e = np.asarray(surface_emissivity, dtype=float)
    sec = np.asarray(sec_zenith, dtype=float)
    p = np.broadcast_to(np.asarray(pressure_hpa, dtype=float), T.shape)
    tm, qm, pm = layer_means(T), layer_means(q), layer_means(p)
    dp = p[:, :-1] - p[:, 1:]
    phi = np.stack([np.log(pm / REFERENCE_PRESSURE_HPA), np.log(tm / REFERENCE_TEMPERATURE_K),
                    np.log(np.maximum(qm, HUMIDITY_FLOOR))], axis=-1)  # [N, Lm, 3]
    exponent = (params["log_k"] + params["pressure_exponent"] * phi[:, :, None, 0:1]
                + params["temperature_exponent"] * phi[:, :, None, 1:2] + GAS_POWERS * phi[:, :, None, 2:3])
    scale = sec[:, None] * dp / REFERENCE_PRESSURE_HPA  # [N, Lm]
    tau_g = np.exp(exponent) * scale[:, :, None, None]  # [N, Lm, K, 3]
    tau = tau_g.sum(axis=-1)
    c_in = np.cumsum(tau[:, ::-1], axis=1)[:, ::-1]  # optical depth from the layer's bottom to space
    c_ex = c_in - tau  # from its top
    c0 = c_in[:, :1]
    t_lo, t_hi = np.exp(-c_in), np.exp(-c_ex)
    u_lo, u_hi = np.exp(c_in - 2.0 * c0), np.exp(c_ex - 2.0 * c0)
    dt, du = t_hi - t_lo, u_lo - u_hi
    t0 = t_lo[:, 0]  # [N, K]
    B = planck(a, b, tm)[:, :, None]
    Bs = planck(a, b, ts)[:, None]
    UB, VB = (B * dt).sum(1), (B * du).sum(1)
    UT, VT = (tm[:, :, None] * dt).sum(1), (tm[:, :, None] * du).sum(1)
    Ra = e[:, None] * Bs * t0 + UB + (1.0 - e[:, None]) * VB
    w = np.asarray(params["weights"], dtype=float)
    R = Ra @ w
    feats = np.concatenate([UT + ts[:, None] * t0, t0, VT], axis=1)
    return {"brightness_temperature": inverse_planck(a, b, R), "radiance": R, "absorber_radiance": Ra,
            "features": feats, "weights": w, "tau_g": tau_g, "phi": phi, "t_lo": t_lo, "t_hi": t_hi,
            "u_lo": u_lo, "u_hi": u_hi, "planck_layers": B, "planck_surface": Bs, "tm": tm,
            "surface_emissivity": e, "surface_temperature": ts, "VB": VB, "VT": VT, "t0": t0}


def gray_tau_adjoint(state: dict, lam_r, lam_f=0.0, lam_g=0.0, lam_refl=0.0) -> np.ndarray:
    """dJ/dtau_aj [N, Lm, K] of J = lR R_a + lf f_a + lg g_a + lr r_a (module docstring).

    ``lam_*``: adjoints [N, K] (or scalars) of each absorber's radiance [a's units]^-1 and
    features [K^-1 or 1].
    """
    e = state["surface_emissivity"][:, None]
    lr, lf, lg, lrr = (np.broadcast_to(np.asarray(v, dtype=float), state["t0"].shape)
                       for v in (lam_r, lam_f, lam_g, lam_refl))
    B, tm = state["planck_layers"], state["tm"][:, :, None]
    X = lr[:, None] * B + lf[:, None] * tm
    Y = lr[:, None] * (1.0 - e[:, None]) * B + lrr[:, None] * tm
    V = lr * (1.0 - e) * state["VB"] + lrr * state["VT"]
    S = lr * e * state["planck_surface"] + lf * state["surface_temperature"][:, None] + lg
    inc = np.cumsum(state["t_lo"] * X + state["u_lo"] * Y, axis=1)
    step = state["t_hi"] * X + state["u_hi"] * Y
    exc = np.cumsum(step, axis=1) - step
    return inc - exc + (-2.0 * V - S * state["t0"])[:, None, :]
