"""Bad input, everywhere a user can hand the tool something: one table, one
test.

The promise under test is README "What is guaranteed" > "Bad input" (and
docs in /work/shared/style.md, "Habits"): every malformed graph, filter,
config, option or run directory gets exit status 2, one sentence on stderr
naming the input and what was expected, no traceback, and nothing on disk is
changed or created.

Each case builds its input in ``tmp_path`` (the working directory during the
call, so a stray relative write is caught too), snapshots every file and
folder there, runs ``stablefilt.cli.main`` in-process and checks:

- exit status 2 (argparse's own ``SystemExit(2)`` counts);
- stderr is exactly one line, ``stablefilt ...: <sentence>.``, holding the
  case's substrings (the input's name and what was wrong);
- nothing on stdout, no "Traceback" anywhere, and no Python warning that the
  command line would have printed as extra stderr lines (numpy casts and the
  like; hidden-by-default categories excluded, as the interpreter does);
- the snapshot is unchanged: same paths, same bytes, same mtimes.
"""

from __future__ import annotations

import json
import os
import shutil
import warnings
from typing import Callable, NamedTuple

import helpers as H
import numpy as np
import pytest
import scipy.sparse as sp

import stablefilt as sf
from stablefilt._io import save_filter
from stablefilt.cli import main

# ---------------------------------------------------------------------------
# Inputs that are fine, for the cases that spoil one thing at a time.

GOOD = np.array([[0.0, 1.0, 0.0, 0.5],
                 [1.0, 0.0, 2.0, 0.0],
                 [0.0, 2.0, 0.0, 1.0],
                 [0.5, 0.0, 1.0, 0.0]])

TINY = H.small_run_text()

FILES = """\
name = "from-files"

[data]
source = "files"
graph = "{graph}"
signals = "{signals}"
task = "{task}"
shift = "as-is"

[model]
features = [4]
taps = 3

[train]
epochs = 2
"""

PATH5 = np.diag(np.ones(4), 1) + np.diag(np.ones(4), -1)  # path graph on 5 nodes


def _labels(s=20, n=5):
    return (np.arange(s * n).reshape(s, n) % 2).astype(np.int64)


@pytest.fixture(scope="session")
def finished_run(tmp_path_factory):
    """A tiny finished run (2 epochs), copied into the cases that need one."""
    path = tmp_path_factory.mktemp("finished") / "run"
    sf.train(sf.parse_config(TINY), str(path), progress=lambda m: None)
    return path


# ---------------------------------------------------------------------------
# Builders: each returns a function of the case folder that writes one file.


def npy(name, arr, pickle=False):
    return lambda t: np.save(t / name, arr, allow_pickle=pickle)


def npz(name, **arrays):
    return lambda t: np.savez(t / name, **arrays)


def sparse(name, m):
    return lambda t: sp.save_npz(t / name, sp.csr_matrix(m))


def text(name, s):
    def build(t):
        (t / name).parent.mkdir(parents=True, exist_ok=True)
        (t / name).write_text(s)
    return build


def raw(name, b):
    return lambda t: (t / name).write_bytes(b)


