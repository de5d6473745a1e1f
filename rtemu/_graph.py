"""Hand-built ONNX graph of an rtemu emulator bundle.

One graph computes, for all channels at once, the brightness temperatures, their exact
derivatives with respect to every input (reverse-mode differentiation of the very function
the graph evaluates, written out as nodes), and the quality-flag bitmask.

Function evaluated (per profile n, channel c; all linear maps folded at export)::

    x      = [T, h(q), (q), (u), (f, g, (r)), Ts, s(theta)] - x_ref
                                                          shared raw features [F = B L + 2 K
                                                          + 2 for B profile blocks and K
                                                          kernels], centred (float32 accuracy)
    h(q)   = ln(max(q, q_floor))  or  q                   humidity transform ("log+linear":
                                                          both ln q and q blocks)
    u      = ln(q M + W_0)                                log water-vapour path above each
                                                          level (optional block; M [L, L])
    t_k    = exp(-sec(theta) kappa_k . P)                 gray opacity kernels (optional,
                                                          [K, L]): paths P_p = v_p M with
                                                          v = [q, q q] c(p) (line,
                                                          continuum), with temperature
                                                          laws [1, q, q q] (T_ref/T)^n c(p)
                                                          (dry, line, continuum; the plain
                                                          two beside a fixed bank only)
    f_k    = t_k G . T + Ts t_k,s ;  g_k = t_k,s          kernel temperature and surface
                                                          transmittance (G [L, L]: layer
                                                          means and transmittance steps)
    r_k    = -t_k,s ((s_k G) . T + Ts)                    reflected sky minus surface
                                                          (optional): s_k,i = t_k,s / t_k,i,
                                                          computed as exp(-sec(theta)
                                                          kappa_k (P_k,s - P_k,i))
    s      = sec(theta)  or  theta                        zenith transform
    z      = x A + a0                                     standardise + PCA + scale [K]
    a1     = tanh(z W1_c + e_c w1e_c + b1_c)              hidden layer 1 [H1]
    a_k    = tanh(a_{k-1} W_k,c + b_k,c)                  further hidden layers
    y_c    = a_d w_out,c + z1.l_c + e_c (z1.m_c) + s (z1.n_c),  z1 = [z, 1]

Jacobian (chain rule, reverse order)::

    g_d    = w_out,c (1 - a_d^2)
    g_k-1  = (g_k W_k,c^T) (1 - a_{k-1}^2)
    dy/dz  = g_1 W1_c^T + l_c + e_c m_c + s n_c  (z rows);  dy/de = g_1 . w1e_c + z1.m_c
    dy/dx  = dy/dz A^T      (s(theta) is not differentiated)
    dy/dT  = dy/dx[:L];  dy/dq = dy/dx[L:2L] h'(q) (+ dy/dx[2L:3L])
             (+ (dy/du / (q M + W_0)) M^T);  dy/dTs = dy/dx[F-2]
    kernels, with a = dy/df, b = dy/dg [K], r_k = -kappa_k sec(theta) t_k, h = T G^T
    (df_k/dt_k = h + Ts at the surface level s):
    dy/dT += a (t G);  dy/dTs += a . t_s
    dy/dq += [(a r) h + ((a Ts + b) . r_s) 1_s] M_l^T  (sums over the line kernels)
           + 2 q [the same over the continuum kernels] M_c^T
             (with temperature laws each path's term also times (T_ref/T)^n, and
             dy/dT += -n v / T times the same bracket M^T, summed over the paths)
    reflection, with c = dy/dr: dy/dT += -c (t_s s G);  dy/dTs -= c . t_s;  in the
    humidity terms a r h += c (r_s s) h and (a Ts + b) -= c (2 S + Ts), S = (s G) . T

Per-channel tensors carry the channel as their leading axis ([C, ...]); hidden layers of
different widths are zero-padded to a common width, which leaves the function and its
derivative unchanged (a padded unit has zero pre-activation and zero outgoing weight).
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

from rtemu.features import kernel_path_names, kernel_path_powers

#: ONNX opset of the exported graph (onnxruntime >= 1.17 runs it).
OPSET = 21
IR_VERSION = 10

INPUT_NAMES = (
    "air_temperature",
    "specific_humidity",
    "surface_temperature",
    "surface_emissivity",
    "sensor_zenith_angle",
)
OUTPUT_NAMES = (
    "brightness_temperature",
    "jacobian_air_temperature",
    "jacobian_specific_humidity",
    "jacobian_surface_temperature",
    "jacobian_surface_emissivity",
    "quality_flag",
)

# Flag bit values; mirror rtemu/flags.py (checked against it in tests/test_export.py).
INVALID_INPUT = 1
OUTSIDE_TRAINING_BOUNDS = 2
NOVEL_STATE = 4

def layer_weight_name(k: int) -> str:
    return f"layer{k}_weight"


def layer_bias_name(k: int) -> str:
    return f"layer{k}_bias"


@dataclasses.dataclass(frozen=True)
class GraphLayout:
    """Static shape and transform choices of a bundle graph."""

    n_levels: int
    n_channels: int
    n_components: int
    hidden: tuple[int, ...]
    humidity: str = "log+linear"
    zenith: str = "secant"
    n_reconstruction_blocks: int = 2
    water_path: bool = False
    n_line_kernels: int = 0
    n_continuum_kernels: int = 0
    reflection_kernels: bool = False
    n_band_kernels: int = 0
    n_channel_kernels: int = 0
    kernel_temperature_laws: bool = False
    n_tropopause_layers: int = 0

    @property
    def kernel_paths(self) -> tuple[str, ...]:
        """Kernel path names (:func:`rtemu.features.kernel_path_names`)."""
        return kernel_path_names(bool(self.n_line_kernels or self.n_continuum_kernels), self.kernel_temperature_laws)

    @property
    def n_kernel_paths(self) -> int:
        return len(self.kernel_paths)

    @property
    def n_profile_blocks(self) -> int:
        return 2 + (self.humidity == "log+linear") + bool(self.water_path)

    @property
    def n_kernels(self) -> int:
        """Kernel feature groups: bank kernels plus channel kernels."""
        return self.n_line_kernels + self.n_continuum_kernels + self.n_channel_kernels

    @property
    def n_kernel_terms(self) -> int:
        """Gray absorbers computed: bank kernels plus the channel kernels' sub-bands."""
        return self.n_line_kernels + self.n_continuum_kernels + self.n_band_kernels

    @property
    def n_features(self) -> int:
        return self.n_profile_blocks * self.n_levels + self.n_kernel_features + 2

    @property
    def n_kernel_features(self) -> int:
        """[f, g] or [f, g, r] per kernel [1]."""
        return (3 if self.reflection_kernels else 2) * self.n_kernels

    @property
    def n_bounded(self) -> int:
        """Bounded scalars per profile: T, q, Ts, theta, h (L), Ts - T_0, e (C) [P]."""
        return 3 * self.n_levels + 3 + self.n_channels


