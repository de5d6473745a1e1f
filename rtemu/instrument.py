"""Instrument description files: channels made of gray sub-bands.

An instrument is a plain TOML file. Every coefficient is a mass absorption coefficient
[m2 kg-1] at the reference state; see ``DEVELOPERS.md`` for the schema. Files are strict:
an unknown key, a missing key or an impossible value is an error naming the file, the
channel and the key.
"""

from __future__ import annotations

import dataclasses
import functools
import hashlib
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
#: Per-band power-law keys, in the order of :meth:`Band.laws`.
LAW_KEYS = (
    "dry_pressure_exponent",
    "dry_temperature_exponent",
    "h2o_pressure_exponent",
    "h2o_temperature_exponent",
    "continuum_temperature_exponent",
)
_WEIGHT_TOLERANCE = 1e-6


@dataclasses.dataclass(frozen=True)
class Band:
    """One gray sub-band of a channel.

    Attributes
    ----------
    weight : float
        Share of the channel response [1]; the weights of a channel sum to 1.
    dry, h2o, continuum : float
        Mass absorption coefficients at the reference state [m2 kg-1] (0 for a table band).
    dry_pressure_exponent, dry_temperature_exponent, h2o_pressure_exponent,
    h2o_temperature_exponent, continuum_temperature_exponent : float or None
        This band's own power laws [1]; None takes the instrument's ``[absorbers.*]`` value.
    table : int or None
        Index of this band's (ln p, T) absorption table in the instrument's
        :class:`AbsorptionTables`; such a band has no coefficients and no laws.
    frequency_ghz, wavenumber_cm1 : float or None
        This band's own Planck position [GHz] / [cm-1] (e.g. a sideband), of the same kind
        as its channel's; None takes the channel's.
    """

    weight: float
    dry: float = 0.0
    h2o: float = 0.0
    continuum: float = 0.0
    dry_pressure_exponent: float | None = None
    dry_temperature_exponent: float | None = None
    h2o_pressure_exponent: float | None = None
    h2o_temperature_exponent: float | None = None
    continuum_temperature_exponent: float | None = None
    table: int | None = None
    frequency_ghz: float | None = None
    wavenumber_cm1: float | None = None

    def laws(self, instrument: "Instrument") -> tuple[float, float, float, float, float]:
        """(n_dry, m_dry, n_h2o, m_h2o, m_cont) [1]: this band's laws, defaults filled in."""
        own = [getattr(self, key) for key in LAW_KEYS]
        default = instrument.default_laws
        return tuple(d if v is None else v for v, d in zip(own, default))

    @property
    def has_own_laws(self) -> bool:
        return any(getattr(self, key) is not None for key in LAW_KEYS)


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
        Empty for a band-less channel (one of another model's instrument: id, position and
        noise only), which rtemu's physics cannot compute.
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

    @property
    def has_bands(self) -> bool:
        return bool(self.bands)


@dataclasses.dataclass(frozen=True)
class AbsorberLaw:
    """Pressure and temperature scaling of one absorber's coefficient [1]."""

    pressure_exponent: float = 1.0
    temperature_exponent: float = 0.0


