"""
Cache of stage results between single-stage commands (``OUT/.geosp/``), in open formats.

The folder holds three files (docs/outputs.md, "The .geosp/ cache folder"):

- ``state.json``: the products of each cached stage as a tree of JSON values,
  in which every array is a reference into
- ``arrays.npz``: the arrays, read with ``allow_pickle=False``;
- ``manifest.json``: geosp's version, each cached stage's key, the SHA-256 of
  the two data files, and an HMAC-SHA256 of all of that under a key private
  to the user (``cache-key`` in the user's cache folder, readable by the user
  only).

Nothing in these files can name code to run. Only the classes listed in
:data:`ALLOWED` are rebuilt, by creating an empty instance and setting its
attributes; no constructor, ``__setstate__`` or import named by the file is
called. A manifest that does not verify (another user, another geosp
version, an altered or half-written file) is ignored and the stages run
again.

A stage's key (:func:`stage_keys`) is a hash of geosp's version, the content of
every input file (with its side files), the project file's input sections and
the options of that stage and of every stage before it; a cached stage is used
only when its key matches, so a stage whose inputs changed runs again.
"""

from __future__ import annotations

import contextlib
import hashlib
import hmac
import io
import json
import math
import os
import secrets
import tempfile
from pathlib import Path

import numpy as np

from .._userdirs import user_cache_dir

__all__ = ["ALLOWED", "CacheError", "read_state", "stage_keys", "write_state"]

STATE_DIR = ".geosp"
_TREE, _ARRAYS, _MANIFEST = "state.json", "arrays.npz", "manifest.json"
_LEGACY = ("state.pkl",)  # a pickle left by an earlier geosp: never read, removed on the next write
_FORMAT = 1

#: Classes the cache may rebuild (module, name). Anything else in a state is refused on writing.
ALLOWED = {
    ("geosp.models", name) for name in (
        "Stations", "Fault", "Raster", "Readings", "ElectrodeChecks", "Survey", "Reduction", "GridResult",
        "FaultSegment", "Detection", "SegmentFit", "FitResult")
} | {
    ("geosp._network", "NetworkCovariance"),
    ("geosp.interpret", "Blocked"),
    ("geosp.interpret", "Interpretation"),
    ("geosp.interpret.blocks", "Block"),
    ("geosp.interpret.engine", "Source"),
    ("geosp.interpret.engine", "Selection"),
    ("geosp.interpret.candidates", "Window"),
    ("geosp.interpret.linear", "Frame"),
    ("geosp.interpret.noise", "NoiseModel"),
    ("geosp.sources.fault_patch", "FaultPatch"),
    ("geosp.sources.pole_pair", "PolePair"),
}

# Extra files that belong to an input file (their content changes its meaning).
_SIDE_SUFFIXES = {".shp": (".shx", ".dbf", ".prj", ".cpg", ".qpj")}
_SIDE_EXTRA = (".aux.xml",)


class CacheError(Exception):
    """A state that cannot be written in the cache's formats (a value of a type it does not keep)."""


# ---------------------------------------------------------------------------
# Keys


def _file_digest(path, chunk=1 << 20):
    h = hashlib.sha256()
    with open(path, "rb") as handle:
        while block := handle.read(chunk):
            h.update(block)
    return h.hexdigest()


def _input_files(path):
    path = Path(path)
    files = [path]
    files += [path.with_suffix(s) for s in _SIDE_SUFFIXES.get(path.suffix.lower(), ())]
    files += [Path(str(path) + s) for s in _SIDE_EXTRA]
    return [f for f in files if f.is_file()]


def stage_keys(project, version, order):
    """
    The key of each stage in ``order`` for this project (hex SHA-256).

    Parameters
    ----------
    project : geosp.io.project.Project
    version : str
        geosp's version.
    order : sequence of str
        The stages in the order they run; each key covers every earlier one.
    """
    # Input files enter by content (not by where they are: a moved folder keeps its cache).
    sections = {}
    for name in ("survey", "stations", "faults", "readings", "dem"):
        section = dict(getattr(project, name) or {})
        for key in ("path", "electrode_checks"):
            if section.get(key):
                section[key] = [(f.suffix, _file_digest(f)) for f in _input_files(section[key])]
        sections[name] = section
    key = _digest({"version": version, "format": _FORMAT, "inputs": sections})
    keys = {}
    for stage in order:
        key = _digest({"after": key, "stage": stage, "options": project.stages.get(stage, {})})
        keys[stage] = key
    return keys


def _digest(value):
    text = json.dumps(value, sort_keys=True, default=str, ensure_ascii=True)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


# ---------------------------------------------------------------------------
# The user's key


def _user_key():
    """The user's private cache key (created on first use), or None when it cannot be kept."""
    try:
        path = user_cache_dir() / "cache-key"
        with contextlib.suppress(FileExistsError):
            fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
            with os.fdopen(fd, "w") as handle:
                handle.write(secrets.token_hex(32))
        key = path.read_text(encoding="ascii").strip()
    except (OSError, UnicodeDecodeError):
        return None
    return key.encode("ascii") if len(key) == 64 else None


