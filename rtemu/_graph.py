"""Hand-built ONNX graph of an rtemu emulator bundle (format 7).

One graph computes, for all channels at once, the brightness temperatures, their exact
derivatives with respect to the inputs (reverse-mode differentiation of the very function
the graph evaluates, written out as nodes), the emulator's own uncertainty and the
quality-flag bitmask. Every weight a product needs transposed is stored transposed (no
Transpose node acts on an initializer).

Function evaluated (per profile; levels surface-first; see :mod:`rtemu.gray` and
:mod:`rtemu.training` for the model)::

    terrain     T, q at and below ps replaced by their value at ps (linear in ln p),
                p = min(p_grid, ps)                        (w [N, L] hats, m = p_grid >= ps)
    z           = ([T, ln max(q, q_f)] - x_ref) A + a0       shared compression [Kz]
    gray        tau, t, u per channel c and absorber k; R_ck, f_ck, g_ck, r_ck;
                R_c = sum_k w_ck R_ck;  BT_gray,c = b_c / ln(1 + 1/R_c) (one Newton step
                on B(BT) = R with B(T) = 1/expm1(b/T), expm1(x) = tanh(x/2)(exp(x) + 1))
    network     a1 = tanh(z W1z_c + (v_c - v0_c) W1v_c + b1_c),  v_c = [BT_gray, f, g, r, Ts,
                sec(theta), e_c];  a_k = tanh(a_k-1 W_k,c + b_k,c);  y_c = a_d w_out,c + y0_c
    BT_c        = BT_gray,c + y_c
    sigma_c     = s0_c + s1_c d,  d = max(sum z^2/var(z), |r_T|^2, |r_lnq|^2 over their limits)

Jacobian (chain rule, reverse order): g_d = w_out (1 - a_d^2), g_k-1 = (g_k W_k^T)(1 - a_k-1^2);
dy/dz = g_1 W1z^T, dy/dv = g_1 W1v^T; the gray part receives lR_ck = w_ck (1 + dy/dBT_gray) /
B'(BT_gray), lf = dy/df, lg = dy/dg, lr = dy/dr and returns dJ/dtau (:mod:`rtemu.gray`),
then through tau's ln T and ln q laws and the layer-mean Planck and temperature terms onto
the layer means and the levels; dy/dz A^T adds the compression's part; the terrain
collapse maps the gradient back: g(1 - m) + w sum(m g).

Batch invariance: the profiles are padded (edge values) to a multiple of ``BLOCK`` rows and
the outputs cut back, so that a profile's outputs do not depend on the batch it runs in
(onnxruntime takes another matrix-product path for a single row).
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import onnx
from onnx import TensorProto, helper

from rtemu import flags as _flags
from rtemu.gray import HUMIDITY_FLOOR, REFERENCE_PRESSURE_HPA, REFERENCE_TEMPERATURE_K

#: ONNX opset and IR version of the exported graph (onnxruntime >= 1.16 runs them).
OPSET = 19
IR_VERSION = 9
#: Rows the batch is padded to a multiple of.
BLOCK = 16

INPUT_NAMES = (
    "air_temperature",
    "specific_humidity",
    "surface_temperature",
    "surface_emissivity",
    "sensor_zenith_angle",
    "surface_air_pressure",
)
OUTPUT_NAMES = (
    "brightness_temperature",
    "jacobian_air_temperature",
    "jacobian_specific_humidity",
    "jacobian_surface_temperature",
    "jacobian_surface_emissivity",
    "brightness_temperature_uncertainty",
    "quality_flag",
)


@dataclasses.dataclass(frozen=True)
class GraphLayout:
    """Static shapes of a bundle graph."""

    n_levels: int
    n_channels: int
    n_components: int
    n_absorbers: int
    hidden: tuple[int, ...]
    n_tropopause_layers: int = 0

    @property
    def n_own_inputs(self) -> int:
        """Per-channel network inputs besides z: BT_gray, f, g, r (K each), Ts, sec, e."""
        return 1 + 3 * self.n_absorbers + 3

    @property
    def n_bounded(self) -> int:
        """Bounded profile scalars: T, q, h (L each), Ts, theta, Ts - T_0, ps."""
        return 3 * self.n_levels + 4


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


def build_model(layout: GraphLayout, arrays: dict[str, np.ndarray], *, dtype=np.float32) -> onnx.ModelProto:
    """Build the bundle graph from the assembled ``arrays`` (see :func:`primary_shapes`).

    ``dtype`` float64 builds the same function in double precision (the tests use it for
    precise finite-difference checks); bundles are float32.
    """
    b = _Builder(dtype)
    L, C, Kz, K = layout.n_levels, layout.n_channels, layout.n_components, layout.n_absorbers
    Lm, V, H1 = L - 1, layout.n_own_inputs, layout.hidden[0]
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
    ints = b.ints
    one, zero = b.const("one", 1.0), b.const("zero", 0.0)
    floor = b.const("humidity_floor", HUMIDITY_FLOOR)

    def cols(src, start, stop, axis):
        return b.op("Slice", src, ints(start), ints(stop), ints(axis))

    def unsq(src, *axes):
        return b.op("Unsqueeze", src, ints(list(axes)))

    axis1 = b.const("axis_1", 1, dtype=np.int64)  # CumSum takes its axis as a scalar

    def rsum(src, axis, keep=0):
        return b.op("ReduceSum", src, ints(axis), keepdims=keep)

    # ---- pad the batch to a multiple of BLOCK rows (edge copies), cut back at the end
    n = b.op("Shape", "air_temperature", start=0, end=1)
    block = ints(BLOCK)
    extra = b.op("Mod", b.op("Sub", block, b.op("Mod", n, block)), block)
    zero1 = ints(0)
    pads2 = b.op("Concat", zero1, zero1, extra, zero1, axis=0)
    pads1 = b.op("Concat", zero1, extra, axis=0)
    T0, q0, Ts, E, theta, ps = (b.op("Pad", name, pads2 if name in ("air_temperature", "specific_humidity",
                                                                      "surface_emissivity") else pads1, mode="edge")
                                for name in INPUT_NAMES)

    # ---- terrain: hats in ln p, collapse mask, T and q at ps, p = min(p_grid, ps)
    ps1 = unsq(ps, 1)  # [N, 1]
    xs = b.op("Log", ps1)
    rise = b.op("Div", b.op("Sub", xs, "hat_up_level"), "hat_up_width")
    fall = b.op("Div", b.op("Sub", "hat_down_level", xs), "hat_down_width")
    w_s = b.op("Clip", b.op("Min", rise, fall), zero, one)  # [N, L]
    below = b.op("Cast", b.op("GreaterOrEqual", "pressure_grid", ps1), to=b.elem)  # m [N, L]
    keep = b.op("Sub", one, below)

    def collapse(v):
        at_s = rsum(b.op("Mul", w_s, v), [1], keep=1)
        return b.op("Add", b.op("Mul", v, keep), b.op("Mul", below, at_s))

    T, q = collapse(T0), collapse(q0)
    p = b.op("Min", "pressure_grid", ps1)  # [N, L]

    # ---- shared compression
    q_c = b.op("Max", q, floor)
    ln_q = b.op("Log", q_c)
    x = b.op("Sub", b.op("Concat", T, ln_q, axis=1), "compression_center")
    z = b.op("Add", b.op("MatMul", x, "compression_projection"), "compression_offset")  # [N, Kz]

    # ---- gray absorbers, tensors [N, Lm, A] over the A = C K absorbers (channel-major);
    # every element-wise product is between equal shapes or against a trailing vector or a
    # per-row scalar (onnxruntime's other broadcasts are slow)
    A = C * K
    tm = b.op("MatMul", T, "layer_mean")  # [N, Lm]
    qm_c = b.op("Max", b.op("MatMul", q, "layer_mean"), floor)
    pm = b.op("MatMul", p, "layer_mean")
    sec = b.op("Reciprocal", b.op("Cos", b.op("Mul", theta, b.const("degree", math.pi / 180.0))))
    path = b.op("Mul", b.op("MatMul", p, "layer_thickness"), b.op("Mul", unsq(sec, 1),
                                                                   b.const("inv_p0", 1.0 / REFERENCE_PRESSURE_HPA)))
    path3 = unsq(path, 2)  # [N, Lm, 1]
    phi = b.op("Concat", unsq(b.op("Log", b.op("Mul", pm, b.const("inv_p0_b", 1.0 / REFERENCE_PRESSURE_HPA))), 2),
               unsq(b.op("Log", b.op("Mul", tm, b.const("inv_t0", 1.0 / REFERENCE_TEMPERATURE_K))), 2),
               unsq(b.op("Log", qm_c), 2), axis=2)  # [N, Lm, 3]
    expo = b.op("Add", b.op("MatMul", phi, "gray_exponent"), "gray_log_k")  # [N, Lm, 3 A], term-major
    k_dry, k_line, k_cont = b.op_multi("Split", [b.op("Exp", expo), ints([A, A, A])], 3, axis=2)
    tau = b.op("Mul", b.op("Add", b.op("Add", k_dry, k_line), k_cont), path3)  # [N, Lm, A]
    c_in = b.op("CumSum", tau, axis1, reverse=1)
    c_ex = b.op("Sub", c_in, tau)
    c0 = cols(c_in, 0, 1, 1)  # [N, 1, A]
    two_c0 = b.op("Add", c0, c0)
    t_lo, t_hi = b.op("Exp", b.op("Neg", c_in)), b.op("Exp", b.op("Neg", c_ex))
    u_lo, u_hi = b.op("Exp", b.op("Sub", c_in, two_c0)), b.op("Exp", b.op("Sub", c_ex, two_c0))
    dt, du = b.op("Sub", t_hi, t_lo), b.op("Sub", u_lo, u_hi)
    t0 = b.op("Squeeze", cols(t_lo, 0, 1, 1), ints(1))  # [N, A]

    def planck(temp, b_c):  # B = 1 / expm1(b/T), B' = B (B + 1) b / T^2
        xx = b.op("Div", b_c, temp)
        em1 = b.op("Mul", b.op("Tanh", b.op("Mul", xx, b.const(f"half_{b._count}", 0.5))),
                   b.op("Add", b.op("Exp", xx), one))
        rad = b.op("Reciprocal", em1)
        slope = b.op("Div", b.op("Mul", b.op("Mul", rad, b.op("Add", rad, one)), xx), temp)
        return rad, slope

    # 0/1 [C, A]: each absorber's channel (a product by it is faster than a Gather on the last axis)
    owner = b.const("absorber_channel", np.repeat(np.eye(C), K, axis=1))

    def per_absorber(v, axis):  # [.., C] -> [.., A]
        return b.op("MatMul", v, owner)

    def per_channel(v):  # [N, A] -> [N, C]: sum over each channel's absorbers
        return rsum(b.op("Reshape", v, ints([0, C, K])), [2])

    tm3 = unsq(tm, 2)
    B, dB = planck(tm3, "planck_b")  # [N, Lm, C]
    B_a, dB_a = per_absorber(B, 2), per_absorber(dB, 2)  # [N, Lm, A]
    Ts1 = unsq(Ts, 1)
    Bs, dBs = planck(Ts1, "planck_b")  # [N, C]
    Bs_a, dBs_a, E_a = per_absorber(Bs, 1), per_absorber(dBs, 1), per_absorber(E, 1)  # [N, A]
    refl_a = b.op("Sub", one, E_a)
    UB, VB = rsum(b.op("Mul", B_a, dt), [1]), rsum(b.op("Mul", B_a, du), [1])  # [N, A]
    UT, VT = rsum(b.op("Mul", tm3, dt), [1]), rsum(b.op("Mul", tm3, du), [1])
    Ra = b.op("Add", b.op("Add", b.op("Mul", b.op("Mul", E_a, Bs_a), t0), UB), b.op("Mul", refl_a, VB))
    R = per_channel(b.op("Mul", Ra, "absorber_weight"))  # [N, C]
    bt0 = b.op("Div", "planck_b", b.op("Log", b.op("Add", one, b.op("Reciprocal", R))))
    B0, dB0 = planck(bt0, "planck_b")
    bt_gray = b.op("Sub", bt0, b.op("Div", b.op("Sub", B0, R), dB0))
    f_a = b.op("Add", UT, b.op("Mul", Ts1, t0))

    def by_channel(v):  # [N, A] -> [N, C, K]
        return b.op("Reshape", v, ints([0, C, K]))

    f, t0_c, VT_c = by_channel(f_a), by_channel(t0), by_channel(VT)
    E3 = unsq(E, 2)  # [N, C, 1]
    Ts3 = unsq(Ts1, 2)  # [N, 1, 1]

    # ---- networks, channel-major [C, N, H]
    shape_nc1 = b.op("Concat", n_pad := b.op("Shape", Ts, start=0, end=1), ints([C, 1]), axis=0)
    own = b.op("Concat", unsq(bt_gray, 2), f, t0_c, VT_c, b.op("Expand", Ts3, shape_nc1),
               b.op("Expand", unsq(sec, 1, 2), shape_nc1), E3, axis=2)  # [N, C, V]
    own_c = b.op("Sub", b.op("Transpose", own, perm=[1, 0, 2]), "own_center")  # [C, N, V]
    pre_z = b.op("Transpose", b.op("Reshape", b.op("MatMul", z, "layer1_z"), ints([0, C, H1])), perm=[1, 0, 2])
    acts = [b.op("Tanh", b.op("Add", b.op("Add", pre_z, b.op("MatMul", own_c, "layer1_own")), "layer1_bias"))]
    for k in range(2, depth + 1):
        acts.append(b.op("Tanh", b.op("Add", b.op("MatMul", acts[-1], f"layer{k}_weight"), f"layer{k}_bias")))
    y = b.op("Transpose", b.op("Squeeze", b.op("MatMul", acts[-1], "output_weight"), ints(2)), perm=[1, 0])
    bt = b.op("Add", bt_gray, b.op("Add", y, "output_offset"))

    # ---- reverse mode
    g = b.op("Mul", b.op("Sub", one, b.op("Mul", acts[-1], acts[-1])), "output_weight_row")
    for k in range(depth, 1, -1):
        a = acts[k - 2]
        g = b.op("Mul", b.op("MatMul", g, f"layer{k}_weight_t"), b.op("Sub", one, b.op("Mul", a, a)))
    d_z = b.op("Transpose", b.op("MatMul", g, "layer1_z_t"), perm=[1, 0, 2])  # [N, C, Kz]
    d_own = b.op("Transpose", b.op("MatMul", g, "layer1_own_t"), perm=[1, 0, 2])  # [N, C, V]
    d_bt_gray, d_f, d_g, d_r, d_ts, _, d_e = b.op_multi("Split", [d_own, ints([1, K, K, K, 1, 1, 1])], 7, axis=2)
    flat = ints([0, A])
    lam_r = b.op("Mul", b.op("Reshape", b.op("Expand", b.op("Div", b.op("Add", d_bt_gray, one), unsq(dB0, 2)),
                                              b.op("Concat", n_pad, ints([C, K]), axis=0)), flat),
                 "absorber_weight")  # [N, A]
    d_f, d_g, d_r = (b.op("Reshape", v, flat) for v in (d_f, d_g, d_r))

    def l3(v):  # [N, A] -> [N, 1, A]
        return unsq(v, 1)

    X = b.op("Add", b.op("Mul", l3(lam_r), B_a), b.op("Mul", l3(d_f), tm3))
    lam_refl = b.op("Mul", lam_r, refl_a)
    Y = b.op("Add", b.op("Mul", l3(lam_refl), B_a), b.op("Mul", l3(d_r), tm3))
    Vsum = b.op("Add", b.op("Mul", lam_refl, VB), b.op("Mul", d_r, VT))
    S = b.op("Add", b.op("Add", b.op("Mul", lam_r, b.op("Mul", E_a, Bs_a)), b.op("Mul", d_f, Ts1)), d_g)
    inc = b.op("CumSum", b.op("Add", b.op("Mul", t_lo, X), b.op("Mul", u_lo, Y)), axis1)
    exc = b.op("CumSum", b.op("Add", b.op("Mul", t_hi, X), b.op("Mul", u_hi, Y)), axis1, exclusive=1)
    const = b.op("Neg", b.op("Add", b.op("Add", Vsum, Vsum), b.op("Mul", S, t0)))
    h_tau = b.op("Mul", b.op("Add", b.op("Sub", inc, exc), l3(const)), path3)  # dJ/dtau * path [N, Lm, A]
    # d tau / d ln T and d ln q per unit path: sum over the terms of n_g k_g and m_g k_g
    k_lnt = b.op("Add", b.op("Add", b.op("Mul", k_dry, "gray_temperature_exponent_dry"),
                             b.op("Mul", k_line, "gray_temperature_exponent_line")),
                 b.op("Mul", k_cont, "gray_temperature_exponent_continuum"))
    k_lnq = b.op("Add", k_line, b.op("Add", k_cont, k_cont))
    direct = b.op("Add", b.op("Mul", l3(lam_r), b.op("Mul", dB_a, b.op("Add", dt, b.op("Mul", l3(refl_a), du)))),
                  b.op("Add", b.op("Mul", l3(d_f), dt), b.op("Mul", l3(d_r), du)))
    g_tm = b.op("Add", direct, b.op("Div", b.op("Mul", h_tau, k_lnt), tm3))
    q_on = b.op("Cast", b.op("Greater", b.op("MatMul", q, "layer_mean"), floor), to=b.elem)
    g_qm = b.op("Mul", b.op("Div", b.op("Mul", h_tau, k_lnq), unsq(qm_c, 2)), unsq(q_on, 2))
    g_layers = rsum(b.op("Reshape", b.op("Concat", g_tm, g_qm, axis=2), ints([0, Lm, 2 * C, K])), [3])
    g_levels = b.op("MatMul", b.op("Transpose", g_layers, perm=[0, 2, 1]), "layer_mean_t")  # [N, 2C, L]
    gT_gray, gq_gray = b.op_multi("Split", [g_levels, ints([C, C])], 2, axis=1)
    d_x = b.op("MatMul", d_z, "compression_projection_t")  # [N, C, 2L]
    dT_z, dlnq_z = b.op_multi("Split", [d_x, ints([L, L])], 2, axis=2)
    q_live = b.op("Cast", b.op("Greater", q, floor), to=b.elem)
    dq_z = b.op("Mul", b.op("Div", dlnq_z, unsq(q_c, 1)), unsq(q_live, 1))
    gT, gq = b.op("Add", gT_gray, dT_z), b.op("Add", gq_gray, dq_z)

    def uncollapse(grad):  # g (1 - m) + w sum(m g)
        moved = rsum(b.op("Mul", grad, unsq(below, 1)), [2], keep=1)
        return b.op("Add", b.op("Mul", grad, unsq(keep, 1)), b.op("Mul", moved, unsq(w_s, 1)))

    n_rows = n
    outputs = {}
    outputs["brightness_temperature"] = bt
    outputs["jacobian_air_temperature"] = uncollapse(gT)
    outputs["jacobian_specific_humidity"] = uncollapse(gq)
    d_ts_gray = per_channel(b.op("Mul", t0, b.op("Add", b.op("Mul", lam_r, b.op("Mul", E_a, dBs_a)), d_f)))
    outputs["jacobian_surface_temperature"] = b.op("Add", d_ts_gray, b.op("Squeeze", d_ts, ints(2)))
    d_e_gray = per_channel(b.op("Mul", lam_r, b.op("Sub", b.op("Mul", Bs_a, t0), VB)))
    outputs["jacobian_surface_emissivity"] = b.op("Add", d_e_gray, b.op("Squeeze", d_e, ints(2)))

    # ---- uncertainty and flags
    zz = b.op("MatMul", b.op("Mul", z, z), "novelty_scale")  # [N, 1]
    r = b.op("Add", b.op("MatMul", x, "reconstruction"), "reconstruction_offset")
    rr = b.op("MatMul", b.op("Mul", r, r), "reconstruction_scale")  # [N, 2]
    d = b.op("ReduceMax", b.op("Concat", zz, rr, axis=1), ints(1), keepdims=1)  # [N, 1]
    sigma = b.op("Add", b.op("Mul", d, "sigma_slope"), "sigma_offset")
    outputs["brightness_temperature_uncertainty"] = sigma
    outputs["quality_flag"] = _flags_node(b, layout, T0, q0, T, q, ln_q, Ts1, theta, ps1, E, d, sigma, cols)
    for name in OUTPUT_NAMES:
        b.op("Slice", outputs[name], ints(0), n_rows, ints(0), out=name)

    inputs, outs = _io(layout, b.elem)
    inits = [onnx.numpy_helper.from_array(v, k) for k, v in b.initializers.items()]
    graph = helper.make_graph(b.nodes, "rtemu_emulator", inputs, outs, inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)], producer_name="rtemu")
    model.ir_version = IR_VERSION
    return model


def _flags_node(b, layout, T0, q0, T, q, ln_q, Ts1, theta, ps1, E, d, sigma, cols) -> str:
    """Quality flag bitmask [N, C] int32, one bit per test (bits from rtemu.flags).

    invalid_input: an input outside its physical range (T, q, Ts, theta, ps and e) or NaN;
    outside_training_bounds: the terrain-collapsed T, q, the humidity index
    h = ln q + 17.67 * 243.5 / (T - 29.65) + ln p - 17.67 = ln(RH) + const (Bolton 1980, eq. 10),
    Ts, theta, Ts - T_0, ps or e_c outside the training range; novel_state: d > 1;
    large_uncertainty: sigma above the recipe's threshold; unusual_tropopause: the
    temperature at the lapse-rate tropopause outside its training range.
    """
    ax1 = b.ints([1])
    h = b.op("Add", b.op("Add", ln_q, b.op("Div", b.const("bolton_b", 17.67 * 243.5),
                                             b.op("Sub", T, b.const("bolton_c", 29.65)))),
             "log_pressure_minus_bolton_a")
    contrast = b.op("Sub", Ts1, cols(T, 0, 1, 1))
    theta1 = b.op("Unsqueeze", theta, ax1)

    def outside(values, lower, upper):  # 1 where any value is outside [lower, upper] or NaN [N, 1]
        ok = b.op("And", b.op("GreaterOrEqual", values, lower), b.op("LessOrEqual", values, upper))
        return b.op("Cast", b.op("Not", ok), to=b.elem)

    raw = b.op("Concat", T0, q0, h, Ts1, theta1, contrast, ps1, axis=1)
    seen = b.op("Concat", T, q, h, Ts1, theta1, contrast, ps1, axis=1)
    inv = b.op("Max", b.op("ReduceMax", outside(raw, "physical_lower", "physical_upper"), ax1, keepdims=1),
               outside(E, b.const("e_min", [[0.0]]), b.const("e_max", [[1.0]])))  # [N, C]
    out = b.op("Max", b.op("ReduceMax", outside(seen, "training_lower", "training_upper"), ax1, keepdims=1),
               outside(E, "emissivity_lower", "emissivity_upper"))
    nov = b.op("Cast", b.op("Greater", d, "one"), to=b.elem)
    unc = b.op("Cast", b.op("Greater", sigma, "sigma_threshold"), to=b.elem)
    terms = [(inv, _flags.INVALID_INPUT), (out, _flags.OUTSIDE_TRAINING_BOUNDS), (nov, _flags.NOVEL_STATE),
             (unc, _flags.LARGE_UNCERTAINTY)]
    if layout.n_tropopause_layers:
        terms.append((_tropopause_check(b, layout, T, Ts1, cols), _flags.UNUSUAL_TROPOPAUSE))
    total = None
    for value, bit in terms:
        term = b.op("Mul", value, b.const(f"bit_{bit}", float(bit)))
        total = term if total is None else b.op("Add", total, term)
    shape = b.op("Shape", E)
    return b.op("Cast", b.op("Expand", total, shape), to=TensorProto.INT32)


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
    """Names and shapes of the initializers of a bundle graph."""
    L, C, Kz, K, h = layout.n_levels, layout.n_channels, layout.n_components, layout.n_absorbers, layout.hidden
    Lm, V, P = L - 1, layout.n_own_inputs, layout.n_bounded
    shapes = {
        "pressure_grid": (L,),
        "hat_up_level": (L,), "hat_up_width": (L,), "hat_down_level": (L,), "hat_down_width": (L,),
        "layer_mean": (L, Lm), "layer_mean_t": (Lm, L), "layer_thickness": (L, Lm),
        "compression_center": (2 * L,), "compression_projection": (2 * L, Kz), "compression_offset": (Kz,),
        "compression_projection_t": (Kz, 2 * L),
        "reconstruction": (2 * L, 2 * L), "reconstruction_offset": (2 * L,),
        "novelty_scale": (Kz, 1), "reconstruction_scale": (2 * L, 2),
        "gray_exponent": (3, 3 * C * K), "gray_log_k": (3 * C * K,),
        "gray_temperature_exponent_dry": (C * K,), "gray_temperature_exponent_line": (C * K,),
        "gray_temperature_exponent_continuum": (C * K,),
        "absorber_weight": (C * K,), "planck_b": (C,),
        "layer1_z": (Kz, C * h[0]), "layer1_z_t": (C, h[0], Kz),
        "layer1_own": (C, V, h[0]), "layer1_own_t": (C, h[0], V), "layer1_bias": (C, 1, h[0]),
        "own_center": (C, 1, V),
        "output_weight": (C, h[-1], 1), "output_weight_row": (C, 1, h[-1]), "output_offset": (C,),
        "sigma_offset": (C,), "sigma_slope": (C,), "sigma_threshold": (C,),
        "physical_lower": (1, P), "physical_upper": (1, P), "training_lower": (1, P), "training_upper": (1, P),
        "emissivity_lower": (1, C), "emissivity_upper": (1, C),
        "log_pressure_minus_bolton_a": (L,),
    }
    for k in range(2, len(h) + 1):
        shapes[f"layer{k}_weight"] = (C, h[k - 2], h[k - 1])
        shapes[f"layer{k}_weight_t"] = (C, h[k - 1], h[k - 2])
        shapes[f"layer{k}_bias"] = (C, 1, h[k - 1])
    if layout.n_tropopause_layers:
        M = layout.n_tropopause_layers
        shapes.update({"tropopause_pick": (L, 3 * M), "tropopause_factor": (2 * M,),
                       "tropopause_lower": (M + 1,), "tropopause_upper": (M + 1,)})
    return shapes


def _io(layout: GraphLayout, elem) -> tuple[list, list]:
    L, C = layout.n_levels, layout.n_channels
    ins = {"air_temperature": ["N", L], "specific_humidity": ["N", L], "surface_temperature": ["N"],
           "surface_emissivity": ["N", C], "sensor_zenith_angle": ["N"], "surface_air_pressure": ["N"]}
    outs = {"brightness_temperature": (elem, ["N", C]), "jacobian_air_temperature": (elem, ["N", C, L]),
            "jacobian_specific_humidity": (elem, ["N", C, L]), "jacobian_surface_temperature": (elem, ["N", C]),
            "jacobian_surface_emissivity": (elem, ["N", C]),
            "brightness_temperature_uncertainty": (elem, ["N", C]), "quality_flag": (TensorProto.INT32, ["N", C])}
    return ([helper.make_tensor_value_info(n, elem, ins[n]) for n in INPUT_NAMES],
            [helper.make_tensor_value_info(n, *outs[n]) for n in OUTPUT_NAMES])


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
