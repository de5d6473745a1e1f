"""The gray opacity kernels of rtemu.features against analytic cases.

The graph's version of the same features and its exact Jacobians are checked in
tests/test_export.py (float64 graph against finite differences, and against the in-memory
scikit-learn model, with kernels switched on in its recipe).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import scipy.constants

from rtemu.atmosphere import default_pressure_grid
from rtemu.features import (
    KERNEL_REFERENCE_PRESSURE_HPA,
    kernel_coefficient_matrix,
    FeatureConfig,
    kernel_path_matrices,
    kernel_temperature_matrix,
    opacity_kernel_features,
    raw_features,
)
from rtemu.training import Recipe

EPS = 0.622  # ratio of the gas constants of dry air and water vapour (textbook value)
CONFIG = FeatureConfig(line_kernels=(0.01, 0.3, 10.0), continuum_kernels=(1.0, 100.0))


def _profiles(n=6, seed=3):
    p = default_pressure_grid()
    rng = np.random.default_rng(seed)
    T = 200.0 + 90.0 * rng.random((n, p.size))
    q = 2e-2 * rng.random((n, p.size)) * (p / p[0]) ** 3
    return p, T, q, 250.0 + 60.0 * rng.random(n), 65.0 * rng.random(n)


def test_isothermal_atmosphere_and_surface_give_their_temperature():
    # the weights of f (transmittance steps plus the surface transmittance) sum to one, so
    # an isothermal column over a surface at the same temperature is seen at that temperature
    # whatever the absorption (the textbook isothermal limit of Schwarzschild's equation)
    p, _, q, _, zen = _profiles()
    T = np.full((len(zen), p.size), 263.0)
    out = opacity_kernel_features(T, q, np.full(len(zen), 263.0), zen, CONFIG, p)
    np.testing.assert_allclose(out[:, :CONFIG.n_kernels], 263.0, rtol=1e-12)


def test_dry_atmosphere_is_transparent():
    p, T, _, ts, zen = _profiles()
    out = opacity_kernel_features(T, np.zeros_like(T), ts, zen, CONFIG, p)
    K = CONFIG.n_kernels
    np.testing.assert_allclose(out[:, :K], np.repeat(ts[:, None], K, axis=1), rtol=1e-12)  # f = Ts
    np.testing.assert_allclose(out[:, K:], 1.0)  # column transmittance 1


def test_uniform_humidity_column_transmittance_is_analytic():
    # q uniform: the line path is the integral of q p / p_0 dp / g over the column, and the
    # continuum path that of q^2 p / (epsilon p_0) dp / g (hydrostatic air mass dp / g;
    # 100 Pa per hPa); both integrands are linear in p, so the layer-mean sums are exact:
    # P = c (p_s^2 - p_top^2) / (2 p_0) * 100 / g. g = standard gravity (scipy.constants, CGPM 1901).
    p, T, _, ts, zen = _profiles(n=4)
    qv = np.array([1e-5, 1e-4, 3e-3, 1.5e-2])
    q = np.repeat(qv[:, None], p.size, axis=1)
    out = opacity_kernel_features(T, q, ts, zen, CONFIG, p)
    column = (p.max() ** 2 - p.min() ** 2) / (2 * KERNEL_REFERENCE_PRESSURE_HPA) * 100.0 / scipy.constants.g
    sec = 1.0 / np.cos(np.radians(zen))
    line = qv * column
    cont = qv**2 / EPS * column
    expected = np.concatenate(
        [np.exp(-np.outer(sec * line, CONFIG.line_kernels)), np.exp(-np.outer(sec * cont, CONFIG.continuum_kernels))],
        axis=1)
    np.testing.assert_allclose(out[:, CONFIG.n_kernels:], expected, rtol=1e-10)


def test_single_gray_layer_over_a_black_surface():
    # two levels = one layer: f = Tbar (1 - t) + Ts t, the emission of one isothermal gray
    # layer of transmittance t over a black surface (textbook single-slab result, e.g.
    # Petty 2006, A First Course in Atmospheric Radiation, ch. 6; from memory)
    p = np.array([1000.0, 600.0])
    T = np.array([[290.0, 250.0]])
    q = np.array([[8e-3, 2e-3]])
    ts, zen = np.array([295.0]), np.array([30.0])
    cfg = FeatureConfig(line_kernels=(0.5,))
    f, t = opacity_kernel_features(T, q, ts, zen, cfg, p)[0]
    path = 0.5 * (q[0, 0] * p[0] + q[0, 1] * p[1]) / KERNEL_REFERENCE_PRESSURE_HPA * (p[0] - p[1]) * 100 / scipy.constants.g
    t_expected = np.exp(-0.5 * path / np.cos(np.radians(30.0)))
    assert t == pytest.approx(t_expected, rel=1e-12)
    assert f == pytest.approx(270.0 * (1 - t_expected) + 295.0 * t_expected, rel=1e-12)


REFLECTING = FeatureConfig(line_kernels=(0.01, 0.3, 10.0), continuum_kernels=(1.0, 100.0), reflection_kernels=True)


def test_single_gray_layer_over_a_reflecting_surface():
    # one isothermal gray layer (transmittance t, temperature Tbar) over a surface of
    # emissivity e, specular: BT = e Ts t + Tbar (1 - t) + (1 - e) t Tbar (1 - t), the
    # layer's own emission, the surface's, and the layer's downward emission reflected and
    # transmitted (textbook single-slab result with the Planck function linear in T; from
    # memory). The features give it as f + (1 - e) r.
    p = np.array([1000.0, 600.0])
    T = np.array([[290.0, 250.0]])
    q = np.array([[8e-3, 2e-3]])
    ts, zen = np.array([295.0]), np.array([30.0])
    cfg = FeatureConfig(line_kernels=(0.5,), reflection_kernels=True)
    f, t, r = opacity_kernel_features(T, q, ts, zen, cfg, p)[0]
    for e in (0.4, 0.75, 1.0):
        expected = e * 295.0 * t + 270.0 * (1 - t) + (1 - e) * t * 270.0 * (1 - t)
        assert f + (1 - e) * r == pytest.approx(expected, rel=1e-12)


def test_isothermal_downwelling_is_analytic():
    # an isothermal column at Ta sends Ta (1 - t_s) down to the surface (no cosmic
    # background): r = t_s (Ta (1 - t_s) - Ts)
    p, _, q, ts, zen = _profiles()
    T = np.full((len(zen), p.size), 241.0)
    out = opacity_kernel_features(T, q, ts, zen, REFLECTING, p)
    K = REFLECTING.n_kernels
    t_s, r = out[:, K:2 * K], out[:, 2 * K:]
    np.testing.assert_allclose(r, t_s * (241.0 * (1 - t_s) - ts[:, None]), rtol=1e-10, atol=1e-9)
    # the first 2 K columns are those of the configuration without reflection
    plain = opacity_kernel_features(T, q, ts, zen, CONFIG, p)
    np.testing.assert_array_equal(out[:, :2 * K], plain)


def test_reflection_level_order_does_not_matter():
    p, T, q, ts, zen = _profiles()
    a = opacity_kernel_features(T, q, ts, zen, REFLECTING, p)
    b = opacity_kernel_features(T[:, ::-1], q[:, ::-1], ts, zen, REFLECTING, p[::-1])
    # atol 1e-20: on the 64-level grid one opaque column's transmittance, 9.1e-24, differs
    # by 3.7e-12 relative between the two summation orders of its optical depth (round-off)
    np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-20)
    assert a.shape[1] == 3 * REFLECTING.n_kernels == REFLECTING.n_kernel_features


_GRAY_TOML = """name = "invented-gray-check"
description = "INVENTED single-band channels for a test: not any real sensor"
[reference]
pressure_hpa = 1013.25
temperature_k = 273.15
[absorbers.dry]
pressure_exponent = 1.0
temperature_exponent = 0.0
[absorbers.h2o]
pressure_exponent = 1.0
temperature_exponent = 0.0
[absorbers.continuum]
temperature_exponent = 0.0
[[channels]]
id = "thin"
frequency_ghz = 10.0
noise_k = 0.3
bands = [ { weight = 1, dry = 2e-05, h2o = 0.003, continuum = 0.3 } ]
[[channels]]
id = "thick"
frequency_ghz = 10.0
noise_k = 0.3
bands = [ { weight = 1, dry = 3e-04, h2o = 0.0, continuum = 0.0 } ]
[[channels]]
id = "two-band"
frequency_ghz = 10.0
noise_k = 0.3
bands = [ { weight = 0.3, dry = 1e-4, h2o = 0.0, continuum = 0.0 }, { weight = 0.7, dry = 1e-6, h2o = 0.3, continuum = 0.0 } ]
"""


def test_channel_kernels_reproduce_the_physical_model_of_a_dry_gray_channel():
    # A channel kernel is the brightness temperature of its own gray channel when the
    # Planck function is linear in T (10 GHz: h nu / k = 0.48 K) and the absorption does
    # not depend on temperature: f + (1 - e) (r + t_s^2 T_c'), T_c' the cosmic background
    # (2.725 K, Fixsen 2009) as the linearised Planck function sees it,
    # x / (exp(x / T_c) - 1) + x / 2 with x = h nu / k (scipy.constants). In the dry limit
    # (q at the 1e-7 floor) the physics has no other difference from the kernels.
    from rtemu import physics
    from rtemu.features import channel_kernels_of
    from rtemu.instrument import Instrument
    from rtemu.sampling import draw_states

    inst = Instrument.from_toml(_GRAY_TOML)
    states = draw_states(64, seed=5, channels=inst)
    p = states.air_pressure.values
    T, Ts, e, zen = (states[k].values for k in ("air_temperature", "surface_temperature", "surface_emissivity",
                                                 "sensor_zenith_angle"))
    q = np.full_like(T, 1e-7)
    bt = physics.transfer(inst, p, T, q, Ts, e, zen)["brightness_temperature"]
    x_over_t = scipy.constants.h * 10e9 / scipy.constants.k
    cosmic = x_over_t / np.expm1(x_over_t / 2.725) + x_over_t / 2
    cfg = FeatureConfig(channel_kernels=channel_kernels_of(inst), reflection_kernels=True)
    out = opacity_kernel_features(T, q, Ts, zen, cfg, p)
    f, t_s, r = out[:, 0:3], out[:, 3:6], out[:, 6:9]
    for c in (0, 1):  # single sub-band channels
        approx = f[:, c] + (1 - e[:, c]) * (r[:, c] + t_s[:, c] ** 2 * cosmic)
        np.testing.assert_allclose(approx, bt[:, c], atol=2e-3, rtol=0)  # Planck curvature ~1e-4 K
    # a two-band channel's kernel is the weighted mean of its sub-bands' kernels
    parts = [FeatureConfig(channel_kernels=((band,),), reflection_kernels=True) for band in cfg.channel_kernels[2]]
    sub = [opacity_kernel_features(T, q, Ts, zen, c, p) for c in parts]
    np.testing.assert_allclose(out[:, 2::3], 0.3 * sub[0] + 0.7 * sub[1], rtol=1e-12)


def test_temperature_laws_carry_the_opacity_part_of_the_temperature_jacobian():
    # The invented gray channels with temperature-dependent absorption (dry 0.8, water 1.5,
    # continuum 3.0: k (T_ref / T)^n). With the instrument's laws the channel's own kernel
    # follows the physical model's brightness temperature and its air-temperature Jacobian
    # (rtemu.physics, analytic) closely; without them the kernel misses the d(opacity)/dT
    # part. The laws act per level here and per layer mean in the physics, the only
    # difference left besides the Planck curvature and the vapour-pressure approximation.
    from rtemu import physics
    from rtemu.features import channel_kernels_of, temperature_laws_of
    from rtemu.instrument import Instrument
    from rtemu.sampling import draw_states

    text = _GRAY_TOML.replace("[absorbers.dry]\npressure_exponent = 1.0\ntemperature_exponent = 0.0",
                        "[absorbers.dry]\npressure_exponent = 1.0\ntemperature_exponent = 0.8")
    text = text.replace("[absorbers.h2o]\npressure_exponent = 1.0\ntemperature_exponent = 0.0",
                        "[absorbers.h2o]\npressure_exponent = 1.0\ntemperature_exponent = 1.5")
    text = text.replace("[absorbers.continuum]\ntemperature_exponent = 0.0",
                        "[absorbers.continuum]\ntemperature_exponent = 3.0")
    inst = Instrument.from_toml(text)
    assert temperature_laws_of(inst) == (273.15, 0.8, 1.5, 3.0)
    states = draw_states(48, seed=9, channels=inst)
    p = states.air_pressure.values
    T, q, Ts, e, zen = (states[k].values for k in ("air_temperature", "specific_humidity", "surface_temperature",
                                                    "surface_emissivity", "sensor_zenith_angle"))
    phys = physics.transfer(inst, p, T, q, Ts, e, zen, jacobian=True)
    c = 0  # "thin": one sub-band with dry, water-line and continuum absorption
    L = p.size

    def kernel_bt(config, T):
        f, _, r = opacity_kernel_features(T, q, Ts, zen, config, p)[:, c::config.n_kernels].T
        return f + (1 - e[:, c]) * r

    def relative_jacobian_error(config):
        jac = np.empty((T.shape[0], L))
        for i in range(L):
            up, dn = T.copy(), T.copy()
            up[:, i] += 1e-3
            dn[:, i] -= 1e-3
            jac[:, i] = (kernel_bt(config, up) - kernel_bt(config, dn)) / 2e-3
        ref = phys["jacobian_air_temperature"][:, c]
        return np.median(np.linalg.norm(jac - ref, axis=1) / np.linalg.norm(ref, axis=1))

    kernels = channel_kernels_of(inst)
    with_laws = FeatureConfig(channel_kernels=kernels, reflection_kernels=True,
                              kernel_temperature_laws=temperature_laws_of(inst))
    without = FeatureConfig(channel_kernels=kernels, reflection_kernels=True)
    # channel kernels only: the three law paths replace the two plain ones
    assert with_laws.n_kernel_paths == 3 and without.n_kernel_paths == 2
    both = FeatureConfig(line_kernels=(0.5,), channel_kernels=kernels,
                         kernel_temperature_laws=temperature_laws_of(inst))
    assert both.n_kernel_paths == 5
    kappa = kernel_coefficient_matrix(both)  # bank row on "line", the band rows on the law paths
    assert np.all(kappa[0] == [0.5, 0, 0, 0, 0]) and np.all(kappa[1:, :2] == 0)
    err_with, err_without = relative_jacobian_error(with_laws), relative_jacobian_error(without)
    assert err_with < 0.02 and err_without > 5 * err_with, (err_with, err_without)
    bt = phys["brightness_temperature"][:, c]
    # the cosmic background (~1-3 K through the reflected path) is left out on both sides
    cosmic = (1 - e[:, c]) * opacity_kernel_features(T, q, Ts, zen, with_laws, p)[:, 3 + c] ** 2 * 2.725
    # The vapour-pressure approximation grows with the water column: on these 48 generator-v5
    # draws the RMS is 0.071 K below 20 kg m-2 and 0.22 K above (generator v4's draws, median
    # 4 kg m-2, were nearly all in the first group).
    miss = kernel_bt(with_laws, T) + cosmic - bt
    moist = states.total_column_water_vapour.values >= 20.0
    assert np.sqrt(np.mean(miss[~moist] ** 2)) < 0.1 and np.sqrt(np.mean(miss[moist] ** 2)) < 0.3
    with pytest.raises(ValueError, match="kernel_temperature_laws must be empty"):
        FeatureConfig(kernel_temperature_laws=(273.15, 0.8, 1.5, 3.0))  # no channel kernels
    with pytest.raises(ValueError, match="kernel_temperature_laws must be empty"):
        FeatureConfig(channel_kernels=kernels, kernel_temperature_laws=(0.0, 0.8, 1.5, 3.0))


def test_channel_kernels_scale_to_the_kernel_reference_pressure():
    from rtemu.features import channel_kernels_of
    from rtemu.instrument import Instrument

    inst = Instrument.from_toml(_GRAY_TOML.replace("pressure_hpa = 1013.25", "pressure_hpa = 500.0"))
    (band,), = channel_kernels_of(inst)[:1]
    assert band == pytest.approx((1.0, 2e-05 * 1013.25 / 500, 0.003 * 1013.25 / 500, 0.3 * 1013.25 / 500))
    with pytest.raises(ValueError, match="channel_kernels must be a list of channels"):
        FeatureConfig(channel_kernels=(((0.0, 1.0, 0.0, 0.0),),))


def test_level_order_does_not_matter():
    p, T, q, ts, zen = _profiles()
    a = opacity_kernel_features(T, q, ts, zen, CONFIG, p)
    b = opacity_kernel_features(T[:, ::-1], q[:, ::-1], ts, zen, CONFIG, p[::-1])
    np.testing.assert_allclose(a, b, rtol=1e-12)
    m1, m2 = kernel_path_matrices(p)
    r1, r2 = kernel_path_matrices(p[::-1])
    np.testing.assert_array_equal(m1[::-1, ::-1], r1)
    np.testing.assert_array_equal(m2[::-1, ::-1], r2)
    np.testing.assert_array_equal(kernel_temperature_matrix(p)[::-1, ::-1], kernel_temperature_matrix(p[::-1]))


def test_temperature_derivative_matrix_against_finite_differences():
    p, T, q, ts, zen = _profiles(n=1)
    cfg = FeatureConfig(line_kernels=(0.3,))
    sec = 1.0 / np.cos(np.radians(zen[0]))
    t = np.exp(-0.3 * sec * (q @ kernel_path_matrices(p)[0]))[0]
    analytic = t @ kernel_temperature_matrix(p)
    step = 1e-3
    for i in (0, 7, p.size - 1):
        up, dn = T.copy(), T.copy()
        up[0, i] += step
        dn[0, i] -= step
        fd = (opacity_kernel_features(up, q, ts, zen, cfg, p)[0, 0]
              - opacity_kernel_features(dn, q, ts, zen, cfg, p)[0, 0]) / (2 * step)
        assert fd == pytest.approx(analytic[i], rel=1e-7, abs=1e-9)  # f is linear in T: round-off only


def test_kernel_block_sits_before_the_surface_temperature_and_zenith():
    p, T, q, ts, zen = _profiles()
    cfg = FeatureConfig(temperature_components=4, humidity_components=4, line_kernels=(1.0,),
                        continuum_kernels=(10.0,))
    x = raw_features(T, q, ts, zen, cfg, p)
    assert x.shape[1] == cfg.n_features(p.size) == 3 * p.size + 2 * 2 + 2
    np.testing.assert_array_equal(x[:, -2], ts)
    np.testing.assert_allclose(x[:, 3 * p.size:3 * p.size + 4], opacity_kernel_features(T, q, ts, zen, cfg, p))
    with pytest.raises(ValueError, match="pressure_hpa is required"):
        raw_features(T, q, ts, zen, cfg)


def test_config_round_trip_and_older_bundles():
    assert FeatureConfig.from_json(CONFIG.to_json()) == CONFIG
    # a format-2 bundle's features have no kernel keys: no kernels
    old = json.loads(CONFIG.to_json())
    del old["line_kernels"], old["continuum_kernels"]
    assert FeatureConfig(**old).n_kernels == 0
    for bad in ([0.0], [-1.0], [float("inf")], "1.0", [True]):
        with pytest.raises(ValueError, match="line_kernels must be a list of positive numbers"):
            FeatureConfig(line_kernels=bad)


@pytest.mark.parametrize("value", ["[0.0]", "[-2.0]", '"many"', "[true]"])
def test_recipe_refuses_bad_kernel_lists(value):
    with pytest.raises(ValueError, match=r"features.continuum_kernels' must be a list of at most 64 positive"):
        Recipe.from_toml(f'name = "x"\n[features]\ncontinuum_kernels = {value}\n', "bad.toml")


def test_humidity_top_leaves_the_stratospheric_humidity_out_of_the_per_level_blocks():
    from rtemu.features import HUMIDITY_TOP_BLOCKS, FeatureTransform

    p, T, q, ts, zen = _profiles(n=400, seed=5)
    T = T + np.random.default_rng(1).normal(0.0, 3.0, T.shape)
    cfg = FeatureConfig(temperature_components=6, humidity_components=6, linear_humidity_components=4,
                        water_path=True, water_path_components=4, line_kernels=(1.0,), humidity_top_hpa=100.0)
    x = raw_features(T, q, ts, zen, cfg, p)
    tr = FeatureTransform(config=cfg, n_levels=p.size, pressure_hpa=p).fit(x)
    L = p.size
    masked = np.zeros(x.shape[1], dtype=bool)
    for i, (name, _) in enumerate(cfg.blocks()):
        if name in HUMIDITY_TOP_BLOCKS:
            masked[i * L:(i + 1) * L] = p < 100.0
    assert masked.sum() == 3 * np.sum(p < 100.0) > 0
    # no compressed coordinate and no reconstruction residual depends on a masked element
    assert np.all(tr.projection_[masked] == 0) and np.all(tr.reconstruction_[masked] == 0)
    # the tropospheric humidity elements still count
    kept = np.flatnonzero(~masked[: 4 * L])
    assert np.all(np.any(tr.projection_[kept] != 0, axis=1))
    moved = x.copy()
    moved[:, masked] += 5.0
    np.testing.assert_allclose(tr.project(moved), tr.project(x), atol=1e-12)
    np.testing.assert_allclose(tr.transform(moved), tr.transform(x), atol=1e-9)
    # without the option every element counts
    plain = FeatureTransform(config=FeatureConfig(**{**json.loads(cfg.to_json()), "humidity_top_hpa": 0.0}),
                             n_levels=L, pressure_hpa=p).fit(x)
    assert np.any(plain.projection_[masked] != 0)
    with pytest.raises(ValueError, match="humidity_top_hpa needs pressure_hpa"):
        FeatureTransform(config=cfg, n_levels=L).fit(x)
    for bad in (-1.0, float("nan"), True):
        with pytest.raises(ValueError, match="humidity_top_hpa must be a number >= 0"):
            FeatureConfig(humidity_top_hpa=bad)


def test_recipe_refuses_a_negative_humidity_top():
    with pytest.raises(ValueError, match=r"features.humidity_top_hpa' must be a number >= 0"):
        Recipe.from_toml('name = "x"\n[features]\nhumidity_top_hpa = -5.0\n', "bad.toml")
    assert Recipe.from_toml('name = "x"\n[features]\nhumidity_top_hpa = 100\n', "ok.toml").feature_config(
    ).humidity_top_hpa == 100.0


def test_one_kernel_per_channel_uses_geometric_mean_coefficients():
    from rtemu.features import channel_kernels_of
    from rtemu.instrument import Instrument

    inst = Instrument.from_toml(_GRAY_TOML)
    collapsed = channel_kernels_of(inst, one_per_channel=True)
    assert [len(c) for c in collapsed] == [1, 1, 1]
    assert collapsed[0] == channel_kernels_of(inst)[0]  # one sub-band: unchanged
    # two sub-bands (weights 0.3, 0.7): dry 1e-4 and 1e-6 -> 1e-4**0.3 * 1e-6**0.7; the line
    # coefficient is zero in one sub-band, so zero
    (w, dry, line, cont), = collapsed[2]
    assert (w, line, cont) == (1.0, 0.0, 0.0)
    assert dry == pytest.approx(1e-4**0.3 * 1e-6**0.7, rel=1e-12)
    with pytest.raises(ValueError, match=r"instrument_kernels' must be one of \['none', 'bands', 'channels'\]"):
        Recipe.from_toml('name = "x"\n[features]\ninstrument_kernels = true\n', "bad.toml")
