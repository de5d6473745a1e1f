"""Instrument files: the shipped demo-sounder, TOML round trip, and every validation error.

External references: fluids.atmosphere.ATMOSPHERE_1976 (U.S. Standard Atmosphere 1976) for
the temperature profile on which the demo weighting functions are checked.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from rtemu import physics
from rtemu.instrument import (
    ABSORBERS,
    LAW_KEYS,
    AbsorberLaw,
    AbsorptionTables,
    Band,
    Channel,
    Instrument,
    list_instruments,
    load_instrument,
)

# -- shipped instrument ----------------------------------------------------------------------


def test_demo_sounder_is_shipped_and_loads(demo_instrument):
    assert "demo-sounder" in list_instruments()
    assert all(isinstance(name, str) for name in list_instruments())
    inst = demo_instrument
    assert inst.name == "demo-sounder"
    assert "INVENTED" in inst.description  # RULES: demo instruments are labelled as invented
    assert len(inst.channel_ids) == len(set(inst.channel_ids)) == len(inst.channels)
    assert inst.noise_k.shape == (len(inst.channels),) and np.all(inst.noise_k > 0)
    for ch in inst.channels:
        assert (ch.frequency_ghz is None) != (ch.wavenumber_cm1 is None)
        assert ch.is_microwave == (ch.frequency_ghz is not None)
        assert math.fsum(b.weight for b in ch.bands) == pytest.approx(1.0, abs=1e-6)


def test_load_by_path_equals_load_by_name(tmp_path, demo_instrument):
    path = tmp_path / "copy.toml"
    path.write_text(demo_instrument.to_toml(), encoding="utf-8")
    assert load_instrument(path) == demo_instrument
    assert load_instrument(str(path)) == demo_instrument
    assert load_instrument(demo_instrument) is demo_instrument


def test_unknown_instrument_name_is_an_error():
    with pytest.raises(ValueError, match="'no-such-sounder' is neither a shipped instrument"):
        load_instrument("no-such-sounder")


def test_demo_round_trip(demo_instrument):
    again = Instrument.from_toml(demo_instrument.to_toml(), source="round-trip")
    assert again == demo_instrument
    assert again.to_toml() == demo_instrument.to_toml()


def test_select_keeps_given_order(demo_instrument):
    ids = [demo_instrument.channel_ids[3], demo_instrument.channel_ids[0]]
    sub = demo_instrument.select(ids)
    assert sub.channel_ids == tuple(ids)
    assert sub.channels[0] == demo_instrument.channels[3]
    with pytest.raises(ValueError, match=r"has no channel\(s\) \['nope'\]"):
        demo_instrument.select(["nope"])
    with pytest.raises(ValueError, match="repeats an id"):
        demo_instrument.select(ids + ids[:1])


# -- hypothesis round trip --------------------------------------------------------------------
_finite = dict(allow_nan=False, allow_infinity=False)
_positive = st.floats(min_value=1e-300, max_value=1e300, **_finite)
_nonnegative = st.floats(min_value=0.0, max_value=1e300, **_finite)


#: Two INVENTED tables for the generated instruments' table bands.
_TABLES = AbsorptionTables(pressure_hpa=[0.01, 1.0, 1100.0], temperature_k=[150.0, 350.0],
                           ln_k=np.arange(36.0).reshape(2, 3, 3, 2) / 10.0 - 5.0,
                           mask=[[True, False, True], [False, True, False]])


@st.composite
def generated_band(draw, weight, microwave, with_tables):
    """A band of any kind: default laws, own laws (any subset of LAW_KEYS), table; any of
    them with its own Planck position."""
    fields = {"weight": weight}
    if with_tables and draw(st.booleans()):
        fields["table"] = draw(st.integers(0, _TABLES.count - 1))
    else:
        fields.update(dry=draw(_nonnegative), h2o=draw(_nonnegative), continuum=draw(_nonnegative))
        exponent = st.floats(min_value=-1e6, max_value=1e6, **_finite)
        for key in draw(st.lists(st.sampled_from(LAW_KEYS), unique=True, max_size=5)):
            fields[key] = draw(exponent)
    if draw(st.booleans()):
        fields["frequency_ghz" if microwave else "wavenumber_cm1"] = draw(_positive)
    return Band(**fields)


@st.composite
def instruments(draw):
    n_channels = draw(st.integers(1, 4))
    ids = draw(st.lists(st.text(min_size=1, max_size=12), min_size=n_channels, max_size=n_channels,
                        unique=True))
    with_tables = draw(st.booleans())
    channels = []
    for cid in ids:
        raw = draw(st.lists(st.floats(min_value=0.01, max_value=1.0), min_size=1, max_size=4))
        weights = [w / math.fsum(raw) for w in raw]
        microwave = draw(st.booleans())
        bands = tuple(draw(generated_band(w, microwave, with_tables)) for w in weights)
        if draw(st.integers(0, 4)) == 0:
            bands = ()  # a band-less channel
        position = draw(_positive)
        channels.append(Channel(id=cid, frequency_ghz=position if microwave else None,
                                wavenumber_cm1=None if microwave else position,
                                noise_k=draw(_positive), bands=bands))
    exponent = st.floats(min_value=-1e6, max_value=1e6, **_finite)
    return Instrument(
        name=draw(st.text(min_size=1, max_size=20)),
        description=draw(st.text(max_size=40)),
        channels=tuple(channels),
        reference_pressure_hpa=draw(_positive),
        reference_temperature_k=draw(_positive),
        dry=AbsorberLaw(draw(exponent), draw(exponent)),
        h2o=AbsorberLaw(draw(exponent), draw(exponent)),
        continuum=AbsorberLaw(0.0, draw(exponent)),
        absorption_tables=_TABLES if with_tables else None,
        absorption_tables_file=draw(st.text(min_size=1, max_size=12)) if with_tables else None,
    )


@settings(max_examples=80, deadline=None)
@given(instruments())
def test_generated_instrument_round_trip(inst):
    text = inst.to_toml()
    assert Instrument.from_toml(text, source="generated", absorption_tables=inst.absorption_tables) == inst


# -- absorption tables: the companion file --------------------------------------------------------
TABLE_TOML = """name = "table-unit-test"
description = "INVENTED test instrument with absorption tables"
absorption_tables = "tables.nc"
[[channels]]
id = "t1"
wavenumber_cm1 = 700.0
noise_k = 0.1
bands = [ { weight = 0.5, table = 1 }, { weight = 0.5, dry = 1e-3, dry_pressure_exponent = 0.5 } ]
[[channels]]
id = "t2"
frequency_ghz = 118.0
noise_k = 0.1
bands = [ { weight = 0.5, table = 0, frequency_ghz = 116.5 }, { weight = 0.5, table = 1, frequency_ghz = 119.5 } ]
"""


@pytest.fixture
def table_file(tmp_path):
    _TABLES.to_netcdf(tmp_path / "tables.nc", title="INVENTED absorption tables", comment="test")
    (tmp_path / "inst.toml").write_text(TABLE_TOML, encoding="utf-8")
    return tmp_path


def test_tables_round_trip_through_the_loader(table_file):
    import h5netcdf

    inst = load_instrument(table_file / "inst.toml")
    assert inst.absorption_tables == _TABLES and inst.absorption_tables_file == "tables.nc"
    np.testing.assert_array_equal(inst.absorption_tables.ln_k, np.where(_TABLES.mask[:, :, None, None], _TABLES.ln_k, 0))
    assert inst.channels[0].bands[0] == Band(weight=0.5, table=1)
    assert inst.channels[1].bands[1].frequency_ghz == 119.5
    with h5netcdf.File(table_file / "tables.nc", "r") as f:  # the shared layout
        assert f.attrs["title"].startswith("INVENTED")
        assert f.variables["ln_k_dry"].dimensions == ("table", "pressure", "temperature")
        assert f.variables["ln_k_h2o"].attrs["units"] == "ln(m2 kg-1)"
        assert f.variables["absorber_mask"].dimensions == ("table", "absorber")
        assert f.variables["absorber_mask"].dtype == np.int8
    text = inst.to_toml()
    assert 'absorption_tables = "tables.nc"' in text and _TABLES.sha256 in text
    assert Instrument.from_toml(text, base_dir=table_file) == inst
    assert Instrument.from_toml(text, absorption_tables=inst.absorption_tables) == inst
    assert inst.select(["t2"]).absorption_tables == _TABLES
    with pytest.raises(ValueError, match=r"generated: key 'absorption_tables' names 'tables.nc', but no base folder"):
        Instrument.from_toml(text, source="generated")


def test_changed_table_file_is_refused_by_its_digest(table_file):
    text = load_instrument(table_file / "inst.toml").to_toml()
    changed = AbsorptionTables(pressure_hpa=_TABLES.pressure_hpa, temperature_k=_TABLES.temperature_k,
                               ln_k=_TABLES.ln_k + 1e-9, mask=_TABLES.mask)
    changed.to_netcdf(table_file / "tables.nc", title="INVENTED")
    with pytest.raises(ValueError, match="'absorption_tables_sha256' does not match"):
        Instrument.from_toml(text, source="x", base_dir=table_file)


@pytest.mark.parametrize("old, new, fragments", [
    ('{ weight = 0.5, table = 1 }', '{ weight = 0.5, table = 1, dry = 1e-3 }',
     ("channel 't1' band #0", "'table' excludes key(s) ['dry']")),
    ('{ weight = 0.5, table = 1 }', '{ weight = 0.5, table = 1, h2o_temperature_exponent = 1.0 }',
     ("'table' excludes key(s) ['h2o_temperature_exponent']",)),
    ('{ weight = 0.5, table = 1 }', '{ weight = 0.5, table = 2 }',
     ("channel 't1' band #0", "'table' = 2 is out of range", "holds 2 tables")),
    ('{ weight = 0.5, table = 1 }', '{ weight = 0.5, table = -1 }', ("'table' must be an integer >= 0",)),
    ('{ weight = 0.5, table = 1 }', '{ weight = 0.5, table = 1.0 }', ("'table' must be an integer >= 0",)),
    ('{ weight = 0.5, table = 1 }', '{ weight = 0.5, table = 1, frequency_ghz = 30.0 }',
     ("key 'frequency_ghz' does not match the channel's 'wavenumber_cm1'",)),
    ('dry_pressure_exponent = 0.5', 'dry_pressure_exponent = "x"', ("'dry_pressure_exponent' must be a number",)),
    ('dry_pressure_exponent = 0.5', 'dry_pressure_exponentt = 0.5', ("unknown key(s) ['dry_pressure_exponentt']",)),
    ('absorption_tables = "tables.nc"\n', '', ("band #0", "'table' needs a top-level 'absorption_tables'")),
    ('absorption_tables = "tables.nc"', 'absorption_tables = "missing.nc"', ("missing.nc", "does not exist")),
])
def test_table_and_law_key_errors(table_file, old, new, fragments):
    assert TABLE_TOML.count(old) == 1
    path = table_file / "bad.toml"
    path.write_text(TABLE_TOML.replace(old, new), encoding="utf-8")
    with pytest.raises(ValueError) as info:
        load_instrument(path)
    for fragment in fragments:
        assert fragment in str(info.value), (fragment, str(info.value))


@pytest.mark.parametrize("change, fragment", [
    (dict(pressure_hpa=[1.0, 1.0, 2.0]), "'pressure' must be 1-D, finite, strictly increasing"),
    (dict(temperature_k=[300.0, 200.0]), "'temperature' must be 1-D, finite, strictly increasing"),
    (dict(ln_k=np.zeros((2, 3, 3, 3))), "ln_k has shape (2, 3, 3, 3), expected (table, 3, 3, 2)"),
    (dict(mask=[[True, True, True]]), "absorber_mask has shape (1, 3), expected (2, 3)"),
    (dict(ln_k=np.full((2, 3, 3, 2), np.nan)), "ln_k_dry is not finite in table 0"),
])
def test_bad_tables_refused(change, fragment):
    fields = dict(pressure_hpa=_TABLES.pressure_hpa, temperature_k=_TABLES.temperature_k, ln_k=_TABLES.ln_k,
                  mask=_TABLES.mask)
    fields.update(change)
    with pytest.raises(ValueError) as info:
        AbsorptionTables(**fields)
    assert fragment in str(info.value)


def test_masked_nan_is_ignored_and_missing_variable_named(tmp_path):
    ln_k = np.array(_TABLES.ln_k)
    ln_k[0, 1] = np.nan  # table 0 has no h2o: ignored, stored as 0
    tables = AbsorptionTables(pressure_hpa=_TABLES.pressure_hpa, temperature_k=_TABLES.temperature_k, ln_k=ln_k,
                              mask=_TABLES.mask)
    assert (tables.ln_k[0, 1] == 0).all()
    import h5netcdf

    with h5netcdf.File(tmp_path / "partial.nc", "w") as f:
        f.dimensions = {"pressure": 2}
        f.create_variable("pressure", ("pressure",), data=np.array([1.0, 2.0]))
    with pytest.raises(ValueError, match=r"partial.nc.*missing variable\(s\) \['temperature'"):
        AbsorptionTables.from_netcdf(tmp_path / "partial.nc")


# -- validation errors ------------------------------------------------------------------------
VALID = """
name = "unit-test"
description = "INVENTED test instrument"

