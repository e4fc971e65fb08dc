"""Reading graphs and filters from files. No pickle anywhere: every numpy
load passes ``allow_pickle=False``."""

from __future__ import annotations

import csv
import os
import zipfile

import numpy as np
import scipy.sparse as sp

from ._errors import FilterError, GraphError
from ._filters import Basis, check_taps, make_basis
from ._graph import ShiftOperator, as_matrix, from_edges, shift_operator

GRAPH_SUFFIXES = (".npy", ".npz", ".csv")


def _exists(path: str, what: str, err):
    if not os.path.exists(path):
        raise err(f"{what} {path!r} does not exist.")
    if os.path.isdir(path):
        raise err(f"{what} {path!r} is a directory; expected a file.")


def read_csv_edges(path: str):
    """``(src, dst, weight)`` arrays from a CSV with header ``src,dst,weight``
    (``weight`` optional: 1.0 when the column is absent)."""
    try:
        return _read_csv_edges(path)
    except UnicodeDecodeError:
        raise GraphError(f"edge list {path!r} is not UTF-8 text.") from None
    except csv.Error as exc:
        raise GraphError(f"edge list {path!r} is not a readable CSV file ({exc}).") from None


def _read_csv_edges(path: str):
    src, dst, w = [], [], []
    with open(path, newline="", encoding="utf-8") as fh:
        reader = csv.reader(fh)
        try:
            header = next(reader)
        except StopIteration:
            raise GraphError(f"edge list {path!r} is empty; expected a header src,dst,weight.") from None
        header = [h.strip().lower() for h in header]
        if header[:2] != ["src", "dst"] or header[2:] not in ([], ["weight"]):
            raise GraphError(f"edge list {path!r} must start with the header src,dst,weight; got {','.join(header)}.")
        width = len(header)
        for line, row in enumerate(reader, start=2):
            if not row or all(not c.strip() for c in row):
                continue
            if len(row) != width:
                raise GraphError(f"edge list {path!r} line {line} has {len(row)} fields; expected {width}.")
            try:
                a, b = (float(row[0]), float(row[1]))
            except ValueError:
                raise GraphError(f"edge list {path!r} line {line}: node ids must be integers; got {row[0]!r}, {row[1]!r}.") from None
            if not (a.is_integer() and b.is_integer()):
                raise GraphError(f"edge list {path!r} line {line}: node ids must be integers; got {row[0]!r}, {row[1]!r}.")
            try:
                wt = float(row[2]) if width == 3 else 1.0
            except ValueError:
                raise GraphError(f"edge list {path!r} line {line}: weight {row[2]!r} is not a number.") from None
            src.append(int(a))
            dst.append(int(b))
            w.append(wt)
    if not src:
        raise GraphError(f"edge list {path!r} has no edges, so the number of nodes is unknown.")
    return np.asarray(src), np.asarray(dst), np.asarray(w, dtype=np.float64)


def load_matrix(path: str):
    """The raw matrix in a graph file (dense array or CSR), unvalidated."""
    _exists(path, "graph file", GraphError)
    ext = os.path.splitext(path)[1].lower()
    if ext not in GRAPH_SUFFIXES:
        raise GraphError(f"graph file {path!r} must end in .npy, .npz or .csv; got {ext or 'no suffix'!r}.")
    try:
        if ext == ".npy":
            return as_matrix(np.load(path, allow_pickle=False), f"graph file {path!r}")
        if ext == ".npz":
            return sp.csr_array(sp.load_npz(path))
    except GraphError:
        raise
    except (ValueError, OSError, EOFError, zipfile.BadZipFile, KeyError) as exc:
        kind = "a numpy .npy array" if ext == ".npy" else "a sparse matrix saved by scipy.sparse.save_npz"
        raise GraphError(f"graph file {path!r} could not be read as {kind} ({type(exc).__name__}).") from None
    src, dst, w = read_csv_edges(path)
    return from_edges(src, dst, w, name=f"edge list {path!r}")


def load_graph(path: str, kind: str = "as-is") -> ShiftOperator:
    """Read and validate a graph file as a shift operator of ``kind``."""
    return shift_operator(load_matrix(path), kind, name=f"graph file {path!r}")


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
