"""The settings of a sweep: ``--vary KEY=V1,V2,...`` options turned into a
grid of checked configs, each with a plain, filesystem-safe name.

A key is a dotted config key (``penalty.weight``, ``model.taps``); each
value is read as a TOML value (``0.5``, ``3``, ``"monomial"``, ``[16, 16]``;
a bare word such as ``monomial`` is taken as a string). Every setting's
config is written back as TOML (the given config's tables with the varied
keys replaced) and checked by :func:`~stablefilt._config.parse_config`
before any run starts.
"""

from __future__ import annotations

import dataclasses
import itertools
import json
import re
import tomllib

from ._config import SCHEMA, Config, parse_config
from ._errors import ConfigError

_BARE = re.compile(r"^[A-Za-z_][A-Za-z0-9_-]*$")
_UNSAFE = re.compile(r"[^A-Za-z0-9.+-]")


@dataclasses.dataclass(frozen=True)
class Setting:
    """One point of the grid.

    Attributes:
      name: the run's folder name, e.g. ``weight-0.5_taps-3``.
      values: ``((dotted key, value), ...)`` in the order of the options.
      config: the checked config of this point.
    """

    name: str
    values: tuple
    config: Config

    def as_dict(self) -> dict:
        return {k: v for k, v in self.values}


def _split(text: str) -> list[str]:
    """``text`` split on commas outside brackets and quotes."""
    parts, depth, quote, cur = [], 0, None, []
    for c in text:
        if quote:
            quote = None if c == quote else quote
        elif c in "\"'":
            quote = c
        elif c == "[":
            depth += 1
        elif c == "]":
            depth -= 1
        elif c == "," and depth == 0:
            parts.append("".join(cur).strip())
            cur = []
            continue
        cur.append(c)
    parts.append("".join(cur).strip())
    return parts


def _value(token: str, key: str):
    try:
        return tomllib.loads(f"v = {token}")["v"]
    except tomllib.TOMLDecodeError:
        if _BARE.match(token):
            return token
        raise ConfigError(f"--vary {key}: {token!r} is not a TOML value (numbers as 0.5, lists as [16, 16], "
                          "strings as monomial or 'monomial').") from None


def _leaf(key: str) -> tuple[str, ...]:
    """The path of a dotted key to a value in the config schema."""
    parts = tuple(key.split("."))
    node = SCHEMA
    for i, p in enumerate(parts):
        if not isinstance(node, dict) or p not in node:
            where = ".".join(parts[:i])
            accepted = ", ".join(sorted(node)) if isinstance(node, dict) else "none (it is a value)"
            raise ConfigError(f"--vary {key}: {p!r} is not a config key{' in [' + where + ']' if where else ''}; "
                              f"accepted keys are {accepted}.")
        node = node[p]
    if isinstance(node, dict):
        raise ConfigError(f"--vary {key}: [{key}] is a table; vary one of its keys, such as {key}.{sorted(node)[0]}.")
    if parts == ("name",):
        raise ConfigError("--vary name: the name is not a setting; each run is named by its settings.")
    return parts


def parse_vary(option: str) -> tuple[str, list]:
    """``"KEY=V1,V2"`` to ``(KEY, [v1, v2])``; repeated values are dropped."""
    key, sep, rest = option.partition("=")
    key = key.strip()
    if not sep or not key or not rest.strip():
        raise ConfigError(f"--vary takes KEY=V1,V2,... (such as penalty.weight=0,0.5); got {option!r}.")
    _leaf(key)
    values = []
    for tok in _split(rest):
        if not tok:
            raise ConfigError(f"--vary {key}: empty value in {rest!r}.")
        v = _value(tok, key)
        if (type(v), v) not in [(type(u), u) for u in values]:
            values.append(v)
    return key, values


def value_text(v) -> str:
    """A value as it appears in a folder name: plain and filesystem-safe."""
    if isinstance(v, bool):
        t = "true" if v else "false"
    elif isinstance(v, float):
        t = repr(v)
    elif isinstance(v, list):
        t = "-".join(value_text(x) for x in v)
    else:
        t = str(v)
    return _UNSAFE.sub("_", t) or "_"


def toml_value(v) -> str:
    """A TOML value (strings as JSON-escaped basic strings, which TOML
    reads the same way)."""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, list):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    raise ConfigError(f"cannot write {v!r} as a config value.")


def toml_text(table: dict, header: str = "") -> str:
    """A config table (scalars, lists and one level of sub-tables) as TOML."""
    lines = [header] if header else []
    lines += [f"{k} = {toml_value(v)}" for k, v in table.items() if not isinstance(v, dict)]
    for k, sub in table.items():
        if isinstance(sub, dict):
            lines += ["", f"[{k}]"] + [f"{kk} = {toml_value(vv)}" for kk, vv in sub.items()]
    return "\n".join(lines) + "\n"


def _names(keys: list[str]) -> list[str]:
    """Each key's shortest dotted suffix that no other key shares."""
    out = []
    for k in keys:
        parts = k.split(".")
        for n in range(1, len(parts) + 1):
            short = ".".join(parts[-n:])
            if not any(o != k and (o == short or o.endswith("." + short)) for o in keys):
                break
        out.append(short)
    return out


def grid(config: Config, varies: list[tuple[str, list]]) -> list[Setting]:
    """Every combination of the varied values (the first option varies
    slowest), each as a checked config named ``<key>-<value>_...``.

    Raises:
      ConfigError: a key is given twice, or a setting's config is invalid
        (the message names the setting).
    """
    keys = [k for k, _ in varies]
    dup = sorted({k for k in keys if keys.count(k) > 1})
    if dup:
        raise ConfigError(f"--vary {dup[0]} is given twice; list all its values in one option.")
    base = tomllib.loads(config.text)
    short = _names(keys)
    settings, seen = [], {}
    for combo in itertools.product(*(vals for _, vals in varies)):
        name = "_".join(f"{s}-{value_text(v)}" for s, v in zip(short, combo))
        table = {k: (dict(v) if isinstance(v, dict) else v) for k, v in base.items()}
        for key, v in zip(keys, combo):
            parts = key.split(".")
            node = table
            for p in parts[:-1]:
                node = node.setdefault(p, {})
            node[parts[-1]] = v
        table["name"] = name
        label = ", ".join(f"{k} = {toml_value(v)}" for k, v in zip(keys, combo))
        if name in seen:
            raise ConfigError(f"the settings {seen[name]} and {label} give the same folder name {name!r}; "
                              "give values that differ in writing.")
        seen[name] = label
        text = toml_text(table, f"# sweep setting: {label} (from the config {config.name!r})")
        try:
            cfg = parse_config(text, config.base, f"the config of setting {label}")
        except ConfigError as exc:
            raise ConfigError(f"setting {label}: {str(exc).rstrip('.')}.") from None
        settings.append(Setting(name, tuple(zip(keys, combo)), cfg))
    return settings
