"""The format-7 bundle graph: exact Jacobians, batch invariance, portability, flags, terrain."""

from __future__ import annotations

import numpy as np
import onnx
import onnxruntime as ort
import pytest

from rtemu import _graph
from rtemu import flags as _flags
from rtemu.bundle import BundleError, read_bundle
from rtemu.export import build_bundle_model
from tests.conftest import TINY_RECIPE


@pytest.fixture(scope="module")
def small_emulator(tmp_path_factory, demo_instrument):
    """A two-channel emulator (humidity and temperature sounding) fitted on 400 profiles."""
    from rtemu.sampling import sample_to_netcdf
    from rtemu.training import Recipe, fit_emulator, load_training_data

    d = tmp_path_factory.mktemp("small-emulator")
    sample_to_netcdf(demo_instrument, d / "train.nc", count=400, seed=5, progress=False)
    data = load_training_data(d / "train.nc")
    recipe = Recipe.from_toml(TINY_RECIPE.replace("max_profiles = 1500", "max_profiles = 400"))
    return fit_emulator(data, recipe, channels=["mw-t3", "mw-h2"], workers=1, progress=False), data


def _feeds(data, columns, rows, dtype=np.float32, ps=None):
    n = len(rows)
    return {
        "air_temperature": data.air_temperature[rows].astype(dtype),
        "specific_humidity": data.specific_humidity[rows].astype(dtype),
        "surface_temperature": data.surface_temperature[rows].astype(dtype),
        "surface_emissivity": data.surface_emissivity[rows][:, columns].astype(dtype),
        "sensor_zenith_angle": data.sensor_zenith_angle[rows].astype(dtype),
        "surface_air_pressure": (np.full(n, data.pressure_hpa[0]) if ps is None else ps).astype(dtype),
    }


def _session(model_bytes):
    return ort.InferenceSession(model_bytes, providers=["CPUExecutionProvider"])


def _run(session, feeds):
    return dict(zip([o.name for o in session.get_outputs()], session.run(None, feeds)))


def test_graph_reproduces_the_fitted_model(small_emulator):
    emu, data = small_emulator
    cols = [3, 8]  # mw-t3, mw-h2 in the demo sounder
    assert [data.instrument.channel_ids[c] for c in cols] == emu.channel_ids
    rows = np.arange(60)
    ps = np.where(rows % 3 == 0, 850.0, data.pressure_hpa[0])  # a third on terrain
    out = _run(_session(build_bundle_model(emu)[0]), _feeds(data, cols, rows, ps=ps))
    bt, sigma = emu.predict(data.air_temperature[rows], data.specific_humidity[rows], data.surface_temperature[rows],
                            data.surface_emissivity[rows][:, cols], data.sensor_zenith_angle[rows], ps)
    np.testing.assert_allclose(out["brightness_temperature"], bt, atol=1e-3)
    np.testing.assert_allclose(out["brightness_temperature_uncertainty"], sigma, rtol=1e-3, atol=1e-5)


