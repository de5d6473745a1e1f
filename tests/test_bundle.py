"""Bundle integrity: every damaged, foreign, newer or tampered file is refused with a clear
BundleError (a ValueError); a good one is parsed and described."""

from __future__ import annotations

import json

import numpy as np
import onnx
import pytest
from onnx import helper, numpy_helper

from rtemu import bundle as rb
from rtemu.export import build_bundle_model
from rtemu.sampling import sample_to_netcdf
from rtemu.training import Recipe, fit_emulator

TINY = """
name = "tiny-bundle"
[training]
seed = 1
validation_fraction = 0.25
[features]
temperature_components = 4
humidity_components = 4
[absorbers]
profiles = 100
validation_profiles = 50
max_absorbers = 1
starts = 1
start_evaluations = 5
evaluations = 10
[network]
hidden_layers = [5]
max_iter = 20
check_every = 10
"""


@pytest.fixture(scope="module")
def good(tmp_path_factory):
    root = tmp_path_factory.mktemp("bundle")
    data = sample_to_netcdf("demo-sounder", root / "train.nc", count=300, seed=3, progress=False)
    emu = fit_emulator(data, Recipe.from_toml(TINY, "tiny"), channels=["mw-t2", "ir-w1"], workers=1,
                       progress=False)
    path = root / "good.onnx"
    path.write_bytes(build_bundle_model(emu)[0])
    return path


def _write_model(model: onnx.ModelProto, path, *, resign_metadata: bool = False):
    if resign_metadata:
        props = {p.key: p.value for p in model.metadata_props}
        props["rtemu.metadata_sha256"] = rb.metadata_sha256(props)
        del model.metadata_props[:]
        helper.set_model_props(model, props)
    path.write_bytes(model.SerializeToString())
    return path


def _with_prop(good, tmp_path, key, value, resign=True):
    model = onnx.load(str(good))
    for p in model.metadata_props:
        if p.key == key:
            p.value = value
    return _write_model(model, tmp_path / "edited.onnx", resign_metadata=resign)


def test_good_bundle_parses(good):
    b = rb.read_bundle(good)
    assert b.format_version == rb.FORMAT_VERSION
    assert b.channel_ids == ("mw-t2", "ir-w1")
    assert b.instrument.channel_ids == b.channel_ids
    assert b.pressure_hpa.size == 64 and b.pressure_hpa[0] > b.pressure_hpa[-1]
    assert set(b.channel_stats) == {"mw-t2", "ir-w1"}
    assert json.loads(b.metadata["rtemu.flag_meanings"]) == b.flag_meanings
    assert b.flag_meanings["1"] == "invalid_input" and b.flag_meanings["4"] == "novel_state"
    assert all(k.startswith("rtemu.") for k in b.metadata)
    assert set(rb.REQUIRED_KEYS) <= set(b.metadata)
    # the stored grid is the sampler's default grid (the training file's), surface first
    from rtemu.atmosphere import default_pressure_grid

    np.testing.assert_array_equal(b.pressure_hpa, default_pressure_grid())


def test_describe_is_readable(good):
    text = rb.describe(good)
    for piece in ("mw-t2", "ir-w1", "format version", "tiny-bundle", "brightness_temperature",
                  "jacobian_specific_humidity", "novel_state", "64 levels", "tropopause check: first level"):
        assert piece in text
    assert "gray absorbers     up to 1 per channel" in text and "within 2 sigma" in text
    assert "brightness_temperature_uncertainty" in text and "surface_air_pressure" in text


def test_bundle_error_is_a_value_error():
    assert issubclass(rb.BundleError, ValueError)


def test_missing_and_empty_files(tmp_path):
    with pytest.raises(rb.BundleError, match="no such file"):
        rb.read_bundle(tmp_path / "absent.onnx")
    (tmp_path / "empty.onnx").write_bytes(b"")
    with pytest.raises(rb.BundleError, match="empty file"):
        rb.read_bundle(tmp_path / "empty.onnx")


@pytest.mark.parametrize("fraction", [0.5, 0.9, 0.999])
def test_truncated_file_refused(good, tmp_path, fraction):
    data = good.read_bytes()
    path = tmp_path / "cut.onnx"
    path.write_bytes(data[: int(len(data) * fraction)])
    with pytest.raises(rb.BundleError, match="truncated|corrupted|incomplete"):
        rb.read_bundle(path)


