"""Line spectroscopy: line shapes, file formats, the line-by-line teacher, the correlated-k builder."""

from __future__ import annotations

import math
import sys

import numpy as np
import pytest
import scipy.constants as sc
import xarray as xr
from scipy import integrate, stats
from scipy.special import voigt_profile

from rtemu import physics
from rtemu.instrument import AbsorberLaw, Band, Channel, Instrument
from rtemu.spectroscopy import ckd, lines
from rtemu.spectroscopy.linebyline import LineByLineOperator

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

# -- small INVENTED test data ---------------------------------------------------------------
MW_LINES = """\
# INVENTED test lines
@format = rtemu-lines 1
@title = INVENTED test microwave lines
@unit = GHz
@shape = vvw
@reference_temperature_k = 300.0
@reference_pressure_hpa = 1013.25
@molar_mass_g_mol.dry = 32.0
@partition_exponent.dry = 1.0
@molar_mass_g_mol.h2o = 18.0
@partition_exponent.h2o = 1.5
line dry 56.0 4.0e-3 10.0 1.0e-3 0.8
line dry 58.0 5.0e-3 2.0 1.0e-3 0.8
line h2o 183.0 8.0 135.0 2.9e-3 0.7
continuum 20.0 0.02 3.0
continuum 200.0 2.0 3.0
"""

IR_LINES = """\
@format = rtemu-lines 1
@title = INVENTED test infrared lines
@unit = cm-1
@shape = voigt
@reference_temperature_k = 300.0
@reference_pressure_hpa = 1013.25
@cutoff = 10.0
@molar_mass_g_mol.dry = 44.0
@partition_exponent.dry = 1.0
@molar_mass_g_mol.h2o = 18.0
@partition_exponent.h2o = 1.5
line dry 700.0 0.05 50.0 7.5e-5 0.75
line dry 701.5 0.03 80.0 7.5e-5 0.75
line h2o 700.6 2.0 300.0 1.0e-4 0.7
"""

PASSBANDS = """\
name = "test-ck"
description = "INVENTED test instrument"
line_lists = ["mw.lines", "ir.lines"]

[[channels]]
id = "t-wing"
frequency_ghz = 54.0
width_ghz = 0.4
noise_k = 0.2
samples = 40

[[channels]]
id = "t-dsb"
frequency_ghz = 57.0
sideband_offsets_ghz = [-0.5, 0.5]
width_ghz = 0.2
noise_k = 0.2
samples = 30

[[channels]]
id = "h-dsb"
frequency_ghz = 183.0
sideband_offsets_ghz = [-2.0, 2.0]
width_ghz = 1.0
noise_k = 0.5
samples = 30

[[channels]]
id = "ir"
wavenumber_cm1 = 700.3
width_cm1 = 0.5
shape = "gaussian"
noise_k = 0.2
samples = 1500
"""


@pytest.fixture(scope="module")
def passband_file(tmp_path_factory):
    folder = tmp_path_factory.mktemp("spectro")
    (folder / "mw.lines").write_text(MW_LINES)
    (folder / "ir.lines").write_text(IR_LINES)
    path = folder / "test.passbands"
    path.write_text(PASSBANDS)
    return path


@pytest.fixture(scope="module")
def atmospheres():
    return ckd.reference_atmospheres(np.geomspace(1013.25, 0.5, 30))


def _dataset(columns, emissivity=0.9):
    p = np.stack([c[0] for c in columns])
    n = len(columns)
    return xr.Dataset({
        "air_pressure": (("profile", "level"), p, {"units": "hPa"}),
        "air_temperature": (("profile", "level"), np.stack([c[1] for c in columns]), {"units": "K"}),
        "specific_humidity": (("profile", "level"), np.stack([c[2] for c in columns]), {"units": "kg kg-1"}),
        "surface_temperature": (("profile",), np.array([c[1][0] for c in columns]), {"units": "K"}),
        "surface_emissivity": (("profile",), np.full(n, emissivity), {"units": "1"}),
        "sensor_zenith_angle": (("profile",), np.linspace(0.0, 40.0, n), {"units": "degree"}),
    })


