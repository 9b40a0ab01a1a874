"""Bundles: the arrays and results of a trusted run, stored for replay on new hardware.

A bundle is a directory holding ``manifest.json`` and one ``.npy`` file per array::

    bundle/
      manifest.json      schema, versions, config, formats, device, seed, hashes, errors
      input.npy
      weight.npy
      output.npy
      ...

Reading a bundle never executes anything from it: arrays are loaded with
``numpy.load(allow_pickle=False)`` from bytes whose size and SHA-256 were checked against the
manifest, and the manifest is plain JSON. :func:`read_bundle` refuses, with a
:class:`BundleError` naming the file, a missing, extra, truncated or altered file, an object
(pickled) or non-numeric array, an array name that could escape the directory (``../x``), and a
manifest of another schema or of a newer major version.

Compatibility
-------------
The manifest carries ``schema_version = "MAJOR.MINOR"`` (now :data:`SCHEMA_VERSION`). A reader
accepts every bundle of its major version, whatever the minor: a minor version only adds optional
manifest keys, which older readers ignore and newer readers treat as absent. Removing a key or
changing its meaning bumps the major version; a reader refuses a newer major version, naming both
versions, and keeps reading the majors before its own.
"""
from __future__ import annotations

import hashlib
import importlib.metadata
import io
import json
import os
import platform
import re
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from .ops import _checks

__all__ = ["SCHEMA", "SCHEMA_VERSION", "MANIFEST", "Bundle", "BundleError", "read_bundle",
           "write_bundle"]

SCHEMA = "refops.bundle"
SCHEMA_VERSION = "1.1"  # 1.1: layer bundles (config.op and config.cases, see refops.harness.replay)
MANIFEST = "manifest.json"

REQUIRED_KEYS = ("config", "formats", "device", "seed")
"""Manifest keys that the caller of :func:`write_bundle` provides (``errors`` is optional)."""

_WRITTEN_KEYS = ("schema", "schema_version", "libraries", "arrays")
_NAME = re.compile(r"[A-Za-z0-9_][A-Za-z0-9_.-]{0,127}")
_NUMERIC_KINDS = "biufc"
_MAX_MANIFEST_BYTES = 16 * 2 ** 20


class BundleError(ValueError):
    """A bundle that cannot be written or trusted; the message names the file."""


@dataclass(frozen=True)
class Bundle:
    """A bundle as read back: the full manifest and every array (read-only), by name."""

    directory: Path
    manifest: dict
    arrays: dict[str, np.ndarray]

    @property
    def schema_version(self) -> str:
        return self.manifest["schema_version"]

    @property
    def config(self) -> Any:
        return self.manifest["config"]

    @property
    def errors(self) -> dict:
        """Per tensor, the error the trusted run showed against float64 (empty if not given)."""
        return self.manifest.get("errors", {})


# ---------------------------------------------------------------------------------------------
# Writing

def write_bundle(directory: str | os.PathLike, *, arrays: Mapping[str, np.ndarray],
                 manifest: Mapping[str, Any]) -> Path:
    """Write a new bundle into ``directory`` (created; it must not exist or be empty).

    Parameters
    ----------
    directory : path
    arrays : mapping from name to numpy array
        Names are file stems (letters, digits, ``_``, ``.``, ``-``; no leading dot, at most 128
        characters, distinct ignoring case); arrays have a numeric dtype (bool, integer, float,
        complex), never ``object``.
    manifest : mapping
        JSON-serialisable, with ``config``, ``formats``, ``device`` and ``seed``, optionally
        ``errors`` (per tensor, the error of the trusted run against float64) and any other key
        except those refops writes itself (``schema``, ``schema_version``, ``libraries``,
        ``arrays``). Tuples are stored as lists; numpy scalars as Python numbers.

    Returns
    -------
    The bundle directory. The manifest is written last (atomically), so a bundle interrupted
    while being written has no manifest and is refused by :func:`read_bundle`.
    """
    directory = _check_directory_for_writing(directory)
    arrays = _check_arrays(arrays)
    manifest = _check_manifest_for_writing(manifest)
    directory.mkdir(parents=True, exist_ok=True)
    entries = {}
    for name, array in arrays.items():
        data = _npy_bytes(array)
        (directory / _file_name(name)).write_bytes(data)
        entries[name] = {"file": _file_name(name), "bytes": len(data),
                         "sha256": hashlib.sha256(data).hexdigest(),
                         "dtype": array.dtype.str, "shape": list(array.shape)}
    full = {"schema": SCHEMA, "schema_version": SCHEMA_VERSION, **manifest,
            "libraries": library_versions(), "arrays": entries}
    _write_atomically(directory / MANIFEST, _to_json(full))
    return directory


def library_versions() -> dict[str, str | None]:
    """Versions of Python, numpy, torch (``None`` if not installed; not imported) and refops."""
    from . import __version__
    return {"python": platform.python_version(), "numpy": np.__version__,
            "torch": _installed_version("torch"), "refops": __version__}


def _installed_version(package: str) -> str | None:
    try:
        return importlib.metadata.version(package)
    except importlib.metadata.PackageNotFoundError:
        return None