@dataclasses.dataclass(frozen=True, eq=False)
class AbsorptionTables:
    """Absorption coefficients of table bands over (ln p, T): the companion netCDF file.

    Layout of the file (netCDF4): dims ``table``, ``pressure``, ``temperature``,
    ``absorber`` (= 3: dry, h2o, continuum); coordinates ``pressure`` [hPa] and
    ``temperature`` [K], strictly increasing; ``ln_k_dry``, ``ln_k_h2o``,
    ``ln_k_continuum`` (table, pressure, temperature) [ln(m2 kg-1)]; ``absorber_mask``
    (table, absorber) int8, 1 where the absorber contributes. The coefficients replace
    ``k * law(p, T)`` in eq. 3 of :mod:`rtemu.physics`.

    Attributes
    ----------
    pressure_hpa : ndarray [NP]
        [hPa], strictly increasing.
    temperature_k : ndarray [NTEMP]
        [K], strictly increasing.
    ln_k : ndarray [NT, 3, NP, NTEMP]
        Natural log of the coefficients [ln(m2 kg-1)], absorbers dry, h2o, continuum;
        0 where masked.
    mask : ndarray [NT, 3] bool
        True where the absorber contributes.
    """

    pressure_hpa: np.ndarray
    temperature_k: np.ndarray
    ln_k: np.ndarray
    mask: np.ndarray

    def __post_init__(self):
        p = np.array(self.pressure_hpa, dtype=float)
        t = np.array(self.temperature_k, dtype=float)
        ln_k = np.array(self.ln_k, dtype=float)
        mask = np.array(self.mask, dtype=bool)
        for name, axis in (("pressure", p), ("temperature", t)):
            if axis.ndim != 1 or axis.size < 2 or not np.all(np.diff(axis) > 0) or not np.isfinite(axis).all():
                raise ValueError(f"absorption tables: coordinate '{name}' must be 1-D, finite, strictly "
                                 f"increasing, with at least 2 values")
        if p[0] <= 0:
            raise ValueError("absorption tables: coordinate 'pressure' must be > 0 hPa")
        if t[0] <= 0:
            raise ValueError("absorption tables: coordinate 'temperature' must be > 0 K")
        if ln_k.ndim != 4 or ln_k.shape[1:] != (3, p.size, t.size) or ln_k.shape[0] < 1:
            raise ValueError(f"absorption tables: ln_k has shape {ln_k.shape}, expected "
                             f"(table, 3, {p.size}, {t.size})")
        if mask.shape != (ln_k.shape[0], 3):
            raise ValueError(f"absorption tables: absorber_mask has shape {mask.shape}, "
                             f"expected ({ln_k.shape[0]}, 3)")
        ln_k = np.where(mask[:, :, None, None], ln_k, 0.0)
        bad = ~np.isfinite(ln_k)
        if bad.any():
            index = np.argwhere(bad)[0]
            raise ValueError(f"absorption tables: ln_k_{ABSORBERS[index[1]]} is not finite in table "
                             f"{index[0]} (rule: finite where absorber_mask is 1)")
        for name, value in (("pressure_hpa", p), ("temperature_k", t), ("ln_k", ln_k), ("mask", mask)):
            value.setflags(write=False)
            object.__setattr__(self, name, value)

    @property
    def count(self) -> int:
        """Number of tables (NT)."""
        return self.ln_k.shape[0]

    @functools.cached_property
    def sha256(self) -> str:
        """Digest of the arrays (not of the file's bytes): equal tables, equal digest."""
        digest = hashlib.sha256()
        for value in (self.pressure_hpa, self.temperature_k, self.ln_k):
            digest.update(np.ascontiguousarray(value, dtype="<f8").tobytes())
        digest.update(np.ascontiguousarray(self.mask, dtype="u1").tobytes())
        digest.update(repr(self.ln_k.shape).encode())
        return digest.hexdigest()

    def __eq__(self, other):
        if not isinstance(other, AbsorptionTables):
            return NotImplemented
        return self.sha256 == other.sha256

    def __hash__(self):
        return hash(self.sha256)

    @classmethod
    def from_netcdf(cls, path) -> "AbsorptionTables":
        """Read a table file (layout in the class docstring); errors name the file."""
        import h5netcdf

        path = Path(path)
        if not path.is_file():
            raise ValueError(f"absorption tables file {str(path)!r} does not exist")
        try:
            with h5netcdf.File(path, "r") as f:
                variables = f.variables
                need = ("pressure", "temperature", "absorber_mask", *(f"ln_k_{a}" for a in ABSORBERS))
                missing = [v for v in need if v not in variables]
                if missing:
                    raise ValueError(f"missing variable(s) {missing}")
                for a in ABSORBERS:
                    dims = tuple(variables[f"ln_k_{a}"].dimensions)
                    if dims != ("table", "pressure", "temperature"):
                        raise ValueError(f"ln_k_{a} has dims {dims}, expected ('table', 'pressure', 'temperature')")
                dims = tuple(variables["absorber_mask"].dimensions)
                if dims != ("table", "absorber"):
                    raise ValueError(f"absorber_mask has dims {dims}, expected ('table', 'absorber')")
                ln_k = np.stack([np.asarray(variables[f"ln_k_{a}"][...], dtype=float) for a in ABSORBERS], axis=1)
                return cls(
                    pressure_hpa=np.asarray(variables["pressure"][...], dtype=float),
                    temperature_k=np.asarray(variables["temperature"][...], dtype=float),
                    ln_k=ln_k,
                    mask=np.asarray(variables["absorber_mask"][...]) != 0,
                )
        except (OSError, ValueError, KeyError) as exc:
            raise ValueError(f"absorption tables file {str(path)!r}: {exc}") from None

    def to_netcdf(self, path, *, title: str, comment: str = "") -> None:
        """Write the table file atomically (temporary file, then rename)."""
        import h5netcdf

        path = Path(path)
        tmp = path.with_name(path.name + ".tmp")
        with h5netcdf.File(tmp, "w") as f:
            f.attrs["title"] = title
            if comment:
                f.attrs["comment"] = comment
            f.dimensions = {"table": self.count, "pressure": self.pressure_hpa.size,
                            "temperature": self.temperature_k.size, "absorber": 3}
            for name, values, units in (("pressure", self.pressure_hpa, "hPa"),
                                        ("temperature", self.temperature_k, "K")):
                var = f.create_variable(name, (name,), dtype="f8", data=values)
                var.attrs["units"] = units
            for i, a in enumerate(ABSORBERS):
                var = f.create_variable(f"ln_k_{a}", ("table", "pressure", "temperature"), dtype="f8",
                                        data=self.ln_k[:, i])
                var.attrs["units"] = "ln(m2 kg-1)"
            var = f.create_variable("absorber_mask", ("table", "absorber"), dtype="i1",
                                    data=self.mask.astype(np.int8))
            var.attrs["comment"] = "absorbers in the order dry, h2o, continuum; 1 where it contributes"
        os.replace(tmp, path)


