"""Run configurations: TOML files read with the standard library's
``tomllib``, checked against a schema. Unknown keys and wrong types are
errors naming the key and the accepted ones."""

from __future__ import annotations

import dataclasses
import math
import os
import tomllib

from ._errors import ConfigError
from ._graph import KINDS
from ._model import NONLINEARITIES, READOUTS
from ._penalty import MODES, REDUCTIONS

_NUM = (int, float)


def _pos_int(v):
    return isinstance(v, int) and not isinstance(v, bool) and v >= 1


def _nonneg_int(v):
    return isinstance(v, int) and not isinstance(v, bool) and v >= 0


def _finite_nonneg(v):
    return isinstance(v, _NUM) and not isinstance(v, bool) and math.isfinite(v) and v >= 0


def _finite_pos(v):
    return _finite_nonneg(v) and v > 0


def _fraction(v):
    return isinstance(v, _NUM) and not isinstance(v, bool) and 0 < v < 1


def _choice(options):
    def check(v):
        return isinstance(v, str) and v in options

    check.expected = "one of " + ", ".join(options)
    return check


def _int_list(v):
    return isinstance(v, list) and len(v) >= 1 and all(_pos_int(x) for x in v)


def _eps_list(v):
    return isinstance(v, list) and len(v) >= 1 and all(_finite_pos(x) for x in v)


def _weights(v):
    return _finite_nonneg(v) or (isinstance(v, list) and len(v) >= 1 and all(_finite_nonneg(x) for x in v))


def _interval(v):
    return (isinstance(v, list) and len(v) == 2 and all(isinstance(x, _NUM) and not isinstance(x, bool)
                                                       and math.isfinite(x) for x in v) and v[0] < v[1])


def _string(v):
    return isinstance(v, str) and len(v) > 0


def _bool(v):
    return isinstance(v, bool)


def _header(v):
    return isinstance(v, bool) or v == "auto"


def _columns(v):
    return isinstance(v, list) and len(v) in (2, 3) and all(_string(x) for x in v)


_pos_int.expected = "a positive integer"
_nonneg_int.expected = "a non-negative integer"
_finite_nonneg.expected = "a finite number >= 0"
_finite_pos.expected = "a finite number > 0"
_fraction.expected = "a number strictly between 0 and 1"
_int_list.expected = "a list of positive integers"
_eps_list.expected = "a list of finite numbers > 0"
_weights.expected = "a finite number >= 0 or a list of them, one per layer"
_interval.expected = "two finite numbers [a, b] with a < b"
_string.expected = "a non-empty string"
_bool.expected = "true or false"
_header.expected = "true, false or 'auto'"
_columns.expected = "a list of two or three column names: source, target and optionally weight"

SCHEMA = {
    "name": (_string, None),
    "data": {
        "source": (_choice(("orchard", "files", "karate", "digits", "minnesota", "geometric", "blocks")), "orchard"),
        "size": (_pos_int, 1000),
        "degree": (_finite_pos, 10.0),
        "communities": (_pos_int, 4),
        "inside": (_fraction, 0.9),
        "sources": (_pos_int, 3),
        "diffusion": (_nonneg_int, 10),
        "sensors": (_pos_int, 120),
        "block_rows": (_pos_int, 2),
        "block_cols": (_pos_int, 3),
        "neighbours": (_pos_int, 6),
        "samples": (_pos_int, 600),
        "noise": (_finite_nonneg, 0.35),
        "seed": (_nonneg_int, 0),
        "graph": (_string, None),
        "signals": (_string, None),
        "targets": (_string, None),
        "nodes": (_string, None),
        "header": (_header, "auto"),
        "columns": (_columns, None),
        "targets_per": (_choice(("auto", "node", "graph")), "auto"),
        "task": (_choice(("classify", "regress")), "classify"),
        "shift": (_choice(KINDS), "normalized-laplacian"),
        "train_fraction": (_fraction, 0.6),
        "val_fraction": (_fraction, 0.2),
    },
    "model": {
        "features": (_int_list, [16, 16]),
        "taps": (_pos_int, 5),
        "basis": (_choice(("monomial", "chebyshev")), "chebyshev"),
        "basis_interval": (_interval, None),
        "nonlinearity": (_choice(NONLINEARITIES), "relu"),
        "bias": (_bool, True),
        "readout": (_choice(READOUTS), "node"),
    },
    "penalty": {
        "mode": (_choice(MODES), "integral_lipschitz"),
        "weight": (_weights, 0.0),
        "reduce": (_choice(REDUCTIONS), "max"),
        "target": (_finite_nonneg, 0.0),
        "grid": (_pos_int, 256),
    },
    "train": {
        "epochs": (_pos_int, 60),
        "learning_rate": (_finite_pos, 0.01),
        "schedule": (_choice(("constant", "cosine")), "constant"),
        "weight_decay": (_finite_nonneg, 0.0),
        "clip": (_finite_nonneg, 1.0),
        "batch_size": (_nonneg_int, 32),
        "patience": (_nonneg_int, 0),
        "seed": (_nonneg_int, 0),
        "devices": (_pos_int, 1),
        "split": (_choice(("signals", "nodes")), "signals"),
        "partition": (_choice(("rcm", "metis")), "rcm"),
    },
    "certify": {
        "eps": (_eps_list, [0.001, 0.01]),
    },
}