# -- line shapes -------------------------------------------------------------------------------
def test_lorentz_is_normalised_and_is_the_cauchy_density():
    # scipy.stats.cauchy: the Lorentz profile is the Cauchy density with scale = HWHM.
    gamma = 0.07
    total, _ = integrate.quad(lambda x: lines.lorentz(x, gamma), -np.inf, np.inf)
    assert total == pytest.approx(1.0, rel=1e-9)
    x = np.linspace(-3, 3, 101)
    np.testing.assert_allclose(lines.lorentz(x, gamma), stats.cauchy.pdf(x, scale=gamma), rtol=1e-12)


def _vvw_antiderivative(nu, nu0, gamma):
    # Derived by hand: with x = nu - nu0 and y = nu + nu0, (nu/nu0)^2 gamma / (x^2 + gamma^2)
    # integrates to [(nu0^2 - gamma^2) atan(x/gamma) + nu0 gamma ln(x^2 + gamma^2) + gamma x]
    # / (pi nu0^2), and the y term likewise with the sign of the log term reversed.
    x, y = nu - nu0, nu + nu0
    f1 = (nu0**2 - gamma**2) * np.arctan(x / gamma) + nu0 * gamma * np.log(x * x + gamma**2) + gamma * x
    f2 = (nu0**2 - gamma**2) * np.arctan(y / gamma) - nu0 * gamma * np.log(y * y + gamma**2) + gamma * y
    return (f1 + f2) / (np.pi * nu0**2)


@pytest.mark.parametrize("nu0, gamma, a, b", [(60.0, 1.0, 40.0, 80.0), (22.2, 3.0, 1.0, 50.0), (183.0, 0.01, 182.0, 184.5)])
def test_van_vleck_weisskopf_matches_its_closed_form_integral(nu0, gamma, a, b):
    numeric, _ = integrate.quad(lambda nu: lines.van_vleck_weisskopf(nu, nu0, gamma), a, b, points=[nu0], limit=200)
    exact = _vvw_antiderivative(b, nu0, gamma) - _vvw_antiderivative(a, nu0, gamma)
    assert numeric == pytest.approx(exact, rel=1e-8)


def test_van_vleck_weisskopf_is_normalised_near_the_line_and_tends_to_lorentz():
    # Analytic limit (Van Vleck and Weisskopf 1945): for gamma << nu0 the profile is a
    # Lorentz line of unit area; the excess over [0, 2 nu0] is O(gamma / nu0).
    nu0, gamma = 60.0, 0.01
    area = _vvw_antiderivative(2 * nu0, nu0, gamma) - _vvw_antiderivative(1e-9, nu0, gamma)
    assert area == pytest.approx(1.0, abs=5 * gamma / nu0)
    x = np.linspace(-0.05, 0.05, 11)
    np.testing.assert_allclose(lines.van_vleck_weisskopf(nu0 + x, nu0, gamma), lines.lorentz(x, gamma), rtol=3e-3)


def test_voigt_is_scipy_normalised_and_has_its_two_limits():
    x = np.linspace(-0.02, 0.02, 81)
    np.testing.assert_array_equal(lines.voigt(x, 1e-3, 2e-3), voigt_profile(x, 1e-3, 2e-3))
    total, _ = integrate.quad(lambda v: lines.voigt(v, 1e-3, 2e-3), -np.inf, np.inf)
    assert total == pytest.approx(1.0, rel=1e-7)
    # Limits: no collisions -> Gaussian (scipy.stats.norm); no Doppler -> Lorentz (Cauchy).
    np.testing.assert_allclose(lines.voigt(x, 5e-3, 1e-12), stats.norm.pdf(x, scale=5e-3), rtol=1e-6)
    np.testing.assert_allclose(lines.voigt(x, 1e-9, 5e-3), stats.cauchy.pdf(x, scale=5e-3), rtol=1e-5)


def test_voigt_derivatives_from_the_faddeeva_function():
    x = np.linspace(-0.01, 0.01, 41)
    sigma, gamma = 1.3e-3, 0.8e-3
    v, dv_ds, dv_dg = lines.voigt_with_derivatives(x, sigma, gamma)
    np.testing.assert_allclose(v, voigt_profile(x, sigma, gamma), rtol=1e-10)
    h = 1e-8
    fd_s = (voigt_profile(x, sigma + h, gamma) - voigt_profile(x, sigma - h, gamma)) / (2 * h)
    fd_g = (voigt_profile(x, sigma, gamma + h) - voigt_profile(x, sigma, gamma - h)) / (2 * h)
    np.testing.assert_allclose(dv_ds, fd_s, rtol=1e-5, atol=1e-6 * np.abs(fd_s).max())
    np.testing.assert_allclose(dv_dg, fd_g, rtol=1e-5, atol=1e-6 * np.abs(fd_g).max())


