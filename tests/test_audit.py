"""The emulator audit (rtemu.audit.run_audit) and its numerical pieces.

Stand-in emulators (until an ONNX bundle is used here) are operators whose error is known
exactly:

* ``_CraftedOperator``: the physical model plus a constant BT offset per channel and
  Jacobians scaled by (1 + eps); chosen (profile, channel) entries are flagged and given a
  wild BT, so any leak of flagged entries into the statistics shows.
* a physical model on an instrument whose absorption coefficients are scaled by 1.01.

Expected numbers are computed here with numpy from the operators' outputs, never copied
from the audit's own output.
"""

from __future__ import annotations

import dataclasses
import io
import json
import math
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from rtemu import audit, flags
from rtemu._io import to_netcdf_atomic
from rtemu.instrument import load_instrument
from rtemu.runtime import PhysicalOperator

CHANNELS = ["mw-win", "mw-t3", "ir-w1"]  # noise 0.3, 0.2, 0.25 K in the demo file
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), section 5.2
FIGURES = ("rmse_over_noise.png", "error_histograms.png", "error_vs_tcwv.png",
           "jacobians_temperature.png", "jacobians_humidity.png")


@pytest.fixture(scope="module")
def instrument():
    return load_instrument("demo-sounder").select(CHANNELS)


def _profiles(n: int, seed: int, nlev: int = 25) -> xr.Dataset:
    """Small test set (surface first): a simple tropospheric lapse rate with random bumps,
    humidity decaying as (p/ps)^3 from 1-20 g/kg, zenith 0-60 degree, emissivity 0.45-0.99."""
    rng = np.random.default_rng(seed)
    p = np.geomspace(1013.25, 0.5, nlev)
    t_surface = rng.uniform(260.0, 305.0, (n, 1))
    t = np.maximum(t_surface * (p / p[0]) ** 0.19, 215.0)  # dry-adiabat-like, tropopause floor
    t = t + 15.0 * np.clip(np.log(100.0 / p) / np.log(200.0), 0.0, None)  # warm stratosphere
    t = t + rng.normal(0.0, 0.5, (n, nlev))
    q = np.maximum(rng.uniform(1e-3, 2e-2, (n, 1)) * (p / p[0]) ** 3, 3e-6)
    # Subsaturated (RH <= 95 % over water, Bolton 1980 eq. 10): operators flag supersaturation.
    es = 6.112 * np.exp(17.67 * (t - 273.15) / (t - 29.65))
    with np.errstate(divide="ignore"):
        q = np.minimum(q, np.where(es < p, 0.95 * 0.622 * es / np.maximum(p - 0.378 * es, 1e-12), np.inf))
    return xr.Dataset(
        {
            "air_pressure": (("level",), p, {"units": "hPa"}),
            "air_temperature": (("profile", "level"), t, {"units": "K"}),
            "specific_humidity": (("profile", "level"), q, {"units": "kg kg-1"}),
            "surface_temperature": (("profile",), t[:, 0] + rng.normal(0.0, 2.0, n), {"units": "K"}),
            "surface_emissivity": (("profile", "channel"), rng.uniform(0.45, 0.99, (n, len(CHANNELS))),
                                   {"units": "1"}),
            "sensor_zenith_angle": (("profile",), rng.uniform(0.0, 60.0, n), {"units": "degree"}),
        },
        coords={"profile": np.arange(n), "channel": CHANNELS},
    )


