"""The exported ONNX graph: forward against scikit-learn (also via skl2onnx), exact
Jacobians against finite differences, quality flags, pruned sessions."""

from __future__ import annotations

import numpy as np
import onnx
import onnxruntime as ort
import pytest
import xarray as xr

from rtemu import _graph, flags
from rtemu.bundle import describe, make_session, pruned_model, read_bundle
from rtemu.export import build_bundle_model
from rtemu.sampling import sample_to_netcdf
from rtemu.training import Recipe, fit_emulator, load_training_data

CHANNELS = ["mw-win", "mw-t3", "mw-h2", "ir-win"]
TINY = """
name = "tiny-test"
description = "seconds-scale recipe for tests"
[training]
seed = 4
validation_fraction = 0.2
[features]
temperature_components = 6
humidity_components = 5
water_path = true
water_path_components = 4
line_kernels = [0.03, 1.0, 30.0]
continuum_kernels = [1.0, 100.0]
humidity_top_hpa = 100.0
reflection_kernels = true
instrument_kernels = "bands"
[network]
hidden_layers = [10, 7]
max_iter = 60
check_every = 30
[channels."mw-t3"]
hidden_layers = [6, 4]
opacity_kernels = false
[channels."ir-win"]
profile_blocks = false
linear_inputs = "own_kernel"
[channels."mw-win"]
linear_inputs = "own_kernel"
"""


@pytest.fixture(scope="module")
def data_path(tmp_path_factory):
    root = tmp_path_factory.mktemp("export_data")
    return sample_to_netcdf("demo-sounder", root / "train.nc", count=1200, seed=21, progress=False)


@pytest.fixture(scope="module", params=["temperature_laws", "constant_opacity", "laws_without_bank"])
def trained(request, data_path, tmp_path_factory):
    """A tiny emulator (4 channels, one with narrower layers) and its bundle; channel kernels
    with the instrument's temperature laws (bundle format 5; five kernel paths beside the
    fixed bank, three without it) or without (format 4)."""
    root = tmp_path_factory.mktemp("export")
    data = load_training_data(data_path)
    laws = request.param != "constant_opacity"
    text = TINY.replace('instrument_kernels = "bands"', 'instrument_kernels = "bands"\nkernel_temperature_laws = '
                        + ("true" if laws else "false"))
    if request.param == "laws_without_bank":
        text = text.replace("line_kernels = [0.03, 1.0, 30.0]\ncontinuum_kernels = [1.0, 100.0]\n", "")
    emu = fit_emulator(data, Recipe.from_toml(text, "tiny"), channels=CHANNELS, workers=1, progress=False)
    assert bool(emu.config.kernel_temperature_laws) == laws
    assert emu.config.n_kernel_paths == {"temperature_laws": 5, "constant_opacity": 2, "laws_without_bank": 3}[
        request.param]
    blob, layout = build_bundle_model(emu)
    path = root / "tiny.onnx"
    path.write_bytes(blob)
    return {"data": data, "emu": emu, "path": path, "layout": layout, "root": root, "recipe": text,
            "data_path": data_path}


def _feeds(data, rows, columns, dtype=np.float32):
    return {
        "air_temperature": data.air_temperature[rows].astype(dtype),
        "specific_humidity": data.specific_humidity[rows].astype(dtype),
        "surface_temperature": data.surface_temperature[rows].astype(dtype),
        "surface_emissivity": data.surface_emissivity[rows][:, columns].astype(dtype),
        "sensor_zenith_angle": data.sensor_zenith_angle[rows].astype(dtype),
    }


def _columns(trained):
    ids = list(trained["data"].instrument.channel_ids)
    return [ids.index(c) for c in trained["emu"].channel_ids]


def _run(session, feeds, names=None):
    names = names or [o.name for o in session.get_outputs()]
    return dict(zip(names, session.run(names, feeds)))


def _float64_session(path):
    """The bundle's function rebuilt in float64 from its own (float32) weights."""
    b = read_bundle(path)
    arrays = {k: v.astype(np.float64) for k, v in b.arrays().items() if k in _graph.primary_shapes(_layout(b))}
    model = _graph.build_model(_layout(b), arrays, dtype=np.float64)
    return ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])