@pytest.mark.parametrize("terrain", [False, True])
def test_float64_graph_jacobians_match_finite_differences(small_emulator, terrain):
    emu, data = small_emulator
    cols = [3, 8]
    session = _session(build_bundle_model(emu, dtype=np.float64)[0])
    rows = np.arange(3)
    ps = np.full(3, 812.5 if terrain else data.pressure_hpa[0])
    feeds = _feeds(data, cols, rows, np.float64, ps=ps)
    out = _run(session, feeds)
    for name, jac, step in (("air_temperature", "jacobian_air_temperature", 1e-4),
                            ("specific_humidity", "jacobian_specific_humidity", None)):
        for level in (0, 3, 12, 25, 40):
            x = feeds[name]
            h = step if step else 1e-5 * x[:, level]
            up, dn = dict(feeds), dict(feeds)
            up[name], dn[name] = x.copy(), x.copy()
            up[name][:, level] += h
            dn[name][:, level] -= h
            fd = (_run(session, up)["brightness_temperature"] - _run(session, dn)["brightness_temperature"]) / (2 * h)[..., None] \
                if step is None else (_run(session, up)["brightness_temperature"]
                                      - _run(session, dn)["brightness_temperature"]) / (2 * h)
            scale = np.abs(out[jac]).max() + 1e-12
            np.testing.assert_allclose(out[jac][:, :, level], fd, atol=1e-5 * scale, rtol=1e-4)
    for name, jac in (("surface_temperature", "jacobian_surface_temperature"),
                      ("surface_emissivity", "jacobian_surface_emissivity")):
        up, dn = dict(feeds), dict(feeds)
        up[name], dn[name] = feeds[name] + 1e-5, feeds[name] - 1e-5
        fd = (_run(session, up)["brightness_temperature"] - _run(session, dn)["brightness_temperature"]) / 2e-5
        if name == "surface_temperature":
            np.testing.assert_allclose(out[jac], fd, rtol=1e-4, atol=1e-7)
        else:  # each channel's emissivity moves only its own channel: the diagonal
            np.testing.assert_allclose(out[jac], fd, rtol=1e-4, atol=1e-6)


def test_graph_is_portable(tiny_bundle):
    model = onnx.load(str(tiny_bundle))
    assert model.ir_version <= 9
    assert all(o.version <= 19 for o in model.opset_import if o.domain in ("", "ai.onnx"))
    inits = {t.name for t in model.graph.initializer}
    transposed = [n.name for n in model.graph.node if n.op_type == "Transpose" and n.input[0] in inits]
    assert transposed == []


def _tiny_feeds(path, n, seed=0):
    b = read_bundle(path)
    rng = np.random.default_rng(seed)
    from rtemu.sampling import draw_states

    ds = draw_states(n, seed=seed + 100, channels=b.instrument)
    grid = np.asarray(ds["air_pressure"].values if ds["air_pressure"].ndim == 1 else ds["air_pressure"].values[0])
    order = slice(None, None, -1) if grid[0] < grid[-1] else slice(None)
    em = ds["surface_emissivity"].values
    em = np.repeat(em[:, None], len(b.channel_ids), axis=1) if em.ndim == 1 else em
    return {
        "air_temperature": ds["air_temperature"].values[:, order].astype(np.float32),
        "specific_humidity": ds["specific_humidity"].values[:, order].astype(np.float32),
        "surface_temperature": ds["surface_temperature"].values.astype(np.float32),
        "surface_emissivity": em.astype(np.float32),
        "sensor_zenith_angle": ds["sensor_zenith_angle"].values.astype(np.float32),
        "surface_air_pressure": rng.choice([float(grid.max()), 700.0, 930.0], n).astype(np.float32),
    }


def test_outputs_do_not_depend_on_the_batch(tiny_bundle):
    session = _session(str(tiny_bundle))
    feeds = _tiny_feeds(tiny_bundle, 37)
    whole = _run(session, feeds)
    for size in (1, 2, 3, 5, 16):
        for start in range(0, 37, 9):
            part = _run(session, {k: v[start:start + size] for k, v in feeds.items()})
            for name, value in part.items():
                np.testing.assert_array_equal(value, whole[name][start:start + size], err_msg=f"{name} batch {size}")


def _agree(reference, other):
    np.testing.assert_allclose(other["brightness_temperature"], reference["brightness_temperature"], atol=1e-3)
    for name in ("jacobian_air_temperature", "jacobian_specific_humidity", "jacobian_surface_temperature",
                 "jacobian_surface_emissivity"):
        scale = np.abs(reference[name]).max(axis=-1, keepdims=True) if reference[name].ndim == 3 \
            else np.abs(reference[name])
        np.testing.assert_allclose(other[name], reference[name], atol=1e-3 * scale.max(), rtol=1e-3)
    np.testing.assert_array_equal(other["quality_flag"], reference["quality_flag"])


