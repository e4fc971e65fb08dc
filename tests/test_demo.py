"""The demo command: trains the two demo configs and prints the comparison,
from any working folder (the configs are found beside the installed source
tree), and refuses bad options with exit status 2 before writing anything."""

from __future__ import annotations

import json
import os

import pytest

from stablefilt import cli


def test_demo_runs_from_another_folder(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    assert cli.main(["demo", "--out", "d", "--epochs", "1"]) == 0
    out = capsys.readouterr().out
    for name in ("orchard-penalised", "orchard-plain"):
        assert os.path.isfile(tmp_path / "d" / name / "summary.json")
        assert name in out.split("== comparison")[1]
        with open(tmp_path / "d" / name / "log.jsonl") as fh:
            assert [json.loads(line)["epoch"] for line in fh] == [1]
    assert "certified@0.001" in out and "no assurance of real-world safety" in out


@pytest.mark.parametrize("args,words", [
    (["--epochs", "0"], ("--epochs", "at least 1")),
    (["--out", "afile"], ("--out", "'afile'", "is a file")),
])
def test_demo_bad_options_exit_2(tmp_path, monkeypatch, capsys, args, words):
    monkeypatch.chdir(tmp_path)
    (tmp_path / "afile").write_text("mine\n")
    assert cli.main(["demo", *args]) == 2
    out, err = capsys.readouterr()
    assert out == "" and len(err.strip().splitlines()) == 1 and "Traceback" not in err
    for w in words:
        assert w in err, err
    assert sorted(os.listdir(tmp_path)) == ["afile"] and (tmp_path / "afile").read_text() == "mine\n"
