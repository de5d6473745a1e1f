"""Line lists, passbands and monochromatic absorption coefficients.

Pure array functions for the line shapes and widths (units in each docstring), the two file
readers (:func:`read_line_list`, :func:`read_passbands`) and :func:`absorption`, which gives
the mass absorption coefficients of one line list on a frequency grid at given layer pressures
and temperatures, with their temperature derivatives.

Line-list file (text, one record a line; ``#`` starts a comment)::

    @format = rtemu-lines 1
    @title = INVENTED ...                 (free text, required)
    @unit = GHz                           (GHz or cm-1: positions, intensities, widths)
    @shape = vvw                          (vvw: Van Vleck-Weisskopf; voigt: Voigt)
    @reference_temperature_k = 296.0
    @reference_pressure_hpa = 1013.25     (continuum normalisation pressure p_ref)
    @cutoff = 25.0                        (optional: lines farther than this from a
                                           frequency are left out [unit])
    @molar_mass_g_mol.dry = 32.0          (Doppler width of the `dry` lines)
    @molar_mass_g_mol.h2o = 18.015
    @partition_exponent.dry = 1.0         (Q(T) ~ T^n, intensity temperature scaling)
    @partition_exponent.h2o = 1.5
    line ABSORBER POSITION INTENSITY LOWER_ENERGY_CM1 HALF_WIDTH WIDTH_EXPONENT
    continuum POSITION K_REF TEMPERATURE_EXPONENT

* ABSORBER is ``dry`` (a well-mixed gas whose mass path is the dry-air mass path) or ``h2o``
  (mass path of water vapour);
* POSITION [unit]; INTENSITY: the line strength at the reference temperature, per unit
  mass path of the absorber [m2 kg-1 unit], so that k(nu) = S f(nu) [m2 kg-1] with the
  shape f [unit-1];
* LOWER_ENERGY_CM1: lower-state energy E'' [cm-1] (intensity temperature scaling);
* HALF_WIDTH: pressure-broadened half width at half maximum per hPa at the reference
  temperature [unit hPa-1]; WIDTH_EXPONENT: n in gamma = gamma_0 p (T_ref / T)^n [1];
* ``continuum`` rows: nodes of the water-vapour self continuum, whose coefficient multiplies
  (e / p_ref) times the vapour mass path (rtemu/physics.py eq. 3): K_REF [m2 kg-1] at the
  reference temperature, scaled by (T_ref / T)^TEMPERATURE_EXPONENT; linear in position
  between nodes, zero outside the first-to-last node range.

A line list serves the channels given in its own unit (GHz lists the frequency channels,
cm-1 lists the wavenumber channels): the Van Vleck-Weisskopf wing does not decay at high
frequency, so a microwave list must not leak into the infrared.

Passband file: TOML, see :func:`read_passbands` and docs/spectroscopy.md.

References
----------
Goody, R. M. and Yung, Y. L. (1989), Atmospheric Radiation: Theoretical Basis, 2nd ed.,
    Oxford University Press, ch. 3 (line shapes, intensity temperature scaling).
Petty, G. W. (2006), A First Course in Atmospheric Radiation, 2nd ed., Sundog, sec. 9.3
    (line broadening: Lorentz, Doppler, Voigt).
Liou, K. N. (2002), An Introduction to Atmospheric Radiation, 2nd ed., Academic Press,
    sec. 1.3 (line shapes) and sec. 4.2 (line intensity).
Van Vleck, J. H. and Weisskopf, V. F. (1945), Rev. Mod. Phys. 17, 227-236,
    doi:10.1103/RevModPhys.17.227.
Equation and section numbers of the textbooks are from memory.
"""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
from scipy.special import voigt_profile, wofz

from rtemu.constants import BOLTZMANN_CONSTANT, C2, SPEED_OF_LIGHT

try:  # Python >= 3.11
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as tomllib

ABSORBERS = ("dry", "h2o")
UNITS = ("GHz", "cm-1")
SHAPES = ("vvw", "voigt")
#: GHz per cm-1 (c in cm s-1 / 1e9)
GHZ_PER_CM1 = SPEED_OF_LIGHT * 100.0 / 1e9
_AMU = 1.66053906660e-27  # atomic mass constant [kg], CODATA 2018
_C2_CM_K = C2 * 100.0  # second radiation constant [cm K]