def _layout(b):
    g = b.graph
    return _graph.GraphLayout(n_levels=g["n_levels"], n_channels=g["n_channels"], n_components=g["n_components"],
                              hidden=tuple(g["hidden"]), humidity=g["humidity"], zenith=g["zenith"],
                              n_reconstruction_blocks=g["n_reconstruction_blocks"],
                              water_path=g.get("water_path", False),
                              n_line_kernels=g.get("n_line_kernels", 0),
                              n_continuum_kernels=g.get("n_continuum_kernels", 0),
                              reflection_kernels=g.get("reflection_kernels", False),
                              n_band_kernels=g.get("n_band_kernels", 0),
                              n_channel_kernels=g.get("n_channel_kernels", 0),
                              kernel_temperature_laws=g.get("kernel_temperature_laws", False),
                              n_tropopause_layers=g.get("n_tropopause_layers", 0))


def test_flag_bits_match_rtemu_flags():
    assert (_graph.INVALID_INPUT, _graph.OUTSIDE_TRAINING_BOUNDS, _graph.NOVEL_STATE) == (
        flags.INVALID_INPUT, flags.OUTSIDE_TRAINING_BOUNDS, flags.NOVEL_STATE)


def test_graph_is_valid_onnx_and_lean(trained):
    model = onnx.load(str(trained["path"]))
    onnx.checker.check_model(model, full_check=True)
    assert model.opset_import[0].version == _graph.OPSET
    # nodes on initializers only are folded at session creation; what runs per call stays
    # small (each node costs ~1 us in a single-profile call); the water-path block (on in
    # this recipe) adds 12 (95 without it), the opacity kernels 57, their reflection term 32,
    # the channel kernels 7, their temperature laws 11, the tropopause check 27 (flag path only)
    assert trained["layout"].n_tropopause_layers > 0
    assert len(_graph.runtime_nodes(model)) <= 230 + (11 if trained["layout"].kernel_temperature_laws else 0)


def test_channel_without_kernels_has_zero_kernel_weights(trained):
    from rtemu.features import kernel_columns

    b = read_bundle(trained["path"])
    arrays, emu = b.arrays(), trained["emu"]
    cols = kernel_columns(emu.config, emu.pressure_hpa.size)
    # 5 bank kernels (none in one variant) and one per channel of the data's instrument,
    # each [f, t_s, r]
    n_bank = len(emu.config.line_kernels) + len(emu.config.continuum_kernels)
    assert n_bank in (0, 5)
    assert len(emu.config.channel_kernels) == len(emu.instrument.channel_ids)
    assert cols.size == 3 * (n_bank + len(emu.instrument.channel_ids))
    i = list(b.channel_ids).index("mw-t3")
    for name in ("layer1_weight", "linear_weight", "linear_emissivity_weight", "linear_zenith_weight"):
        a = arrays[name]
        kernel_part = a[i][cols] if name == "layer1_weight" else a[cols, i]
        assert np.all(kernel_part == 0), name
        others = np.delete(a, i, axis=0 if name == "layer1_weight" else 1)
        assert np.any((others[:, cols] if name == "layer1_weight" else others[cols]) != 0), name
    assert b.channel_stats["mw-t3"]["opacity_kernels"] is False
    assert b.channel_stats["mw-h2"]["opacity_kernels"] is True


def test_channel_without_profile_blocks_sees_only_kernels_ts_and_zenith(trained):
    from rtemu.features import kernel_columns

    b = read_bundle(trained["path"])
    arrays, emu = b.arrays(), trained["emu"]
    first_kernel = kernel_columns(emu.config, emu.pressure_hpa.size)[0]
    i = list(b.channel_ids).index("ir-win")
    for name in ("layer1_weight", "linear_weight", "linear_emissivity_weight", "linear_zenith_weight"):
        a = arrays[name]
        profile_part = a[i][:first_kernel] if name == "layer1_weight" else a[:first_kernel, i]
        assert np.all(profile_part == 0), name
        rest = a[i][first_kernel:-1] if name == "layer1_weight" else a[first_kernel:-1, i]
        assert np.any(rest != 0), name
    assert b.channel_stats["ir-win"]["profile_blocks"] is False
    assert b.channel_stats["mw-h2"]["profile_blocks"] is True


