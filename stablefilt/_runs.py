"""Run directories: everything that reads or writes one (the layout, the
output-folder checks, setting an earlier run aside, the manifest, loading a
finished run, the rows ``compare`` shows). The safe file primitives are in
:mod:`stablefilt._store`.

A run directory holds::

    config.toml     the config as given (bytes unchanged)
    manifest.json   versions, seed, graph fingerprint and size, spectral
                    interval and its method, input norm bound, start/end time
    graph.npz       the training graph's shift operator (scipy.sparse.save_npz)
    test.npz        the test signals x and targets y
    log.jsonl       one JSON record per epoch
    checkpoint.npz  the last completed epoch (params, optimiser state, ...)
    params.npz      final parameters: keys layers/<i>/taps, layers/<i>/bias,
                    readout/weight, readout/bias (float32 arrays)
    summary.json    final metrics, kept_epoch (whose params were kept) and
                    certificates
    nodes.csv       node IDs in node order (index,id), for a graph read from
                    a CSV edge list or with a node list
    .lock           while a run writes the directory: its process id
"""

from __future__ import annotations

import dataclasses
import datetime
import os
import platform
import shutil
import sys

import numpy as np

from ._config import Config, parse_config
from ._errors import FilterError, RunError
from ._filters import Basis, make_basis
from ._graph import ShiftOperator, shift_operator
from ._interval import SpectralInterval
from ._lock import LOCK
from ._model import ModelSpec, init_params, spec_from
from ._store import FORMAT, arrays_to_params, load_graph_npz, load_npz, read_json

#: The files of a run, by role.
FILES = {"log": "log.jsonl", "ckpt": "checkpoint.npz", "manifest": "manifest.json", "params": "params.npz",
         "summary": "summary.json"}


def run_paths(out: str) -> dict:
    """Paths of a run's files (:data:`FILES`) under ``out``."""
    return {k: os.path.join(out, f) for k, f in FILES.items()}


def check_out_dir(out: str, resume: bool, force: bool) -> None:
    """Refuse an output path that cannot hold this run; changes nothing."""
    if os.path.exists(out) and not os.path.isdir(out):
        raise RunError(f"output {out!r} is a file; expected a directory for the run.")
    if resume:
        if not os.path.isfile(os.path.join(out, "checkpoint.npz")):
            raise RunError(f"cannot resume: {out!r} holds no checkpoint.npz.")
        return
    if os.path.isdir(out) and [f for f in os.listdir(out) if f != LOCK] and not force:
        raise RunError(f"run directory {out!r} already exists and is not empty; pass --force to write into it "
                       "or --resume to continue it.")


def make_out_dir(out: str) -> None:
    """Create the run directory (to hold its lock)."""
    try:
        os.makedirs(out, exist_ok=True)
    except OSError as exc:
        raise RunError(f"cannot create run directory {out!r} ({exc.strerror or type(exc).__name__}).") from None


def prepare_out_dir(out: str, need_bytes: int) -> None:
    """Create the run directory and prove it takes writes of the run's size,
    before any training work."""
    try:
        os.makedirs(out, exist_ok=True)
        free = shutil.disk_usage(out).free
        if free < need_bytes:
            raise RunError(f"run directory {out!r} has {free / 2**20:.1f} MiB free; the run needs about "
                           f"{need_bytes / 2**20:.1f} MiB.")
        probe = os.path.join(out, ".write-test")
        with open(probe, "wb") as fh:
            fh.write(b"x" * 4096)
            fh.flush()
            os.fsync(fh.fileno())
        os.unlink(probe)
    except OSError as exc:
        raise RunError(f"cannot write to run directory {out!r} ({exc.strerror or type(exc).__name__}).") from None


def set_aside(path: str) -> None:
    """Rename an earlier run's file (``--force``) to the first free
    ``<name>.previous``, ``<name>.previous.2``, ...: results are kept, never
    overwritten, and a crashed new run cannot be resumed from the old
    checkpoint."""
    if not os.path.exists(path):
        return
    target, k = path + ".previous", 1
    while os.path.exists(target):
        k += 1
        target = f"{path}.previous.{k}"
    os.replace(path, target)


def read_manifest_or_empty(path: str) -> dict:
    return read_json(path, "manifest") if os.path.exists(path) else {}


def _versions() -> dict:
    import jax
    import optax
    import scipy

    from ._version import __version__

    return {"stablefilt": __version__, "python": sys.version.split()[0], "jax": jax.__version__,
            "optax": optax.__version__, "numpy": np.__version__, "scipy": scipy.__version__,
            "platform": platform.platform()}


def now() -> str:
    return datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds")


def new_manifest(name: str, seed: int, op: ShiftOperator, interval: SpectralInterval, basis: Basis, task: str,
                 classes: int, signals: dict, rho: float) -> dict:
    """The manifest of a new run (``finished`` is set when it ends)."""
    return {
        "format": FORMAT,
        "name": name,
        "versions": _versions(),
        "seed": seed,
        "graph": {"fingerprint": op.fingerprint(), "nodes": op.nodes, "edges": op.edges, "kind": op.kind},
        "spectral_interval": [interval.lower, interval.upper],
        "interval_method": {"lower": interval.lower_method, "upper": interval.upper_method},
        "basis": {"kind": basis.kind, "interval": basis.interval},
        "task": task, "classes": classes,
        "signals": signals,
        "rho": rho,
        "started": now(),
        "finished": None,
    }