def test_doppler_width_against_the_formula_with_scipy_constants():
    # HWHM = nu0 / c sqrt(2 ln2 k T / m) (Petty 2006, sec. 9.3; Liou 2002 eq. 1.3.11, from memory),
    # m from the molar mass and the atomic mass constant (scipy.constants, CODATA).
    nu0, t, molar = 700.0, 250.0, 44.0
    m = molar * sc.physical_constants["atomic mass constant"][0]
    hwhm = nu0 / sc.c * math.sqrt(2.0 * math.log(2.0) * sc.k * t / m)
    sigma = lines.doppler_sigma(nu0, t, molar)
    assert sigma * math.sqrt(2.0 * math.log(2.0)) == pytest.approx(hwhm, rel=1e-8)


def test_intensity_scaling_is_one_at_reference_and_its_log_derivative_is_exact():
    ratio, dlog = lines.intensity_scaling(np.array([300.0, 220.0]), 300.0, 150.0, 700.0, 1.5)
    assert ratio[0] == pytest.approx(1.0, rel=1e-14)
    h = 1e-4
    up, _ = lines.intensity_scaling(220.0 + h, 300.0, 150.0, 700.0, 1.5)
    dn, _ = lines.intensity_scaling(220.0 - h, 300.0, 150.0, 700.0, 1.5)
    assert dlog[1] == pytest.approx((np.log(up) - np.log(dn)) / (2 * h), rel=1e-6)


@pytest.mark.parametrize("text, unit, nu", [(MW_LINES, "GHz", np.linspace(55.0, 59.0, 30)),
                                             (IR_LINES, "cm-1", np.linspace(699.5, 701.0, 40))])
def test_absorption_temperature_derivative_matches_finite_differences(text, unit, nu):
    ll = lines.parse_line_list(text)
    p, t = np.array([900.0, 30.0, 1.0]), np.array([280.0, 220.0, 250.0])
    k, dk = lines.absorption(ll, nu, p, t, unit, derivative=True)
    np.testing.assert_allclose(k, lines.absorption(ll, nu, p, t, unit))
    h = 1e-3
    fd = (lines.absorption(ll, nu, p, t + h, unit) - lines.absorption(ll, nu, p, t - h, unit)) / (2 * h)
    np.testing.assert_allclose(dk, fd, rtol=1e-5, atol=1e-7 * np.abs(fd).max())


def test_spectral_units_give_the_same_absorption():
    ll = lines.parse_line_list(MW_LINES)
    nu = np.linspace(55.0, 59.0, 20)
    k_ghz = lines.absorption(ll, nu, [500.0], [260.0], "GHz")
    k_cm1 = lines.absorption(ll, nu / lines.GHZ_PER_CM1, [500.0], [260.0], "cm-1")
    np.testing.assert_allclose(k_ghz, k_cm1, rtol=1e-12)


# -- file formats ------------------------------------------------------------------------------
@pytest.mark.parametrize("edit, message", [
    (("line dry 56.0 4.0e-3", "line co2 56.0 4.0e-3"), "line 12: key 'absorber'"),
    (("line dry 58.0 5.0e-3 2.0 1.0e-3 0.8", "line dry 58.0 five 2.0 1.0e-3 0.8"), "line 13: key 'intensity' must be a number"),
    (("line dry 58.0 5.0e-3 2.0 1.0e-3 0.8", "line dry 58.0 5.0e-3 2.0 0.0 0.8"), "line 13: key 'half_width' must be > 0"),
    (("@shape = vvw", "@shape = gauss"), "line 5: key 'shape'"),
    (("@unit = GHz\n", ""), "missing header key '@unit'"),
    (("continuum 20.0", "bogus 20.0"), "line 15: unknown record 'bogus'"),
    (("@cutoff", "@cutoff"), None),
])
def test_line_list_errors_name_file_line_and_key(edit, message):
    text = MW_LINES.replace(*edit)
    if message is None:
        text = text.replace("@molar_mass_g_mol.dry = 32.0", "@molar_mass_g_mol.dry = 32.0\n@speed = 3")
        message = "line 9: unknown header key 'speed'"
    with pytest.raises(ValueError, match=message) as err:
        lines.parse_line_list(text, "my.lines")
    assert str(err.value).startswith("my.lines")