def test_linear_part_on_the_own_kernel_only(trained):
    # linear_inputs = "own_kernel": the linear coefficients (value, emissivity and zenith
    # slopes) are zero except on the channel's own [f, t_s, r], Ts, s(theta) and the constant
    from rtemu.features import kernel_columns

    b = read_bundle(trained["path"])
    arrays, emu = b.arrays(), trained["emu"]
    cfg, L = emu.config, emu.pressure_hpa.size
    first, K = kernel_columns(cfg, L)[0], cfg.n_kernels
    n_bank = len(cfg.line_kernels) + len(cfg.continuum_kernels)
    width = arrays["linear_weight"].shape[0] - 1
    for cid in ("mw-win", "ir-win"):
        col = list(emu.instrument.channel_ids).index(cid)
        own = [first + g * K + n_bank + col for g in range(3)] + [width - 2, width - 1, width]
        i = list(b.channel_ids).index(cid)
        for name in ("linear_weight", "linear_emissivity_weight", "linear_zenith_weight"):
            w = arrays[name][:, i]
            assert np.all(np.delete(w, own) == 0), (cid, name)
            assert np.any(w[own[:3]] != 0), (cid, name)
        assert b.channel_stats[cid]["linear_inputs"] == "own_kernel"
    assert b.channel_stats["mw-h2"]["linear_inputs"] == "all"
    bad = trained["recipe"].replace('[channels."mw-t3"]\n', '[channels."mw-t3"]\nlinear_inputs = "own_kernel"\n')
    with pytest.raises(ValueError, match="channel 'mw-t3' has linear_inputs = \"own_kernel\" but no kernel"):
        fit_emulator(trained["data"], Recipe.from_toml(bad, "bad"), channels=["mw-t3"], workers=1, progress=False)


def test_profile_blocks_off_needs_kernels(trained):
    bad = trained["recipe"].replace('[channels."ir-win"]\nprofile_blocks = false',
                                    '[channels."ir-win"]\nprofile_blocks = false\nopacity_kernels = false')
    with pytest.raises(ValueError, match="channel 'ir-win' has profile_blocks = false but no opacity kernels"):
        fit_emulator(trained["data"], Recipe.from_toml(bad, "bad"), channels=["ir-win"], workers=1, progress=False)


def test_update_of_a_bundle_with_channel_kernels(trained):
    # the shared kernel arrays (dry depth or temperature laws, sub-band combination) come
    # from the old file; the channels not retrained keep their outputs exactly
    from rtemu.export import train_to_onnx

    root = trained["root"]
    recipe = root / "recipe.toml"
    recipe.write_text(trained["recipe"].replace("seed = 4", "seed = 5"))
    out = root / "updated.onnx"
    b = train_to_onnx(trained["data_path"], recipe, out, channels=["mw-h2"], update=trained["path"], workers=1,
                      progress=False)
    assert list(b.channel_ids) == list(trained["emu"].channel_ids)
    feeds = _feeds(trained["data"], np.arange(20), _columns(trained))
    old = _run(make_session(trained["path"]), feeds)
    new = _run(make_session(out), feeds)
    i = list(b.channel_ids).index("mw-h2")
    keep = [c for c in range(len(b.channel_ids)) if c != i]
    np.testing.assert_array_equal(new["brightness_temperature"][:, keep], old["brightness_temperature"][:, keep])
    assert np.any(new["brightness_temperature"][:, i] != old["brightness_temperature"][:, i])


