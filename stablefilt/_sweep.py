"""Sweeps: the runs of a grid of settings (:mod:`stablefilt._grid`), each a
normal run directory under one output folder, run in separate processes.

Layout of a sweep folder::

    <out>/<setting name>/   one run directory per setting (see _runs.py)
    <out>/logs/<name>.log   what each run printed, every attempt appended
    <out>/sweep.json        the grid and each run's state and failure reason
    <out>/front.png         the accuracy-stability front (report extra)
    <out>/.lock             while a sweep drives the folder: its process id

A run whose folder holds ``summary.json`` is complete and skipped; one with a
checkpoint continues from it (``train --resume``); one killed before its
first checkpoint starts again. So a stopped sweep, started again with the
same command, does only what is left.

Every run is a child process (``python -m stablefilt._sweep JOB``, the same
training as ``stablefilt train``), started here at most ``jobs`` at a time,
or submitted as a task to a Dask scheduler. Each child limits its own
threads (:data:`THREAD_LIMITS`), so parallel runs do not compete for cores
(docs/scale-out.md has the measurements).
"""

from __future__ import annotations

import concurrent.futures
import contextlib
import json
import os
import subprocess
import sys
import threading
import time

from ._errors import ConfigError, RunError, StablefiltError, TrainingDiverged
from ._grid import Setting
from ._lock import _alive, _holder, lock_path, run_lock
from ._runs import now
from ._store import write_json

#: Environment of every run process: XLA's CPU backend without its Eigen
#: thread pool for matrix products and one intra-op thread, and one thread
#: for OpenMP / OpenBLAS / MKL (numpy and scipy's BLAS). A value the user
#: already set is kept (XLA_FLAGS is extended).
THREAD_LIMITS = {
    "XLA_FLAGS": "--xla_cpu_multi_thread_eigen=false intra_op_parallelism_threads=1",
    "OMP_NUM_THREADS": "1",
    "OPENBLAS_NUM_THREADS": "1",
    "MKL_NUM_THREADS": "1",
}

#: Seconds between two looks at whether the parent process still runs.
PARENT_POLL = 0.5

#: The environment variable that tells a run process its parent's id.
PARENT_VAR = "STABLEFILT_SWEEP_PARENT"


def child_env(limit_threads: bool) -> dict:
    """The environment of a run process: this one's, the package importable
    from where it is imported here, and :data:`THREAD_LIMITS` when asked."""
    env = dict(os.environ)
    env[PARENT_VAR] = str(os.getpid())
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    env["PYTHONPATH"] = os.pathsep.join(p for p in (root, env.get("PYTHONPATH", "")) if p)
    if limit_threads:
        for k, v in THREAD_LIMITS.items():
            if k == "XLA_FLAGS":
                env[k] = f"{env.get(k, '')} {v}".strip()
            else:
                env.setdefault(k, v)
    return env


def run_state(out: str) -> str:
    """``done`` (summary.json), ``resume`` (a checkpoint), ``restart``
    (files but no checkpoint: killed before the first epoch ended) or
    ``new``."""
    if os.path.isfile(os.path.join(out, "summary.json")):
        return "done"
    if os.path.isfile(os.path.join(out, "checkpoint.npz")):
        return "resume"
    if os.path.isdir(out) and os.listdir(out):
        return "restart"
    return "new"


def job_of(setting: Setting, out: str, epochs: int | None) -> dict:
    """The JSON job of one run (all a process on any machine needs)."""
    return {"name": setting.name, "text": setting.config.text, "base": setting.config.base,
            "out": os.path.abspath(os.path.join(out, setting.name)),
            "log": os.path.abspath(os.path.join(out, "logs", setting.name + ".log")), "epochs": epochs}


def check_folder(job: dict) -> None:
    """Refuse a run folder that holds a run of another config."""
    cfg = os.path.join(job["out"], "config.toml")
    if os.path.isfile(cfg):
        with open(cfg, encoding="utf-8", errors="replace") as fh:
            if fh.read() != job["text"]:
                raise ConfigError(f"run folder {job['out']!r} holds a run of another config than setting "
                                  f"{job['name']!r}; choose another --out for this sweep.")


# ---------------------------------------------------------------------------
# One run, in its own process.


def _last_line(path: str, start: int) -> str:
    try:
        with open(path, "rb") as fh:
            fh.seek(start)
            lines = [ln.strip() for ln in fh.read().decode("utf-8", "replace").splitlines() if ln.strip()]
    except OSError:
        return ""
    return lines[-1] if lines else ""


_LIVE: set = set()
_LIVE_LOCK = threading.Lock()