def test_passband_errors_name_file_channel_and_key(tmp_path, passband_file):
    for name in ("mw.lines", "ir.lines"):
        (tmp_path / name).write_text((passband_file.parent / name).read_text())
    cases = [
        ("samples = 40", "samples = 0", "channel 't-wing': key 'samples'"),
        ("width_ghz = 0.4", "width_cm1 = 0.4", "channel 't-wing': unknown key"),
        ('shape = "gaussian"', 'shape = "sinc"', "channel 'ir': key 'shape'"),
        ('"ir.lines"', '"missing.lines"', "missing.lines: cannot read line list"),
    ]
    for old, new, message in cases:
        path = tmp_path / "bad.passbands"
        path.write_text(PASSBANDS.replace(old, new, 1))
        with pytest.raises(ValueError, match=message):
            lines.read_passbands(path)


def test_sideband_grids_sum_to_one_and_sit_at_the_offsets(passband_file):
    pbf = lines.read_passbands(passband_file)
    dsb = pbf.channels[1]
    grids = dsb.sideband_grids()
    assert [g[0] for g in grids] == [56.5, 57.5]
    assert sum(g[2].sum() for g in grids) == pytest.approx(1.0)
    assert all(abs(g[1].mean() - g[0]) < 1e-12 for g in grids)


# -- the line-by-line teacher --------------------------------------------------------------------
def test_far_wing_line_by_line_equals_the_gray_physics(tmp_path, atmospheres):
    # Far from a Lorentz-like line (10 cm-1 away, widths <= 0.08 cm-1) k = S gamma0 p (T_ref/T)^n
    # / (pi dnu^2) to a relative 1e-4: exactly the physics' power law with n_p = 1, n_T = n.
    # E'' = 0, partition exponent 0 and a 2500 cm-1 line (stimulated emission < 1e-5) make the
    # intensity constant. Forward and Jacobians must agree with rtemu.physics.
    text = IR_LINES.split("line dry")[0].replace("@cutoff = 10.0\n", "").replace(
        "@partition_exponent.dry = 1.0", "@partition_exponent.dry = 0.0")
    text += "line dry 2510.0 40.0 0.0 7.5e-5 0.75\n"
    (tmp_path / "wing.lines").write_text(text)
    (tmp_path / "wing.passbands").write_text(
        'name = "wing"\ndescription = "INVENTED"\nline_lists = ["wing.lines"]\n'
        '[[channels]]\nid = "w"\nwavenumber_cm1 = 2500.0\nwidth_cm1 = 1e-4\nnoise_k = 0.1\nsamples = 1\n')
    op = LineByLineOperator(tmp_path / "wing.passbands")
    k_ref = 40.0 * 7.5e-5 * 1013.25 / (np.pi * 10.0**2)
    inst = Instrument("gray", "INVENTED", (Channel("w", None, 2500.0, 0.1, (Band(1.0, dry=k_ref),)),),
                      reference_pressure_hpa=1013.25, reference_temperature_k=300.0,
                      dry=AbsorberLaw(1.0, 0.75), h2o=AbsorberLaw(1.0, 0.0))
    ds = _dataset(list(atmospheres.values()))
    lbl = op.simulate(ds, jacobian=True)
    gray = physics.simulate(inst, ds, jacobian=True)
    np.testing.assert_allclose(lbl.brightness_temperature, gray.brightness_temperature, atol=2e-3)
    for name in physics.JACOBIAN_NAMES:
        scale = float(np.abs(gray[name]).max())
        np.testing.assert_allclose(lbl[name], gray[name], atol=2e-3 * scale)


