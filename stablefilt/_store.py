"""The files under a run directory, written and read safely: atomic writes
(temporary file in the same directory, then rename, so a reader never sees a
half-written file), JSON, npz archives without pickle, parameter files,
checkpoints and append-only logs. The layout of a run is in
:mod:`stablefilt._runs`.
"""

from __future__ import annotations

import io
import json
import os
import tempfile

import jax
import numpy as np
import scipy.sparse as sp

from ._errors import RunError

FORMAT = 1


def atomic_write(path: str, data: bytes) -> None:
    """Write ``data`` to ``path`` via a temporary file and rename."""
    d = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(prefix=".tmp-", dir=d)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise


def write_json(path: str, obj) -> None:
    atomic_write(path, (json.dumps(obj, indent=2, sort_keys=False) + "\n").encode())


def read_json(path: str, what: str) -> dict:
    try:
        with open(path) as fh:
            return json.load(fh)
    except FileNotFoundError:
        raise RunError(f"{what} {path!r} is missing.") from None
    except (json.JSONDecodeError, UnicodeDecodeError):
        raise RunError(f"{what} {path!r} is not valid JSON.") from None


def npz_bytes(arrays: dict) -> bytes:
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    return buf.getvalue()


def params_to_arrays(params: dict) -> dict:
    """Flat ``{"layers/0/taps": array, ...}`` layout of a params pytree."""
    out = {}
    for i, layer in enumerate(params["layers"]):
        for k, v in layer.items():
            out[f"layers/{i}/{k}"] = np.asarray(v)
    if "readout" in params:
        for k, v in params["readout"].items():
            out[f"readout/{k}"] = np.asarray(v)
    return out


def arrays_to_params(arrays: dict, template: dict, what: str) -> dict:
    """Inverse of :func:`params_to_arrays`, checked against ``template``."""
    flat = params_to_arrays(template)
    if set(flat) != set(arrays):
        missing = sorted(set(flat) - set(arrays))
        extra = sorted(set(arrays) - set(flat))
        raise RunError(f"{what} does not match the model: missing {missing or 'nothing'}, unexpected {extra or 'nothing'}.")
    for k, v in flat.items():
        if arrays[k].shape != v.shape:
            raise RunError(f"{what}: {k} has shape {arrays[k].shape}; the model needs {v.shape}.")
        if not np.issubdtype(arrays[k].dtype, np.floating) or not np.all(np.isfinite(arrays[k])):
            raise RunError(f"{what}: {k} must hold finite real numbers.")
        if np.max(np.abs(arrays[k]), initial=0.0) > np.finfo(np.float32).max:
            # The model holds float32: a larger value would be read as infinite.
            raise RunError(f"{what}: {k} holds values beyond float32's range (|x| > 3.4e38), which the model stores.")
    layers = []
    for i, layer in enumerate(template["layers"]):
        layers.append({k: jax.numpy.asarray(arrays[f"layers/{i}/{k}"]) for k in layer})
    out = {"layers": layers}
    if "readout" in template:
        out["readout"] = {k: jax.numpy.asarray(arrays[f"readout/{k}"]) for k in template["readout"]}
    return out


def save_params(path: str, params: dict) -> None:
    atomic_write(path, npz_bytes(params_to_arrays(params)))


def load_npz(path: str, what: str) -> dict:
    try:
        with np.load(path, allow_pickle=False) as z:
            return {k: z[k] for k in z.files}
    except FileNotFoundError:
        raise RunError(f"{what} {path!r} is missing.") from None
    except (OSError, ValueError, EOFError, Exception) as exc:  # zipfile errors and the like
        raise RunError(f"{what} {path!r} could not be read ({type(exc).__name__}).") from None


def save_checkpoint(path: str, state: dict, meta: dict) -> None:
    """Params, optimiser state and best params as flat leaves, plus JSON meta."""
    arrays = {}
    for name in ("params", "opt_state", "best"):
        for i, leaf in enumerate(jax.tree_util.tree_leaves(state[name])):
            arrays[f"{name}/{i}"] = np.asarray(leaf)
    arrays["meta"] = np.asarray(json.dumps(meta))
    atomic_write(path, npz_bytes(arrays))


def load_checkpoint(path: str, templates: dict) -> tuple[dict, dict]:
    arrays = load_npz(path, "checkpoint")
    if "meta" not in arrays:
        raise RunError(f"checkpoint {path!r} has no meta record.")
    meta = json.loads(str(arrays["meta"]))
    if meta.get("format") != FORMAT:
        raise RunError(f"checkpoint {path!r} is format {meta.get('format')}; this version reads format {FORMAT}.")
    state = {}
    for name, template in templates.items():
        leaves, treedef = jax.tree_util.tree_flatten(template)
        try:
            got = [arrays[f"{name}/{i}"] for i in range(len(leaves))]
        except KeyError:
            raise RunError(f"checkpoint {path!r} does not match the model in the config.") from None
        for g, t in zip(got, leaves):
            if np.shape(g) != np.shape(t):
                raise RunError(f"checkpoint {path!r} does not match the model in the config.")
        state[name] = jax.tree_util.tree_unflatten(treedef, [jax.numpy.asarray(g, dtype=np.asarray(t).dtype)
                                                              for g, t in zip(got, leaves)])
    return state, meta


def read_log(path: str) -> list[dict]:
    """Complete JSON records of a log; a torn last line is dropped."""
    if not os.path.exists(path):
        return []
    out = []
    with open(path, "rb") as fh:
        for line in fh.read().split(b"\n"):
            if not line.strip():
                continue
            try:
                out.append(json.loads(line))
            except (json.JSONDecodeError, UnicodeDecodeError):
                break
    return out


def append_log(path: str, record: dict) -> None:
    with open(path, "a") as fh:
        fh.write(json.dumps(record) + "\n")
        fh.flush()
        os.fsync(fh.fileno())


def rewrite_log(path: str, records: list[dict]) -> None:
    atomic_write(path, "".join(json.dumps(r) + "\n" for r in records).encode())


def save_graph(path: str, matrix) -> None:
    buf = io.BytesIO()
    sp.save_npz(buf, sp.csr_matrix(matrix))
    atomic_write(path, buf.getvalue())


def load_graph_npz(path: str):
    try:
        return sp.csr_array(sp.load_npz(path))
    except FileNotFoundError:
        raise RunError(f"run graph {path!r} is missing.") from None
    except Exception as exc:
        raise RunError(f"run graph {path!r} could not be read ({type(exc).__name__}).") from None