def _npy_bytes(array: np.ndarray) -> bytes:
    buffer = io.BytesIO()
    np.save(buffer, array, allow_pickle=False)
    return buffer.getvalue()


def _to_json(manifest: dict) -> str:
    return json.dumps(manifest, indent=2, sort_keys=True, allow_nan=False,
                      default=_json_scalar) + "\n"


def _json_scalar(value: Any) -> Any:
    if isinstance(value, np.generic) and value.dtype.kind in _NUMERIC_KINDS:
        return value.item()
    raise TypeError(f"{_checks.describe(value)} ({type(value).__name__}) is not JSON data")


def _write_atomically(path: Path, text: str) -> None:
    handle, temporary = tempfile.mkstemp(dir=path.parent, prefix=".manifest-", suffix=".tmp")
    with os.fdopen(handle, "w", encoding="utf-8") as stream:
        stream.write(text)
    os.replace(temporary, path)


def _check_directory_for_writing(value: Any) -> Path:
    directory = _check_path(value)
    if directory.exists() and (not directory.is_dir() or any(directory.iterdir())):
        _checks.fail("directory", str(directory), "must not exist or be an empty directory "
                     "(a bundle is never written over another)")
    return directory


def _check_path(value: Any) -> Path:
    if not isinstance(value, (str, os.PathLike)):
        _checks.fail("directory", value, f"expected a path (str or os.PathLike), "
                     f"got {type(value).__name__}", TypeError)
    return Path(value)


def _check_arrays(value: Any) -> dict[str, np.ndarray]:
    if not isinstance(value, Mapping):
        _checks.fail("arrays", value, f"expected a mapping from names to numpy arrays, "
                     f"got {type(value).__name__}", TypeError)
    folded: dict[str, str] = {}
    for name, array in value.items():
        _check_name(f"arrays[{name!r}]", name)
        if name.lower() in folded:
            _checks.fail("arrays", sorted(value), f"names {folded[name.lower()]!r} and {name!r} "
                         "differ only in case (one file on case-insensitive file systems)")
        folded[name.lower()] = name
        if not isinstance(array, np.ndarray):
            _checks.fail(f"arrays[{name!r}]", array, f"expected a numpy array, "
                         f"got {type(array).__name__}", TypeError)
        if array.dtype.kind not in _NUMERIC_KINDS or array.dtype.fields is not None:
            _checks.fail(f"arrays[{name!r}]", array, "expected a numeric dtype (bool, integer, "
                         "float or complex); object and structured arrays are never stored",
                         TypeError)
    return dict(value)


def _check_name(label: str, name: Any) -> str:
    if not isinstance(name, str):
        _checks.fail(label, name, f"an array name must be a str, got {type(name).__name__}",
                     TypeError)
    if not _NAME.fullmatch(name) or ".." in name:
        _checks.fail(label, name, "an array name is letters, digits, '_', '.', '-' (no path "
                     "separators, no '..', no leading dot, at most 128 characters)")
    return name


def _check_manifest_for_writing(value: Any) -> dict:
    if not isinstance(value, Mapping) or not all(isinstance(k, str) for k in value):
        _checks.fail("manifest", value, f"expected a mapping with str keys, "
                     f"got {type(value).__name__}", TypeError)
    missing = [k for k in REQUIRED_KEYS if k not in value]
    if missing:
        _checks.fail("manifest", sorted(value), f"lacks the key {missing[0]!r} "
                     f"(required: {', '.join(REQUIRED_KEYS)})")
    reserved = [k for k in _WRITTEN_KEYS if k in value]
    if reserved:
        _checks.fail("manifest", sorted(value), f"the key {reserved[0]!r} is written by refops; "
                     "leave it out")
    if "errors" in value and not isinstance(value["errors"], Mapping):
        _checks.fail("manifest['errors']", value["errors"], "expected a mapping from tensor "
                     "name to the error of the trusted run", TypeError)
    try:
        return json.loads(_to_json(dict(value)))
    except (TypeError, ValueError) as error:
        _checks.fail("manifest", dict(value), f"must be JSON data (no NaN or infinity): {error}")


# ---------------------------------------------------------------------------------------------
# Reading

def read_bundle(directory: str | os.PathLike) -> Bundle:
    """Read and verify the bundle in ``directory``.

    Every check passes before anything is returned: the manifest is of schema :data:`SCHEMA`
    with a major version this refops reads, every listed file is present with its recorded size
    and SHA-256, holds a numeric array of the recorded dtype and shape, and no other file is in
    the directory. The arrays come back read-only.

    Raises
    ------
    BundleError
        Naming the file at fault and what was wrong with it.
    """
    directory = _check_path(directory)
    if not directory.is_dir():
        raise BundleError(f"{directory}: no such bundle directory")
    manifest = _read_manifest(directory / MANIFEST)
    entries = _array_entries(manifest, directory / MANIFEST)
    _refuse_unexpected_files(directory, {MANIFEST, *(_file_name(n) for n in entries)})
    arrays = {name: _read_array(directory / _file_name(name), entry)
              for name, entry in entries.items()}
    return Bundle(directory=directory, manifest=manifest, arrays=arrays)