class _CraftedOperator(PhysicalOperator):
    """Physics + known errors: BT + offset[c], Jacobians x (1 + eps), chosen entries flagged."""

    def __init__(self, instrument, *, offset, eps=0.0, flagged=(), adjoint_scale=1.0):
        super().__init__(instrument)
        self.offset = np.asarray(offset, dtype=float)
        self.eps = eps
        self.flagged = set(flagged)  # {(profile coordinate, channel index)}
        self.adjoint_scale = adjoint_scale

    def _simulate_eager(self, dataset, jacobian):
        out = super()._simulate_eager(dataset, jacobian).copy(deep=True)
        out["brightness_temperature"] = out["brightness_temperature"] + self.offset
        for name in out.data_vars:
            if name.startswith("jacobian_"):
                out[name] = out[name] * (1.0 + self.eps)
        flag = out["quality_flag"].values.copy()
        bt = out["brightness_temperature"].values.copy()
        for i, profile in enumerate(dataset["profile"].values):
            for c in range(flag.shape[1]):
                if (int(profile), c) in self.flagged:
                    flag[i, c] |= flags.OUTSIDE_TRAINING_BOUNDS
                    bt[i, c] += 100.0  # a flagged value may be anything
        out["quality_flag"].values[:] = flag
        out["brightness_temperature"].values[:] = bt
        return out

    def adjoint(self, dataset, bt_perturbation):
        grads = super().adjoint(dataset, bt_perturbation)
        return grads * self.adjoint_scale


def _scaled_instrument(inst, factor):
    channels = tuple(
        dataclasses.replace(ch, bands=tuple(
            dataclasses.replace(b, dry=b.dry * factor, h2o=b.h2o * factor, continuum=b.continuum * factor)
            for b in ch.bands))
        for ch in inst.channels
    )
    return dataclasses.replace(inst, channels=channels)


OFFSET = np.array([0.1, -0.05, 0.2])  # [K]; vs 0.5 x noise (0.15, 0.10, 0.125): pass, pass, fail
EPS = 0.1
N_PROFILES = 40
FLAGGED = {(p, 0) for p in range(0, N_PROFILES, 4)} | {(7, 2)}  # 10 of mw-win, 1 of ir-w1


@pytest.fixture(scope="module")
def data_file(tmp_path_factory):
    path = tmp_path_factory.mktemp("data") / "test.nc"
    to_netcdf_atomic(_profiles(N_PROFILES, seed=11), path)
    return path


@pytest.fixture(scope="module")
def crafted_run(tmp_path_factory, instrument, data_file):
    out = tmp_path_factory.mktemp("crafted") / "audit"
    emulator = _CraftedOperator(instrument, offset=OFFSET, eps=EPS, flagged=FLAGGED)
    summary = audit.run_audit(None, out, data=data_file, operator=emulator, progress=False)
    return out, summary


# -- numerical pieces -------------------------------------------------------------------
def test_jacobian_relative_error_known_vectors():
    physical = np.array([[[3.0, 4.0]], [[0.0, 0.0]], [[1.0, np.nan]]])
    emulated = np.array([[[3.3, 4.4]], [[1.0, 0.0]], [[1.0, 1.0]]])
    err = audit.jacobian_relative_error(emulated, physical)
    # ||(0.3, 0.4)|| / ||(3, 4)|| = 0.5 / 5 (3-4-5 right triangle)
    assert err.shape == (3, 1)
    assert err[0, 0] == pytest.approx(0.1, rel=1e-12)
    assert np.isnan(err[1, 0]) and np.isnan(err[2, 0])  # zero norm, non-finite: undefined


def test_bin_index_edges_are_right_closed():
    edges = (0.0, 10.0, 30.0)
    got = audit.bin_index([0.0, 5.0, 10.0, 10.0001, 30.0, 30.1, -1.0, np.nan], edges)
    assert got.tolist() == [0, 0, 0, 1, 1, -1, -1, -1]