def _sign(key, manifest):
    body = json.dumps({k: v for k, v in manifest.items() if k != "hmac"}, sort_keys=True).encode("utf-8")
    return hmac.new(key, body, hashlib.sha256).hexdigest()


# ---------------------------------------------------------------------------
# Encoding: a tree of JSON values plus a table of arrays


class _Encoder:
    def __init__(self):
        self.arrays = {}
        self.memo = {}  # id -> reference number (identity is kept: a shared object stays shared)
        self.keep = []  # the encoded objects, alive until the end so that ids are not reused

    def encode(self, value):
        if value is None or isinstance(value, (bool, str)):
            return value
        if isinstance(value, int):
            return value
        if isinstance(value, float):
            return value if math.isfinite(value) else {"$float": repr(value)}
        if isinstance(value, np.generic):
            return self.encode(value.item())
        ident = id(value)
        if ident in self.memo:
            return {"$ref": self.memo[ident]}
        number = len(self.memo)
        self.memo[ident] = number
        self.keep.append(value)
        return {"$id": number, **self._encode_new(value)}

    def _encode_new(self, value):
        if isinstance(value, list):
            return {"$list": [self.encode(v) for v in value]}
        if isinstance(value, tuple):
            return {"$tuple": [self.encode(v) for v in value]}
        if isinstance(value, dict):
            return {"$dict": [[self.encode(k), self.encode(v)] for k, v in value.items()]}
        if isinstance(value, np.ndarray):
            return self._array(value)
        kind = type(value)
        module = kind.__module__
        if module.startswith("pandas") and kind.__name__ == "DataFrame":
            return {"$frame": {"columns": [self.encode(c) for c in value.columns],
                               "data": [self._array(value[c].to_numpy()) for c in value.columns],
                               "index": self._array(value.index.to_numpy())}}
        if module.startswith("scipy.sparse") and value.format in ("csc", "csr"):
            return {"$sparse": {"format": value.format, "shape": list(value.shape),
                                "data": self._array(value.data), "indices": self._array(value.indices),
                                "indptr": self._array(value.indptr)}}
        if (module, kind.__qualname__) in ALLOWED:
            attrs = value.__getstate__() if type(value).__getstate__ is not object.__getstate__ else vars(value)
            return {"$object": [module, kind.__qualname__],
                    "attrs": [[name, self.encode(v)] for name, v in attrs.items()]}
        raise CacheError(f"a value of type {module}.{kind.__qualname__} cannot be kept in the cache")

    def _array(self, array):
        if array.dtype.kind in "biufcmM":
            name = f"a{len(self.arrays)}"
            self.arrays[name] = array
            return {"$array": name}
        if array.dtype.kind in "US":
            name = f"a{len(self.arrays)}"
            self.arrays[name] = array
            return {"$array": name}
        if array.dtype == object:
            flat = array.ravel()
            if all(type(v) is str for v in flat):
                name = f"a{len(self.arrays)}"
                self.arrays[name] = flat.astype(str).reshape(array.shape)
                return {"$array": name, "object": True}
            return {"$objects": [self.encode(v) for v in flat], "shape": list(array.shape)}
        raise CacheError(f"an array of dtype {array.dtype} cannot be kept in the cache")


class _Decoder:
    def __init__(self, arrays):
        self.arrays = arrays
        self.memo = {}

    def decode(self, node):
        if not isinstance(node, dict):
            if isinstance(node, list):  # only inside known containers
                raise ValueError("a bare list in the cache tree")
            return node
        if "$float" in node:
            text = node["$float"]
            if text not in ("nan", "inf", "-inf"):
                raise ValueError(f"not a float: {text!r}")
            return float(text)
        if "$ref" in node:
            return self.memo[node["$ref"]]
        number = node["$id"]
        if "$list" in node:
            out = self.memo[number] = []
            out.extend(self.decode(v) for v in node["$list"])
            return out
        if "$tuple" in node:
            out = self.memo[number] = tuple(self.decode(v) for v in node["$tuple"])
            return out
        if "$dict" in node:
            out = self.memo[number] = {}
            for k, v in node["$dict"]:
                out[self.decode(k)] = self.decode(v)
            return out
        if "$array" in node or "$objects" in node:
            out = self.memo[number] = self._array(node)
            return out
        if "$frame" in node:
            import pandas as pd

            spec = node["$frame"]
            columns = [self.decode(c) for c in spec["columns"]]
            data = {c: self._array(a) for c, a in zip(columns, spec["data"], strict=True)}
            out = self.memo[number] = pd.DataFrame(data, index=self._array(spec["index"]), columns=columns)
            return out
        if "$sparse" in node:
            import scipy.sparse as sp

            spec = node["$sparse"]
            make = {"csc": sp.csc_matrix, "csr": sp.csr_matrix}[spec["format"]]
            parts = (self._array(spec["data"]), self._array(spec["indices"]), self._array(spec["indptr"]))
            out = self.memo[number] = make(parts, shape=tuple(spec["shape"]))
            return out
        if "$object" in node:
            module, name = node["$object"]
            if (module, name) not in ALLOWED:
                raise ValueError(f"class {module}.{name} is not one the cache may rebuild")
            import importlib

            kind = getattr(importlib.import_module(module), name)
            out = self.memo[number] = object.__new__(kind)
            for attr, value in node["attrs"]:
                # Values are data only (nothing here can be a function), so setting them runs no code.
                if not isinstance(attr, str) or not attr.isidentifier() or attr.startswith("__"):
                    raise ValueError(f"attribute name {attr!r}")
                object.__setattr__(out, attr, self.decode(value))
            if kind.__name__ == "NetworkCovariance":
                object.__setattr__(out, "_lu", None)
            return out
        raise ValueError(f"unknown node {sorted(node)[:3]}")

    def _array(self, node):
        if "$objects" in node:
            items = [self.decode(v) for v in node["$objects"]]
            out = np.empty(len(items), dtype=object)
            out[:] = items
            return out.reshape(node["shape"])
        array = self.arrays[node["$array"]]
        return array.astype(object) if node.get("object") else array


