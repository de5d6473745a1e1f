"""A teacher that is not rtemu's physics: a smooth analytic model, for the teacher tests.

INVENTED, for tests only; it models no instrument. Per channel c, with weights over the
levels that peak at pressure p_c (Gaussian in ln p, normalised) for temperature (w) and
humidity (v), mu = cos(zenith) and surface visibility a = a_c mu:

    Tm = sum_l w_l T_l,  Qm = sum_l v_l q_l
    BT = Tm + a e (Ts - Tm) - g_c ln(1 + Qm / q0)

so the Jacobians are analytic: dBT/dT_l = (1 - a e) w_l, dBT/dq_l = -g_c v_l / (q0 + Qm),
dBT/dTs = a e, dBT/de = a (Ts - Tm). Inputs in canonical units (hPa, K, kg kg-1, degree),
as rtemu's sampling writes them.

The channels need an rtemu instrument; until training accepts band-less channels it is a
small invented one with gray bands (``TOY_INSTRUMENT``), which this model ignores.
"""

from __future__ import annotations

import numpy as np
import xarray as xr

import rtemu

TOY_INSTRUMENT = """\
name = "toy-analytic"
description = "INVENTED three-channel instrument for the analytic test teacher; not any real sensor."

[reference]
pressure_hpa = 1013.25
temperature_k = 273.15

[absorbers.dry]
pressure_exponent = 1.0
temperature_exponent = 0.8

[absorbers.h2o]
pressure_exponent = 1.0
temperature_exponent = 1.5

[absorbers.continuum]
temperature_exponent = 3.0

[[channels]]
id = "toy-t"
frequency_ghz = 53.1
noise_k = 0.3
bands = [{ weight = 1, dry = 0.0004, h2o = 0, continuum = 0 }]

[[channels]]
id = "toy-q"
frequency_ghz = 176.0
noise_k = 0.8
bands = [{ weight = 1, dry = 1e-6, h2o = 0.05, continuum = 0.2 }]

[[channels]]
id = "toy-w"
wavenumber_cm1 = 905.0
noise_k = 0.2
bands = [{ weight = 1, dry = 1e-7, h2o = 0.001, continuum = 0.05 }]
"""

# Per channel: temperature peak [hPa], humidity peak [hPa], surface visibility a_c [1],
# humidity strength g_c [K]; q0 [kg kg-1].
_PEAK_T = np.array([450.0, 550.0, 900.0])
_PEAK_Q = np.array([500.0, 400.0, 850.0])
_SURFACE = np.array([0.05, 0.15, 0.8])
_STRENGTH = np.array([0.5, 12.0, 4.0])
_Q0 = 2e-3
_WIDTH_LN_P = 0.5


def _weights(p, peaks):
    """[N, C, L] normalised Gaussian weights in ln p around ``peaks`` [hPa]."""
    ln = np.log(p)[:, None, :] - np.log(peaks)[None, :, None]
    w = np.exp(-0.5 * (ln / _WIDTH_LN_P) ** 2)
    return w / w.sum(axis=2, keepdims=True)


class AnalyticTeacher:
    name = "analytic-toy"
    version = "1.2"

    def __init__(self):
        self.instrument = rtemu.Instrument.from_toml(TOY_INSTRUMENT, source="analytic_teacher")
        self.channels = self.instrument.channel_ids

    def simulate(self, dataset: xr.Dataset, jacobian: bool = False) -> xr.Dataset:
        t = dataset["air_temperature"].transpose("profile", "level").values
        q = dataset["specific_humidity"].transpose("profile", "level").values
        p = np.broadcast_to(dataset["air_pressure"].values, t.shape)
        ts = dataset["surface_temperature"].values[:, None]
        e = dataset["surface_emissivity"]
        e = e.transpose("profile", "channel").values if e.ndim == 2 else e.values[:, None]
        a = _SURFACE[None, :] * np.cos(np.radians(dataset["sensor_zenith_angle"].values))[:, None]
        w, v = _weights(p, _PEAK_T), _weights(p, _PEAK_Q)
        tm = np.einsum("ncl,nl->nc", w, t)
        qm = np.einsum("ncl,nl->nc", v, q)
        bt = tm + a * e * (ts - tm) - _STRENGTH * np.log1p(qm / _Q0)
        pc, pcl = ("profile", "channel"), ("profile", "channel", "level")
        out = {"brightness_temperature": (pc, bt)}
        if jacobian:
            out["jacobian_air_temperature"] = (pcl, (1.0 - a * e)[..., None] * w)
            out["jacobian_specific_humidity"] = (pcl, (-_STRENGTH / (_Q0 + qm))[..., None] * v)
            out["jacobian_surface_temperature"] = (pc, a * e * np.ones_like(bt))
            out["jacobian_surface_emissivity"] = (pc, a * (ts - tm))
        return xr.Dataset(out, coords={"channel": list(self.channels)})


def make_teacher():
    """A zero-argument callable returning the teacher (the CLI accepts either)."""
    return AnalyticTeacher()


teacher = AnalyticTeacher()