class _Builder:
    def __init__(self, dtype):
        self.dtype = np.dtype(dtype)
        self.elem = helper.np_dtype_to_tensor_dtype(self.dtype)
        self.nodes: list[onnx.NodeProto] = []
        self.initializers: dict[str, np.ndarray] = {}
        self._count = 0

    def const(self, name: str, value, dtype=None) -> str:
        value = np.asarray(value, dtype=dtype or self.dtype)
        if name in self.initializers:
            raise ValueError(f"duplicate initializer {name!r}")
        self.initializers[name] = value
        return name

    def ints(self, values) -> str:
        """Shared int64 constant (axes, starts, shapes)."""
        values = [int(v) for v in np.atleast_1d(values)]
        name = "int64_" + "_".join(str(v).replace("-", "m") for v in values)
        if name not in self.initializers:
            self.initializers[name] = np.asarray(values, dtype=np.int64)
        return name

    def op(self, op_type: str, *inputs: str, out: str | None = None, **attrs) -> str:
        self._count += 1
        out = out or f"{op_type.lower()}_{self._count}"
        self.nodes.append(
            helper.make_node(op_type, list(inputs), [out], name=f"n{self._count}_{op_type}", **attrs)
        )
        return out

    def op_multi(self, op_type: str, inputs, n_out: int, **attrs) -> list[str]:
        self._count += 1
        outs = [f"{op_type.lower()}_{self._count}_{i}" for i in range(n_out)]
        self.nodes.append(
            helper.make_node(op_type, list(inputs), outs, name=f"n{self._count}_{op_type}", **attrs)
        )
        return outs


