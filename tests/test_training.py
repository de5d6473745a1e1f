"""Recipes, per-channel training, train_to_onnx end to end, determinism, --channels."""

from __future__ import annotations

import numpy as np
import onnx
import pytest
import xarray as xr
from onnx import numpy_helper

from rtemu import bundle as rb
from rtemu.export import train_to_onnx
from rtemu.sampling import sample_to_netcdf
from rtemu.training import (
    Recipe,
    channel_seed,
    fit_emulator,
    list_recipes,
    load_recipe,
    load_training_data,
)

TINY = """
name = "tiny-train"
description = "seconds-scale recipe for tests"
[training]
seed = 11
validation_fraction = 0.2
[features]
temperature_components = 5
humidity_components = 5
[absorbers]
profiles = 200
validation_profiles = 100
max_absorbers = 1
starts = 2
start_evaluations = 8
evaluations = 20
[network]
hidden_layers = [8, 6]
max_iter = 40
check_every = 20
[channels."mw-t4"]
hidden_layers = [5, 6]
"""


@pytest.fixture(scope="module")
def data_path(tmp_path_factory):
    root = tmp_path_factory.mktemp("training")
    return sample_to_netcdf("demo-sounder", root / "train.nc", count=900, seed=8, progress=False)


@pytest.fixture(scope="module")
def recipe_path(tmp_path_factory):
    path = tmp_path_factory.mktemp("recipe") / "tiny.toml"
    path.write_text(TINY)
    return path


# ---- recipes ------------------------------------------------------------------------------
def test_shipped_recipes_load():
    assert {"demo", "full"} <= set(list_recipes())
    for name in ("demo", "full"):
        r = load_recipe(name)
        assert r.name == name and r.text.strip()
        assert r.settings["absorbers"]["target_rmse_k"] > 0 and r.settings["uncertainty"]["coverage"] == 0.95


def test_recipe_unknown_key_names_file_and_key(tmp_path):
    path = tmp_path / "bad.toml"
    path.write_text('name = "x"\n[network]\nhiden_layers = [3]\n')
    with pytest.raises(ValueError, match=r"bad\.toml.*unknown key 'network\.hiden_layers'"):
        load_recipe(path)
    path.write_text('name = "x"\n[netwrk]\nmax_iter = 3\n')
    with pytest.raises(ValueError, match=r"bad\.toml.*unknown key 'netwrk'"):
        load_recipe(path)
    path.write_text('name = "x"\n[channels."mw-t1"]\nactivation = "relu"\n')
    with pytest.raises(ValueError, match=r"unknown key 'channels\.mw-t1\.activation'"):
        load_recipe(path)


@pytest.mark.parametrize("text, message", [
    ('name = "x"\n[network]\nmax_iter = "many"\n', "network.max_iter' must be an integer"),
    ('name = "x"\n[network]\nhidden_layers = []\n', "hidden_layers' must be a list"),
    ('name = "x"\n[training]\nvalidation_fraction = 0.0\n', "validation_fraction' must be a number >"),
    ('name = "x"\n[absorbers]\nmax_absorbers = 0\n', "max_absorbers' must be an integer >= 1"),
    ('[network]\nmax_iter = 3\n', "missing key 'name'"),
    ('name = "x"\n[network]\nhidden_layers = [4, 4]\n[channels.a]\nhidden_layers = [4]\n', "share the number of hidden layers"),
    ('name = "x"\n[network\n', "not valid TOML"),
    ('name = "x"\n[uncertainty]\ncoverage = 1.5\n', "coverage' must be a number <="),
    ('name = "x"\n[features]\ninstrument_kernels = "bands"\n', "unknown key 'features.instrument_kernels'"),
])
def test_recipe_validation(text, message):
    with pytest.raises(ValueError, match=message):
        Recipe.from_toml(text, source="inline.toml")


def test_unknown_recipe_name_lists_shipped():
    with pytest.raises(ValueError, match="unknown recipe 'nope'.*demo"):
        load_recipe("nope")
    with pytest.raises(ValueError, match="does not exist"):
        load_recipe("missing/recipe.toml")


def test_channel_overrides_and_seeds():
    r = Recipe.from_toml(TINY, "tiny")
    assert r.network_for("mw-t4")["hidden_layers"] == [5, 6]
    assert r.network_for("mw-t1")["hidden_layers"] == [8, 6]
    # a channel's seed does not depend on which other channels are trained
    assert channel_seed(11, "mw-t1") == channel_seed(11, "mw-t1") != channel_seed(11, "mw-t2")


