"""Run-folder storage: atomic HDF5 results, JSON summaries, versions and host metadata.

Everything here is generic: a result is a nested ``dict`` whose leaves are arrays, scalars,
strings or :class:`Quantity` objects (a value with units and a description).  Files are
always written atomically: the data go to a temporary file in the same folder, which is
flushed and fsynced, then renamed over the target with :func:`os.replace`, and finally the
folder itself is fsynced, so a crash leaves either the old file or the new one.
"""

from __future__ import annotations

import datetime as _dt
import importlib.metadata
import importlib.util
import json
import math
import os
import platform
import re
import socket
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

import h5py
import numpy as np

__all__ = [
    "Quantity",
    "write_results",
    "read_results",
    "write_summary",
    "read_summary",
    "to_jsonable",
    "package_versions",
    "run_metadata",
    "make_run_folder",
    "atomic_write_bytes",
    "atomic_write_text",
    "fsync_dir",
    "utc_timestamp",
    "RUN_MARKERS",
]

#: Files whose presence marks a folder as a largeq run folder.
RUN_MARKERS = (".largeq-run", "results.h5", "summary.json", "report.html", "checkpoint.h5")

#: Arrays with at least this many elements are gzip-compressed in ``results.h5``.
GZIP_MIN_ELEMENTS = 4096

_KIND = "largeq_kind"  # dataset attribute recording how to rebuild the Python value
_JSON_ATTRS = "largeq_json_attrs"  # root attribute listing attrs stored as JSON strings


@dataclass(frozen=True)
class Quantity:
    """A stored value with its physical units.

    Parameters
    ----------
    value : array_like or scalar
        The number(s).
    units : str
        Units as plain text, e.g. ``"1/J"`` for times or ``"J"`` for energies; ``""`` if
        dimensionless.
    description : str
        One line saying what the value is (stored as a dataset attribute).
    """

    value: Any
    units: str = ""
    description: str = ""


# ---------------------------------------------------------------------------- atomic files
def fsync_dir(folder: str | os.PathLike) -> None:
    """Fsync a directory so that a rename inside it is durable (no-op where unsupported)."""
    try:
        fd = os.open(os.fspath(folder), os.O_RDONLY)
    except OSError:  # pragma: no cover - e.g. platforms without directory fds
        return
    try:
        os.fsync(fd)
    except OSError:  # pragma: no cover
        pass
    finally:
        os.close(fd)


def fsync_file(path: str | os.PathLike) -> None:
    """Fsync a closed file by name."""
    fd = os.open(os.fspath(path), os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def temp_path_for(path: Path) -> Path:
    """Temporary file name next to ``path`` (same folder, so the rename is atomic)."""
    return path.with_name(path.name + ".tmp")


def commit_temp(tmp: Path, path: Path) -> None:
    """Fsync ``tmp``, rename it over ``path`` and fsync the folder."""
    fsync_file(tmp)
    os.replace(tmp, path)
    fsync_dir(path.parent)


def atomic_write_bytes(path: str | os.PathLike, data: bytes) -> Path:
    """Write ``data`` to ``path`` atomically (temp file, flush, fsync, rename, dir fsync)."""
    path = Path(path)
    tmp = temp_path_for(path)
    try:
        with open(tmp, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    fsync_dir(path.parent)
    return path


def atomic_write_text(path: str | os.PathLike, text: str) -> Path:
    """Write UTF-8 ``text`` to ``path`` atomically."""
    return atomic_write_bytes(path, text.encode("utf-8"))


# ---------------------------------------------------------------------------- JSON
def to_jsonable(obj: Any) -> Any:
    """Convert numpy and other common types to plain JSON values.

    Floats that are NaN or infinite become ``None`` (JSON ``null``); numpy scalars become
    Python numbers; arrays, tuples and sets become lists; complex numbers become
    ``{"real": x, "imag": y}``; :class:`Quantity` becomes ``{"value", "units",
    "description"}``; paths become strings; mapping keys become strings.
    """
    if obj is None or isinstance(obj, (bool, str)):
        return obj
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        x = float(obj)
        return x if math.isfinite(x) else None
    if isinstance(obj, (complex, np.complexfloating)):
        z = complex(obj)
        return {"real": to_jsonable(z.real), "imag": to_jsonable(z.imag)}
    if isinstance(obj, Quantity):
        return {
            "value": to_jsonable(obj.value),
            "units": obj.units,
            "description": obj.description,
        }
    if isinstance(obj, np.ndarray):
        return [to_jsonable(v) for v in obj.tolist()] if obj.ndim else to_jsonable(obj.item())
    if isinstance(obj, Mapping):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, set, frozenset)):
        items = sorted(obj, key=repr) if isinstance(obj, (set, frozenset)) else obj
        return [to_jsonable(v) for v in items]
    if isinstance(obj, os.PathLike):
        return os.fspath(obj)
    if isinstance(obj, bytes):
        return obj.decode("utf-8", errors="replace")
    raise TypeError(f"cannot convert {type(obj).__name__} to JSON")