def build_model(layout: GraphLayout, arrays: dict[str, np.ndarray], *, dtype=np.float32,
                metadata: dict[str, str] | None = None) -> onnx.ModelProto:
    """Build the bundle graph from assembled (padded, channel-stacked) ``arrays``.

    ``arrays`` holds only primary weights (see :func:`primary_shapes`); derived constants
    (transposes, block matrices) are nodes on initializers only, which onnxruntime folds
    once at session creation. ``dtype`` float64 builds the same function in double
    precision (the tests use it for precise finite-difference checks); bundles are float32.
    """
    b = _Builder(dtype)
    L, C, K = layout.n_levels, layout.n_channels, layout.n_components
    depth = len(layout.hidden)
    expected = primary_shapes(layout)
    if set(arrays) != set(expected):
        raise ValueError(f"graph arrays mismatch: missing {sorted(set(expected) - set(arrays))}, "
                         f"unexpected {sorted(set(arrays) - set(expected))}")
    for name in sorted(arrays):
        value = np.asarray(arrays[name])
        if value.shape != expected[name]:
            raise ValueError(f"graph array {name!r} has shape {value.shape}, expected {expected[name]}")
        b.const(name, value)
    ax1, ax2 = b.ints([1]), b.ints([2])
    one = b.const("one", 1.0)
    T, q, Ts, E, theta = INPUT_NAMES

    def cols(src, start, stop, axis):
        return b.op("Slice", src, b.ints(start), b.ints(stop), b.ints(axis))

    # ---- input transforms -> raw features X [N, F]
    log_q = layout.humidity.startswith("log")
    if log_q:
        q_clip = b.op("Max", q, "humidity_floor")
        x_q = b.op("Log", q_clip)
    else:
        x_q = q
    profile = [T, x_q, q] if layout.humidity == "log+linear" else [T, x_q]
    if layout.water_path:
        # W + W_0 > 0 for any q >= 0 (M >= 0): the logarithm needs no clip
        path = b.op("Add", b.op("MatMul", q, "water_path_matrix"), "water_path_floor")  # [N, L]
        profile.append(b.op("Log", path))
    sec = None
    if layout.zenith == "secant" or layout.n_kernels:
        sec = b.op("Reciprocal", b.op("Cos", b.op("Mul", theta, b.const("degree", math.pi / 180.0))))
    x_theta = sec if layout.zenith == "secant" else theta
    Ts1 = b.op("Unsqueeze", Ts, ax1)
    s1 = b.op("Unsqueeze", x_theta, ax1)  # [N, 1]
    kern = _kernel_forward(b, layout, sec, Ts1) if layout.n_kernels else None
    if kern is not None:
        profile.append(kern["features"])
    # centring first keeps float32 round-off of the following products at the size of the
    # deviations, not of the raw values (e.g. 250 K)
    X = b.op("Sub", b.op("Concat", *profile, Ts1, s1, axis=1), "feature_center")

    # ---- [z, 1] = X A + a0: scaled PCA coordinates and a constant-1 column carrying
    # the first-layer bias. The stored projection also holds (columns K+1..) the
    # residuals off the PCA subspaces, computed by a second Gemm on the flag path only,
    # so that a session without quality_flag skips it.
    z1 = b.op("Gemm", X, cols("projection_weight", 0, K + 1, 1), cols("projection_offset", 0, K + 1, 0))

    # ---- per-channel networks, channel-major [C, N, H]. Channel c sees u = [z, 1, e_c]:
    # the first-layer matrix [C, K+1+C, H1] has e rows that are zero except row K+1+c.
    w1 = layer_weight_name(1)
    eye3 = b.const("eye_channels_3d", np.eye(C)[:, :, None])
    w1_full = b.op("Concat", w1, b.op("Mul", eye3, "layer1_emissivity"), axis=1)
    u = b.op("Concat", z1, E, axis=1)  # [N, K+1+C]
    acts = [b.op("Tanh", b.op("MatMul", u, w1_full))]  # [C, N, H1]
    for k in range(2, depth + 1):
        pre = b.op("Add", b.op("MatMul", acts[-1], layer_weight_name(k)), layer_bias_name(k))
        acts.append(b.op("Tanh", pre))
    y_net = b.op("MatMul", acts[-1], "output_weight")  # [C, N, 1]
    y_net = b.op("Transpose", b.op("Squeeze", y_net, ax2), perm=[1, 0])  # [N, C]

    # ---- linear part on z1 = [z, 1], with coefficients affine in e_c and in s:
    # z1.l_c + e_c (z1.m_c) + s (z1.n_c)   (the constant of each sits in the 1 row)
    lin_w = b.op("Concat", "linear_weight", "linear_emissivity_weight", "linear_zenith_weight", axis=1)
    lin, e_slope, s_slope = b.op_multi("Split", [b.op("MatMul", z1, lin_w), b.ints([C, C, C])], 3, axis=1)
    lin = b.op("Add", lin, b.op("Add", b.op("Mul", E, e_slope), b.op("Mul", s1, s_slope)))
    b.op("Add", y_net, lin, out="brightness_temperature")

    # ---- Jacobians: reverse mode through the same nodes
    w_out_row = b.op("Transpose", "output_weight", perm=[0, 2, 1])  # [C, 1, Hd]
    g = b.op("Mul", b.op("Sub", one, b.op("Mul", acts[-1], acts[-1])), w_out_row)
    for k in range(depth, 1, -1):
        back = b.op("MatMul", g, b.op("Transpose", layer_weight_name(k), perm=[0, 2, 1]))
        a = acts[k - 2]
        g = b.op("Mul", back, b.op("Sub", one, b.op("Mul", a, a)))
    # back onto (z, e_c) [C, N, K+1], the linear part included: g is augmented with
    # v = [1, e_c, s] and the weights with the z-rows of l_c, m_c, n_c (e slot zero)
    E_cn1 = b.op("Unsqueeze", b.op("Transpose", E, perm=[1, 0]), ax2)  # [C, N, 1]
    s_1n1 = b.op("Unsqueeze", s1, b.ints([0]))  # [1, N, 1]
    v = b.op("Add", b.op("Mul", E_cn1, b.const("pick_e", [0.0, 1.0, 0.0])),
             b.op("Add", b.op("Mul", s_1n1, b.const("pick_s", [0.0, 0.0, 1.0])),
                  b.const("pick_1", [1.0, 0.0, 0.0])))  # [C, N, 3]
    g_aug = b.op("Concat", g, v, axis=2)  # [C, N, H1+3]
    w1_ze = b.op("Concat", cols(w1, 0, K, 1), "layer1_emissivity", axis=1)  # [C, K+1, H1]
    z_only = b.const("mask_z", np.r_[np.ones(K), 0.0])
    lin_rows = [b.op("Unsqueeze", b.op("Transpose", b.op("Mul", w, b.op("Unsqueeze", z_only, ax1)), perm=[1, 0]),
                     ax1) for w in ("linear_weight", "linear_emissivity_weight", "linear_zenith_weight")]
    w_aug = b.op("Concat", b.op("Transpose", w1_ze, perm=[0, 2, 1]), *lin_rows, axis=1)  # [C, H1+3, K+1]
    d_ze = b.op("Transpose", b.op("MatMul", g_aug, w_aug), perm=[1, 0, 2])  # [N, C, K+1]
    d_e = b.op("Squeeze", cols(d_ze, K, K + 1, 2), ax2)
    b.op("Add", d_e, e_slope, out="jacobian_surface_emissivity")

    # dy/dx = dy/dz A^T as one 2-D product [N*C, K+1] x [A^T; 0] [K+1, F-part]:
    # onnxruntime runs a 3-D MatMul by a 2-D matrix as one small product per profile
    d_aug = b.op("Reshape", d_ze, b.ints([-1, K + 1]))

    def back_matrix(r0, r1):
        return b.op("Concat", b.op("Transpose", cols(cols("projection_weight", 0, K, 1), r0, r1, 0), perm=[1, 0]),
                    b.const(f"zero_row_{r0}", np.zeros((1, r1 - r0))), axis=0)

    def back(r0, r1, out=None):
        return b.op("Reshape", b.op("MatMul", d_aug, back_matrix(r0, r1)), b.ints([-1, C, r1 - r0]), out=out)

    nk = layout.n_kernels
    k0 = layout.n_profile_blocks * L  # first kernel column of x
    d_r = None
    if kern is not None:
        d_f, d_g = back(k0, k0 + nk), back(k0 + nk, k0 + 2 * nk)  # [N, C, K] each
        if layout.reflection_kernels:
            d_r = back(k0 + 2 * nk, k0 + 3 * nk)
        if layout.n_channel_kernels:
            # from the kernel features back to the kernel terms (sub-bands): [N, C, K_t]
            spread = b.op("Transpose", "kernel_combination", perm=[1, 0])
            d_f, d_g = b.op("MatMul", d_f, spread), b.op("MatMul", d_g, spread)
            d_r = None if d_r is None else b.op("MatMul", d_r, spread)
        d_kT = b.op("MatMul", d_f, kern["dfdT"])
        if d_r is not None:
            d_kT = b.op("Add", d_kT, b.op("MatMul", d_r, kern["drdT"]))
        kernel_dq, kernel_dT = _kernel_humidity_terms(b, layout, kern, d_f, d_g, d_r, Ts)
        if kernel_dT is not None:  # through the opacities' temperature laws
            d_kT = b.op("Add", d_kT, kernel_dT)
        b.op("Add", back(0, L), d_kT, out="jacobian_air_temperature")
    else:
        back(0, L, out="jacobian_air_temperature")
    jq = "jacobian_specific_humidity"
    terms = []  # dy/dq [N, C, L] through each humidity block
    if log_q:
        # d ln(max(q, floor)) / dq = 1/q above the floor, 0 below (the clip is flat there)
        above = b.op("Cast", b.op("Greater", q, "humidity_floor"), to=b.elem)
        dh = b.op("Unsqueeze", b.op("Div", above, q_clip), ax1)  # [N, 1, L]
        terms.append(b.op("Mul", back(L, 2 * L), dh))
    else:
        terms.append(back(L, 2 * L))
    start = 2 * L
    if layout.humidity == "log+linear":
        terms.append(back(start, start + L))
        start += L
    if layout.water_path:
        # du_i/dq_k = M[k, i] / (W_i + W_0): scale by 1/(W + W_0), then one 2-D product by M^T
        d_u = b.op("Mul", back(start, start + L), b.op("Unsqueeze", b.op("Reciprocal", path), ax1))
        d_u = b.op("MatMul", b.op("Reshape", d_u, b.ints([-1, L])),
                   b.op("Transpose", "water_path_matrix", perm=[1, 0]))
        terms.append(b.op("Reshape", d_u, b.ints([-1, C, L])))
    if kern is not None:
        terms += kernel_dq
    while len(terms) > 2:
        terms[:2] = [b.op("Add", terms[0], terms[1])]
    if len(terms) == 2:
        b.op("Add", terms[0], terms[1], out=jq)
    else:
        b.op("Identity", terms[0], out=jq)
    # a [.., 1] matrix, not a vector: onnxruntime runs MatMul by a 1-D operand as one
    # small product per profile (measured 10x slower)
    F = layout.n_features
    if kern is not None:
        d_fr = d_f if d_r is None else b.op("Sub", d_f, d_r)  # dr/dTs = -t_s
        d_ts = b.op("Add", back(F - 2, F - 1), b.op("MatMul", d_fr, kern["t_surface"]))  # [N, C, 1]
        b.op("Squeeze", d_ts, ax2, out="jacobian_surface_temperature")
    else:
        b.op("Squeeze", back(F - 2, F - 1), ax2, out="jacobian_surface_temperature")

    # ---- quality flags
    _flags(b, layout, X, z1, Ts1, cols, x_q if log_q else None)

    graph = helper.make_graph(
        b.nodes,
        "rtemu_emulator",
        _inputs(layout, b.elem),
        _outputs(layout, b.elem),
        initializer=[numpy_helper.from_array(v, name=k) for k, v in b.initializers.items()],
    )
    model = helper.make_model(
        graph,
        opset_imports=[helper.make_opsetid("", OPSET)],
        producer_name="rtemu",
        ir_version=IR_VERSION,
    )
    if metadata:
        helper.set_model_props(model, metadata)
    return model