# ---- training data -----------------------------------------------------------------------
def test_training_data_needs_instrument(data_path, tmp_path):
    with xr.open_dataset(data_path, engine="h5netcdf") as ds:
        bare = ds.load()
    bare.attrs.pop("rtemu_instrument_toml")
    with pytest.raises(ValueError, match="rtemu_instrument_toml"):
        load_training_data(bare)
    with pytest.raises(ValueError, match="does not exist"):
        load_training_data(tmp_path / "nothing.nc")


def test_unknown_channel_refused(data_path, recipe_path):
    with pytest.raises(ValueError, match=r"channels \['xx-9'\] are not channels"):
        fit_emulator(data_path, recipe_path, channels=["xx-9"], workers=1, progress=False)


def test_channel_model_reproduces_the_sklearn_network(data_path, recipe_path):
    """The plain arrays a ChannelModel carries are scikit-learn's network, exactly."""
    data = load_training_data(data_path)
    emu = fit_emulator(data, recipe_path, channels=["mw-win"], workers=1, progress=False)
    from sklearn.neural_network import MLPRegressor

    ch = emu.channels["mw-win"]
    mlp = MLPRegressor(hidden_layer_sizes=ch.hidden, activation="tanh")
    mlp.coefs_, mlp.intercepts_, mlp.n_layers_, mlp.out_activation_ = ch.coefs, ch.intercepts, len(ch.coefs) + 1, "identity"
    mlp.n_outputs_ = 1
    u = np.random.default_rng(0).normal(size=(20, ch.input_center.size)) * ch.input_scale + ch.input_center
    np.testing.assert_allclose(ch.network(u), mlp.predict((u - ch.input_center) / ch.input_scale), rtol=1e-12)


def test_training_reads_nothing_of_the_instruments_bands(data_path, recipe_path):
    """The same file with every channel's bands removed trains to the same numbers."""
    import dataclasses

    data = load_training_data(data_path)
    inst = data.instrument
    bare = dataclasses.replace(inst, channels=tuple(dataclasses.replace(c, bands=()) for c in inst.channels))
    fits = [fit_emulator(dataclasses.replace(data, instrument=i), recipe_path, channels=["mw-h2"], workers=1,
                         progress=False).channels["mw-h2"] for i in (inst, bare)]
    np.testing.assert_array_equal(fits[0].absorbers.log_k, fits[1].absorbers.log_k)
    for a, b in zip(fits[0].coefs, fits[1].coefs):
        np.testing.assert_array_equal(a, b)


# ---- end to end, determinism --------------------------------------------------------
@pytest.fixture(scope="module")
def first(data_path, recipe_path, tmp_path_factory):
    out = tmp_path_factory.mktemp("first") / "model.onnx"
    lines = []
    b = train_to_onnx(data_path, recipe_path, out, channels=["mw-t4", "mw-win", "ir-t2"], workers=1,
                      progress=False, log=lines.append)
    return {"bundle": b, "path": out, "log": lines}


def test_train_to_onnx_end_to_end(first, data_path):
    b = first["bundle"]
    # channels come out in instrument order whatever order they were asked in
    assert b.channel_ids == ("mw-win", "mw-t4", "ir-t2")
    assert b.recipe_name == "tiny-train" and b.recipe_toml == TINY
    assert b.training_data_sha256 == load_training_data(data_path).sha256
    assert len(first["log"]) == 3 and all("validation RMSE" in line for line in first["log"])
    for cid, s in b.channel_stats.items():
        assert s["n_train"] + s["n_validation"] == 900
        assert s["validation_rmse_k"] > 0
    assert b.channel_stats["mw-t4"]["hidden_layers"] == [5, 6]
    assert b.graph["hidden"] == [8, 6]  # padded to the widest channel
    # even a 40-iteration network beats the spread of the temperature-sounding channel
    bt = xr.open_dataset(data_path, engine="h5netcdf")["brightness_temperature"].sel(channel="mw-t4")
    assert b.channel_stats["mw-t4"]["validation_rmse_k"] < 0.2 * float(bt.std())


def _props_without_time(path):
    model = onnx.load(str(path))
    props = {p.key: p.value for p in model.metadata_props}
    for key in ("rtemu.created", "rtemu.metadata_sha256"):
        props.pop(key)
    del model.metadata_props[:]
    return model.SerializeToString(), props


def test_determinism_same_file_but_creation_time(first, data_path, recipe_path, tmp_path):
    """Same seed + recipe + data: same bytes except the creation time (and the metadata
    digest that covers it), also with two worker processes instead of one."""
    again = tmp_path / "again.onnx"
    train_to_onnx(data_path, recipe_path, again, channels=["mw-win", "mw-t4", "ir-t2"], workers=2,
                  progress=False)
    assert _props_without_time(again) == _props_without_time(first["path"])
    assert first["path"].read_bytes() != b"" and len(again.read_bytes()) == len(first["path"].read_bytes())
