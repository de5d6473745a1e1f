"""Instrument description files: channels made of gray sub-bands.

An instrument is a plain TOML file. Every coefficient is a mass absorption coefficient
[m2 kg-1] at the reference state; see ``DEVELOPERS.md`` for the schema. Files are strict:
an unknown key, a missing key or an impossible value is an error naming the file, the
channel and the key.
"""

from __future__ import annotations

import dataclasses
import math
import os
from importlib import resources
from pathlib import Path
from typing import Iterable

import numpy as np

try:  # Python >= 3.11
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as tomllib

ABSORBERS = ("dry", "h2o", "continuum")
_WEIGHT_TOLERANCE = 1e-6


@dataclasses.dataclass(frozen=True)
class Band:
    """One gray sub-band of a channel.

    Attributes
    ----------
    weight : float
        Share of the channel response [1]; the weights of a channel sum to 1.
    dry, h2o, continuum : float
        Mass absorption coefficients at the reference state [m2 kg-1].
    """

    weight: float
    dry: float = 0.0
    h2o: float = 0.0
    continuum: float = 0.0


@dataclasses.dataclass(frozen=True)
class Channel:
    """One instrument channel.

    Attributes
    ----------
    id : str
        Unique identifier.
    frequency_ghz, wavenumber_cm1 : float or None
        Exactly one is set [GHz] / [cm-1].
    noise_k : float
        Instrument noise, one standard deviation [K].
    bands : tuple of Band
    """

    id: str
    frequency_ghz: float | None
    wavenumber_cm1: float | None
    noise_k: float
    bands: tuple[Band, ...]

    @property
    def is_microwave(self) -> bool:
        """True for frequency (microwave) channels, False for wavenumber (infrared) ones."""
        return self.frequency_ghz is not None


@dataclasses.dataclass(frozen=True)
class AbsorberLaw:
    """Pressure and temperature scaling of one absorber's coefficient [1]."""

    pressure_exponent: float = 1.0
    temperature_exponent: float = 0.0


@dataclasses.dataclass(frozen=True)
class Instrument:
    """A set of channels plus the absorber scaling laws shared by them.

    Build one with :func:`load_instrument` or :meth:`from_toml`.
    """

    name: str
    description: str
    channels: tuple[Channel, ...]
    reference_pressure_hpa: float = 1013.25
    reference_temperature_k: float = 273.15
    dry: AbsorberLaw = AbsorberLaw()
    h2o: AbsorberLaw = AbsorberLaw()
    continuum: AbsorberLaw = AbsorberLaw(pressure_exponent=0.0)

    @property
    def channel_ids(self) -> tuple[str, ...]:
        return tuple(ch.id for ch in self.channels)

    @property
    def noise_k(self) -> np.ndarray:
        """Instrument noise per channel [K]."""
        return np.array([ch.noise_k for ch in self.channels], dtype=float)

    @property
    def is_microwave(self) -> np.ndarray:
        return np.array([ch.is_microwave for ch in self.channels], dtype=bool)

    def select(self, ids: Iterable[str]) -> "Instrument":
        """A copy holding only channels ``ids``, in the order given."""
        ids = list(ids)
        by_id = {ch.id: ch for ch in self.channels}
        unknown = [i for i in ids if i not in by_id]
        if unknown:
            raise ValueError(
                f"instrument {self.name!r} has no channel(s) {unknown}; "
                f"known: {list(self.channel_ids)}"
            )
        if len(set(ids)) != len(ids):
            raise ValueError(f"channel selection repeats an id: {ids}")
        return dataclasses.replace(self, channels=tuple(by_id[i] for i in ids))

    # -- TOML ---------------------------------------------------------------------------
    @classmethod
    def from_toml(cls, text: str, source: str = "<string>") -> "Instrument":
        """Parse and validate instrument TOML ``text``; ``source`` names it in errors."""
        try:
            doc = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            raise ValueError(f"{source}: not valid TOML: {exc}") from None
        return _parse(doc, source)

    def to_toml(self) -> str:
        """TOML text that :meth:`from_toml` reads back to an equal instrument."""
        lines = [f"name = {_toml_str(self.name)}", f"description = {_toml_str(self.description)}"]
        lines += [
            "",
            "[reference]",
            f"pressure_hpa = {_toml_float(self.reference_pressure_hpa)}",
            f"temperature_k = {_toml_float(self.reference_temperature_k)}",
        ]
        for absorber in ABSORBERS:
            law = getattr(self, absorber)
            lines += ["", f"[absorbers.{absorber}]"]
            if absorber != "continuum":
                lines.append(f"pressure_exponent = {_toml_float(law.pressure_exponent)}")
            lines.append(f"temperature_exponent = {_toml_float(law.temperature_exponent)}")
        for ch in self.channels:
            lines += ["", "[[channels]]", f"id = {_toml_str(ch.id)}"]
            if ch.frequency_ghz is not None:
                lines.append(f"frequency_ghz = {_toml_float(ch.frequency_ghz)}")
            else:
                lines.append(f"wavenumber_cm1 = {_toml_float(ch.wavenumber_cm1)}")
            lines.append(f"noise_k = {_toml_float(ch.noise_k)}")
            bands = ",\n  ".join(
                "{ weight = %s, dry = %s, h2o = %s, continuum = %s }"
                % tuple(_toml_float(getattr(b, f)) for f in ("weight", "dry", "h2o", "continuum"))
                for b in ch.bands
            )
            lines.append(f"bands = [\n  {bands},\n]")
        return "\n".join(lines) + "\n"


