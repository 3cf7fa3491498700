"""Save and load fitted predictors with their provenance, in stimsteer's own HDF5 model layout.

Layout (version 1)::

    /                       attributes: stimsteer_file = "model", layout_version = 1, kind = "<storage kind>",
                                        created_utc = ISO-8601 time
    /state/                 the predictor's ``to_state()`` dict: each nested dict is a group, each numeric or
                            boolean numpy array a dataset, and the remaining plain values (numbers, strings, bools,
                            None, lists of those) one JSON text dataset ``__values__`` per group
    /provenance             JSON text: where the model came from (data hash, settings, split, scores, package
                            versions, creation time)

A storable class has a class attribute ``storage_kind``, a method ``to_state() -> dict`` and a classmethod
``from_state(state)``; :data:`_KINDS` maps each kind to ``"module:Class"`` (imported only when needed).
:class:`~stimsteer.sysid.statespace.StateSpaceModel` is stored through :func:`model_to_state` /
:func:`model_from_state`.
"""

from __future__ import annotations

import datetime as _dt
import importlib
import json
from pathlib import Path

import numpy as np

from ._files import hdf5_bytes, write_bytes
from ._records import versions
from .exceptions import FileFormatError, StimsteerError
from .registry import METHODS
from .statespace import StateSpaceModel

__all__ = ["save_predictor", "load_predictor", "model_to_state", "model_from_state", "LAYOUT_VERSION"]

LAYOUT_VERSION = 1
_MARK = "stimsteer_file"
_MARK_VALUE = "model"

# kind -> "module:Class"; one line per storable class.
_KINDS = {
    "state_space": "stimsteer.sysid.statespace:StateSpaceModel",
    "ridge_arx": "stimsteer.sysid.arx:RidgeArx",
    "subspace": "stimsteer.sysid.subspace.estimator:SubspaceId",
    "lsq_predictor": "stimsteer.sysid.datadriven.lsq:LsqPredictor",
    "hankel_predictor": "stimsteer.sysid.datadriven.hankel_predictor:HankelPredictor",
}



# ------------------------------------------------------------------------------------------------ state space
def model_to_state(model: StateSpaceModel) -> dict:
    """The storable state of a :class:`StateSpaceModel` (its matrices, rate, past window, names and info)."""
    return {
        "A": model.A, "B": model.B, "C": model.C, "D": model.D, "K": model.K,
        "innovation_cov": model.innovation_cov, "sample_rate_hz": float(model.sample_rate_hz),
        "past_steps": int(model.past_steps), "input_names": list(model.input_names),
        "output_names": list(model.output_names), "info": dict(model.info),
        "input_units": list(model.input_units), "output_units": list(model.output_units),
    }


def model_from_state(state: dict) -> StateSpaceModel:
    """Inverse of :func:`model_to_state`."""
    return StateSpaceModel(
        A=state["A"], B=state["B"], C=state["C"], D=state["D"], K=state["K"],
        innovation_cov=state["innovation_cov"], sample_rate_hz=state["sample_rate_hz"],
        past_steps=state["past_steps"], input_names=tuple(state["input_names"]),
        output_names=tuple(state["output_names"]), info=dict(state.get("info", {})),
        input_units=state.get("input_units"), output_units=state.get("output_units"),
    )


def _with_session_units(predictor, provenance: dict):
    """A predictor read from a file written before units were stored: units from the provenance's session record.

    Channels whose units are all empty take the session's units when the record has one per channel; otherwise
    they stay empty strings (unknown).
    """
    session = (provenance or {}).get("session") or {}
    changes = {}
    for side in ("input_units", "output_units"):
        have, recorded = tuple(getattr(predictor, side + "_", ())), session.get(side)
        if not any(have) and isinstance(recorded, list) and len(recorded) == len(have) and any(recorded):
            changes[side] = tuple(str(u) for u in recorded)
    if not changes:
        return predictor
    if isinstance(predictor, StateSpaceModel):
        return predictor.replace(**changes)
    for side, units in changes.items():
        setattr(predictor, side + "_", units)
    return predictor