def _read_manifest(path: Path) -> dict:
    if not path.is_file():
        raise BundleError(f"{path}: missing (every bundle has a {MANIFEST})")
    if path.stat().st_size > _MAX_MANIFEST_BYTES:
        raise BundleError(f"{path}: larger than {_MAX_MANIFEST_BYTES} bytes; not a bundle manifest")
    try:
        manifest = json.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as error:
        raise BundleError(f"{path}: not valid JSON ({error})") from None
    if not isinstance(manifest, dict):
        raise BundleError(f"{path}: expected a JSON object, got {type(manifest).__name__}")
    if manifest.get("schema") != SCHEMA:
        raise BundleError(f"{path}: schema={manifest.get('schema')!r}, expected {SCHEMA!r}")
    _check_schema_version(path, manifest.get("schema_version"))
    return manifest


def _check_schema_version(path: Path, version: Any) -> None:
    match = re.fullmatch(r"(\d+)\.(\d+)", version) if isinstance(version, str) else None
    if match is None:
        raise BundleError(f"{path}: schema_version={version!r}, expected 'MAJOR.MINOR'")
    major, supported = int(match.group(1)), int(SCHEMA_VERSION.split(".")[0])
    if major > supported:
        raise BundleError(f"{path}: schema_version={version!r} was written by a newer refops; "
                          f"this one reads bundles up to major version {supported} "
                          f"(schema {SCHEMA_VERSION})")
    if major < 1:
        raise BundleError(f"{path}: schema_version={version!r}: no such version")


def _array_entries(manifest: dict, path: Path) -> dict[str, dict]:
    entries = manifest.get("arrays")
    if not isinstance(entries, dict):
        raise BundleError(f"{path}: 'arrays' must map array names to file entries")
    for name, entry in entries.items():
        try:
            _check_name(f"arrays[{name!r}]", name)
        except (TypeError, ValueError) as error:
            raise BundleError(f"{path}: {error}") from None
        fields = {"file": str, "bytes": int, "sha256": str, "dtype": str, "shape": list}
        if not isinstance(entry, dict) or any(not isinstance(entry.get(k), t)
                                              for k, t in fields.items()):
            raise BundleError(f"{path}: the entry of array {name!r} needs "
                              f"{', '.join(fields)}; got {_checks.describe(entry)}")
        if entry["file"] != _file_name(name):
            raise BundleError(f"{path}: array {name!r} must be stored in {_file_name(name)!r}, "
                              f"not {entry['file']!r}")
    return entries


def _refuse_unexpected_files(directory: Path, expected: set[str]) -> None:
    for path in sorted(directory.iterdir()):
        if path.name not in expected:
            raise BundleError(f"{path}: unexpected file in the bundle (a bundle holds only "
                              f"{MANIFEST} and the .npy files it lists)")
        if path.is_symlink() or not path.is_file():
            raise BundleError(f"{path}: not a regular file (links are never followed)")


def _read_array(path: Path, entry: dict) -> np.ndarray:
    if not path.is_file():
        raise BundleError(f"{path}: missing (listed in {MANIFEST})")
    size = path.stat().st_size
    if size != entry["bytes"]:
        state = "truncated" if size < entry["bytes"] else "longer than recorded"
        raise BundleError(f"{path}: {state}: {size} bytes, the manifest records "
                          f"{entry['bytes']}")
    data = path.read_bytes()
    digest = hashlib.sha256(data).hexdigest()
    if digest != entry["sha256"]:
        raise BundleError(f"{path}: SHA-256 mismatch: the file hashes to {digest}, the manifest "
                          f"records {entry['sha256']} (the file was altered)")
    array = _load_npy(path, data)
    if array.dtype.str != entry["dtype"] or list(array.shape) != entry["shape"]:
        raise BundleError(f"{path}: holds dtype {array.dtype.str} shape {list(array.shape)}, the "
                          f"manifest records dtype {entry['dtype']} shape {entry['shape']}")
    array.flags.writeable = False
    return array


def _load_npy(path: Path, data: bytes) -> np.ndarray:
    """Parse ``.npy`` bytes without unpickling; refuse anything but a numeric array."""
    try:
        array = np.load(io.BytesIO(data), allow_pickle=False)
    except ValueError as error:
        if "allow_pickle" in str(error):
            raise BundleError(f"{path}: holds a pickled (object) array; bundles never "
                              "unpickle") from None
        raise BundleError(f"{path}: not a valid .npy file ({error})") from None
    except (EOFError, OSError) as error:
        raise BundleError(f"{path}: not a valid .npy file ({error})") from None
    if not isinstance(array, np.ndarray) or array.dtype.kind not in _NUMERIC_KINDS \
            or array.dtype.fields is not None:
        raise BundleError(f"{path}: holds {_checks.describe(array)}; bundles hold numeric "
                          "arrays only")
    return array


def _file_name(name: str) -> str:
    return f"{name}.npy"