def _kernel_forward(b: _Builder, layout: GraphLayout, sec: str, Ts1: str) -> dict:
    """Gray opacity kernels: features [N, 2K] = [f, g] (or [N, 3K] = [f, g, r] with the
    reflected-sky term) and what their Jacobian reuses.

    Computed per kernel term [N, K_t, ...]; with channel kernels the features are the
    weighted sums ``kernel_combination`` [K_t, K] of the terms, and the sub-band terms add
    a constant dry-air depth (``kernel_dry_depth`` [K_t, L]) unless the layout has the
    temperature laws (then the dry path is one of the paths below).

    All paths come from one product, P = v M (``kernel_path_matrix`` is M of
    :func:`rtemu.features.water_path_matrix`): v = [q p/p_0, q q p/(epsilon p_0)]
    (``kernel_path_scale`` [2, L] holds the level factors), or with the temperature laws
    v_p = q^a_p (T_ref / T)^n_p c_p over the layout's paths (``kernel_path_scale`` [P, L],
    ``kernel_temperature_exponent`` [P, 1], ``kernel_reference_temperature``; see
    :func:`rtemu.features.kernel_path_inputs`). ``kernel_coefficients`` [K_t, P] holds
    each term's kappa on the paths.
    """
    T, q = INPUT_NAMES[0], INPUT_NAMES[1]
    ax1, ax2 = b.ints([1]), b.ints([2])
    out = {}
    if layout.kernel_temperature_laws:
        # v = q^a (T_ref / T)^n c(p) per path [N, P, L]
        zeroth, first, second = _path_power_rows(b, layout, (0, 1, 2))
        q3, qq3 = b.op("Unsqueeze", q, ax1), b.op("Unsqueeze", b.op("Mul", q, q), ax1)
        powers = b.op("Add", b.op("Add", b.op("Mul", q3, first), b.op("Mul", qq3, second)), zeroth)
        log_ratio = b.op("Unsqueeze", b.op("Sub", b.op("Log", "kernel_reference_temperature"), b.op("Log", T)), ax1)
        law_scale = b.op("Mul", b.op("Exp", b.op("Mul", log_ratio, "kernel_temperature_exponent")),
                         "kernel_path_scale")  # (T_ref / T)^n c(p) [N, P, L]
        v = b.op("Mul", powers, law_scale)
        out.update(path_values=v, law_scale=law_scale)
    else:
        q_powers = b.op("Concat", b.op("Unsqueeze", q, ax1), b.op("Unsqueeze", b.op("Mul", q, q), ax1), axis=1)
        v = b.op("Mul", q_powers, "kernel_path_scale")  # [N, 2, L]
    paths = b.op("MatMul", v, "kernel_path_matrix")  # [N, P, L]
    sec3 = b.op("Unsqueeze", sec, b.ints([1, 2]))  # [N, 1, 1]
    depth = b.op("MatMul", "kernel_coefficients", paths)  # [N, K_t, L]
    if layout.n_band_kernels and not layout.kernel_temperature_laws:
        depth = b.op("Add", depth, "kernel_dry_depth")
    neg_sec3 = b.op("Neg", sec3)  # the sign on [N, 1, 1], not on [N, K, L]
    t = b.op("Exp", b.op("Mul", depth, neg_sec3))  # [N, K, L]
    # f = (t G).T = t . h with h = T G^T [N, L]: the brightness temperatures need no
    # [K, L] x [L, L] product; df/dT = t G is formed for the Jacobians only (a session
    # without Jacobian outputs prunes it)
    h = b.op("MatMul", T, b.op("Transpose", "kernel_temperature_matrix", perm=[1, 0]))  # [N, L]
    h3 = b.op("Unsqueeze", h, ax2)  # [N, L, 1]
    dfdT = b.op("MatMul", t, "kernel_temperature_matrix")  # df_k/dT [N, K, L]
    t_surface = b.op("MatMul", t, "kernel_surface_pick")  # [N, K, 1]
    g = b.op("Squeeze", t_surface, ax2)  # [N, K]
    f = b.op("Squeeze", b.op("MatMul", t, h3), ax2)  # [N, K]
    f = b.op("Add", f, b.op("Mul", g, Ts1))
    out.update(t=t, dfdT=dfdT, t_surface=t_surface, sec3=sec3, neg_sec3=neg_sec3, h=b.op("Unsqueeze", h, ax1))
    if layout.reflection_kernels:
        # s = exp(-sec (depth_s - depth)): transmittance from each level down to the surface;
        # D = -(s G).T the downwelling sky temperature; r = t_s (D - Ts) = -t_s ((s G).T + Ts)
        depth_s = b.op("MatMul", depth, "kernel_surface_pick")  # [N, K, 1]
        s = b.op("Exp", b.op("Mul", b.op("Sub", depth, depth_s), sec3))  # [N, K, L]
        sG = b.op("MatMul", s, "kernel_temperature_matrix")  # [N, K, L] (Jacobians only)
        minus_sky = b.op("Squeeze", b.op("MatMul", s, h3), ax2)  # (s G).T = s . h = -D [N, K]
        r = b.op("Neg", b.op("Mul", g, b.op("Add", minus_sky, Ts1)))
        out.update(s=s, minus_sky=minus_sky, drdT=b.op("Mul", b.op("Neg", t_surface), sG))
    parts = [f, g, r] if layout.reflection_kernels else [f, g]
    if layout.n_channel_kernels:
        parts = [b.op("MatMul", part, "kernel_combination") for part in parts]
    out["features"] = b.op("Concat", *parts, axis=1)
    return out