def test_reference_evaluator_agrees_with_onnxruntime(tiny_bundle):
    from onnx.reference import ReferenceEvaluator

    feeds = _tiny_feeds(tiny_bundle, 5, seed=2)
    reference = _run(_session(str(tiny_bundle)), feeds)
    evaluator = ReferenceEvaluator(str(tiny_bundle))
    other = dict(zip(_graph.OUTPUT_NAMES, evaluator.run(None, feeds)))
    _agree(reference, other)


def test_tract_agrees_with_onnxruntime(tiny_bundle):
    tract = pytest.importorskip("tract")
    feeds = _tiny_feeds(tiny_bundle, 6, seed=3)
    reference = _run(_session(str(tiny_bundle)), feeds)
    model = tract.onnx().load(str(tiny_bundle))
    for i, name in enumerate(_graph.INPUT_NAMES):
        shape = [6] + list(feeds[name].shape[1:])
        model.set_input_fact(i, f"{','.join(map(str, shape))},f32")
    runnable = model.into_model().into_runnable()
    result = runnable.run([feeds[n] for n in _graph.INPUT_NAMES])
    other = {name: result[i].to_numpy() for i, name in enumerate(_graph.OUTPUT_NAMES)}
    _agree(reference, other)


def test_flag_bits_are_separate(tiny_bundle):
    session = _session(str(tiny_bundle))
    feeds = _tiny_feeds(tiny_bundle, 4, seed=4)
    feeds["surface_air_pressure"][:] = read_bundle(tiny_bundle).pressure_hpa.max()  # no terrain
    base = _run(session, feeds)["quality_flag"]
    warm = dict(feeds, air_temperature=feeds["air_temperature"] + 30.0)
    flag = _run(session, warm)["quality_flag"]
    assert (flag & _flags.OUTSIDE_TRAINING_BOUNDS).all()
    assert not (flag & _flags.INVALID_INPUT).any()
    ts = feeds["surface_temperature"].copy()
    ts[0] = np.nan
    bad = dict(feeds, surface_temperature=ts)
    flag = _run(session, bad)["quality_flag"]
    assert (flag[0] & _flags.INVALID_INPUT).all() and (flag[1:] == base[1:]).all()
    sigma = _run(session, feeds)["brightness_temperature_uncertainty"]
    bundle = read_bundle(tiny_bundle)
    by_channel = bundle.flag_thresholds["uncertainty_threshold_k"]  # JSON object: keys sorted, not in channel order
    threshold = np.array([by_channel[c] for c in bundle.channel_ids])
    expect = sigma > threshold.astype(np.float32)[None, :]  # the graph compares in float32
    np.testing.assert_array_equal((base & _flags.LARGE_UNCERTAINTY) != 0, expect)


def test_grid_bottom_surface_pressure_changes_nothing(tiny_bundle):
    session = _session(str(tiny_bundle))
    feeds = _tiny_feeds(tiny_bundle, 4, seed=6)
    bottom = read_bundle(tiny_bundle).pressure_hpa.max()
    feeds["surface_air_pressure"][:] = bottom
    a = _run(session, feeds)
    feeds["surface_air_pressure"][:] = bottom + 40.0  # below the grid: nothing to collapse
    b = _run(session, feeds)
    np.testing.assert_allclose(a["brightness_temperature"], b["brightness_temperature"], atol=1e-4)


def test_older_formats_are_refused(tiny_bundle, tmp_path):
    model = onnx.load(str(tiny_bundle))
    for prop in model.metadata_props:
        if prop.key == "rtemu.format_version":
            prop.value = "6"
    onnx.save(model, str(tmp_path / "old.onnx"))
    with pytest.raises(BundleError, match=r"retrain with rtemu >= 0\.2\.0"):
        read_bundle(tmp_path / "old.onnx")