# ------------------------------------------------------------------------------------------------ encoding
def _plain(value, where):
    """A JSON-ready copy of a plain value (numpy scalars and small object arrays converted)."""
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, (list, tuple)):
        return [_plain(v, where) for v in value]
    if isinstance(value, np.ndarray):  # string/object arrays only reach here
        return [_plain(v, where) for v in value.tolist()]
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    raise StimsteerError(
        f"cannot store {where} of type {type(value).__name__}; to_state() may hold numpy arrays, numbers, strings, "
        "bools, None, lists of those and nested dicts."
    )


def _write_dict(group, d: dict, where: str):
    plain = {}
    for key, value in d.items():
        key = str(key)
        if "/" in key or key.startswith("__") or key in (".",):
            raise StimsteerError(f"cannot store key {key!r} in {where}: keys may not contain '/' or start with '__'.")
        if isinstance(value, dict):
            _write_dict(group.create_group(key), value, f"{where}/{key}")
        elif isinstance(value, np.ndarray) and value.dtype.kind in "biufc":
            group.create_dataset(key, data=value, **_packing(value))
        else:
            plain[key] = _plain(value, f"{where}/{key}")
    group.create_dataset("__values__", data=json.dumps(plain, allow_nan=True))


#: Arrays of at least this many values that are mostly zeros (at most one value in :data:`_SPARSE_SHARE` nonzero)
#: are stored compressed (HDF5's standard gzip filter, level 1: read by any HDF5 reader). The Hankel predictor's
#: projection regulariser at past 100 / horizon 50 (3,450 × 3,450, 1,000 nonzeros) is 95 MB as it is: its model
#: file went from 190.6 MB to 95.8 MB (``benchmarks/bench_cli_fit.py``). Dense arrays stay uncompressed (gzip of
#: measured data is slow and gains little).
_SPARSE_STORE_MIN = 1 << 20
_SPARSE_SHARE = 8


def _packing(value: np.ndarray) -> dict:
    """``create_dataset`` options for ``value``: gzip level 1 for large mostly-zero arrays, none otherwise."""
    if value.size < _SPARSE_STORE_MIN or np.count_nonzero(value) * _SPARSE_SHARE > value.size:
        return {}
    return {"compression": "gzip", "compression_opts": 1, "chunks": True}


def _read_dict(group) -> dict:
    import h5py

    out = json.loads(_text(group["__values__"][()])) if "__values__" in group else {}
    for key, item in group.items():
        if key == "__values__":
            continue
        out[key] = _read_dict(item) if isinstance(item, h5py.Group) else np.asarray(item[()])
    return out


def _text(v) -> str:
    return v.decode("utf-8") if isinstance(v, bytes) else str(v)


# ------------------------------------------------------------------------------------------------ registry
def _registered() -> dict:
    """storage kind -> class of every method in the registry that can be stored (to_state/from_state)."""
    found = {}
    for entry in METHODS.values():
        try:
            cls = entry.cls()
        except (ImportError, AttributeError):
            continue
        kind = getattr(cls, "storage_kind", None)
        if kind and hasattr(cls, "to_state") and hasattr(cls, "from_state"):
            found.setdefault(kind, cls)
    return found


def _kind_of(predictor) -> str:
    if isinstance(predictor, StateSpaceModel):
        return "state_space"
    kind = getattr(type(predictor), "storage_kind", None)
    known = kind in _KINDS or _registered().get(kind) is type(predictor)
    if not known or not hasattr(predictor, "to_state"):
        raise StimsteerError(
            f"{type(predictor).__name__} is not a storable predictor (storage_kind={kind!r}); storable kinds: "
            f"{sorted(set(_KINDS) | set(_registered()))}. Register its method in stimsteer.sysid.registry.METHODS "
            "and give the class a storage_kind, to_state() and from_state()."
        )
    return kind


def _class_for(kind: str, path):
    target = _KINDS.get(kind)
    if target is None:
        cls = _registered().get(kind)
        if cls is not None:
            return cls
        raise FileFormatError(
            f"{path} holds a model of unknown kind {kind!r}; this stimsteer knows "
            f"{sorted(set(_KINDS) | set(_registered()))}. It was probably written by a newer stimsteer or with a "
            "method registered by other code: upgrade, register that method, or refit the model."
        )
    module, _, name = target.partition(":")
    try:
        return getattr(importlib.import_module(module), name)
    except (ImportError, AttributeError) as exc:
        raise FileFormatError(f"{path} holds a {kind!r} model, but its class {target} cannot be loaded: {exc}.") \
            from None


