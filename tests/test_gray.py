"""The learned gray absorbers (rtemu.gray) and their fit: analytic limits and derivatives."""

from __future__ import annotations

import numpy as np
import pytest

from rtemu.gray import collapse_to_surface, gray_forward, gray_tau_adjoint, inverse_planck, surface_weights
from rtemu.planck import planck, planck_coefficients
from rtemu.training import GrayAbsorbers, fit_gray_absorbers


def _profiles(n=40, seed=0):
    rng = np.random.default_rng(seed)
    p = np.geomspace(1013.25, 0.5, 30)
    T = 288.0 - 40.0 * np.log(1013.25 / p) / np.log(1013.25 / 0.5) + rng.normal(0, 3, (n, 30))
    q = 0.012 * (p / 1013.25) ** 3 * rng.uniform(0.3, 1.2, (n, 1))
    return p, T, q, rng.uniform(270, 310, n), rng.uniform(0.6, 1.0, n), 1 / np.cos(np.radians(rng.uniform(0, 60, n)))


def _params(K=2, scale=0.0):
    return {"log_k": np.array([[0.0 + scale, 4.0, 9.0], [-2.0, 6.0, 8.0]])[:K],
            "pressure_exponent": np.full((K, 3), 1.0), "temperature_exponent": np.full((K, 3), -0.5),
            "weights": np.full(K, 1.0 / K)}


def test_transparent_atmosphere_sees_the_surface():
    # no absorption: R = e B(Ts), and BT = Ts for a black surface (Planck 1901)
    p, T, q, ts, e, sec = _profiles()
    _, b = planck_coefficients(frequency_ghz=50.0)
    out = gray_forward(_params(scale=-80.0) | {"log_k": np.full((2, 3), -80.0)}, 1.0, b, T, q, ts, e, sec, p)
    np.testing.assert_allclose(out["radiance"], e * planck(1.0, b, ts), rtol=1e-12)
    black = gray_forward({**_params(), "log_k": np.full((2, 3), -80.0)}, 1.0, b, T, q, ts, np.ones_like(e), sec, p)
    np.testing.assert_allclose(black["brightness_temperature"], ts, rtol=1e-12)


def test_opaque_isothermal_atmosphere_is_a_black_body():
    # Kirchhoff: an opaque isothermal layer radiates B(T) whatever the surface (textbook limit)
    p, T, q, ts, e, sec = _profiles()
    _, b = planck_coefficients(wavenumber_cm1=700.0)
    T[:] = 250.0
    out = gray_forward({**_params(), "log_k": np.full((2, 3), 12.0)}, 1.0, b, T, q, ts, e, sec, p)
    np.testing.assert_allclose(out["brightness_temperature"], 250.0, rtol=1e-9)


def test_inverse_planck_inverts_planck():
    _, b = planck_coefficients(wavenumber_cm1=1500.0)
    T = np.linspace(150, 330, 7)
    np.testing.assert_allclose(inverse_planck(1.0, b, planck(1.0, b, T)), T, rtol=1e-12)


def test_tau_adjoint_matches_finite_differences():
    p, T, q, ts, e, sec = _profiles(n=5)
    _, b = planck_coefficients(frequency_ghz=183.0)
    P = _params()
    rng = np.random.default_rng(1)
    lam = rng.standard_normal((4, 5, 2))

    def J(P):
        s = gray_forward(P, 1.0, b, T, q, ts, e, sec, p)
        f = s["features"]
        return float((lam[0] * s["absorber_radiance"]).sum() + (lam[1] * f[:, :2]).sum()
                     + (lam[2] * f[:, 2:4]).sum() + (lam[3] * f[:, 4:]).sum())

    st = gray_forward(P, 1.0, b, T, q, ts, e, sec, p)
    H = gray_tau_adjoint(st, *lam)
    for k in range(2):
        for g in range(3):
            up, dn = ({kk: v.copy() for kk, v in P.items()} for _ in range(2))
            up["log_k"][k, g] += 1e-6
            dn["log_k"][k, g] -= 1e-6
            fd = (J(up) - J(dn)) / 2e-6
            assert (H[:, :, k] * st["tau_g"][:, :, k, g]).sum() == pytest.approx(fd, rel=1e-6, abs=1e-9)


def test_collapse_interpolates_linearly_in_log_pressure():
    p, T, q, *_ = _profiles(n=3)
    ps = np.array([p[0], 850.0, 612.3])
    Tc, qc, pc = collapse_to_surface(T, q, p, ps)
    for i in range(3):
        # numpy.interp on ln p (increasing order) as the independent reference
        expect = np.interp(np.log(ps[i]), np.log(p[::-1]), T[i, ::-1])
        below = p >= ps[i]
        np.testing.assert_allclose(Tc[i, below], expect, rtol=1e-12)
        np.testing.assert_array_equal(Tc[i, ~below], T[i, ~below])
        np.testing.assert_allclose(pc[i], np.minimum(p, ps[i]))
    np.testing.assert_array_equal(Tc[0], T[0])  # ps at the grid's bottom: no change
    w, _ = surface_weights(p, ps)
    np.testing.assert_allclose(w.sum(axis=1), 1.0)


def test_fit_recovers_a_gray_teacher():
    # brightness temperatures made by known absorbers are matched to well under 0.01 K
    p, T, q, ts, e, sec = _profiles(n=400, seed=3)
    _, b = planck_coefficients(frequency_ghz=183.0)
    truth = GrayAbsorbers(planck_b=float(b), log_k=np.array([[-3.0, 5.0, -40.0]]),
                          pressure_exponent=np.array([[1.0, 0.8, 1.0]]), temperature_exponent=np.array([[0.0, -1.0, 0.0]]),
                          weights=np.ones(1))
    P = np.broadcast_to(p, T.shape)
    y = truth.forward(T, q, ts, e, sec, P)["brightness_temperature"]
    fit_in, val_in = (T[:300], q[:300], ts[:300], e[:300], sec[:300], P[:300]), \
        (T[300:], q[300:], ts[300:], e[300:], sec[300:], P[300:])
    got, stats = fit_gray_absorbers(float(b), fit_in, y[:300], val_in, y[300:], max_absorbers=2, target_rmse_k=0.01,
                                    starts=4, start_evaluations=30, evaluations=200, seed=0)
    assert stats["gray_validation_rmse_k"][-1] < 0.01