@dataclasses.dataclass(frozen=True)
class Instrument:
    """A set of channels plus the absorber scaling laws shared by them.

    Build one with :func:`load_instrument` or :meth:`from_toml`. ``absorption_tables``
    holds the arrays of the companion table file named ``absorption_tables_file`` (path
    relative to the TOML file's folder) when any band has a ``table``.
    """

    name: str
    description: str
    channels: tuple[Channel, ...]
    reference_pressure_hpa: float = 1013.25
    reference_temperature_k: float = 273.15
    dry: AbsorberLaw = AbsorberLaw()
    h2o: AbsorberLaw = AbsorberLaw()
    continuum: AbsorberLaw = AbsorberLaw(pressure_exponent=0.0)
    absorption_tables: AbsorptionTables | None = None
    absorption_tables_file: str | None = None

    @property
    def default_laws(self) -> tuple[float, float, float, float, float]:
        """The ``[absorbers.*]`` laws in the order of :data:`LAW_KEYS` [1]."""
        return (self.dry.pressure_exponent, self.dry.temperature_exponent, self.h2o.pressure_exponent,
                self.h2o.temperature_exponent, self.continuum.temperature_exponent)

    @property
    def has_bands(self) -> bool:
        """True when every channel has sub-bands (rtemu's physics can compute it)."""
        return all(ch.has_bands for ch in self.channels)

    @property
    def channels_without_bands(self) -> tuple[str, ...]:
        """Ids of the band-less channels."""
        return tuple(ch.id for ch in self.channels if not ch.has_bands)

    def without_bands(self) -> "Instrument":
        """A band-less copy: ids, positions and noise only (no laws, no tables)."""
        return Instrument(
            name=self.name,
            description=self.description,
            channels=tuple(dataclasses.replace(ch, bands=()) for ch in self.channels),
        )

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
    def from_toml(
        cls,
        text: str,
        source: str = "<string>",
        *,
        base_dir: "str | os.PathLike | None" = None,
        absorption_tables: AbsorptionTables | None = None,
    ) -> "Instrument":
        """Parse and validate instrument TOML ``text``; ``source`` names it in errors.

        A text naming ``absorption_tables`` needs the tables: either the arrays
        (``absorption_tables``, e.g. sent to a worker with the text) or the folder the file
        name is relative to (``base_dir``, the TOML file's folder).
        """
        try:
            doc = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            raise ValueError(f"{source}: not valid TOML: {exc}") from None
        return _parse(doc, source, base_dir, absorption_tables)

    @classmethod
    def channels_from_toml(cls, text: str, source: str = "<string>") -> "Instrument":
        """The band-less instrument (ids, positions, noise) an instrument text describes.

        What an emulator needs of its teacher's instrument; unlike :meth:`from_toml` it needs
        no absorption-table file, so a training set of a table instrument trains anywhere.
        """
        try:
            doc = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            raise ValueError(f"{source}: invalid TOML: {exc}") from None
        doc = {k: v for k, v in doc.items() if k not in ("absorption_tables", "absorption_tables_sha256")}
        doc["channels"] = [{k: v for k, v in ch.items() if k != "bands"} if isinstance(ch, dict) else ch
                           for ch in doc.get("channels", [])]
        return _parse(doc, source).without_bands()

    def to_toml(self) -> str:
        """TOML text that :meth:`from_toml` reads back to an equal instrument."""
        lines = [f"name = {_toml_str(self.name)}", f"description = {_toml_str(self.description)}"]
        if self.absorption_tables is not None:
            lines.append(f"absorption_tables = {_toml_str(self.absorption_tables_file)}")
            lines.append(f"absorption_tables_sha256 = {_toml_str(self.absorption_tables.sha256)}")
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
            if ch.bands:
                bands = ",\n  ".join(_band_toml(b) for b in ch.bands)
                lines.append(f"bands = [\n  {bands},\n]")
        return "\n".join(lines) + "\n"


