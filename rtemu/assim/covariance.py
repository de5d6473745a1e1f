"""Background error covariance B in control space: estimation with shrinkage, validation.

B is an :class:`xarray.DataArray` with dims ``(control_row, control_col)`` whose
coordinates are the control-element labels of :class:`rtemu.assim.ControlLayout`
(``air_temperature[i]`` [K], ``ln_specific_humidity[i]`` [1], ``surface_temperature``
[K], ``surface_emissivity`` or ``surface_emissivity[<channel>]`` [1]); entries are in the
product of the two elements' units ([K2], [K], [1]). A plain array in that order is also
accepted by the analysis functions.
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from rtemu.assim._control import ControlLayout, layout_for, read_columns, to_control

ROW, COL = "control_row", "control_col"


def shrinkage_intensity_to_diagonal(samples):
    """Optimal shrinkage intensity toward the diagonal target (Schaefer-Strimmer "target D").

    For standardised samples z (zero mean, unit unbiased variance per element),
    w_kij = z_ki z_kj, wbar_ij = mean_k w_kij, r_ij = n/(n-1) wbar_ij (sample correlation),

        Var(r_ij) = n / (n-1)^3 sum_k (w_kij - wbar_ij)^2,
        lambda* = sum_{i != j} Var(r_ij) / sum_{i != j} r_ij^2,   clipped to [0, 1].

    Parameters
    ----------
    samples : array_like [n_samples, p]
        Sample vectors (any units per element; only correlations enter).

    Returns
    -------
    float
        Shrinkage intensity lambda* [1].

    References
    ----------
    Schaefer, J. and Strimmer, K. (2005), A shrinkage approach to large-scale covariance
    matrix estimation and implications for functional genomics, Stat. Appl. Genet. Mol.
    Biol. 4(1), Art. 32, doi:10.2202/1544-6115.1175 (target D, their Table 1 and
    Appendix; formulas from memory).
    """
    x = np.asarray(samples, dtype=float)
    n = x.shape[0]
    z = _standardise(x)
    w_mean = z.T @ z / n  # wbar_ij
    w_sq_sum = (z**2).T @ (z**2)  # sum_k w_kij^2
    # sum_k (w_kij - wbar_ij)^2 = sum_k w_kij^2 - n wbar_ij^2
    var_r = n / (n - 1) ** 3 * (w_sq_sum - n * w_mean**2)
    r = n / (n - 1) * w_mean
    off = ~np.eye(x.shape[1], dtype=bool)
    denominator = float((r[off] ** 2).sum())
    if denominator == 0.0:
        return 1.0
    return float(np.clip(var_r[off].sum() / denominator, 0.0, 1.0))


def _standardise(x: np.ndarray) -> np.ndarray:
    centred = x - x.mean(axis=0)
    std = centred.std(axis=0, ddof=1)
    flat = ~(std > 0)
    if flat.any():
        raise ValueError(
            f"samples: element(s) {np.flatnonzero(flat)[:10].tolist()} have no spread "
            "(rule: every control element must vary across the samples)"
        )
    return centred / std


def shrunk_covariance(samples, shrinkage="auto"):
    """Sample covariance shrunk toward its diagonal.

    S* = D^1/2 [(1 - lambda) R + lambda I] D^1/2, with S the unbiased sample covariance,
    D = diag(S) and R = D^-1/2 S D^-1/2 the sample correlation: the variances are kept,
    the correlations scaled by (1 - lambda). S* is positive definite whenever lambda > 0
    (even with fewer samples than elements).

    Parameters
    ----------
    samples : array_like [n_samples, p]
        Sample vectors [element units].
    shrinkage : "auto" or float
        ``"auto"``: lambda from :func:`shrinkage_intensity_to_diagonal`; a float in [0, 1]
        is used as is.

    Returns
    -------
    (numpy.ndarray [p, p], float)
        Covariance [product of element units] and the lambda used [1].
    """
    x = np.asarray(samples, dtype=float)
    if x.ndim != 2 or x.shape[0] < 2:
        raise ValueError(f"samples: need a 2-D array with at least two samples, got shape {x.shape}")
    if not np.isfinite(x).all():
        raise ValueError("samples: non-finite value (rule: all values finite)")
    if isinstance(shrinkage, str):
        if shrinkage != "auto":
            raise ValueError(f"shrinkage must be 'auto' or a number in [0, 1], got {shrinkage!r}")
        lam = shrinkage_intensity_to_diagonal(x)
    else:
        lam = float(shrinkage)
        if not 0.0 <= lam <= 1.0:
            raise ValueError(f"shrinkage must be in [0, 1], got {shrinkage}")
    _standardise(x)  # rejects elements without spread
    s = np.cov(x, rowvar=False, ddof=1)
    d = np.sqrt(np.diag(s))
    corr = s / np.outer(d, d)
    shrunk = (1.0 - lam) * corr + lam * np.eye(len(d))
    np.fill_diagonal(shrunk, 1.0)
    return shrunk * np.outer(d, d), lam


def estimate_background_covariance(
    states: xr.Dataset,
    *,
    shrinkage="auto",
    control_emissivity: bool = False,
    sample_dim: str = "profile",
    channels=None,
) -> xr.DataArray:
    """Background error covariance B in control space from a sample of states.

    The spread of the sample is taken as the background error: use e.g. an ensemble of
    forecasts valid at one time, or a reference plus many background-minus-truth
    differences; a climatological sample gives a climatological prior. The states are
    converted to control vectors (T, ln q, Ts[, emissivity]) and their covariance is
    shrunk toward its diagonal (:func:`shrunk_covariance`).

    Parameters
    ----------
    states : xarray.Dataset
        Columns in the input schema (air_temperature [K], specific_humidity [kg kg-1] > 0,
        ...) with the samples along ``sample_dim``.
    shrinkage : "auto" or float
        See :func:`shrunk_covariance`.
    control_emissivity : bool
        Include surface emissivity element(s).
    sample_dim : str
        Dimension holding the samples.
    channels : sequence of str, optional
        Channel order of a per-channel emissivity (default: the dataset's channel coordinate).

    Returns
    -------
    xarray.DataArray (control_row, control_col)
        B [element units squared], with attributes ``shrinkage_intensity`` [1] and
        ``n_samples``.
    """
    ds = states.rename({sample_dim: "profile"}) if sample_dim != "profile" else states
    if channels is None:
        channels = tuple(str(c) for c in ds["channel"].values) if "channel" in ds.coords else ()
    if "channel" in ds["surface_emissivity"].dims and not channels:
        channels = tuple(str(i) for i in range(ds.sizes["channel"]))
    cols = read_columns(ds, ("profile",), tuple(channels), "states")
    layout = layout_for(cols, control_emissivity)
    x = to_control(cols, layout, "states")
    b, lam = shrunk_covariance(x, shrinkage)
    return covariance_dataarray(b, layout, shrinkage_intensity=lam, n_samples=cols.n)


def covariance_dataarray(b, layout: ControlLayout, **attrs) -> xr.DataArray:
    """Label a control-space covariance [n, n] (or [N, n, n] over ``profile``)."""
    labels = np.array(layout.labels, dtype=object)
    dims = ("profile", ROW, COL) if np.ndim(b) == 3 else (ROW, COL)
    return xr.DataArray(
        b,
        dims=dims,
        coords={ROW: labels, COL: labels},
        attrs={"long_name": "control-space covariance", **attrs},
    )


def check_b_matrix(b_matrix, layout: ControlLayout, n_profiles: int, name: str = "b_matrix") -> np.ndarray:
    """Validate B against the layout; return [n, n] or [N, n, n].

    A labelled B is reordered to the layout's labels; a label mismatch (e.g. B built with
    emissivity and the analysis without) is a ValueError naming the labels.
    """
    if isinstance(b_matrix, xr.DataArray):
        if ROW not in b_matrix.dims or COL not in b_matrix.dims:
            raise ValueError(f"{name}: dims {b_matrix.dims}, expected ({ROW!r}, {COL!r}[, 'profile'])")
        if ROW in b_matrix.coords and COL in b_matrix.coords:
            want = list(layout.labels)
            have = [str(v) for v in b_matrix[ROW].values]
            absent = [w for w in want if w not in have]
            extra = [h for h in have if h not in want]
            if absent or extra:
                raise ValueError(
                    f"{name}: control elements do not match the analysis (missing {absent[:5]}, "
                    f"unexpected {extra[:5]}) (rule: B over exactly the control vector; "
                    "check control_emissivity and the number of levels)"
                )
            have_col = [str(v) for v in b_matrix[COL].values]
            if have != want or have_col != want:
                b_matrix = b_matrix.sel({ROW: want, COL: want})
        order = ("profile", ROW, COL) if "profile" in b_matrix.dims else (ROW, COL)
        b = np.asarray(b_matrix.transpose(*order).values, dtype=float)
    else:
        b = np.asarray(b_matrix, dtype=float)
    n = layout.size
    if b.shape not in ((n, n), (n_profiles, n, n)):
        raise ValueError(
            f"{name}: shape {b.shape}, expected ({n}, {n}) or ({n_profiles}, {n}, {n}) "
            f"for the control vector {layout.labels[0]}..{layout.labels[-1]}"
        )
    stack = b.reshape(-1, n, n)
    for i, m in enumerate(stack):
        where = f" (profile index {i})" if b.ndim == 3 else ""
        if not np.isfinite(m).all():
            raise ValueError(f"{name}: non-finite entry{where} (rule: all entries finite)")
        if not np.allclose(m, m.T, rtol=1e-8, atol=1e-12 * np.abs(m).max()):
            raise ValueError(f"{name}: not symmetric{where} (rule: B = B^T)")
    try:
        np.linalg.cholesky(stack)
    except np.linalg.LinAlgError:
        raise ValueError(f"{name}: not positive definite (rule: B symmetric positive definite)") from None
    return b