def _kernel_humidity_terms(b: _Builder, layout: GraphLayout, kern: dict, d_f: str, d_g: str, d_r,
                           Ts: str) -> tuple[list, str | None]:
    """dy/dq [N, C, L] through the kernels (all paths in one product by M^T), and with the
    temperature laws the part of dy/dT [N, C, L] that goes through the opacities.

    With tau = kappa P (per kernel), sigma = sec(theta), h = T G^T and S = (s G).T:
    df/dtau_i = -sigma t_i h_i - sigma t_s Ts 1_s,  dg/dtau_i = -sigma t_s 1_s,
    dr/dtau_i = -sigma t_s s_i h_i + sigma t_s (2 S + Ts) 1_s   (r = -t_s (S + Ts)).
    dy/dP_p = sum_k kappa_k,p dy/dtau_k, dy/dv_p = dy/dP_p M^T (paths P_p = v_p M), then
    dv_p/dq = a_p q^(a_p - 1) (T_ref / T)^n_p c_p and dv_p/dT = -n_p v_p / T.
    """
    T, q = INPUT_NAMES[0], INPUT_NAMES[1]
    ax1 = b.ints([1])
    L, C, K = layout.n_levels, layout.n_channels, layout.n_kernel_terms
    rho = b.op("Mul", kern["t"], kern["neg_sec3"])  # dt_k/d(kappa_k P) [N, K, L]
    h = kern["h"]  # df/dt without the surface term [N, 1, L]
    kappa_by_path = b.op("Transpose", "kernel_coefficients", perm=[1, 0])  # [P, K]

    def per_path(weights):  # [N, C, K] -> [N, C P, K]: kappa_k where k acts on that path
        return b.op("Reshape", b.op("Mul", b.op("Unsqueeze", weights, b.ints([2])), kappa_by_path),
                    b.ints([0, -1, K]))

    ts3 = b.op("Unsqueeze", Ts, b.ints([1, 2]))  # [N, 1, 1]
    rho_s = b.op("MatMul", rho, "kernel_surface_pick")  # -sigma t_s [N, K, 1]
    weight = b.op("Add", b.op("Mul", d_f, ts3), d_g)
    if d_r is None:
        d_path = b.op("Mul", b.op("MatMul", per_path(d_f), rho), h)  # dy/dP [N, C P, L]
    else:
        # f and r in one product: [a, c] (per path) by [rho; rho_s s]
        both = b.op("Concat", per_path(d_f), per_path(d_r), axis=2)  # [N, C P, 2K]
        d_path = b.op("Mul", b.op("MatMul", both, b.op("Concat", rho, b.op("Mul", rho_s, kern["s"]), axis=1)), h)
        s2_ts = b.op("Add", b.op("Add", kern["minus_sky"], kern["minus_sky"]), b.op("Unsqueeze", Ts, ax1))  # 2S + Ts [N, K]
        weight = b.op("Sub", weight, b.op("Mul", d_r, b.op("Unsqueeze", s2_ts, ax1)))
    surface_weight = per_path(weight)
    at_surface = b.op("MatMul", surface_weight, rho_s)  # [N, C P, 1]
    d_path = b.op("Add", d_path, b.op("Mul", at_surface, b.op("Transpose", "kernel_surface_pick", perm=[1, 0])))
    d_v = b.op("MatMul", b.op("Reshape", d_path, b.ints([-1, L])),
               b.op("Transpose", "kernel_path_matrix", perm=[1, 0]))
    d_v = b.op("Reshape", d_v, b.ints([-1, C, layout.n_kernel_paths, L]))  # dy/dv [N, C, P, L]
    # dv/dq = a q^(a-1) times the level factors (and the laws): [1, 2 q] for a = 1, 2
    first, second = _path_power_rows(b, layout)
    chain = b.op("Add", b.op("Mul", b.op("Unsqueeze", b.op("Add", q, q), b.ints([1])), second), first)  # [N, P, L]
    scale = kern["law_scale"] if layout.kernel_temperature_laws else "kernel_path_scale"
    chain = b.op("Unsqueeze", b.op("Mul", chain, scale), b.ints([1]))  # [N, 1, P, L]
    d_q = b.op("ReduceSum", b.op("Mul", d_v, chain), b.ints([2]), keepdims=0)
    if not layout.kernel_temperature_laws:
        return [d_q], None
    # dv/dT = -n v / T
    chain_t = b.op("Div", b.op("Mul", kern["path_values"], b.op("Neg", "kernel_temperature_exponent")),
                   b.op("Unsqueeze", T, ax1))
    d_t = b.op("ReduceSum", b.op("Mul", d_v, b.op("Unsqueeze", chain_t, b.ints([1]))), b.ints([2]), keepdims=0)
    return [d_q], d_t


