"""Input features of the emulators: physically motivated transforms and the shared compression.

Every channel's emulator sees the same shared features of a profile plus its own surface
emissivity:

* raw features x = [T (L levels) [K], h(q) (L levels), (q (L levels)), (ln(W + W_0)
  (L levels)), (f (K kernels) [K], t_s (K kernels) [1]), Ts [K], s(theta)],
  with h(q) = ln(max(q, q_floor)) or q, and optionally q itself besides ln q
  (``"log+linear"``): the radiance responds to ln q where the water vapour is opaque
  (humidity channels) and to q where it is optically thin (the optical depth, hence
  1 - transmittance, is proportional to the water path); measured on the demo sounder,
  adding q to ln q cut the linear-model residual of the microwave window channel from
  10.1 K to 1.5 K RMS. Optionally (``water_path``) the log of the water-vapour path
  above each level, W_i = sum_{j >= i} qbar_j dm_j [kg m-2] (layers j between levels j
  and j + 1, qbar_j the layer-mean q, dm_j = |p_j - p_j+1| 100 / g the layer's air mass
  [kg m-2]; W = q M is linear in q, see :func:`water_path_matrix`), plus a floor W_0:
  the transmittance from level i to space of a water-vapour band is exp(-k W_i sec(theta))
  to first order, so ln W_i decides where a humidity channel's weighting function sits
  (it peaks near k W_i sec(theta) = 1). s(theta) = sec(theta) (the slant path through a plane-parallel
  layer is sec(theta) times the vertical one) or theta in degrees;
* optionally (``line_kernels``, ``continuum_kernels``) a bank of gray opacity kernels,
  two scalars per kernel (see :func:`opacity_kernel_features`): the temperature seen
  through a gray absorber of mass absorption coefficient kappa acting on a water-vapour
  path, f = sum_j Tbar_j (t_j+1 - t_j) + Ts t_s, and its whole-column transmittance t_s,
  with t_i = exp(-kappa sec(theta) P_i). P is either the pressure-broadened line path
  above level i, P_i = sum_{j >= i} qbar_j (pbar_j / p_0) dm_j (a collision-broadened
  line's absorption per molecule scales with pressure), or the self-continuum path
  sum_{j >= i} qbar_j (e_j / p_0) dm_j (self-continuum absorption scales with vapour
  pressure times vapour density), p_0 = 1013.25 hPa, e = q p / epsilon. These are not
  the instrument's channels: the coefficients form a fixed logarithmic bank, shared by
  all channels, and the networks combine them. They hand the networks the saturating
  exp(-kappa P) and the transmittance-weighted temperature, which a tanh network on
  ln q and ln W finds hard to build (measured on the demo sounder: the linear residual
  of the 181.4 GHz humidity channel fell from 7.3 K to 1.6 K RMS);
* compressed features z: x standardised per element, each profile block (T, h(q), q)
  projected on its leading principal components, each block's coordinates divided by
  the spread of its first component (not whitened: a component keeps its natural,
  decreasing variance, so the ridge penalty and the network's weight decay damp the
  directions the training set barely spans - whitening them gave per-level Jacobians
  with large spurious wiggles), and the standardised kernel scalars, Ts and s. z has zero mean;
  ``sum_k z_k^2 / var(z_k)`` is the squared Mahalanobis distance with the diagonal
  covariance (components of one block are uncorrelated; cross-block correlation is
  ignored).

The whole map x -> z is affine, z = x A + a0, and is folded into one matrix in the bundle;
so is the reconstruction residual of each block off its PCA subspace, used by the
novelty flag.

References
----------
Jolliffe, I. T. (2002). Principal Component Analysis, 2nd ed., Springer. (PCA, sec. 3.)
"""

from __future__ import annotations

import dataclasses
import json

import numpy as np
from sklearn.decomposition import PCA
from sklearn.preprocessing import StandardScaler

from rtemu.constants import EPSILON, STANDARD_GRAVITY

__all__ = ["FeatureConfig", "FeatureTransform", "raw_features", "humidity_transform", "zenith_transform",
           "water_path_matrix", "water_path_transform", "kernel_path_matrices", "kernel_temperature_matrix",
           "opacity_kernel_features", "kernel_columns", "kernel_path_scales", "kernel_coefficient_matrix",
           "surface_level", "kernel_dry_depth", "kernel_combination_matrix", "channel_kernels_of",
           "kernel_path_inputs", "kernel_temperature_exponents", "temperature_laws_of", "kernel_path_names",
           "kernel_path_powers"]

#: p_0 of the kernel paths [hPa].
KERNEL_REFERENCE_PRESSURE_HPA = 1013.25

HUMIDITY_TRANSFORMS = ("log+linear", "log", "linear")
#: Per-level humidity blocks that ``humidity_top_hpa`` masks.
HUMIDITY_TOP_BLOCKS = ("humidity", "humidity_linear", "water_path")
ZENITH_TRANSFORMS = ("secant", "degrees")