def test_update_keeps_the_tropopause_check_or_its_absence(trained, tmp_path):
    """The check belongs to the shared envelope: an update keeps the old file's (its flags
    stay identical), and a file without one (format <= 5, or tropopause_check = false)
    stays without one."""
    from rtemu.export import train_to_onnx

    warm = _feeds(trained["data"], np.arange(200), _columns(trained))
    warm["air_temperature"] = warm["air_temperature"] + np.float32(30.0)
    warm["surface_temperature"] = warm["surface_temperature"] + np.float32(30.0)
    recipe = tmp_path / "recipe.toml"
    recipe.write_text(trained["recipe"].replace("seed = 4", "seed = 6"))
    out = tmp_path / "updated.onnx"
    train_to_onnx(trained["data_path"], recipe, out, channels=["mw-t3"], update=trained["path"], workers=1,
                  progress=False)
    assert read_bundle(out).flag_thresholds["tropopause"] == read_bundle(trained["path"]).flag_thresholds["tropopause"]
    np.testing.assert_array_equal(_run(make_session(out), warm, ["quality_flag"])["quality_flag"],
                                  _run(make_session(trained["path"]), warm, ["quality_flag"])["quality_flag"])

    off = trained["recipe"] + "\n[envelope]\ntropopause_check = false\n"
    emu = fit_emulator(trained["data"], Recipe.from_toml(off, "off"), channels=["mw-t3", "ir-win"], workers=1,
                       progress=False)
    assert emu.envelope.tropopause_lower is None
    first = tmp_path / "without.onnx"
    first.write_bytes(build_bundle_model(emu)[0])
    recipe.write_text(off.replace("seed = 4", "seed = 6"))
    second = tmp_path / "without-updated.onnx"
    train_to_onnx(trained["data_path"], recipe, second, channels=["mw-t3"], update=first, workers=1, progress=False)
    for path in (first, second):
        b = read_bundle(path)
        assert b.graph["n_tropopause_layers"] == 0 and "tropopause" not in b.flag_thresholds
        assert "tropopause check" not in describe(path)
        ids = list(trained["data"].instrument.channel_ids)
        feeds = dict(warm, surface_emissivity=trained["data"].surface_emissivity[:200][
            :, [ids.index(c) for c in b.channel_ids]].astype(np.float32))
        flag = _run(make_session(path), feeds, ["quality_flag"])["quality_flag"]
        assert flag.shape == (200, 2)


def test_onnx_matches_in_memory_sklearn_model(trained):
    data, emu = trained["data"], trained["emu"]
    rows = np.arange(0, 1200, 7)
    feeds = _feeds(data, rows, _columns(trained))
    out = _run(make_session(trained["path"]), feeds, ["brightness_temperature"])
    # the reference sees the same float32-rounded inputs, in float64
    ref = emu.predict(*(feeds[n].astype(float) for n in _graph.INPUT_NAMES[:3]),
                      feeds["surface_emissivity"].astype(float), feeds["sensor_zenith_angle"].astype(float))
    # float32 evaluation: ~120-term products of centred features; 1e-3 K bounds the
    # accumulated round-off (float32 epsilon 6e-8 relative) with a wide margin
    np.testing.assert_allclose(out["brightness_temperature"], ref, atol=1e-3, rtol=0)


def test_forward_cross_checked_with_skl2onnx(trained):
    """Each channel's regressors converted by skl2onnx (an independent converter) give the
    same brightness temperatures as the hand-built graph."""
    from skl2onnx import convert_sklearn
    from skl2onnx.common.data_types import DoubleTensorType

    from rtemu.features import raw_features

    data, emu = trained["data"], trained["emu"]
    rows = np.arange(3, 1200, 11)
    feeds = _feeds(data, rows, _columns(trained))
    bundle_bt = _run(make_session(trained["path"]), feeds, ["brightness_temperature"])["brightness_temperature"]
    x = raw_features(*(feeds[n].astype(float) for n in ("air_temperature", "specific_humidity",
                                                         "surface_temperature", "sensor_zenith_angle")),
                     emu.config, data.pressure_hpa)
    z = emu.transform.transform(x)  # through the sklearn scaler/PCA objects
    for i, cid in enumerate(emu.channel_ids):
        fit = emu.channels[cid]
        e = feeds["surface_emissivity"][:, i].astype(float)
        u, design = fit.network_input(z, e), fit.design(z, x[:, -1], e)
        outs = []
        for est, inp in ((fit.mlp, u), (fit.ridge, design)):
            onx = convert_sklearn(est, initial_types=[("input", DoubleTensorType([None, inp.shape[1]]))],
                                  target_opset=17)
            sess = ort.InferenceSession(onx.SerializeToString(), providers=["CPUExecutionProvider"])
            outs.append(sess.run(None, {"input": inp})[0].ravel())
        bt = outs[1] + fit.target_mean + fit.target_scale * outs[0]
        np.testing.assert_allclose(bundle_bt[:, i], bt, atol=1e-3, rtol=0, err_msg=cid)