# -- line shapes -------------------------------------------------------------------------
def lorentz(x, gamma):
    """Lorentz profile f(x) = (gamma / pi) / (x^2 + gamma^2) [unit-1].

    Parameters
    ----------
    x : array_like
        Distance from the line centre [unit].
    gamma : array_like
        Half width at half maximum [unit], > 0.

    References: Petty (2006) eq. 9.20; Liou (2002) eq. 1.3.9 (from memory).
    """
    return gamma / np.pi / (x * x + gamma * gamma)


def van_vleck_weisskopf(nu, nu0, gamma):
    """Van Vleck-Weisskopf profile [unit-1].

        f(nu) = (1 / pi) (nu / nu0)^2 [gamma / ((nu - nu0)^2 + gamma^2)
                                       + gamma / ((nu + nu0)^2 + gamma^2)]

    It tends to the Lorentz profile near the line centre for gamma << nu0 and keeps the
    resonance at -nu0, which matters in the far wings of microwave lines.

    Parameters
    ----------
    nu, nu0 : array_like
        Frequency and line position [unit], > 0.
    gamma : array_like
        Half width at half maximum [unit], > 0.

    References: Van Vleck and Weisskopf (1945); Goody and Yung (1989) eq. 3.50 (from memory).
    """
    ratio = (nu / nu0) ** 2
    return ratio * (lorentz(nu - nu0, gamma) + lorentz(nu + nu0, gamma))


def voigt(x, sigma, gamma):
    """Voigt profile: Gaussian (standard deviation ``sigma``) convolved with Lorentz.

    ``scipy.special.voigt_profile`` [unit-1]; ``x``, ``sigma``, ``gamma`` [unit].

    References: Petty (2006) sec. 9.3.3; Liou (2002) eq. 1.3.14 (from memory).
    """
    return voigt_profile(x, sigma, gamma)


def voigt_with_derivatives(x, sigma, gamma):
    """Voigt profile and its partial derivatives in ``sigma`` and ``gamma``.

    With z = (x + i gamma) / (sigma sqrt 2) and the Faddeeva function w (scipy.special.wofz),
    V = Re w(z) / (sigma sqrt(2 pi)) and w'(z) = -2 z w(z) + 2 i / sqrt(pi) (Abramowitz and
    Stegun 1964, eq. 7.1.20), so
    dV/dgamma = Re[w'(z) i / (sigma sqrt 2)] / (sigma sqrt(2 pi)),
    dV/dsigma = Re[-w'(z) z / sigma] / (sigma sqrt(2 pi)) - V / sigma.

    Returns
    -------
    v [unit-1], dv_dsigma [unit-2], dv_dgamma [unit-2]
    """
    z = (x + 1j * gamma) / (sigma * math.sqrt(2.0))
    w = wofz(z)
    dw = -2.0 * z * w + 2j / math.sqrt(math.pi)
    norm = 1.0 / (sigma * math.sqrt(2.0 * math.pi))
    v = w.real * norm
    dv_dgamma = (dw * 1j).real / (sigma * math.sqrt(2.0)) * norm
    dv_dsigma = (-dw * z).real / sigma * norm - v / sigma
    return v, dv_dsigma, dv_dgamma


def doppler_sigma(nu0, temperature, molar_mass_g_mol):
    """Gaussian standard deviation of Doppler broadening, nu0 sqrt(k T / m) / c [unit].

    The half width at half maximum is sigma sqrt(2 ln 2).

    Parameters
    ----------
    nu0 : array_like
        Line position [unit].
    temperature : array_like
        [K]
    molar_mass_g_mol : float
        [g mol-1]

    References: Petty (2006) eq. 9.24; Liou (2002) eq. 1.3.11 (from memory).
    """
    mass = molar_mass_g_mol * 1e-3 / 6.02214076e23  # [kg], N_A exact (SI 2019)
    return nu0 * np.sqrt(BOLTZMANN_CONSTANT * temperature / mass) / SPEED_OF_LIGHT