def _dumps(obj: Any, **kw: Any) -> str:
    return json.dumps(to_jsonable(obj), allow_nan=False, ensure_ascii=False, **kw)


def write_summary(path: str | os.PathLike, summary: Mapping[str, Any]) -> Path:
    """Write the headline numbers as JSON, atomically.

    Parameters
    ----------
    path : path-like
        Target file, usually ``<run>/summary.json``.
    summary : mapping
        Nested values; numpy types are converted by :func:`to_jsonable` (NaN -> ``null``).

    Returns
    -------
    pathlib.Path
        The written path.
    """
    text = _dumps(summary, sort_keys=True, indent=2) + "\n"
    return atomic_write_text(path, text)


def read_summary(path: str | os.PathLike) -> dict:
    """Read a summary written by :func:`write_summary`."""
    with open(path, encoding="utf-8") as fh:
        return json.load(fh)


# ---------------------------------------------------------------------------- HDF5 results
def _check_key(key: Any) -> str:
    if not isinstance(key, str) or not key or "/" in key or key in (".", ".."):
        raise ValueError(f"invalid HDF5 name {key!r}: use a non-empty string without '/'")
    return key


def _write_leaf(group: h5py.Group, name: str, value: Any) -> None:
    units = description = None
    if isinstance(value, Quantity):
        units, description = value.units, value.description
        value = value.value
    if isinstance(value, Quantity) or isinstance(value, Mapping):
        raise TypeError(f"{name!r}: a Quantity must hold an array or a scalar")
    if value is None:
        ds = group.create_dataset(name, data=h5py.Empty("f8"))
        ds.attrs[_KIND] = "none"
    elif isinstance(value, (str, np.str_)):
        ds = group.create_dataset(name, data=str(value), dtype=h5py.string_dtype())
        ds.attrs[_KIND] = "str"
    elif isinstance(value, (bool, int, float, complex, np.generic)):
        ds = group.create_dataset(name, data=np.asarray(value))
        ds.attrs[_KIND] = "scalar"
    else:
        arr = np.asarray(value)
        if arr.dtype.kind in "US" or (
            arr.dtype == object and all(isinstance(v, str) for v in arr.ravel())
        ):
            ds = group.create_dataset(
                name, data=arr.astype(object), dtype=h5py.string_dtype()
            )
            ds.attrs[_KIND] = "strarray"
        elif arr.dtype == object:
            raise TypeError(f"{name!r}: cannot store an object array in HDF5")
        else:
            kw = {}
            if arr.size >= GZIP_MIN_ELEMENTS:
                kw = {"compression": "gzip", "compression_opts": 4, "shuffle": True}
            ds = group.create_dataset(name, data=arr, **kw)
            ds.attrs[_KIND] = "array"
    if units is not None:
        ds.attrs["units"] = units
        ds.attrs["description"] = description


def _write_tree(group: h5py.Group, tree: Mapping[str, Any]) -> None:
    for key, value in tree.items():
        name = _check_key(key)
        if isinstance(value, Mapping):
            _write_tree(group.create_group(name), value)
        else:
            _write_leaf(group, name, value)