def test_jacobians_match_central_differences_float64(trained):
    """Rebuilt in float64, the graph's Jacobians equal central differences of its own BT."""
    session = _float64_session(trained["path"])
    data = trained["data"]
    rows = np.array([5, 400, 999])
    feeds = _feeds(data, rows, _columns(trained), dtype=np.float64)
    out = _run(session, feeds)
    C, L = feeds["surface_emissivity"].shape[1], feeds["air_temperature"].shape[1]
    checks = [("air_temperature", "jacobian_air_temperature", [0, 10, 25, L - 1]),
              ("specific_humidity", "jacobian_specific_humidity", [0, 5, 15, 30])]
    for var, jac, levels in checks:
        for lev in levels:
            x0 = feeds[var][:, lev]
            # relative steps (q spans decades; T ~ 250 K -> 2.5e-3 K); the larger one for q:
            # on dry levels h is ~1e-9 kg kg-1 and the BT's round-off (a few eps of 300 K)
            # over 2 h dominates smaller steps (measured: the FD error fell as 1/h down to
            # 3e-3 relative); the tolerance allows 32 eps |BT| / (2 h) of it
            h = (1e-5 if var == "air_temperature" else 1e-3) * np.abs(x0)
            plus, minus = dict(feeds), dict(feeds)
            plus[var], minus[var] = feeds[var].copy(), feeds[var].copy()
            plus[var][:, lev] += h
            minus[var][:, lev] -= h
            fd = (_run(session, plus, ["brightness_temperature"])["brightness_temperature"]
                  - _run(session, minus, ["brightness_temperature"])["brightness_temperature"]) / (2 * h[:, None])
            analytic = out[jac][:, :, lev]
            scale = np.abs(out[jac]).max(axis=2) + 1e-30
            # float64 central differences: truncation O(h^2) and round-off
            roundoff = 32 * np.finfo(float).eps * np.abs(out["brightness_temperature"]) / (2 * h[:, None])
            assert np.all(np.abs(fd - analytic) <= 1e-6 * scale + roundoff + 1e-9), (var, lev, fd, analytic)
    for var, jac in (("surface_temperature", "jacobian_surface_temperature"),):
        h = 1e-3
        plus, minus = dict(feeds), dict(feeds)
        plus[var], minus[var] = feeds[var] + h, feeds[var] - h
        fd = (session.run(["brightness_temperature"], plus)[0] - session.run(["brightness_temperature"], minus)[0]) / (2 * h)
        np.testing.assert_allclose(out[jac], fd, rtol=1e-6, atol=1e-9)
    for c in range(C):
        h = 1e-5
        plus, minus = dict(feeds), dict(feeds)
        plus["surface_emissivity"] = feeds["surface_emissivity"].copy()
        minus["surface_emissivity"] = feeds["surface_emissivity"].copy()
        plus["surface_emissivity"][:, c] += h
        minus["surface_emissivity"][:, c] -= h
        fd = (session.run(["brightness_temperature"], plus)[0] - session.run(["brightness_temperature"], minus)[0]) / (2 * h)
        np.testing.assert_allclose(out["jacobian_surface_emissivity"][:, c], fd[:, c], rtol=1e-6, atol=1e-7)
        others = np.delete(fd, c, axis=1)
        assert np.all(np.abs(others) < 1e-9)  # e_c feeds only channel c


def test_float32_jacobians_agree_with_float64_graph_and_fd(trained):
    data = trained["data"]
    rows = np.arange(10, 1200, 97)
    cols = _columns(trained)
    f32 = _run(make_session(trained["path"]), _feeds(data, rows, cols))
    f64 = _run(_float64_session(trained["path"]), _feeds(data, rows, cols, dtype=np.float64))
    for name in ("jacobian_air_temperature", "jacobian_specific_humidity", "jacobian_surface_temperature",
                 "jacobian_surface_emissivity"):
        scale = np.abs(f64[name]).max()
        # float32 products of O(10)-sized terms: 1e-4 of the largest entry
        np.testing.assert_allclose(f32[name], f64[name], atol=1e-4 * scale, rtol=0, err_msg=name)
    # and directly on the float32 file: a 0.05 K step in the whole column
    feeds = _feeds(data, rows, cols)
    step = np.float32(0.05)
    plus, minus = dict(feeds), dict(feeds)
    plus["air_temperature"] = feeds["air_temperature"] + step
    minus["air_temperature"] = feeds["air_temperature"] - step
    s = make_session(trained["path"])
    fd = (s.run(["brightness_temperature"], plus)[0].astype(float)
          - s.run(["brightness_temperature"], minus)[0].astype(float)) / (2 * 0.05)
    column = f32["jacobian_air_temperature"].sum(axis=2) + f32["jacobian_surface_temperature"] * 0
    # BT in float32 resolves ~3e-5 K, so the difference quotient is good to ~1e-3 K/K
    np.testing.assert_allclose(column, fd, atol=2e-3 + 0.01 * np.abs(fd).max())


