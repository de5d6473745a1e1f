"""The line-by-line teacher: monochromatic Schwarzschild transfer averaged over passbands.

Every frequency nu of a channel's passband grid is a gray absorber with, per layer j,

    d_j(nu) = [k_dry(nu; p_j, T_j) dd_j + k_h2o(nu; p_j, T_j) dw_j
               + k_cont(nu; T_j) (e_j / p_ref) dw_j] / mu,

the coefficients from :func:`rtemu.spectroscopy.lines.absorption` and the layer means and
mass paths of rtemu/physics.py eqs. 1-2. Its radiance follows rtemu/physics.py eqs. 4-5 with
the Planck function at nu itself; the channel radiance is the response-weighted mean over
all sidebands, and the brightness temperature the inverse Planck function at the channel's
position (eq. 6). Jacobians are the exact derivatives of this discrete model: the transfer
part as in rtemu.physics, the absorption part through the analytic temperature derivatives
of the line shapes, widths and intensities.
"""

from __future__ import annotations

import dataclasses
from typing import Literal

import numpy as np
import xarray as xr

from rtemu import flags as _flags
from rtemu._checks import prepare_inputs
from rtemu.levels import transfer_above_ground
from rtemu.constants import COSMIC_BACKGROUND_TEMPERATURE, EPSILON, STANDARD_GRAVITY
from rtemu.instrument import Channel, Instrument
from rtemu.physics import _layers_to_levels, label_outputs
from rtemu.planck import inverse_planck, planck, planck_coefficients, planck_derivative
from rtemu.spectroscopy.lines import PassbandFile, absorption, read_passbands


# -- layers (rtemu/physics.py eqs. 1-2) ---------------------------------------------------
@dataclasses.dataclass
class Layers:
    """Layer means and mass paths of surface-first level arrays [N, L] (physics eqs. 1-2).

    tm [K], pm [hPa], qm [kg kg-1], dry and vapour mass paths dd, dw [kg m-2], vapour
    pressure e [hPa], and the derivatives of the path factors in qm: d(dd)/dq, d(dw)/dq
    [kg m-2], d(e dw)/dq [hPa kg m-2]; all [N, L-1].
    """

    tm: np.ndarray
    pm: np.ndarray
    qm: np.ndarray
    dd: np.ndarray
    dw: np.ndarray
    e: np.ndarray
    ddd_dq: np.ndarray
    ddw_dq: np.ndarray
    dedw_dq: np.ndarray


def layer_means(p, t, q) -> Layers:
    """Layer means and mass paths, rtemu/physics.py eqs. 1-2 (see :class:`Layers`)."""
    tm = 0.5 * (t[:, :-1] + t[:, 1:])  # eq. 1
    qm = 0.5 * (q[:, :-1] + q[:, 1:])
    pm = 0.5 * (p[:, :-1] + p[:, 1:])
    dm = (p[:, :-1] - p[:, 1:]) * 100.0 / STANDARD_GRAVITY  # eq. 2
    denom = EPSILON + (1.0 - EPSILON) * qm
    e = qm * pm / denom
    de_dq = pm * EPSILON / denom**2
    return Layers(tm, pm, qm, (1.0 - qm) * dm, qm * dm, e, -dm, dm, dm * (de_dq * qm + e))


