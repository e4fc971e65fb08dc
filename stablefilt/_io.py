"""Reading graphs and filters from files. No pickle anywhere: every numpy
load passes ``allow_pickle=False``."""

from __future__ import annotations

import os
import zipfile

import numpy as np
import scipy.sparse as sp

from ._edgelist import read_edge_list
from ._errors import FilterError, GraphError
from ._filters import Basis, check_taps, make_basis
from ._graph import ShiftOperator, as_matrix, from_edges, shift_operator

GRAPH_SUFFIXES = (".npy", ".npz", ".csv")


def _exists(path: str, what: str, err):
    if not os.path.exists(path):
        raise err(f"{what} {path!r} does not exist.")
    if os.path.isdir(path):
        raise err(f"{what} {path!r} is a directory; expected a file.")


def load_matrix(path: str, **csv_options):
    """The raw matrix in a graph file (dense array or CSR), unvalidated.
    ``csv_options`` (``header``, ``columns``, ``nodes``) go to
    :func:`~stablefilt._edgelist.read_edge_list` for a ``.csv`` file."""
    return read_graph(path, **csv_options)[0]


def read_graph(path: str, **csv_options):
    """``(matrix, ids)``: the raw matrix in a graph file and its node IDs
    (``ids[i]`` names node ``i``; None for ``.npy``/``.npz``, whose nodes
    are their row numbers)."""
    _exists(path, "graph file", GraphError)
    ext = os.path.splitext(path)[1].lower()
    if ext not in GRAPH_SUFFIXES:
        raise GraphError(f"graph file {path!r} must end in .npy, .npz or .csv; got {ext or 'no suffix'!r}.")
    try:
        if ext == ".npy":
            return as_matrix(np.load(path, allow_pickle=False), f"graph file {path!r}"), None
        if ext == ".npz":
            return sp.csr_array(sp.load_npz(path)), None
    except GraphError:
        raise
    except (ValueError, OSError, EOFError, zipfile.BadZipFile, KeyError) as exc:
        kind = "a numpy .npy array" if ext == ".npy" else "a sparse matrix saved by scipy.sparse.save_npz"
        raise GraphError(f"graph file {path!r} could not be read as {kind} ({type(exc).__name__}).") from None
    el = read_edge_list(path, **csv_options)
    return from_edges(el.src, el.dst, el.weight, nodes=len(el.ids), name=f"edge list {path!r}"), el.ids


def load_graph(path: str, kind: str = "as-is", **csv_options) -> ShiftOperator:
    """Read and validate a graph file as a shift operator of ``kind``
    (``csv_options`` as in :func:`load_matrix`)."""
    return shift_operator(load_matrix(path, **csv_options), kind, name=f"graph file {path!r}")


def load_filter(path: str) -> tuple[np.ndarray, Basis]:
    """``(taps, basis)`` from an ``.npz`` with keys ``taps``, ``basis``
    (``monomial`` or ``chebyshev``) and, for Chebyshev, ``interval``."""
    _exists(path, "filter file", FilterError)
    try:
        z = np.load(path, allow_pickle=False)
        if not isinstance(z, np.lib.npyio.NpzFile):  # a single .npy array
            raise ValueError("not an .npz archive")
        with z:
            data = {k: z[k] for k in z.files}
    except (ValueError, OSError, EOFError, zipfile.BadZipFile) as exc:
        raise FilterError(f"filter file {path!r} could not be read as a numpy .npz archive ({type(exc).__name__}).") from None
    for key in ("taps", "basis"):
        if key not in data:
            raise FilterError(f"filter file {path!r} has no {key!r} array; expected keys taps, basis and (Chebyshev) interval.")
    b = data["basis"]
    if b.dtype.kind not in "US" or b.size != 1:
        raise FilterError(f"filter file {path!r}: 'basis' must be one string, monomial or chebyshev.")
    name = str(b.reshape(()).item())
    if isinstance(b.reshape(()).item(), bytes):
        name = b.reshape(()).item().decode()
    try:
        basis = make_basis(name, data.get("interval"))
        taps = check_taps(data["taps"], "taps")
    except FilterError as exc:
        raise FilterError(f"filter file {path!r}: {exc}") from None
    return taps.astype(np.float64), basis


def save_filter(path: str, taps, basis: Basis) -> None:
    """Write a filter file readable by :func:`load_filter`."""
    arrays = {"taps": np.asarray(taps, dtype=np.float64), "basis": np.asarray(basis.kind)}
    if basis.interval is not None:
        arrays["interval"] = np.asarray(basis.interval, dtype=np.float64)
    np.savez(path, **arrays)