# ---------------------------------------------------------------------------
# Reading and writing


def _folder(out):
    return Path(out) / STATE_DIR


def write_state(out, *, version, keys, products):
    """
    Write the products of the stages in ``products`` ({stage: {field: value}}) to ``OUT/.geosp/``.

    Each stage is stored with its key (``keys[stage]``). Nothing is written
    when the user's cache key cannot be kept (the stages then run again next
    time). Raises :class:`CacheError` when a product cannot be stored.
    """
    key = _user_key()
    folder = _folder(out)
    folder.mkdir(parents=True, exist_ok=True)
    for name in _LEGACY + (_MANIFEST,):
        (folder / name).unlink(missing_ok=True)  # from here until the new manifest, the cache is invalid
    if key is None or not products:
        return None
    encoder = _Encoder()
    tree = {"format": _FORMAT, "stages": {stage: encoder.encode(dict(p)) for stage, p in products.items()}}
    buffer = io.BytesIO()
    np.savez(buffer, **encoder.arrays)
    blobs = {_TREE: json.dumps(tree, ensure_ascii=True, allow_nan=False).encode("utf-8"),
             _ARRAYS: buffer.getvalue()}
    for name, blob in blobs.items():
        _write_atomic(folder / name, blob)
    manifest = {"format": _FORMAT, "version": version, "stages": {s: keys[s] for s in products},
                "sha256": {name: hashlib.sha256(blob).hexdigest() for name, blob in blobs.items()}}
    manifest["hmac"] = _sign(key, manifest)
    _write_atomic(folder / _MANIFEST, json.dumps(manifest, indent=1).encode("utf-8"))
    return folder


def _write_atomic(path, blob):
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}-", suffix=".tmp")
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(blob)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def read_state(out, *, version, keys, stages):
    """
    The cached products of ``stages`` (in order) whose keys match, and a note saying why any are missing.

    Returns
    -------
    products : dict
        {stage: {field: value}} for the longest run of ``stages`` from the
        first whose cached key equals ``keys[stage]``.
    note : str or None
        Why the cache was not used (None when every stage was, or when there
        was no cache at all).
    """
    folder = _folder(out)
    if not (folder / _MANIFEST).exists():
        return {}, None
    key = _user_key()
    try:
        manifest = json.loads((folder / _MANIFEST).read_text(encoding="utf-8"))
        if key is None or not hmac.compare_digest(str(manifest.get("hmac", "")), _sign(key, manifest)):
            return {}, "it was not written by this user's geosp or has been altered"
        if manifest.get("version") != version or manifest.get("format") != _FORMAT:
            return {}, f"it was written by geosp {manifest.get('version')}"
        blobs = {}
        for name in (_TREE, _ARRAYS):
            blob = (folder / name).read_bytes()
            if hashlib.sha256(blob).hexdigest() != manifest["sha256"][name]:
                return {}, f"{name} does not match its manifest"
            blobs[name] = blob
        usable = []
        for stage in stages:
            if manifest["stages"].get(stage) != keys[stage]:
                break
            usable.append(stage)
        if not usable:
            changed = stages[0] if stages else "?"
            return {}, f"the inputs or options of '{changed}' changed since it was written"
        with np.load(io.BytesIO(blobs[_ARRAYS]), allow_pickle=False) as npz:
            arrays = {name: npz[name] for name in npz.files}
        tree = json.loads(blobs[_TREE])
        decoder = _Decoder(arrays)
        products = {stage: decoder.decode(tree["stages"][stage]) for stage in usable}
    except Exception as err:  # a cache that cannot be read is run again, whatever the reason
        return {}, f"it cannot be read ({type(err).__name__}: {err})"
    note = None
    if len(usable) < len(stages):
        note = f"the inputs or options of '{stages[len(usable)]}' changed since it was written"
    return products, note
