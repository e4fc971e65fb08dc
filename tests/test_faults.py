"""Faults: a killed run resumes to the same parameters, nothing is lost or
torn, training that blows up stops cleanly, a full disk or an unwritable
folder is refused before anything is written, and a run is never deleted.

The promises under test are README "What is guaranteed" > "Resume" and
"Bad input"; the checks on readable files follow from "every run file is
written to a temporary name and renamed" (stablefilt/_runs.py).
"""

from __future__ import annotations

import collections
import errno
import json
import os
import random
import shutil
import signal
import subprocess
import sys
import threading
import time
import tomllib
import warnings

import helpers as H
import numpy as np
import pytest

import stablefilt as sf
import stablefilt._runs as runs_module
from stablefilt.cli import main

# 30 sensors, 60 snapshots, one layer of 4 features with 3 taps, batches of 16
# (two steps an epoch): the smallest run that still exercises every file.

# ".lock" is left behind by a killed writer (README, run directories); --resume takes it over.
RUN_FILES = {"config.toml", "manifest.json", "graph.npz", "test.npz", "log.jsonl", "checkpoint.npz", "params.npz",
             "summary.json", ".lock"}


def tiny(epochs=2, lr=0.05, clip=1.0) -> str:
    return H.small_run_text(epochs=epochs, lr=lr, clip=clip)


def quiet(msg):
    pass


def snapshot(folder) -> dict:
    out = {}
    for here, _, files in os.walk(folder):
        for f in files:
            p = os.path.join(here, f)
            with open(p, "rb") as fh:
                out[os.path.relpath(p, folder)] = (fh.read(), os.stat(p).st_mtime_ns)
    return out


def one_line(err: str) -> bool:
    return err.count("\n") == 1 and err.startswith("stablefilt train: ") and "Traceback" not in err


@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    """A finished two-epoch run, copied by the tests that change it."""
    path = tmp_path_factory.mktemp("faults") / "run"
    sf.train(sf.parse_config(tiny()), str(path), progress=quiet)
    return path


# ---------------------------------------------------------------------------
# (a) SIGKILL at random moments, resume, compare with an uninterrupted run.


def check_readable(run) -> dict:
    """Read every file in a run folder the way a user would; return what the
    log and checkpoint say. Fails on any file that does not parse, except a
    torn last log line (README: the log holds complete JSON lines up to the
    last finished epoch; _runs.read_log drops a torn last line on resume)."""
    seen = {"temps": [], "files": set()}
    for name in sorted(os.listdir(run)):
        path = os.path.join(run, name)
        if name.startswith(".tmp-"):
            # atomic_write's temporary, left by a kill before the rename; the
            # tool never reads these names.
            seen["temps"].append(name)
            continue
        assert name in RUN_FILES, f"unexpected file {name!r} in the run"
        seen["files"].add(name)
        if name.endswith(".json"):
            with open(path) as fh:
                json.load(fh)
        elif name.endswith(".npz"):
            with np.load(path, allow_pickle=False) as z:
                arrays = {k: z[k] for k in z.files}
            if name == "checkpoint.npz":
                seen["checkpoint_epoch"] = json.loads(str(arrays["meta"]))["epoch"]
        elif name == "config.toml":
            with open(path, "rb") as fh:
                tomllib.load(fh)
        elif name == "log.jsonl":
            with open(path, "rb") as fh:
                data = fh.read()
            lines = data.split(b"\n")
            tail = lines.pop()  # b"" when the file ends in a newline
            records = [json.loads(line) for line in lines]
            seen["torn"] = tail != b""
            if seen["torn"]:
                with pytest.raises(json.JSONDecodeError):
                    json.loads(tail)
            seen["log_epochs"] = [r["epoch"] for r in records]
    return seen


