"""File helpers: atomic writes, one job per output, netCDF output.

Every file rtemu writes appears complete or not at all: data go to a temporary file in
the destination directory, which is renamed over the destination only after it has been
flushed and closed.

Every job that writes an output (``rtemu simulate``, ``rtemu sample``, ``rtemu train``)
holds :func:`exclusive_output` on it: the output may not be one of the job's inputs, and a
lock file ``<output>.lock`` (an advisory ``flock`` plus the holder's pid and host) admits
one job per output path. A second job is refused with a message naming the holder; the
lock of a dead process is released by the kernel, so the next job takes it over and
removes the temporary files the dead job left. Chunk folders beside the output are only
touched by the job holding the lock.
"""

from __future__ import annotations

import contextlib
import datetime
import fcntl
import json
import os
import re
import socket
import sys
import tempfile
from pathlib import Path
from typing import Iterator

import xarray as xr

PARTIAL_SUFFIX = ".partial"


class OutputBusyError(ValueError):
    """Another live job holds the output's lock (the message names it)."""


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
        dir=path.parent, prefix=f".{path.name}.", suffix=suffix or PARTIAL_SUFFIX
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
    except BaseException as exc:
        with contextlib.suppress(FileNotFoundError):
            tmp_path.unlink()
        if isinstance(exc, OSError) and exc.filename is None and exc.errno is not None:
            raise OSError(exc.errno, exc.strerror, str(path)) from exc  # say which file
        raise


def write_bytes_atomic(path: str | os.PathLike, data: bytes, durable: bool = True) -> None:
    """Write ``data`` to ``path`` atomically."""
    with atomic_path(path, durable=durable) as tmp:
        tmp.write_bytes(data)


def write_text_atomic(path: str | os.PathLike, text: str) -> None:
    """Write ``text`` (UTF-8) to ``path`` atomically."""
    write_bytes_atomic(path, text.encode("utf-8"))


def to_netcdf_atomic(
    dataset: xr.Dataset, path: str | os.PathLike, durable: bool = True, **kwargs
) -> None:
    """Write ``dataset`` to netCDF-4 (h5netcdf engine) at ``path`` atomically.

    The file is built in memory and written with plain file I/O: when the disk is full
    that fails with a clean OSError, whereas the HDF5 library, failing to close a file it
    could not extend, leaves state that crashes the interpreter (segmentation fault).
    For files too large for memory see :func:`check_space`.
    """
    import dask

    # Synchronous: with a dask.distributed client active xarray would otherwise ask the
    # cluster for a write lock on the in-memory target.
    with dask.config.set(scheduler="synchronous"):
        data = dataset.to_netcdf(engine="h5netcdf", **kwargs)
    with atomic_path(path, suffix=".nc.partial", durable=durable) as tmp:
        with open(tmp, "wb") as handle:
            handle.write(data)


def assembly_size(parts) -> int:
    """Bytes to reserve for a file assembled from the files ``parts`` [bytes] (10 % + 64 kB margin)."""
    return int(1.1 * sum(Path(p).stat().st_size for p in parts)) + 65536


def check_space(path: str | os.PathLike, needed: int) -> None:
    """Raise OSError (ENOSPC or EFBIG) unless a file of ``needed`` bytes fits beside ``path``.

    Called before the HDF5 library streams a large file to disk: if it runs out of space
    mid-write it cannot close the file cleanly and the process later crashes. Checks the
    free space of the file system and the process's file size limit (RLIMIT_FSIZE).
    """
    import errno
    import resource

    path = Path(path)
    stat = os.statvfs(path.parent)
    free = stat.f_bavail * stat.f_frsize
    if needed > free:
        raise OSError(errno.ENOSPC, f"no space left on the device for {path}: about {needed / 1e6:.1f} MB "
                      f"needed, {free / 1e6:.1f} MB free", str(path))
    limit = resource.getrlimit(resource.RLIMIT_FSIZE)[0]
    if limit != resource.RLIM_INFINITY and needed > limit:
        raise OSError(errno.EFBIG, f"{path} would be about {needed / 1e6:.1f} MB, above this process's "
                      f"file size limit of {limit / 1e6:.1f} MB", str(path))