[reference]
pressure_hpa = 1013.25
temperature_k = 273.15

[absorbers.dry]
pressure_exponent = 1.0
temperature_exponent = 0.5

[absorbers.h2o]
pressure_exponent = 1.0
temperature_exponent = 1.0

[absorbers.continuum]
temperature_exponent = 2.0

[[channels]]
id = "alpha"
frequency_ghz = 50.0
noise_k = 0.2
bands = [
  { weight = 0.5, dry = 1e-3, h2o = 0.0, continuum = 0.0 },
  { weight = 0.5, dry = 2e-3 },
]

[[channels]]
id = "beta"
wavenumber_cm1 = 900.0
noise_k = 0.1
bands = [{ weight = 1.0, dry = 1e-6, h2o = 0.01, continuum = 1.0 }]
"""

ALPHA_BANDS = """bands = [
  { weight = 0.5, dry = 1e-3, h2o = 0.0, continuum = 0.0 },
  { weight = 0.5, dry = 2e-3 },
]"""


def parse(text):
    return Instrument.from_toml(text, source="bad.toml")


def test_valid_template_parses():
    inst = parse(VALID)
    assert inst.channel_ids == ("alpha", "beta")
    assert inst.channels[0].bands[1] == Band(weight=0.5, dry=2e-3, h2o=0.0, continuum=0.0)
    assert inst.dry == AbsorberLaw(1.0, 0.5) and inst.continuum == AbsorberLaw(0.0, 2.0)


def replace_once(text, old, new):
    assert text.count(old) == 1, old
    return text.replace(old, new)


def with_alpha_bands(bands_text):
    return replace_once(VALID, ALPHA_BANDS, bands_text)


def check_error(text, *fragments):
    with pytest.raises(ValueError) as info:
        parse(text)
    message = str(info.value)
    for fragment in ("bad.toml", *fragments):
        assert fragment in message, f"{fragment!r} not in {message!r}"
    return message


@pytest.mark.parametrize("weight", ["0.0", "-0.5"])
def test_weight_not_positive(weight):
    text = with_alpha_bands(f"bands = [{{ weight = {weight}, dry = 1e-3 }}, {{ weight = 1.0, dry = 1e-3 }}]")
    check_error(text, "channel 'alpha'", "band #0", "'weight'", "> 0")


@pytest.mark.parametrize("second", ["0.4", "0.500002"])
def test_weights_not_summing_to_one(second):
    text = with_alpha_bands(f"bands = [{{ weight = 0.5, dry = 1e-3 }}, {{ weight = {second}, dry = 1e-3 }}]")
    check_error(text, "channel 'alpha'", "'weight'", "sum to 1")


def test_weights_summing_to_one_within_tolerance_are_accepted():
    text = with_alpha_bands("bands = [{ weight = 0.5, dry = 1e-3 }, { weight = 0.5000009, dry = 1e-3 }]")
    assert parse(text).channels[0].bands[1].weight == 0.5000009


def test_both_spectral_keys():
    text = replace_once(VALID, 'frequency_ghz = 50.0', 'frequency_ghz = 50.0\nwavenumber_cm1 = 900.0')
    check_error(text, "channel 'alpha'", "exactly one of 'frequency_ghz' or 'wavenumber_cm1'")


def test_neither_spectral_key():
    text = replace_once(VALID, 'wavenumber_cm1 = 900.0\n', '')
    check_error(text, "channel 'beta'", "exactly one of 'frequency_ghz' or 'wavenumber_cm1'")


@pytest.mark.parametrize("key", ABSORBERS)
@pytest.mark.parametrize("value, rule", [("nan", "finite"), ("inf", "finite"), ("-1e-3", ">= 0")])
def test_bad_coefficient(key, value, rule):
    band = {"dry": "1e-3", "h2o": "0.0", "continuum": "0.0"}
    band[key] = value
    text = with_alpha_bands(
        "bands = [{ weight = 0.5, dry = 1e-3 }, { weight = 0.5, "
        + ", ".join(f"{k} = {v}" for k, v in band.items()) + " }]"
    )
    check_error(text, "channel 'alpha'", "band #1", f"'{key}'", rule)


@pytest.mark.parametrize("key, value", [("frequency_ghz", "-50.0"), ("frequency_ghz", "nan"),
                                        ("noise_k", "0.0"), ("noise_k", "inf")])
def test_bad_channel_number(key, value):
    text = replace_once(VALID, {"frequency_ghz": "frequency_ghz = 50.0", "noise_k": "noise_k = 0.2"}[key],
                        f"{key} = {value}")
    check_error(text, "channel 'alpha'", f"'{key}'")


def test_string_where_number_expected():
    text = replace_once(VALID, "noise_k = 0.2", 'noise_k = "0.2"')
    check_error(text, "channel 'alpha'", "'noise_k'", "must be a number")


def test_duplicate_ids():
    text = replace_once(VALID, 'id = "beta"', 'id = "alpha"')
    check_error(text, "channel id 'alpha'", "not unique")


def test_no_channels():
    head = VALID[: VALID.index("[[channels]]")]
    check_error(head, "at least one [[channels]]")
    check_error("channels = []\n" + head, "at least one [[channels]]")


def test_empty_bands_list():
    check_error(with_alpha_bands("bands = []"), "channel 'alpha'", "'bands'", "non-empty list")


def test_missing_channel_id():
    text = replace_once(VALID, 'id = "beta"\n', "")
    check_error(text, "channel #1", "'id'")


@pytest.mark.parametrize(
    "where, old, new, fragments",
    [
        ("top", 'name = "unit-test"', 'name = "unit-test"\ncolour = "red"', ["'colour'"]),
        ("reference", "temperature_k = 273.15", "temperature_k = 273.15\nheight_m = 0.0",
         ["[reference]", "'height_m'"]),
        ("absorbers", "[absorbers.continuum]", "[absorbers.ozone]\npressure_exponent = 1.0\n\n[absorbers.continuum]",
         ["[absorbers]", "'ozone'"]),
        ("absorber law", "temperature_exponent = 0.5", "temperature_exponent = 0.5\nscale = 2.0",
         ["[absorbers.dry]", "'scale'"]),
        ("continuum law", "temperature_exponent = 2.0", "temperature_exponent = 2.0\npressure_exponent = 1.0",
         ["[absorbers.continuum]", "'pressure_exponent'"]),
        ("channel", "noise_k = 0.1", "noise_k = 0.1\npolarisation = \"V\"", ["channel 'beta'", "'polarisation'"]),
        ("band", "continuum = 1.0 }", "continuum = 1.0, ozone = 3.0 }", ["channel 'beta'", "band #0", "'ozone'"]),
    ],
)
def test_unknown_key_at_each_level(where, old, new, fragments):
    message = check_error(replace_once(VALID, old, new), *fragments)
    assert "unknown key" in message


def test_invalid_toml_names_source():
    check_error(VALID + "\n[[channels\n", "not valid TOML")


def test_error_from_file_names_the_path(tmp_path):
    path = tmp_path / "broken-sounder.toml"
    path.write_text(replace_once(VALID, 'id = "beta"', 'id = "alpha"'), encoding="utf-8")
    with pytest.raises(ValueError, match="broken-sounder.toml: channel id 'alpha' is not unique"):
        load_instrument(path)


# -- demo-sounder design requirements ---------------------------------------------------------
def classify(inst, column_depths):
    """Kind of each channel from its absorption on a moist US-1976 profile.

    window: nadir column optical depth < 1; otherwise the dominant absorber decides
    (dry -> temperature, h2o -> humidity).
    """
    kinds = {}
    for ch in inst.channels:
        depth = {a: sum(b.weight * getattr(b, a) for b in ch.bands) * column_depths[a] for a in ABSORBERS}
        if sum(depth.values()) < 1.0:
            kinds[ch.id] = "window"
        elif depth["dry"] >= depth["h2o"] + depth["continuum"]:
            kinds[ch.id] = "temperature"
        else:
            kinds[ch.id] = "humidity"
    return kinds


@pytest.fixture(scope="module")
def us1976_case(us1976_temperature):
    # U.S. Standard Atmosphere 1976 temperatures (fluids) on a fine grid, with a moist
    # humidity profile (10 g/kg at the surface, decaying as (p/ps)^3; common practice shape).
    p = np.geomspace(1013.25, 0.1, 200)
    t = us1976_temperature(p)
    q = np.maximum(0.01 * (p / 1013.25) ** 3, 3e-6)
    return p, t, q


def test_demo_sounder_channel_set(demo_instrument, us1976_case):
    inst = demo_instrument
    p, t, q = us1976_case
    _, paths, _, _ = physics._absorber_paths(inst, p[None], t[None], q[None])
    columns = dict(zip(ABSORBERS, paths.sum(axis=2)[:, 0]))
    kinds = classify(inst, columns)
    mw = {ch.id: ch for ch in inst.channels if ch.is_microwave}
    ir = {ch.id: ch for ch in inst.channels if not ch.is_microwave}
    table = "\n".join(f"{cid:8s} {'MW' if cid in mw else 'IR'} {kind}" for cid, kind in kinds.items())

    def dry_only(ch):
        return all(b.dry > 0 and b.h2o == 0 and b.continuum == 0 for b in ch.bands)

    def with_continuum(ch):
        return all(b.continuum > 0 for b in ch.bands)

    assert len(inst.channels) >= 12, table
    assert any(kinds[c] == "window" and with_continuum(ch) for c, ch in mw.items()), table
    assert sum(kinds[c] == "temperature" and dry_only(ch) for c, ch in mw.items()) >= 4, table
    assert sum(kinds[c] == "humidity" for c in mw) >= 2, table
    assert sum(kinds[c] == "temperature" for c in ir) >= 2, table
    assert sum(kinds[c] == "humidity" for c in ir) >= 2, table
    assert any(kinds[c] == "window" and with_continuum(ch) for c, ch in ir.items()), table
    sounding = [ch for ch in inst.channels if kinds[ch.id] != "window"]
    assert all(len(ch.bands) >= 3 for ch in sounding), table


def peak_table(inst, p, t, q):
    layer_p, weights = physics.weighting_functions(inst, p, t, q, 0.0)
    peaks = layer_p[np.argmax(weights, axis=1)]
    rows = []
    for ch, peak in zip(inst.channels, peaks):
        position = f"{ch.frequency_ghz} GHz" if ch.is_microwave else f"{ch.wavenumber_cm1} cm-1"
        rows.append((ch.id, position, peak))
    return rows


def test_demo_sounder_weighting_function_peaks(demo_instrument, us1976_case):
    p, t, q = us1976_case
    _, paths, _, _ = physics._absorber_paths(demo_instrument, p[None], t[None], q[None])
    kinds = classify(demo_instrument, dict(zip(ABSORBERS, paths.sum(axis=2)[:, 0])))
    rows = peak_table(demo_instrument, p, t, q)
    table = "channel  position      kind         peak [hPa]\n" + "\n".join(
        f"{cid:8s} {pos:13s} {kinds[cid]:12s} {peak:8.1f}" for cid, pos, peak in rows
    )
    temperature_peaks = [peak for cid, _, peak in rows if kinds[cid] == "temperature"]
    assert max(temperature_peaks) >= 850.0, table  # lowest sounding peak near the surface
    assert min(temperature_peaks) <= 20.0, table  # highest at 20 hPa or above
    # sounding peaks distinct: the temperature channels sample different layers
    assert len(set(np.round(temperature_peaks, 3))) == len(temperature_peaks), table
    windows = [peak for cid, _, peak in rows if kinds[cid] == "window"]
    assert windows and min(windows) > 900.0, table  # windows see the lowest layer
