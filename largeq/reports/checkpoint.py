"""Atomic, checksummed checkpoints for long runs.

A checkpoint is one HDF5 file, ``<folder>/checkpoint.h5``, holding a flat ``state``
(arrays, numbers, strings) and a JSON ``meta`` dict.  It is written to
``checkpoint.h5.tmp`` in the same folder, flushed, fsynced and renamed over the old file
with :func:`os.replace`; the folder is fsynced after the rename.  A process killed at any
moment therefore leaves either the previous checkpoint or the new one at the final name,
never a partial file.  As a second guard, the file carries a BLAKE2b checksum of every
entry (name, dtype, shape, bytes) and a ``complete`` flag written last; a file that fails
either check is refused with :class:`CheckpointCorruptError` rather than loaded.

Arrays are handed to HDF5 as they are (no compression, no concatenation), so a large
C-contiguous complex vector is written and hashed straight from its own memory.
"""

from __future__ import annotations

import hashlib
import json
import os
import time
from pathlib import Path
from typing import Any, Callable, Mapping

import h5py
import numpy as np

from largeq.reports.store import commit_temp, temp_path_for, to_jsonable, utc_timestamp

__all__ = [
    "CHECKPOINT_NAME",
    "CheckpointError",
    "CheckpointCorruptError",
    "CheckpointMismatchError",
    "save_checkpoint",
    "load_checkpoint",
    "checkpoint_path",
    "Checkpointer",
]

CHECKPOINT_NAME = "checkpoint.h5"
FORMAT_VERSION = 1


class CheckpointError(RuntimeError):
    """Base class of checkpoint problems."""


class CheckpointCorruptError(CheckpointError):
    """The checkpoint file is incomplete or its checksum does not match."""


class CheckpointMismatchError(CheckpointError, ValueError):
    """The checkpoint belongs to a different scenario (fingerprint mismatch)."""


def checkpoint_path(folder: str | os.PathLike) -> Path:
    """Path of the checkpoint file inside a run folder."""
    return Path(folder) / CHECKPOINT_NAME


def _hash_entry(h: "hashlib._Hash", name: str, kind: str, arr: np.ndarray) -> None:
    h.update(f"{name}\0{kind}\0{arr.dtype.str}\0{arr.shape}\0".encode())
    if arr.dtype == object:  # strings
        h.update("\0".join(str(v) for v in arr.ravel()).encode("utf-8"))
    else:
        # memoryview of a C-contiguous array: no copy (non-contiguous input is copied once)
        if arr.size:  # a zero-size view cannot be cast to bytes (and holds none)
            h.update(memoryview(np.ascontiguousarray(arr)).cast("B"))


def _as_entry(name: str, value: Any) -> tuple[str, np.ndarray]:
    if not isinstance(name, str) or not name or "/" in name:
        raise ValueError(f"invalid checkpoint key {name!r}")
    if isinstance(value, (str, np.str_)):
        return "str", np.array(str(value), dtype=object)
    if isinstance(value, (bool, int, float, complex, np.generic)):
        return "scalar", np.asarray(value)
    if isinstance(value, np.ndarray):
        if value.dtype == object or value.dtype.kind in "US":
            raise TypeError(f"checkpoint entry {name!r}: only numeric arrays are supported")
        return "array", value
    raise TypeError(
        f"checkpoint entry {name!r} has type {type(value).__name__}; "
        "use numpy arrays, numbers or strings"
    )


