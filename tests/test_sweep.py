"""``stablefilt sweep``: the grid of settings, the run processes, skipping
complete runs, resuming after the sweep is killed, recording a failed run,
and the same runs on a Dask cluster the test starts itself.

References: TOML values are read back with the standard library's tomllib
(the TOML 1.0 reader); the comparison rows are checked against each run's own
summary.json (what ``compare`` reads); the front against a brute-force
dominance check written here (a point is on the front when no other point is
at least as good on both axes and better on one: Pareto optimality, common
practice)."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
import tomllib

import pytest
from helpers import one_line_exit_2, small_run_text, strict_json, write

from stablefilt import cli
from stablefilt._config import parse_config
from stablefilt._grid import grid, parse_vary, toml_text

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _config(tmp_path, epochs=1):
    return write(os.path.join(tmp_path, "tiny.toml"), small_run_text(name="tiny", epochs=epochs))


# ---------------------------------------------------------------------------
# The grid (no training).


def test_vary_values_are_toml_values():
    # Expected values: what tomllib reads for the same TOML text.
    assert parse_vary("penalty.weight=0,0.5,1e-3") == ("penalty.weight", [0, 0.5, 0.001])
    key, vals = parse_vary("model.features=[8, 8],[4]")
    assert key == "model.features" and vals == [[8, 8], [4]]
    assert parse_vary("model.basis=monomial,'chebyshev'") == ("model.basis", ["monomial", "chebyshev"])
    assert parse_vary("model.bias=true,false") == ("model.bias", [True, False])
    # The same value written twice is one setting; 1 and 1.0 are different TOML types, kept apart.
    assert parse_vary("penalty.weight=0.5,5e-1,1,1.0")[1] == [0.5, 1, 1.0]
    assert tomllib.loads("v = 5e-1")["v"] == 0.5


def test_grid_names_and_configs(tmp_path):
    base = parse_config(small_run_text(name="tiny"), str(tmp_path))
    settings = grid(base, [parse_vary("penalty.weight=0,0.5"), parse_vary("model.taps=2,3,4")])
    assert [s.name for s in settings][:4] == ["weight-0_taps-2", "weight-0_taps-3", "weight-0_taps-4",
                                              "weight-0.5_taps-2"]
    assert len(settings) == 6 and len({s.name for s in settings}) == 6
    for s in settings:
        back = tomllib.loads(s.config.text)  # the written config, read by the TOML reader
        assert back["penalty"]["weight"] == s.as_dict()["penalty.weight"]
        assert back["model"]["taps"] == s.as_dict()["model.taps"]
        assert back["name"] == s.name
        # Every key not varied is as in the given config.
        given = tomllib.loads(small_run_text(name="tiny"))
        assert back["data"] == given["data"] and back["train"] == given["train"]
        assert all(c.isalnum() or c in "._+-" for c in s.name)
    # Keys of the same last name in two tables keep their table in the name.
    two = grid(base, [parse_vary("data.seed=1,2"), parse_vary("train.seed=3")])
    assert [s.name for s in two] == ["data.seed-1_train.seed-3", "data.seed-2_train.seed-3"]


def test_toml_text_round_trips():
    table = {"name": "a \"q\" \\ b", "data": {"noise": 1e-300, "seed": 3, "columns": ["x", "y"]},
             "model": {"bias": False, "features": [8, 8]}}
    assert tomllib.loads(toml_text(table)) == table  # reference: tomllib


@pytest.mark.parametrize("vary, words", [
    (["penalty.wieght=1"], "'wieght' is not a config key in [penalty]"),
    (["modle.taps=1"], "'modle' is not a config key"),
    (["model=1"], "[model] is a table"),
    (["penalty.weight=-1"], "penalty.weight = -1 is invalid"),
    (["model.taps=0,3"], "model.taps = 0 is invalid"),
    (["model.taps=a b"], "is not a TOML value"),
    (["penalty.weight"], "--vary takes KEY=V1,V2"),
    (["model.taps=2", "model.taps=3"], "given twice"),
    (["name=a,b"], "the name is not a setting"),
    (["penalty.weight=[1, 2]"], "penalty.weight lists 2 values for 1 layers"),
])
def test_bad_vary_is_one_sentence_and_writes_nothing(tmp_path, capsys, vary, words):
    cfg = _config(tmp_path)
    out = os.path.join(tmp_path, "sweep")
    argv = ["sweep", cfg, "--out", out]
    for v in vary:
        argv += ["--vary", v]
    line = one_line_exit_2(capsys, argv)
    assert words in line
    assert not os.path.exists(out)


def test_bad_jobs_and_a_file_as_out(tmp_path, capsys):
    cfg = _config(tmp_path)
    assert "--jobs must be at least 1" in one_line_exit_2(capsys, ["sweep", cfg, "--vary", "model.taps=2", "--jobs", "0"])
    f = write(os.path.join(tmp_path, "file"), "keep\n")
    assert "is a file" in one_line_exit_2(capsys, ["sweep", cfg, "--vary", "model.taps=2", "--out", f])
    with open(f) as fh:
        assert fh.read() == "keep\n"


# ---------------------------------------------------------------------------
# Runs.


def _dominated(p, pts):
    return any(q["bound"] <= p["bound"] and q["metric"] >= p["metric"]
               and (q["bound"] < p["bound"] or q["metric"] > p["metric"]) for q in pts if q is not p)


def test_sweep_runs_records_a_failure_and_skips_complete_runs(tmp_path, capsys):
    """Two settings at once: one trains, one diverges (a learning rate of 1e7
    explodes the parameters past the trainer's limit in one step). The failed
    run is recorded with its reason and the other finishes; a second pass
    skips the complete run and tries the failed one again."""
    cfg = _config(tmp_path)
    out = os.path.join(tmp_path, "sweep")
    argv = ["sweep", cfg, "--vary", "train.learning_rate=0.05,1e7", "--jobs", "2", "--out", out, "--json"]
    capsys.readouterr()
    assert cli.main(argv) == 1
    got, err = capsys.readouterr()
    assert err == ""  # not a terminal: no progress display
    rows = strict_json(got)
    [done] = [r for r in rows if "failed" not in r]
    [failed] = [r for r in rows if "failed" in r]
    assert "parameters exploded" in failed["failed"] and failed["settings"] == {"train.learning_rate": 1e7}
    with open(os.path.join(done["run"], "summary.json")) as fh:  # the row is the run's summary, as compare reads it
        s = json.load(fh)
    assert done["certified"] == s["certificate"]["certified"] and done["test_acc"] == s["metrics"]["test_acc"]
    assert done["settings"] == {"train.learning_rate": 0.05}
    with open(os.path.join(out, "sweep.json")) as fh:
        record = json.load(fh)
    assert sorted(r["state"] for r in record["runs"]) == ["done", "failed"]
    assert "parameters exploded" in [r for r in record["runs"] if r["state"] == "failed"][0]["reason"]
    stamp = os.stat(os.path.join(done["run"], "summary.json")).st_mtime_ns
    # Second pass, as text: the complete run is not trained again, the failed one is tried again.
    assert cli.main(argv[:-1]) == 1
    text = capsys.readouterr().out
    assert os.stat(os.path.join(done["run"], "summary.json")).st_mtime_ns == stamp
    with open(os.path.join(out, "logs", done["name"] + ".log")) as fh:
        assert fh.read().count("== ") == 1
    with open(os.path.join(out, "logs", failed["name"] + ".log")) as fh:
        assert fh.read().count("== ") == 2
    assert "1 run(s) failed" in text and "parameters exploded" in text


def _wait(cond, seconds, what):
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        if cond():
            return
        time.sleep(0.2)
    raise AssertionError(f"timed out waiting for {what}")


def _processes_naming(text: str) -> list[int]:
    """Live processes whose command line holds ``text`` (Linux /proc; an
    empty list elsewhere)."""
    found = []
    for d in os.listdir("/proc") if os.path.isdir("/proc") else []:
        if d.isdigit():
            try:
                with open(f"/proc/{d}/cmdline", "rb") as fh:
                    cmd = fh.read()
                with open(f"/proc/{d}/stat") as fh:
                    zombie = fh.read().rsplit(")", 1)[1].split()[0] == "Z"
            except OSError:
                continue
            if text.encode() in cmd and not zombie:
                found.append(int(d))
    return found


def test_killed_sweep_resumes_without_redoing_finished_runs(tmp_path):
    """The sweep process is killed (SIGKILL) while its second run trains;
    its run processes end with it; started again, the first run is not
    redone and the second continues from its checkpoint or starts over."""
    cfg = _config(tmp_path, epochs=3)
    out = os.path.join(tmp_path, "sweep")
    cmd = [sys.executable, "-m", "stablefilt.cli", "sweep", cfg, "--vary", "penalty.weight=0,0.5", "--jobs", "1",
           "--out", out, "--quiet"]
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([ROOT, os.environ.get("PYTHONPATH", "")])}
    proc = subprocess.Popen(cmd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    first = os.path.join(out, "weight-0")
    second_log = os.path.join(out, "logs", "weight-0.5.log")
    try:
        _wait(lambda: os.path.exists(os.path.join(first, "summary.json")) and os.path.exists(second_log), 240,
              "the first run to finish")
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait()
    stamp = os.stat(os.path.join(first, "summary.json")).st_mtime_ns
    second = os.path.join(out, "weight-0.5")
    # The orphaned run process ends by itself (it watches its parent).
    _wait(lambda: not _processes_naming(out), 60, "the orphaned run process to end")
    assert not os.path.exists(os.path.join(second, "summary.json"))
    r = subprocess.run(cmd + ["--json"], env=env, capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    rows = strict_json(r.stdout)
    assert sorted(x["name"] for x in rows) == ["weight-0", "weight-0.5"]
    assert os.stat(os.path.join(first, "summary.json")).st_mtime_ns == stamp
    with open(os.path.join(out, "logs", "weight-0.log")) as fh:
        assert fh.read().count("== ") == 1
    with open(second_log) as fh:
        attempts = [ln for ln in fh if ln.startswith("== ")]
    assert len(attempts) == 2 and attempts[1].split(": ")[1].split()[0] in ("resume", "restart", "new")
    with open(os.path.join(second, "log.jsonl")) as fh:
        epochs = [json.loads(ln)["epoch"] for ln in fh if ln.strip()]
    assert epochs == [1, 2, 3]  # each epoch once, resumed or not
    # A third pass trains nothing and prints the table and the front: the
    # non-dominated runs, checked by brute force here.
    r = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    assert os.stat(os.path.join(first, "summary.json")).st_mtime_ns == stamp
    pts = [{"name": x["name"], "bound": x["certified"]["0.001"], "metric": x["test_acc"]} for x in rows]
    front = {p["name"] for p in pts if not _dominated(p, pts)}
    section = r.stdout.split("accuracy-stability front at eps 0.001")[1].split("front figure")[0]
    shown = {ln.split()[0] for ln in section.splitlines()[3:] if ln.strip()}
    assert shown == front and front


def test_sweep_on_a_dask_cluster(tmp_path, capsys):
    distributed = pytest.importorskip("distributed", reason="Dask's distributed scheduler (the distributed extra) "
                                      "is not installed")
    cfg = _config(tmp_path)
    out = os.path.join(tmp_path, "shared")
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False, dashboard_address=None) as c:
        capsys.readouterr()
        rc = cli.main(["sweep", cfg, "--vary", "model.taps=2,3", "--out", out, "--scheduler", c.scheduler_address,
                       "--json"])
        got = capsys.readouterr().out
    assert rc == 0
    rows = strict_json(got)
    assert sorted(r["name"] for r in rows) == ["taps-2", "taps-3"]
    for r in rows:
        assert os.path.isfile(os.path.join(out, r["name"], "summary.json"))
        assert r["model"]["taps"] == r["settings"]["model.taps"]
    with open(os.path.join(out, "sweep.json")) as fh:
        assert json.load(fh)["scheduler"] == c.scheduler_address


def test_progress_display_counts_runs(capsys):
    """On a terminal the display shows runs done of all, running and failed
    (tqdm's own meter format, n/total); off a terminal it prints nothing."""
    pytest.importorskip("tqdm", reason="tqdm (the progress extra) is not installed")
    from stablefilt._sweep import _Progress

    bar = _Progress(total=4, done=1, show=True)
    bar.update(1, 2, 1)
    bar.close()
    err = capsys.readouterr().err
    assert "2/4" in err and "running 2, failed 1" in err
    quiet = _Progress(total=4, done=1, show=False)
    quiet.update(1, 2, 0)
    quiet.close()
    assert capsys.readouterr().err == ""