def truncated(name, writer):
    """Write with ``writer``, then keep the first half of the bytes."""
    def build(t):
        writer(t)
        data = (t / name).read_bytes()
        (t / name).write_bytes(data[: len(data) // 2])
    return build


def folder(name):
    return lambda t: (t / name).mkdir(parents=True)


def both(*builders):
    def build(t, run=None):
        for b in builders:
            b(t, run) if getattr(b, "needs_run", False) else b(t)
    build.needs_run = any(getattr(b, "needs_run", False) for b in builders)
    return build


def in_run(edit):
    """Copy the finished run to ``run/`` and apply ``edit(run_path)``."""
    def build(t, run=None):
        shutil.copytree(run, t / "run")
        edit(t / "run")
    build.needs_run = True
    return build


def nothing(t):
    pass


def bound(graph="good.npy", filt="good.npz", *extra, eps="0.01"):
    return ["bound", graph, filt, "--eps", eps, *extra]


def train(config="c.toml", *extra):
    return ["train", config, "--out", "out", *extra]


def set_manifest(**changes):
    def edit(p):
        m = json.loads((p / "manifest.json").read_text())
        m.update(changes)
        (p / "manifest.json").write_text(json.dumps(m))
    return edit


def rescale_graph(p):
    """A valid, symmetric graph.npz that is not the one fingerprinted."""
    m = sp.load_npz(p / "graph.npz").tocsr()
    m.data = m.data * 1.01
    sp.save_npz(p / "graph.npz", m)


def nan_params(p):
    z = dict(np.load(p / "params.npz", allow_pickle=False))
    z["layers/0/taps"] = z["layers/0/taps"] * np.nan
    np.savez(p / "params.npz", **z)


def flat_test_x(p):
    np.savez(p / "test.npz", x=np.ones((3, 30), np.float32), y=np.zeros((3, 30), np.int32))


def basis_no_interval(p):
    m = json.loads((p / "manifest.json").read_text())
    m["basis"] = {"kind": "chebyshev"}
    (p / "manifest.json").write_text(json.dumps(m))


def symlink_out(t):
    (t / "outside").mkdir()
    np.save(t / "outside" / "secret.npy", PATH5)
    (t / "cfg").mkdir()
    os.symlink("../outside/secret.npy", t / "cfg" / "g.npy")
    np.savez(t / "cfg" / "sig.npz", x=np.ones((20, 5)), y=_labels())
    (t / "cfg" / "c.toml").write_text(FILES.format(graph="g.npy", signals="sig.npz", task="classify"))


def escape_parent(t):
    np.savez(t / "x.npz", x=np.ones((20, 5)), y=_labels())  # it exists: refused all the same
    np.save(t / "g5.npy", PATH5)
    (t / "cfg").mkdir()
    np.save(t / "cfg" / "g5.npy", PATH5)
    (t / "cfg" / "c.toml").write_text(FILES.format(graph="g5.npy", signals="../x.npz", task="classify"))


def files_config(signals_builder, task="classify", graph="g5.npy", signals="sig.npz"):
    return both(npy("g5.npy", PATH5), signals_builder,
                text("c.toml", FILES.format(graph=graph, signals=signals, task=task)))


def tiny_with(old, new):
    assert old in TINY, old
    return text("c.toml", TINY.replace(old, new))


# ---------------------------------------------------------------------------
# The table.


class Case(NamedTuple):
    id: str
    build: Callable
    argv: list
    expect: tuple  # substrings of the one stderr line



CASES = [
    # --- graph files (bound) -------------------------------------------------
    Case("graph-npy-truncated", truncated("g.npy", npy("g.npy", GOOD)), bound("g.npy"), ("'g.npy'", ".npy array")),
    Case("graph-npz-truncated", truncated("g.npz", sparse("g.npz", GOOD)), bound("g.npz"), ("'g.npz'", "save_npz")),
    Case("graph-npy-3d", npy("g.npy", np.zeros((2, 2, 2))), bound("g.npy"), ("'g.npy'", "2-D", "3 dimensions")),
    Case("graph-non-square", npy("g.npy", np.zeros((2, 3))), bound("g.npy"), ("'g.npy'", "square", "(2, 3)")),
    Case("graph-npz-non-square", sparse("g.npz", np.ones((3, 4))), bound("g.npz"), ("'g.npz'", "square")),
    Case("graph-non-symmetric", npy("g.npy", np.array([[0, 1.0], [1.001, 0]])), bound("g.npy"),
         ("'g.npy'", "not symmetric", "tolerance")),
    Case("graph-npz-non-symmetric", sparse("g.npz", np.triu(GOOD)), bound("g.npz"), ("'g.npz'", "not symmetric")),
    Case("graph-nan", npy("g.npy", np.where(GOOD > 1, np.nan, GOOD)), bound("g.npy"), ("'g.npy'", "NaN or infinite")),
    Case("graph-inf", npy("g.npy", np.where(GOOD > 1, np.inf, GOOD)), bound("g.npy"), ("'g.npy'", "NaN or infinite")),
    Case("graph-negative-laplacian", npy("g.npy", -GOOD), bound("g.npy", "good.npz", "--shift", "laplacian"),
         ("'g.npy'", "negative weights", "'laplacian'")),
    Case("graph-negative-normalized", npy("g.npy", -GOOD),
         bound("g.npy", "good.npz", "--shift", "normalized-laplacian"),
         ("'g.npy'", "negative weights", "'normalized-laplacian'")),
    Case("graph-self-loop-scaled", npy("g.npy", GOOD + np.eye(4)),
         bound("g.npy", "good.npz", "--shift", "scaled-adjacency"), ("'g.npy'", "self-loops")),
    Case("graph-empty-0x0", npy("g.npy", np.zeros((0, 0))), bound("g.npy"), ("'g.npy'", "at least one node")),
    # pickled object array: must be refused by allow_pickle=False, never unpickled
    Case("graph-object-npy", npy("g.npy", np.array([{"a": 1}, None], dtype=object), pickle=True), bound("g.npy"),
         ("'g.npy'", "could not be read")),
    Case("graph-complex-npy", npy("g.npy", GOOD * (1 + 1j)), bound("g.npy"), ("'g.npy'", "complex")),
    # The CSV format has no explicit node count (nodes = largest id + 1), so
    # "out of range" is a negative id, or one beyond the int32 index range.
    Case("csv-negative-id", text("g.csv", "src,dst,weight\n0,1,1\n-1,2,1\n"), bound("g.csv"),
         ("'g.csv'", "non-negative")),
    Case("csv-huge-id", text("g.csv", "src,dst,weight\n0,1,1\n0,1000000000000,1\n"), bound("g.csv"),
         ("'g.csv'", "node 1000000000000", "below")),
    Case("csv-id-1.5", text("g.csv", "src,dst,weight\n0,1.5,1\n"), bound("g.csv"), ("'g.csv'", "line 2", "integers")),
    # Names such as ST-001 are node IDs now; an empty one is not.
    Case("csv-id-empty", text("g.csv", "src,dst,weight\n0,1,1\n,1,1\n"), bound("g.csv"),
         ("'g.csv'", "line 3", "empty node id")),
    Case("csv-id-gap", text("g.csv", "src,dst\n0,1\n1,4\n"), bound("g.csv"),
         ("'g.csv'", "never names 2, 3", "node list")),
    Case("csv-names-headerless", text("g.csv", "ST-1,ST-2\n"), bound("g.csv"),
         ("'g.csv'", "not a known header", "headerless")),
    Case("csv-id-nan", text("g.csv", "src,dst,weight\n0,nan,1\n"), bound("g.csv"), ("'g.csv'", "integers")),
    Case("csv-missing-column", text("g.csv", "src,dst,weight\n0,1,1\n1,2\n"), bound("g.csv"),
         ("'g.csv'", "line 3", "2 fields", "expected 3")),
    Case("csv-wrong-header", text("g.csv", "a,b,c\n0,1,1\n"), bound("g.csv"), ("'g.csv'", "src,dst[,weight]")),
    Case("csv-columns-absent", text("g.csv", "src,dst\n0,1\n"), bound("g.csv", "good.npz", "--columns", "x,y"),
         ("'g.csv'", "expected columns x,y")),
    Case("csv-duplicate-conflict", text("g.csv", "src,dst,weight\n0,1,1\n1,2,1\n1,0,2\n"), bound("g.csv"),
         ("'g.csv'", "edge (0, 1) twice", "different weights")),
    Case("csv-self-loop-laplacian", text("g.csv", "src,dst,weight\n0,1,1\n1,1,3\n"),
         bound("g.csv", "good.npz", "--shift", "laplacian"), ("'g.csv'", "self-loops")),
    Case("csv-empty", text("g.csv", ""), bound("g.csv"), ("'g.csv'", "empty")),
    Case("csv-header-only", text("g.csv", "src,dst,weight\n"), bound("g.csv"), ("'g.csv'", "no edges")),
    Case("csv-weight-text", text("g.csv", "src,dst,weight\n0,1,heavy\n"), bound("g.csv"),
         ("'g.csv'", "'heavy' is not a number")),
    Case("csv-weight-nan", text("g.csv", "src,dst,weight\n0,1,nan\n"), bound("g.csv"), ("'g.csv'", "NaN or infinite")),
    Case("csv-not-utf8", raw("g.csv", b"src,dst,weight\n0,1,\xff\xfe\n"), bound("g.csv"), ("'g.csv'", "UTF-8")),
    Case("csv-field-too-long", text("g.csv", "src,dst,weight\n0,1," + "1" * 200_000 + "\n"), bound("g.csv"),
         ("'g.csv'", "CSV")),
    Case("graph-wrong-suffix", text("g.txt", "0 1\n1 0\n"), bound("g.txt"), ("'g.txt'", ".npy, .npz or .csv")),
    Case("graph-missing", nothing, bound("nowhere.npy"), ("'nowhere.npy'", "does not exist")),
    Case("graph-is-directory", folder("g.npy"), bound("g.npy"), ("'g.npy'", "directory")),
    Case("graph-npz-not-sparse", npz("g.npz", a=np.zeros(3)), bound("g.npz"), ("'g.npz'", "save_npz")),
    Case("distance-node-count", npy("g3.npy", GOOD[:3, :3]), ["distance", "good.npy", "g3.npy"],
         ("4 and 3 nodes", "same node count")),
    # --- filter files (bound) ------------------------------------------------
    Case("filter-missing-taps", npz("f.npz", basis=np.asarray("monomial")), bound("good.npy", "f.npz"),
         ("'f.npz'", "'taps'")),
    Case("filter-missing-basis", npz("f.npz", taps=np.ones(3)), bound("good.npy", "f.npz"), ("'f.npz'", "'basis'")),
    Case("filter-wrong-basis", npz("f.npz", taps=np.ones(3), basis=np.asarray("legendre")), bound("good.npy", "f.npz"),
         ("'f.npz'", "'legendre'", "monomial, chebyshev")),
    Case("filter-basis-not-string", npz("f.npz", taps=np.ones(3), basis=np.array(3)), bound("good.npy", "f.npz"),
         ("'f.npz'", "one string")),
    Case("filter-chebyshev-no-interval", npz("f.npz", taps=np.ones(3), basis=np.asarray("chebyshev")),
         bound("good.npy", "f.npz"), ("'f.npz'", "needs an interval")),
    Case("filter-interval-a-ge-b", npz("f.npz", taps=np.ones(3), basis=np.asarray("chebyshev"),
                                       interval=np.array([2.0, 2.0])), bound("good.npy", "f.npz"),
         ("'f.npz'", "a < b")),
    Case("filter-interval-nan", npz("f.npz", taps=np.ones(3), basis=np.asarray("chebyshev"),
                                    interval=np.array([np.nan, 1.0])), bound("good.npy", "f.npz"),
         ("'f.npz'", "two finite numbers")),
    Case("filter-interval-three", npz("f.npz", taps=np.ones(3), basis=np.asarray("chebyshev"),
                                      interval=np.array([0.0, 1.0, 2.0])), bound("good.npy", "f.npz"),
         ("'f.npz'", "two finite numbers")),
    Case("filter-interval-text", npz("f.npz", taps=np.ones(3), basis=np.asarray("chebyshev"),
                                     interval=np.array(["low", "high"])), bound("good.npy", "f.npz"),
         ("'f.npz'", "two finite numbers")),
    Case("filter-taps-rank-2", npz("f.npz", taps=np.ones((3, 2)), basis=np.asarray("monomial")),
         bound("good.npy", "f.npz"), ("'f.npz'", "(K,) or (K, F_in, F_out)", "(3, 2)")),
    Case("filter-taps-nan", npz("f.npz", taps=np.array([1.0, np.nan]), basis=np.asarray("monomial")),
         bound("good.npy", "f.npz"), ("'f.npz'", "NaN or infinite")),
    Case("filter-taps-empty", npz("f.npz", taps=np.ones(0), basis=np.asarray("monomial")), bound("good.npy", "f.npz"),
         ("'f.npz'", "at least one tap")),
    Case("filter-taps-complex", npz("f.npz", taps=np.ones(3) * 1j, basis=np.asarray("monomial")),
         bound("good.npy", "f.npz"), ("'f.npz'", "real numbers")),
    Case("filter-taps-object", npz("f.npz", taps=np.array([1, None], dtype=object), basis=np.asarray("monomial")),
         bound("good.npy", "f.npz"), ("'f.npz'", "could not be read")),
    Case("filter-not-npz", text("f.npz", "taps = 1, 2, 3\n"), bound("good.npy", "f.npz"), ("'f.npz'", ".npz archive")),
    Case("filter-single-npy", npy("f.npy", np.ones(3)), bound("good.npy", "f.npy"), ("'f.npy'", ".npz archive")),
    Case("filter-missing", nothing, bound("good.npy", "nowhere.npz"), ("'nowhere.npz'", "does not exist")),
    Case("filter-is-directory", folder("f.npz"), bound("good.npy", "f.npz"), ("'f.npz'", "directory")),
    # --- bound options -------------------------------------------------------
    Case("eps-negative", nothing, bound(eps="-0.01"), ("--eps", ">= 0", "-0.01")),
    Case("eps-nan", nothing, bound(eps="nan"), ("--eps", "finite")),
    Case("eps-inf", nothing, bound(eps="inf"), ("--eps", "finite")),
    Case("eps-text", nothing, bound(eps="small"), ("--eps", "'small'", "not a number")),
    Case("delta-above-8", nothing, bound("good.npy", "good.npz", "--delta", "9"), ("--delta", "[0, 8]")),
    Case("delta-negative", nothing, bound("good.npy", "good.npz", "--delta", "-0.5"), ("--delta", "[0, 8]")),
    Case("delta-nan", nothing, bound("good.npy", "good.npz", "--delta", "nan"), ("--delta", "[0, 8]")),
    Case("delta-text", nothing, bound("good.npy", "good.npz", "--delta", "wide"), ("--delta", "'wide'")),
    Case("shift-unknown", nothing, bound("good.npy", "good.npz", "--shift", "magic"), ("--shift", "'magic'")),
    # --- configs (train) -----------------------------------------------------
    Case("config-unknown-top-key", text("c.toml", "colour = 'red'\n" + TINY), train(), ("'colour'", "accepted keys")),
    Case("config-unknown-section-key", tiny_with("taps = 3", "taps = 3\nwidth = 4"), train(),
         ("width", "model", "accepted keys")),
    Case("config-unknown-table", text("c.toml", TINY + "\n[optimiser]\nname = 'sgd'\n"), train(),
         ("'optimiser'", "accepted keys")),
    Case("config-section-not-table", text("c.toml", "train = 3\n"), train(), ("'train'", "table")),
    Case("config-wrong-type", tiny_with("epochs = 2", "epochs = \"two\""), train(),
         ("train.epochs = 'two'", "positive integer")),
    Case("config-float-for-int", tiny_with("batch_size = 16", "batch_size = 16.0"), train(),
         ("train.batch_size", "non-negative integer")),
    Case("config-bool-for-int", tiny_with("taps = 3", "taps = true"), train(), ("model.taps", "positive integer")),
    Case("config-negative-eps", tiny_with("eps = [0.001, 0.01]", "eps = [0.001, -0.01]"), train(),
         ("certify.eps", "> 0")),
    Case("config-zero-epochs", tiny_with("epochs = 2", "epochs = 0"), train(), ("train.epochs = 0", "positive integer")),
    Case("config-penalty-weight-nan", tiny_with("weight = 0.1", "weight = nan"), train(),
         ("penalty.weight = nan", "finite")),
    Case("config-weights-per-layer", tiny_with("weight = 0.1", "weight = [0.1, 0.2]"), train(),
         ("penalty.weight", "2 values for 1 layers")),
    Case("config-fractions", tiny_with("seed = 0\n\n[model]", "seed = 0\ntrain_fraction = 0.9\n\n[model]"), train(),
         ("train_fraction", "below 1")),
    Case("config-name-escapes", tiny_with('name = "tiny"', 'name = "../escaped"'), ["train", "c.toml"],
         ("'../escaped'", "plain folder name")),
    Case("config-invalid-toml", text("c.toml", TINY + "\n[[[\n"), train(), ("'c.toml'", "not valid TOML")),
    Case("config-not-utf8", raw("c.toml", b'name = "\xff"\n'), train(), ("'c.toml'", "UTF-8")),
    Case("config-missing", nothing, train("nowhere.toml"), ("'nowhere.toml'", "does not exist")),
    Case("config-is-directory", folder("c.toml"), train(), ("'c.toml'", "directory")),
    Case("train-epochs-option-0", text("c.toml", TINY), train("c.toml", "--epochs", "0"), ("--epochs", "at least 1")),
    Case("train-seed-option-negative", text("c.toml", TINY), train("c.toml", "--seed", "-3"),
         ("--seed", "non-negative")),
    Case("train-out-is-file", both(text("c.toml", TINY), text("out", "precious\n")), train(),
         ("'out'", "is a file", "directory")),
    Case("train-out-nonempty-no-force", both(text("c.toml", TINY), text("out/notes.txt", "precious\n")), train(),
         ("'out'", "not empty", "--force")),
    Case("train-resume-without-checkpoint", both(text("c.toml", TINY), text("out/log.jsonl", "{}\n")),
         train("c.toml", "--resume"), ("'out'", "no checkpoint.npz")),
    Case("data-path-escapes", escape_parent, ["train", "cfg/c.toml", "--out", "out"],
         ("data.signals", "'../x.npz'", "outside")),
    Case("data-path-absolute", files_config(nothing, graph="/etc/hostname.npy"), train(),
         ("data.graph", "'/etc/hostname.npy'", "outside")),
    Case("data-path-symlink-out", symlink_out, ["train", "cfg/c.toml", "--out", "out"],
         ("data.graph", "'g.npy'", "outside")),
    Case("data-path-nul", files_config(nothing, graph="g\\u0000.npy"), train(), ("data.graph", "NUL")),
    Case("data-files-without-signals", text("c.toml", FILES.replace('signals = "{signals}"\n', "").format(
        graph="g5.npy", task="classify")), train(), ("data.signals",)),
    Case("data-signals-missing", files_config(nothing), train(), ("'sig.npz'", "does not exist")),
    Case("data-signals-no-y", files_config(npz("sig.npz", x=np.ones((20, 5)))), train(),
         ("'sig.npz'", "'x' and 'y'")),
    Case("data-signals-wrong-nodes", files_config(npz("sig.npz", x=np.ones((20, 6)), y=np.zeros((20, 6), int))),
         train(), ("'sig.npz'", "(S, 5)", "(20, 6, 1)")),
    Case("data-signals-none", files_config(npz("sig.npz", x=np.ones((0, 5)), y=np.zeros((0, 5), int))), train(),
         ("'sig.npz'", "S, F >= 1")),
    Case("data-signals-npy", files_config(npy("sig.npy", np.ones((20, 5))), signals="sig.npy"), train(),
         ("'sig.npy'", "data.targets")),
    Case("data-signals-object", files_config(npz("sig.npz", x=np.array([None] * 3, dtype=object), y=np.zeros(3))),
         train(), ("'sig.npz'", "could not be read")),
    Case("data-signals-beyond-float32", files_config(npz("sig.npz", x=np.full((20, 5), 1e300), y=_labels())),
         train(), ("'sig.npz'", "float32")),
    Case("data-regress-targets-beyond-float32",
         files_config(npz("sig.npz", x=np.ones((20, 5)), y=np.full((20, 5), -1e300)), task="regress"), train(),
         ("'sig.npz'", "float32")),
    Case("data-labels-float", files_config(npz("sig.npz", x=np.ones((20, 5)), y=_labels() + 0.5)), train(),
         ("'sig.npz'", "integer labels")),
    Case("data-labels-huge-class", files_config(npz("sig.npz", x=np.ones((20, 5)),
                                                    y=np.where(_labels() == 1, 10**9, 0))), train(),
         ("'sig.npz'", "class 1000000000", "0 to C - 1")),
    Case("data-one-class", files_config(npz("sig.npz", x=np.ones((20, 5)), y=np.zeros((20, 5), int))), train(),
         ("'sig.npz'", "single class")),
    Case("data-too-few-signals", files_config(npz("sig.npz", x=np.ones((2, 5)), y=_labels(2))), train(),
         ("'sig.npz'", "2 signals", "too few")),
    Case("data-graph-non-symmetric", both(npy("g5.npy", np.triu(np.ones((5, 5)), 1)),
                                          npz("sig.npz", x=np.ones((20, 5)), y=_labels()),
                                          text("c.toml", FILES.format(graph="g5.npy", signals="sig.npz",
                                                                      task="classify"))), train(),
         ("'g5.npy'", "not symmetric")),
    # --- run directories (certify, stress, compare, train --resume) ----------
    Case("certify-missing-run", nothing, ["certify", "nowhere"], ("'nowhere'", "does not exist")),
    Case("certify-file-not-run", text("afile", "x\n"), ["certify", "afile"], ("'afile'", "is a file")),
    Case("certify-half-written", in_run(lambda p: (p / "params.npz").unlink()), ["certify", "run"],
         ("'run'", "no params.npz", "--resume")),
    Case("certify-no-manifest", in_run(lambda p: (p / "manifest.json").unlink()), ["certify", "run"],
         ("manifest.json", "missing")),
    Case("certify-newer-format", in_run(set_manifest(format=99)), ["certify", "run"],
         ("'run'", "format 99", "reads format 1")),
    Case("certify-manifest-format-text", in_run(set_manifest(format="1")), ["certify", "run"], ("'run'", "format")),
    Case("certify-corrupt-manifest", in_run(lambda p: (p / "manifest.json").write_text('{"format": 1,')),
         ["certify", "run"], ("manifest.json", "not valid JSON")),
    Case("certify-manifest-not-object", in_run(lambda p: (p / "manifest.json").write_text("[1]")),
         ["certify", "run"], ("'run'", "no format field")),
    Case("certify-graph-fingerprint", in_run(rescale_graph), ["certify", "run"], ("'run'", "fingerprint")),
    Case("certify-graph-missing", in_run(lambda p: (p / "graph.npz").unlink()), ["certify", "run"],
         ("graph.npz", "missing")),
    Case("certify-params-truncated", in_run(lambda p: (p / "params.npz").write_bytes(
        (p / "params.npz").read_bytes()[:100])), ["certify", "run"], ("params.npz", "could not be read")),
    Case("certify-params-nan", in_run(nan_params), ["certify", "run"], ("'run'", "layers/0/taps", "finite")),
    Case("certify-config-invalid", in_run(lambda p: (p / "config.toml").write_text("[[[")), ["certify", "run"],
         ("config.toml", "not valid TOML")),
    Case("certify-test-missing", in_run(lambda p: (p / "test.npz").unlink()), ["certify", "run"],
         ("test.npz", "missing")),
    Case("certify-test-x-2d", in_run(flat_test_x), ["certify", "run"], ("test.npz", "shape (signals, 30")),
    Case("certify-manifest-basis-no-interval", in_run(basis_no_interval), ["certify", "run"],
         ("manifest", "chebyshev with an interval")),
    Case("certify-eps-nan", in_run(lambda p: None), ["certify", "run", "--eps", "nan"], ("--eps", "finite")),
    Case("stress-missing-run", nothing, ["stress", "nowhere"], ("'nowhere'", "does not exist")),
    Case("stress-half-written", in_run(lambda p: (p / "params.npz").unlink()), ["stress", "run"],
         ("'run'", "no params.npz")),
    Case("stress-newer-format", in_run(set_manifest(format=99)), ["stress", "run"], ("'run'", "format 99")),
    Case("stress-graph-fingerprint", in_run(rescale_graph), ["stress", "run"], ("'run'", "fingerprint")),
    Case("stress-eps-zero", in_run(lambda p: None), ["stress", "run", "--eps", "0"], ("--eps", "> 0")),
    Case("stress-kinds-unknown", in_run(lambda p: None), ["stress", "run", "--kinds", "relative,quake"],
         ("--kinds", "'relative,quake'")),
    Case("stress-samples-zero", in_run(lambda p: None), ["stress", "run", "--samples", "0"],
         ("--samples", "at least 1")),
    Case("compare-missing-run", nothing, ["compare", "nowhere"], ("'nowhere'", "does not exist")),
    Case("compare-file-not-run", text("afile", "x\n"), ["compare", "afile"], ("'afile'", "directory")),
    Case("compare-no-summary", in_run(lambda p: (p / "summary.json").unlink()), ["compare", "run"],
         ("summary.json", "missing")),
    Case("compare-summary-wrong-shape", in_run(lambda p: (p / "summary.json").write_text("[1, 2]")),
         ["compare", "run"], ("'run'", "lacks the fields")),
    Case("compare-csv-exists", both(in_run(lambda p: None), text("table.csv", "mine\n")),
         ["compare", "run", "--csv", "table.csv"], ("--csv", "'table.csv'", "already exists")),
    Case("compare-csv-missing-folder", in_run(lambda p: None), ["compare", "run", "--csv", "nowhere/table.csv"],
         ("--csv", "'nowhere/table.csv'", "cannot be created")),
    Case("resume-other-seed", both(in_run(lambda p: None), text("c.toml", TINY)),
         ["train", "c.toml", "--out", "run", "--resume", "--seed", "7"], ("'run'", "another graph or seed")),
    Case("resume-checkpoint-truncated", both(in_run(lambda p: (p / "checkpoint.npz").write_bytes(
        (p / "checkpoint.npz").read_bytes()[:200])), text("c.toml", TINY)),
         ["train", "c.toml", "--out", "run", "--resume"], ("checkpoint.npz", "could not be read")),
    Case("train-into-finished-run-no-force", both(in_run(lambda p: None), text("c.toml", TINY)),
         ["train", "c.toml", "--out", "run"], ("'run'", "already exists", "--force")),
]


def _case(p):
    return p.values[0] if hasattr(p, "values") else p


# ---------------------------------------------------------------------------
# The check.


def snapshot(root) -> dict:
    """``{relative path: what it is}`` for every file, link and folder under
    ``root``: bytes and mtime for files, the target for links."""
    out = {}
    for here, dirs, files in os.walk(root):
        for d in dirs:
            p = os.path.join(here, d)
            out[os.path.relpath(p, root)] = ("link", os.readlink(p)) if os.path.islink(p) else ("dir",)
        for f in files:
            p = os.path.join(here, f)
            if os.path.islink(p):
                out[os.path.relpath(p, root)] = ("link", os.readlink(p))
                continue
            with open(p, "rb") as fh:
                out[os.path.relpath(p, root)] = ("file", fh.read(), os.stat(p).st_mtime_ns)
    return out


#: Warning categories the interpreter hides by default: they would not reach
#: the command line's stderr (Python docs, "warnings: default filter").
_HIDDEN = (DeprecationWarning, PendingDeprecationWarning, ImportWarning, ResourceWarning)


def test_case_table_is_large_and_unique():
    ids = [_case(c).id for c in CASES]
    assert len(ids) >= 45
    assert len(set(ids)) == len(ids)


@pytest.mark.parametrize("case", CASES, ids=lambda c: c.id)
def test_bad_input(case, tmp_path, monkeypatch, capsys, request):
    np.save(tmp_path / "good.npy", GOOD)
    save_filter(str(tmp_path / "good.npz"), np.array([1.0, -0.5, 0.25]), sf.Basis())
    if getattr(case.build, "needs_run", False):
        case.build(tmp_path, run=request.getfixturevalue("finished_run"))
    else:
        case.build(tmp_path)
    monkeypatch.chdir(tmp_path)
    before = snapshot(tmp_path)
    capsys.readouterr()

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            status = main(list(case.argv))
        except SystemExit as exc:  # argparse's own errors
            status = exc.code
    out, err = capsys.readouterr()
    shown = [w for w in caught if not issubclass(w.category, _HIDDEN)]

    assert "Traceback" not in out + err
    assert status == 2, (status, err)
    assert err.count("\n") == 1 and err.endswith(".\n"), repr(err)
    assert err.startswith("stablefilt"), repr(err)
    for part in case.expect:
        assert part in err, (part, err)
    assert out == "", out
    assert not shown, [f"{w.category.__name__}: {w.message}" for w in shown]
    after = snapshot(tmp_path)
    assert sorted(after) == sorted(before), (set(after) ^ set(before))
    changed = [k for k in before if before[k] != after[k]]
    assert not changed, changed