def pressure_half_width(half_width, width_exponent, pressure_hpa, temperature, reference_temperature):
    """Collision half width gamma = gamma_0 p (T_ref / T)^n [unit].

    Parameters
    ----------
    half_width : array_like
        gamma_0 [unit hPa-1] at T_ref.
    width_exponent : array_like
        n [1].
    pressure_hpa : array_like
        [hPa]
    temperature, reference_temperature : array_like
        [K]

    References: Petty (2006) eq. 9.21; Goody and Yung (1989) sec. 3.3 (from memory).
    """
    return half_width * pressure_hpa * (reference_temperature / temperature) ** width_exponent


def intensity_scaling(temperature, reference_temperature, lower_energy_cm1, position_cm1, partition_exponent):
    """Line intensity ratio S(T) / S(T_ref) [1] and its derivative d ln S / dT [K-1].

        S(T) / S(T_ref) = (T_ref / T)^n exp(-c2 E'' (1/T - 1/T_ref))
                          (1 - exp(-c2 nu0 / T)) / (1 - exp(-c2 nu0 / T_ref))

    with a rotational partition function Q(T) ~ T^n (n = 1 linear, 1.5 non-linear
    molecules), lower-state energy E'' [cm-1], position nu0 [cm-1], c2 = h c / k [cm K].

    References: Goody and Yung (1989) eq. 3.64; Liou (2002) eq. 4.2.7 (from memory).
    """
    t = np.asarray(temperature, dtype=float)
    x = _C2_CM_K * position_cm1
    stim = -np.expm1(-x / t) / -np.expm1(-x / reference_temperature)
    ratio = (reference_temperature / t) ** partition_exponent
    ratio = ratio * np.exp(-_C2_CM_K * lower_energy_cm1 * (1.0 / t - 1.0 / reference_temperature)) * stim
    # d ln(1 - exp(-x/T)) / dT = -(x / T^2) exp(-x/T) / (1 - exp(-x/T))
    dstim = -(x / t**2) * np.exp(-x / t) / -np.expm1(-x / t)
    dlog = -partition_exponent / t + _C2_CM_K * lower_energy_cm1 / t**2 + dstim
    return ratio, dlog


# -- line lists ------------------------------------------------------------------------
@dataclasses.dataclass(frozen=True)
class LineList:
    """A line list in one spectral unit (see the module docstring for the file format).

    Arrays are per line; ``continuum_*`` per continuum node.
    """

    title: str
    unit: str  # "GHz" or "cm-1"
    shape: str  # "vvw" or "voigt"
    reference_temperature_k: float
    reference_pressure_hpa: float
    cutoff: float | None  # [unit]
    molar_mass_g_mol: dict
    partition_exponent: dict
    absorber: np.ndarray  # str
    position: np.ndarray  # [unit]
    intensity: np.ndarray  # [m2 kg-1 unit]
    lower_energy_cm1: np.ndarray  # [cm-1]
    half_width: np.ndarray  # [unit hPa-1]
    width_exponent: np.ndarray  # [1]
    continuum_position: np.ndarray  # [unit]
    continuum_k: np.ndarray  # [m2 kg-1]
    continuum_exponent: np.ndarray  # [1]

    @property
    def cm1_per_unit(self) -> float:
        return 1.0 if self.unit == "cm-1" else 1.0 / GHZ_PER_CM1


_REQUIRED_HEADER = ("format", "title", "unit", "shape", "reference_temperature_k", "reference_pressure_hpa")


