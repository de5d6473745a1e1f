"""The physical reference model (rtemu.physics): textbook limits, derivatives, invariances.

External references:
* Planck function written out from scipy.constants (CODATA 2018), independent of rtemu.planck.
* Petty, G. W. (2006), A First Course in Atmospheric Radiation, 2nd ed., Sundog, ch. 8:
  isothermal atmosphere, non-absorbing atmosphere, single isothermal gray layer, and the
  weighting function of an absorber with optical depth linear in pressure
  (W = tau exp(-tau), largest at slant optical depth 1).
* Finite differences, Taylor-remainder and dot-product tests: standard verification of
  tangent-linear/adjoint codes (e.g. Navon, Zou, Derber & Sela 1992, Mon. Wea. Rev. 120,
  1433, from memory).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.constants as sc
import xarray as xr
from hypothesis import given, settings
from hypothesis import strategies as st

from rtemu import physics
from rtemu.instrument import AbsorberLaw, Band, Channel, Instrument

JACOBIANS = physics.JACOBIAN_NAMES


# -- independent helpers -----------------------------------------------------------------------
def ref_planck_constants(channel):
    """(a, b) of B = a / (exp(b/T) - 1) from scipy.constants (CODATA 2018)."""
    if channel.is_microwave:
        nu = channel.frequency_ghz * 1e9
        return 2 * sc.h * nu**3 / sc.c**2, sc.h * nu / sc.k
    k = channel.wavenumber_cm1 * 100.0
    return 100.0 * 2 * sc.h * sc.c**2 * k**3, sc.h * sc.c * k / sc.k


def ref_planck(channel, t):
    a, b = ref_planck_constants(channel)
    with np.errstate(over="ignore"):  # exp(b/T) overflows for the IR cosmic term: B = 0
        return a / np.expm1(b / np.asarray(t, dtype=float))


def ref_brightness_temperature(channel, radiance):
    a, b = ref_planck_constants(channel)
    return b / np.log1p(a / radiance)


def gray_instrument(k_dry=0.0, k_h2o=0.0, k_cont=0.0, n_dry=0.0, m_dry=0.0, n_h2o=0.0, m_h2o=0.0,
                    m_cont=0.0):
    """An invented two-channel (one MW, one IR) instrument with one gray band each."""
    band = Band(weight=1.0, dry=k_dry, h2o=k_h2o, continuum=k_cont)
    return Instrument(
        name="gray-test",
        description="INVENTED single-band instrument for analytic tests",
        channels=(
            Channel(id="mw", frequency_ghz=50.0, wavenumber_cm1=None, noise_k=0.1, bands=(band,)),
            Channel(id="ir", frequency_ghz=None, wavenumber_cm1=900.0, noise_k=0.1, bands=(band,)),
        ),
        dry=AbsorberLaw(n_dry, m_dry),
        h2o=AbsorberLaw(n_h2o, m_h2o),
        continuum=AbsorberLaw(0.0, m_cont),
    )


def make_dataset(p, t, q, ts, em, zen):
    """Dataset from arrays: p [L] or [N, L] hPa, t, q [N, L], ts, zen [N], em [N] or [N, C]."""
    t = np.atleast_2d(np.asarray(t, dtype=float))
    n = t.shape[0]
    p = np.asarray(p, dtype=float)
    em = np.asarray(em, dtype=float)
    return xr.Dataset(
        {
            "air_pressure": (("level",) if p.ndim == 1 else ("profile", "level"), p),
            "air_temperature": (("profile", "level"), t),
            "specific_humidity": (("profile", "level"), np.broadcast_to(q, t.shape).copy()),
            "surface_temperature": (("profile",), np.broadcast_to(ts, (n,)).copy()),
            "surface_emissivity": (("profile",) if em.ndim <= 1 else ("profile", "channel"),
                                   np.broadcast_to(em, (n,)).copy() if em.ndim <= 1 else em),
            "sensor_zenith_angle": (("profile",), np.broadcast_to(zen, (n,)).copy()),
        }
    )


def bt(instrument, ds, **kw):
    return physics.simulate(instrument, ds, **kw)["brightness_temperature"].values


# -- textbook limits ---------------------------------------------------------------------------
@pytest.mark.parametrize("temperature", [190.0, 250.0, 310.0])
def test_isothermal_atmosphere_over_black_surface(demo_instrument, small_profiles, temperature):
    # Petty (2006) ch. 8: an isothermal atmosphere over a black surface at the same
    # temperature radiates as a black body, whatever its absorption: BT = T.
    ds = small_profiles(n=4, nlev=25)
    ds["air_temperature"][:] = temperature
    ds["surface_temperature"][:] = temperature
    ds["surface_emissivity"][:] = 1.0
    ds["sensor_zenith_angle"][:] = [0.0, 30.0, 60.0, 85.0]
    np.testing.assert_allclose(bt(demo_instrument, ds), temperature, rtol=0, atol=1e-9)


@pytest.mark.parametrize("emissivity", [1.0, 0.7, 0.0])
def test_no_absorption_gives_surface_term(emissivity):
    # Petty (2006) ch. 8, transparent atmosphere: R = e B(Ts) + (1 - e) B(T_cosmic).
    inst = gray_instrument()  # all coefficients zero
    p = np.geomspace(1000.0, 1.0, 12)
    ts = np.array([280.0, 300.0])
    ds = make_dataset(p, np.full((2, 12), 230.0), 5e-3, ts, emissivity, [0.0, 50.0])
    got = bt(inst, ds)
    t_cosmic = 2.725  # K, Fixsen (2009) ApJ 707, 916 (from memory), rounded
    for c, ch in enumerate(inst.channels):
        radiance = emissivity * ref_planck(ch, ts) + (1 - emissivity) * ref_planck(ch, t_cosmic)
        if emissivity == 0.0 and not ch.is_microwave:
            continue  # IR cosmic radiance ~1e-200: BT of the cosmic term is not representable
        np.testing.assert_allclose(got[:, c], ref_brightness_temperature(ch, radiance), rtol=1e-12)


def test_no_absorption_zero_emissivity_microwave_sees_cosmic_background():
    # e = 0, no absorption: the microwave channel sees the 2.725 K cosmic background.
    inst = gray_instrument()
    ds = make_dataset(np.array([1000.0, 100.0]), [[250.0, 250.0]], 0.0, 300.0, 0.0, 0.0)
    assert bt(inst, ds)[0, 0] == pytest.approx(2.725, rel=1e-12)


@pytest.mark.parametrize("tau_nadir", [0.05, 0.7, 3.0])
@pytest.mark.parametrize("zenith", [0.0, 45.0, 70.0])
def test_single_gray_isothermal_layer_black_surface(tau_nadir, zenith):
    # Petty (2006) ch. 8: one isothermal layer of slant optical depth tau over a black
    # surface: R = B(Ts) exp(-tau) + B(Ta) (1 - exp(-tau)).
    p0, p1, ta, ts = 1000.0, 100.0, 230.0, 295.0
    dm = (p0 - p1) * 100.0 / sc.g  # layer mass [kg m-2] (hydrostatic, scipy.constants.g)
    inst = gray_instrument(k_dry=tau_nadir / dm)  # eq. 3 with n = m = 0, q = 0: d = k dm
    ds = make_dataset(np.array([p0, p1]), [[ta, ta]], 0.0, ts, 1.0, zenith)
    tau = tau_nadir / np.cos(np.deg2rad(zenith))
    got = bt(inst, ds)[0]
    for c, ch in enumerate(inst.channels):
        radiance = ref_planck(ch, ts) * np.exp(-tau) + ref_planck(ch, ta) * (1 - np.exp(-tau))
        assert got[c] == pytest.approx(ref_brightness_temperature(ch, radiance), rel=1e-12)


@pytest.mark.parametrize("emissivity", [0.0, 0.55, 0.9])
def test_single_gray_isothermal_layer_reflecting_surface(emissivity):
    # Petty (2006) ch. 8 (specular surface, from memory): with transmittance tr = exp(-tau),
    # R = e B(Ts) tr + B(Ta)(1 - tr) + (1 - e) tr [B(Ta)(1 - tr) + B(T_cosmic) tr].
    p0, p1, ta, ts = 1000.0, 300.0, 260.0, 290.0
    dm = (p0 - p1) * 100.0 / sc.g
    inst = gray_instrument(k_dry=0.4 / dm)
    ds = make_dataset(np.array([p0, p1]), [[ta, ta]], 0.0, ts, emissivity, 30.0)
    tr = np.exp(-0.4 / np.cos(np.deg2rad(30.0)))
    got = bt(inst, ds)[0]
    for c, ch in enumerate(inst.channels):
        radiance = (emissivity * ref_planck(ch, ts) * tr + ref_planck(ch, ta) * (1 - tr)
                    + (1 - emissivity) * tr * (ref_planck(ch, ta) * (1 - tr) + ref_planck(ch, 2.725) * tr))
        assert got[c] == pytest.approx(ref_brightness_temperature(ch, radiance), rel=1e-12)


@pytest.mark.parametrize(
    "coefficients, q",
    [
        (dict(k_dry=2e-4, n_dry=1.0, m_dry=0.8), 0.0),
        (dict(k_h2o=0.05, n_h2o=1.0, m_h2o=1.5), 8e-3),
        (dict(k_cont=5.0, m_cont=3.0), 8e-3),
    ],
)
def test_single_layer_optical_depth_follows_eq3(coefficients, q):
    # The absorber laws of eq. 3 (physics.py docstring) evaluated by hand for one layer,
    # then Petty's single-layer solution over a black surface.
    p0, p1, ta, ts, p_ref, t_ref, eps = 1000.0, 500.0, 270.0, 290.0, 1013.25, 273.15, 0.622
    inst = gray_instrument(**coefficients)
    dm = (p0 - p1) * 100.0 / sc.g
    pm = 0.5 * (p0 + p1)
    c = coefficients
    vapour = q * pm / (eps + (1 - eps) * q)  # vapour pressure [hPa] from q (eq. 2)
    tau = (c.get("k_dry", 0) * (pm / p_ref) ** c.get("n_dry", 0) * (t_ref / ta) ** c.get("m_dry", 0) * (1 - q) * dm
           + c.get("k_h2o", 0) * (pm / p_ref) ** c.get("n_h2o", 0) * (t_ref / ta) ** c.get("m_h2o", 0) * q * dm
           + c.get("k_cont", 0) * (vapour / p_ref) * (t_ref / ta) ** c.get("m_cont", 0) * q * dm)
    assert 0.05 < tau < 5.0  # the case is informative
    ds = make_dataset(np.array([p0, p1]), [[ta, ta]], q, ts, 1.0, 0.0)
    got = bt(inst, ds)[0]
    for i, ch in enumerate(inst.channels):
        radiance = ref_planck(ch, ts) * np.exp(-tau) + ref_planck(ch, ta) * (1 - np.exp(-tau))
        assert got[i] == pytest.approx(ref_brightness_temperature(ch, radiance), rel=1e-12)


@pytest.mark.parametrize("zenith", [0.0, 60.0])
def test_weighting_function_peaks_at_unit_slant_optical_depth(zenith):
    # Optical depth linear in pressure (n = 0, m = 0, q = 0): tau_slant(p) = k 100 p / (g mu),
    # so dt/d ln p = tau exp(-tau), largest (1/e) at tau_slant = 1, i.e. nadir depth = mu
    # (Petty 2006, ch. 8).
    k = sc.g / (100.0 * 100.0)  # nadir optical depth 1 at 100 hPa
    inst = gray_instrument(k_dry=k)
    p = np.geomspace(1013.25, 1e-3, 3000)
    layer_p, weights = physics.weighting_functions(inst, p, np.full(p.size, 250.0), np.zeros(p.size), zenith)
    mu = np.cos(np.deg2rad(zenith))
    for w in weights:
        j = int(np.argmax(w))
        nadir_depth_above = k * 100.0 * layer_p[j] / sc.g
        assert nadir_depth_above == pytest.approx(mu, rel=0.01)
        assert w[j] == pytest.approx(np.exp(-1.0), rel=1e-4)


# -- derivatives -------------------------------------------------------------------------------
def perturbed(ds, name, delta):
    out = ds.copy(deep=True)
    out[name] = ds[name] + delta
    return out


def central_difference(inst, ds, name, delta):
    plus = bt(inst, perturbed(ds, name, delta))
    minus = bt(inst, perturbed(ds, name, -delta))
    return plus, minus


def assert_close_to_fd(analytic, fd, rtol, floor):
    """|analytic - fd| <= rtol (|fd| + channel scale) + floor.

    The channel scale is that channel's largest sensitivity; ``floor`` [K per unit] covers
    the round-off of the difference quotient (about 1e-13 K / step).
    """
    scale = np.max(np.abs(analytic), axis=tuple(i for i in range(analytic.ndim) if i != 1), keepdims=True)
    excess = np.abs(analytic - fd) / (rtol * (np.abs(fd) + scale) + floor)
    worst = np.unravel_index(np.argmax(excess), excess.shape)
    assert excess.max() <= 1.0, (f"at {worst}: analytic {analytic[worst]!r}, fd {fd[worst]!r}, "
                                 f"scale {np.broadcast_to(scale, fd.shape)[worst]!r}")


@pytest.fixture(scope="module")
def fd_case(demo_instrument, small_profiles):
    # realistic profiles (module-scoped: simulated once for the four FD tests)
    ds = small_profiles(n=3, nlev=24, seed=7)
    return ds, physics.simulate(demo_instrument, ds, jacobian=True)


def test_jacobian_air_temperature_against_finite_differences(demo_instrument, fd_case):
    ds, out = fd_case
    h = 1e-2  # [K]
    fd = np.empty(out["jacobian_air_temperature"].shape)
    for level in range(ds.sizes["level"]):
        delta = xr.zeros_like(ds["air_temperature"])
        delta[:, level] = h
        plus, minus = central_difference(demo_instrument, ds, "air_temperature", delta)
        fd[:, :, level] = (plus - minus) / (2 * h)
    assert_close_to_fd(out["jacobian_air_temperature"].values, fd, rtol=1e-6, floor=1e-10)


def test_jacobian_specific_humidity_against_finite_differences(demo_instrument, fd_case):
    ds, out = fd_case
    # Compared as d BT / d ln q = J q: q spans four decades over the profile.
    rel = 3e-3
    q = ds["specific_humidity"].values
    fd = np.empty(out["jacobian_specific_humidity"].shape)
    for level in range(ds.sizes["level"]):
        delta = xr.zeros_like(ds["specific_humidity"])
        delta[:, level] = rel * q[:, level]
        plus, minus = central_difference(demo_instrument, ds, "specific_humidity", delta)
        fd[:, :, level] = (plus - minus) / (2 * rel)
    analytic = out["jacobian_specific_humidity"].values * q[:, None, :]
    assert_close_to_fd(analytic, fd, rtol=1e-5, floor=1e-9)


def test_jacobian_surface_temperature_against_finite_differences(demo_instrument, fd_case):
    ds, out = fd_case
    h = 1e-2
    plus, minus = central_difference(demo_instrument, ds, "surface_temperature", h)
    assert_close_to_fd(out["jacobian_surface_temperature"].values, (plus - minus) / (2 * h), rtol=1e-7,
                       floor=1e-10)


def test_jacobian_surface_emissivity_against_finite_differences(demo_instrument, fd_case):
    ds, out = fd_case
    h = 1e-4
    # each channel's BT depends on its own emissivity only, so all channels at once
    plus, minus = central_difference(demo_instrument, ds, "surface_emissivity", h)
    # floor: round-off of the quotient, ~ 2 eps BT / (2 h) = 7e-10 K
    assert_close_to_fd(out["jacobian_surface_emissivity"].values, (plus - minus) / (2 * h), rtol=1e-7,
                       floor=2e-9)


def random_increment(ds, rng):
    return xr.Dataset(
        {
            "air_temperature": ds["air_temperature"].dims and (ds["air_temperature"].dims,
                                                               rng.normal(0, 1.0, ds["air_temperature"].shape)),
            "specific_humidity": (ds["specific_humidity"].dims,
                                  0.1 * ds["specific_humidity"].values * rng.normal(0, 1.0, ds["specific_humidity"].shape)),
            "surface_temperature": (("profile",), rng.normal(0, 1.0, ds.sizes["profile"])),
            "surface_emissivity": (ds["surface_emissivity"].dims,
                                   rng.normal(0, 0.01, ds["surface_emissivity"].shape)),
        }
    )


def test_tangent_linear_taylor_remainder_is_quadratic(demo_instrument, small_profiles):
    # Taylor test: ||H(x + a dx) - H(x) - a J dx|| = O(a^2).
    ds = small_profiles(n=4, nlev=30, seed=3)
    dx = random_increment(ds, np.random.default_rng(11))
    h0 = bt(demo_instrument, ds)
    jdx = physics.tangent_linear(demo_instrument, ds, dx)["brightness_temperature"].values
    alphas = 0.2 * 0.5 ** np.arange(6)
    remainders = []
    for a in alphas:
        moved = ds.copy(deep=True)
        for name in dx.data_vars:
            moved[name] = ds[name] + a * dx[name]
        remainders.append(np.linalg.norm(bt(demo_instrument, moved) - h0 - a * jdx))
    ratios = np.array(remainders[:-1]) / np.array(remainders[1:])
    assert np.all((ratios > 3.6) & (ratios < 4.4)), (remainders, ratios)  # halving a quarters it
    assert remainders[-1] < 1e-3 * np.linalg.norm(alphas[-1] * jdx)


@pytest.mark.parametrize("per_channel", [True, False])
def test_adjoint_dot_product(demo_instrument, small_profiles, per_channel):
    # Dot-product test: <J dx, dy> = <dx, J^T dy>.
    ds = small_profiles(n=5, nlev=30, seed=4, emissivity_per_channel=per_channel)
    rng = np.random.default_rng(5)
    dx = random_increment(ds, rng)
    dy = xr.DataArray(rng.normal(0, 1.0, (5, len(demo_instrument.channels))), dims=("profile", "channel"),
                      coords={"channel": list(demo_instrument.channel_ids)})
    jdx = physics.tangent_linear(demo_instrument, ds, dx)["brightness_temperature"]
    jtdy = physics.adjoint(demo_instrument, ds, dy)
    left = float(np.sum(jdx.values * dy.values))
    right = sum(float(np.sum(dx[name].values * jtdy[name].transpose(*dx[name].dims).values))
                for name in dx.data_vars)
    assert left == pytest.approx(right, rel=1e-10)
    assert set(jtdy.data_vars) == set(dx.data_vars)
    assert jtdy["surface_emissivity"].dims == ds["surface_emissivity"].dims


def test_tangent_linear_equals_jacobian_product(demo_instrument, small_profiles):
    ds = small_profiles(n=3, nlev=20, seed=9)
    dx = random_increment(ds, np.random.default_rng(2))
    out = physics.simulate(demo_instrument, ds, jacobian=True)
    expected = (np.einsum("ncl,nl->nc", out["jacobian_air_temperature"].values, dx["air_temperature"].values)
                + np.einsum("ncl,nl->nc", out["jacobian_specific_humidity"].values, dx["specific_humidity"].values)
                + out["jacobian_surface_temperature"].values * dx["surface_temperature"].values[:, None]
                + out["jacobian_surface_emissivity"].values * dx["surface_emissivity"].values)
    got = physics.tangent_linear(demo_instrument, ds, dx)["brightness_temperature"].values
    np.testing.assert_allclose(got, expected, rtol=1e-12, atol=1e-12)
    only_t = physics.tangent_linear(demo_instrument, ds, dx[["air_temperature"]])["brightness_temperature"]
    np.testing.assert_allclose(only_t.values, np.einsum("ncl,nl->nc", out["jacobian_air_temperature"].values,
                                                        dx["air_temperature"].values), rtol=1e-12)


# -- invariances -------------------------------------------------------------------------------
def test_output_schema(demo_instrument, small_profiles):
    ds = small_profiles(n=2, nlev=12)
    out = physics.simulate(demo_instrument, ds, jacobian=True)
    nchan = len(demo_instrument.channels)
    assert list(out["channel"].values) == list(demo_instrument.channel_ids)
    assert out["brightness_temperature"].dims == ("profile", "channel")
    assert out["brightness_temperature"].attrs["units"] == "K"
    assert out["quality_flag"].dtype == np.int32 and np.all(out["quality_flag"] == 0)
    for name in ("jacobian_air_temperature", "jacobian_specific_humidity"):
        assert out[name].dims == ("profile", "channel", "level") and out[name].shape == (2, nchan, 12)
    for name in ("jacobian_surface_temperature", "jacobian_surface_emissivity"):
        assert out[name].dims == ("profile", "channel")
    assert set(physics.simulate(demo_instrument, ds).data_vars) == {"brightness_temperature", "quality_flag"}


def test_level_order_invariance(demo_instrument, small_profiles):
    ds = small_profiles(n=4, nlev=20, seed=1)
    top_first = ds.isel(level=slice(None, None, -1))
    a = physics.simulate(demo_instrument, ds, jacobian=True)
    b = physics.simulate(demo_instrument, top_first, jacobian=True)
    np.testing.assert_array_equal(a["brightness_temperature"].values, b["brightness_temperature"].values)
    for name in JACOBIANS:
        flipped = b[name].values[..., ::-1] if b[name].ndim == 3 else b[name].values
        np.testing.assert_array_equal(a[name].values, flipped)


def test_mixed_level_order_in_one_batch(demo_instrument, small_profiles):
    ds = small_profiles(n=3, nlev=15, seed=2, per_profile_pressure=True)
    mixed = ds.copy(deep=True)
    for name in ("air_pressure", "air_temperature", "specific_humidity"):
        mixed[name].values[1] = ds[name].values[1, ::-1]
    a = physics.simulate(demo_instrument, ds, jacobian=True)
    b = physics.simulate(demo_instrument, mixed, jacobian=True)
    np.testing.assert_array_equal(a["brightness_temperature"].values, b["brightness_temperature"].values)
    jb = b["jacobian_air_temperature"].values.copy()
    jb[1] = jb[1][:, ::-1]
    np.testing.assert_array_equal(a["jacobian_air_temperature"].values, jb)


def test_per_profile_pressure_equals_per_profile_runs(demo_instrument, small_profiles):
    ds = small_profiles(n=3, nlev=18, seed=6, per_profile_pressure=True)
    assert ds["air_pressure"].dims == ("profile", "level")
    assert not np.allclose(ds["air_pressure"].values[0], ds["air_pressure"].values[1])
    batch = physics.simulate(demo_instrument, ds, jacobian=True)
    for i in range(3):
        alone = ds.isel(profile=[i])
        alone["air_pressure"] = ("level", ds["air_pressure"].values[i])
        single = physics.simulate(demo_instrument, alone, jacobian=True)
        for name in ("brightness_temperature", *JACOBIANS):
            np.testing.assert_allclose(batch[name].values[i], single[name].values[0], rtol=1e-13, atol=0)


def test_units_give_the_same_result(demo_instrument, small_profiles):
    ds = small_profiles(n=3, nlev=20, seed=8)
    other = ds.copy(deep=True)
    # conversion factors: SI definitions (1 hPa = 100 Pa, 0 degC = 273.15 K, 1 rad = 180/pi degree)
    other["air_pressure"] = ds["air_pressure"] * 100.0
    other["air_pressure"].attrs["units"] = "Pa"
    other["specific_humidity"] = ds["specific_humidity"] * 1000.0
    other["specific_humidity"].attrs["units"] = "g kg-1"
    for name in ("air_temperature", "surface_temperature"):
        other[name] = ds[name] - 273.15
        other[name].attrs["units"] = "degC"
    other["sensor_zenith_angle"] = np.deg2rad(ds["sensor_zenith_angle"])
    other["sensor_zenith_angle"].attrs["units"] = "rad"
    a = physics.simulate(demo_instrument, ds, jacobian=True)
    b = physics.simulate(demo_instrument, other, jacobian=True)
    for name in ("brightness_temperature", *JACOBIANS):  # Jacobians in canonical units either way
        scale = np.max(np.abs(a[name].values))
        np.testing.assert_allclose(b[name].values, a[name].values, rtol=1e-10, atol=1e-12 * scale)

    # tangent-linear increments in the dataset's units, adjoint gradients per dataset unit
    rng = np.random.default_rng(0)
    dx = random_increment(ds, rng)
    dx_other = dx.copy(deep=True)
    dx_other["specific_humidity"] = dx["specific_humidity"] * 1000.0
    np.testing.assert_allclose(physics.tangent_linear(demo_instrument, other, dx_other)["brightness_temperature"],
                               physics.tangent_linear(demo_instrument, ds, dx)["brightness_temperature"], rtol=1e-9)
    dy = xr.DataArray(rng.normal(size=a["brightness_temperature"].shape), dims=("profile", "channel"))
    ga = physics.adjoint(demo_instrument, ds, dy)
    gb = physics.adjoint(demo_instrument, other, dy)
    np.testing.assert_allclose(gb["specific_humidity"], ga["specific_humidity"] * 1e-3, rtol=1e-9)
    np.testing.assert_allclose(gb["air_temperature"], ga["air_temperature"], rtol=1e-9)


@pytest.mark.parametrize("units, factor", [("mbar", 1.0), ("kPa", 0.1)])
def test_pressure_unit_spellings(demo_instrument, small_profiles, units, factor):
    ds = small_profiles(n=2, nlev=10)
    other = ds.copy(deep=True)
    other["air_pressure"] = ds["air_pressure"] * factor
    other["air_pressure"].attrs["units"] = units
    np.testing.assert_allclose(bt(demo_instrument, other), bt(demo_instrument, ds), rtol=1e-12)


def test_results_independent_of_block_size(demo_instrument, small_profiles):
    ds = small_profiles(n=5, nlev=15, seed=12)
    reference = physics.simulate(demo_instrument, ds, jacobian=True)
    for block_size in (1, 2, 3):
        other = physics.simulate(demo_instrument, ds, jacobian=True, block_size=block_size)
        for name in ("brightness_temperature", *JACOBIANS):
            np.testing.assert_allclose(other[name].values, reference[name].values, rtol=1e-14, atol=0)


def test_scalar_single_profile_and_batch_agree(demo_instrument, small_profiles):
    ds = small_profiles(n=3, nlev=15, seed=13, emissivity_per_channel=False)
    batch = physics.simulate(demo_instrument, ds, jacobian=True)
    i = 2
    # numpy core on one profile given as 1-D arrays and scalars
    single = physics.transfer(
        demo_instrument, ds["air_pressure"].values, ds["air_temperature"].values[i],
        ds["specific_humidity"].values[i], float(ds["surface_temperature"][i]),
        float(ds["surface_emissivity"][i]), float(ds["sensor_zenith_angle"][i]), jacobian=True)
    for name in ("brightness_temperature", *JACOBIANS):
        assert single[name].shape[0] == 1
        np.testing.assert_allclose(single[name][0], batch[name].values[i], rtol=1e-13, atol=0)
    # labelled entry point on a one-profile dataset
    one = physics.simulate(demo_instrument, ds.isel(profile=[i]), jacobian=True)
    for name in ("brightness_temperature", *JACOBIANS):
        np.testing.assert_allclose(one[name].values[0], batch[name].values[i], rtol=1e-13, atol=0)


@st.composite
def black_surface_cases(draw):
    nlev = draw(st.integers(2, 12))
    surface = draw(st.floats(300.0, 1100.0))
    fractions = draw(st.lists(st.floats(0.05, 0.95), min_size=nlev - 1, max_size=nlev - 1))
    p = surface * np.cumprod([1.0, *fractions])
    t = np.array(draw(st.lists(st.floats(150.0, 330.0), min_size=nlev, max_size=nlev)))
    q = np.array(draw(st.lists(st.floats(0.0, 0.05), min_size=nlev, max_size=nlev)))
    ts = draw(st.floats(150.0, 330.0))
    zen = draw(st.floats(0.0, 85.0))
    return p, t, q, ts, zen


@settings(max_examples=80, deadline=None)
@given(black_surface_cases())
def test_black_surface_bt_between_extreme_temperatures(demo_instrument, case):
    # With e = 1 the radiance is a transmittance-weighted mean of B(Ts) and the layer B(T_j),
    # weights summing to 1 (Petty 2006 ch. 8), so BT lies between their extremes.
    p, t, q, ts, zen = case
    out = physics.transfer(demo_instrument, p, t, q, ts, 1.0, zen)["brightness_temperature"][0]
    layer_t = 0.5 * (t[:-1] + t[1:])
    lo, hi = min(layer_t.min(), ts), max(layer_t.max(), ts)
    assert np.all(out >= lo - 1e-9) and np.all(out <= hi + 1e-9), (out, lo, hi)


def test_channel_order_of_labelled_inputs_is_respected(demo_instrument, small_profiles):
    # A dataset/perturbation whose channel coordinate is in another order than the
    # instrument's must give the same numbers (xarray labels, not positions, decide).
    ds = small_profiles(n=3, nlev=12, seed=14)
    rng = np.random.default_rng(3)
    dx = xr.Dataset({"surface_emissivity": (("profile", "channel"), rng.normal(0, 0.01, (3, 16)))},
                    coords={"channel": ds["channel"].values})
    dy = xr.DataArray(rng.normal(size=(3, 16)), dims=("profile", "channel"), coords={"channel": ds["channel"].values})
    reverse = dict(channel=slice(None, None, -1))
    ds_r, dx_r, dy_r = ds.isel(reverse), dx.isel(reverse), dy.isel(reverse)
    np.testing.assert_array_equal(bt(demo_instrument, ds_r), bt(demo_instrument, ds))
    tl = physics.tangent_linear(demo_instrument, ds, dx)["brightness_temperature"]
    tl_r = physics.tangent_linear(demo_instrument, ds_r, dx_r)["brightness_temperature"]
    np.testing.assert_array_equal(tl_r.values, tl.values)
    ad = physics.adjoint(demo_instrument, ds, dy)["surface_emissivity"]
    ad_r = physics.adjoint(demo_instrument, ds_r, dy_r)["surface_emissivity"]
    assert list(ad_r["channel"].values) == list(demo_instrument.channel_ids)
    xr.testing.assert_equal(ad_r, ad)
