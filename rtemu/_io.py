"""File helpers: atomic writes, netCDF output.

Every file rtemu writes appears complete or not at all: data go to a temporary file in
the destination directory, which is renamed over the destination only after it has been
flushed and closed.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path
from typing import Iterator

import xarray as xr


@contextlib.contextmanager
def atomic_path(
    path: str | os.PathLike, suffix: str | None = None, durable: bool = True
) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; rename it onto ``path`` on success.

    On any exception the temporary file is removed and ``path`` is left untouched. With
    ``durable`` the data are flushed to disk (fsync) before the rename, so that even a
    machine crash leaves either the old or the complete new file; without it only an
    interrupted process is covered (cheaper, for intermediate files that are checked when
    reused).
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(
        dir=path.parent, prefix=f".{path.name}.", suffix=suffix or ".partial"
    )
    os.close(fd)
    tmp_path = Path(tmp)
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp_path, 0o666 & ~umask)  # mkstemp makes 0600; finished files get the usual mode
    try:
        yield tmp_path
        if durable:
            with open(tmp_path, "rb+") as handle:
                os.fsync(handle.fileno())
        os.replace(tmp_path, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            tmp_path.unlink()
        raise


def write_bytes_atomic(path: str | os.PathLike, data: bytes) -> None:
    """Write ``data`` to ``path`` atomically."""
    with atomic_path(path) as tmp:
        tmp.write_bytes(data)


def write_text_atomic(path: str | os.PathLike, text: str) -> None:
    """Write ``text`` (UTF-8) to ``path`` atomically."""
    write_bytes_atomic(path, text.encode("utf-8"))


def to_netcdf_atomic(
    dataset: xr.Dataset, path: str | os.PathLike, durable: bool = True, **kwargs
) -> None:
    """Write ``dataset`` to netCDF-4 (h5netcdf engine) at ``path`` atomically."""
    with atomic_path(path, suffix=".nc.partial", durable=durable) as tmp:
        dataset.to_netcdf(tmp, engine="h5netcdf", **kwargs)


def open_dataset(path: str | os.PathLike, chunks=None) -> xr.Dataset:
    """Open a netCDF file with the h5netcdf engine (no code-executing formats)."""
    return xr.open_dataset(path, engine="h5netcdf", chunks=chunks)