@dataclasses.dataclass(frozen=True)
class FeatureConfig:
    """Choices of the shared input transform (fixed by the first training of a bundle).

    Attributes
    ----------
    humidity : {"log+linear", "log", "linear"}
        * ``"log+linear"``: both ln(max(q, humidity_floor)) and q, as two blocks.
        * ``"log"``: h(q) = ln(max(q, humidity_floor)).
        * ``"linear"``: h(q) = q.
    humidity_floor : float
        Smallest specific humidity the log transform sees [kg kg-1].
    zenith : {"secant", "degrees"}
        * ``"secant"``: s = 1 / cos(theta).
        * ``"degrees"``: s = theta [degree].
    temperature_components, humidity_components, linear_humidity_components : int
        Principal components kept per profile block (T, h(q), and q for "log+linear")
        [1]; 0 keeps the block uncompressed (then it has no reconstruction residual).
    water_path : bool
        Add the block ln(W + W_0) of the water-vapour path above each level.
    water_path_components : int
        Principal components kept of that block [1] (0: uncompressed).
    water_path_floor : float
        W_0 [kg m-2]: keeps the logarithm finite at the top level (W = 0 there) and smooth
        where the path is negligible for any channel.
    line_kernels, continuum_kernels : tuple of float
        Mass absorption coefficients kappa [m2 kg-1] of the gray opacity kernels on the
        pressure-broadened line path and on the self-continuum path (empty: no kernel).
    humidity_top_hpa : float
        Levels above this pressure (p below it) [hPa] carry no weight in the per-level
        humidity blocks ln q, q and ln W (0: every level counts). Standardised per level,
        the humidity of the dry stratosphere varies as much as that of the troposphere and
        filled those blocks' principal components, which the networks then used: spurious
        humidity sensitivity where the radiances have none. The opacity kernels still see
        those levels, weighted by the water they hold. Measured on the demo sounder with
        100 hPa: the demo recipe's median d ln q Jacobian error of mw-h2 fell from 14 % to
        9 %, but the full recipe's got worse (6.9 % to 8.2 %; DEVELOPERS.md), so the
        shipped recipes leave it at 0.
    reflection_kernels : bool
        Add, per kernel, the reflected-sky term r_k = t_k,s (D_k - Ts) [K]: D_k the
        downwelling sky temperature at the surface seen through the same gray absorber
        (see :func:`opacity_kernel_features`). With it a gray channel is linear in the
        features, BT = f_k + (1 - e) r_k, and the linear part (affine in the emissivity e)
        can carry the surface-reflection physics exactly.
    channel_kernels : tuple of tuple of (weight, dry, line, continuum)
        Kernels made from an instrument's channels (recipe ``instrument_kernels = "bands"``
        or ``"channels"`` fills them from the training data's instrument): one per channel, the
        weight-averaged [f, t_s, (r)] of its sub-bands, each sub-band a gray absorber of
        depth sec(theta) (k_dry P_d + k_line P_l + k_cont P_c) [m2 kg-1 coefficients; P_d
        the dry-air path sum (p/p_0) dm, constant]. For a channel whose sub-bands have
        pressure exponent 1 and no temperature dependence, with the Planck function linear
        in T, its own kernel is its brightness temperature; the networks learn what is
        left (Planck curvature, temperature-dependent absorption).
    kernel_temperature_laws : tuple of float
        (T_ref [K], n_dry, n_line, n_continuum [1]) or empty. With it the channel kernels'
        absorption follows the instrument's temperature laws, k (T_ref / T)^n per absorber
        (recipe ``kernel_temperature_laws = true`` takes them from the training data's
        instrument): each path becomes a sum over layers of (q^a (T_ref / T)^n p / p_0)
        layer means times dm (see :func:`kernel_path_inputs`), so the kernels and their
        Jacobians carry the d(opacity)/dT part of the air-temperature sensitivity, which
        is most of it in a continuum-dominated window (measured on the demo sounder: 62 %
        of the norm of mw-win's temperature Jacobian, median over test profiles). Empty:
        temperature-independent kernels (bundle formats 3-4).
    """

    humidity: str = "log+linear"
    humidity_floor: float = 1e-9
    zenith: str = "secant"
    temperature_components: int = 24
    humidity_components: int = 24
    linear_humidity_components: int = 8
    water_path: bool = False
    water_path_components: int = 12
    water_path_floor: float = 1e-3
    line_kernels: tuple = ()
    continuum_kernels: tuple = ()
    humidity_top_hpa: float = 0.0
    reflection_kernels: bool = False
    channel_kernels: tuple = ()
    kernel_temperature_laws: tuple = ()

    def __post_init__(self):
        top = self.humidity_top_hpa
        if isinstance(top, bool) or not isinstance(top, (int, float)) or not 0 <= top < np.inf:
            raise ValueError(f"humidity_top_hpa must be a number >= 0 [hPa], got {top!r}")
        for name in ("line_kernels", "continuum_kernels"):
            value = getattr(self, name)
            if not isinstance(value, (list, tuple)) or any(
                    isinstance(k, bool) or not isinstance(k, (int, float)) or not (0 < k < np.inf) for k in value):
                raise ValueError(f"{name} must be a list of positive numbers [m2 kg-1], got {value!r}")
            object.__setattr__(self, name, tuple(float(k) for k in value))
        if self.humidity not in HUMIDITY_TRANSFORMS:
            raise ValueError(f"humidity transform must be one of {HUMIDITY_TRANSFORMS}, got {self.humidity!r}")
        if self.zenith not in ZENITH_TRANSFORMS:
            raise ValueError(f"zenith transform must be one of {ZENITH_TRANSFORMS}, got {self.zenith!r}")
        if not (self.humidity_floor > 0 and np.isfinite(self.humidity_floor)):
            raise ValueError(f"humidity_floor must be a positive number [kg kg-1], got {self.humidity_floor!r}")
        object.__setattr__(self, "channel_kernels", _checked_channel_kernels(self.channel_kernels))
        laws = self.kernel_temperature_laws
        rule = ("kernel_temperature_laws must be empty or [T_ref, n_dry, n_line, n_continuum] "
                "(T_ref > 0 [K], finite exponents) with channel kernels")
        if not isinstance(laws, (list, tuple)) or (laws and (
                len(laws) != 4 or any(isinstance(v, bool) or not isinstance(v, (int, float)) or not np.isfinite(v)
                                      for v in laws) or not laws[0] > 0 or not self.channel_kernels)):
            raise ValueError(f"{rule}, got {laws!r}")
        object.__setattr__(self, "kernel_temperature_laws", tuple(float(v) for v in laws))
        if not isinstance(self.reflection_kernels, bool):
            raise ValueError(f"reflection_kernels must be true or false, got {self.reflection_kernels!r}")
        if not isinstance(self.water_path, bool):
            raise ValueError(f"water_path must be true or false, got {self.water_path!r}")
        if not (self.water_path_floor > 0 and np.isfinite(self.water_path_floor)):
            raise ValueError(f"water_path_floor must be a positive number [kg m-2], got {self.water_path_floor!r}")
        for name in ("temperature_components", "humidity_components", "linear_humidity_components",
                     "water_path_components"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or value < 0:
                raise ValueError(f"{name} must be an integer >= 0, got {value!r}")

    def to_json(self) -> str:
        return json.dumps(dataclasses.asdict(self), sort_keys=True)

    @classmethod
    def from_json(cls, text: str) -> "FeatureConfig":
        return cls(**json.loads(text))

    def blocks(self) -> tuple[tuple[str, int], ...]:
        """Profile blocks of x, in order, with their component counts."""
        out = [("temperature", self.temperature_components), ("humidity", self.humidity_components)]
        if self.humidity == "log+linear":
            out.append(("humidity_linear", self.linear_humidity_components))
        if self.water_path:
            out.append(("water_path", self.water_path_components))
        return tuple(out)

    @property
    def n_kernels(self) -> int:
        """K_l + K_c + K_ch: kernel feature groups [f, t_s, (r)] (bank and channel kernels) [1]."""
        return len(self.line_kernels) + len(self.continuum_kernels) + len(self.channel_kernels)

    @property
    def n_band_kernels(self) -> int:
        """Sub-bands of the channel kernels, each a gray absorber computed [1]."""
        return sum(len(c) for c in self.channel_kernels)

    @property
    def n_kernel_terms(self) -> int:
        """Gray absorbers computed: bank kernels plus every sub-band of the channel kernels [1]."""
        return len(self.line_kernels) + len(self.continuum_kernels) + self.n_band_kernels

    @property
    def kernel_paths(self) -> tuple[str, ...]:
        """Names of the kernel paths this configuration computes (:func:`kernel_path_names`)."""
        return kernel_path_names(bool(self.line_kernels or self.continuum_kernels), bool(self.kernel_temperature_laws))

    @property
    def n_kernel_paths(self) -> int:
        """Kernel paths P (see :func:`kernel_path_names`) [1]."""
        return len(self.kernel_paths)

    @property
    def n_kernel_scalars(self) -> int:
        """Kernel scalars per kernel: 2 ([f, t_s]) or 3 with ``reflection_kernels`` [1]."""
        return 3 if self.reflection_kernels else 2

    @property
    def n_kernel_features(self) -> int:
        """Kernel scalars in x: 2 K ([f, t_s]) or 3 K with ``reflection_kernels`` [1]."""
        return self.n_kernel_scalars * self.n_kernels

    def n_features(self, n_levels: int) -> int:
        """F = (number of profile blocks) L + (kernel scalars) + 2 [1]."""
        return len(self.blocks()) * n_levels + self.n_kernel_features + 2


def humidity_transform(specific_humidity, config: FeatureConfig) -> np.ndarray:
    """h(q): ln(max(q, q_floor)) or q.

    Parameters
    ----------
    specific_humidity : array_like
        q [kg kg-1].
    config : FeatureConfig

    Returns
    -------
    numpy.ndarray
        h(q) [ln(kg kg-1)] or [kg kg-1].
    """
    q = np.asarray(specific_humidity, dtype=float)
    if config.humidity.startswith("log"):
        return np.log(np.maximum(q, config.humidity_floor))
    return q


def zenith_transform(sensor_zenith_angle, config: FeatureConfig) -> np.ndarray:
    """s(theta): sec(theta) (slant-path factor of a plane-parallel atmosphere) or theta.

    Parameters
    ----------
    sensor_zenith_angle : array_like
        theta [degree].
    config : FeatureConfig

    Returns
    -------
    numpy.ndarray
        sec(theta) [1] or theta [degree].
    """
    theta = np.asarray(sensor_zenith_angle, dtype=float)
    if config.zenith == "secant":
        return 1.0 / np.cos(np.radians(theta))
    return theta


def water_path_matrix(pressure_hpa) -> np.ndarray:
    """M [L, L] with W = q M: water-vapour path above each level [kg m-2] per [kg kg-1].

    W_i = sum over the layers j above level i of qbar_j dm_j, with qbar_j the arithmetic
    mean of q at the layer's two levels and dm_j = |p_a - p_b| 100 / g [kg m-2] its air
    mass per unit area (hydrostatic balance, dp = -rho g dz). W is zero at the top level.
    Works for either level order (the top is the level of lowest pressure).

    Parameters
    ----------
    pressure_hpa : array_like
        Level pressures p [hPa], shape (L,), strictly monotonic.

    Returns
    -------
    numpy.ndarray
        M [kg m-2 (kg kg-1)-1], shape (L, L); M[k, i] = dW_i / dq_k.
    """
    p = np.asarray(pressure_hpa, dtype=float)
    order = _surface_first_order(p)
    ps = p[order]
    L = ps.size
    dm = (ps[:-1] - ps[1:]) * 100.0 / STANDARD_GRAVITY
    layer = np.zeros((L, L - 1))  # d qbar_j / d q_k dm_j
    layer[np.arange(L - 1), np.arange(L - 1)] = 0.5 * dm
    layer[np.arange(1, L), np.arange(L - 1)] += 0.5 * dm
    above = (np.arange(L - 1)[:, None] >= np.arange(L)[None, :]).astype(float)
    return _in_level_order(layer @ above, order)


def water_path_transform(specific_humidity, matrix, config: FeatureConfig) -> np.ndarray:
    """ln(W + W_0) with W = q M (see :func:`water_path_matrix`).

    Parameters
    ----------
    specific_humidity : array_like
        q [kg kg-1], shape (N, L).
    matrix : array_like
        M [kg m-2 (kg kg-1)-1], shape (L, L).
    config : FeatureConfig

    Returns
    -------
    numpy.ndarray
        ln(W + W_0) [ln(kg m-2)], shape (N, L).
    """
    return np.log(np.asarray(specific_humidity, dtype=float) @ matrix + config.water_path_floor)


def _surface_first_order(pressure_hpa) -> np.ndarray:
    p = np.asarray(pressure_hpa, dtype=float)
    if p.ndim != 1 or p.size < 2 or not (np.all(np.diff(p) < 0) or np.all(np.diff(p) > 0)):
        raise ValueError("pressure_hpa must be a strictly monotonic level grid of at least 2 levels")
    return np.argsort(-p)


def _in_level_order(surface_first: np.ndarray, order: np.ndarray) -> np.ndarray:
    """A level-by-level matrix built surface first, rows and columns put in the grid's order."""
    out = np.empty_like(surface_first)
    out[np.ix_(order, order)] = surface_first
    return out


#: The kernel paths: name -> (humidity power a, which temperature law (None: none), level
#: factor "line" p / p_0 or "continuum" p / (epsilon p_0)). P_p = sum over the layers above
#: a level of the layer mean of q^a (T_ref / T)^n c(p), times the air mass dm.
KERNEL_PATHS = {
    "line": (1, None, "line"),
    "continuum": (2, None, "continuum"),
    "dry_law": (0, 1, "line"),
    "line_law": (1, 2, "line"),
    "continuum_law": (2, 3, "continuum"),
}


def kernel_path_names(has_bank: bool, temperature_laws: bool) -> tuple[str, ...]:
    """The paths a kernel layout computes: [line, continuum] for the fixed bank and for
    channel kernels without temperature laws; [dry_law, line_law, continuum_law] for channel
    kernels with them (the bank's two paths then only when there is a bank)."""
    names = ("line", "continuum") if has_bank or not temperature_laws else ()
    return names + (("dry_law", "line_law", "continuum_law") if temperature_laws else ())


def kernel_path_scales(pressure_hpa, names=("line", "continuum")) -> np.ndarray:
    """Level factors of the kernel paths [P, L] [1]: p / p_0 for the line and dry paths,
    p / (epsilon p_0) for the continuum paths (e = q p / epsilon).

    Parameters
    ----------
    pressure_hpa : array_like
        Level pressures p [hPa], shape (L,).
    names : sequence of str
        Path names (:data:`KERNEL_PATHS`, :func:`kernel_path_names`).

    Returns
    -------
    numpy.ndarray
        Shape (P, L).
    """
    ratio = np.asarray(pressure_hpa, dtype=float) / KERNEL_REFERENCE_PRESSURE_HPA
    return np.stack([ratio if KERNEL_PATHS[n][2] == "line" else ratio / EPSILON for n in names])


def kernel_path_powers(names) -> np.ndarray:
    """Humidity power a of each path [P] (q^a: 0 dry, 1 line, 2 continuum) [1]."""
    return np.array([KERNEL_PATHS[n][0] for n in names], dtype=float)


def kernel_temperature_exponents(config: "FeatureConfig") -> np.ndarray:
    """n of each kernel path [P] [1]: 0 for the paths without a law, the instrument's laws for the rest."""
    laws = config.kernel_temperature_laws
    return np.array([0.0 if KERNEL_PATHS[n][1] is None else laws[KERNEL_PATHS[n][1]] for n in config.kernel_paths])


def kernel_path_inputs(air_temperature, specific_humidity, config: "FeatureConfig", pressure_hpa) -> np.ndarray:
    """v [N, P, L]: the level values of the kernel paths, P_p = v_p M (M of :func:`water_path_matrix`).

    v_p = q^a_p (T_ref / T)^n_p c_p(p), with a_p from :func:`kernel_path_powers`, n_p from
    :func:`kernel_temperature_exponents` and c_p from :func:`kernel_path_scales`, for the
    paths of :func:`kernel_path_names`: without temperature laws [q p/p_0, q^2 p/(epsilon
    p_0)]; with them the dry-air path (T_ref/T)^n_dry p/p_0 and the line and continuum paths
    in (T_ref/T)^n (after the first two only when the recipe also has a fixed bank).

    Parameters
    ----------
    air_temperature : array_like
        T [K], shape (N, L).
    specific_humidity : array_like
        q [kg kg-1], shape (N, L).
    config : FeatureConfig
    pressure_hpa : array_like
        p [hPa], shape (L,).

    Returns
    -------
    numpy.ndarray
        v [kg kg-1, (kg kg-1)^2 or 1], shape (N, P, L).
    """
    q = np.asarray(specific_humidity, dtype=float)
    names = config.kernel_paths
    powers = np.stack([q ** a for a in kernel_path_powers(names).astype(int)], axis=1)  # [N, P, L]
    v = powers * kernel_path_scales(pressure_hpa, names)[None]
    if config.kernel_temperature_laws:
        t_ref = config.kernel_temperature_laws[0]
        n = kernel_temperature_exponents(config)
        v = v * np.exp(n[None, :, None] * (np.log(t_ref) - np.log(np.asarray(air_temperature, dtype=float)))[:, None, :])
    return v


def _checked_channel_kernels(value) -> tuple:
    rule = ("channel_kernels must be a list of channels, each a non-empty list of "
            "[weight, dry, line, continuum] sub-bands (weight > 0, coefficients >= 0 [m2 kg-1])")
    if not isinstance(value, (list, tuple)):
        raise ValueError(f"{rule}, got {value!r}")
    out = []
    for channel in value:
        if not isinstance(channel, (list, tuple)) or not channel:
            raise ValueError(f"{rule}, got {channel!r}")
        bands = []
        for band in channel:
            if (not isinstance(band, (list, tuple)) or len(band) != 4
                    or any(isinstance(v, bool) or not isinstance(v, (int, float)) or not 0 <= v < np.inf
                           for v in band) or not band[0] > 0):
                raise ValueError(f"{rule}, got {band!r}")
            bands.append(tuple(float(v) for v in band))
        out.append(tuple(bands))
    return tuple(out)


def channel_kernels_of(instrument, one_per_channel: bool = False) -> tuple:
    """Channel kernels [(weight, dry, line, continuum) per sub-band] of an instrument's channels.

    Parameters
    ----------
    instrument : rtemu.instrument.Instrument
    one_per_channel : bool
        Collapse each channel's sub-bands into one term whose coefficients are the
        weight-averaged geometric means of the sub-bands' (a coefficient zero in any
        sub-band stays zero): a third of the kernel work for the demo sounder's
        three-band channels, at the price of the sub-band spread.

    Returns
    -------
    tuple
        One tuple of sub-bands per channel, in channel order (weights [1], coefficients
        [m2 kg-1]), the coefficients rescaled from the instrument's reference pressure to
        the kernels' p_0, which is exact for the pressure exponent 1 of the kernel paths
        (other exponents and the temperature dependence are left to the networks).
    """
    scale = KERNEL_REFERENCE_PRESSURE_HPA / float(instrument.reference_pressure_hpa)
    out = tuple(tuple((b.weight, b.dry * scale, b.h2o * scale, b.continuum * scale) for b in ch.bands)
                for ch in instrument.channels)
    if not one_per_channel:
        return out
    collapsed = []
    for bands in out:
        if len(bands) == 1:
            collapsed.append(((1.0, *bands[0][1:]),))
            continue
        b = np.array(bands)
        w = b[:, 0] / b[:, 0].sum()
        with np.errstate(divide="ignore"):
            mean = np.where((b[:, 1:] > 0).all(axis=0), np.exp(w @ np.log(b[:, 1:])), 0.0)
        collapsed.append(((1.0, *(float(v) for v in mean)),))
    return tuple(collapsed)


def temperature_laws_of(instrument) -> tuple:
    """(T_ref [K], n_dry, n_line, n_continuum [1]): the instrument's absorber temperature laws
    k (T_ref / T)^n, for :attr:`FeatureConfig.kernel_temperature_laws`."""
    return (float(instrument.reference_temperature_k), float(instrument.dry.temperature_exponent),
            float(instrument.h2o.temperature_exponent), float(instrument.continuum.temperature_exponent))


def _band_terms(config: FeatureConfig) -> list:
    return [band for channel in config.channel_kernels for band in channel]


def kernel_coefficient_matrix(config: FeatureConfig) -> np.ndarray:
    """kappa [K_t, P]: each kernel term's coefficients on the kernel paths (see
    :func:`kernel_path_names`, :func:`kernel_path_inputs`).

    Kernel terms in order: line kernels, continuum kernels (one path each), then the
    sub-bands of the channel kernels: on the line and continuum paths plus a constant
    dry-air depth (:func:`kernel_dry_depth`), or, with the temperature laws, on the dry,
    line and continuum paths in (T_ref / T)^n. The optical depth of term k
    is (kappa @ P)_k (+ the dry depth).

    Parameters
    ----------
    config : FeatureConfig

    Returns
    -------
    numpy.ndarray
        [m2 kg-1], shape (K_t, P).
    """
    names = config.kernel_paths
    kappa = np.zeros((config.n_kernel_terms, len(names)))
    n_line, n_cont = len(config.line_kernels), len(config.continuum_kernels)
    if n_line:
        kappa[:n_line, names.index("line")] = config.line_kernels
    if n_cont:
        kappa[n_line:n_line + n_cont, names.index("continuum")] = config.continuum_kernels
    bands = _band_terms(config)
    if bands:
        cols = (["dry_law", "line_law", "continuum_law"] if config.kernel_temperature_laws
                else [None, "line", "continuum"])
        for j, name in enumerate(cols):  # band coefficients (dry, line, continuum)
            if name is not None:
                kappa[n_line + n_cont:, names.index(name)] = np.array(bands)[:, 1 + j]
    return kappa


def kernel_dry_depth(config: FeatureConfig, pressure_hpa) -> np.ndarray:
    """Nadir dry-air optical depth above each level of each kernel term, k_dry P_d [K_t, L] [1].

    P_d,i = sum over the layers above level i of the layer mean of (p / p_0) times the air
    mass dp / g [kg m-2] (the line path of q = 1); zero rows for the bank kernels, and
    zero everywhere with the temperature laws (the dry path is then one of the kernel paths).

    Parameters
    ----------
    config : FeatureConfig
    pressure_hpa : array_like
        p [hPa], shape (L,).

    Returns
    -------
    numpy.ndarray
        Shape (K_t, L).
    """
    p = np.asarray(pressure_hpa, dtype=float)
    dry = np.zeros(config.n_kernel_terms)
    bands = _band_terms(config)
    if bands and not config.kernel_temperature_laws:
        dry[-len(bands):] = np.array(bands)[:, 1]
    path = np.ones(p.size) @ kernel_path_matrices(p)[0]
    return dry[:, None] * path[None, :]


def kernel_combination_matrix(config: FeatureConfig) -> np.ndarray:
    """[K_t, K]: kernel terms to kernel features (identity for the bank; the normalised sub-band
    weights of each channel kernel) [1]."""
    n_bank = len(config.line_kernels) + len(config.continuum_kernels)
    out = np.zeros((config.n_kernel_terms, config.n_kernels))
    out[:n_bank, :n_bank] = np.eye(n_bank)
    row = n_bank
    for c, channel in enumerate(config.channel_kernels):
        w = np.array([band[0] for band in channel])
        out[row:row + w.size, n_bank + c] = w / w.sum()
        row += w.size
    return out


def surface_level(pressure_hpa) -> int:
    """Index of the surface level: the one of highest pressure [1]."""
    return int(np.argmax(np.asarray(pressure_hpa, dtype=float)))


def kernel_path_matrices(pressure_hpa) -> tuple[np.ndarray, np.ndarray]:
    """M_l, M_c [L, L]: the kernel paths above each level, P_l = q M_l and P_c = (q q) M_c.

    Line path P_l,i = sum over the layers above level i of the layer mean of q p / p_0
    times dm (pressure broadening); self-continuum path P_c,i = the same of q (e / p_0)
    with e = q p / epsilon (the vapour pressure, dropping the (1 - epsilon) q term of its
    denominator, at most 4 % at q = 0.1). Both are linear maps of q (respectively q^2)
    through :func:`water_path_matrix` (same layer means and air masses).

    Parameters
    ----------
    pressure_hpa : array_like
        Level pressures p [hPa], shape (L,), strictly monotonic.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        M_l [kg m-2 (kg kg-1)-1] and M_c [kg m-2 (kg kg-1)-2], shape (L, L).
    """
    base = water_path_matrix(pressure_hpa)
    line, continuum = kernel_path_scales(pressure_hpa)
    return line[:, None] * base, continuum[:, None] * base


def kernel_temperature_matrix(pressure_hpa) -> np.ndarray:
    """G [L, L] with df/dT = t G for f = sum_j Tbar_j (t_j+1 - t_j) (layer means of levels).

    Layers j join adjacent levels (surface first: level j below level j + 1); each level
    gets half of the transmittance step of each adjacent layer:
    df/dT_i = (t_i+1 - t_i-1) / 2 inside, (t_1 - t_0) / 2 at the surface and
    (t_L-1 - t_L-2) / 2 at the top. Works for either level order.

    Parameters
    ----------
    pressure_hpa : array_like
        Level pressures p [hPa], shape (L,), strictly monotonic.

    Returns
    -------
    numpy.ndarray
        G [1], shape (L, L); G[m, i] = d(df/dT_i)/dt_m.
    """
    order = _surface_first_order(pressure_hpa)
    L = order.size
    g = np.zeros((L, L))
    layers = np.arange(L - 1)
    # layer j: + Tbar_j t_j+1 - Tbar_j t_j, Tbar_j = (T_j + T_j+1) / 2
    for level in (layers, layers + 1):
        g[layers + 1, level] += 0.5
        g[layers, level] -= 0.5
    return _in_level_order(g, order)


def opacity_kernel_features(air_temperature, specific_humidity, surface_temperature, sensor_zenith_angle,
                            config: FeatureConfig, pressure_hpa) -> np.ndarray:
    """Gray opacity kernels [f_1..f_K, t_s,1..t_s,K (, r_1..r_K)] (see the module docstring).

    For kernel k with coefficient kappa_k on path P (line or continuum, see
    :func:`kernel_path_matrices`): t_k,i = exp(-kappa_k sec(theta) P_i),
    f_k = sum_j Tbar_j (t_k,j+1 - t_k,j) + Ts t_k,s, t_k,s the transmittance of the whole
    column (s: the level of highest pressure). The weights of f sum to 1, so f is a
    weighted mean of the air and surface temperatures: the brightness temperature of a
    gray, non-scattering column over a black surface (Schwarzschild's equation with the
    Planck function linear in T).

    With ``config.reflection_kernels``, also r_k = t_k,s (D_k - Ts), where
    D_k = sum_j Tbar_j (s_k,j - s_k,j+1) is the downwelling sky temperature at the surface
    (no cosmic background), s_k,i = exp(-kappa_k sec(theta) (P_s - P_i)) the transmittance
    from level i down to the surface along the same (specularly reflected) slant path.
    Over a surface of emissivity e the gray column's brightness temperature is then
    f_k + (1 - e) r_k.

    The optical depths are kappa sec(theta) (paths P = v M, :func:`kernel_path_inputs`),
    plus the constant dry-air depth of the channel kernels (:func:`kernel_dry_depth`);
    with ``config.kernel_temperature_laws`` the paths carry (T_ref / T)^n per level.

    Parameters
    ----------
    air_temperature : array_like
        T [K], shape (N, L).
    specific_humidity : array_like
        q [kg kg-1], shape (N, L).
    surface_temperature : array_like
        Ts [K], shape (N,).
    sensor_zenith_angle : array_like
        theta [degree], shape (N,).
    config : FeatureConfig
        ``line_kernels`` then ``continuum_kernels`` [m2 kg-1].
    pressure_hpa : array_like
        p [hPa], shape (L,), the level order of the profiles.

    Returns
    -------
    numpy.ndarray
        Shape (N, 2K): f [K] then t_s [1], kernels in config order; (N, 3K) with
        ``reflection_kernels``, r [K] last.
    """
    T = np.asarray(air_temperature, dtype=float)
    q = np.asarray(specific_humidity, dtype=float)
    sec = 1.0 / np.cos(np.radians(np.asarray(sensor_zenith_angle, dtype=float)))
    paths = kernel_path_inputs(T, q, config, pressure_hpa) @ water_path_matrix(pressure_hpa)  # [N, P, L]
    nadir = kernel_coefficient_matrix(config) @ paths + kernel_dry_depth(config, pressure_hpa)
    depth = sec[:, None, None] * nadir  # kappa sec P [N, K_t, L]
    t = np.exp(-depth)
    surface = surface_level(pressure_hpa)
    t_s = t[:, :, surface]
    # (t G) . T = t . h with h = T G^T: one [N, L] x [L, L] product, not one per kernel
    h = T @ kernel_temperature_matrix(pressure_hpa).T
    f = np.einsum("nkl,nl->nk", t, h)
    Ts = np.asarray(surface_temperature, dtype=float)[:, None]
    f += Ts * t_s
    parts = [f, t_s]
    if config.reflection_kernels:
        down = np.exp(-(depth[:, :, [surface]] - depth))  # s [N, K_t, L]
        sky = -np.einsum("nkl,nl->nk", down, h)  # D
        parts.append(t_s * (sky - Ts))
    if config.channel_kernels:
        combine = kernel_combination_matrix(config)
        parts = [part @ combine for part in parts]
    return np.concatenate(parts, axis=1)


def raw_features(air_temperature, specific_humidity, surface_temperature, sensor_zenith_angle,
                 config: FeatureConfig, pressure_hpa=None) -> np.ndarray:
    """Shared raw features x = [T, h(q), (q), (ln(W + W_0)), (kernels), Ts, s(theta)].

    Parameters
    ----------
    air_temperature : array_like
        T [K], shape (N, L), levels in the bundle's order.
    specific_humidity : array_like
        q [kg kg-1], shape (N, L).
    surface_temperature : array_like
        Ts [K], shape (N,).
    sensor_zenith_angle : array_like
        theta [degree], shape (N,).
    config : FeatureConfig
    pressure_hpa : array_like, optional
        Level pressures [hPa], shape (L,), same level order; required with ``water_path``
        or kernels.

    Returns
    -------
    numpy.ndarray
        x, shape (N, F) with F = B L + 2 K + 2 (3 K with reflection) for B profile blocks and K kernels [mixed
        units: K, ln(kg kg-1), kg kg-1, ln(kg m-2), K, 1, K, 1].
    """
    T = np.asarray(air_temperature, dtype=float)
    parts = [T, humidity_transform(specific_humidity, config)]
    if config.humidity == "log+linear":
        parts.append(np.asarray(specific_humidity, dtype=float))
    if config.water_path:
        if pressure_hpa is None:
            raise ValueError("raw_features: pressure_hpa is required with the water_path feature")
        parts.append(water_path_transform(specific_humidity, water_path_matrix(pressure_hpa), config))
    if config.n_kernels:
        if pressure_hpa is None:
            raise ValueError("raw_features: pressure_hpa is required with opacity kernels")
        parts.append(opacity_kernel_features(air_temperature, specific_humidity, surface_temperature,
                                             sensor_zenith_angle, config, pressure_hpa))
    parts += [np.asarray(surface_temperature, dtype=float)[:, None],
              zenith_transform(sensor_zenith_angle, config)[:, None]]
    return np.concatenate(parts, axis=1)


def kernel_columns(config: FeatureConfig, n_levels: int) -> np.ndarray:
    """Columns of the compressed z holding the opacity-kernel scalars (after the profile blocks).

    Parameters
    ----------
    config : FeatureConfig
    n_levels : int
        L [1].

    Returns
    -------
    numpy.ndarray
        int indices, 2 K of them (3 K with reflection; empty without kernels).
    """
    start = sum(min(k, n_levels) if k else n_levels for _, k in config.blocks())
    return np.arange(start, start + config.n_kernel_features)


class FeatureTransform:
    """Standardisation, block PCA and joint whitening of the shared raw features.

    Parameters
    ----------
    config : FeatureConfig
    n_levels : int
        L [1].
    pressure_hpa : array_like, optional
        The level grid [hPa] in the order of x; required when
        ``config.humidity_top_hpa`` > 0.

    Attributes (after :meth:`fit`)
    ------------------------------
    scaler_ : sklearn.preprocessing.StandardScaler
        Per-element standardisation of x.
    weight_ : numpy.ndarray
        [F] factor on each standardised element before the PCA: 0 for the levels of the
        per-level humidity blocks above ``humidity_top_hpa``, else 1.
    pca_ : dict of str to sklearn.decomposition.PCA or None
        Per block ("temperature", "humidity"); None for an uncompressed block.
    whitening_ : numpy.ndarray
        W [K, K], diagonal: 1 / (spread of the block's first component) per column of the
        concatenated block coordinates c (1 / std for Ts and s).
    component_variance_ : numpy.ndarray
        var(z_k) over the training set [K].
    center_ : numpy.ndarray
        x_ref [F]: the training mean of x rounded to float32 (exactly representable in
        the bundle); the folded maps act on x - x_ref.
    projection_ : numpy.ndarray
        A [F, K]: z = (x - x_ref) A + offset_.
    offset_ : numpy.ndarray
        a0 [K].
    reconstruction_ : numpy.ndarray
        R [F, B*L] for the B compressed blocks: r = (x - x_ref) R + reconstruction_offset_
        is the standardised block minus its PCA reconstruction.
    reconstruction_offset_ : numpy.ndarray
        [B*L].
    """

    def __init__(self, *, config: FeatureConfig, n_levels: int, pressure_hpa=None):
        self.config = config
        self.n_levels = n_levels
        self.pressure_hpa = None if pressure_hpa is None else np.asarray(pressure_hpa, dtype=float)

    # ---- fitting ------------------------------------------------------------------------
    def fit(self, x: np.ndarray) -> "FeatureTransform":
        """Fit on raw features ``x`` [N, F] (see :func:`raw_features`)."""
        L = self.n_levels
        x = np.asarray(x, dtype=float)
        F = self.config.n_features(L)
        if x.ndim != 2 or x.shape[1] != F:
            raise ValueError(f"raw features must have shape (N, {F}), got {x.shape}")
        self.scaler_ = StandardScaler().fit(x)
        # a constant element (e.g. a clipped humidity) has no spread: keep it unscaled
        self.scaler_.scale_ = np.where(self.scaler_.scale_ > 1e-12, self.scaler_.scale_, 1.0)
        self.weight_ = self._element_weights(F)
        s = self.scaler_.transform(x) * self.weight_
        self.pca_ = {}
        pieces = []
        for name, sl, k in self._blocks():
            if k:
                pca = PCA(n_components=min(k, L), svd_solver="full").fit(s[:, sl])
                self.pca_[name] = pca
                pieces.append(pca.transform(s[:, sl]))
            else:
                self.pca_[name] = None
                pieces.append(s[:, sl])
        pieces.append(s[:, self._scalar_start():])
        c = np.concatenate(pieces, axis=1)
        scale = []
        for piece in pieces:
            ref = piece.std(axis=0)
            scale.append(np.full(piece.shape[1], ref[0]) if piece is not pieces[-1] else ref)
        scale = np.concatenate(scale)
        self.whitening_ = np.diag(1.0 / np.where(scale > 1e-12, scale, 1.0))
        self.block_mean_ = c.mean(axis=0)
        self.component_variance_ = np.maximum(((c - self.block_mean_) @ self.whitening_).var(axis=0), 1e-30)
        self.center_ = self.scaler_.mean_.astype(np.float32).astype(float)
        self._fold()
        return self

    def _element_weights(self, F: int) -> np.ndarray:
        weight = np.ones(F)
        top = self.config.humidity_top_hpa
        if top > 0:
            if self.pressure_hpa is None or self.pressure_hpa.shape != (self.n_levels,):
                raise ValueError("FeatureTransform: humidity_top_hpa needs pressure_hpa of the L levels")
            for name, sl, _ in self._blocks():
                if name in HUMIDITY_TOP_BLOCKS:
                    weight[sl] = (self.pressure_hpa >= top).astype(float)
        return weight

    def _scalar_start(self) -> int:
        """Column of x where the per-profile scalars (kernels, Ts, s) start."""
        return len(self.config.blocks()) * self.n_levels

    def _blocks(self):
        L = self.n_levels
        return tuple((name, slice(i * L, (i + 1) * L), k) for i, (name, k) in enumerate(self.config.blocks()))

    def _fold(self) -> None:
        """Fold standardisation, PCA and whitening into z = x A + a0 (exact algebra)."""
        L = self.n_levels
        F = self.config.n_features(L)
        inv_scale = self.weight_ / self.scaler_.scale_
        mean = self.scaler_.mean_
        columns, recon_cols = [], []
        for name, sl, _ in self._blocks():
            pca = self.pca_[name]
            rows = np.zeros((F, pca.n_components_ if pca is not None else L))
            if pca is not None:
                rows[sl] = pca.components_.T
                # residual off the subspace: s - (s - m) V V^T - m
                resid = np.zeros((F, L))
                resid[sl] = np.eye(L) - pca.components_.T @ pca.components_
                recon_cols.append((resid, pca.mean_ @ pca.components_.T @ pca.components_ - pca.mean_))
            else:
                rows[sl] = np.eye(L)
            columns.append((rows, pca.mean_ @ pca.components_.T if pca is not None else np.zeros(L)))
        start = self._scalar_start()
        scal = np.zeros((F, F - start))
        scal[start:, :] = np.eye(F - start)
        columns.append((scal, np.zeros(F - start)))
        # c = s B - b ; s = (x - mean) / scale ; z = (c - block_mean) W
        B = np.concatenate([m for m, _ in columns], axis=1)
        b = np.concatenate([v for _, v in columns])
        self.projection_ = (inv_scale[:, None] * B) @ self.whitening_
        self.offset_ = (-(mean * inv_scale) @ B - b - self.block_mean_) @ self.whitening_
        self.offset_ = self.offset_ + self.center_ @ self.projection_
        if recon_cols:
            R = np.concatenate([m for m, _ in recon_cols], axis=1)
            r0 = np.concatenate([v for _, v in recon_cols])
            self.reconstruction_ = inv_scale[:, None] * R
            self.reconstruction_offset_ = -(mean * inv_scale) @ R + r0 + self.center_ @ self.reconstruction_
        else:
            self.reconstruction_ = np.zeros((F, 0))
            self.reconstruction_offset_ = np.zeros(0)

    # ---- use ----------------------------------------------------------------------------
    @property
    def n_components(self) -> int:
        """K [1]."""
        return self.projection_.shape[1]

    @property
    def n_reconstruction_blocks(self) -> int:
        return self.reconstruction_.shape[1] // self.n_levels

    def transform(self, x: np.ndarray) -> np.ndarray:
        """z [N, K] from raw features x [N, F], through the sklearn objects (not the fold)."""
        s = self.scaler_.transform(np.asarray(x, dtype=float)) * self.weight_
        L = self.n_levels
        pieces = []
        for name, sl, _ in self._blocks():
            pca = self.pca_[name]
            pieces.append(pca.transform(s[:, sl]) if pca is not None else s[:, sl])
        pieces.append(s[:, self._scalar_start():])
        return (np.concatenate(pieces, axis=1) - self.block_mean_) @ self.whitening_

    def project(self, x: np.ndarray) -> np.ndarray:
        """z [N, K] through the folded affine map (what the bundle computes)."""
        return (np.asarray(x, dtype=float) - self.center_) @ self.projection_ + self.offset_

    def novelty_scores(self, x: np.ndarray) -> np.ndarray:
        """[N, 1 + B]: sum z^2/var(z) and the squared reconstruction error of each block [1]."""
        x = np.asarray(x, dtype=float)
        z = self.project(x)
        r = (x - self.center_) @ self.reconstruction_ + self.reconstruction_offset_
        L = self.n_levels
        blocks = [np.sum(r[:, i * L:(i + 1) * L] ** 2, axis=1) for i in range(self.n_reconstruction_blocks)]
        return np.stack([np.sum(z**2 / self.component_variance_, axis=1), *blocks], axis=1)