def _toml_str(value: str) -> str:
    # TOML basic strings may not hold raw control characters (U+0000-U+001F, U+007F).
    escaped = value.replace("\\", "\\\\").replace('"', '\\"')
    escaped = "".join(
        f"\\u{ord(ch):04x}" if ord(ch) < 0x20 or ord(ch) == 0x7F else ch for ch in escaped
    )
    return f'"{escaped}"'


def _toml_float(value: float) -> str:
    return repr(float(value))  # repr round-trips float64 exactly


# -- parsing and validation ---------------------------------------------------------------
def _check_keys(table: dict, allowed: set, where: str) -> None:
    unknown = sorted(set(table) - allowed)
    if unknown:
        raise ValueError(f"{where}: unknown key(s) {unknown}; allowed: {sorted(allowed)}")


def _number(table: dict, key: str, where: str, *, default=None, minimum=None, positive=False):
    if key not in table:
        if default is None:
            raise ValueError(f"{where}: missing key '{key}'")
        return float(default)
    value = table[key]
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ValueError(f"{where}: key '{key}' must be a number, got {value!r}")
    value = float(value)
    if not math.isfinite(value):
        raise ValueError(f"{where}: key '{key}' must be finite, got {value}")
    if minimum is not None and value < minimum:
        raise ValueError(f"{where}: key '{key}' must be >= {minimum}, got {value}")
    if positive and value <= 0:
        raise ValueError(f"{where}: key '{key}' must be > 0, got {value}")
    return value


def _parse(doc: dict, source: str) -> Instrument:
    _check_keys(doc, {"name", "description", "reference", "absorbers", "channels"}, source)
    name = doc.get("name")
    if not isinstance(name, str) or not name:
        raise ValueError(f"{source}: key 'name' must be a non-empty string")
    description = doc.get("description", "")
    if not isinstance(description, str):
        raise ValueError(f"{source}: key 'description' must be a string")

    ref = doc.get("reference", {})
    _check_keys(ref, {"pressure_hpa", "temperature_k"}, f"{source} [reference]")
    p_ref = _number(ref, "pressure_hpa", f"{source} [reference]", default=1013.25, positive=True)
    t_ref = _number(ref, "temperature_k", f"{source} [reference]", default=273.15, positive=True)

    absorbers = doc.get("absorbers", {})
    _check_keys(absorbers, set(ABSORBERS), f"{source} [absorbers]")
    laws = {}
    for absorber in ABSORBERS:
        table = absorbers.get(absorber, {})
        where = f"{source} [absorbers.{absorber}]"
        if absorber == "continuum":
            _check_keys(table, {"temperature_exponent"}, where)
            laws[absorber] = AbsorberLaw(
                pressure_exponent=0.0,
                temperature_exponent=_number(table, "temperature_exponent", where, default=0.0),
            )
        else:
            _check_keys(table, {"pressure_exponent", "temperature_exponent"}, where)
            laws[absorber] = AbsorberLaw(
                pressure_exponent=_number(table, "pressure_exponent", where, default=1.0),
                temperature_exponent=_number(table, "temperature_exponent", where, default=0.0),
            )

    raw_channels = doc.get("channels")
    if not isinstance(raw_channels, list) or not raw_channels:
        raise ValueError(f"{source}: needs at least one [[channels]] entry")
    channels = []
    seen = set()
    for index, raw in enumerate(raw_channels):
        channels.append(_parse_channel(raw, index, source))
        if channels[-1].id in seen:
            raise ValueError(f"{source}: channel id {channels[-1].id!r} is not unique")
        seen.add(channels[-1].id)
    return Instrument(
        name=name,
        description=description,
        channels=tuple(channels),
        reference_pressure_hpa=p_ref,
        reference_temperature_k=t_ref,
        **laws,
    )