def run_job(job: dict, limit_threads: bool = True) -> dict:
    """Run one job in a child process (skipped when already complete) and
    return ``{"name", "state", "reason", "seconds"}``; ``state`` is
    ``done``, ``skipped`` or ``failed`` (``reason``: the run's last line,
    its one-sentence error). Also the task a Dask worker runs."""
    t0 = time.perf_counter()
    if run_state(job["out"]) == "done":
        return {"name": job["name"], "state": "skipped", "reason": None, "seconds": 0.0}
    os.makedirs(os.path.dirname(job["log"]), exist_ok=True)
    with open(job["log"], "ab") as log:
        start = log.tell()
        log.write(f"== {now()}: {run_state(job['out'])} run {job['name']}\n".encode())
        log.flush()
        proc = subprocess.Popen([sys.executable, "-m", "stablefilt._sweep", json.dumps(job)], stdout=log,
                                stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL, env=child_env(limit_threads))
        with _LIVE_LOCK:
            _LIVE.add(proc)
        try:
            code = proc.wait()
        finally:
            with _LIVE_LOCK:
                _LIVE.discard(proc)
    seconds = time.perf_counter() - t0
    if code == 0 and run_state(job["out"]) == "done":
        return {"name": job["name"], "state": "done", "reason": None, "seconds": seconds}
    reason = _last_line(job["log"], start) or f"the run process ended with status {code}"
    if code < 0:
        reason = f"the run process was ended by signal {-code}"
    return {"name": job["name"], "state": "failed", "reason": reason, "seconds": seconds}


def stop_children() -> None:
    """End the run processes started by this process (an interrupted sweep)."""
    with _LIVE_LOCK:
        procs = list(_LIVE)
    for p in procs:
        with contextlib.suppress(OSError):
            p.terminate()
    for p in procs:
        with contextlib.suppress(subprocess.TimeoutExpired):
            p.wait(timeout=10)


def _watch_parent() -> None:
    """End this process when its parent goes (a killed sweep leaves no run
    writing behind it; the run's lock is then stale and its checkpoint
    resumes). The parent's id comes from the environment: read here, after
    the imports, ``getppid`` would already name the adopting process."""
    parent = os.environ.get(PARENT_VAR, "")
    if not parent.isdigit():
        return

    def gone():
        return os.getppid() != int(parent)

    if gone():
        os._exit(3)

    def watch():
        while True:
            time.sleep(PARENT_POLL)
            if gone():
                os._exit(3)

    threading.Thread(target=watch, daemon=True).start()


def _clear_stale_lock(out: str) -> None:
    """Remove the lock of a run killed before its first checkpoint, so it
    can start again; a live holder's lock stays."""
    path = lock_path(out)
    pid = _holder(path)
    if pid is not None and pid > 0 and not _alive(pid):
        with contextlib.suppress(FileNotFoundError):
            os.unlink(path)


def worker(job: dict) -> int:
    """Train one job in this process: new, continued from its checkpoint,
    or started again. Exit status as ``stablefilt train``."""
    from ._config import parse_config
    from ._train import train

    try:
        config = parse_config(job["text"], job["base"], f"the config of setting {job['name']!r}")
        state = run_state(job["out"])
        if state == "done":
            return 0
        if state == "restart":
            _clear_stale_lock(job["out"])
        train(config, job["out"], epochs=job["epochs"], resume=state == "resume", force=state == "restart",
              progress=lambda m: print(m, flush=True))
    except TrainingDiverged as exc:
        print(f"stablefilt train: {str(exc).rstrip('.')}.", flush=True)
        return 1
    except StablefiltError as exc:
        print(f"stablefilt train: {str(exc).rstrip('.')}.", flush=True)
        return 2
    return 0


# ---------------------------------------------------------------------------
# Many runs.


class _Progress:
    """Runs done, running and failed, and the time left, on a terminal
    (tqdm, imported here only); nothing otherwise."""

    def __init__(self, total: int, done: int, show: bool):
        self.bar = None
        self.failed = 0
        if show and total > done:
            try:
                from tqdm import tqdm
            except ImportError:
                print("(install the progress extra, tqdm, for a live progress display)", file=sys.stderr)
                return
            # The size from shutil, which falls back to 80 x 24 where the
            # terminal reports 0 x 0 (tqdm would then draw nothing).
            import shutil

            size = shutil.get_terminal_size()
            self.bar = tqdm(total=total, initial=done, unit="run", desc="sweep", file=sys.stderr,
                            ncols=size.columns, nrows=size.lines)

    def update(self, finished: int, running: int, failed: int) -> None:
        if self.bar is None:
            return
        self.bar.set_postfix_str(f"running {running}, failed {failed}", refresh=False)
        self.bar.update(finished)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()


def _run_local(jobs: list[dict], n: int, limit_threads: bool, on_result, progress: _Progress) -> None:
    pool = concurrent.futures.ThreadPoolExecutor(max_workers=n)
    try:
        pending = {pool.submit(run_job, j, limit_threads) for j in jobs}
        failed = 0
        while pending:
            finished, pending = concurrent.futures.wait(pending, timeout=1.0,
                                                        return_when=concurrent.futures.FIRST_COMPLETED)
            for f in finished:
                r = f.result()
                failed += r["state"] == "failed"
                on_result(r)
            progress.update(len(finished), min(n, len(pending)), failed)
    except BaseException:
        pool.shutdown(wait=False, cancel_futures=True)
        stop_children()
        raise
    pool.shutdown(wait=True)