def test_pruned_session_bt_only_same_values_fewer_nodes(trained):
    data = trained["data"]
    feeds = _feeds(data, np.arange(50), _columns(trained))
    full = _run(make_session(trained["path"]), feeds)
    bt_only = make_session(trained["path"], outputs=["brightness_temperature"])
    assert [o.name for o in bt_only.get_outputs()] == ["brightness_temperature"]
    np.testing.assert_array_equal(bt_only.run(None, feeds)[0], full["brightness_temperature"])
    model = onnx.load(str(trained["path"]))
    small = pruned_model(model, ["brightness_temperature"])
    assert len(small.graph.node) < 0.6 * len(model.graph.node)
    with pytest.raises(ValueError, match="not outputs"):
        pruned_model(model, ["radiance"])


# ---- flags --------------------------------------------------------------------------------
def test_flags_zero_on_training_profiles(trained):
    data = trained["data"]
    out = _run(make_session(trained["path"]), _feeds(data, np.arange(1200), _columns(trained)), ["quality_flag"])
    assert out["quality_flag"].dtype == np.int32
    assert np.all(out["quality_flag"] == 0)  # every training state lies inside its own envelope


def test_flag_rates_on_an_independent_draw(trained):
    """The issue's flag targets, loosely, for a tiny bundle (1,200 training states): of 600
    states drawn with another seed at most 10 % flagged (the full recipe's 30,000 give
    0.12 %, README), and the same states 30 K warmer throughout flagged at least 97 %
    (target 99 %, met by the shipped recipes)."""
    from rtemu.sampling import draw_states

    data = trained["data"]
    states = draw_states(600, seed=77, pressure_hpa=data.pressure_hpa, channels=data.instrument)
    ids = list(states["channel"].values)
    feeds = {
        "air_temperature": states["air_temperature"].values.astype(np.float32),
        "specific_humidity": states["specific_humidity"].values.astype(np.float32),
        "surface_temperature": states["surface_temperature"].values.astype(np.float32),
        "surface_emissivity": states["surface_emissivity"].values[
            :, [ids.index(c) for c in trained["emu"].channel_ids]].astype(np.float32),
        "sensor_zenith_angle": states["sensor_zenith_angle"].values.astype(np.float32),
    }
    session = make_session(trained["path"], outputs=["quality_flag"])
    inside = (_run(session, feeds)["quality_flag"] != 0).any(axis=1)
    warm = dict(feeds, air_temperature=feeds["air_temperature"] + np.float32(30.0),
                surface_temperature=feeds["surface_temperature"] + np.float32(30.0))
    moved = (_run(session, warm)["quality_flag"] != 0).any(axis=1)
    assert inside.mean() <= 0.10 and moved.mean() >= 0.97, (inside.mean(), moved.mean())