class Proc:
    """A ``stablefilt train`` subprocess whose stdout lines are collected by
    a thread; ``first_epoch`` is set when the first epoch line arrives."""

    def __init__(self, args, cwd, env):
        self.p = subprocess.Popen([sys.executable, "-m", "stablefilt.cli", "train", *args], cwd=cwd, env=env,
                                  stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        self.lines = []
        self.first_epoch = threading.Event()
        self.reader = threading.Thread(target=self._read, daemon=True)
        self.reader.start()

    def _read(self):
        for line in self.p.stdout:
            self.lines.append(line)
            if line.startswith("epoch"):
                self.first_epoch.set()
        self.first_epoch.set()  # ended without one

    def finish(self, timeout=180):
        _, err = self.p.communicate(timeout=timeout)
        self.reader.join(timeout=5)
        return self.p.returncode, err


#: Kill schedule: attempts, and the longest delay after the first epoch line.
KILLS, MAX_DELAY, KILL_SEED, EPOCHS = 4, 0.4, 20240605, 10


def test_sigkill_and_resume_reaches_the_uninterrupted_parameters(tmp_path):
    cfg = tmp_path / "tiny.toml"
    cfg.write_text(tiny(epochs=EPOCHS))
    # Each process would compile the same steps; JAX's persistent cache in
    # tmp_path lets later processes load them (same executables, so the
    # numbers cannot differ) and keeps the test near a minute on 2 cores.
    env = dict(os.environ, JAX_PLATFORMS="cpu", JAX_COMPILATION_CACHE_DIR=str(tmp_path / "jax-cache"),
               JAX_PERSISTENT_CACHE_MIN_COMPILE_TIME_SECS="0", JAX_PERSISTENT_CACHE_MIN_ENTRY_SIZE_BYTES="0")
    ref = Proc([str(cfg), "--out", "ref"], tmp_path, env)  # runs alongside the killed one
    rng = random.Random(KILL_SEED)
    run = tmp_path / "killed"
    outcomes, files_before, temps = [], set(), []
    for attempt in range(KILLS):
        proc = Proc([str(cfg), "--out", str(run)] + (["--resume"] if attempt else []), tmp_path, env)
        assert proc.first_epoch.wait(timeout=180)
        if not any(x.startswith("epoch") for x in proc.lines):
            status, err = proc.finish()  # stdout closed without an epoch: nothing was left to train
            assert status == 0, err
            outcomes.append("finished")
            break
        time.sleep(rng.uniform(0.0, MAX_DELAY))
        proc.p.send_signal(signal.SIGKILL)
        status, err = proc.finish()
        outcomes.append("killed" if status == -signal.SIGKILL else f"exited {status}")
        assert status in (0, -signal.SIGKILL), err
        seen = check_readable(run)
        # Nothing that existed is lost; the log is epochs 1..m in order with
        # m the checkpoint's epoch or one more (the log line is appended
        # just before the checkpoint is renamed into place).
        assert files_before <= seen["files"], files_before - seen["files"]
        files_before = seen["files"]
        c = seen["checkpoint_epoch"]
        m = len(seen["log_epochs"])
        assert seen["log_epochs"] == list(range(1, m + 1))
        assert m in (c, c + 1), (m, c)
        if seen["torn"]:
            assert m == c
        temps += seen["temps"]
    print(f"kill schedule seed {KILL_SEED}: {outcomes}; temporaries left by kills: {temps}")
    # The first kill lands within MAX_DELAY of epoch 1 with 9 epochs to go.
    assert outcomes[0] == "killed", outcomes
    status, err = Proc([str(cfg), "--out", str(run), "--resume"], tmp_path, env).finish()
    assert status == 0, err
    status, err = ref.finish()
    assert status == 0, err

    with np.load(tmp_path / "ref" / "params.npz", allow_pickle=False) as a, \
            np.load(run / "params.npz", allow_pickle=False) as b:
        assert sorted(a.files) == sorted(b.files)
        for k in a.files:
            assert a[k].dtype == b[k].dtype and np.array_equal(a[k], b[k]), k
    final = check_readable(run)
    assert final["log_epochs"] == list(range(1, EPOCHS + 1)) and not final["torn"]

    def records(path):
        with open(path) as fh:
            return [{k: v for k, v in json.loads(line).items() if k != "seconds"} for line in fh]

    assert records(run / "log.jsonl") == records(tmp_path / "ref" / "log.jsonl")
    with open(run / "summary.json") as fa, open(tmp_path / "ref" / "summary.json") as fb:
        assert json.load(fa) == json.load(fb)


# ---------------------------------------------------------------------------
# (b) Numerical faults: exploding parameters, an infinite loss.


def test_exploding_parameters_stop_with_status_1_and_keep_the_checkpoint(tmp_path, capsys):
    # Adam moves each parameter by about the learning rate per step (two
    # steps an epoch), so 3e5 without clipping passes 1e6 (_train.EXPLODED)
    # at epoch 3 for this seed: one good checkpoint exists when it stops.
    (tmp_path / "hot.toml").write_text(tiny(epochs=6, lr=3e5, clip=0))
    out = tmp_path / "hot"
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        status = main(["train", str(tmp_path / "hot.toml"), "--out", str(out)])
    _, err = capsys.readouterr()
    assert status == 1
    assert one_line(err), err
    assert "exploded" in err and "checkpoint" in err
    assert not [w for w in caught if not issubclass(w.category, DeprecationWarning)]

    with open(out / "log.jsonl") as fh:
        log = [json.loads(line) for line in fh]
    last = log[-1]
    assert "stopped" in last and "exploded" in last["stopped"]
    stop = last["epoch"]
    assert stop >= 2, "the config should complete an epoch before exploding"
    assert [r["epoch"] for r in log[:-1]] == list(range(1, stop))
    assert f"(epoch {stop - 1})" in err
    with np.load(out / "checkpoint.npz", allow_pickle=False) as z:
        meta = json.loads(str(z["meta"]))
        leaves = [z[k] for k in z.files if k != "meta"]
    assert meta["epoch"] == stop - 1
    assert leaves and all(np.all(np.isfinite(a)) for a in leaves)
    assert not (out / "params.npz").exists() and not (out / "summary.json").exists()
    with open(out / "manifest.json") as fh:
        assert json.load(fh)["finished"] is None


FILES = """\
name = "loud"

[data]
source = "files"
graph = "g.npy"
signals = "sig.npz"
task = "regress"
shift = "normalized-laplacian"

[model]
features = [4]
taps = 3

[train]
epochs = 3
"""


def test_infinite_loss_stops_in_the_first_epoch(tmp_path, capsys):
    # Signals of 1e25 fit float32 (max 3.4e38) but their squared error does
    # not: the loss is inf in epoch 1, before any checkpoint.
    a = np.diag(np.ones(7), 1)
    np.save(tmp_path / "g.npy", a + a.T)
    rng = np.random.default_rng(3)
    np.savez(tmp_path / "sig.npz", x=rng.standard_normal((30, 8)) * 1e25, y=rng.standard_normal((30, 8)))
    (tmp_path / "loud.toml").write_text(FILES)
    out = tmp_path / "loud"
    status = main(["train", str(tmp_path / "loud.toml"), "--out", str(out)])
    _, err = capsys.readouterr()
    assert status == 1
    assert one_line(err) and "loss became" in err and "no epoch completed" in err, err
    with open(out / "log.jsonl") as fh:
        log = [json.loads(line) for line in fh]
    assert len(log) == 1 and log[0]["epoch"] == 1 and "loss became" in log[0]["stopped"]
    assert not (out / "checkpoint.npz").exists() and not (out / "params.npz").exists()


# ---------------------------------------------------------------------------
# (c) A full disk, an unwritable folder.

Usage = collections.namedtuple("Usage", "total used free")


@pytest.fixture
def full_disk(monkeypatch):
    """``shutil.disk_usage`` as _runs sees it, with 4 KiB free."""
    monkeypatch.setattr(runs_module.shutil, "disk_usage", lambda path: Usage(1 << 30, (1 << 30) - 4096, 4096))


def test_full_disk_is_refused_before_writing(tmp_path, full_disk, capsys):
    (tmp_path / "c.toml").write_text(tiny())
    out = tmp_path / "empty"
    out.mkdir()
    with pytest.raises(sf.RunError, match="MiB free"):
        sf.train(sf.parse_config(tiny()), str(out), progress=quiet)
    assert os.listdir(out) == []
    assert main(["train", str(tmp_path / "c.toml"), "--out", str(out)]) == 2
    _, err = capsys.readouterr()
    assert one_line(err) and "MiB free" in err and repr(str(out)) in err, err
    assert os.listdir(out) == []


@pytest.mark.parametrize("mode", ["--force", "--resume"])
def test_full_disk_leaves_an_existing_run_alone(tmp_path, finished, full_disk, capsys, mode):
    run = tmp_path / "run"
    shutil.copytree(finished, run)
    (tmp_path / "c.toml").write_text(tiny())
    before = snapshot(run)
    assert main(["train", str(tmp_path / "c.toml"), "--out", str(run), mode]) == 2
    _, err = capsys.readouterr()
    assert one_line(err) and "MiB free" in err, err
    assert snapshot(run) == before


def test_unwritable_folder_is_refused_and_the_run_left_alone(tmp_path, finished, monkeypatch, capsys):
    # Simulated: the tests run as root, for whom a read-only mode on the folder
    # does not stop writes. The probe write in prepare_out_dir fails as it
    # would on a read-only folder (EACCES).
    real_open = open

    def refusing_open(path, *args, **kwargs):
        if str(path).endswith(".write-test"):
            raise PermissionError(errno.EACCES, "Permission denied", str(path))
        return real_open(path, *args, **kwargs)

    monkeypatch.setattr(runs_module, "open", refusing_open, raising=False)
    run = tmp_path / "run"
    shutil.copytree(finished, run)
    (tmp_path / "c.toml").write_text(tiny())
    before = snapshot(run)
    assert main(["train", str(tmp_path / "c.toml"), "--out", str(run), "--force"]) == 2
    _, err = capsys.readouterr()
    assert one_line(err) and "cannot write" in err and "Permission denied" in err, err
    assert snapshot(run) == before


# ---------------------------------------------------------------------------
# (d) A run directory is never deleted.


def test_force_keeps_the_old_log(tmp_path, finished, capsys):
    run = tmp_path / "run"
    shutil.copytree(finished, run)
    old_log = (run / "log.jsonl").read_bytes()
    old = {f: (run / f).read_bytes() for f in ("checkpoint.npz", "params.npz", "summary.json")}
    (tmp_path / "c.toml").write_text(tiny(epochs=3))
    assert main(["train", str(tmp_path / "c.toml"), "--out", str(run), "--force"]) == 0
    capsys.readouterr()
    assert (run / "log.jsonl.previous").read_bytes() == old_log
    # The earlier run's results are set aside too, not overwritten.
    for f, data in old.items():
        assert (run / f"{f}.previous").read_bytes() == data, f
    with open(run / "log.jsonl") as fh:
        assert [json.loads(line)["epoch"] for line in fh] == [1, 2, 3]


def test_second_force_keeps_the_first_log(tmp_path, finished, capsys):
    run = tmp_path / "run"
    shutil.copytree(finished, run)
    first_log = (run / "log.jsonl").read_bytes()
    (tmp_path / "c.toml").write_text(tiny(epochs=1))
    for _ in range(2):
        assert main(["train", str(tmp_path / "c.toml"), "--out", str(run), "--force"]) == 0
    capsys.readouterr()
    kept = [p.read_bytes() for p in run.iterdir() if p.name.startswith("log.jsonl")]
    assert first_log in kept