def _run_dask(jobs: list[dict], address: str, limit_threads: bool, on_result, progress: _Progress) -> None:
    try:
        from distributed import Client, as_completed
    except ImportError:
        raise ConfigError("--scheduler needs Dask's distributed scheduler: pip install 'stablefilt[distributed]'") \
            from None
    try:
        client = Client(address, timeout="20s")
    except (OSError, TimeoutError, ValueError) as exc:
        raise ConfigError(f"cannot reach the Dask scheduler at {address!r} ({type(exc).__name__})") from None
    with client:
        futures = [client.submit(run_job, j, limit_threads, pure=False, key=f"stablefilt-run-{j['name']}-{os.getpid()}")
                   for j in jobs]
        failed, left = 0, len(futures)
        for f in as_completed(futures):
            r = f.result()
            failed += r["state"] == "failed"
            left -= 1
            on_result(r)
            progress.update(1, left, failed)


def run_sweep(settings: list[Setting], out: str, *, epochs: int | None = None, jobs: int = 1,
              scheduler: str | None = None, limit_threads: bool = True, show_progress: bool = True,
              sources: dict | None = None) -> dict:
    """Run every setting not yet complete under ``out`` and return the
    sweep record (also ``<out>/sweep.json``): ``{"runs": [{"name",
    "settings", "run", "state", "reason", "seconds"}], ...}``.

    Raises:
      ConfigError: a run folder holds another config, or the scheduler is
        out of reach; checked before any run starts.
      RunError: another sweep drives ``out``.
    """
    if os.path.exists(out) and not os.path.isdir(out):
        raise RunError(f"--out {out!r} is a file; expected a folder for the sweep's runs.")
    all_jobs = [job_of(s, out, epochs) for s in settings]
    for j in all_jobs:
        check_folder(j)
    try:
        os.makedirs(out, exist_ok=True)
    except OSError as exc:
        raise RunError(f"cannot create the sweep folder {out!r} ({exc.strerror or type(exc).__name__}).") from None
    record = {"started": now(), "sources": sources or {}, "epochs": epochs, "jobs": jobs, "scheduler": scheduler,
              "thread_limits": THREAD_LIMITS if limit_threads else None,
              "runs": [{"name": s.name, "settings": s.as_dict(), "run": j["out"],
                        "state": "done" if run_state(j["out"]) == "done" else "pending",
                        "reason": None, "seconds": None} for s, j in zip(settings, all_jobs)]}
    by_name = {r["name"]: r for r in record["runs"]}
    with run_lock(out, resume=True):
        path = os.path.join(out, "sweep.json")
        write_json(path, record)
        todo = [j for j in all_jobs if by_name[j["name"]]["state"] != "done"]
        progress = _Progress(len(all_jobs), len(all_jobs) - len(todo), show_progress)

        def on_result(r):
            entry = by_name[r["name"]]
            entry.update(state="done" if r["state"] == "skipped" else r["state"], reason=r["reason"],
                         seconds=round(r["seconds"], 3))
            write_json(path, record)

        try:
            if todo and scheduler:
                _run_dask(todo, scheduler, limit_threads, on_result, progress)
            elif todo:
                _run_local(todo, jobs, limit_threads, on_result, progress)
        finally:
            progress.close()
        record["finished"] = now()
        write_json(path, record)
    return record


def sweep_rows(record: dict) -> tuple[list[dict], list[dict], float | None]:
    """``(rows, failed, eps)``: the ``compare`` row of every complete run
    (sorted by certified bound at ``eps``, then metric) with its
    ``settings``; one ``{"run", "name", "settings", "failed"}`` row per
    failed or unfinished run; the eps of the front (the smallest all
    complete runs hold), None without complete runs."""
    from ._report import front_rows

    done = [r for r in record["runs"] if r["state"] == "done"]
    failed = [{"run": r["run"], "name": r["name"], "settings": r["settings"],
               "failed": r["reason"] or "the run did not finish"} for r in record["runs"] if r["state"] != "done"]
    if not done:
        return [], failed, None
    rows, eps = front_rows([r["run"] for r in done], None)
    by_run = {r["run"]: r for r in done}
    for row in rows:
        row["settings"] = by_run[row["run"]]["settings"]
    return rows, failed, eps


def write_front(out: str, rows: list[dict], eps: float) -> str | None:
    """Draw the front into ``<out>/front.png``, replacing the one an earlier
    pass drew (it is drawn from the runs, which are kept); None when
    matplotlib is not installed."""
    import importlib.util

    if importlib.util.find_spec("matplotlib") is None:
        return None
    from . import _figures
    from ._store import atomic_write

    path = os.path.join(out, "front.png")
    atomic_write(path, _figures.png_bytes(_figures.front_figure(rows, eps)))
    return path


if __name__ == "__main__":
    _watch_parent()
    sys.exit(worker(json.loads(sys.argv[1])))
