"""Training data from a config: the demo orchard or the user's files."""

from __future__ import annotations

import csv
import dataclasses
import os
import zipfile

import numpy as np

from ._config import Config, resolve_path
from ._edgelist import read_node_list
from ._errors import ConfigError
from ._graph import ShiftOperator, shift_operator
from ._io import read_graph

#: Signals and targets are trained in float32.
F32_MAX = float(np.finfo(np.float32).max)


@dataclasses.dataclass(frozen=True)
class Dataset:
    """Signals on one graph and their targets, split by signal.

    Attributes:
      op: the shift operator (original node order).
      x: ``(S, N, F)`` float32 signals.
      y: ``(S, N)`` node targets or ``(S,)`` graph targets; int labels for
        classification, float for regression, which also takes several
        outputs: ``(S, N, C)`` per node or ``(S, C)`` per signal.
      task: ``classify`` or ``regress``.
      classes: number of classes (outputs ``C`` for regression).
      node_task: targets per node.
      train, val, test: index arrays into the signals.
    """

    op: ShiftOperator
    x: np.ndarray
    y: np.ndarray
    task: str
    classes: int
    node_task: bool
    train: np.ndarray
    val: np.ndarray
    test: np.ndarray
    node_ids: tuple | None = None


def _split(count: int, d: dict, seed: int, what: str = "the data"):
    rng = np.random.default_rng(seed + 7919)
    order = rng.permutation(count)
    n_tr = int(round(d["train_fraction"] * count))
    n_va = int(round(d["val_fraction"] * count))
    if n_tr < 1 or n_va < 1 or count - n_tr - n_va < 1:
        raise ConfigError(f"{what}: {count} signals are too few to split into train, validation and test sets.")
    return np.sort(order[:n_tr]), np.sort(order[n_tr:n_tr + n_va]), np.sort(order[n_tr + n_va:])


def _orchard(d: dict) -> tuple[ShiftOperator, np.ndarray, np.ndarray]:
    from .scenario import leak_snapshots, make_orchard

    orchard = make_orchard(d["sensors"], d["block_rows"], d["block_cols"], d["neighbours"], seed=d["seed"])
    op = shift_operator(orchard.adjacency, d["shift"])
    raw = shift_operator(orchard.adjacency)
    x, states, _, clean = leak_snapshots(orchard, raw, d["samples"], seed=d["seed"] + 1, noise=d["noise"],
                                         return_clean=True)
    # classify: each sensor's soil state; regress: its clean moisture (denoising).
    y = states if d["task"] == "classify" else clean
    return op, x[:, :, None].astype(np.float32), y


def _synthetic(d: dict) -> tuple[ShiftOperator, np.ndarray, np.ndarray]:
    """A generated graph (stablefilt._synthetic) with the source-localisation
    task, nodes in reverse Cuthill-McKee order (faster sparse products)."""
    from ._graph import reorder
    from ._synthetic import block_graph, geometric_graph, localisation_task

    make = geometric_graph if d["source"] == "geometric" else block_graph
    kw = {"inside": d["inside"]} if d["source"] == "blocks" else {}
    g = make(d["size"], d["degree"], d["seed"], communities=d["communities"], **kw)
    x, y = localisation_task(g, d["samples"], d["sources"], d["diffusion"], d["noise"], d["seed"] + 1, d["task"])
    op, perm = reorder(shift_operator(g.adjacency, d["shift"]))
    return op, x[:, perm], y[:, perm]


def _load_array(path: str, shown: str, key: str, ids=None, strict: bool = False) -> np.ndarray:
    """One array from ``.npy``, ``.npz`` (the array ``key``, or its only
    array) or ``.csv`` (rows of numbers; a header row of node IDs puts the
    columns in node order)."""
    ext = os.path.splitext(path)[1].lower()
    if not os.path.isfile(path):
        raise ConfigError(f"{shown} does not exist." if not os.path.exists(path)
                          else f"{shown} is a directory; expected a file.")
    if ext == ".csv":
        return _load_csv(path, shown, ids)
    if ext not in (".npy", ".npz"):
        raise ConfigError(f"{shown} must end in .npy, .npz or .csv; got {ext or 'no suffix'!r}.")
    try:
        z = np.load(path, allow_pickle=False)
        if not isinstance(z, np.lib.npyio.NpzFile):
            return np.asarray(z)
        with z:
            names = list(z.files)
            if key in names:
                return np.asarray(z[key])
            if len(names) == 1 and not strict:
                return np.asarray(z[names[0]])
    except (OSError, ValueError, EOFError, zipfile.BadZipFile) as exc:
        raise ConfigError(f"{shown} could not be read as a numpy {ext} file ({type(exc).__name__}).") from None
    if strict:
        raise ConfigError(f"{shown} needs arrays 'x' and 'y' (or give the targets in data.targets); it holds "
                          f"{', '.join(names) or 'none'}.")
    raise ConfigError(f"{shown} holds arrays {', '.join(names) or 'none'}; expected {key!r} or a single array.")