def test_channel_statistics_match_numpy_with_flags_and_nan():
    rng = np.random.default_rng(0)
    d = rng.normal(0.2, 0.5, (300, 2))
    jt = rng.uniform(0.0, 0.1, (300, 2))
    jq = rng.uniform(0.0, 0.3, (300, 2))
    flagged = np.zeros((300, 2), bool)
    flagged[::7, 0] = True
    d[::7, 0] = 1e3  # must be excluded
    d[3, 1] = np.nan  # unflagged non-finite: excluded and counted
    jt[5, 1] = np.nan
    stats = audit.channel_statistics(d, jt, jq, flagged)
    for c in range(2):
        use = ~flagged[:, c] & np.isfinite(d[:, c])
        x = d[use, c]
        assert stats["count"][c] == x.size
        assert stats["bias_k"][c] == pytest.approx(np.mean(x), rel=1e-12)
        assert stats["rmse_k"][c] == pytest.approx(np.sqrt(np.mean(x**2)), rel=1e-12)
        assert stats["p999_abs_k"][c] == pytest.approx(np.quantile(np.abs(x), 0.999), rel=1e-12)
        assert stats["max_abs_k"][c] == pytest.approx(np.max(np.abs(x)), rel=1e-12)
        assert stats["flag_rate"][c] == pytest.approx(flagged[:, c].mean())
        j = jt[~flagged[:, c], c]
        j = j[np.isfinite(j)]
        assert stats["jacobian_t_error_median"][c] == pytest.approx(np.median(j), rel=1e-12)
        assert stats["jacobian_t_error_p95"][c] == pytest.approx(np.quantile(j, 0.95), rel=1e-12)
    assert stats["nonfinite_unflagged"].tolist() == [0, 1]


def test_channel_statistics_empty_population_is_nan_without_warnings():
    flagged = np.ones((4, 1), bool)
    stats = audit.channel_statistics(np.zeros((4, 1)), np.zeros((4, 1)), np.zeros((4, 1)), flagged)
    assert stats["count"][0] == 0 and stats["flag_rate"][0] == 1.0
    assert np.isnan(stats["rmse_k"][0]) and np.isnan(stats["jacobian_q_error_median"][0])


def test_recommended_error_is_the_quadrature_sum():
    # Independent errors add in variance: GUM (JCGM 100:2008) eq. 10 with unit sensitivities.
    noise = np.array([0.3, 0.2, 0.25])
    rmse = np.array([0.4, 0.0, 0.1])
    assert audit.recommended_error(noise, rmse) == pytest.approx(np.sqrt(noise**2 + rmse**2), rel=1e-14)
    assert audit.recommended_error(0.3, 0.4) == pytest.approx(0.5)  # 3-4-5 triangle


def test_verdicts_follow_the_threshold():
    rmse = [0.10, 0.11, math.nan]
    noise = [0.2, 0.2, 0.2]
    assert audit.verdicts(rmse, noise, 0.5) == ["pass", "fail", "no data"]
    assert audit.verdicts(rmse, noise, 0.6) == ["pass", "pass", "no data"]


def test_verdicts_fail_a_channel_flagged_too_often():
    rmse, noise = [0.05, 0.05, 0.05], [0.2, 0.2, 0.2]
    rates = [0.0, audit.MAX_FLAG_RATE, 0.94]
    assert audit.verdicts(rmse, noise, 0.5, flag_rate=rates) == ["pass", "fail", "fail"]
    assert audit.verdicts(rmse, noise, 0.5, flag_rate=rates, max_flag_rate=1.0) == ["pass", "pass", "pass"]


def test_report_opens_with_the_bottom_line_and_the_profiles(crafted_run):
    out, summary = crafted_run
    lines = [line for line in (out / "report.md").read_text().splitlines() if line.strip()]
    assert lines[1].startswith("**Bottom line: 1 of 3 channels pass**")
    assert "`mw-win` (flag rate 25.0%)" in lines[1] and "`ir-w1` (RMSE" in lines[1]
    assert lines[2].startswith(f"Profiles used: {N_PROFILES} profiles from `")
    # paths relative to the audit directory: the report can move with its data
    assert not Path(summary["data"]["path"]).is_absolute()
    assert (out / summary["data"]["path"]).resolve().is_file()


