"""``stablefilt demo``: train the orchard demo with and without the
stability penalty and compare accuracy against the certified bound."""

from __future__ import annotations

import datetime
import os

from ._config import load_config
from ._errors import ConfigError
from ._runs import compare_rows
from ._text import CAUTION, compare_table, progress_printer, table
from ._train import train

CONFIGS = ("configs/demo.toml", "configs/no-penalty.toml")


def _find(config: str) -> str:
    """``config`` under the working folder, else under the source tree this
    package was installed from (``pip install -e``), so the demo runs from
    any folder."""
    for base in (os.getcwd(), os.path.dirname(os.path.dirname(os.path.abspath(__file__)))):
        path = os.path.join(base, config)
        if os.path.isfile(path):
            return os.path.relpath(path) if base == os.getcwd() else path
    raise ConfigError(f"demo config {config!r} not found in this folder or beside the installed package; "
                      "run the demo from the project folder.")


def run_demo(out: str | None = None, epochs: int | None = None, progress=None) -> int:
    """Train the two demo configs into ``out`` and print their comparison;
    ``progress`` receives each run's messages (default: every 10th epoch)."""
    progress = progress or progress_printer(10)
    configs = [_find(c) for c in CONFIGS]
    stamp = datetime.datetime.now().strftime("%Y%m%d-%H%M%S")
    out = out or os.path.join("runs", f"demo-{stamp}")
    runs = []
    for c in configs:
        config = load_config(c)
        path = os.path.join(out, config.name)
        print(f"== training {config.name} ({c}) into {path}", flush=True)
        train(config, path, epochs=epochs, progress=progress)
        runs.append(path)
    print("\n== comparison (test accuracy vs certified bound for inputs with ||x|| <= rho)")
    header, lines = compare_table(compare_rows(runs))
    print(table(lines, header))
    print("\n" + CAUTION)
    return 0

