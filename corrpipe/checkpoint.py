"""Stage checkpoints: atomic HDF5 files with provenance, a content checksum and a schema version.

A stage file is written under a temporary name in the same folder, flushed and fsync'ed, and
only then moved into place with :func:`os.replace`, so a reader never sees half a file. The
file's attributes carry the fingerprint, a SHA-256 checksum over every dataset's bytes and a
completeness mark written last. :func:`open_checkpoint` refuses a file whose mark, checksum or
schema does not match, so a damaged checkpoint is recomputed instead of trusted.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import hashlib
import json
import os
from pathlib import Path
from typing import Any, Callable, Iterator

import h5py
import numpy as np

from corrpipe.errors import CheckpointError
from corrpipe.version import __version__

__all__ = [
    "SCHEMA_VERSION",
    "write_checkpoint",
    "open_checkpoint",
    "checkpoint_state",
    "content_checksum",
    "write_json_atomic",
    "write_text_atomic",
    "atomic_path",
]

#: Version of the layout of stage files. Bump when a stage's stored layout changes.
SCHEMA_VERSION = 1


@contextlib.contextmanager
def atomic_path(path: str | Path) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; on success fsync it and move it into place.

    Whatever is written to the temporary path appears at ``path`` all at once
    (:func:`os.replace`) or not at all: on an exception the temporary file is removed and an
    existing ``path`` is left untouched.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}{path.suffix}")
    try:
        yield tmp
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
        _fsync_dir(path.parent)
    finally:
        if tmp.exists():
            tmp.unlink()


def write_text_atomic(path: str | Path, text: str) -> Path:
    """Write a text file atomically (see :func:`atomic_path`)."""
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return Path(path)


def content_checksum(h5: h5py.Group) -> str:
    """SHA-256 over the names, dtypes, shapes and bytes of every dataset, in sorted order."""
    digest = hashlib.sha256()
    names: list[str] = []
    h5.visit(lambda n: names.append(n) if isinstance(h5[n], h5py.Dataset) else None)
    for name in sorted(names):
        ds = h5[name]
        digest.update(name.encode())
        digest.update(str(ds.dtype).encode())
        digest.update(str(ds.shape).encode())
        data = ds[()]
        if isinstance(data, bytes):
            digest.update(data)
        elif isinstance(data, np.ndarray) and data.dtype.kind in "OSU":
            digest.update(repr(data.tolist()).encode())
        else:
            digest.update(np.ascontiguousarray(data).tobytes())
    return digest.hexdigest()


def write_checkpoint(path: str | Path, stage: str, fingerprint: str,
                     fill: Callable[[h5py.File], None], provenance: dict[str, Any]) -> Path:
    """Write a stage file atomically.

    Parameters
    ----------
    path : str or Path
        Final location of the stage file.
    stage : str
        Stage name, stored as an attribute.
    fingerprint : str
        The stage fingerprint (see :mod:`corrpipe.pipeline`).
    fill : callable
        ``fill(h5file)`` writes the stage's datasets and groups.
    provenance : dict
        Extra attributes (config text, input digests, ...); values must be str or numbers.

    Returns
    -------
    Path
        The written file.
    """
    with atomic_path(path) as tmp, h5py.File(tmp, "w") as h5:
        fill(h5)
        h5.attrs["stage"] = stage
        h5.attrs["fingerprint"] = fingerprint
        h5.attrs["schema_version"] = SCHEMA_VERSION
        h5.attrs["corrpipe_version"] = __version__
        h5.attrs["created"] = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
        for key, value in provenance.items():
            h5.attrs[key] = value if isinstance(value, (int, float, str)) else json.dumps(value)
        h5.attrs["checksum"] = content_checksum(h5)
        h5.attrs["complete"] = 1  # commit mark, written last
    return Path(path)


def checkpoint_state(path: str | Path) -> tuple[str, str | None]:
    """Inspect a stage file without trusting it.

    Returns
    -------
    (state, fingerprint)
        ``state`` is ``"missing"``, ``"damaged: <why>"`` or ``"ok"``; ``fingerprint`` is the
        stored fingerprint when the file is intact.
    """
    path = Path(path)
    if not path.exists():
        return "missing", None
    try:
        with h5py.File(path, "r") as h5:
            attrs = h5.attrs
            if int(attrs.get("complete", 0)) != 1:
                return "damaged: no completeness mark", None
            schema = int(attrs.get("schema_version", -1))
            if schema != SCHEMA_VERSION:
                return f"damaged: schema version {schema}, this corrpipe writes {SCHEMA_VERSION}", None
            if attrs.get("checksum") != content_checksum(h5):
                return "damaged: checksum mismatch", None
            return "ok", str(attrs["fingerprint"])
    except (OSError, KeyError, ValueError, RuntimeError) as exc:
        return f"damaged: cannot be read ({type(exc).__name__}: {exc})", None


@contextlib.contextmanager
def open_checkpoint(path: str | Path, fingerprint: str | None = None) -> Iterator[h5py.File]:
    """Open an intact stage file for reading.

    Raises
    ------
    CheckpointError
        If the file is missing or damaged, or its fingerprint differs from ``fingerprint``.
    """
    state, stored = checkpoint_state(path)
    if state == "missing":
        raise CheckpointError(f"{path} does not exist; run the stage that writes it first "
                              f"(corrpipe run CONFIG)")
    if state != "ok":
        raise CheckpointError(f"{path} is {state}; delete it or rerun with --force")
    if fingerprint is not None and stored != fingerprint:
        raise CheckpointError(f"{path} was written with other settings (fingerprint "
                              f"{stored[:12]}, expected {fingerprint[:12]}); rerun the stage")
    with h5py.File(path, "r") as h5:
        yield h5


def write_json_atomic(path: str | Path, payload: Any) -> Path:
    """Write JSON to ``path`` atomically (temporary file, fsync, os.replace)."""
    text = json.dumps(payload, indent=2, sort_keys=False, default=_json_default) + "\n"
    return write_text_atomic(path, text)


def _json_default(obj: Any) -> Any:
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"cannot store {type(obj).__name__} in JSON")


def _fsync_dir(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)