# -- the crafted case: every number known ---------------------------------------------------
def test_crafted_statistics_are_exact(crafted_run, instrument):
    _, summary = crafted_run
    noise = instrument.noise_k
    for c, cid in enumerate(CHANNELS):
        s = summary["channels"][cid]
        n_flagged = sum(1 for p, k in FLAGGED if k == c)
        assert s["count"] == N_PROFILES - n_flagged
        assert s["flag_rate"] == pytest.approx(n_flagged / N_PROFILES)
        assert s["bias_k"] == pytest.approx(OFFSET[c], abs=1e-9)
        assert s["rmse_k"] == pytest.approx(abs(OFFSET[c]), abs=1e-9)
        assert s["p999_abs_k"] == pytest.approx(abs(OFFSET[c]), abs=1e-9)
        assert s["max_abs_k"] == pytest.approx(abs(OFFSET[c]), abs=1e-9)
        for key in ("jacobian_t_error_median", "jacobian_t_error_p95",
                    "jacobian_q_error_median", "jacobian_q_error_p95"):
            assert s[key] == pytest.approx(EPS, rel=1e-9)
        assert s["recommended_error_k"] == pytest.approx(math.sqrt(noise[c] ** 2 + OFFSET[c] ** 2), rel=1e-9)
        assert s["noise_k"] == noise[c]
    # mw-win's RMSE passes but 10 of its 40 entries (25 %) are flagged, above MAX_FLAG_RATE.
    assert [summary["channels"][c]["verdict"] for c in CHANNELS] == ["fail", "pass", "fail"]
    assert summary["profiles"] == N_PROFILES
    assert summary["flag_counts"]["outside_training_bounds"] == len(FLAGGED)


def test_crafted_split_bins_partition_the_entries(crafted_run):
    _, summary = crafted_run
    for name, split in summary["splits"].items():
        for c, cid in enumerate(CHANNELS):
            members = sum(b["channels"][cid]["members"] for b in split["bins"])
            assert members == N_PROFILES, name  # every valid entry falls in exactly one bin
            for b in split["bins"]:
                s = b["channels"][cid]
                if s["count"]:
                    assert s["bias_k"] == pytest.approx(OFFSET[c], abs=1e-9)


def test_crafted_taylor_test_sees_the_wrong_tangent_linear(crafted_run):
    _, summary = crafted_run
    tl = summary["tangent_linear"]
    assert tl["run"] and tl["profiles"] > 0
    # Forward H + offset, tangent linear (1 + eps) H': r(a) -> 1 / (1 + eps).
    assert tl["ratio"][-1] == pytest.approx(1.0 / (1.0 + EPS), rel=1e-3)
    assert tl["passed"] is False
    ad = summary["adjoint"]
    assert ad["run"] and ad["passed"] and ad["max_relative_error"] < 1e-10


def test_derivative_checks_pass_for_a_consistent_operator(instrument):
    emulator = _CraftedOperator(instrument, offset=OFFSET)
    ds = _profiles(3, seed=5)
    tl = audit.taylor_test(emulator, ds)
    assert tl["passed"]
    # Smooth model: |r - 1| shrinks about linearly with the step (first-order Taylor remainder).
    closeness = np.abs(np.array(tl["ratio"]) - 1.0)
    assert closeness[-1] < closeness[0] and closeness[-1] < 1e-4
    assert audit.dot_product_test(emulator, ds)["passed"]


def test_dot_product_test_catches_a_wrong_adjoint(instrument):
    emulator = _CraftedOperator(instrument, offset=OFFSET, adjoint_scale=2.0)
    result = audit.dot_product_test(emulator, _profiles(3, seed=5))
    assert not result["passed"]
    assert result["max_relative_error"] == pytest.approx(0.5, rel=1e-9)  # |x - 2x| / |2x|


def test_outputs_are_written(crafted_run):
    out, summary = crafted_run
    for name in ("report.md", "summary.json", "audit.nc", *FIGURES):
        assert (out / name).is_file() and (out / name).stat().st_size > 0, name
    assert sorted(summary["figures"]) == sorted(FIGURES)
    assert json.loads((out / "summary.json").read_text()) == summary
    assert not [p.name for p in out.iterdir() if p.name.startswith(".")]  # no temporary files left


def test_figures_are_readable_pngs(crafted_run):
    from matplotlib.image import imread

    out, _ = crafted_run
    for name in FIGURES:
        raw = (out / name).read_bytes()
        assert raw[:8] == PNG_SIGNATURE, name
        image = imread(io.BytesIO(raw), format="png")
        assert image.shape[0] >= 300 and image.shape[1] >= 400, name
        assert np.ptp(image[..., :3]) > 0.5, name  # something drawn, not a blank canvas


