"""CSV edge lists and node lists: column names, node IDs and node order.

An edge list is one undirected edge per row: source, target and an optional
weight (1.0 when the column is absent). The first row is a header when it
names the columns (:data:`SOURCE_NAMES`, :data:`TARGET_NAMES`,
:data:`WEIGHT_NAMES`, or the names given in ``columns``); ``header=False``
reads a file without one. Node IDs are integers or names (``ST-001``).

Node order (docs/data.md, "Node IDs"):

- with a node list, its order; every ID in the edges must be in it, and IDs
  that appear in no edge are isolated nodes;
- otherwise integer IDs ``0..N-1`` are the nodes themselves, ``1..N`` are
  shifted down by one, and IDs that leave gaps are an error naming the
  missing ones (a gap may be an isolated node, so it is never guessed);
- otherwise names are ordered naturally (``ST-2`` before ``ST-10``).

The order is returned as a tuple of IDs (``ids[i]`` is node ``i``) that a run
writes to ``nodes.csv``, so later versions of the graph and predictions can
be put in the same order.
"""

from __future__ import annotations

import csv
import math
import os
import re
from typing import NamedTuple

import numpy as np

from ._errors import GraphError
from ._graph import MAX_NODES

SOURCE_NAMES = ("src", "source", "from", "u", "i", "node1", "start")
TARGET_NAMES = ("dst", "target", "to", "v", "j", "node2", "end")
WEIGHT_NAMES = ("weight", "w", "value", "strength")
#: Header names accepted in a node list (the ID column).
ID_NAMES = ("id", "node", "name", "ids", "nodes")


class EdgeList(NamedTuple):
    """An edge list read from a file.

    Attributes:
      src, dst: ``(M,)`` int64 node indices in ``[0, len(ids))``.
      weight: ``(M,)`` float64 weights (1.0 where the file has no weights).
      ids: node ``i`` has the ID ``ids[i]`` (strings, as written).
      weighted: whether the file had a weight column.
      shifted: integer IDs ``1..N`` were shifted down by one.
    """

    src: np.ndarray
    dst: np.ndarray
    weight: np.ndarray
    ids: tuple
    weighted: bool
    shifted: bool


def _natural(s: str):
    return [(0, int(t), "") if t.isdigit() else (1, 0, t) for t in re.split(r"(\d+)", s) if t]


def _int_or_none(tok: str):
    """The integer an ID token spells, None for a name; a number that is not
    an integer (``1.5``, ``nan``) is an error: the caller names the line."""
    try:
        return int(tok)
    except ValueError:
        pass
    try:
        v = float(tok)
    except ValueError:
        return None
    if math.isfinite(v) and v.is_integer():
        return int(v)
    raise ValueError(tok)


def _find(header, names, given):
    if given is not None:
        return header.index(given) if given in header else None
    for i, h in enumerate(header):
        if h in names:
            return i
    return None


def _columns(header, columns, path):
    """``(src, dst, weight or None)`` column positions in ``header``."""
    cols = [c.strip().lower() for c in columns] if columns else [None, None, None]
    cols += [None] * (3 - len(cols))
    s = _find(header, SOURCE_NAMES, cols[0])
    t = _find(header, TARGET_NAMES, cols[1])
    w = _find(header, WEIGHT_NAMES, cols[2])
    if s is None or t is None:
        want = (",".join(c for c in cols if c) if columns else
                f"one of {'/'.join(SOURCE_NAMES)} and one of {'/'.join(TARGET_NAMES)}")
        raise GraphError(f"edge list {path!r} has the header {','.join(header)}; expected columns {want} "
                         "(or give the column names, or read it as headerless).")
    if not columns:
        known = {x for x in (s, t, w) if x is not None}
        extra = [h for i, h in enumerate(header) if i not in known]
        if extra:  # never drop a column silently: it may be the weights
            raise GraphError(f"edge list {path!r} has column {extra[0]!r}, which is not a known weight name "
                             f"({'/'.join(WEIGHT_NAMES)}); give the column names to use it as the weight or to "
                             "leave it out.")
    if columns and len(columns) == 3 and w is None:
        raise GraphError(f"edge list {path!r} has no weight column {cols[2]!r}; its header is {','.join(header)}.")
    return s, t, w