def _parse_channel(raw: dict, index: int, source: str) -> Channel:
    where = f"{source} channel #{index}"
    if not isinstance(raw, dict):
        raise ValueError(f"{where}: must be a table")
    cid = raw.get("id")
    if not isinstance(cid, str) or not cid:
        raise ValueError(f"{where}: key 'id' must be a non-empty string")
    where = f"{source} channel {cid!r}"
    _check_keys(raw, {"id", "frequency_ghz", "wavenumber_cm1", "noise_k", "bands"}, where)
    spectral = [k for k in ("frequency_ghz", "wavenumber_cm1") if k in raw]
    if len(spectral) != 1:
        raise ValueError(
            f"{where}: needs exactly one of 'frequency_ghz' or 'wavenumber_cm1', got {spectral}"
        )
    position = _number(raw, spectral[0], where, positive=True)
    noise = _number(raw, "noise_k", where, positive=True)
    raw_bands = raw.get("bands")
    if not isinstance(raw_bands, list) or not raw_bands:
        raise ValueError(f"{where}: key 'bands' must be a non-empty list of tables")
    bands = []
    for b_index, raw_band in enumerate(raw_bands):
        b_where = f"{where} band #{b_index}"
        if not isinstance(raw_band, dict):
            raise ValueError(f"{b_where}: must be a table")
        _check_keys(raw_band, {"weight", *ABSORBERS}, b_where)
        bands.append(
            Band(
                weight=_number(raw_band, "weight", b_where, positive=True),
                **{a: _number(raw_band, a, b_where, default=0.0, minimum=0.0) for a in ABSORBERS},
            )
        )
    total = sum(b.weight for b in bands)
    if abs(total - 1.0) > _WEIGHT_TOLERANCE:
        raise ValueError(f"{where}: key 'weight' of the bands must sum to 1 (within 1e-6), got {total!r}")
    return Channel(
        id=cid,
        frequency_ghz=position if spectral[0] == "frequency_ghz" else None,
        wavenumber_cm1=position if spectral[0] == "wavenumber_cm1" else None,
        noise_k=noise,
        bands=tuple(bands),
    )


# -- shipped instruments ------------------------------------------------------------------
def _shipped_dir():
    return resources.files("rtemu") / "instruments"


def list_instruments() -> list[str]:
    """Short names of the instruments shipped with rtemu."""
    return sorted(p.name[: -len(".toml")] for p in _shipped_dir().iterdir() if p.name.endswith(".toml"))


def load_instrument(name_or_path: "str | os.PathLike | Instrument") -> Instrument:
    """Load a shipped instrument by short name, or any instrument file by path."""
    if isinstance(name_or_path, Instrument):
        return name_or_path
    text_name = str(name_or_path)
    if text_name in list_instruments():
        resource = _shipped_dir() / f"{text_name}.toml"
        return Instrument.from_toml(resource.read_text(encoding="utf-8"), source=f"{text_name}.toml")
    path = Path(name_or_path)
    if not path.is_file():
        raise ValueError(
            f"instrument {text_name!r} is neither a shipped instrument {list_instruments()} "
            f"nor an existing file"
        )
    return Instrument.from_toml(path.read_text(encoding="utf-8"), source=str(path))