def test_audit_netcdf_holds_the_per_profile_errors(crafted_run, data_file):
    out, _ = crafted_run
    with xr.open_dataset(out / "audit.nc", engine="h5netcdf") as ds:
        ds = ds.load()
    assert [str(c) for c in ds["channel"].values] == CHANNELS
    err = ds["brightness_temperature_error"].transpose("profile", "channel").values
    flag = ds["quality_flag"].transpose("profile", "channel").values
    expected_flag = np.zeros_like(flag)
    for p, c in FLAGGED:
        expected_flag[p, c] = flags.OUTSIDE_TRAINING_BOUNDS
    np.testing.assert_array_equal(flag, expected_flag)
    unflagged = flag == 0
    np.testing.assert_allclose(err[unflagged], np.broadcast_to(OFFSET, err.shape)[unflagged], atol=1e-9)
    np.testing.assert_allclose(ds["jacobian_air_temperature_error"].values[unflagged], EPS, rtol=1e-9)
    np.testing.assert_allclose(ds["jacobian_specific_humidity_error"].values[unflagged], EPS, rtol=1e-9)
    with xr.open_dataset(data_file, engine="h5netcdf") as src:
        p = src["air_pressure"].values
        q = src["specific_humidity"].values
        zen = src["sensor_zenith_angle"].values
        em = src["surface_emissivity"].values
    # Column water by the trapezoidal rule, written out here: sum (q_j + q_j+1)/2 dp / g
    # with g = 9.80665 m s-2 (standard gravity, CGPM 1901 / scipy.constants.g).
    import scipy.constants

    tcwv = np.sum(0.5 * (q[:, 1:] + q[:, :-1]) * -np.diff(p) * 100.0, axis=1) / scipy.constants.g
    np.testing.assert_allclose(ds["total_column_water_vapour"].values, tcwv, rtol=1e-12)
    np.testing.assert_allclose(ds["sensor_zenith_angle"].values, zen)
    np.testing.assert_allclose(ds["surface_emissivity"].transpose("profile", "channel").values, em)
    assert ds["brightness_temperature_error"].attrs["units"] == "K"


def test_report_states_rules_and_results(crafted_run):
    out, summary = crafted_run
    text = (out / "report.md").read_text()
    assert "RMSE ≤ 0.5 × instrument noise" in text
    assert "sqrt(noise² + RMSE²)" in text
    assert "Taylor test" in text and "Dot-product test" in text
    for cid in CHANNELS:
        assert f"`{cid}`" in text
    for name in FIGURES:
        assert f"]({name})" in text
    assert "1 of 3 channels pass" in text


# -- an emulator with realistic, unknown-in-advance errors ----------------------------------
def test_scaled_instrument_statistics_match_an_independent_computation(tmp_path, instrument):
    ds = _profiles(30, seed=4)
    emulator = PhysicalOperator(_scaled_instrument(instrument, 1.01))
    reference = PhysicalOperator(instrument)
    summary = audit.run_audit(None, tmp_path / "a", data=ds, operator=emulator, reference=reference,
                              threshold=0.3, progress=False)
    e = emulator.simulate(ds, jacobian=True)
    r = reference.simulate(ds, jacobian=True)
    d = (e["brightness_temperature"] - r["brightness_temperature"]).transpose("profile", "channel").values
    kt_e = e["jacobian_air_temperature"].transpose("profile", "channel", "level").values
    kt_r = r["jacobian_air_temperature"].transpose("profile", "channel", "level").values
    jt = np.linalg.norm(kt_e - kt_r, axis=2) / np.linalg.norm(kt_r, axis=2)
    # Humidity Jacobians are compared per ln q: K = q dBT/dq (see rtemu.audit docstring).
    q = ds["specific_humidity"].transpose("profile", "level").values[:, None, :]
    kq_e = e["jacobian_specific_humidity"].transpose("profile", "channel", "level").values * q
    kq_r = r["jacobian_specific_humidity"].transpose("profile", "channel", "level").values * q
    jq = np.linalg.norm(kq_e - kq_r, axis=2) / np.linalg.norm(kq_r, axis=2)
    noise = instrument.noise_k
    for c, cid in enumerate(CHANNELS):
        s = summary["channels"][cid]
        assert s["bias_k"] == pytest.approx(d[:, c].mean(), rel=1e-9)
        assert s["rmse_k"] == pytest.approx(np.sqrt(np.mean(d[:, c] ** 2)), rel=1e-9)
        assert s["max_abs_k"] == pytest.approx(np.abs(d[:, c]).max(), rel=1e-9)
        assert s["jacobian_t_error_median"] == pytest.approx(np.median(jt[:, c]), rel=1e-9)
        assert s["jacobian_q_error_p95"] == pytest.approx(np.quantile(jq[:, c], 0.95), rel=1e-9)
        assert s["humidity_sensitivity_median_k"] == pytest.approx(
            np.median(np.linalg.norm(kq_r[:, c], axis=1)), rel=1e-9)
        assert s["verdict"] == ("pass" if s["rmse_k"] <= 0.3 * noise[c] else "fail")
    assert summary["threshold"] == 0.3
    # More absorption in a microwave window over a reflective surface (emissivity < 1)
    # adds atmospheric emission against a cold reflected sky: emulated BT is warmer.
    assert summary["channels"]["mw-win"]["bias_k"] > 0
    assert summary["tangent_linear"]["passed"] and summary["adjoint"]["passed"]