# -- monochromatic transfer -----------------------------------------------------------------
def gray_radiance(tau, planck_layer, planck_surface, planck_cosmic, emissivity, *, derivatives=False):
    """Radiance of gray absorbers at the top of the atmosphere, rtemu/physics.py eqs. 4-5.

    Parameters
    ----------
    tau : ndarray [..., J]
        Slant optical depth per layer, surface first [1].
    planck_layer : ndarray [..., J]
        Planck radiance of the layer temperatures [radiance units].
    planck_surface, planck_cosmic, emissivity : ndarray [...]
        Planck radiance of the skin and of the cosmic background [radiance units];
        surface emissivity [1].
    derivatives : bool
        Also return dR/dtau [..., J], dR/dB_layer [..., J], dR/dB_surface [...] and
        dR/demissivity [...].

    Returns
    -------
    radiance : ndarray [...]
        [radiance units]; with ``derivatives`` a dict of it and the four derivatives.
    """
    zeros = np.zeros(tau.shape[:-1] + (1,))
    above = np.concatenate([np.cumsum(tau[..., ::-1], axis=-1)[..., ::-1], zeros], axis=-1)
    below = np.concatenate([zeros, np.cumsum(tau, axis=-1)], axis=-1)
    t_up, s_dn = np.exp(-above), np.exp(-below)  # eq. 4
    total = t_up[..., 0]
    up_step = t_up[..., 1:] - t_up[..., :-1]
    dn_step = s_dn[..., :-1] - s_dn[..., 1:]
    up_contrib = planck_layer * up_step
    dn_contrib = planck_layer * dn_step
    upwelling = up_contrib.sum(axis=-1)
    downwelling = dn_contrib.sum(axis=-1)
    reflected = downwelling + planck_cosmic * total
    radiance = emissivity * planck_surface * total + upwelling + (1.0 - emissivity) * total * reflected  # eq. 5
    if not derivatives:
        return radiance
    # The derivative of eq. 5 in tau_k, as in rtemu.physics (DEVELOPERS.md, "Jacobians of
    # the physical model"), with w = (1 - e) t_0.
    w = ((1.0 - emissivity) * total)[..., None]
    up_cum = np.cumsum(up_contrib, axis=-1) - up_contrib
    dn_cum = np.cumsum(dn_contrib[..., ::-1], axis=-1)[..., ::-1] - dn_contrib
    dr_dtau = planck_layer * (t_up[..., :-1] + w * s_dn[..., 1:]) - up_cum - w * dn_cum
    dr_dtau -= (emissivity * planck_surface * total + w[..., 0] * (downwelling + 2.0 * planck_cosmic * total))[..., None]
    return {
        "radiance": radiance,
        "dr_dtau": dr_dtau,
        "dr_dplanck": up_step + w * dn_step,
        "dr_dsurface": emissivity * total,
        "dr_demissivity": planck_surface * total - total * reflected,
    }


@dataclasses.dataclass(frozen=True)
class _SpectralGrid:
    """All sideband grids of one channel: frequencies, weights and Planck constants."""

    nu: np.ndarray  # [F] in the channel's unit
    weight: np.ndarray  # [F], sums to 1
    a: np.ndarray  # [F] Planck constants at each frequency
    b: np.ndarray  # [F]
    channel_a: float
    channel_b: float


def _grid(passband) -> _SpectralGrid:
    parts = passband.sideband_grids()
    nu = np.concatenate([g[1] for g in parts])
    weight = np.concatenate([g[2] for g in parts])
    key = "frequency_ghz" if passband.unit == "GHz" else "wavenumber_cm1"
    a, b = planck_coefficients(**{key: nu})
    ca, cb = planck_coefficients(**{key: passband.centre})
    return _SpectralGrid(nu, weight, a, b, float(ca), float(cb))


def channel_absorption(line_lists, nu, unit, pressure_hpa, temperature, *, derivative=False):
    """Summed coefficients of the line lists in ``unit`` [3, J, F] [m2 kg-1] (and d/dT [m2 kg-1 K-1]).

    Only lists given in the channel's own unit contribute (see rtemu.spectroscopy.lines).
    The continuum reference pressure must agree between lists (checked by the caller).
    """
    total = None
    serving = [ll for ll in line_lists if ll.unit == unit]
    if not serving:
        raise ValueError(f"no line list in {unit} for a channel given in {unit}")
    for ll in serving:
        part = absorption(ll, nu, pressure_hpa, temperature, unit, derivative=derivative)
        if total is None:
            total = part
        elif derivative:
            total = (total[0] + part[0], total[1] + part[1])
        else:
            total = total + part
    return total


def optical_depth(k, layers: Layers, n: int, p_ref: float):
    """Nadir optical depth of profile ``n`` per layer and frequency [J, F] [1] from k [3, J, F]."""
    return (k[0] * layers.dd[n][:, None] + k[1] * layers.dw[n][:, None]
            + k[2] * (layers.e[n] * layers.dw[n] / p_ref)[:, None])


def continuum_reference_pressure(line_lists) -> float:
    """The line lists' common continuum reference pressure p_ref [hPa]."""
    refs = {ll.reference_pressure_hpa for ll in line_lists}
    if len(refs) != 1:
        raise ValueError(f"line lists disagree on '@reference_pressure_hpa': {sorted(refs)}")
    return refs.pop()