def _load_csv(path: str, shown: str, ids) -> np.ndarray:
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            rows = [r for r in csv.reader(fh) if r and any(c.strip() for c in r)]
    except (UnicodeDecodeError, csv.Error) as exc:
        raise ConfigError(f"{shown} is not a readable UTF-8 CSV file ({type(exc).__name__}).") from None
    if not rows:
        raise ConfigError(f"{shown} is empty; expected one row of numbers per signal.")
    order = None
    if not _numbers(rows[0]):  # a header row
        head = [c.strip() for c in rows[0]]
        rows = rows[1:]
        if ids is not None and sorted(head) == sorted(ids):
            pos = {h: i for i, h in enumerate(head)}
            order = [pos[v] for v in ids]
        elif ids is not None and len(head) == len(ids):
            raise ConfigError(f"{shown}: its header names columns that are not the graph's node IDs "
                              f"(first: {head[0]!r}); name every node once, or drop the header.")
    width = len(rows[0]) if rows else 0
    out = np.empty((len(rows), width))
    for i, r in enumerate(rows):
        if len(r) != width:
            raise ConfigError(f"{shown}: row {i + 1} has {len(r)} values; expected {width}.")
        try:
            out[i] = [float(c) for c in r]
        except ValueError:
            raise ConfigError(f"{shown}: row {i + 1} holds a value that is not a number.") from None
    if width == 1:
        out = out[:, 0]
    return out[:, order] if order is not None else out


def _numbers(row) -> bool:
    try:
        [float(c) for c in row]
    except ValueError:
        return False
    return True


def _files(config: Config, d: dict):
    gpath = resolve_path(config, d["graph"], "data.graph")
    spath = resolve_path(config, d["signals"], "data.signals")
    nodes = None
    if d["nodes"]:
        nodes = read_node_list(resolve_path(config, d["nodes"], "data.nodes"))
    matrix, ids = read_graph(gpath, header=d["header"], columns=d["columns"], nodes=nodes)
    if nodes is not None and ids is None:
        if len(nodes) != matrix.shape[0]:
            raise ConfigError(f"data.nodes lists {len(nodes)} nodes but graph file {d['graph']!r} has "
                              f"{matrix.shape[0]}.")
        ids = nodes
    op = shift_operator(matrix, d["shift"], name=f"graph file {d['graph']!r}")
    sname = f"signals file {d['signals']!r}"
    x = _load_array(spath, sname, "x", ids)
    if d["targets"]:
        tname = f"targets file {d['targets']!r}"
        y = _load_array(resolve_path(config, d["targets"], "data.targets"), tname, "y", ids)
    else:
        tname = sname
        if os.path.splitext(spath)[1].lower() != ".npz":
            raise ConfigError(f"{sname} is not an .npz with arrays x and y; give the targets in data.targets.")
        y = _load_array(spath, sname, "y", strict=True)
    n = op.nodes
    if x.ndim == 2:
        x = x[:, :, None]
    if x.ndim != 3 or x.shape[1] != n or x.shape[0] < 1 or x.shape[2] < 1:
        raise ConfigError(f"{sname}: x must have shape (S, {n}) or (S, {n}, F) with S, F >= 1 (one column per node "
                          f"of the graph); got {x.shape}.")
    if not np.issubdtype(x.dtype, np.number) or not np.all(np.isfinite(x)):
        raise ConfigError(f"{sname}: x must be finite numbers.")
    if np.iscomplexobj(x) or (x.size and np.max(np.abs(x)) > F32_MAX):
        raise ConfigError(f"{sname}: x must be real and within the float32 range "
                          f"(|x| <= {F32_MAX:.3g}) that training uses.")
    y = _check_targets(y, x.shape[0], n, d, tname)
    return op, x.astype(np.float32), y, ids


