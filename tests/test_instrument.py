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
    AbsorberLaw,
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


@st.composite
def instruments(draw):
    n_channels = draw(st.integers(1, 4))
    ids = draw(st.lists(st.text(min_size=1, max_size=12), min_size=n_channels, max_size=n_channels,
                        unique=True))
    channels = []
    for cid in ids:
        raw = draw(st.lists(st.floats(min_value=0.01, max_value=1.0), min_size=1, max_size=4))
        weights = [w / math.fsum(raw) for w in raw]
        bands = tuple(
            Band(weight=w, dry=draw(_nonnegative), h2o=draw(_nonnegative), continuum=draw(_nonnegative))
            for w in weights
        )
        microwave = draw(st.booleans())
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
    )


@settings(max_examples=60, deadline=None)
@given(instruments())
def test_generated_instrument_round_trip(inst):
    text = inst.to_toml()
    assert Instrument.from_toml(text, source="generated") == inst


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