@dataclasses.dataclass(frozen=True)
class Config:
    """A checked configuration: ``sections[name][key]`` with defaults
    filled, the source text, and the directory relative paths start from."""

    sections: dict
    text: str
    base: str

    def __getitem__(self, key):
        return self.sections[key]

    @property
    def name(self) -> str:
        return self.sections.get("name") or "run"


def _check(table: dict, schema: dict, where: str) -> dict:
    out = {}
    for key in table:
        if key not in schema:
            accepted = ", ".join(sorted(schema))
            raise ConfigError(f"unknown key '{where}{key}'; accepted keys are {accepted}.")
    for key, spec in schema.items():
        if isinstance(spec, dict):
            sub = table.get(key, {})
            if not isinstance(sub, dict):
                raise ConfigError(f"{where}{key!r} must be a table [{key}].")
            out[key] = _check(sub, spec, f"{where}{key}.")
            continue
        check, default = spec
        if key in table:
            v = table[key]
            if not check(v):
                raise ConfigError(f"{where}{key} = {v!r} is invalid; expected {check.expected}.")
            out[key] = v
        else:
            out[key] = default
    return out


def parse_config(text: str, base: str = ".", name: str = "the config") -> Config:
    """Parse and check TOML text."""
    try:
        table = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{name} is not valid TOML ({exc}).") from None
    sections = _check(table, SCHEMA, "")
    nm = sections["name"]
    # The name becomes a folder (runs/<name>): keep it one plain component.
    if nm is not None and (nm in (".", "..") or "\0" in nm or any(c in nm for c in "/\\")):
        raise ConfigError(f"name = {nm!r} is invalid; expected a plain folder name without '/', '\\' or '..'.")
    d = sections["data"]
    if d["source"] == "files":
        for key in ("graph", "signals"):
            if not d[key]:
                raise ConfigError(f"data.source = 'files' needs data.{key}, a path relative to the config file.")
    if d["train_fraction"] + d["val_fraction"] >= 1:
        raise ConfigError("data.train_fraction + data.val_fraction must be below 1, leaving test data.")
    w = sections["penalty"]["weight"]
    if sections["penalty"]["mode"] == "certified" and isinstance(w, list):
        raise ConfigError("penalty.weight must be a single number with mode = 'certified', which penalises the "
                          "whole model's certificate, not each layer.")
    depth = len(sections["model"]["features"])
    if isinstance(w, list) and len(w) != depth:
        raise ConfigError(f"penalty.weight lists {len(w)} values for {depth} layers; give one per layer or a single number.")
    return Config(sections, text, os.path.abspath(base))


def load_config(path: str) -> Config:
    """Read and check a TOML config file."""
    if not os.path.exists(path):
        raise ConfigError(f"config file {path!r} does not exist.")
    if os.path.isdir(path):
        raise ConfigError(f"config file {path!r} is a directory; expected a TOML file.")
    try:
        with open(path, "rb") as fh:
            raw = fh.read()
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise ConfigError(f"config file {path!r} is not UTF-8 text.") from None
    return parse_config(text, os.path.dirname(os.path.abspath(path)), f"config file {path!r}")


def resolve_path(config: Config, rel: str, what: str) -> str:
    """``rel`` resolved against the config's directory and confined to it."""
    if "\0" in rel:
        raise ConfigError(f"{what} {rel!r} contains a NUL character; expected a file path.")
    base = os.path.realpath(config.base)
    full = os.path.realpath(os.path.join(base, rel))
    if os.path.commonpath([base, full]) != base:
        raise ConfigError(f"{what} {rel!r} points outside the config file's directory {base!r}.")
    return full