def save_checkpoint(
    folder: str | os.PathLike,
    state: Mapping[str, Any],
    meta: Mapping[str, Any] | None = None,
    *,
    fingerprint: str | None = None,
) -> Path:
    """Write a checkpoint atomically.

    Parameters
    ----------
    folder : path-like
        Run folder (must exist).
    state : mapping of str to ndarray, number or str
        What is needed to resume (vectors, step counters, RNG state as arrays, ...).
        Arrays are written without compression or intermediate copies.
    meta : mapping, optional
        Small JSON-able description (progress, settings); returned by
        :func:`load_checkpoint`.  ``fingerprint``, ``saved_utc`` and ``format_version``
        are added.
    fingerprint : str, optional
        Identifies the scenario and numerical settings (e.g. a SHA-256 of their text);
        :func:`load_checkpoint` can refuse a checkpoint with another fingerprint.

    Returns
    -------
    pathlib.Path
        Path of the checkpoint file.
    """
    path = checkpoint_path(folder)
    tmp = temp_path_for(path)
    full_meta = dict(to_jsonable(dict(meta or {})))
    full_meta.update(
        fingerprint=fingerprint, saved_utc=utc_timestamp(), format_version=FORMAT_VERSION
    )
    entries = {name: _as_entry(name, value) for name, value in state.items()}
    h = hashlib.blake2b(digest_size=32)
    tmp.unlink(missing_ok=True)  # leftover of an earlier crash
    try:
        with h5py.File(tmp, "w") as fh:
            fh.attrs["complete"] = False
            grp = fh.create_group("state")
            for name in sorted(entries):
                kind, arr = entries[name]
                if kind == "str":
                    ds = grp.create_dataset(name, data=arr.item(), dtype=h5py.string_dtype())
                else:
                    ds = grp.create_dataset(name, data=arr)
                ds.attrs["kind"] = kind
                _hash_entry(h, name, kind, arr)
            fh.attrs["meta"] = json.dumps(full_meta, sort_keys=True, allow_nan=False)
            h.update(fh.attrs["meta"].encode("utf-8"))
            fh.attrs["checksum"] = h.hexdigest()
            fh.attrs["complete"] = True
            fh.flush()
        commit_temp(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return path


def load_checkpoint(
    folder: str | os.PathLike, *, expect_fingerprint: str | None = None
) -> tuple[dict[str, Any], dict[str, Any]] | None:
    """Load the checkpoint of a run folder, verifying its checksum.

    Parameters
    ----------
    folder : path-like
        Run folder.
    expect_fingerprint : str, optional
        If given, the stored fingerprint must equal it.

    Returns
    -------
    (state, meta) or None
        None if the folder has no checkpoint.  Arrays come back as numpy arrays, numbers
        as Python numbers, strings as ``str``.

    Raises
    ------
    CheckpointMismatchError
        The checkpoint was written for a different fingerprint (another scenario or
        different numerical settings).
    CheckpointCorruptError
        The file is unreadable, not marked complete, or fails its checksum.
    """
    path = checkpoint_path(folder)
    if not path.exists():
        return None
    try:
        with h5py.File(path, "r") as fh:
            if not bool(fh.attrs.get("complete", False)):
                raise CheckpointCorruptError(f"{path} is not marked complete")
            meta_text = fh.attrs["meta"]
            stored_sum = fh.attrs["checksum"]
            meta = json.loads(meta_text)
            if expect_fingerprint is not None and meta.get("fingerprint") != expect_fingerprint:
                raise CheckpointMismatchError(
                    f"checkpoint {path} belongs to a different scenario or settings "
                    f"(fingerprint {meta.get('fingerprint')!r}, expected "
                    f"{expect_fingerprint!r}); use another run folder or delete it"
                )
            h = hashlib.blake2b(digest_size=32)
            state: dict[str, Any] = {}
            grp = fh["state"]
            for name in sorted(grp.keys()):
                ds = grp[name]
                kind = ds.attrs["kind"]
                if kind == "str":
                    value = ds.asstr()[()]
                    _hash_entry(h, name, kind, np.array(value, dtype=object))
                else:
                    arr = ds[()]
                    arr = np.asarray(arr)
                    _hash_entry(h, name, kind, arr)
                    value = arr.item() if kind == "scalar" else arr
                state[name] = value
            h.update(meta_text.encode("utf-8"))
    except CheckpointError:
        raise
    except (OSError, KeyError, ValueError) as exc:
        raise CheckpointCorruptError(f"cannot read checkpoint {path}: {exc}") from exc
    if h.hexdigest() != stored_sum:
        raise CheckpointCorruptError(f"checkpoint {path} fails its checksum")
    return state, meta


class Checkpointer:
    """Save checkpoints at most every ``interval_s`` seconds.

    Parameters
    ----------
    folder : path-like
        Run folder.
    interval_s : float
        Minimum wall time between two saves made by :meth:`maybe_save`; ``0`` saves on
        every call, ``inf`` never (only :meth:`force_save`).
    fingerprint : str, optional
        Stored with every checkpoint (see :func:`save_checkpoint`).
    clock : callable, optional
        Monotonic clock in seconds (injectable for tests).

    Examples
    --------
    >>> ck = Checkpointer(folder, 300.0, fingerprint=fp)          # doctest: +SKIP
    >>> for step in range(n):                                     # doctest: +SKIP
    ...     psi = advance(psi)
    ...     ck.maybe_save(lambda: ({"psi": psi, "step": step}, {"t": t}))
    """

    def __init__(
        self,
        folder: str | os.PathLike,
        interval_s: float,
        *,
        fingerprint: str | None = None,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        if interval_s < 0:
            raise ValueError("interval_s must be >= 0")
        self.folder = Path(folder)
        self.interval_s = float(interval_s)
        self.fingerprint = fingerprint
        self._clock = clock
        self._last = clock()
        self.n_saves = 0

    def due(self) -> bool:
        """True if ``interval_s`` has passed since the last save (or creation)."""
        return self._clock() - self._last >= self.interval_s

    def load(self) -> tuple[dict[str, Any], dict[str, Any]] | None:
        """Load this folder's checkpoint, requiring this checkpointer's fingerprint."""
        return load_checkpoint(self.folder, expect_fingerprint=self.fingerprint)

    def _save(self, built: Any) -> Path:
        if isinstance(built, tuple):
            state, meta = built
        else:
            state, meta = built, None
        path = save_checkpoint(self.folder, state, meta, fingerprint=self.fingerprint)
        self._last = self._clock()
        self.n_saves += 1
        return path

    def maybe_save(self, state_fn: Callable[[], Any]) -> bool:
        """Save if the interval has passed.

        Parameters
        ----------
        state_fn : callable
            Called only when a save is due; returns ``state`` or ``(state, meta)``.

        Returns
        -------
        bool
            Whether a checkpoint was written.
        """
        if not self.due():
            return False
        self._save(state_fn())
        return True

    def force_save(self, state: Any) -> Path:
        """Save now; ``state`` is a state dict, ``(state, meta)`` or a callable giving one."""
        return self._save(state() if callable(state) else state)