def read_line_list(path) -> LineList:
    """Read and validate a line-list file; errors name the file, the line and the key."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ValueError(f"{path}: cannot read line list ({exc.strerror})") from None
    return parse_line_list(text, str(path))


def parse_line_list(text: str, source: str = "<string>") -> LineList:
    """Parse line-list ``text`` (format in the module docstring); ``source`` names it."""
    header: dict = {}
    lines, nodes = [], []
    for number, raw in enumerate(text.splitlines(), start=1):
        where = f"{source} line {number}"
        content = raw.split("#", 1)[0].strip() if not raw.lstrip().startswith("@title") else raw.strip()
        if not content:
            continue
        if content.startswith("@"):
            key, sep, value = content[1:].partition("=")
            key, value = key.strip(), value.strip()
            if not sep or not key:
                raise ValueError(f"{where}: header must read '@key = value', got {raw.strip()!r}")
            if key in header:
                raise ValueError(f"{where}: header key '{key}' repeated")
            header[key] = (value, where)
            continue
        fields = content.split()
        kind = fields[0]
        if kind == "line":
            names = ("absorber", "position", "intensity", "lower_energy_cm1", "half_width", "width_exponent")
            if len(fields) != 7:
                raise ValueError(f"{where}: a 'line' record needs 6 fields {list(names)}, got {len(fields) - 1}")
            if fields[1] not in ABSORBERS:
                raise ValueError(f"{where}: key 'absorber' must be one of {list(ABSORBERS)}, got {fields[1]!r}")
            values = [_field(f, n, where) for f, n in zip(fields[2:], names[1:])]
            for value, name in zip(values, names[1:]):
                if name in ("position", "half_width") and value <= 0:
                    raise ValueError(f"{where}: key '{name}' must be > 0, got {value}")
                if name in ("intensity", "lower_energy_cm1") and value < 0:
                    raise ValueError(f"{where}: key '{name}' must be >= 0, got {value}")
            lines.append((fields[1], *values))
        elif kind == "continuum":
            names = ("position", "k_ref", "temperature_exponent")
            if len(fields) != 4:
                raise ValueError(f"{where}: a 'continuum' record needs 3 fields {list(names)}, got {len(fields) - 1}")
            values = [_field(f, n, where) for f, n in zip(fields[1:], names)]
            if values[0] <= 0 or values[1] < 0:
                raise ValueError(f"{where}: continuum needs position > 0 and k_ref >= 0, got {values[:2]}")
            nodes.append(values)
        else:
            raise ValueError(f"{where}: unknown record {kind!r}; expected 'line', 'continuum' or '@key = value'")
    return _line_list_from(header, lines, nodes, source)


def _field(text: str, name: str, where: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise ValueError(f"{where}: key '{name}' must be a number, got {text!r}") from None
    if not math.isfinite(value):
        raise ValueError(f"{where}: key '{name}' must be finite, got {text!r}")
    return value


def _line_list_from(header: dict, lines: list, nodes: list, source: str) -> LineList:
    allowed = set(_REQUIRED_HEADER) | {"cutoff"} | {
        f"{kind}.{a}" for kind in ("molar_mass_g_mol", "partition_exponent") for a in ABSORBERS
    }
    for key, (_, where) in header.items():
        if key not in allowed:
            raise ValueError(f"{where}: unknown header key '{key}'; allowed: {sorted(allowed)}")
    for key in _REQUIRED_HEADER:
        if key not in header:
            raise ValueError(f"{source}: missing header key '@{key}'")
    value, where = header["format"]
    if value != "rtemu-lines 1":
        raise ValueError(f"{where}: key 'format' must be 'rtemu-lines 1', got {value!r}")
    for key, choices in (("unit", UNITS), ("shape", SHAPES)):
        value, where = header[key]
        if value not in choices:
            raise ValueError(f"{where}: key '{key}' must be one of {list(choices)}, got {value!r}")

    def number(key, positive=True):
        text, where = header[key]
        value = _field(text, key, where)
        if positive and value <= 0:
            raise ValueError(f"{where}: key '{key}' must be > 0, got {value}")
        return value

    used = sorted({rec[0] for rec in lines})
    molar, partition = {}, {}
    for absorber in used:
        for kind, store in (("molar_mass_g_mol", molar), ("partition_exponent", partition)):
            key = f"{kind}.{absorber}"
            if key not in header:
                raise ValueError(f"{source}: missing header key '@{key}' (lines of absorber {absorber!r} present)")
            store[absorber] = number(key, positive=kind == "molar_mass_g_mol")
    if not lines and not nodes:
        raise ValueError(f"{source}: no 'line' or 'continuum' records")
    cols = list(zip(*lines)) if lines else [()] * 6
    nodes = sorted(nodes)
    if len({n[0] for n in nodes}) != len(nodes):
        raise ValueError(f"{source}: continuum positions must be unique")
    ncols = list(zip(*nodes)) if nodes else [()] * 3
    return LineList(
        title=header["title"][0],
        unit=header["unit"][0],
        shape=header["shape"][0],
        reference_temperature_k=number("reference_temperature_k"),
        reference_pressure_hpa=number("reference_pressure_hpa"),
        cutoff=number("cutoff") if "cutoff" in header else None,
        molar_mass_g_mol=molar,
        partition_exponent=partition,
        absorber=np.array(cols[0], dtype=object),
        position=np.array(cols[1], dtype=float),
        intensity=np.array(cols[2], dtype=float),
        lower_energy_cm1=np.array(cols[3], dtype=float),
        half_width=np.array(cols[4], dtype=float),
        width_exponent=np.array(cols[5], dtype=float),
        continuum_position=np.array(ncols[0], dtype=float),
        continuum_k=np.array(ncols[1], dtype=float),
        continuum_exponent=np.array(ncols[2], dtype=float),
    )


# -- absorption ------------------------------------------------------------------------
def convert_spectral(values, from_unit: str, to_unit: str):
    """Positions or widths [from_unit] in [to_unit] (GHz or cm-1)."""
    if from_unit == to_unit:
        return values
    return values * GHZ_PER_CM1 if to_unit == "GHz" else values / GHZ_PER_CM1


def absorption(line_list: LineList, nu, pressure_hpa, temperature, unit: str, *, derivative: bool = False):
    """Mass absorption coefficients of ``line_list`` on a frequency grid, per layer.

    k_a(nu; p, T) = sum over lines of absorber a of S(T) f(nu; gamma(p, T), sigma(T))

    Parameters
    ----------
    line_list : LineList
    nu : ndarray [F]
        Frequencies [unit].
    pressure_hpa, temperature : ndarray [J]
        Layer pressure [hPa] and temperature [K].
    unit : {"GHz", "cm-1"}
        Unit of ``nu``.
    derivative : bool
        Also return the temperature derivatives.

    Returns
    -------
    k : ndarray [3, J, F]
        Dry-line, water-vapour-line and continuum coefficients [m2 kg-1] (the continuum one
        multiplies (e / p_ref) times the vapour mass path).
    dk_dt : ndarray [3, J, F]
        With ``derivative``: their partial derivatives in temperature [m2 kg-1 K-1].
    """
    nu = np.asarray(nu, dtype=float)
    p = np.atleast_1d(np.asarray(pressure_hpa, dtype=float))
    t = np.atleast_1d(np.asarray(temperature, dtype=float))
    ll = line_list
    t_ref = ll.reference_temperature_k
    k = np.zeros((3, p.size, nu.size))
    dk = np.zeros_like(k) if derivative else None
    # Work in the line list's own unit; k [m2 kg-1] does not depend on the unit, since
    # S [m2 kg-1 unit] times f [unit-1] is unit-free in the spectral coordinate.
    x_nu = convert_spectral(nu, unit, ll.unit)
    lo, hi = x_nu.min(), x_nu.max()
    for a_index, absorber in enumerate(ABSORBERS):
        select = ll.absorber == absorber
        if ll.cutoff is not None:
            select &= (ll.position > lo - ll.cutoff) & (ll.position < hi + ll.cutoff)
        if not select.any():
            continue
        pos = ll.position[select]
        ratio, dlog_s = intensity_scaling(
            t[:, None], t_ref, ll.lower_energy_cm1[select][None, :],
            pos[None, :] * ll.cm1_per_unit, ll.partition_exponent[absorber],
        )  # [J, M]
        strength = ll.intensity[select][None, :] * ratio
        gamma = pressure_half_width(ll.half_width[select][None, :], ll.width_exponent[select][None, :],
                                    p[:, None], t[:, None], t_ref)  # [J, M]
        n_exp = ll.width_exponent[select][None, :]
        for m in range(pos.size):
            shape, dshape_dt = _shape(ll, absorber, x_nu, pos[m], gamma[:, m:m + 1], n_exp[:, m:m + 1],
                                      t[:, None], derivative)
            if ll.cutoff is not None:
                outside = np.abs(x_nu - pos[m]) > ll.cutoff
                shape = np.where(outside, 0.0, shape)
                if derivative:
                    dshape_dt = np.where(outside, 0.0, dshape_dt)
            s = strength[:, m:m + 1]
            k[a_index] += s * shape
            if derivative:
                dk[a_index] += s * (dlog_s[:, m:m + 1] * shape + dshape_dt)
    if ll.continuum_position.size:
        x_nodes = ll.continuum_position
        inside = (x_nu >= x_nodes[0]) & (x_nu <= x_nodes[-1])
        k_ref = np.where(inside, np.interp(x_nu, x_nodes, ll.continuum_k), 0.0)
        expo = np.interp(x_nu, x_nodes, ll.continuum_exponent)
        scale = (t_ref / t[:, None]) ** expo[None, :]  # eq. of the module docstring
        k[2] = k_ref[None, :] * scale
        if derivative:
            dk[2] = -expo[None, :] * k[2] / t[:, None]
    return (k, dk) if derivative else k


def _shape(ll: LineList, absorber, x_nu, nu0, gamma, n_exp, t, derivative):
    """Line shape [J, F] at centre ``nu0`` and its total derivative in T (through the widths)."""
    if ll.shape == "vvw":
        f = van_vleck_weisskopf(x_nu[None, :], nu0, gamma)
        if not derivative:
            return f, None
        ratio = (x_nu[None, :] / nu0) ** 2
        df_dgamma = ratio * (_dlorentz_dgamma(x_nu[None, :] - nu0, gamma) + _dlorentz_dgamma(x_nu[None, :] + nu0, gamma))
        return f, df_dgamma * (-n_exp * gamma / t)
    sigma = doppler_sigma(nu0, t, ll.molar_mass_g_mol[absorber])
    x = x_nu[None, :] - nu0
    if not derivative:
        return voigt(x, sigma, gamma), None
    v, dv_dsigma, dv_dgamma = voigt_with_derivatives(x, sigma, gamma)
    return v, dv_dsigma * (0.5 * sigma / t) + dv_dgamma * (-n_exp * gamma / t)


def _dlorentz_dgamma(x, gamma):
    """d/dgamma of (gamma / pi) / (x^2 + gamma^2) [unit-2]."""
    denom = x * x + gamma * gamma
    return (x * x - gamma * gamma) / (np.pi * denom * denom)


# -- passbands ------------------------------------------------------------------------
@dataclasses.dataclass(frozen=True)
class Passband:
    """One channel's spectral response (see :func:`read_passbands`)."""

    id: str
    unit: str  # "GHz" (frequency_ghz given) or "cm-1" (wavenumber_cm1 given)
    centre: float  # [unit]
    width: float  # [unit]: full width of a rectangle, full width at half maximum of a gaussian
    shape: str  # "rectangle" or "gaussian"
    sideband_offsets: tuple  # [unit]; (0.0,) for a single band
    noise_k: float  # [K]
    samples: int  # frequencies per sideband

    def sideband_grids(self):
        """Per sideband: (position [unit], frequencies [unit], response weights [1]).

        The weights of all sidebands together sum to 1 (equal sideband gains). A gaussian
        response is cut at +-1.5 FWHM.
        """
        half = 0.5 * self.width if self.shape == "rectangle" else 1.5 * self.width
        out = []
        for offset in self.sideband_offsets:
            pos = self.centre + offset
            # Midpoints of `samples` equal cells: the midpoint rule on the passband.
            edges = np.linspace(pos - half, pos + half, self.samples + 1)
            nu = 0.5 * (edges[:-1] + edges[1:])
            if self.shape == "rectangle":
                r = np.ones_like(nu)
            else:
                sd = self.width / (2.0 * math.sqrt(2.0 * math.log(2.0)))
                r = np.exp(-0.5 * ((nu - pos) / sd) ** 2)
            out.append((pos, nu, r / r.sum() / len(self.sideband_offsets)))
        return out