def _check_targets(y, s: int, n: int, d: dict, tname: str):
    """Targets of shape ``(S,)``/``(S, N)`` (classify) or also ``(S, C)``
    and ``(S, N, C)`` (regress); ``(S, N)`` means one target per node unless
    ``targets_per = "graph"``."""
    per = d["targets_per"]
    if d["task"] == "classify":
        shapes = [(s,), (s, n)] if per == "auto" else [(s, n)] if per == "node" else [(s,)]
        if y.shape not in shapes:
            raise ConfigError(f"{tname}: labels must have shape {' or '.join(map(str, shapes))}; got {y.shape}.")
        if not np.issubdtype(y.dtype, np.integer):
            if np.issubdtype(y.dtype, np.floating) and np.all(np.isfinite(y)) and np.all(y == np.round(y)):
                y = y.astype(np.int64)  # integer labels read from a CSV
            else:
                raise ConfigError(f"{tname}: y must be non-negative integer labels to classify.")
        if y.min() < 0:
            raise ConfigError(f"{tname}: y must be non-negative integer labels to classify.")
        # One output per class id up to the largest: an id beyond the number
        # of targets would size the readout by it (and overflow int32).
        if int(y.max()) >= y.size:
            raise ConfigError(f"{tname}: y holds class {int(y.max())}; labels must be "
                              f"numbered 0 to C - 1 with C at most the {y.size} targets.")
        return y
    node_ok = y.ndim in (2, 3) and y.shape[:2] == (s, n) and (y.ndim == 2 or y.shape[2] >= 1)
    graph_ok = y.ndim in (1, 2) and y.shape[0] == s and (y.ndim == 1 or y.shape[1] >= 1)
    if per == "node" and not node_ok or per == "graph" and not graph_ok or not (node_ok or graph_ok):
        want = {"node": f"({s}, {n}) or ({s}, {n}, C)", "graph": f"({s},) or ({s}, C)"}
        shown = want[per] if per != "auto" else f"{want['node']}, {want['graph']}"
        raise ConfigError(f"{tname}: regression targets must have shape {shown}; got {y.shape}.")
    if (not np.issubdtype(y.dtype, np.number) or np.iscomplexobj(y) or not np.all(np.isfinite(y))
            or np.max(np.abs(y)) > F32_MAX):
        raise ConfigError(f"{tname}: y must be finite real numbers within the float32 range to regress.")
    return y


def _open_dataset(config: Config, d: dict):
    """``(op, x (S, N, 1), y, ids, task)`` for the open-dataset sources of
    :mod:`stablefilt.datasets` (an optional extra: networkx, scikit-learn,
    pygsp's data file). ``samples`` and ``noise`` override the dataset's
    own defaults only when the config sets them; ``task`` must be the
    dataset's when set."""
    import tomllib

    try:
        from . import datasets
    except ImportError as exc:  # pragma: no cover - the module itself has no extra imports
        raise ConfigError(f"data.source = {d['source']!r} needs the datasets extra ({exc}).") from None
    given = tomllib.loads(config.text).get("data", {})
    task, _ = datasets.SOURCES[d["source"]]
    if "task" in given and given["task"] != task:
        raise ConfigError(f"data.source = {d['source']!r} is a {task} task; remove data.task or set it to {task!r}.")
    try:
        a, x, y, ids = datasets.source_arrays(d["source"], given, d["seed"])
    except ModuleNotFoundError as exc:
        raise ConfigError(f"data.source = {d['source']!r} needs the package {exc.name!r}: "
                          "pip install \"stablefilt[datasets]\".") from None
    x = np.asarray(x, dtype=np.float32)[:, :, None]
    return shift_operator(a, d["shift"]), x, np.asarray(y), ids, task


def build_dataset(config: Config) -> Dataset:
    """The dataset a config describes."""
    d = config["data"]
    ids = None
    task = d["task"]
    if d["source"] == "orchard":
        op, x, y = _orchard(d)
        what = "the orchard data"
    elif d["source"] == "files":
        op, x, y, ids = _files(config, d)
        what = f"signals file {d['signals']!r}"
    elif d["source"] in ("geometric", "blocks"):
        op, x, y = _synthetic(d)
        what = f"the {d['source']} data"
    else:
        op, x, y, ids, task = _open_dataset(config, d)
        what = f"the {d['source']} dataset"
    tr, va, te = _split(x.shape[0], d, d["seed"], what)
    if task == "classify":
        node_task, classes = y.ndim == 2, int(y.max()) + 1
    else:
        per = d["targets_per"]
        node_task = y.ndim == 3 or (y.ndim == 2 and per != "graph" and (per == "node" or y.shape[1] == op.nodes))
        classes = 1 if y.ndim == 1 + node_task else int(y.shape[-1])
    if task == "classify" and classes < 2:
        raise ConfigError(f"{what}: the targets hold a single class; classification needs at least two.")
    y = y.astype(np.int32) if task == "classify" else y.astype(np.float32)
    return Dataset(op, x, y, task, classes, node_task, tr, va, te, ids)