def _is_header(row, columns) -> bool:
    low = [c.strip().lower() for c in row]
    if columns and all(c.strip().lower() in low for c in columns):
        return True
    return any(h in SOURCE_NAMES + TARGET_NAMES + WEIGHT_NAMES for h in low)


def read_edge_list(path: str, *, header="auto", columns=None, nodes=None) -> EdgeList:
    """Read a CSV edge list (module docstring for the rules).

    Args:
      path: the CSV file.
      header: ``"auto"`` (a first row of column names is a header; a first
        row whose IDs are not integers and that names no known column is an
        error asking for one of the other two), ``True`` or ``False``.
      columns: names of the source, target and (optional) weight columns.
      nodes: node IDs in node order (:func:`read_node_list`), or None.

    Raises:
      GraphError: one sentence naming the file, the line and what was expected.
    """
    try:
        return _read(path, header, columns, nodes)
    except UnicodeDecodeError:
        raise GraphError(f"edge list {path!r} is not UTF-8 text.") from None
    except csv.Error as exc:
        raise GraphError(f"edge list {path!r} is not a readable CSV file ({exc}).") from None


def _read(path, header, columns, nodes) -> EdgeList:
    with open(path, newline="", encoding="utf-8-sig") as fh:
        rows = [(n, r) for n, r in enumerate(csv.reader(fh), start=1) if r and any(c.strip() for c in r)]
    if not rows:
        raise GraphError(f"edge list {path!r} is empty; expected rows source,target[,weight] under a header "
                         "such as src,dst,weight.")
    first = rows[0][1]
    if header == "auto":
        header = _is_header(first, columns)
        # A row of integer IDs, or with a number in the weight place, is data.
        data_like = _int_token(first[0]) is not None or (len(first) == 3 and _looks_numeric(first[2:]))
        if not header and not data_like:
            raise GraphError(f"edge list {path!r}: the first line {','.join(first)!r} is not a known header; name "
                             "the columns src,dst[,weight] (or source,target,...), give the column names, or read "
                             "the file as headerless.")
    if header:
        head = [h.strip().lower() for h in first]
        s, t, w = _columns(head, columns, path)
        width, body = len(head), rows[1:]
    else:
        width = len(first)
        if width not in (2, 3):
            raise GraphError(f"edge list {path!r} line {rows[0][0]} has {width} fields; a headerless edge list "
                             "has source,target or source,target,weight.")
        s, t, w, body = 0, 1, (2 if width == 3 else None), rows
    if not body:
        raise GraphError(f"edge list {path!r} has no edges, so the number of nodes is unknown.")
    a, b, wt = [], [], []
    for line, row in body:
        if len(row) != width:
            raise GraphError(f"edge list {path!r} line {line} has {len(row)} fields; expected {width}.")
        x, y = row[s].strip(), row[t].strip()
        if not x or not y:
            raise GraphError(f"edge list {path!r} line {line} has an empty node id.")
        for tok in (x, y):
            try:
                _int_or_none(tok)
            except ValueError:
                raise GraphError(f"edge list {path!r} line {line}: node id {tok!r} is a number but not an "
                                 "integer; node ids must be integers or names.") from None
        try:
            wt.append(float(row[w]) if w is not None else 1.0)
        except ValueError:
            raise GraphError(f"edge list {path!r} line {line}: weight {row[w]!r} is not a number.") from None
        a.append(x)
        b.append(y)
    ids, index, shifted = _order(path, a + b, nodes)
    src = np.fromiter((index[v] for v in a), np.int64, len(a))
    dst = np.fromiter((index[v] for v in b), np.int64, len(b))
    return EdgeList(src, dst, np.asarray(wt, dtype=np.float64), ids, w is not None, shifted)


def _int_token(tok):
    try:
        return _int_or_none(tok.strip())
    except ValueError:
        return None


def _looks_numeric(toks) -> bool:
    try:
        [float(t) for t in toks]
        return True
    except ValueError:
        return False