def test_flags_on_crafted_inputs(trained):
    data = trained["data"]
    session = make_session(trained["path"])
    base = _feeds(data, np.arange(8), _columns(trained))

    def flag_of(**changes):
        feeds = {k: v.copy() for k, v in base.items()}
        for name, fn in changes.items():
            feeds[name] = fn(feeds[name]).astype(np.float32)
        return _run(session, feeds, ["quality_flag"])["quality_flag"]

    assert np.all(flag_of() == 0)
    nan_t = flag_of(air_temperature=lambda t: np.where(np.arange(t.shape[1]) == 3, np.nan, t))
    assert np.all(nan_t == flags.INVALID_INPUT)  # exactly bit 1, nothing else
    inf_ts = flag_of(surface_temperature=lambda t: np.full_like(t, np.inf))
    assert np.all(inf_ts == flags.INVALID_INPUT)
    negative_q = flag_of(specific_humidity=lambda q: np.where(np.arange(q.shape[1]) == 0, -1e-3, q))
    assert np.all(negative_q == flags.INVALID_INPUT)
    zenith = flag_of(sensor_zenith_angle=lambda z: np.full_like(z, 87.0))  # physical rule: <= 85 degree
    assert np.all(zenith == flags.INVALID_INPUT)
    warm = flag_of(air_temperature=lambda t: t + 60.0)
    assert np.all(warm & flags.OUTSIDE_TRAINING_BOUNDS) and not np.any(warm & flags.INVALID_INPUT)
    # an emissivity outside its channel's range flags that channel only
    low_e = flag_of(surface_emissivity=lambda e: np.where(np.arange(e.shape[1]) == 1, 0.05, e))
    assert np.all(low_e[:, 1] & flags.OUTSIDE_TRAINING_BOUNDS)
    assert np.all(np.delete(low_e, 1, axis=1) == 0)


def test_novelty_flag_off_subspace_within_bounds(trained):
    """A level-to-level zigzag of +-5 K on training profiles, kept only where it stays
    inside every per-level range, leaves the PCA subspace: novel_state, not bounds.

    +-5 K since generator v5: its regimes and terrain (ground at 500-1060 hPa, boundary-layer
    kinks anywhere in the lower troposphere) widen the training states' own off-subspace
    residuals. Measured on this 1,200-profile set (constant_opacity bundle): +-5 K flags
    all 99 in-range rows, +-4 K 81 % of 201 (generator v4: all at +-4 K); docs/decisions.md."""
    from rtemu.training import humidity_index

    data = trained["data"]
    b = read_bundle(trained["path"])
    env = {k: (np.asarray(v["lower"], float), np.asarray(v["upper"], float)) for k, v in b.envelope.items()}

    def zigzag_flags(amplitude, limit):
        zig = np.where(np.arange(data.pressure_hpa.size) % 2 == 0, amplitude, -amplitude)
        T = data.air_temperature + zig
        h = humidity_index(T, data.specific_humidity, data.pressure_hpa)
        contrast = data.surface_temperature - T[:, 0]
        inside = ((T >= env["air_temperature"][0]) & (T <= env["air_temperature"][1])).all(axis=1)
        inside &= ((h >= env["humidity_index"][0]) & (h <= env["humidity_index"][1])).all(axis=1)
        inside &= (contrast >= env["skin_minus_air_temperature"][0]) & (contrast <= env["skin_minus_air_temperature"][1])
        rows = np.flatnonzero(inside)[:limit]
        assert rows.size >= 5
        feeds = _feeds(data, rows, _columns(trained))
        feeds["air_temperature"] = T[rows].astype(np.float32)
        return _run(make_session(trained["path"]), feeds, ["quality_flag"])["quality_flag"]

    assert np.all(zigzag_flags(5.0, 40) == flags.NOVEL_STATE)
    assert np.mean((zigzag_flags(4.0, 200) == flags.NOVEL_STATE).all(axis=1)) > 0.75


def test_tropopause_ranges_cover_every_training_state(trained):
    """The envelope's tropopause ranges hold every training state, and a base no training
    state reached gets the empty range; the metadata carries the same numbers."""
    from rtemu import atmosphere as atm
    from rtemu.training import TROPOPAUSE_NEVER

    data, env = trained["data"], trained["emu"].envelope
    position, t = atm.lapse_rate_tropopause(data.air_temperature, data.pressure_hpa)
    m = atm.tropopause_search_layers(data.pressure_hpa)["base"].size
    assert env.tropopause_lower.shape == (m + 1,) and trained["layout"].n_tropopause_layers == m
    found = position < m
    assert found.mean() > 0.95
    assert np.all(env.tropopause_lower[position[found]] < t[found])
    assert np.all(env.tropopause_upper[position[found]] > t[found])
    unseen = np.setdiff1d(np.arange(m), position[found])
    assert np.all(env.tropopause_lower[unseen] == TROPOPAUSE_NEVER)
    assert np.all(env.tropopause_upper[unseen] == -TROPOPAUSE_NEVER)
    th = read_bundle(trained["path"]).flag_thresholds["tropopause"]
    assert np.allclose(th["lower_k"], env.tropopause_lower, rtol=1e-6)
    assert len(th["base_pressure_hpa"]) == m and th["lapse_rate_k_per_km"] == 2.0