def _path_power_rows(b: _Builder, layout: GraphLayout, powers=(1, 2)) -> list[str]:
    """Constants [P, 1] picking the paths in q^a for each a of ``powers`` (0 dry, 1 line,
    2 continuum), each made once."""
    names = []
    for power in powers:
        name = ("path_power_0", "first_path", "second_path")[power]
        if name not in b.initializers:
            b.const(name, (kernel_path_powers(layout.kernel_paths)[:, None] == power).astype(float))
        names.append(name)
    return names


def _flags(b: _Builder, layout: GraphLayout, X: str, z1: str, Ts1: str, cols, ln_q=None) -> None:
    """Quality flag bitmask [N, C] int32 (bits from rtemu.flags).

    Bounds: every input scalar (T and q per level, Ts, theta, e per channel) and two
    derived checks of the joint state are compared with the physical validity range and
    with the training range in one broadcast comparison [N, 2, P]; NaN fails both. The
    derived checks: a humidity index per level,
    h = ln q - 17.67 (T - 273.15) / (T - 29.65) + ln p = ln(RH) + const (the saturation
    vapour pressure of Bolton 1980, eq. 10, so h catches supersaturation and air far
    drier than any training state at its temperature), and the skin-air contrast
    Ts - T_0 (lowest level). A 0/1 matrix maps the violation indicators
    (and the per-profile novelty indicator) to per-channel hit counts in one MatMul:
    a per-profile input affects all channels, e_c only channel c.
    Novelty: the squared (diagonal) Mahalanobis distance sum z^2/var(z) and the squared
    reconstruction error of each block, each divided by its training maximum.
    Decoding: with hits (inv, out, nov) in {0, 1} and inv implying out (the training range
    lies inside the physical range),
    flag = min(2 out + 4 nov - inv, 6 - 5 inv): 1 for invalid input alone, else 2 out + 4 nov.
    """
    T, q, _, E, theta = INPUT_NAMES
    ax1 = b.ints([1])
    if ln_q is None:
        ln_q = b.op("Log", b.op("Max", q, "humidity_floor"))
    inv = b.op("Div", b.const("bolton_b", 17.67 * 243.5), b.op("Sub", T, b.const("bolton_c", 29.65)))
    # 17.67 (T - 273.15) / (T - 29.65) = 17.67 - 17.67 * 243.5 / (T - 29.65)
    h = b.op("Add", b.op("Add", ln_q, inv), "log_pressure_minus_bolton_a")
    contrast = b.op("Sub", Ts1, b.op("Slice", T, b.ints([0]), b.ints([1]), ax1))
    raw = b.op("Concat", T, q, Ts1, b.op("Unsqueeze", theta, ax1), h, contrast, E, axis=1)  # [N, P]
    raw3 = b.op("Unsqueeze", raw, ax1)  # [N, 1, P]
    lower = b.op("Concat", "physical_lower", "training_lower", axis=0)  # [2, P]
    upper = b.op("Concat", "physical_upper", "training_upper", axis=0)
    ok = b.op("And", b.op("GreaterOrEqual", raw3, lower), b.op("LessOrEqual", raw3, upper))
    bad = b.op("Reshape", b.op("Cast", b.op("Not", ok), to=b.elem),
               b.ints([0, -1]))  # [N, 2P]

    K = layout.n_components
    scores = b.op("MatMul", b.op("Mul", z1, z1), cols("novelty_scale", 0, K + 1, 0))  # [N, 1 + B]
    if layout.n_reconstruction_blocks:
        r = b.op("Gemm", X, cols("projection_weight", K + 1, 10**9, 1), cols("projection_offset", K + 1, 10**9, 0))
        scores = b.op("Add", scores, b.op("MatMul", b.op("Mul", r, r), cols("novelty_scale", K + 1, 10**9, 0)))
    # scores: ||z||^2 and per-block squared residuals, each over its training maximum
    novel = b.op("Cast", b.op("Greater", b.op("ReduceMax", scores, ax1, keepdims=1), "one"),
                 to=b.elem)  # [N, 1]
    if layout.n_tropopause_layers:
        novel = b.op("Max", novel, _tropopause_check(b, layout, T, Ts1, cols))
    hits = b.op("Min", b.op("MatMul", b.op("Concat", bad, novel, axis=1), "bounds_channel_map"),
                "one")  # [N, 3C]
    two = b.op("Gemm", hits, "flag_decode", "flag_decode_offset")  # [N, 2C]
    two = b.op("Reshape", two, b.ints([0, 2, layout.n_channels]))
    flag = b.op("ReduceMin", two, ax1, keepdims=0)
    b.op("Cast", flag, to=TensorProto.INT32, out="quality_flag")