def _encode_attrs(attrs: Mapping[str, Any]) -> tuple[dict[str, Any], list[str]]:
    out: dict[str, Any] = {}
    json_keys: list[str] = []
    for key, value in attrs.items():
        if not isinstance(key, str) or key in (_JSON_ATTRS,):
            raise ValueError(f"invalid attribute name {key!r}")
        if isinstance(value, (str, bool, int, np.bool_, np.integer)):
            out[key] = value
        elif isinstance(value, (float, np.floating)) and math.isfinite(float(value)):
            out[key] = float(value)
        else:  # dicts, lists, None, NaN, arrays, Quantity, ...: JSON text
            out[key] = _dumps(value, sort_keys=True)
            json_keys.append(key)
    return out, json_keys


def write_results(
    path: str | os.PathLike, tree: Mapping[str, Any], *, attrs: Mapping[str, Any]
) -> Path:
    """Write a nested dict to an HDF5 file atomically.

    Parameters
    ----------
    path : path-like
        Target file, usually ``<run>/results.h5``.
    tree : mapping
        Nested mappings become groups.  Leaves: arrays and lists become datasets (gzip
        for ``>= GZIP_MIN_ELEMENTS`` elements; complex dtypes allowed), numbers become scalar
        datasets, strings become string datasets, ``None`` an empty dataset, and a
        :class:`Quantity` becomes its value's dataset with ``units`` and ``description``
        attributes.
    attrs : mapping
        Root attributes (scenario text, versions, seeds, conventions, timings,
        tolerances).  Strings, ints, bools and finite floats are stored as they are; any
        other value (dict, list, None, NaN, ...) is stored as a JSON string and decoded
        again by :func:`read_results`.

    Returns
    -------
    pathlib.Path
        The written path.
    """
    path = Path(path)
    tmp = temp_path_for(path)
    encoded, json_keys = _encode_attrs(attrs)
    try:
        with h5py.File(tmp, "w") as fh:
            _write_tree(fh, tree)
            for key, value in encoded.items():
                fh.attrs[key] = value
            fh.attrs[_JSON_ATTRS] = json.dumps(json_keys)
            fh.flush()
        commit_temp(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return path


def _read_leaf(ds: h5py.Dataset, quantities: bool) -> Any:
    kind = ds.attrs.get(_KIND, "array")
    if kind == "none":
        value = None
    elif kind == "str":
        value = ds.asstr()[()]
    elif kind == "strarray":
        value = ds.asstr()[()].tolist()
    elif kind == "scalar":
        value = ds[()].item()
    else:
        value = ds[()]
    if quantities and "units" in ds.attrs:
        return Quantity(value, str(ds.attrs["units"]), str(ds.attrs.get("description", "")))
    return value


def _read_tree(group: h5py.Group, quantities: bool) -> dict:
    out: dict[str, Any] = {}
    for key, item in group.items():
        if isinstance(item, h5py.Group):
            out[key] = _read_tree(item, quantities)
        else:
            out[key] = _read_leaf(item, quantities)
    return out


def _attr_value(value: Any) -> Any:
    if isinstance(value, bytes):
        return value.decode("utf-8")
    if isinstance(value, np.generic):
        return value.item()
    return value


def read_results(path: str | os.PathLike, *, quantities: bool = True) -> tuple[dict, dict]:
    """Read a file written by :func:`write_results`.

    Parameters
    ----------
    path : path-like
        The HDF5 file.
    quantities : bool
        If True, datasets with a ``units`` attribute come back as :class:`Quantity`;
        otherwise only their values are returned.

    Returns
    -------
    tree : dict
        Nested dict of the datasets (arrays as numpy arrays, scalars as Python numbers,
        strings as ``str``, string arrays as lists of ``str``).
    attrs : dict
        The root attributes, with JSON-encoded ones decoded.
    """
    with h5py.File(path, "r") as fh:
        tree = _read_tree(fh, quantities)
        raw = {k: _attr_value(v) for k, v in fh.attrs.items()}
    json_keys = set(json.loads(raw.pop(_JSON_ATTRS, "[]")))
    attrs = {k: (json.loads(v) if k in json_keys else v) for k, v in raw.items()}
    return tree, attrs


# ---------------------------------------------------------------------------- metadata
def utc_timestamp(compact: bool = False) -> str:
    """Current UTC time, ISO 8601 (``compact=True``: ``20250101T120000Z`` for file names)."""
    now = _dt.datetime.now(_dt.timezone.utc)
    if compact:
        return now.strftime("%Y%m%dT%H%M%SZ")
    return now.isoformat(timespec="seconds").replace("+00:00", "Z")


def _dist_version(name: str) -> str | None:
    try:
        return importlib.metadata.version(name)
    except importlib.metadata.PackageNotFoundError:
        return None


def package_versions() -> dict[str, str]:
    """Versions of Python and the libraries a result depends on.

    Returns
    -------
    dict
        Keys ``python``, ``numpy``, ``scipy``, ``numba``, ``h5py``, ``matplotlib``,
        ``largeq`` and ``jax`` (the last only if installed); plus ``hdf5`` (the C library).
    """
    import numpy
    import scipy

    import largeq

    out = {
        "python": platform.python_version(),
        "numpy": numpy.__version__,
        "scipy": scipy.__version__,
        "h5py": h5py.__version__,
        "hdf5": h5py.version.hdf5_version,
        "largeq": getattr(largeq, "__version__", None) or _dist_version("largeq") or "unknown",
    }
    for name in ("numba", "matplotlib"):
        out[name] = _dist_version(name) or "not installed"
    if importlib.util.find_spec("jax") is not None:
        out["jax"] = _dist_version("jax") or "unknown"
    return out


def run_metadata() -> dict[str, Any]:
    """Where and when a run happened.

    Returns
    -------
    dict
        ``hostname``, ``platform``, ``machine``, ``python_implementation``, ``cpu_count``
        (logical), ``cpu_count_physical``, ``memory_total_bytes`` and ``timestamp_utc``.
    """
    import psutil

    return {
        "hostname": socket.gethostname(),
        "platform": platform.platform(),
        "machine": platform.machine(),
        "python_implementation": platform.python_implementation(),
        "python_executable": sys.executable,
        "cpu_count": os.cpu_count(),
        "cpu_count_physical": psutil.cpu_count(logical=False),
        "memory_total_bytes": int(psutil.virtual_memory().total),
        "timestamp_utc": utc_timestamp(),
    }


# ---------------------------------------------------------------------------- run folders
def _slug(text: str) -> str:
    slug = re.sub(r"[^A-Za-z0-9._-]+", "-", text).strip("-.")
    return slug[:60] or "run"


def _is_run_folder(folder: Path) -> bool:
    return any((folder / m).exists() for m in RUN_MARKERS)


def make_run_folder(
    base: str | os.PathLike | None, name_hint: str, *, root: str | os.PathLike = "runs"
) -> Path:
    """Create (or reuse) the folder a command writes into.

    Parameters
    ----------
    base : path-like or None
        Folder asked for by the user.  Created if missing; reused if it is empty or
        already a run folder (holds one of :data:`RUN_MARKERS`, e.g. to resume).
        ``FileExistsError`` if it is a file or a non-empty folder that is not a run.
    name_hint : str
        Used when ``base`` is None: the folder is ``<root>/<name_hint>-<UTC timestamp>``
        (with ``-1``, ``-2``, ... appended on collision).
    root : path-like
        Parent of automatically named folders.

    Returns
    -------
    pathlib.Path
        The folder, containing a ``.largeq-run`` marker file.
    """
    if base is not None:
        folder = Path(base)
        if folder.exists():
            if not folder.is_dir():
                raise FileExistsError(f"{folder} exists and is not a folder")
            if any(folder.iterdir()) and not _is_run_folder(folder):
                raise FileExistsError(
                    f"{folder} is a non-empty folder that is not a largeq run folder"
                )
        folder.mkdir(parents=True, exist_ok=True)
    else:
        parent = Path(root)
        parent.mkdir(parents=True, exist_ok=True)
        stem = f"{_slug(name_hint)}-{utc_timestamp(compact=True)}"
        for i in range(10_000):
            folder = parent / (stem if i == 0 else f"{stem}-{i}")
            try:
                folder.mkdir()
                break
            except FileExistsError:
                continue
        else:  # pragma: no cover
            raise FileExistsError(f"could not create a fresh folder under {parent}")
    marker = folder / ".largeq-run"
    if not marker.exists():
        marker.write_text(_dumps({"created_utc": utc_timestamp()}) + "\n", encoding="utf-8")
    return folder
