"""Figures of the audit report (PNG bytes; matplotlib's Agg canvas, never pyplot).

Figures are built on :class:`matplotlib.figure.Figure` directly, so no global backend is
switched and nothing is left open in a pyplot registry.
"""

from __future__ import annotations

import io
import math

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

_DPI = 100
_PROFILE_COLOURS = {"dry": "tab:orange", "median": "tab:green", "moist": "tab:blue"}
_PASS_COLOUR, _FAIL_COLOUR, _NONE_COLOUR = "tab:green", "tab:red", "0.6"
#: At most this many points per panel in scatter plots [1].
MAX_SCATTER_POINTS = 4000
#: Column-water bins of the binned lines in the error-against-TCWV figure [kg m-2].
_TCWV_STEP = 5.0


def _png(fig: Figure) -> bytes:
    FigureCanvasAgg(fig)
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=_DPI)
    return buffer.getvalue()


def _grid(n_panels: int, panel_w: float = 3.2, panel_h: float = 2.6, extra_h: float = 0.8):
    ncols = min(n_panels, 4 if n_panels <= 16 else 6)
    nrows = math.ceil(n_panels / ncols)
    fig = Figure(figsize=(panel_w * ncols, panel_h * nrows + extra_h), layout="constrained")
    axes = fig.subplots(nrows, ncols, squeeze=False).ravel()
    for ax in axes[n_panels:]:
        ax.set_visible(False)
    return fig, axes[:n_panels]


def rmse_over_noise(summary: dict) -> bytes:
    """Bar chart: emulator RMSE / noise per channel, with the threshold line."""
    ids = list(summary["channels"])
    ratio = np.array([_nan(summary["channels"][c]["rmse_over_noise"]) for c in ids])
    colours = [{"pass": _PASS_COLOUR, "fail": _FAIL_COLOUR}.get(summary["channels"][c]["verdict"], _NONE_COLOUR)
               for c in ids]
    fig = Figure(figsize=(max(6.0, 0.5 * len(ids) + 2.0), 4.2), layout="constrained")
    ax = fig.subplots()
    x = np.arange(len(ids))
    heights = np.nan_to_num(ratio)
    bars = ax.bar(x, heights, color=colours)
    ax.bar_label(bars, labels=[_txt(r, ".2f") for r in ratio], fontsize=7, padding=1)
    threshold = summary["threshold"]
    ax.axhline(threshold, color="k", ls="--", lw=1.2)
    finite = ratio[np.isfinite(ratio) & (ratio > 0)]
    if finite.size and finite.max() > 20.0 * threshold:
        from matplotlib.ticker import FuncFormatter

        ax.set_yscale("log")  # one wild channel would flatten the rest against the threshold
        ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
    ax.set_xticks(x, ids, rotation=45, ha="right")
    ax.set_ylabel("emulator RMSE / instrument noise [1]")
    ax.set_xlabel("channel")
    ax.set_title(f"{summary['instrument']}: emulator RMSE relative to noise, {summary['profiles']} test "
                 f"profiles\n(dashed: threshold {threshold:g}; green pass at or below it, red fail, grey no data)")
    ax.grid(axis="y", alpha=0.3)
    return _png(fig)


def _nan(value):
    return math.nan if value is None else float(value)


