"""Figures of ``rtemu demo``: retrieved profiles and departures (matplotlib, Agg)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from rtemu._io import atomic_path


def _save(fig, path: Path) -> str:
    with atomic_path(path, suffix=".png.partial") as tmp:
        fig.savefig(tmp, format="png", dpi=110, bbox_inches="tight")
    return path.name


def demo_figures(out: Path, physical, truth, background, analyses: dict, observations) -> list[str]:
    """Write the demo figures into ``out``; return their file names."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    names = []
    p = truth["air_pressure"].values
    # The column where the background is worst in the troposphere: the retrieval shows most.
    trop = p > 100.0
    err = background["air_temperature"].values[:, trop] - truth["air_temperature"].values[:, trop]
    col = int(np.argmax(np.sqrt(np.mean(err**2, axis=1))))
    fig, axes = plt.subplots(1, 2, figsize=(10, 6), sharey=True)
    styles = {"emulator": ("tab:red", "-"), "physics": ("tab:blue", "--")}
    for ax, name, transform, unit in (
        (axes[0], "air_temperature", lambda x: x, "K"),
        (axes[1], "specific_humidity", np.log, "1"),
    ):
        t = transform(truth[name].values[col])
        ax.plot(transform(background[name].values[col]) - t, p, color="0.5", lw=2, label="background")
        for key, analysis in analyses.items():
            color, ls = styles[key]
            ax.plot(transform(analysis[name].values[col]) - t, p, color=color, ls=ls, lw=1.5,
                    label=f"1D-Var analysis ({key})")
        ax.axvline(0.0, color="k", lw=0.8)
        ax.set_yscale("log")
        ax.set_ylim(p.max(), p.min())
        ax.grid(alpha=0.3)
    axes[0].set_xlabel("temperature minus truth [K]")
    axes[1].set_xlabel("ln(specific humidity) minus truth [1]")
    axes[0].set_ylabel("pressure [hPa]")
    axes[0].legend(loc="upper left", fontsize=8)
    fig.suptitle(f"Retrieved profile against truth, column {col} (invented scenario)")
    names.append(_save(fig, out / "retrieved_profile.png"))
    plt.close(fig)

    obs = observations.values
    before = obs - physical.simulate(background)["brightness_temperature"].values
    fig, ax = plt.subplots(figsize=(10, 5))
    channels = list(observations["channel"].values)
    x = np.arange(len(channels))
    ax.bar(x - 0.3, np.sqrt(np.nanmean(before**2, axis=0)), width=0.2, color="0.6",
           label="observation minus background")
    for offset, (key, analysis) in zip((-0.1, 0.1), analyses.items()):
        after = obs - physical.simulate(analysis)["brightness_temperature"].values
        ax.bar(x + offset, np.sqrt(np.nanmean(after**2, axis=0)), width=0.2, color=styles[key][0],
               label=f"observation minus 1D-Var analysis ({key})")
    noise = physical.instrument.noise_k
    ax.bar(x + 0.3, noise, width=0.2, color="k", alpha=0.3, label="instrument noise")
    ax.set_xticks(x, channels, rotation=45)
    ax.set_ylabel("RMS departure [K] (analysis simulated with the physics)")
    ax.set_title("Departures before and after the analysis (invented scenario)")
    ax.legend(fontsize=8)
    ax.grid(alpha=0.3, axis="y")
    names.append(_save(fig, out / "departures.png"))
    plt.close(fig)
    return names