def test_line_by_line_jacobians_match_finite_differences(passband_file, atmospheres):
    op = LineByLineOperator(passband_file)
    p, t, q = atmospheres["tropical"]
    em = np.full((1, 4), 0.7)
    args = (p[None], t[None], q[None], np.array([t[0] + 2.0]), em, np.array([20.0]))
    out = op.transfer(*args, jacobian=True)
    for level in (0, 5, 15):
        for name, index, step in (("jacobian_air_temperature", 1, 1e-3), ("jacobian_specific_humidity", 2, 1e-3 * q[level])):
            up = [a.copy() for a in args]
            dn = [a.copy() for a in args]
            up[index][0, level] += step
            dn[index][0, level] -= step
            fd = (op.transfer(*up)["brightness_temperature"] - op.transfer(*dn)["brightness_temperature"]) / (2 * step)
            np.testing.assert_allclose(out[name][0, :, level], fd[0], rtol=1e-4, atol=1e-7 * np.abs(out[name]).max())
    h = 1e-3
    up = op.transfer(*args[:3], args[3] + h, *args[4:])["brightness_temperature"]
    dn = op.transfer(*args[:3], args[3] - h, *args[4:])["brightness_temperature"]
    scale = np.abs(out["jacobian_surface_temperature"]).max()
    np.testing.assert_allclose(out["jacobian_surface_temperature"], (up - dn) / (2 * h), rtol=1e-5, atol=1e-8 * scale)
    up = op.transfer(*args[:4], em + h, args[5])["brightness_temperature"]
    dn = op.transfer(*args[:4], em - h, args[5])["brightness_temperature"]
    scale = np.abs(out["jacobian_surface_emissivity"]).max()
    np.testing.assert_allclose(out["jacobian_surface_emissivity"], (up - dn) / (2 * h), rtol=1e-5, atol=1e-8 * scale)


def test_line_by_line_operator_schema_checks_and_dask(passband_file, atmospheres):
    op = LineByLineOperator(passband_file)
    assert op.channels == ("t-wing", "t-dsb", "h-dsb", "ir")
    assert op.instrument.channel_ids == op.channels
    assert op.instrument.channels[0].frequency_ghz == 54.0 and op.instrument.channels[3].wavenumber_cm1 == 700.3
    ds = _dataset(list(atmospheres.values()))
    out = op.simulate(ds)
    assert out.brightness_temperature.dims == ("profile", "channel")
    assert list(out.channel.values) == list(op.channels)
    assert out.quality_flag.dtype == np.int32 and (out.quality_flag == 0).all()
    assert np.isfinite(out.brightness_temperature).all()
    threaded = LineByLineOperator(passband_file, scheduler="threads", workers=2, block_size=1).simulate(ds)
    np.testing.assert_array_equal(threaded.brightness_temperature, out.brightness_temperature)
    # Top-first levels give the same answer (the shared input checks flip them).
    flipped = ds.isel(level=slice(None, None, -1))
    np.testing.assert_allclose(op.simulate(flipped).brightness_temperature, out.brightness_temperature, rtol=1e-12)
    # One profile in Celsius labelled K (a whole file so labelled is refused as 'units?').
    bad = ds.copy()
    bad["air_temperature"] = xr.where(bad.profile == 1, bad.air_temperature - 273.15, bad.air_temperature,
                                      keep_attrs=True)
    with pytest.raises(ValueError, match="air_temperature: outside 100-400 K"):
        op.simulate(bad)
    masked = op.simulate(bad, errors="mask")
    bt = masked.brightness_temperature.values
    assert np.isnan(bt[1]).all() and np.isfinite(np.delete(bt, 1, axis=0)).all()


# -- correlated k ------------------------------------------------------------------------------
def test_k_distribution_of_one_lorentz_line_is_analytic():
    # Derived here (as in Goody and Yung 1989, sec. 6.6, from memory): on [-D, D] with a uniform
    # response, k(nu) = S g0 / (pi (nu^2 + g0^2)) decreases with |nu|, so the share with
    # k <= k(nu) is 1 - |nu| / D and the inverse distribution is
    #   k(g) = S g0 / (pi (g0^2 + D^2 (1 - g)^2)).
    # The line is symmetric, so the half interval [0, D] has the same distribution.
    s, g0, d = 2.0, 0.05, 1.0
    edges = np.linspace(0.0, d, 2001)
    nu = 0.5 * (edges[:-1] + edges[1:])
    weight = np.full(nu.size, 1.0 / nu.size)
    g, k_sorted = ckd.k_distribution(lines.lorentz(nu, g0) * s, weight)
    analytic = s * g0 / (np.pi * (g0**2 + d**2 * (1.0 - g) ** 2))
    np.testing.assert_allclose(k_sorted, analytic, rtol=1e-10)
    assert g[0] > 0 and g[-1] < 1 and np.all(np.diff(g) > 0)


