"""Small edges of the command line: ``--version``, a closed pipe, help text
on every option, the kept epoch, the logging options (in-process
``stablefilt.cli.main`` unless a real pipe is needed)."""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys

import helpers as H
import pytest

from stablefilt import __version__, cli


@pytest.fixture(scope="module")
def plain(tmp_path_factory):
    return H.plain_run(tmp_path_factory)[1]


def test_version(capsys):
    with pytest.raises(SystemExit) as exc:
        cli.main(["--version"])
    assert exc.value.code == 0
    # The version in the package metadata (importlib.metadata, the reference).
    assert capsys.readouterr().out.strip() == f"stablefilt {__version__}"


def _options(parser):
    """Every (subcommand, action) of the parser, walking its subparsers."""
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for name, sub in action.choices.items():
                for a in sub._actions:
                    yield name, a
        else:
            yield "stablefilt", action


def test_every_option_has_help():
    missing = [f"{cmd} {a.option_strings or a.dest}" for cmd, a in _options(cli.build_parser())
               if not isinstance(a, argparse._SubParsersAction) and not (a.help or "").strip()]
    assert missing == []
    assert len(list(_options(cli.build_parser()))) > 40  # the walk saw every subcommand's options


def test_closed_pipe_ends_quietly(plain):
    """``stablefilt compare RUN | head -c0``: the reader has gone before the
    table is written. Exit status 141 (128 + SIGPIPE, the shell's status for
    a program the signal ended; common practice) and no traceback."""
    proc = subprocess.Popen([sys.executable, "-c", "import sys; from stablefilt.cli import main; sys.exit(main())",
                             "compare", plain, plain, plain], stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    proc.stdout.close()  # the reader goes away before anything is written
    err = proc.stderr.read().decode()
    assert proc.wait(timeout=120) == cli.CLOSED_PIPE == 141
    assert err == ""


def test_kept_epoch_in_summary_and_final_line(plain, tmp_path, capsys):
    """The kept epoch is the first with the best validation accuracy in
    log.jsonl (the reference: the run's own per-epoch record)."""
    summary = json.load(open(os.path.join(plain, "summary.json")))
    log = H.read_jsonl(os.path.join(plain, "log.jsonl"))
    best = max(r["val_acc"] for r in log)
    assert summary["kept_epoch"] == next(r["epoch"] for r in log if r["val_acc"] == best)
    assert 1 <= summary["kept_epoch"] <= summary["epochs"] == 6
    # An older summary without the key still loads and compares.
    old = tmp_path / "old"
    shutil.copytree(plain, old)
    del summary["kept_epoch"]
    (old / "summary.json").write_text(json.dumps(summary))
    capsys.readouterr()
    assert cli.main(["compare", str(old), "--csv", str(tmp_path / "old.csv")]) == 0
    assert "tiny-plain" in capsys.readouterr().out
    header, row = (tmp_path / "old.csv").read_text().splitlines()
    assert row.split(",")[header.split(",").index("kept_epoch")] == ""


def test_log_every_and_quiet(tmp_path, capsys):
    cfg = H.write(tmp_path / "c.toml", H.small_run_text(name="logged", epochs=4))
    capsys.readouterr()
    assert cli.main(["train", cfg, "--out", str(tmp_path / "a"), "--log-every", "3"]) == 0
    out = capsys.readouterr().out.splitlines()
    epochs = [line.split()[1] for line in out if line.startswith("epoch")]
    assert epochs == ["1/4", "3/4", "4/4"]  # the first, every 3rd, the last
    summary = json.load(open(tmp_path / "a" / "summary.json"))
    assert f"with the parameters of epoch {summary['kept_epoch']} of 4" in out[-1]
    assert cli.main(["train", cfg, "--out", str(tmp_path / "b"), "--quiet", "--epochs", "1"]) == 0
    out = capsys.readouterr().out.splitlines()
    assert len(out) == 1 and out[0].startswith("run written to")


@pytest.mark.parametrize("cmd", ["train", "demo"])
def test_log_every_below_one_is_refused(tmp_path, capsys, cmd):
    cfg = H.write(tmp_path / "c.toml", H.small_run_text(name="x"))
    argv = ["train", cfg, "--out", str(tmp_path / "r")] if cmd == "train" else ["demo", "--out", str(tmp_path / "r")]
    capsys.readouterr()
    assert cli.main(argv + ["--log-every", "0"]) == 2
    err = capsys.readouterr().err
    assert "--log-every" in err and len(err.strip().splitlines()) == 1
    assert not os.path.exists(tmp_path / "r")