@pytest.mark.parametrize("where", [0.1, 0.3, 0.5, 0.7, 0.95])
def test_corrupted_byte_refused(good, tmp_path, where):
    data = bytearray(good.read_bytes())
    i = int(len(data) * where)
    data[i] ^= 0x5A
    path = tmp_path / "flip.onnx"
    path.write_bytes(bytes(data))
    with pytest.raises(rb.BundleError, match="corrupted|tampered|edited|not valid|inconsistent"):
        rb.read_bundle(path)


def test_foreign_onnx_refused(tmp_path):
    x = helper.make_tensor_value_info("x", onnx.TensorProto.FLOAT, [None, 2])
    y = helper.make_tensor_value_info("y", onnx.TensorProto.FLOAT, [None, 2])
    graph = helper.make_graph([helper.make_node("Relu", ["x"], ["y"])], "other", [x], [y])
    model = helper.make_model(graph, producer_name="someone-else", opset_imports=[helper.make_opsetid("", 17)])
    onnx.checker.check_model(model)
    path = _write_model(model, tmp_path / "foreign.onnx")
    with pytest.raises(rb.BundleError, match="not an rtemu bundle"):
        rb.read_bundle(path)


def test_newer_format_refused(good, tmp_path):
    path = _with_prop(good, tmp_path, "rtemu.format_version", str(rb.FORMAT_VERSION + 1))
    with pytest.raises(rb.BundleError, match="newer.*upgrade rtemu"):
        rb.read_bundle(path)


def test_edited_metadata_refused(good, tmp_path):
    model = onnx.load(str(good))
    for p in model.metadata_props:
        if p.key == "rtemu.channel_stats":
            p.value = p.value.replace('"iterations": ', '"iterations": 1')
    path = _write_model(model, tmp_path / "edited.onnx")
    with pytest.raises(rb.BundleError, match="metadata do not match their SHA-256"):
        rb.read_bundle(path)


def test_inconsistent_metadata_refused(good, tmp_path):
    path = _with_prop(good, tmp_path, "rtemu.channels", json.dumps(["mw-t2"]))
    with pytest.raises(rb.BundleError, match="inconsistent"):
        rb.read_bundle(path)
    path = _with_prop(good, tmp_path, "rtemu.pressure_hpa", json.dumps([1000.0, 500.0]))
    with pytest.raises(rb.BundleError, match="inconsistent"):
        rb.read_bundle(path)


def test_missing_key_refused(good, tmp_path):
    model = onnx.load(str(good))
    kept = [p for p in model.metadata_props if p.key != "rtemu.envelope"]
    del model.metadata_props[:]
    model.metadata_props.extend(kept)
    path = _write_model(model, tmp_path / "partial.onnx", resign_metadata=True)
    with pytest.raises(rb.BundleError, match="missing.*rtemu.envelope"):
        rb.read_bundle(path)


def test_tampered_weights_refused(good, tmp_path):
    model = onnx.load(str(good))
    for i, init in enumerate(model.graph.initializer):
        if init.name == "output_offset":
            value = numpy_helper.to_array(init).copy()
            value[0] += 0.5  # the constant of channel 0: a plausible, silent 0.5 K shift
            model.graph.initializer[i].CopyFrom(numpy_helper.from_array(value, "output_offset"))
    path = _write_model(model, tmp_path / "tampered.onnx")
    with pytest.raises(rb.BundleError, match="weights do not match their SHA-256"):
        rb.read_bundle(path)


def test_edited_graph_refused(good, tmp_path):
    model = onnx.load(str(good))
    for node in model.graph.node:
        if node.op_type == "Tanh":
            node.op_type = "Sigmoid"
            break
    path = _write_model(model, tmp_path / "graph.onnx")
    with pytest.raises(rb.BundleError, match="graph does not match its SHA-256"):
        rb.read_bundle(path)


def test_weights_digest_is_order_independent_and_content_sensitive(good):
    model = onnx.load(str(good))
    digest = rb.weights_sha256(model)
    assert digest == rb.read_bundle(good).weights_sha256
    inits = list(model.graph.initializer)
    del model.graph.initializer[:]
    model.graph.initializer.extend(reversed(inits))
    assert rb.weights_sha256(model) == digest