@dataclasses.dataclass(frozen=True)
class PassbandFile:
    """A passband file: instrument name, description, line lists and channels."""

    name: str
    description: str
    line_lists: tuple  # LineList
    line_list_paths: tuple  # str, as written in the file
    channels: tuple  # Passband
    source: str

    @property
    def channel_ids(self):
        return tuple(ch.id for ch in self.channels)


_SHAPES_PASSBAND = ("rectangle", "gaussian")


def read_passbands(path) -> PassbandFile:
    """Read a passband TOML file (and the line lists it names, relative to its folder).

    Keys::

        name = "..."; description = "INVENTED ..."
        line_lists = ["a.lines", ...]
        [[channels]]
        id = "mw-t3"
        frequency_ghz = 53.6          # or wavenumber_cm1: the centre / local oscillator
        width_ghz = 0.2               # (width_cm1) full width (rectangle) or FWHM (gaussian)
        shape = "rectangle"           # or "gaussian"
        sideband_offsets_ghz = [-0.115, 0.115]   # optional (sideband_offsets_cm1)
        noise_k = 0.2
        samples = 400                 # frequencies per sideband
    """
    path = Path(path)
    source = str(path)
    try:
        doc = tomllib.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise ValueError(f"{source}: cannot read passband file ({exc.strerror})") from None
    except tomllib.TOMLDecodeError as exc:
        raise ValueError(f"{source}: not valid TOML: {exc}") from None
    unknown = sorted(set(doc) - {"name", "description", "line_lists", "channels"})
    if unknown:
        raise ValueError(f"{source}: unknown key(s) {unknown}")
    for key in ("name", "description"):
        if not isinstance(doc.get(key), str) or not doc[key]:
            raise ValueError(f"{source}: key '{key}' must be a non-empty string")
    files = doc.get("line_lists")
    if not isinstance(files, list) or not files or not all(isinstance(f, str) for f in files):
        raise ValueError(f"{source}: key 'line_lists' must be a non-empty list of file names")
    line_lists = tuple(read_line_list(path.parent / f) for f in files)
    raw = doc.get("channels")
    if not isinstance(raw, list) or not raw:
        raise ValueError(f"{source}: needs at least one [[channels]] entry")
    channels = [_passband(entry, i, source) for i, entry in enumerate(raw)]
    ids = [c.id for c in channels]
    if len(set(ids)) != len(ids):
        raise ValueError(f"{source}: channel ids are not unique: {ids}")
    return PassbandFile(doc["name"], doc["description"], line_lists, tuple(files), tuple(channels), source)