def error_histograms(collected, summary: dict, channels) -> bytes:
    """Histogram of emulated - physical BT per channel (unflagged entries)."""
    fig, axes = _grid(len(channels))
    use = ~collected.flagged & np.isfinite(collected.bt_error)
    for c, (ax, cid) in enumerate(zip(axes, channels)):
        d = collected.bt_error[use[:, c], c]
        s = summary["channels"][cid]
        noise = s["noise_k"]
        if d.size:
            # A robust range: a few wild errors would otherwise squash the core into one bin.
            span = max(float(np.quantile(np.abs(d), 0.995)) * 1.1, 2.0 * noise)
            outside = int(np.sum(np.abs(d) > span))
            ax.hist(np.clip(d, -span, span), bins=np.linspace(-span, span, 41), color="tab:blue", alpha=0.8)
            if outside:
                ax.text(0.02, 0.97, f"{outside} beyond ±{span:.3g} K\n(in the end bins)", transform=ax.transAxes,
                        va="top", ha="left", fontsize=7, color="0.25")
        ax.axvline(0.0, color="k", lw=0.8)
        for sign in (-1.0, 1.0):
            ax.axvline(sign * noise, color="tab:red", ls=":", lw=1.2)
        ax.set_title(f"{cid}  bias {_txt(s['bias_k'], '+.3f')} K, RMSE {_txt(s['rmse_k'], '.3f')} K",
                     fontsize=9)
        ax.set_xlabel("emulated − physical BT [K]")
        ax.set_ylabel("entries [count]")
    fig.suptitle("Brightness-temperature error of the emulator (dotted: ± instrument noise)")
    return _png(fig)


def _txt(value, spec):
    return "–" if value is None or not math.isfinite(value) else format(value, spec)


def error_vs_tcwv(collected, summary: dict, channels, rng_seed: int = 0) -> bytes:
    """Per channel: BT error against column water, with binned bias and RMSE."""
    fig, axes = _grid(len(channels))
    use = ~collected.flagged & np.isfinite(collected.bt_error) & np.isfinite(collected.tcwv)[:, None]
    top = np.nanmax(collected.tcwv) if np.isfinite(collected.tcwv).any() else _TCWV_STEP
    edges = np.arange(0.0, top + _TCWV_STEP, _TCWV_STEP)
    rng = np.random.default_rng(rng_seed)
    for c, (ax, cid) in enumerate(zip(axes, channels)):
        rows = np.flatnonzero(use[:, c])
        if rows.size > MAX_SCATTER_POINTS:
            shown = np.sort(rng.choice(rows, MAX_SCATTER_POINTS, replace=False))
        else:
            shown = rows
        x, y = collected.tcwv[rows], collected.bt_error[rows, c]
        ax.scatter(collected.tcwv[shown], collected.bt_error[shown, c], s=3, alpha=0.3,
                   color="0.45", rasterized=True, label="entries")
        centres, bias, rmse = [], [], []
        for lo, hi in zip(edges[:-1], edges[1:]):
            inside = (x > lo) & (x <= hi) if lo > 0 else (x >= lo) & (x <= hi)
            if inside.sum() >= 5:  # fewer points make a bin statistic noise
                centres.append(0.5 * (lo + hi))
                bias.append(y[inside].mean())
                rmse.append(math.sqrt(np.mean(y[inside] ** 2)))
        ax.plot(centres, bias, color="tab:blue", marker="o", ms=3, label="bias")
        ax.plot(centres, rmse, color="tab:red", marker="s", ms=3, label="RMSE")
        ax.axhline(0.0, color="k", lw=0.8)
        ax.set_title(cid, fontsize=9)
        ax.set_xlabel("total column water vapour [kg m-2]")
        ax.set_ylabel("emulated − physical BT [K]")
    if len(channels):
        handles, labels = axes[0].get_legend_handles_labels()
        fig.legend(handles, labels, loc="outside lower center", ncols=3)
    fig.suptitle(f"Emulator error against column water (bias and RMSE in {_TCWV_STEP:g} kg m-2 bins "
                 "with ≥ 5 entries)")
    return _png(fig)