# ------------------------------------------------------------------------------------------------ public API
def save_predictor(predictor, path, *, provenance: dict, overwrite: bool = False) -> Path:
    """Write a fitted predictor and its provenance to an HDF5 model file, atomically.

    Parameters
    ----------
    predictor : fitted storable predictor or StateSpaceModel
    path : str or Path
        Output file (``.h5`` suggested).
    provenance : dict
        JSON-like record of where the model came from (data hash, settings, split, scores...). The package versions
        and the creation time are added under ``"saved"``.
    overwrite : bool, default False
        Replace an existing file.

    Returns
    -------
    Path
        The written file.

    Raises
    ------
    StimsteerError
        Not a storable or not a fitted predictor; the file exists and ``overwrite`` is False; a value in the state
        or the provenance cannot be stored.
    """
    import h5py

    path = Path(path)
    if path.exists() and not overwrite:
        raise StimsteerError(f"model file {path} already exists; choose another path or pass --force / overwrite=True.")
    kind = _kind_of(predictor)
    state = model_to_state(predictor) if kind == "state_space" else predictor.to_state()
    created = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    prov = dict(provenance or {})
    prov["saved"] = {"created_utc": created, "versions": versions(), "layout_version": LAYOUT_VERSION, "kind": kind}
    text = json.dumps(_plain_tree(prov, "provenance"), allow_nan=True)
    with hdf5_bytes() as buf:  # built in memory, then written whole (see stimsteer.sysid._files.hdf5_bytes)
        with h5py.File(buf, "w") as f:
            f.attrs[_MARK] = _MARK_VALUE
            f.attrs["layout_version"] = LAYOUT_VERSION
            f.attrs["kind"] = kind
            f.attrs["created_utc"] = created
            _write_dict(f.create_group("state"), state, "state")
            f.create_dataset("provenance", data=text)
        write_bytes(path, buf.getbuffer(), suffix=".h5")
    return path


def _plain_tree(d, where):
    if isinstance(d, dict):
        return {str(k): _plain_tree(v, f"{where}/{k}") for k, v in d.items()}
    if isinstance(d, np.ndarray) and d.dtype.kind in "biufc":
        return d.tolist()
    return _plain(d, where)


def _open_model(path):
    import h5py

    path = Path(path)
    if not path.is_file():
        raise FileNotFoundError(2, "no such model file", str(path))
    try:
        f = h5py.File(path, "r")
    except OSError:
        raise FileFormatError(
            f"{path} is not an HDF5 file, so not a stimsteer model; give the file written by `stimsteer fit`."
        ) from None
    mark = _text(f.attrs.get(_MARK, ""))
    if mark != _MARK_VALUE:
        session = _text(f.attrs.get("stimsteer_layout", "")) == "stimsteer-session"
        f.close()
        what = "a stimsteer session file" if session else "an HDF5 file without stimsteer's model marker"
        raise FileFormatError(f"{path} is {what}, not a stimsteer model; give the file written by `stimsteer fit`.")
    version = int(f.attrs.get("layout_version", -1))
    if version != LAYOUT_VERSION:
        f.close()
        raise FileFormatError(
            f"{path} uses model layout version {version}; this stimsteer reads version {LAYOUT_VERSION}. Refit the "
            "model with this version, or use the stimsteer version that wrote it."
        )
    return f


def load_predictor(path):
    """Read a predictor saved by :func:`save_predictor`.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    predictor : fitted predictor (or StateSpaceModel)
    provenance : dict

    Raises
    ------
    FileFormatError
        Not an HDF5 file, not a stimsteer model file, another layout version, an unknown kind, or a damaged file.
    FileNotFoundError
        No such file.
    """
    with _open_model(path) as f:
        kind = _text(f.attrs.get("kind", ""))
        cls = _class_for(kind, path)
        try:
            state = _read_dict(f["state"])
            provenance = json.loads(_text(f["provenance"][()]))
        except (KeyError, ValueError) as exc:
            raise FileFormatError(f"{path} is a damaged stimsteer model file ({exc}); refit the model.") from None
    try:
        predictor = model_from_state(state) if kind == "state_space" else cls.from_state(state)
    except (KeyError, TypeError, ValueError) as exc:
        raise FileFormatError(
            f"{path} holds a {kind!r} model whose stored state does not match this stimsteer ({exc!r}); refit it."
        ) from None
    return _with_session_units(predictor, provenance), provenance