def _tropopause_check(b: _Builder, layout: GraphLayout, T: str, Ts1: str, cols) -> str:
    """1 where the temperature at the lapse-rate tropopause is outside its training range [N, 1].

    As :func:`rtemu.atmosphere.lapse_rate_tropopause`: one MatMul picks T at the M search
    bases and at the tops of their two layers (``tropopause_pick`` [L, 3M], 0/1); a layer's
    mean lapse rate is at most 2 K/km where (T_b - T_t) - a (T_b + T_t) <= 0
    (``tropopause_factor`` [2M], :func:`rtemu.atmosphere.layer_lapse_factor`); ArgMax over
    the qualifying bases with a final always-1 column returns the first base, or M when
    none qualifies; the temperature there (0 at M) is compared with
    ``tropopause_lower`` / ``tropopause_upper`` [M + 1] of that base.
    """
    M = layout.n_tropopause_layers
    picked = b.op("MatMul", T, "tropopause_pick")  # [N, 3M]: base | next | deep
    base = cols(picked, 0, M, 1)
    base2 = b.op("Concat", base, base, axis=1)
    tops = cols(picked, M, 3 * M, 1)
    excess = b.op("Sub", b.op("Sub", base2, tops), b.op("Mul", b.op("Add", base2, tops), "tropopause_factor"))
    low = b.op("LessOrEqual", excess, b.const("zero_kelvin", 0.0))  # [N, 2M]
    both = b.op("And", cols(low, 0, M, 1), cols(low, M, 2 * M, 1))
    shape = b.op("Shape", Ts1)  # [N, 1]
    ones = b.op("Expand", b.const("one_column", [[1.0]]), shape)
    zeros = b.op("Expand", b.const("zero_column", [[0.0]]), shape)
    position = b.op("ArgMax", b.op("Concat", b.op("Cast", both, to=b.elem), ones, axis=1),
                    axis=1, keepdims=1, select_last_index=0)  # [N, 1] int64
    t_at = b.op("GatherElements", b.op("Concat", base, zeros, axis=1), position, axis=1)
    lower = b.op("Gather", "tropopause_lower", position)
    upper = b.op("Gather", "tropopause_upper", position)
    outside = b.op("Or", b.op("Less", t_at, lower), b.op("Greater", t_at, upper))
    return b.op("Cast", outside, to=b.elem)


