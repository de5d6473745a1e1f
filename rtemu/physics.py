"""The physical reference model: clear-sky Schwarzschild transfer through gray sub-bands.

Pure-numpy core (:func:`transfer`) on surface-first arrays in canonical units, and the
labelled entry points (:func:`simulate`, :func:`tangent_linear`, :func:`adjoint`) that
validate an :class:`xarray.Dataset`, handle units and level order, and label the result.

The model, for levels i = 0..L-1 (surface first) and layers j = 0..L-2 between levels j
and j+1, with g = 9.80665 m s-2, epsilon = 0.622, T_cosmic = 2.725 K, mu = cos(zenith):

* layer means (arithmetic): T_j, q_j, p_j;                                     (eq. 1)
* mass path dm_j = (p_j - p_j+1) 100 / g [kg m-2]; dw_j = q_j dm_j;
  dd_j = (1 - q_j) dm_j; e_j = q_j p_j / (epsilon + (1 - epsilon) q_j) [hPa];    (eq. 2)
* nadir optical depth of sub-band b                                              (eq. 3)
  d_bj = k_dry (p_j/p_ref)^n_dry (T_ref/T_j)^m_dry dd_j
       + k_h2o (p_j/p_ref)^n_h2o (T_ref/T_j)^m_h2o dw_j
       + k_cont (e_j/p_ref) (T_ref/T_j)^m_cont dw_j ;  slant depth d_bj / mu;
  the exponents are the instrument's ``[absorbers.*]`` laws or the band's own; a table
  band replaces each k (law) by exp(ln k(ln p_j, T_j)), bilinear in (ln p, T) of its table
  (ln p clamped to the table, T extrapolated linearly);
* t_i = exp(-sum_{j>=i} d_bj/mu) (level to space), s_i = exp(-sum_{j<i} d_bj/mu)
  (surface to level);                                                            (eq. 4)
* R_b = e B_b(T_s) t_0 + sum_j B_b(T_j)(t_j+1 - t_j)
        + (1 - e) t_0 [sum_j B_b(T_j)(s_j - s_j+1) + B_b(T_cosmic) s_L-1],         (eq. 5)
  B_b the Planck function at the band's position (its own, e.g. a sideband, else its
  channel's);
* R = sum_b w_b R_b; brightness temperature = B^-1(R) at the channel's position.   (eq. 6)

Jacobians are the exact derivatives of this discrete model, in the same pass (for table
bands through d ln k / dT of the interpolation).

References
----------
Petty, G. W. (2006), A First Course in Atmospheric Radiation, 2nd ed., Sundog, ch. 7-8.
Liou, K. N. (2002), An Introduction to Atmospheric Radiation, 2nd ed., Academic Press, ch. 4.
"""

from __future__ import annotations

import dataclasses
import functools
from typing import Literal

import numpy as np
import xarray as xr
from xarray.indexes import PandasIndex

from rtemu import flags as _flags
from rtemu._checks import onto_grid, prepare_inputs
from rtemu.constants import COSMIC_BACKGROUND_TEMPERATURE, EPSILON, STANDARD_GRAVITY
from rtemu.instrument import Instrument, load_instrument
from rtemu.levels import transfer_above_ground
from rtemu.planck import inverse_planck, planck, planck_coefficients, planck_derivative

#: Profiles per vectorised block, at most; fewer when the bands and levels are many (see
#: WORK_BYTES).
DEFAULT_BLOCK_SIZE = 512

#: Memory budget of one block's work arrays [bytes]: a block holds about
#: _WORK_ARRAYS arrays of profiles x sub-bands x layers float64 values.
WORK_BYTES = 256 * 2**20
_WORK_ARRAYS = 24

JACOBIAN_NAMES = (
    "jacobian_air_temperature",
    "jacobian_specific_humidity",
    "jacobian_surface_temperature",
    "jacobian_surface_emissivity",
)