def _order(path, tokens, nodes):
    """``(ids, index of each token, shifted)``: see the module docstring."""
    seen = dict.fromkeys(tokens)
    if nodes is not None:
        index = {v: i for i, v in enumerate(nodes)}
        unknown = [v for v in seen if v not in index]
        if unknown:
            more = f" and {len(unknown) - 3} more" if len(unknown) > 3 else ""
            raise GraphError(f"edge list {path!r} names node {', '.join(map(repr, unknown[:3]))}{more}, not in the "
                             "node list.")
        return tuple(nodes), index, False
    ints = {v: _int_or_none(v) for v in seen}
    if any(i is None for i in ints.values()):
        ids = tuple(sorted(seen, key=_natural))
        return ids, {v: i for i, v in enumerate(ids)}, False
    vals = set(ints.values())
    lo, hi = min(vals), max(vals)
    if lo < 0:
        raise GraphError(f"edge list {path!r}: node ids must be non-negative integers or names; got {lo}.")
    if hi >= MAX_NODES:
        raise GraphError(f"edge list {path!r} names node {hi}; integer node ids must be below {MAX_NODES} "
                         "(int32 sparse indices).")
    start = 1 if lo == 1 else 0
    if len(vals) != hi - start + 1:
        missing = [k for k in range(start, hi + 1) if k not in vals]
        more = f" and {len(missing) - 5} more" if len(missing) > 5 else ""
        raise GraphError(f"edge list {path!r} uses node ids {start}..{hi} but never names "
                         f"{', '.join(map(str, missing[:5]))}{more}; give a node list that names every node "
                         "(isolated ones included), or number the nodes without gaps.")
    canon = {}
    for v, i in ints.items():
        canon[v] = i - start
    ids = tuple(str(k) for k in range(start, hi + 1))
    return ids, canon, start == 1


def read_node_list(path: str) -> tuple:
    """Node IDs in node order from a text or CSV file: one ID per line, or a
    CSV whose header has a column ``id`` (``node``, ``name``), such as the
    ``nodes.csv`` a run writes (``index,id``)."""
    if not os.path.isfile(path):
        raise GraphError(f"node list {path!r} does not exist." if not os.path.exists(path)
                         else f"node list {path!r} is a directory; expected a file.")
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            rows = [r for r in csv.reader(fh) if r and any(c.strip() for c in r)]
    except UnicodeDecodeError:
        raise GraphError(f"node list {path!r} is not UTF-8 text.") from None
    except csv.Error as exc:
        raise GraphError(f"node list {path!r} is not a readable CSV file ({exc}).") from None
    if not rows:
        raise GraphError(f"node list {path!r} is empty; expected one node id per line.")
    head = [h.strip().lower() for h in rows[0]]
    col = next((i for i, h in enumerate(head) if h in ID_NAMES), None)
    if col is not None:
        rows = rows[1:]
    elif len(head) > 1:
        raise GraphError(f"node list {path!r} has {len(head)} columns but no header naming the id column "
                         f"({'/'.join(ID_NAMES)}).")
    else:
        col = 0
    ids = []
    for r in rows:
        if col >= len(r) or not r[col].strip():
            raise GraphError(f"node list {path!r} has a line without a node id.")
        ids.append(r[col].strip())
    if not ids:
        raise GraphError(f"node list {path!r} lists no nodes.")
    dup = next((v for v, c in _counts(ids).items() if c > 1), None)
    if dup is not None:
        raise GraphError(f"node list {path!r} lists node {dup!r} twice.")
    return tuple(ids)


def _counts(items):
    out = {}
    for v in items:
        out[v] = out.get(v, 0) + 1
    return out


def node_list_text(ids) -> str:
    """The ``nodes.csv`` a run writes: ``index,id`` per node."""
    lines = ["index,id"]
    for i, v in enumerate(ids):
        lines.append(f"{i},{_csv_field(v)}")
    return "\n".join(lines) + "\n"


def _csv_field(v: str) -> str:
    return '"' + v.replace('"', '""') + '"' if any(c in v for c in ',"\n\r') else v