def _passband(raw, index, source) -> Passband:
    where = f"{source} channel #{index}"
    if not isinstance(raw, dict) or not isinstance(raw.get("id"), str) or not raw["id"]:
        raise ValueError(f"{where}: must be a table with a non-empty string 'id'")
    where = f"{source} channel {raw['id']!r}"
    unit = "GHz" if "frequency_ghz" in raw else "cm-1" if "wavenumber_cm1" in raw else None
    if unit is None or ("frequency_ghz" in raw and "wavenumber_cm1" in raw):
        raise ValueError(f"{where}: needs exactly one of 'frequency_ghz' or 'wavenumber_cm1'")
    suffix = "ghz" if unit == "GHz" else "cm1"
    position_key = "frequency_ghz" if unit == "GHz" else "wavenumber_cm1"
    allowed = {"id", position_key, f"width_{suffix}", "shape", f"sideband_offsets_{suffix}", "noise_k", "samples"}
    unknown = sorted(set(raw) - allowed)
    if unknown:
        raise ValueError(f"{where}: unknown key(s) {unknown}; allowed: {sorted(allowed)}")

    def positive(key):
        if key not in raw:
            raise ValueError(f"{where}: missing key '{key}'")
        value = raw[key]
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) or value <= 0:
            raise ValueError(f"{where}: key '{key}' must be a finite number > 0, got {value!r}")
        return float(value)

    shape = raw.get("shape", "rectangle")
    if shape not in _SHAPES_PASSBAND:
        raise ValueError(f"{where}: key 'shape' must be one of {list(_SHAPES_PASSBAND)}, got {shape!r}")
    offsets = raw.get(f"sideband_offsets_{suffix}", [0.0])
    if (not isinstance(offsets, list) or not offsets
            or not all(isinstance(o, (int, float)) and not isinstance(o, bool) and math.isfinite(o) for o in offsets)):
        raise ValueError(f"{where}: key 'sideband_offsets_{suffix}' must be a non-empty list of numbers")
    samples = raw.get("samples")
    if isinstance(samples, bool) or not isinstance(samples, int) or samples < 1:
        raise ValueError(f"{where}: key 'samples' must be an integer >= 1, got {samples!r}")
    centre, width = positive(position_key), positive(f"width_{suffix}")
    half = 0.5 * width if shape == "rectangle" else 1.5 * width
    if any(centre + o - half <= 0 for o in offsets):
        raise ValueError(f"{where}: a sideband reaches zero or negative frequency")
    return Passband(raw["id"], unit, centre, width, shape, tuple(float(o) for o in offsets),
                    positive("noise_k"), samples)
