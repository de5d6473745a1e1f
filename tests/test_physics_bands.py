"""Sub-bands with their own power laws, (ln p, T) absorption tables and Planck positions.

The operator contract (tests/test_operator_contract.py) runs the Jacobian, tangent-linear
and adjoint checks over the INVENTED instruments of tests/physics_instruments.py; here:
hand-computed radiances against an independent Planck function (scipy.constants, CODATA
2018), the table interpolation against an analytic bilinear ln k, a table that reproduces a
power law, per-level Jacobians with a table curved in T, zero-thickness layers, band-less
channels, and the sampling job.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.constants as sc

import physics_instruments
from conftest import demo_pressure_grid, us1976_temperature_profile
from rtemu import physics, sampling
from rtemu._checks import input_names
from rtemu.instrument import AbsorptionTables, Instrument, load_instrument


# -- an independent Planck function: scipy.constants (CODATA 2018), SI formula -----------------
def planck_si(position, temperature, microwave):
    """B [W m-2 sr-1 Hz-1] at [GHz], or [W m-2 sr-1 (cm-1)-1] at [cm-1]."""
    if microwave:
        nu = position * 1e9
        return 2 * sc.h * nu**3 / sc.c**2 / np.expm1(sc.h * nu / (sc.k * temperature))
    k = position * 100.0  # [m-1]
    return 100.0 * 2 * sc.h * sc.c**2 * k**3 / np.expm1(sc.h * sc.c * k / (sc.k * temperature))


def inverse_planck_si(position, radiance, microwave):
    """Brightness temperature [K] of ``radiance`` by bisection on :func:`planck_si`."""
    lo, hi = 1.0, 1000.0
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if planck_si(position, mid, microwave) < radiance else (lo, mid)
    return 0.5 * (lo + hi)


def one_channel(band: str, position: str = "wavenumber_cm1 = 700.0", absorbers: str = "") -> Instrument:
    text = f'''name = "one-band"
description = "INVENTED test instrument"
[absorbers.dry]
pressure_exponent = 1.0
temperature_exponent = 0.8
{absorbers}
[[channels]]
id = "c"
{position}
noise_k = 0.1
bands = [ {band} ]
'''
    return Instrument.from_toml(text, "one-band.toml")


@pytest.mark.parametrize("band_position", [None, 705.0])
def test_one_layer_by_hand_with_band_laws(band_position):
    """One layer over a black surface: R = B_b(Ts) e^-d/mu + B_b(T)(1 - e^-d/mu), with
    d from eq. 3 by hand (the band's own laws), B_b at the band's position and the BT the
    inverse Planck at the channel's (scipy.constants)."""
    extra = "" if band_position is None else f", wavenumber_cm1 = {band_position}"
    inst = one_channel("{ weight = 1.0, dry = 2e-4, h2o = 0.05, continuum = 0.4, dry_pressure_exponent = 1.3, "
                       "dry_temperature_exponent = -0.4, h2o_pressure_exponent = 0.6, h2o_temperature_exponent = 2.2, "
                       "continuum_temperature_exponent = 5.0" + extra + " }")
    p, t, q, ts, zen = np.array([1000.0, 500.0]), 250.0, 4e-3, 300.0, 40.0
    dm = 500.0 * 100.0 / sc.g  # [kg m-2]; scipy.constants.g is standard gravity 9.80665
    pm, tr = 750.0, 273.15 / t
    e = q * pm / (0.622 + 0.378 * q)
    d = (2e-4 * (pm / 1013.25) ** 1.3 * tr**-0.4 * (1 - q) * dm
         + 0.05 * (pm / 1013.25) ** 0.6 * tr**2.2 * q * dm
         + 0.4 * (e / 1013.25) * tr**5.0 * q * dm)
    trans = np.exp(-d / np.cos(np.deg2rad(zen)))
    position = 700.0 if band_position is None else band_position
    radiance = planck_si(position, ts, False) * trans + planck_si(position, t, False) * (1 - trans)
    expected = inverse_planck_si(700.0, radiance, False)
    out = physics.transfer(inst, p, [t, t], [q, q], ts, [1.0], zen)
    assert 0.05 < trans < 0.95  # the layer is neither transparent nor opaque
    assert out["brightness_temperature"][0, 0] == pytest.approx(expected, abs=1e-9)


def test_sidebands_isothermal_black_surface():
    """Isothermal air over a black surface at the same T: each sideband gives B_b(T)
    whatever its absorption, so BT = B_c^-1(mean of B_b(T)), above T (scipy.constants)."""
    inst = one_channel("{ weight = 0.5, dry = 3e-4, frequency_ghz = 116.5 }, "
                       "{ weight = 0.5, dry = 1e-3, dry_pressure_exponent = 0.5, frequency_ghz = 119.5 }",
                       position="frequency_ghz = 118.0")
    p = demo_pressure_grid(30)
    out = physics.transfer(inst, p, np.full(30, 250.0), np.full(30, 1e-3), 250.0, [1.0], 20.0)
    mean = 0.5 * (planck_si(116.5, 250.0, True) + planck_si(119.5, 250.0, True))
    expected = inverse_planck_si(118.0, mean, True)
    assert expected - 250.0 > 0.02  # one Planck function at the centre would give 250 K
    assert out["brightness_temperature"][0, 0] == pytest.approx(expected, abs=1e-9)


def test_band_at_the_channel_position_is_the_plain_band(small_profiles):
    plain = one_channel("{ weight = 0.4, dry = 3e-4 }, { weight = 0.6, dry = 2e-3, h2o = 0.02 }")
    placed = one_channel("{ weight = 0.4, dry = 3e-4, wavenumber_cm1 = 700.0 }, "
                         "{ weight = 0.6, dry = 2e-3, h2o = 0.02, wavenumber_cm1 = 700.0 }")
    ds = small_profiles(n=4, instrument=plain)
    a = physics.simulate(plain, ds, jacobian=True)
    b = physics.simulate(placed, ds, jacobian=True)
    for name in ("brightness_temperature", *physics.JACOBIAN_NAMES):
        np.testing.assert_array_equal(a[name].values, b[name].values)


def test_band_laws_equal_to_the_defaults_give_the_default_band(small_profiles):
    """A band repeating the [absorbers.*] laws (computed by the per-band route) gives the
    default band's numbers (computed by the shared-path route) to round-off."""
    band = "weight = 1.0, dry = 1e-3, h2o = 0.03, continuum = 0.3"
    absorbers = "[absorbers.h2o]\ntemperature_exponent = 1.5\n[absorbers.continuum]\ntemperature_exponent = 3.0"
    default = one_channel("{ %s }" % band, absorbers=absorbers)
    own = one_channel("{ %s, dry_pressure_exponent = 1.0, dry_temperature_exponent = 0.8, "
                      "h2o_temperature_exponent = 1.5, continuum_temperature_exponent = 3.0 }" % band,
                      absorbers=absorbers)
    assert own.channels[0].bands[0].has_own_laws
    ds = small_profiles(n=4, instrument=default)
    a = physics.simulate(default, ds, jacobian=True)
    b = physics.simulate(own, ds, jacobian=True)
    for name in ("brightness_temperature", *physics.JACOBIAN_NAMES):
        np.testing.assert_allclose(b[name].values, a[name].values, rtol=1e-11, atol=1e-13 * np.abs(a[name].values).max())


# -- table interpolation --------------------------------------------------------------------------
def _random_tables(seed=0, count=3):
    rng = np.random.default_rng(seed)
    p = np.geomspace(0.005, 1100.0, 12)
    t = np.linspace(150.0, 350.0, 6)
    return AbsorptionTables(pressure_hpa=p, temperature_k=t, ln_k=rng.normal(-5.0, 2.0, (count, 3, p.size, t.size)),
                            mask=np.ones((count, 3), dtype=bool))


def test_interpolation_exact_on_grid_nodes():
    tables = _random_tables()
    pp, tt = np.meshgrid(tables.pressure_hpa, tables.temperature_k, indexing="ij")
    cell = physics.table_interpolation(tables, pp, tt)
    for a in range(3):
        value, _ = physics.interpolate_ln_k(tables.ln_k[:, a], cell)
        np.testing.assert_array_equal(value, tables.ln_k[:, a])


def test_interpolation_of_a_bilinear_ln_k_is_exact():
    """ln k = c0 + c1 ln p + c2 T + c3 T ln p is bilinear in (ln p, T): reproduced inside the
    table, extrapolated exactly in T beyond it, clamped in ln p; d ln k/dT = c2 + c3 ln p."""
    c0, c1, c2, c3 = -4.0, 0.9, -0.01, 0.002
    p_grid = np.geomspace(0.005, 1100.0, 17)
    t_grid = np.linspace(150.0, 350.0, 11)
    x = np.log(p_grid)[:, None]
    ln_k = c0 + c1 * x + c2 * t_grid + c3 * t_grid * x
    tables = AbsorptionTables(pressure_hpa=p_grid, temperature_k=t_grid, ln_k=np.stack([ln_k] * 3)[None],
                              mask=np.ones((1, 3), dtype=bool))
    rng = np.random.default_rng(4)
    p = np.exp(rng.uniform(np.log(0.005), np.log(1100.0), 500))
    t = rng.uniform(110.0, 390.0, 500)  # beyond 150-350 K on both sides
    value, slope = physics.interpolate_ln_k(tables.ln_k[:, 0], physics.table_interpolation(tables, p, t))
    lnp = np.log(p)
    np.testing.assert_allclose(value[0], c0 + c1 * lnp + c2 * t + c3 * t * lnp, rtol=0, atol=1e-12)
    np.testing.assert_allclose(slope[0], c2 + c3 * lnp, rtol=0, atol=1e-12)
    # ln p clamped: beyond the grid the value of its end
    outside = np.array([0.001, 1150.0])
    value, _ = physics.interpolate_ln_k(tables.ln_k[:, 0], physics.table_interpolation(tables, outside, [250.0, 250.0]))
    edge = np.log([0.005, 1100.0])
    np.testing.assert_allclose(value[0], c0 + c1 * edge + c2 * 250.0 + c3 * 250.0 * edge, rtol=0, atol=1e-12)


def test_table_reproducing_a_power_law_gives_the_power_law_band(small_profiles):
    """ln k = ln k0 + n ln(p / p_ref) (temperature exponent 0) is linear in ln p: a table of it
    gives the power-law band's BTs and Jacobians to round-off, and the instrument-default
    band's too."""
    n_dry, n_h2o, k0 = 1.3, 0.6, np.array([4e-4, 0.03, 0.2])
    p_grid = np.geomspace(0.005, 1100.0, 9)
    x = np.log(p_grid / 1013.25)
    ln_k = np.log(k0)[:, None, None] + np.array([n_dry, n_h2o, 0.0])[:, None, None] * x[None, :, None]
    tables = AbsorptionTables(pressure_hpa=p_grid, temperature_k=[150.0, 250.0, 350.0],
                              ln_k=np.broadcast_to(ln_k, (3, 9, 3))[None], mask=np.ones((1, 3), dtype=bool))
    head = ('name = "power-law"\ndescription = "INVENTED"\nabsorption_tables = "t.nc"\n'
            "[absorbers.dry]\npressure_exponent = %r\n[absorbers.h2o]\npressure_exponent = %r\n") % (n_dry, n_h2o)
    band = "weight = 1.0, dry = 4e-4, h2o = 0.03, continuum = 0.2"
    bands = {
        "default": "{ %s }" % band,
        "law": "{ %s, dry_pressure_exponent = %r, h2o_pressure_exponent = %r }" % (band, n_dry, n_h2o),
        "table": "{ weight = 1.0, table = 0 }",
    }
    # The law band's defaults differ: its own exponents must be the ones used.
    law_head = head.replace("= %r\n[" % n_dry, "= 0.5\n[").replace("= %r\n" % n_h2o, "= 2.0\n")
    kinds = {kind: Instrument.from_toml((law_head if kind == "law" else head) + _channel(b), kind,
                                        absorption_tables=tables) for kind, b in bands.items()}
    assert kinds["law"].h2o.pressure_exponent == 2.0
    ds = small_profiles(n=4, instrument=kinds["table"])
    out = {kind: physics.simulate(inst, ds, jacobian=True) for kind, inst in kinds.items()}
    for name in ("brightness_temperature", *physics.JACOBIAN_NAMES):
        ref = out["law"][name].values
        for kind in ("default", "table"):
            np.testing.assert_allclose(out[kind][name].values, ref, rtol=1e-10,
                                       atol=1e-12 * np.abs(ref).max(), err_msg=f"{kind} {name}")


def _channel(bands: str) -> str:
    return f'\n[[channels]]\nid = "c"\nwavenumber_cm1 = 800.0\nnoise_k = 0.1\nbands = [ {bands} ]\n'


def test_jacobians_per_level_with_a_table_curved_in_t(tmp_path, us1976_temperature):
    """Every level's T and q Jacobian against central differences, with tables quadratic in
    T (kinks at the nodes: the profile's layer means are kept off them)."""
    base = physics_instruments.smooth_tables()
    t_grid = base.temperature_k
    curved = base.ln_k + 3e-5 * (t_grid - 250.0) ** 2
    tables = AbsorptionTables(pressure_hpa=base.pressure_hpa, temperature_k=t_grid, ln_k=curved, mask=base.mask)
    inst = physics_instruments.write_instrument(tmp_path, "curved", physics_instruments.SIDEBAND_CHANNELS, tables)
    p = demo_pressure_grid(25)
    t = us1976_temperature(p) + 1.7
    tm = 0.5 * (t[:-1] + t[1:])
    assert np.abs(tm[:, None] - t_grid[None, :]).min() > 0.01
    q = np.maximum(0.012 * (p / p[0]) ** 3, 3e-6)
    em = np.array([0.7, 0.8, 0.95])
    args = (p, t, q, 295.0, em, 35.0)
    out = physics.transfer(inst, *args, jacobian=True)

    def bt(t_, q_):
        return physics.transfer(inst, p, t_, q_, 295.0, em, 35.0)["brightness_temperature"][0]

    for level in range(p.size):
        h = np.zeros(p.size)
        h[level] = 1e-4
        fd_t = (bt(t + h, q) - bt(t - h, q)) / 2e-4
        dq = h / 1e-4 * q[level] * 1e-5
        fd_q = (bt(t, q + dq) - bt(t, q - dq)) / (2 * dq[level])
        np.testing.assert_allclose(out["jacobian_air_temperature"][0, :, level], fd_t, rtol=1e-5, atol=1e-7)
        np.testing.assert_allclose(out["jacobian_specific_humidity"][0, :, level], fd_q, rtol=1e-5,
                                   atol=1e-5 * np.abs(out["jacobian_specific_humidity"][0]).max())


@pytest.mark.parametrize("build", [physics_instruments.law_instrument, physics_instruments.table_instrument,
                                   physics_instruments.sideband_instrument])
def test_zero_thickness_layer_has_zero_optical_depth(build, tmp_path):
    """A repeated level (zero mass path) adds exactly zero optical depth and leaves the BT."""
    inst = build(tmp_path)
    p = demo_pressure_grid(20)
    t = us1976_temperature_profile(p)
    q = np.maximum(0.01 * (p / p[0]) ** 3, 3e-6)
    twice = np.insert(np.arange(20), 6, 6)  # level 6 repeated
    bands = physics._Bands(inst)
    _, tau, _, _ = physics._optical_depths(bands, p[None, twice], t[None, twice], q[None, twice],
                                           np.ones((1, 1)), True)
    assert (tau[0, :, 6] == 0.0).all() and (tau[0, :, :6] > 0).all()
    em = np.full(len(inst.channels), 0.8)
    plain = physics.transfer(inst, p, t, q, 290.0, em, 10.0)["brightness_temperature"]
    padded = physics.transfer(inst, p[twice], t[twice], q[twice], 290.0, em, 10.0)["brightness_temperature"]
    np.testing.assert_allclose(padded, plain, rtol=0, atol=1e-10)


def test_block_size_bounded_by_memory_and_results_independent(tmp_path, small_profiles):
    inst = physics_instruments.table_instrument(tmp_path)
    ds = small_profiles(n=5, instrument=inst)
    whole = physics.simulate(inst, ds, jacobian=True)
    single = physics.simulate(inst, ds, jacobian=True, block_size=1)
    for name in ("brightness_temperature", *physics.JACOBIAN_NAMES):
        np.testing.assert_array_equal(single[name].values, whole[name].values)
    # 16 channels x 64 sub-bands x 100 levels: the budget caps the block well below 512
    bands = physics._Bands(inst)
    bands.n_bands = 16 * 64
    block = bands.block_size(physics.DEFAULT_BLOCK_SIZE, 99)
    assert 1 <= block < physics.DEFAULT_BLOCK_SIZE
    assert block * physics._WORK_ARRAYS * 16 * 64 * 99 * 8 <= physics.WORK_BYTES


# -- band-less channels ---------------------------------------------------------------------------
BANDLESS = '''name = "other-model"
description = "INVENTED: channels of another model's instrument"
[[channels]]
id = "a"
frequency_ghz = 23.8
noise_k = 0.3
[[channels]]
id = "b"
wavenumber_cm1 = 900.0
noise_k = 0.1
bands = [ { weight = 1.0, h2o = 0.01 } ]
[[channels]]
id = "c"
wavenumber_cm1 = 1400.0
noise_k = 0.2
'''


def test_band_less_channels_parse_and_the_physics_refuses_them(small_profiles):
    inst = Instrument.from_toml(BANDLESS, "other.toml")
    assert not inst.has_bands
    assert inst.channels_without_bands == ("a", "c")
    assert inst.channels[0].bands == () and inst.channels[1].has_bands
    assert Instrument.from_toml(inst.to_toml()) == inst
    ds = small_profiles(n=2, instrument=inst)
    with pytest.raises(ValueError, match=r"instrument 'other-model': channel\(s\) \['a', 'c'\] have no 'bands'"):
        physics.simulate(inst, ds)
    with pytest.raises(ValueError, match=r"channel\(s\) \['a', 'c'\]"):
        physics.weighting_functions(inst, [1000.0, 500.0], [280.0, 260.0], [1e-3, 5e-4])
    # a selection of the channels with bands computes
    assert np.isfinite(physics.simulate(inst.select(["b"]), ds.isel(channel=[1]))["brightness_temperature"]).all()


def test_without_bands_keeps_ids_positions_noise(tmp_path):
    inst = physics_instruments.sideband_instrument(tmp_path)
    bare = inst.without_bands()
    assert bare.channel_ids == inst.channel_ids
    assert [c.frequency_ghz for c in bare.channels] == [c.frequency_ghz for c in inst.channels]
    np.testing.assert_array_equal(bare.noise_k, inst.noise_k)
    assert bare.absorption_tables is None and not bare.has_bands
    assert Instrument.from_toml(bare.to_toml()) == bare  # no table file needed


# -- the sampling job carries the tables ----------------------------------------------------------
def test_sampling_job_with_tables(tmp_path):
    inst = physics_instruments.table_instrument(tmp_path)
    grid = demo_pressure_grid(20)
    arrays = sampling._compute_chunk(inst.to_toml(), 3, 0, 4, grid, True, absorption_tables=inst.absorption_tables)
    states = sampling.draw_states(4, seed=3, pressure_hpa=grid, channels=inst)
    direct = physics.simulate(load_instrument(tmp_path / "table-test.toml"), states[input_names(states)])
    np.testing.assert_array_equal(arrays["brightness_temperature"], direct["brightness_temperature"].values)
    with pytest.raises(ValueError, match="absorption_tables"):
        sampling._compute_chunk(inst.to_toml(), 3, 0, 4, grid, False)