def test_table_interpolation_follows_the_spec():
    # ln k linear in (ln p, T) is reproduced exactly, inside and beyond the T range; ln p is clamped.
    lnp, tt = np.meshgrid(np.log(ckd.TABLE_PRESSURE_HPA), ckd.TABLE_TEMPERATURE_K, indexing="ij")
    ln_k = 0.7 * lnp - 0.02 * tt + 1.0
    p = np.array([0.001, 3.0, 500.0, 5000.0])
    t = np.array([120.0, 200.0, 333.3, 380.0])
    got = ckd.interpolate_ln_k(ln_k, ckd.TABLE_PRESSURE_HPA, ckd.TABLE_TEMPERATURE_K, p, t)
    p_clamped = np.clip(p, ckd.TABLE_PRESSURE_HPA[0], ckd.TABLE_PRESSURE_HPA[-1])
    np.testing.assert_allclose(got, np.exp(0.7 * np.log(p_clamped) - 0.02 * t + 1.0), rtol=1e-12)


@pytest.fixture(scope="module")
def built(passband_file, atmospheres):
    return ckd.build_correlated_k(passband_file, max_count=64, pressure_hpa=atmospheres["us76"][0])


def test_builder_converges_and_matches_line_by_line(built, passband_file, atmospheres):
    for report in built.reports:
        # Measured on this test instrument: the microwave channels converge (<= 16 sub-bands);
        # the infrared one reaches the 64 cap with a last doubling change of 0.024 K.
        if report.id != "ir":
            assert report.converged and report.doubling_change_k <= 0.01, report
        else:
            assert report.sub_band_count > 32 and report.doubling_change_k < 0.05, report
        # Measured: |ck - LBL| <= 0.03 K on all (the correlation and table errors).
        assert max(abs(v) for v in report.lbl_difference_k.values()) < 0.05, report
    # More sub-bands get closer to the answer they converge to: the first doubling changes most.
    pbf = built.passbands
    sidebands = ckd._sidebands(pbf.channels[2], pbf.line_lists, built.p_ref, atmospheres["us76"])
    p, t, q = atmospheres["tropical"]
    bts = []
    for count in (1, 2, 4, 8, 16, 32):
        w, pos, ln_k, mask = ckd._reduce(sidebands, count)
        sub = ckd.SubBands(np.zeros(len(w), int), w, pos, ln_k, mask)
        bts.append(ckd.table_brightness_temperature(sub, ["GHz"], [183.0], built.p_ref, p, t, q, t[0], [0.6])[0])
    changes = np.abs(np.diff(bts))
    assert changes[-1] < changes[0] / 10


def _read_instrument(toml_path):
    """A minimal reader of the shared table spec, independent of the builder's arrays."""
    doc = tomllib.loads(toml_path.read_text())
    ds = xr.open_dataset(toml_path.parent / doc["absorption_tables"], engine="h5netcdf")
    channel, weight, position, table = [], [], [], []
    for c, ch in enumerate(doc["channels"]):
        key = "frequency_ghz" if "frequency_ghz" in ch else "wavenumber_cm1"
        for band in ch["bands"]:
            assert set(band) == {"weight", "table", key}
            channel.append(c)
            weight.append(band["weight"])
            position.append(band[key])
            table.append(band["table"])
    ln_k = np.stack([ds[f"ln_k_{a}"].values[table] for a in ("dry", "h2o", "continuum")], axis=1)
    sub = ckd.SubBands(np.array(channel), np.array(weight), np.array(position), ln_k,
                       ds["absorber_mask"].values[table])
    return doc, ds, sub