def test_threshold_changes_the_verdicts(tmp_path, instrument, data_file):
    emulator = _CraftedOperator(instrument, offset=OFFSET)
    strict = audit.run_audit(None, tmp_path / "s", data=data_file, operator=emulator, threshold=0.3,
                             progress=False)
    # |offset| / noise = 0.33, 0.25, 0.8
    assert [strict["channels"][c]["verdict"] for c in CHANNELS] == ["fail", "pass", "fail"]
    assert "RMSE ≤ 0.3 × instrument noise" in (tmp_path / "s" / "report.md").read_text()


# -- inputs, flags and failures -----------------------------------------------------------
def test_invalid_profiles_are_flagged_and_excluded(tmp_path, instrument):
    ds = _profiles(12, seed=2)
    ds["air_temperature"][3, 5] = np.nan
    ds["specific_humidity"][8, 0] = -1e-3
    emulator = _CraftedOperator(instrument, offset=OFFSET)
    summary = audit.run_audit(None, tmp_path / "a", data=ds, operator=emulator, progress=False)
    for c, cid in enumerate(CHANNELS):
        s = summary["channels"][cid]
        assert s["count"] == 10 and s["flag_rate"] == pytest.approx(2 / 12)
        assert s["bias_k"] == pytest.approx(OFFSET[c], abs=1e-9)
    assert summary["flag_counts"]["invalid_input"] == 2 * len(CHANNELS)
    with xr.open_dataset(tmp_path / "a" / "audit.nc", engine="h5netcdf") as out:
        assert np.isnan(out["total_column_water_vapour"].values[[3, 8]]).all()


def test_wider_channel_dimension_is_cut_to_the_emulator(tmp_path, instrument):
    full = load_instrument("demo-sounder")
    ds = _profiles(6, seed=3).drop_vars("surface_emissivity").drop_vars("channel")
    ds["surface_emissivity"] = (("profile", "channel"), np.full((6, len(full.channels)), 0.9))
    ds = ds.assign_coords(channel=list(full.channel_ids))
    summary = audit.run_audit(None, tmp_path / "a", data=ds, operator=_CraftedOperator(instrument, offset=OFFSET),
                              progress=False)
    assert list(summary["channels"]) == CHANNELS


def test_bad_data_file_fails_cleanly_and_writes_nothing(tmp_path, instrument):
    bad = tmp_path / "bad.nc"
    bad.write_bytes(b"this is not a netCDF file\n" * 10)
    out = tmp_path / "audit"
    with pytest.raises(ValueError, match="bad.nc: cannot be read as netCDF"):
        audit.run_audit(None, out, data=bad, operator=_CraftedOperator(instrument, offset=OFFSET))
    assert not out.exists()