def primary_shapes(layout: GraphLayout) -> dict[str, tuple[int, ...]]:
    """Names and shapes of the primary initializers of a bundle graph."""
    L, C, K, F, P = (layout.n_levels, layout.n_channels, layout.n_components,
                     layout.n_features, layout.n_bounded)
    R = layout.n_reconstruction_blocks * L
    h = layout.hidden
    shapes = {
        "projection_weight": (F, K + 1 + R),
        "projection_offset": (K + 1 + R,),
        "novelty_scale": (K + 1 + R, 1 + layout.n_reconstruction_blocks),
        "physical_lower": (1, P),
        "physical_upper": (1, P),
        "training_lower": (1, P),
        "training_upper": (1, P),
        "bounds_channel_map": (2 * P + 1, 3 * C),
        "flag_decode": (3 * C, 2 * C),
        "flag_decode_offset": (2 * C,),
        "linear_weight": (K + 1, C),
        "linear_emissivity_weight": (K + 1, C),
        "linear_zenith_weight": (K + 1, C),
        "feature_center": (F,),
        "humidity_floor": (),
        "log_pressure_minus_bolton_a": (L,),
        "layer1_weight": (C, K + 1, h[0]),
        "layer1_emissivity": (C, 1, h[0]),
        "output_weight": (C, h[-1], 1),
    }
    if layout.water_path:
        shapes["water_path_matrix"] = (L, L)
        shapes["water_path_floor"] = ()
    if layout.n_kernels:
        shapes["kernel_path_matrix"] = (L, L)
        P = layout.n_kernel_paths
        shapes["kernel_path_scale"] = (P, L)
        shapes["kernel_coefficients"] = (layout.n_kernel_terms, P)
        if layout.kernel_temperature_laws:
            shapes["kernel_temperature_exponent"] = (P, 1)
            shapes["kernel_reference_temperature"] = ()
        elif layout.n_band_kernels:
            shapes["kernel_dry_depth"] = (layout.n_kernel_terms, L)
        if layout.n_channel_kernels:
            shapes["kernel_combination"] = (layout.n_kernel_terms, layout.n_kernels)
        shapes["kernel_temperature_matrix"] = (L, L)
        shapes["kernel_surface_pick"] = (L, 1)
    for k in range(2, len(h) + 1):
        shapes[layer_weight_name(k)] = (C, h[k - 2], h[k - 1])
        shapes[layer_bias_name(k)] = (C, 1, h[k - 1])
    if layout.n_tropopause_layers:
        M = layout.n_tropopause_layers
        shapes.update({"tropopause_pick": (L, 3 * M), "tropopause_factor": (2 * M,),
                       "tropopause_lower": (M + 1,), "tropopause_upper": (M + 1,)})
    return shapes


def _inputs(layout: GraphLayout, elem) -> list:
    L, C = layout.n_levels, layout.n_channels
    shapes = {
        "air_temperature": ["N", L],
        "specific_humidity": ["N", L],
        "surface_temperature": ["N"],
        "surface_emissivity": ["N", C],
        "sensor_zenith_angle": ["N"],
    }
    return [helper.make_tensor_value_info(n, elem, shapes[n]) for n in INPUT_NAMES]


def _outputs(layout: GraphLayout, elem) -> list:
    L, C = layout.n_levels, layout.n_channels
    shapes = {
        "brightness_temperature": (elem, ["N", C]),
        "jacobian_air_temperature": (elem, ["N", C, L]),
        "jacobian_specific_humidity": (elem, ["N", C, L]),
        "jacobian_surface_temperature": (elem, ["N", C]),
        "jacobian_surface_emissivity": (elem, ["N", C]),
        "quality_flag": (TensorProto.INT32, ["N", C]),
    }
    return [helper.make_tensor_value_info(n, *shapes[n]) for n in OUTPUT_NAMES]


def bounds_channel_map(n_levels: int, n_channels: int) -> np.ndarray:
    """0/1 matrix [2P + 1, 3C] from violation indicators to per-channel hit counts [1].

    Rows: physical-range violations (P), training-range violations (P), novelty (1).
    Columns: invalid (C), outside (C), novel (C).
    """
    C = n_channels
    P = 3 * n_levels + 3 + C
    per_var = np.zeros((P, C))
    per_var[: P - C, :] = 1.0
    per_var[P - C:, :] = np.eye(C)
    out = np.zeros((2 * P + 1, 3 * C))
    out[:P, :C] = per_var
    out[P: 2 * P, C: 2 * C] = per_var
    out[2 * P, 2 * C:] = 1.0
    return out


def flag_decode(n_channels: int) -> tuple[np.ndarray, np.ndarray]:
    """Matrix [3C, 2C] and offset [2C] of the two flag candidates (see :func:`_flags`)."""
    C = n_channels
    eye, zero = np.eye(C), np.zeros((C, C))
    inv, out, nov = INVALID_INPUT, OUTSIDE_TRAINING_BOUNDS, NOVEL_STATE
    # candidate 1: out*2 + nov*4 - inv*(2 - 1); candidate 2: (2 + 4) - inv*(2 + 4 - 1)
    first = np.concatenate([(inv - out) * eye, out * eye, nov * eye], axis=0)
    second = np.concatenate([(inv - out - nov) * eye, zero, zero], axis=0)
    offset = np.concatenate([np.zeros(C), np.full(C, float(out + nov))])
    return np.concatenate([first, second], axis=1), offset


def runtime_nodes(model: onnx.ModelProto) -> list:
    """Nodes that depend on an input (the rest is folded to constants at session creation)."""
    const = {t.name for t in model.graph.initializer}
    live = []
    for node in model.graph.node:
        if all((i in const) or not i for i in node.input):
            const.update(node.output)
        else:
            live.append(node)
    return live