class _Bands:
    """Per-instrument constant arrays (bands flattened over channels).

    Bands fall in three groups by how their absorption is computed: ``default`` (the
    instrument's ``[absorbers.*]`` laws: one path per absorber for all of them, one matrix
    product), ``law`` (their own power laws) and ``table`` ((ln p, T) tables).
    """

    def __init__(self, instrument: Instrument):
        missing = instrument.channels_without_bands
        if missing:
            raise ValueError(
                f"instrument {instrument.name!r}: channel(s) {list(missing)} have no 'bands' (rule: rtemu's "
                "physics computes only channels made of sub-bands; a band-less channel describes "
                "another model's instrument)"
            )
        self.instrument = instrument
        chans = instrument.channels
        self.n_channels = len(chans)
        flat = [(c, ch, band) for c, ch in enumerate(chans) for band in ch.bands]
        self.n_bands = len(flat)
        self.band_channel = np.array([c for c, _, _ in flat])  # [B]
        self.weight = np.array([band.weight for _, _, band in flat])  # [B]
        self.k = np.array([(band.dry, band.h2o, band.continuum) for _, _, band in flat])  # [B, 3] [m2 kg-1]
        self.laws = np.array([band.laws(instrument) for _, _, band in flat])  # [B, 5] [1]
        table = np.array([-1 if band.table is None else band.table for _, _, band in flat])
        own = np.array([band.has_own_laws for _, _, band in flat], dtype=bool)
        self.default = np.flatnonzero((table < 0) & ~own)
        self.law = np.flatnonzero((table < 0) & own)
        self.table = np.flatnonzero(table >= 0)
        self.table_index = table[self.table]
        # Per absorber used by any table band: (index, tables [NP * NTEMP, G], mask [G]).
        self.table_rows = []
        tables = instrument.absorption_tables
        if self.table.size:
            self.table_n_temp = tables.temperature_k.size
            for a in range(3):
                mask = tables.mask[self.table_index, a]
                if mask.any():
                    ln_k = tables.ln_k[self.table_index, a]  # [G, NP, NTEMP]
                    rows = np.ascontiguousarray(ln_k.reshape(len(self.table_index), -1).T)
                    self.table_rows.append((a, rows, mask.astype(float)))

        self.a, self.b = _channel_planck_coefficients(chans)  # [C], channel positions (eq. 6)
        # Planck positions of the bands (eq. 5): the channel's unless a band has its own.
        positions = [(ch.is_microwave, _band_position(ch, band)) for _, ch, band in flat]
        unique = sorted(set(positions))
        number = {pos: i for i, pos in enumerate(unique)}
        self.band_position = np.array([number[pos] for pos in positions])  # [B]
        self.pos_a = np.empty(len(unique))
        self.pos_b = np.empty(len(unique))
        for i, (microwave, value) in enumerate(unique):
            self.pos_a[i], self.pos_b[i] = planck_coefficients(
                **({"frequency_ghz": value} if microwave else {"wavenumber_cm1": value})
            )
        self.cosmic = planck(self.pos_a, self.pos_b, COSMIC_BACKGROUND_TEMPERATURE)  # [P]
        # Channel sum as a matrix: R_c = sum_b W[c, b] R_b.
        self.band_to_channel = np.zeros((self.n_channels, self.n_bands))
        self.band_to_channel[self.band_channel, np.arange(self.n_bands)] = self.weight
        # A channel's bands are contiguous: the sum is a segment sum (the matrix is sparse).
        self.band_start = np.searchsorted(self.band_channel, np.arange(self.n_channels))

    def channel_sum(self, x):
        """sum_b w_b x[:, b] per channel (eq. 6) of x [N, B, ...]; overwrites x."""
        x *= self.weight.reshape((1, -1) + (1,) * (x.ndim - 2))
        return np.add.reduceat(x, self.band_start, axis=1)

    def block_size(self, requested: int, n_layers: int) -> int:
        """Profiles per block: ``requested``, fewer if the work arrays would pass WORK_BYTES."""
        per_profile = _WORK_ARRAYS * self.n_bands * max(1, n_layers) * 8
        return max(1, min(int(requested), WORK_BYTES // per_profile))


def _channel_planck_coefficients(channels):
    """Planck constants (a, b) at each channel's position [radiance units], [K]; arrays [C]."""
    a = np.empty(len(channels))
    b = np.empty(len(channels))
    for c, ch in enumerate(channels):
        a[c], b[c] = planck_coefficients(frequency_ghz=ch.frequency_ghz, wavenumber_cm1=ch.wavenumber_cm1)
    return a, b


def _band_position(channel, band) -> float:
    """A band's Planck position [GHz] or [cm-1]: its own, else its channel's."""
    if channel.is_microwave:
        return channel.frequency_ghz if band.frequency_ghz is None else band.frequency_ghz
    return channel.wavenumber_cm1 if band.wavenumber_cm1 is None else band.wavenumber_cm1


def _layer_state(inst: Instrument, p, t, q):
    """Layer means and band-independent mass paths (eqs. 1-2), arrays [N, L-1].

    Returns tm [K], pm [hPa], dm [kg m-2], the law-free paths (dry dd, vapour dw,
    continuum (e/p_ref) dw) [kg m-2] stacked as [3, N, L-1], and their derivatives with
    respect to the layer-mean humidity [kg m-2 (kg kg-1)-1].
    """
    tm = 0.5 * (t[:, :-1] + t[:, 1:])  # eq. 1
    qm = 0.5 * (q[:, :-1] + q[:, 1:])
    pm = 0.5 * (p[:, :-1] + p[:, 1:])
    dm = (p[:, :-1] - p[:, 1:]) * 100.0 / STANDARD_GRAVITY  # eq. 2
    p_ref = inst.reference_pressure_hpa
    denom = EPSILON + (1.0 - EPSILON) * qm
    vap = qm * pm / denom  # e_j [hPa]
    dvap_dq = pm * EPSILON / denom**2
    paths = np.stack([(1.0 - qm) * dm, qm * dm, (vap / p_ref) * qm * dm])
    d_dq = np.stack([-dm, dm, (dvap_dq * qm + vap) / p_ref * dm])
    return tm, pm, paths, d_dq


def _absorber_paths(inst: Instrument, p, t, q):
    """Path factors of the instrument's default laws and their derivatives [kg m-2 ...].

    Returns tm [K] and arrays [3, N, L-1]: the factors multiplying k_dry, k_h2o and k_cont
    in eq. 3 under the ``[absorbers.*]`` laws, and their partial derivatives with respect
    to the layer-mean temperature and humidity.
    """
    tm, pm, paths, d_dq = _layer_state(inst, p, t, q)
    p_ref, t_ref = inst.reference_pressure_hpa, inst.reference_temperature_k

    def law(absorber):
        return (pm / p_ref) ** absorber.pressure_exponent * (t_ref / tm) ** absorber.temperature_exponent

    factors = np.stack([law(inst.dry), law(inst.h2o), (t_ref / tm) ** inst.continuum.temperature_exponent])
    exponents = np.array([inst.dry.temperature_exponent, inst.h2o.temperature_exponent,
                          inst.continuum.temperature_exponent])[:, None, None]
    paths = factors * paths
    d_dt = -exponents * paths / tm
    return tm, paths, d_dt, factors * d_dq


def _optical_depths(bands: _Bands, p, t, q, inv_mu, jacobian):
    """Slant optical depths of every band and layer (eq. 3), [N, B, L-1] [1].

    Returns tm [K], tau, and with ``jacobian`` d tau / d tm [K-1] and d tau / d qm
    [(kg kg-1)-1] (else None). A zero-thickness layer (dm = 0) has tau = 0 exactly.
    """
    inst = bands.instrument
    tm, pm, paths, d_dq = _layer_state(inst, p, t, q)
    shape = (tm.shape[0], bands.n_bands, tm.shape[1])
    groups = [g for g in (bands.default, bands.law, bands.table) if g.size]
    whole = len(groups) == 1
    tau = None if whole else np.empty(shape)
    dtau_dtm = None if whole or not jacobian else np.empty(shape)
    dtau_dqm = None if whole or not jacobian else np.empty(shape)
    for group in groups:
        if group is bands.default:
            parts = _default_depths(bands, group, inst, p, t, q, jacobian)
        else:
            if group is bands.law:
                coefficients = _law_coefficients(bands, group, inst, pm, tm, jacobian)
            else:
                coefficients = _table_coefficients(bands, tm, pm, jacobian)
            parts = _coefficient_depths(coefficients, paths, d_dq, jacobian, group.size,
                                        bands_last=group is bands.table)
        if whole:
            tau, dtau_dtm, dtau_dqm = (None if x is None else np.ascontiguousarray(x) for x in parts)
            break
        tau[:, group] = parts[0]
        if jacobian:
            dtau_dtm[:, group] = parts[1]
            dtau_dqm[:, group] = parts[2]
    scale = inv_mu[:, :, None]  # [N, 1, 1]
    tau *= scale
    if jacobian:
        dtau_dtm *= scale
        dtau_dqm *= scale
    return tm, tau, dtau_dtm, dtau_dqm


def _default_depths(bands, group, inst, p, t, q, jacobian):
    """Nadir depths of the default-law bands: k [G, 3] times the shared paths (matmul, BLAS)."""
    _, law_paths, d_dt, d_dq = _absorber_paths(inst, p, t, q)
    k = bands.k[group]
    tau = np.matmul(k, law_paths.transpose(1, 0, 2))
    if not jacobian:
        return tau, None, None
    return tau, np.matmul(k, d_dt.transpose(1, 0, 2)), np.matmul(k, d_dq.transpose(1, 0, 2))


def _coefficient_depths(coefficients, paths, d_dq, jacobian, n_group, bands_last=False):
    """Nadir depths sum_a k_a(p, T) path_a (eq. 3) from per-band coefficients.

    ``coefficients`` yields (absorber index, k [N, G, L-1] [m2 kg-1], d ln k / dT [K-1]);
    with ``bands_last`` the arrays are [N, L-1, G] (returned as [N, G, L-1] views).
    """
    spread = (slice(None), slice(None), None) if bands_last else (slice(None), None, slice(None))
    tau = dtm = dqm = None
    for a, k, dlnk_dt in coefficients:
        term = k * paths[a][spread]
        if tau is None:
            tau = term
            if jacobian:
                dtm = term * dlnk_dt
                dqm = k * d_dq[a][spread]
            continue
        tau += term
        if jacobian:
            term *= dlnk_dt
            dtm += term
            k *= d_dq[a][spread]
            dqm += k
    if tau is None:  # no absorber in any band of the group
        zeros = np.zeros((paths.shape[1], n_group, paths.shape[2]))
        return zeros, zeros, zeros
    if bands_last:
        return tuple(None if x is None else x.transpose(0, 2, 1) for x in (tau, dtm, dqm))
    return tau, dtm, dqm


def _law_coefficients(bands, group, inst, pm, tm, jacobian):
    """k_a (p/p_ref)^n (T_ref/T)^m per band of ``group`` (eq. 3) and d ln k / dT = -m / T
    (None without ``jacobian``)."""
    ln_p = np.log(pm / inst.reference_pressure_hpa)[:, None, :]  # [N, 1, L-1]
    ln_t = np.log(inst.reference_temperature_k / tm)[:, None, :]
    laws = bands.laws[group]
    n_law = (laws[:, 0], laws[:, 2], np.zeros(len(group)))  # the continuum has no pressure law
    m_law = (laws[:, 1], laws[:, 3], laws[:, 4])
    for a in range(3):
        k = bands.k[group, a]
        if not k.any():
            continue
        k_pt = np.exp(n_law[a][None, :, None] * ln_p + m_law[a][None, :, None] * ln_t)
        k_pt *= k[None, :, None]
        yield a, k_pt, -m_law[a][None, :, None] / tm[:, None, :] if jacobian else None


def table_interpolation(tables, pressure_hpa, temperature_k):
    """Cell indices and weights of (ln p, T) points in the tables' grid.

    ln p is clamped to the table range; T is extrapolated linearly (weights beyond 0-1).

    Parameters
    ----------
    tables : AbsorptionTables
    pressure_hpa : ndarray
        [hPa]
    temperature_k : ndarray
        [K]

    Returns
    -------
    ip, it : ndarray of int
        Lower corner along pressure and temperature.
    fp, ft : ndarray
        Fractions along ln p and T [1].
    dt : ndarray
        Cell width in temperature [K].
    """
    ln_grid = np.log(tables.pressure_hpa)
    x = np.clip(np.log(pressure_hpa), ln_grid[0], ln_grid[-1])
    ip = np.clip(np.searchsorted(ln_grid, x, side="right") - 1, 0, ln_grid.size - 2)
    fp = (x - ln_grid[ip]) / (ln_grid[ip + 1] - ln_grid[ip])
    grid = tables.temperature_k
    it = np.clip(np.searchsorted(grid, temperature_k, side="right") - 1, 0, grid.size - 2)
    dt = grid[it + 1] - grid[it]
    ft = (temperature_k - grid[it]) / dt
    return ip, it, fp, ft, dt


def interpolate_ln_k(ln_k, cell):
    """Bilinear ln k in (ln p, T) and its T-derivative at the points of ``cell``.

    Parameters
    ----------
    ln_k : ndarray [G, NP, NTEMP]
        One absorber's tables [ln(m2 kg-1)].
    cell : tuple
        :func:`table_interpolation` of points of shape S.

    Returns
    -------
    ln_k : ndarray [G, *S]
        [ln(m2 kg-1)]
    d_ln_k_dt : ndarray [G, *S]
        [K-1]
    """
    rows = np.ascontiguousarray(ln_k.reshape(ln_k.shape[0], -1).T)
    value, slope = _interpolate_rows(rows, ln_k.shape[2], cell)
    return np.moveaxis(value, -1, 0), np.moveaxis(slope, -1, 0)


def _interpolate_rows(rows, n_temp, cell, slope=True):
    """:func:`interpolate_ln_k` on tables laid out [NP * NTEMP, G]; results [*S, G].

    Each corner is then a contiguous row of G values: a gather of rows, not of scalars.
    Without ``slope`` the T-derivative is None.
    """
    ip, it, fp, ft, dt = cell
    corner = ip * n_temp + it
    v00, v01 = rows[corner], rows[corner + 1]
    v10, v11 = rows[corner + n_temp], rows[corner + n_temp + 1]
    fp, ft = fp[..., None], ft[..., None]
    # Weights (1 - f) and f: a grid node returns its table value exactly.
    value = v00 * ((1.0 - fp) * (1.0 - ft))
    value += v01 * ((1.0 - fp) * ft)
    value += v10 * (fp * (1.0 - ft))
    value += v11 * (fp * ft)
    if not slope:
        return value, None
    v01 -= v00  # along T at the lower pressure
    v11 -= v10
    v01 *= (1.0 - fp) / dt[..., None]
    v11 *= fp / dt[..., None]
    v01 += v11
    return value, v01


def _table_coefficients(bands, tm, pm, jacobian):
    """k_a(p, T) = exp(ln k interpolated) per table band (eq. 3) and d ln k / dT.

    Arrays [N, L-1, G] (bands last).
    """
    cell = table_interpolation(bands.instrument.absorption_tables, pm, tm)
    for a, rows, mask in bands.table_rows:
        ln_k, d_ln_k = _interpolate_rows(rows, bands.table_n_temp, cell, slope=jacobian)
        k = np.exp(ln_k, out=ln_k)
        if not mask.all():
            k *= mask
        yield a, k, d_ln_k


def transfer(
    instrument,
    pressure_hpa,
    air_temperature,
    specific_humidity,
    surface_temperature,
    surface_emissivity,
    sensor_zenith_angle,
    *,
    jacobian: bool = False,
    block_size: int = DEFAULT_BLOCK_SIZE,
) -> dict:
    """Brightness temperatures (and exact Jacobians) of the gray-band model, eqs. 1-6.

    All arrays surface-first, canonical units, already validated.

    Parameters
    ----------
    instrument : Instrument or str
    pressure_hpa : ndarray [N, L] or [L]
        Level pressure [hPa], strictly decreasing along the level axis.
    air_temperature : ndarray [N, L]
        [K]
    specific_humidity : ndarray [N, L]
        [kg kg-1]
    surface_temperature : ndarray [N]
        Skin temperature [K].
    surface_emissivity : ndarray [N, C]
        [1]
    sensor_zenith_angle : ndarray [N]
        [degree]
    jacobian : bool
        Also return the Jacobians.
    block_size : int
        Profiles per vectorised block, at most (fewer where the work arrays would pass
        WORK_BYTES); memory only, results do not depend on it.

    Returns
    -------
    dict
        ``brightness_temperature`` [N, C] [K]; with ``jacobian``: ``jacobian_air_temperature``
        [N, C, L] [K K-1], ``jacobian_specific_humidity`` [N, C, L] [K (kg kg-1)-1],
        ``jacobian_surface_temperature`` [N, C] [K K-1], ``jacobian_surface_emissivity``
        [N, C] [K].
    """
    inst = load_instrument(instrument)
    tables = _Bands(inst)
    t = np.atleast_2d(np.asarray(air_temperature, dtype=float))
    n, nlev = t.shape
    p = np.broadcast_to(np.asarray(pressure_hpa, dtype=float), (n, nlev))
    q = np.asarray(specific_humidity, dtype=float).reshape(n, nlev)
    ts = np.asarray(surface_temperature, dtype=float).reshape(n)
    em = np.broadcast_to(np.asarray(surface_emissivity, dtype=float).reshape(n, -1), (n, tables.n_channels))
    zen = np.asarray(sensor_zenith_angle, dtype=float).reshape(n)
    out = {"brightness_temperature": np.empty((n, tables.n_channels))}
    if jacobian:
        out["jacobian_air_temperature"] = np.empty((n, tables.n_channels, nlev))
        out["jacobian_specific_humidity"] = np.empty((n, tables.n_channels, nlev))
        out["jacobian_surface_temperature"] = np.empty((n, tables.n_channels))
        out["jacobian_surface_emissivity"] = np.empty((n, tables.n_channels))
    block_size = tables.block_size(max(1, block_size), nlev - 1)
    for start in range(0, n, block_size):
        sl = slice(start, min(n, start + block_size))
        block = _transfer_block(tables, p[sl], t[sl], q[sl], ts[sl], em[sl], zen[sl], jacobian)
        for key, value in block.items():
            out[key][sl] = value
    return out


def _transfer_block(tables: _Bands, p, t, q, ts, em, zen, jacobian):
    bc, bp = tables.band_channel, tables.band_position
    inv_mu = 1.0 / np.cos(np.deg2rad(zen))[:, None]  # [N, 1]
    tm, tau, dtau_dtm, dtau_dqm = _optical_depths(tables, p, t, q, inv_mu, jacobian)  # eq. 3, slant
    pos_a, pos_b = tables.pos_a[bp][None, :, None], tables.pos_b[bp][None, :, None]  # band positions
    e_b = em[:, bc][:, :, None]  # [N, B, 1]

    # eq. 4: cumulative depths from the top (t) and from the surface (s)
    zeros = np.zeros(tau.shape[:2] + (1,))
    above = np.concatenate([np.cumsum(tau[:, :, ::-1], axis=2)[:, :, ::-1], zeros], axis=2)
    below = np.concatenate([zeros, np.cumsum(tau, axis=2)], axis=2)
    t_up = np.exp(-above)  # [N, B, L]
    s_dn = np.exp(-below)
    total = t_up[:, :, :1]  # t_0 = s_L-1, [N, B, 1]

    # Planck functions at each distinct band position P (eq. 5), then spread to the bands.
    planck_position = planck(tables.pos_a[None, :, None], tables.pos_b[None, :, None], tm[:, None, :])  # [N, P, L-1]
    planck_layer = planck_position[:, bp]
    planck_sfc = planck(tables.pos_a[None, :], tables.pos_b[None, :], ts[:, None])[:, bp][:, :, None]
    cosmic = tables.cosmic[bp][None, :, None]

    up_step = t_up[:, :, 1:] - t_up[:, :, :-1]  # t_j+1 - t_j, [N, B, L-1]
    dn_step = s_dn[:, :, :-1] - s_dn[:, :, 1:]  # s_j - s_j+1
    up_contrib = planck_layer * up_step
    dn_contrib = planck_layer * dn_step
    upwelling = np.sum(up_contrib, axis=2, keepdims=True)
    downwelling = np.sum(dn_contrib, axis=2, keepdims=True)
    reflected = downwelling + cosmic * total
    radiance_b = e_b * planck_sfc * total + upwelling + (1.0 - e_b) * total * reflected  # eq. 5
    radiance = tables.channel_sum(radiance_b[:, :, 0])  # eq. 6
    bt = inverse_planck(tables.a[None, :], tables.b[None, :], radiance)
    result = {"brightness_temperature": bt}
    if not jacobian:
        return result

    # dBT/dR from the inverse Planck function.
    dbt_drad = 1.0 / planck_derivative(tables.a[None, :], tables.b[None, :], bt)  # [N, C]

    # dR_b / d tau_k (derivation in DEVELOPERS.md, "Jacobians of the physical model"), with
    # w = (1 - e) t_0:
    #   B_k (t_k + w s_k+1) - sum_{j<k} B_j (t_j+1 - t_j) - w sum_{j>k} B_j (s_j - s_j+1)
    #   - e B_s t_0 - w (D + 2 B_cosmic t_0)
    # Written with in-place updates: the [N, B, L-1] temporaries dominate the cost.
    w = (1.0 - e_b) * total  # [N, B, 1]
    dr_dtau = w * s_dn[:, :, 1:]
    dr_dtau += t_up[:, :, :-1]
    dr_dtau *= planck_layer
    up_cum = np.cumsum(up_contrib, axis=2)
    up_cum -= up_contrib  # sum_{j<k}
    dr_dtau -= up_cum
    dn_cum = np.cumsum(dn_contrib[:, :, ::-1], axis=2)[:, :, ::-1]
    dn_cum -= dn_contrib  # sum_{j>k}
    dn_cum *= w
    dr_dtau -= dn_cum
    dr_dtau -= e_b * planck_sfc * total + w * (downwelling + 2.0 * cosmic * total)

    dr_dplanck = w * dn_step
    dr_dplanck += up_step
    # dB/dT = B (b / T^2) (1 + B / a): the Planck derivative from B itself, no second exp
    dplanck_dtm = planck_position * (tables.pos_b[None, :, None] / tm[:, None, :] ** 2)
    dplanck_dtm *= 1.0 + planck_position / tables.pos_a[None, :, None]
    dr_dtm = dr_dplanck
    dr_dtm *= dplanck_dtm[:, bp]
    dtau_dtm *= dr_dtau
    dr_dtm += dtau_dtm  # [N, B, L-1]
    dr_dqm = dtau_dqm
    dr_dqm *= dr_dtau

    # Sum sub-bands into channels, then spread layer derivatives onto the two levels.
    def to_channels(x):  # dBT_c = dBT/dR_c * sum_b w_b dR_b; consumes x
        out = tables.channel_sum(x)
        out *= dbt_drad[:, :, None]
        return out

    result["jacobian_air_temperature"] = _layers_to_levels(to_channels(dr_dtm))
    result["jacobian_specific_humidity"] = _layers_to_levels(to_channels(dr_dqm))
    dr_dts = e_b * total * planck_derivative(pos_a, pos_b, ts[:, None, None])
    dr_dem = planck_sfc * total - total * reflected
    result["jacobian_surface_temperature"] = to_channels(dr_dts)[:, :, 0]
    result["jacobian_surface_emissivity"] = to_channels(dr_dem)[:, :, 0]
    return result


def _layers_to_levels(layer):
    """Chain d/d(layer mean) onto levels: each layer mean is half of its two levels."""
    n, c, nl = layer.shape
    level = np.empty((n, c, nl + 1))
    half = 0.5 * layer
    level[:, :, :-1] = half
    level[:, :, -1] = 0.0
    level[:, :, 1:] += half
    return level


# -- labelled entry points ------------------------------------------------------------------
_OUTPUT_ATTRS = {
    "brightness_temperature": {
        "standard_name": "toa_brightness_temperature",
        "long_name": "top-of-atmosphere brightness temperature",
        "units": "K",
    },
    "jacobian_air_temperature": {
        "long_name": "derivative of brightness temperature with respect to air temperature",
        "units": "K K-1",
    },
    "jacobian_specific_humidity": {
        "long_name": "derivative of brightness temperature with respect to specific humidity",
        "units": "K (kg kg-1)-1",
    },
    "jacobian_surface_temperature": {
        "long_name": "derivative of brightness temperature with respect to surface temperature",
        "units": "K K-1",
    },
    "jacobian_surface_emissivity": {
        "long_name": "derivative of brightness temperature with respect to surface emissivity",
        "units": "K",
    },
}


def output_attrs(name: str) -> dict:
    """CF attributes of an operator output variable."""
    return dict(_OUTPUT_ATTRS[name])


@functools.lru_cache(maxsize=64)
def _channel_coordinate(channel_ids: tuple) -> xr.Coordinates:
    """The ``channel`` coordinate (ids, object dtype) with its index, built once per id list.

    Shared between calls: users get a shallow copy of the Variable (own attributes) and
    the index, whose data are read-only.
    """
    return xr.Coordinates({"channel": np.array(list(channel_ids), dtype=object)})


def _carried_coordinates(dataset: xr.Dataset, channel_ids=None) -> xr.Coordinates:
    """The coordinates an output over (profile, level[, channel]) takes from ``dataset``.

    For ``profile`` and ``level``, when ``dataset`` has such a coordinate: that one and
    every coordinate the DataArray ``dataset.coords[dim]`` would carry (those along that
    dim alone, and scalar ones), with their indexes. ``profile`` and ``level`` always get
    xarray's default pandas index, as a Dataset built from those DataArrays did. With
    ``channel_ids``, ``channel`` holds the ids (not the dataset's channel coordinate).

    Built from Variables and existing indexes, without a DataArray or an index rebuild:
    on a one-profile call the DataArray route cost more than the emulator itself.
    """
    coords = dataset.coords
    names = []
    for dim in ("profile", "level"):
        if dim in coords:
            carried = set(dataset.variables[dim].dims)
            names += [k for k, v in coords.variables.items() if set(v.dims) <= carried and k not in names]
    variables = {k: dataset.variables[k] for k in names}
    xindexes = dataset.xindexes
    indexes = {k: xindexes[k] for k in names if k in xindexes}
    for dim in ("profile", "level"):
        if dim in variables and variables[dim].dims == (dim,) and not isinstance(indexes.get(dim), PandasIndex):
            # Unindexed, or another index type (e.g. a RangeIndex): xarray's default.
            own = {dim: variables[dim]}
            indexes[dim] = PandasIndex.from_variables(own, options={})
            variables.update(indexes[dim].create_variables(own))
    if channel_ids is not None:
        channel = _channel_coordinate(tuple(channel_ids))
        # A shallow copy: a caller editing the output's attributes must not edit the cache.
        variables["channel"] = channel.variables["channel"].copy(deep=False)
        indexes["channel"] = channel.xindexes["channel"]
    return xr.Coordinates(variables, indexes=indexes)


def label_outputs(arrays: dict, dataset: xr.Dataset, channel_ids, flag) -> xr.Dataset:
    """Wrap operator output arrays [N, C(, L)] into a labelled Dataset.

    Parameters
    ----------
    arrays : dict of str to ndarray
        Output name to values, [N, C] or [N, C, L] (numpy or dask), in the units of
        :func:`output_attrs` (K, K K-1, K (kg kg-1)-1).
    dataset : xarray.Dataset
        The inputs: its profile and level coordinates are carried over (see
        :func:`_carried_coordinates`).
    channel_ids : sequence of str
        The ``channel`` coordinate, in the order of the arrays' channel axis.
    flag : ndarray [N, C]
        ``quality_flag`` bits (stored as int32).
    """
    data = {}
    for name, values in arrays.items():
        dims = ("profile", "channel", "level") if values.ndim == 3 else ("profile", "channel")
        data[name] = xr.Variable(dims, values, output_attrs(name))
    data["quality_flag"] = xr.Variable(("profile", "channel"), flag.astype(np.int32), _flags.flag_attrs())
    return xr.Dataset(data, coords=_carried_coordinates(dataset, channel_ids))


def _compute(instrument, dataset, jacobian, errors, block_size, grid_hpa=None):
    """Validate ``dataset``, run the transfer, return Jacobians on the caller's levels.

    With ``surface_air_pressure`` the transfer runs on the column above the ground
    (:func:`rtemu.levels.cut_at_surface`); with ``grid_hpa`` (surface first [hPa]) the
    profiles are first carried onto that grid (:func:`rtemu._checks.onto_grid`).
    """
    inst = load_instrument(instrument)
    caller = prepare_inputs(dataset, inst.channel_ids, errors=errors)
    prep, levelmap = caller, None
    if grid_hpa is not None:
        prep, levelmap = onto_grid(caller, grid_hpa, errors)
    arrays = transfer_above_ground(
        functools.partial(transfer, inst),
        prep.pressure_hpa,
        prep.air_temperature,
        prep.specific_humidity,
        prep.surface_air_pressure,
        prep.surface_temperature,
        prep.surface_emissivity,
        prep.sensor_zenith_angle,
        jacobian=jacobian,
        block_size=block_size,
    )
    for name in ("jacobian_air_temperature", "jacobian_specific_humidity"):
        if name in arrays:
            if levelmap is not None:
                arrays[name] = levelmap.adjoint(arrays[name])
            arrays[name] = caller.to_caller_order(arrays[name])
    flag = np.where(prep.valid, 0, _flags.INVALID_INPUT) | np.where(prep.supersaturated, _flags.SUPERSATURATED, 0)
    flag = flag[:, None] * np.ones(len(inst.channels), np.int32)
    for values in arrays.values():
        values[~prep.valid] = np.nan
    if levelmap is not None:  # the caller's levels, with the validity on the grid
        prep = dataclasses.replace(caller, valid=prep.valid, problems=prep.problems)
    return inst, prep, arrays, flag


def simulate(
    instrument,
    dataset: xr.Dataset,
    jacobian: bool = False,
    *,
    errors: Literal["raise", "mask"] = "raise",
    block_size: int = DEFAULT_BLOCK_SIZE,
) -> xr.Dataset:
    """Brightness temperatures (and Jacobians) of ``dataset`` with the physical model.

    Parameters
    ----------
    instrument : Instrument or str
        An instrument or the name/path of one (see :func:`rtemu.load_instrument`).
    dataset : xarray.Dataset
        ``air_pressure`` (level) or (profile, level) [hPa]; ``air_temperature`` (profile,
        level) [K]; ``specific_humidity`` (profile, level) [kg kg-1];
        ``surface_temperature`` (profile) [K]; ``surface_emissivity`` (profile) or
        (profile, channel) [1]; ``sensor_zenith_angle`` (profile) [degree]; optional
        ``surface_air_pressure`` (profile) [hPa], the ground: the transfer then runs on
        the column above it (:func:`rtemu.levels.cut_at_surface`; it must lie in (top
        pressure, bottom pressure] of the profile), and the Jacobians of the levels under
        the ground are zero (their values are still checked like any other). Other
        units are converted from each variable's ``units`` attribute. Levels
        surface-first or top-first.
    jacobian : bool
        Also return ``jacobian_*`` variables (in the caller's level order and units of
        the canonical inputs: K, kg kg-1).
    errors : {"raise", "mask"}
        * ``"raise"``: invalid input raises ValueError naming variable, rule and profile.
        * ``"mask"``: invalid profiles get NaN outputs and the ``invalid_input`` flag; the
          others are computed exactly as they would be alone.
    block_size : int
        Profiles per vectorised block (memory only).

    Returns
    -------
    xarray.Dataset
        ``brightness_temperature`` (profile, channel) [K], ``quality_flag`` (profile,
        channel), and with ``jacobian`` the four ``jacobian_*`` variables.
    """
    return _simulate(instrument, dataset, jacobian, errors, block_size)


def _simulate(instrument, dataset, jacobian, errors, block_size, grid_hpa=None) -> xr.Dataset:
    """:func:`simulate`, optionally on the grid ``grid_hpa`` (see :func:`_compute`)."""
    inst, prep, arrays, flag = _compute(instrument, dataset, jacobian, errors, block_size, grid_hpa)
    out = label_outputs(arrays, dataset, inst.channel_ids, flag)
    if prep.problems:
        out.attrs["invalid_input_summary"] = "; ".join(prep.problems)
    return out


_INCREMENT_VARIABLES = (
    "air_temperature",
    "specific_humidity",
    "surface_temperature",
    "surface_emissivity",
)


def tangent_linear(
    instrument, dataset: xr.Dataset, perturbation: xr.Dataset, *, errors="raise"
) -> xr.Dataset:
    """Tangent-linear product J dx: brightness-temperature increments [K].

    Parameters
    ----------
    perturbation : xarray.Dataset
        Increments of any of ``air_temperature``, ``specific_humidity`` (profile, level),
        ``surface_temperature`` (profile), ``surface_emissivity`` (profile) or (profile,
        channel), in the units of the corresponding ``dataset`` variable (missing = 0).

    Returns
    -------
    xarray.Dataset
        ``brightness_temperature`` (profile, channel) [K] increments and ``quality_flag``.
    """
    inst, prep, arrays, flag = _compute(instrument, dataset, True, errors, DEFAULT_BLOCK_SIZE)
    dy = tangent_linear_arrays(arrays, _increments(prep, perturbation, dataset, inst.channel_ids))
    return label_outputs({"brightness_temperature": dy}, dataset, inst.channel_ids, flag)


def adjoint(
    instrument, dataset: xr.Dataset, bt_perturbation, *, errors="raise"
) -> xr.Dataset:
    """Adjoint product J^T dy: gradients of <dy, BT> with respect to the inputs.

    Parameters
    ----------
    bt_perturbation : xarray.DataArray or Dataset
        (profile, channel) [K] (a Dataset must hold ``brightness_temperature``).

    Returns
    -------
    xarray.Dataset
        ``air_temperature``, ``specific_humidity`` (profile, level), ``surface_temperature``
        (profile), ``surface_emissivity`` (as in ``dataset``), each in [K per unit of the
        ``dataset`` variable].
    """
    inst, prep, arrays, flag = _compute(instrument, dataset, True, errors, DEFAULT_BLOCK_SIZE)
    dy = _bt_array(bt_perturbation, inst.channel_ids, prep.valid.size)
    grads = adjoint_arrays(arrays, dy)
    return _label_gradients(grads, prep, dataset, inst.channel_ids)


def tangent_linear_arrays(arrays: dict, dx: dict) -> np.ndarray:
    """J dx from Jacobian arrays [N, C(, L)] and increments (canonical units) [K]."""
    dy = np.einsum("ncl,nl->nc", arrays["jacobian_air_temperature"], dx["air_temperature"])
    dy += np.einsum("ncl,nl->nc", arrays["jacobian_specific_humidity"], dx["specific_humidity"])
    dy += arrays["jacobian_surface_temperature"] * dx["surface_temperature"][:, None]
    dy += arrays["jacobian_surface_emissivity"] * dx["surface_emissivity"]
    return dy


def adjoint_arrays(arrays: dict, dy: np.ndarray) -> dict:
    """J^T dy from Jacobian arrays [N, C(, L)] and BT perturbations dy [N, C] [K]."""
    return {
        "air_temperature": np.einsum("ncl,nc->nl", arrays["jacobian_air_temperature"], dy),
        "specific_humidity": np.einsum("ncl,nc->nl", arrays["jacobian_specific_humidity"], dy),
        "surface_temperature": np.sum(arrays["jacobian_surface_temperature"] * dy, axis=1),
        "surface_emissivity": arrays["jacobian_surface_emissivity"] * dy,
    }


def _increments(prep, perturbation: xr.Dataset, dataset: xr.Dataset, channel_ids) -> dict:
    """Increments in canonical units (unit scale only; offsets cancel in a difference)."""
    n, nlev = prep.air_temperature.shape
    nchan = prep.surface_emissivity.shape[1]
    unknown = sorted(set(perturbation.data_vars) - set(_INCREMENT_VARIABLES))
    if unknown:
        raise ValueError(f"perturbation: unknown variable(s) {unknown}; allowed {list(_INCREMENT_VARIABLES)}")
    shapes = {"air_temperature": ("profile", "level"), "specific_humidity": ("profile", "level"),
              "surface_temperature": ("profile",)}
    dx = {}
    for name, dims in shapes.items():
        if name in perturbation:
            values = np.asarray(perturbation[name].transpose(*dims).values, dtype=float)
            dx[name] = values * prep.scales[name]
        else:
            dx[name] = np.zeros((n, nlev) if len(dims) == 2 else n)
    if "surface_emissivity" in perturbation:
        da = perturbation["surface_emissivity"]
        if "channel" in da.coords:  # labelled: operator's order
            da = da.sel(channel=list(channel_ids))
        if "channel" in da.dims:
            values = np.asarray(da.transpose("profile", "channel").values, dtype=float)
        else:
            values = np.repeat(np.asarray(da.values, dtype=float)[:, None], nchan, axis=1)
        dx["surface_emissivity"] = values
    else:
        dx["surface_emissivity"] = np.zeros((n, nchan))
    for name in ("air_temperature", "specific_humidity"):  # caller's level order, like J
        if dx[name].shape != (n, nlev):
            raise ValueError(f"perturbation: {name} has shape {dx[name].shape}, expected {(n, nlev)}")
    return dx


def _bt_array(bt_perturbation, channel_ids, n) -> np.ndarray:
    da = bt_perturbation["brightness_temperature"] if isinstance(bt_perturbation, xr.Dataset) else bt_perturbation
    if "channel" in da.coords:
        da = da.sel(channel=list(channel_ids))
    values = np.asarray(da.transpose("profile", "channel").values, dtype=float)
    if values.shape != (n, len(channel_ids)):
        raise ValueError(f"bt_perturbation: shape {values.shape}, expected {(n, len(channel_ids))}")
    return values


def _label_gradients(grads: dict, prep, dataset: xr.Dataset, channel_ids) -> xr.Dataset:
    data_vars = {}
    for name, dims in (("air_temperature", ("profile", "level")),
                       ("specific_humidity", ("profile", "level")),
                       ("surface_temperature", ("profile",))):
        data_vars[name] = (dims, grads[name] * prep.scales[name],
                           {"long_name": f"adjoint gradient with respect to {name}"})
    em = grads["surface_emissivity"]
    if prep.emissivity_per_channel:
        data_vars["surface_emissivity"] = (("profile", "channel"), em,
                                           {"long_name": "adjoint gradient with respect to surface_emissivity"})
    else:
        data_vars["surface_emissivity"] = (("profile",), em.sum(axis=1),
                                           {"long_name": "adjoint gradient with respect to surface_emissivity"})
    # The channel coordinate in the operator's order, as the emissivity gradient's columns.
    channels = channel_ids if prep.emissivity_per_channel else None
    return xr.Dataset(data_vars, coords=_carried_coordinates(dataset, channels))


def weighting_functions(
    instrument, pressure_hpa, air_temperature, specific_humidity, sensor_zenith_angle=0.0
):
    """Temperature weighting functions W_j = (t_j+1 - t_j) / (ln p_j - ln p_j+1) [1].

    The band-weighted change of level-to-space transmittance per unit ln p across each
    layer (eq. 4), for one profile.

    Parameters
    ----------
    pressure_hpa, air_temperature, specific_humidity : ndarray [L]
        Surface-first profile [hPa], [K], [kg kg-1].
    sensor_zenith_angle : float
        [degree]

    Returns
    -------
    layer_pressure : ndarray [L-1]
        Layer-mean pressure [hPa].
    weights : ndarray [C, L-1]
        Weighting function per channel [1].
    """
    inst = load_instrument(instrument)
    tables = _Bands(inst)
    p = np.asarray(pressure_hpa, dtype=float)[None, :]
    t = np.asarray(air_temperature, dtype=float)[None, :]
    q = np.asarray(specific_humidity, dtype=float)[None, :]
    inv_mu = np.full((1, 1), 1.0 / np.cos(np.deg2rad(sensor_zenith_angle)))
    tau = _optical_depths(tables, p, t, q, inv_mu, False)[1][0]  # [B, L-1]
    above = np.concatenate([np.cumsum(tau[:, ::-1], axis=1)[:, ::-1], np.zeros((tau.shape[0], 1))], axis=1)
    trans = np.exp(-above)
    dlnp = np.log(p[0, :-1]) - np.log(p[0, 1:])
    per_band = (trans[:, 1:] - trans[:, :-1]) / dlnp
    return 0.5 * (p[0, :-1] + p[0, 1:]), tables.band_to_channel @ per_band