def _band_toml(band: Band) -> str:
    keys = ["weight"]
    keys += ["table"] if band.table is not None else list(ABSORBERS)
    keys += [k for k in (*LAW_KEYS, "frequency_ghz", "wavenumber_cm1") if getattr(band, k) is not None]
    values = [str(band.table) if k == "table" else _toml_float(getattr(band, k)) for k in keys]
    return "{ " + ", ".join(f"{k} = {v}" for k, v in zip(keys, values)) + " }"


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


def _parse(doc: dict, source: str, base_dir=None, absorption_tables=None) -> Instrument:
    _check_keys(doc, {"name", "description", "reference", "absorbers", "channels", "absorption_tables",
                      "absorption_tables_sha256"}, source)
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
    tables_file, tables = _absorption_tables(doc, source, base_dir, absorption_tables, channels)
    return Instrument(
        name=name,
        description=description,
        channels=tuple(channels),
        reference_pressure_hpa=p_ref,
        reference_temperature_k=t_ref,
        absorption_tables=tables,
        absorption_tables_file=tables_file,
        **laws,
    )


def _absorption_tables(doc, source, base_dir, given, channels):
    """The (file name, arrays) of the companion table file, checked against the bands."""
    used = [(ch.id, i, b.table) for ch in channels for i, b in enumerate(ch.bands) if b.table is not None]
    name = doc.get("absorption_tables")
    digest = doc.get("absorption_tables_sha256")
    if name is None:
        if digest is not None:
            raise ValueError(f"{source}: key 'absorption_tables_sha256' without 'absorption_tables'")
        if used:
            cid, i, _ = used[0]
            raise ValueError(f"{source} channel {cid!r} band #{i}: key 'table' needs a top-level "
                             "'absorption_tables' file")
        return None, None
    if not isinstance(name, str) or not name:
        raise ValueError(f"{source}: key 'absorption_tables' must be a non-empty file name")
    if digest is not None and not isinstance(digest, str):
        raise ValueError(f"{source}: key 'absorption_tables_sha256' must be a string")
    if given is not None:
        tables = given
    elif base_dir is not None:
        tables = AbsorptionTables.from_netcdf(Path(base_dir) / name)
    else:
        raise ValueError(f"{source}: key 'absorption_tables' names {name!r}, but no base folder or table "
                         "arrays were given (rule: load the file with load_instrument(path), or pass "
                         "base_dir= or absorption_tables= to Instrument.from_toml)")
    if digest is not None and digest != tables.sha256:
        raise ValueError(f"{source}: key 'absorption_tables_sha256' does not match the tables of {name!r} "
                         f"({tables.sha256}); the table file changed since this text was written")
    for cid, i, index in used:
        if index >= tables.count:
            raise ValueError(f"{source} channel {cid!r} band #{i}: key 'table' = {index} is out of range "
                             f"(the file {name!r} holds {tables.count} tables)")
    return name, tables


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
    bands = []
    if "bands" in raw:
        raw_bands = raw["bands"]
        if not isinstance(raw_bands, list) or not raw_bands:
            raise ValueError(f"{where}: key 'bands' must be a non-empty list of tables (or absent for a "
                             "band-less channel)")
        bands = [_parse_band(raw_band, f"{where} band #{i}", spectral[0]) for i, raw_band in enumerate(raw_bands)]
    total = sum(b.weight for b in bands)
    if bands and abs(total - 1.0) > _WEIGHT_TOLERANCE:
        raise ValueError(f"{where}: key 'weight' of the bands must sum to 1 (within 1e-6), got {total!r}")
    return Channel(
        id=cid,
        frequency_ghz=position if spectral[0] == "frequency_ghz" else None,
        wavenumber_cm1=position if spectral[0] == "wavenumber_cm1" else None,
        noise_k=noise,
        bands=tuple(bands),
    )