@dataclasses.dataclass(frozen=True)
class Run:
    """A finished run directory, loaded."""

    path: str
    config: Config
    manifest: dict
    summary: dict | None
    op: object  # ShiftOperator
    spec: ModelSpec
    params: dict
    test_x: np.ndarray
    test_y: np.ndarray


def open_run(path: str) -> Run:
    """Load a run directory written by :func:`train`.

    Raises:
      RunError: missing, half-written, or from a newer format.
    """
    if not os.path.isdir(path):
        raise RunError(f"run directory {path!r} does not exist." if not os.path.exists(path)
                       else f"run {path!r} is a file; expected a run directory.")
    manifest = read_json(os.path.join(path, "manifest.json"), "run manifest")
    if not isinstance(manifest, dict) or "format" not in manifest:
        raise RunError(f"run manifest in {path!r} has no format field; is it a run directory?")
    if manifest["format"] != FORMAT:
        raise RunError(f"run {path!r} is format {manifest['format']}; this version reads format {FORMAT}.")
    cpath = os.path.join(path, "config.toml")
    if not os.path.isfile(cpath):
        raise RunError(f"run {path!r} has no config.toml.")
    with open(cpath, encoding="utf-8") as fh:
        config = parse_config(fh.read(), path, f"run config {cpath!r}")
    matrix = load_graph_npz(os.path.join(path, "graph.npz"))
    op = shift_operator(matrix, name=f"run graph in {path!r}")
    op = ShiftOperator(op.matrix, manifest.get("graph", {}).get("kind", "as-is"))
    if op.fingerprint() != manifest.get("graph", {}).get("fingerprint"):
        raise RunError(f"run graph in {path!r} does not match the fingerprint in its manifest.")
    tpath = os.path.join(path, "test.npz")
    test = load_npz(tpath, "run test data")
    if "x" not in test or "y" not in test:
        raise RunError(f"run test data {tpath!r} lacks x or y.")
    tx, ty = test["x"], test["y"]
    if (tx.ndim != 3 or tx.shape[0] == 0 or tx.shape[1] != op.nodes or not np.issubdtype(tx.dtype, np.floating)
            or not np.all(np.isfinite(tx))):
        raise RunError(f"run test data {tpath!r}: x must be finite real signals of shape (signals, {op.nodes}, "
                       f"features); got {tx.dtype} of shape {tx.shape}.")
    if ty.ndim < 1 or ty.shape[0] != tx.shape[0]:
        raise RunError(f"run test data {tpath!r}: y must hold one target per signal of x ({tx.shape[0]}); "
                       f"got shape {ty.shape}.")
    spec = spec_from(config["model"], _manifest_basis(manifest, path), int(tx.shape[2]), _manifest_classes(manifest, path),
                     op.nodes)
    ppath = os.path.join(path, "params.npz")
    if not os.path.isfile(ppath):
        raise RunError(f"run {path!r} has no params.npz; it did not finish (resume it with --resume).")
    params = arrays_to_params(load_npz(ppath, "run parameters"), init_params(spec, 0), f"parameters in {path!r}")
    spath = os.path.join(path, "summary.json")
    summary = read_json(spath, "run summary") if os.path.exists(spath) else None
    return Run(path, config, manifest, summary, op, spec, params, tx, ty)


def _manifest_basis(manifest: dict, path: str) -> Basis:
    """The filter basis a run's manifest records, checked by :func:`make_basis`."""
    b = manifest.get("basis", {})
    try:
        if not isinstance(b, dict):
            raise FilterError(f"expected a table, got {b!r}.")
        return make_basis(b.get("kind"), b.get("interval"))
    except FilterError as exc:
        raise RunError(f"run manifest in {path!r}: basis must be monomial, or chebyshev with an interval of two "
                       f"finite numbers a < b ({str(exc).rstrip('.')}).") from None


def _manifest_classes(manifest: dict, path: str) -> int:
    c = manifest.get("classes", 1)
    if isinstance(c, bool) or not isinstance(c, int) or c < 1:
        raise RunError(f"run manifest in {path!r}: classes must be a positive integer; got {c!r}.")
    return c


def compare_rows(paths, sort: bool = False) -> list[dict]:
    """One row per finished run for ``compare``, read from its
    ``summary.json`` (the ``compare --json`` format), in the order of
    ``paths``; with ``sort``, by the certified bound at the smallest eps, then
    by test accuracy (or RMSE)."""
    rows = []
    for p in paths:
        if not os.path.isdir(p):
            raise RunError(f"run directory {p!r} does not exist.")
        s = read_json(os.path.join(p, "summary.json"), "run summary")
        try:
            m = s["metric"]
            cert = s["certificate"]
            rows.append({
                "run": p,
                "name": s.get("name"),
                "penalty_mode": s["penalty"]["mode"],
                "penalty_weight": s["penalty"]["weight"],
                "model": s["model"],
                "metric": m,
                f"test_{m}": s["metrics"][f"test_{m}"],
                "layers": [{"integral_lipschitz": lr["integral_lipschitz"], "kernel": lr["kernel"], "sup": lr["sup"]}
                           for lr in cert["layers"]],
                "certified": cert["certified"],
                "published": cert["published"],
                "rho": cert["rho"],
                "kept_epoch": s.get("kept_epoch"),
            })
        except (KeyError, TypeError):
            raise RunError(f"run summary in {p!r} lacks the fields compare needs; is it from this version?") from None
    if not sort:
        return rows
    first = lambda r: min(r["certified"].items(), key=lambda kv: float(kv[0]))[1]  # noqa: E731
    rows.sort(key=lambda r: (first(r), -r.get("test_acc", 0.0), r.get("test_rmse", 0.0)))
    return rows