def test_graph_tropopause_check_matches_numpy(trained):
    """The graph's tropopause check against rtemu.atmosphere.lapse_rate_tropopause: with
    each base's lower limit moved to the median temperature found there, exactly the
    training states below their base's median get novel_state (training states raise no
    other flag)."""
    from rtemu import atmosphere as atm

    data = trained["data"]
    b = read_bundle(trained["path"])
    layout = _layout(b)
    arrays = {k: v for k, v in b.arrays().items() if k in _graph.primary_shapes(layout)}
    rows = np.arange(600)
    T = data.air_temperature[rows].astype(np.float32).astype(float)
    position, t = atm.lapse_rate_tropopause(T, data.pressure_hpa)
    m = layout.n_tropopause_layers
    lower = arrays["tropopause_lower"].copy()
    for k in np.unique(position[position < m]):
        lower[k] = np.float32(np.median(t[position == k]))
    arrays["tropopause_lower"] = lower
    model = _graph.build_model(layout, arrays)
    session = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    flag = _run(session, _feeds(data, rows, _columns(trained)), ["quality_flag"])["quality_flag"]
    expected = (position < m) & (np.where(position < m, t, np.inf) < lower[position].astype(float))
    assert 0.2 < expected.mean() < 0.6
    assert np.array_equal(flag, np.where(expected, flags.NOVEL_STATE, 0)[:, None] * np.ones(flag.shape[1], int))


def test_warmed_states_flagged_by_the_tropopause_check(trained):
    """Training states warmed by 30 K throughout keep their tropopause level but not its
    temperature: novel_state from the tropopause check alone, even where every per-level
    bound would pass (checked here with the bounds widened out of the way)."""
    data = trained["data"]
    b = read_bundle(trained["path"])
    layout = _layout(b)
    arrays = {k: v for k, v in b.arrays().items() if k in _graph.primary_shapes(layout)}
    arrays["training_lower"] = np.full_like(arrays["training_lower"], -1e4)
    arrays["training_upper"] = np.full_like(arrays["training_upper"], 1e4)
    arrays["novelty_scale"] = np.zeros_like(arrays["novelty_scale"])
    model = _graph.build_model(layout, arrays)
    session = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    rows = np.arange(300)
    feeds = _feeds(data, rows, _columns(trained))
    assert np.all(_run(session, feeds, ["quality_flag"])["quality_flag"] == 0)
    feeds["air_temperature"] = feeds["air_temperature"] + np.float32(30.0)
    feeds["surface_temperature"] = feeds["surface_temperature"] + np.float32(30.0)
    flag = _run(session, feeds, ["quality_flag"])["quality_flag"]
    assert np.all((flag == 0) | (flag == flags.NOVEL_STATE))
    assert (flag[:, 0] == flags.NOVEL_STATE).mean() > 0.9


def test_flags_catch_supersaturation_and_skin_contrast(trained):
    """Derived checks: q above saturation at some levels only (within the per-level q
    range) and a skin temperature far from the air above it."""
    from rtemu.atmosphere import saturation_specific_humidity

    data = trained["data"]
    session = make_session(trained["path"])
    rows = np.arange(40)
    feeds = _feeds(data, rows, _columns(trained))
    qsat = saturation_specific_humidity(data.air_temperature[rows], data.pressure_hpa[None, :])
    wet = dict(feeds)
    q = data.specific_humidity[rows].copy()
    q[:, 10:14] = 1.5 * qsat[:, 10:14]  # 150 % relative humidity on four levels
    wet["specific_humidity"] = q.astype(np.float32)
    assert np.all(_run(session, wet, ["quality_flag"])["quality_flag"] & flags.OUTSIDE_TRAINING_BOUNDS)
    hot = dict(feeds)
    # 40 K: generator v5 draws hot-desert ground up to 25 K above the air (25.8 K measured,
    # docs/generator.md), so 25 K is no longer far from the training states
    hot["surface_temperature"] = (data.air_temperature[rows, 0] + 40.0).astype(np.float32)
    assert np.all(_run(session, hot, ["quality_flag"])["quality_flag"] & flags.OUTSIDE_TRAINING_BOUNDS)