def _channel_block(grid: _SpectralGrid, passband_unit, line_lists, p_ref, p, t, q, ts, em, zen, jacobian):
    """One channel, a block of profiles: BT [N] and Jacobians (surface-first layers)."""
    layers = layer_means(p, t, q)
    n_prof = p.shape[0]
    out = {"brightness_temperature": np.empty(n_prof)}
    if jacobian:
        for name, shape in (("jacobian_air_temperature", p.shape), ("jacobian_specific_humidity", p.shape),
                            ("jacobian_surface_temperature", (n_prof,)), ("jacobian_surface_emissivity", (n_prof,))):
            out[name] = np.empty(shape)
    cosmic = planck(grid.a, grid.b, COSMIC_BACKGROUND_TEMPERATURE)
    for n in range(n_prof):
        mu = np.cos(np.deg2rad(zen[n]))
        res = channel_absorption(line_lists, grid.nu, passband_unit, layers.pm[n], layers.tm[n], derivative=jacobian)
        k, dk = res if jacobian else (res, None)
        tau = (optical_depth(k, layers, n, p_ref) / mu).T  # [F, J]
        b_layer = planck(grid.a[:, None], grid.b[:, None], layers.tm[n][None, :])
        b_sfc = planck(grid.a, grid.b, ts[n])
        rad = gray_radiance(tau, b_layer, b_sfc, cosmic, em[n], derivatives=jacobian)
        radiance = (rad["radiance"] if jacobian else rad) @ grid.weight
        bt = inverse_planck(grid.channel_a, grid.channel_b, radiance)
        out["brightness_temperature"][n] = bt
        if not jacobian:
            continue
        dbt_dr = 1.0 / planck_derivative(grid.channel_a, grid.channel_b, bt)
        dtau_dt = (optical_depth(dk, layers, n, p_ref) / mu).T
        db_dt = planck_derivative(grid.a[:, None], grid.b[:, None], layers.tm[n][None, :])
        dr_dtm = rad["dr_dplanck"] * db_dt + rad["dr_dtau"] * dtau_dt  # [F, J]
        dtau_dq = ((k[0] * layers.ddd_dq[n][:, None] + k[1] * layers.ddw_dq[n][:, None]
                    + k[2] * (layers.dedw_dq[n] / p_ref)[:, None]) / mu).T
        dr_dqm = rad["dr_dtau"] * dtau_dq
        out["jacobian_air_temperature"][n] = _layers_to_levels((grid.weight @ dr_dtm)[None, None, :])[0, 0] * dbt_dr
        out["jacobian_specific_humidity"][n] = _layers_to_levels((grid.weight @ dr_dqm)[None, None, :])[0, 0] * dbt_dr
        db_ds = planck_derivative(grid.a, grid.b, ts[n])
        out["jacobian_surface_temperature"][n] = grid.weight @ (rad["dr_dsurface"] * db_ds) * dbt_dr
        out["jacobian_surface_emissivity"][n] = grid.weight @ rad["dr_demissivity"] * dbt_dr
    return out