def jacobian_profiles(examples: dict, channels, which: str) -> bytes:
    """Physical (wide, pale) and emulated (thin, dashed) Jacobians of typical profiles.

    ``which`` is ``"t"`` (dBT/dT [K K-1]) or ``"q"`` (dBT/dln q = q dBT/dq [K], as the
    audit compares them). Each panel title gives the largest relative error
    ||K_e - K_p|| / ||K_p|| of the profiles shown.
    """
    from matplotlib.lines import Line2D
    from matplotlib.ticker import FixedLocator, FuncFormatter, MaxNLocator, NullLocator

    fig, axes = _grid(len(channels), panel_w=3.0, panel_h=3.2)
    unit = "K K-1" if which == "t" else "K"
    symbol = "∂BT/∂T" if which == "t" else "∂BT/∂ln q"
    p_all = np.concatenate([ex["pressure_hpa"] for ex in examples.values()])
    p_ticks = [t for t in (1000, 500, 200, 100, 50, 20, 10, 5, 2, 1, 0.5, 0.2, 0.1)
               if p_all.min() <= t <= p_all.max()]
    for c, (ax, cid) in enumerate(zip(axes, channels)):
        worst = 0.0
        # One power of ten per panel from both curves, so that no offset text is needed.
        factor, prefix = _power_of_ten(np.concatenate(
            [ex[f"{kind}_{which}"][c] for ex in examples.values() for kind in ("physical", "emulated")]))
        for label, ex in examples.items():
            colour = _PROFILE_COLOURS.get(label, None)
            p = ex["pressure_hpa"]
            phys, emu = ex[f"physical_{which}"][c], ex[f"emulated_{which}"][c]
            ax.plot(phys * factor, p, color=colour, lw=3.5, alpha=0.45, solid_capstyle="butt")
            ax.plot(emu * factor, p, color=colour, lw=1.1, ls="--")
            norm = np.linalg.norm(phys)
            if norm > 0:
                worst = max(worst, float(np.linalg.norm(emu - phys) / norm))
        ax.set_yscale("log")
        ax.set_ylim(p_all.max(), p_all.min())  # surface at the bottom, top of atmosphere up
        ax.yaxis.set_major_locator(FixedLocator(p_ticks))
        ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
        ax.yaxis.set_minor_locator(NullLocator())
        ax.xaxis.set_major_locator(MaxNLocator(4))
        ax.xaxis.get_major_formatter().set_useOffset(False)
        ax.axvline(0.0, color="k", lw=0.6)
        ax.set_title(f"{cid}  (max rel. error {_relative(worst)})", fontsize=9)
        ax.set_xlabel(f"{symbol} [{prefix}{unit}]")
        ax.set_ylabel("pressure [hPa]")
    handles = [Line2D([], [], color=_PROFILE_COLOURS.get(k), lw=3.5, alpha=0.45,
                      label=f"{k} ({ex['tcwv']:.1f} kg m-2)") for k, ex in examples.items()]
    handles += [Line2D([], [], color="0.3", lw=3.5, alpha=0.45, label="physical"),
                Line2D([], [], color="k", lw=1.1, ls="--", label="emulated")]
    fig.legend(handles=handles, loc="outside lower center", ncols=len(handles))
    name = "Air-temperature" if which == "t" else "Humidity (per ln q)"
    fig.suptitle(f"{name} Jacobians of typical profiles (dry, median, moist by total column water vapour)")
    return _png(fig)


def _relative(value: float) -> str:
    """A relative error as a plain ratio [1], the same unit at every size (0.0227, 1.19e+04)."""
    return f"{value:.3g}"


def _power_of_ten(values) -> tuple[float, str]:
    """(factor, label prefix) bringing the largest |value| into 0.01 .. 1000 for tick labels."""
    values = np.asarray(values, dtype=float)
    values = values[np.isfinite(values)]
    biggest = float(np.max(np.abs(values))) if values.size else 0.0
    if biggest == 0.0:
        return 1.0, ""
    exponent = math.floor(math.log10(biggest))
    if -2 <= exponent <= 2:
        return 1.0, ""
    return 10.0 ** (-exponent), f"$10^{{{exponent}}}$ "


def render_all(collected, summary: dict, examples: dict, channels) -> dict:
    """{file name: PNG bytes} of every audit figure."""
    figures = {
        "rmse_over_noise.png": rmse_over_noise(summary),
        "error_histograms.png": error_histograms(collected, summary, channels),
        "error_vs_tcwv.png": error_vs_tcwv(collected, summary, channels),
    }
    if examples:
        figures["jacobians_temperature.png"] = jacobian_profiles(examples, channels, "t")
        figures["jacobians_humidity.png"] = jacobian_profiles(examples, channels, "q")
    return figures