def test_written_files_follow_the_spec_and_round_trip(built, tmp_path, atmospheres):
    toml_path, nc_path = ckd.write_instrument(built, tmp_path / "test-ck.toml")
    doc, ds, sub = _read_instrument(toml_path)
    assert doc["name"] == "test-ck" and "INVENTED" in doc["description"]
    assert doc["absorption_tables"] == nc_path.name
    assert "INVENTED" in ds.attrs["comment"] and ds.attrs["title"]
    assert dict(ds.sizes) == {"table": len(built.sub_bands.weight), "pressure": 96, "temperature": 21, "absorber": 3}
    for coord, lo, hi in (("pressure", 0.005, 1100.0), ("temperature", 150.0, 350.0)):
        values = ds[coord].values
        assert values.dtype == np.float64 and np.all(np.diff(values) > 0)
        assert values[0] <= lo and values[-1] >= hi
    for a in ("dry", "h2o", "continuum"):
        var = ds[f"ln_k_{a}"]
        assert var.dims == ("table", "pressure", "temperature") and var.dtype == np.float64
        assert var.attrs["units"] == "ln(m2 kg-1)"
    assert ds["absorber_mask"].dims == ("table", "absorber") and ds["absorber_mask"].dtype == np.int8
    masked = ds["absorber_mask"].values == 0
    assert masked[:, 2].any()  # the infrared list has no continuum
    for i, a in enumerate(("dry", "h2o", "continuum")):
        assert np.all(ds[f"ln_k_{a}"].values[masked[:, i]] == 0.0)
    for c, ch in enumerate(doc["channels"]):
        assert sum(b["weight"] for b in ch["bands"]) == pytest.approx(1.0, abs=1e-12)
    # DSB bands carry their sideband's Planck position, the channel its centre.
    dsb = doc["channels"][1]
    assert dsb["frequency_ghz"] == 57.0 and {b["frequency_ghz"] for b in dsb["bands"]} == {56.5, 57.5}
    # Through the files, the same brightness temperatures as in memory.
    units, centres = ["GHz", "GHz", "GHz", "cm-1"], [54.0, 57.0, 183.0, 700.3]
    for p, t, q in atmospheres.values():
        em = [0.6, 0.6, 0.6, 0.98]
        a = ckd.table_brightness_temperature(sub, units, centres, built.p_ref, p, t, q, t[0], em)
        b = ckd.table_brightness_temperature(built.sub_bands, units, centres, built.p_ref, p, t, q, t[0], em)
        np.testing.assert_array_equal(a, b)
    ds.close()


def test_shipped_demo_files_are_invented_and_consistent():
    from importlib import resources

    folder = resources.files("rtemu") / "instruments"
    pbf = lines.read_passbands(folder / "demo-sounder-ck.passbands")
    assert all(ll.title.startswith("INVENTED") for ll in pbf.line_lists)
    assert "INVENTED" in pbf.description
    from rtemu import load_instrument

    assert pbf.channel_ids == load_instrument("demo-sounder").channel_ids
    shipped = tomllib.loads((folder / "demo-sounder-ck.toml").read_text())
    assert [c["id"] for c in shipped["channels"]] == list(pbf.channel_ids)
    # Humidity channels: the one nearest the 183 GHz line peaks highest (Microwave only: cheap).
    mw = lines.PassbandFile(pbf.name, pbf.description, pbf.line_lists, pbf.line_list_paths,
                            tuple(c for c in pbf.channels if c.id.startswith("mw-h")), pbf.source)
    op = LineByLineOperator(mw)
    layer_p, weights = op.weighting_functions(*ckd.reference_atmospheres()["us76"])
    peaks = layer_p[np.argmax(weights, axis=1)]
    assert peaks[0] < peaks[1] < peaks[2]


def test_shipped_line_lists_are_what_the_committed_generator_writes(tmp_path, capsys):
    from importlib import resources

    from rtemu.spectroscopy import build

    assert build.main(["lines", str(tmp_path)]) == 0
    folder = resources.files("rtemu") / "instruments"
    for suffix in ("lines-mw", "lines-ir"):
        assert (tmp_path / f"demo-sounder-ck.{suffix}").read_text() == (folder / f"demo-sounder-ck.{suffix}").read_text()
    assert build.main(["instrument", str(tmp_path / "missing.passbands"), str(tmp_path / "x.toml")]) == 2
    assert "missing.passbands: cannot read passband file" in capsys.readouterr().err
    assert not (tmp_path / "x.toml").exists()