class LineByLineOperator:
    """Line-by-line observation operator (a teacher: ``channels``, ``instrument``, ``simulate``).

    Parameters
    ----------
    passbands : str, path or PassbandFile
        A passband file (:func:`rtemu.spectroscopy.lines.read_passbands`), which names the
        line lists.
    scheduler : {"synchronous", "threads", "processes"}
        How blocks of profiles are run: in this process one after another, or in parallel
        through ``dask`` (threads or processes).
    workers : int or None
        Parallel workers for dask (None: dask's default).
    block_size : int
        Profiles per dask task.

    Attributes
    ----------
    channels : tuple of str
        Channel ids.
    instrument : rtemu.Instrument
        The channels with position and noise, without gray sub-bands (the physics cannot
        run it; it names the channels for sampling, training and the audit).
    """

    def __init__(self, passbands, *, scheduler: Literal["synchronous", "threads", "processes"] = "synchronous",
                 workers: int | None = None, block_size: int = 8):
        self.passbands = passbands if isinstance(passbands, PassbandFile) else read_passbands(passbands)
        if scheduler not in ("synchronous", "threads", "processes"):
            raise ValueError(f"scheduler must be 'synchronous', 'threads' or 'processes', got {scheduler!r}")
        if block_size < 1:
            raise ValueError(f"block_size must be >= 1, got {block_size}")
        self.scheduler, self.workers, self.block_size = scheduler, workers, block_size
        self.p_ref = continuum_reference_pressure(self.passbands.line_lists)
        self._grids = tuple(_grid(pb) for pb in self.passbands.channels)

    @property
    def channels(self) -> tuple:
        return self.passbands.channel_ids

    @property
    def instrument(self) -> Instrument:
        chans = tuple(
            Channel(pb.id, pb.centre if pb.unit == "GHz" else None, pb.centre if pb.unit == "cm-1" else None,
                    pb.noise_k, ())
            for pb in self.passbands.channels
        )
        return Instrument(self.passbands.name, self.passbands.description, chans,
                          reference_pressure_hpa=self.p_ref)

    @property
    def frequency_count(self) -> dict:
        """Monochromatic frequencies per channel (all sidebands)."""
        return {pb.id: g.nu.size for pb, g in zip(self.passbands.channels, self._grids)}

    def transfer(self, p, t, q, ts, em, zen, *, jacobian=False) -> dict:
        """Array core: surface-first canonical arrays [N, L] ... (as rtemu.physics.transfer).

        Returns a dict of ``brightness_temperature`` [N, C] [K] and, with ``jacobian``, the
        four Jacobians [N, C(, L)] (units of rtemu.physics.transfer).
        """
        n = p.shape[0]
        blocks = [slice(s, min(n, s + self.block_size)) for s in range(0, n, self.block_size)]
        args = [(p[b], t[b], q[b], ts[b], em[b], zen[b]) for b in blocks]
        if self.scheduler == "synchronous":
            parts = [self._block(*a, jacobian) for a in args]
        else:
            import dask

            tasks = [dask.delayed(self._block)(*a, jacobian) for a in args]
            parts = dask.compute(*tasks, scheduler=self.scheduler, num_workers=self.workers)
        return {key: np.concatenate([part[key] for part in parts], axis=0) for key in parts[0]}

    def _block(self, p, t, q, ts, em, zen, jacobian):
        per_channel = []
        for c, (pb, grid) in enumerate(zip(self.passbands.channels, self._grids)):
            per_channel.append(_channel_block(grid, pb.unit, self.passbands.line_lists, self.p_ref,
                                              p, t, q, ts, em[:, c], zen, jacobian))
        return {key: np.stack([pc[key] for pc in per_channel], axis=1) for key in per_channel[0]}

    def simulate(self, dataset: xr.Dataset, jacobian: bool = False, *,
                 errors: Literal["raise", "mask"] = "raise") -> xr.Dataset:
        """Brightness temperatures (and Jacobians) of ``dataset``; schema of rtemu.physics.simulate.

        Inputs are checked by :func:`rtemu._checks.prepare_inputs` (same rules, errors and
        ``errors`` modes as the physics); with ``surface_air_pressure`` the transfer runs on
        the column above the ground (:func:`rtemu.levels.cut_at_surface`), as in the physics;
        outputs labelled by :func:`rtemu.physics.label_outputs`.
        """
        prep = prepare_inputs(dataset, self.channels, errors=errors)
        # Terrain: the column above surface_air_pressure, as in rtemu.physics.
        arrays = transfer_above_ground(self.transfer, prep.pressure_hpa, prep.air_temperature,
                                       prep.specific_humidity, prep.surface_air_pressure,
                                       prep.surface_temperature, prep.surface_emissivity,
                                       prep.sensor_zenith_angle, jacobian=jacobian)
        for name in ("jacobian_air_temperature", "jacobian_specific_humidity"):
            if name in arrays:
                arrays[name] = prep.to_caller_order(arrays[name])
        flag = np.where(prep.valid, 0, _flags.INVALID_INPUT) | np.where(prep.supersaturated, _flags.SUPERSATURATED, 0)
        flag = flag[:, None] * np.ones(len(self.channels), np.int32)
        for values in arrays.values():
            values[~prep.valid] = np.nan
        out = label_outputs(arrays, dataset, self.channels, flag)
        if prep.problems:
            out.attrs["invalid_input_summary"] = "; ".join(prep.problems)
        return out

    def weighting_functions(self, pressure_hpa, air_temperature, specific_humidity, sensor_zenith_angle=0.0):
        """Temperature weighting functions of one profile, as rtemu.physics.weighting_functions.

        W_j = (t_j+1 - t_j) / (ln p_j - ln p_j+1), t the response-weighted level-to-space
        transmittance.

        Returns
        -------
        layer_pressure : ndarray [L-1] [hPa]
        weights : ndarray [C, L-1] [1]
        """
        p = np.asarray(pressure_hpa, dtype=float)[None, :]
        t = np.asarray(air_temperature, dtype=float)[None, :]
        q = np.asarray(specific_humidity, dtype=float)[None, :]
        layers = layer_means(p, t, q)
        mu = np.cos(np.deg2rad(sensor_zenith_angle))
        dlnp = np.log(p[0, :-1]) - np.log(p[0, 1:])
        out = []
        for pb, grid in zip(self.passbands.channels, self._grids):
            k = channel_absorption(self.passbands.line_lists, grid.nu, pb.unit, layers.pm[0], layers.tm[0])
            tau = optical_depth(k, layers, 0, self.p_ref).T / mu  # [F, J]
            above = np.concatenate([np.cumsum(tau[:, ::-1], axis=1)[:, ::-1], np.zeros((tau.shape[0], 1))], axis=1)
            trans = grid.weight @ np.exp(-above)
            out.append((trans[1:] - trans[:-1]) / dlnp)
        return layers.pm[0], np.array(out)