def _parse_band(raw_band, where: str, channel_position: str) -> Band:
    if not isinstance(raw_band, dict):
        raise ValueError(f"{where}: must be a table")
    _check_keys(raw_band, {"weight", "table", *ABSORBERS, *LAW_KEYS, "frequency_ghz", "wavenumber_cm1"}, where)
    fields = {"weight": _number(raw_band, "weight", where, positive=True)}
    if "table" in raw_band:
        mixed = sorted(k for k in raw_band if k in ABSORBERS or k in LAW_KEYS)
        if mixed:
            raise ValueError(f"{where}: key 'table' excludes key(s) {mixed} (rule: a band takes its "
                             "absorption from a table or from coefficients and power laws, not both)")
        index = raw_band["table"]
        if isinstance(index, bool) or not isinstance(index, int) or index < 0:
            raise ValueError(f"{where}: key 'table' must be an integer >= 0, got {index!r}")
        fields["table"] = index
    else:
        fields.update({a: _number(raw_band, a, where, default=0.0, minimum=0.0) for a in ABSORBERS})
        fields.update({k: _number(raw_band, k, where) for k in LAW_KEYS if k in raw_band})
    for key in ("frequency_ghz", "wavenumber_cm1"):
        if key in raw_band:
            if key != channel_position:
                raise ValueError(f"{where}: key {key!r} does not match the channel's '{channel_position}' "
                                 "(rule: a band's Planck position is of its channel's kind)")
            fields[key] = _number(raw_band, key, where, positive=True)
    return Band(**fields)


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
        with resources.as_file(_shipped_dir()) as folder:
            return Instrument.from_toml(resource.read_text(encoding="utf-8"), source=f"{text_name}.toml",
                                        base_dir=folder)
    path = Path(name_or_path)
    if not path.is_file():
        raise ValueError(
            f"instrument {text_name!r} is neither a shipped instrument {list_instruments()} "
            f"nor an existing file"
        )
    return Instrument.from_toml(path.read_text(encoding="utf-8"), source=str(path), base_dir=path.parent)