def test_data_missing_a_variable_names_it_and_writes_nothing(tmp_path, instrument):
    path = tmp_path / "partial.nc"
    to_netcdf_atomic(_profiles(4, seed=1).drop_vars("sensor_zenith_angle"), path)
    out = tmp_path / "audit"
    with pytest.raises(ValueError, match="sensor_zenith_angle"):
        audit.run_audit(None, out, data=path, operator=_CraftedOperator(instrument, offset=OFFSET))
    assert not out.exists()


def test_missing_data_file_is_a_clear_error(tmp_path, instrument):
    with pytest.raises(FileNotFoundError, match="no such file"):
        audit.run_audit(None, tmp_path / "a", data=tmp_path / "nope.nc",
                        operator=_CraftedOperator(instrument, offset=OFFSET))


def test_failure_while_rendering_leaves_no_partial_output(tmp_path, instrument, monkeypatch):
    from rtemu import _plots

    def broken(*args, **kwargs):
        raise RuntimeError("figure failed")

    monkeypatch.setattr(_plots, "render_all", broken)
    out = tmp_path / "audit"
    out.mkdir()
    with pytest.raises(RuntimeError, match="figure failed"):
        audit.run_audit(None, out, data=_profiles(5, seed=1), operator=_CraftedOperator(instrument, offset=OFFSET),
                        progress=False)
    assert list(out.iterdir()) == []


@pytest.mark.parametrize(
    "kwargs, message",
    [
        ({"data": "x.nc", "count": 3}, "not both"),
        ({"data": "x.nc", "seed": 3}, "seed applies"),
        ({"count": 0}, "count must be"),
        ({"count": 5, "threshold": 0.0}, "threshold must be finite and > 0"),
        ({"count": 5, "threshold": float("nan")}, "threshold"),
    ],
)
def test_bad_arguments(tmp_path, instrument, kwargs, message):
    with pytest.raises(ValueError, match=message):
        audit.run_audit(None, tmp_path / "a", operator=_CraftedOperator(instrument, offset=OFFSET), **kwargs)
    assert not (tmp_path / "a").exists()


def test_needs_a_model_or_an_operator(tmp_path):
    with pytest.raises(ValueError, match="model"):
        audit.run_audit(None, tmp_path / "a", count=3)


def test_drawn_test_set_records_its_seed(tmp_path, instrument, capsys):
    emulator = _CraftedOperator(instrument, offset=OFFSET)
    summary = audit.run_audit(None, tmp_path / "a", count=12, seed=3, operator=emulator, progress=True)
    assert summary["data"] == {"source": "drawn", "count": 12, "seed": 3,
                               "generator_version": summary["data"]["generator_version"]}
    assert summary["profiles"] == 12
    assert "audit" in capsys.readouterr().err  # the tqdm bar
    assert "seed 3" in (tmp_path / "a" / "report.md").read_text()


def test_everything_flagged_gives_no_data_verdicts(tmp_path, instrument):
    n = 6
    emulator = _CraftedOperator(instrument, offset=OFFSET, flagged={(p, c) for p in range(n) for c in range(3)})
    summary = audit.run_audit(None, tmp_path / "a", data=_profiles(n, seed=8), operator=emulator, progress=False)
    assert [summary["channels"][c]["verdict"] for c in CHANNELS] == ["no data"] * 3
    assert all(summary["channels"][c]["rmse_k"] is None for c in CHANNELS)  # NaN -> JSON null
    assert summary["tangent_linear"]["run"] is False and summary["adjoint"]["run"] is False
    assert "jacobians_temperature.png" not in summary["figures"]
    text = (tmp_path / "a" / "report.md").read_text()
    assert "Not run: no profile with every channel unflagged" in text
    assert "0 of 3 channels pass" in text


def test_the_training_file_is_refused_as_test_set(tmp_path, instrument, data_file):
    import hashlib

    emulator = _CraftedOperator(instrument, offset=OFFSET)
    digest = hashlib.sha256(data_file.read_bytes()).hexdigest()  # FIPS 180-4 via hashlib
    emulator.bundle = type("FakeBundle", (), {"training_data_sha256": digest, "channel_stats": {}})()
    with pytest.raises(ValueError, match="training file"):
        audit.run_audit(None, tmp_path / "a", data=data_file, operator=emulator, progress=False)
    assert not (tmp_path / "a").exists()