def open_dataset(path: str | os.PathLike, chunks=None) -> xr.Dataset:
    """Open a netCDF-4 file with the h5netcdf engine (no code-executing formats).

    Raises
    ------
    FileNotFoundError
        ``path`` does not exist.
    ValueError
        ``path`` is a directory or not a netCDF-4/HDF5 file (netCDF-3, text, ...).
    """
    path = Path(path)
    if path.is_dir():
        raise ValueError(f"{path}: is a directory, not a netCDF file")
    if not path.exists():
        raise FileNotFoundError(f"{path}: no such file")
    with open(path, "rb") as handle:
        head = handle.read(8)
    if head != b"\x89HDF\r\n\x1a\n":
        kind = "a netCDF-3 file" if head[:3] == b"CDF" else "not a netCDF-4/HDF5 file"
        raise ValueError(f"{path}: {kind}; rtemu reads netCDF-4 (HDF5) files only "
                         "(convert with e.g. 'nccopy -k nc4 IN OUT')")
    return xr.open_dataset(path, engine="h5netcdf", chunks=chunks)


# ---- one job per output -------------------------------------------------------------------
def lock_path(output: str | os.PathLike) -> Path:
    """The lock file of ``output``: ``<output>.lock``."""
    output = Path(output)
    return output.with_name(output.name + ".lock")


def refuse_input_as_output(output: str | os.PathLike, inputs) -> None:
    """Raise ValueError if ``output`` is (or is a hard or symbolic link of) one of ``inputs``."""
    output = Path(output)
    if not output.exists():
        return
    for item in inputs:
        if item is None or not Path(item).exists():
            continue
        if os.path.samefile(output, item):
            raise ValueError(f"output {output} is the input {item} (the same file or a link of it); "
                             "writing it would destroy the input: choose another output path")


def _holder(lock: Path) -> dict:
    try:
        holder = json.loads(lock.read_text(encoding="utf-8") or "{}")
    except (OSError, ValueError):
        return {}
    return holder if isinstance(holder, dict) else {}


def _describe(holder: dict) -> str:
    if not holder:
        return "an unidentified process"
    return (f"pid {holder.get('pid')} on host {holder.get('host')}, "
            f"started {holder.get('started')}: {holder.get('command', '?')}")


def remove_partials(directory: Path, target: str | None = None) -> list[Path]:
    """Remove the temporary files :func:`atomic_path` left in ``directory`` (a job died).

    With ``target`` only those of that file name; else every one (a chunk folder).
    """
    name = re.escape(target) if target else r".+"
    pattern = re.compile(rf"^\.{name}\.[a-z0-9_]{{8}}(\.nc)?{re.escape(PARTIAL_SUFFIX)}$")
    removed = []
    if directory.is_dir():
        for leftover in directory.iterdir():
            if pattern.match(leftover.name) and leftover.is_file():
                with contextlib.suppress(FileNotFoundError):
                    leftover.unlink()
                    removed.append(leftover)
    return removed


@contextlib.contextmanager
def exclusive_output(output: str | os.PathLike, inputs=()) -> Iterator[Path]:
    """Hold ``output`` for this job: refuse it as an input, lock it, clean a dead job's leftovers.

    Parameters
    ----------
    output : path
        The file the job writes (created later, atomically).
    inputs : iterable of path
        Files the job reads; ``output`` may not be one of them.

    Raises
    ------
    OutputBusyError
        Another live process holds the lock (the message names its pid, host and command).
    ValueError
        ``output`` is an input or a directory.
    """
    output = Path(output)
    if output.is_dir():
        raise ValueError(f"output {output} is a directory; give a file path")
    refuse_input_as_output(output, inputs)
    output.parent.mkdir(parents=True, exist_ok=True)
    lock = lock_path(output)
    while True:
        fd = os.open(lock, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            os.close(fd)
            raise OutputBusyError(
                f"output {output} is being written by another rtemu job ({_describe(_holder(lock))}); "
                f"wait for it to finish or stop it (its lock file is {lock})") from None
        # The lock file may have been removed (and replaced) by its holder between our open
        # and our flock: we then hold a lock on a file nobody else sees; try again.
        try:
            same = os.path.samestat(os.fstat(fd), os.stat(lock))
        except FileNotFoundError:
            same = False
        if same:
            break
        os.close(fd)
    try:
        previous = _holder(lock)
        if previous:
            print(f"rtemu: taking over the lock of a job that ended without releasing it "
                  f"({_describe(previous)})", file=sys.stderr)
        removed = remove_partials(output.parent, output.name)
        if removed:
            print(f"rtemu: removed {len(removed)} temporary file(s) a dead job left beside {output}",
                  file=sys.stderr)
        me = {"pid": os.getpid(), "host": socket.gethostname(),
              "started": datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds"),
              "command": " ".join(sys.argv)[:300]}
        os.ftruncate(fd, 0)
        os.write(fd, json.dumps(me).encode("utf-8"))
        os.fsync(fd)
        yield output
    finally:
        with contextlib.suppress(FileNotFoundError):
            lock.unlink()  # before unlocking: a waiting job then finds no file, or a new one
        os.close(fd)
