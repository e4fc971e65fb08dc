"""Training data from a config: the demo orchard or the user's files."""

from __future__ import annotations

import dataclasses
import zipfile

import numpy as np

from ._config import Config, resolve_path
from ._errors import ConfigError
from ._graph import ShiftOperator, shift_operator
from ._io import load_matrix

#: Signals and targets are trained in float32.
F32_MAX = float(np.finfo(np.float32).max)


@dataclasses.dataclass(frozen=True)
class Dataset:
    """Signals on one graph and their targets, split by signal.

    Attributes:
      op: the shift operator (original node order).
      x: ``(S, N, F)`` float32 signals.
      y: ``(S, N)`` node targets or ``(S,)`` graph targets; int labels for
        classification, float for regression.
      task: ``classify`` or ``regress``.
      classes: number of classes (1 for regression).
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


def _files(config: Config, d: dict):
    gpath = resolve_path(config, d["graph"], "data.graph")
    spath = resolve_path(config, d["signals"], "data.signals")
    op = shift_operator(load_matrix(gpath), d["shift"], name=f"graph file {d['graph']!r}")
    try:
        z = np.load(spath, allow_pickle=False)
        if not isinstance(z, np.lib.npyio.NpzFile):  # a single .npy array
            raise ValueError("not an .npz archive")
        with z:
            arrays = {k: np.asarray(z[k]) for k in ("x", "y") if k in z.files}
    except (OSError, ValueError, EOFError, zipfile.BadZipFile) as exc:
        raise ConfigError(f"signals file {d['signals']!r} could not be read as a numpy .npz archive "
                          f"({type(exc).__name__}).") from None
    if len(arrays) != 2:  # outside the try: ConfigError is a ValueError
        raise ConfigError(f"signals file {d['signals']!r} needs arrays 'x' and 'y'.")
    x, y = arrays["x"], arrays["y"]
    n = op.nodes
    if x.ndim == 2:
        x = x[:, :, None]
    if x.ndim != 3 or x.shape[1] != n or x.shape[0] < 1 or x.shape[2] < 1:
        raise ConfigError(f"signals file {d['signals']!r}: x must have shape (S, {n}) or (S, {n}, F) with S, F >= 1; "
                          f"got {x.shape}.")
    if not np.issubdtype(x.dtype, np.number) or not np.all(np.isfinite(x)):
        raise ConfigError(f"signals file {d['signals']!r}: x must be finite numbers.")
    if np.iscomplexobj(x) or (x.size and np.max(np.abs(x)) > F32_MAX):
        raise ConfigError(f"signals file {d['signals']!r}: x must be real and within the float32 range "
                          f"(|x| <= {F32_MAX:.3g}) that training uses.")
    if y.shape not in ((x.shape[0],), (x.shape[0], n)):
        raise ConfigError(f"signals file {d['signals']!r}: y must have shape ({x.shape[0]},) or "
                          f"({x.shape[0]}, {n}); got {y.shape}.")
    if d["task"] == "classify":
        if not np.issubdtype(y.dtype, np.integer) or y.min() < 0:
            raise ConfigError(f"signals file {d['signals']!r}: y must be non-negative integer labels to classify.")
        # One output per class id up to the largest: an id beyond the number
        # of targets would size the readout by it (and overflow int32).
        if int(y.max()) >= y.size:
            raise ConfigError(f"signals file {d['signals']!r}: y holds class {int(y.max())}; labels must be "
                              f"numbered 0 to C - 1 with C at most the {y.size} targets.")
    elif (not np.issubdtype(y.dtype, np.number) or np.iscomplexobj(y) or not np.all(np.isfinite(y))
          or np.max(np.abs(y)) > F32_MAX):
        raise ConfigError(f"signals file {d['signals']!r}: y must be finite real numbers within the float32 "
                          "range to regress.")
    return op, x.astype(np.float32), y


def build_dataset(config: Config) -> Dataset:
    """The dataset a config describes."""
    d = config["data"]
    if d["source"] == "orchard":
        op, x, y = _orchard(d)
        task = d["task"]
    else:
        op, x, y = _files(config, d)
        task = d["task"]
    what = "the orchard data" if d["source"] == "orchard" else f"signals file {d['signals']!r}"
    tr, va, te = _split(x.shape[0], d, d["seed"], what)
    classes = int(y.max()) + 1 if task == "classify" else 1
    if task == "classify" and classes < 2:
        raise ConfigError(f"{what}: the targets hold a single class; classification needs at least two.")
    y = y.astype(np.int32) if task == "classify" else y.astype(np.float32)
    return Dataset(op, x, y, task, classes, y.ndim == 2, tr, va, te)