# -- end to end with a real (tiny) ONNX bundle -------------------------------------------------
_TINY_RECIPE = """
name = "tiny-audit-test"
description = "A deliberately poor, fast recipe: the audit must report what it gets."
[training]
seed = 0
validation_fraction = 0.2
max_profiles = 400
[features]
temperature_components = 6
humidity_components = 6
[absorbers]
profiles = 100
validation_profiles = 50
max_absorbers = 1
starts = 1
start_evaluations = 5
evaluations = 10
[network]
hidden_layers = [4]
alpha = 1e-4
max_iter = 30
check_every = 30
patience = 1
[uncertainty]
flag_noise_fraction = 20.0
[envelope]
bounds_margin = 0.02
novelty_margin = 1.0
"""


@pytest.fixture(scope="module")
def tiny_bundle(tmp_path_factory, instrument):
    from rtemu import export, sampling, training

    d = tmp_path_factory.mktemp("bundle")
    (d / "tiny.toml").write_text(_TINY_RECIPE)
    sampling.sample_to_netcdf(instrument, d / "train.nc", count=400, seed=0, progress=False)
    emu = training.fit_emulator(d / "train.nc", d / "tiny.toml", progress=False, workers=1)
    export.export_bundle(emu, d / "tiny.onnx")
    return d


def test_audit_of_an_onnx_bundle_matches_a_direct_comparison(tiny_bundle, instrument):
    from rtemu.runtime import EmulatedOperator
    from rtemu.sampling import draw_states

    model = tiny_bundle / "tiny.onnx"
    summary = audit.run_audit(model, tiny_bundle / "audit", count=30, seed=99, progress=False)
    emulator = EmulatedOperator.load(model)
    ds = draw_states(30, seed=99, pressure_hpa=emulator.pressure_hpa, channels=emulator.instrument)
    e = emulator.simulate(ds)
    r = PhysicalOperator(instrument).simulate(ds)
    use = (e["quality_flag"] == 0) & (r["quality_flag"] == 0)
    d = (e["brightness_temperature"] - r["brightness_temperature"]).where(use)
    for cid in CHANNELS:
        x = d.sel(channel=cid).values
        x = x[np.isfinite(x)]
        assert summary["channels"][cid]["count"] == x.size
        assert summary["channels"][cid]["rmse_k"] == pytest.approx(np.sqrt(np.mean(x**2)), rel=1e-9)
    import hashlib

    assert summary["model"]["sha256"] == hashlib.sha256(model.read_bytes()).hexdigest()
    assert summary["tangent_linear"]["run"] and summary["adjoint"]["passed"]
    assert (tiny_bundle / "audit" / "report.md").is_file()


def test_audit_refuses_the_bundles_training_file(tiny_bundle):
    out = tiny_bundle / "refused"
    with pytest.raises(ValueError, match="training file"):
        audit.run_audit(tiny_bundle / "tiny.onnx", out, data=tiny_bundle / "train.nc", progress=False)
    assert not out.exists()


def test_taylor_test_keeps_marked_values_and_drops_switched_ones(instrument):
    ds = _profiles(3, seed=5)
    everything = {(p, c) for p in range(3) for c in range(3)}
    marked = _CraftedOperator(instrument, offset=OFFSET, flagged=everything)  # flag only, same model
    tl = audit.taylor_test(marked, ds)
    assert tl["excluded_entries"] == [0, 0, 0, 0] and tl["passed"]

    class Switching(_CraftedOperator):  # recomputed "by another model" when perturbed
        def _simulate_eager(self, dataset, jacobian):
            out = super()._simulate_eager(dataset, jacobian)
            if not np.array_equal(dataset["air_temperature"].values, ds["air_temperature"].values):
                out["quality_flag"].values[0, :] |= flags.PHYSICS_FALLBACK
            return out

    tl = audit.taylor_test(Switching(instrument, offset=OFFSET), ds)
    assert tl["excluded_entries"] == [3, 3, 3, 3]
