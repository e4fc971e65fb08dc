"""``stablefilt report``: the figures of one or more finished runs as PNG
files and one self-contained HTML page (images embedded as base64 data URIs,
inline CSS, nothing loaded from the network).

Runs are read through their files' JSON forms (``summary.json``,
``log.jsonl``, ``stress.json`` written by ``stablefilt stress --save``) and
the public :func:`~stablefilt._runs.open_run`, so the page does not depend on
how certificates are computed. Every figure is drawn in memory before the
first file is written: bad input leaves the disk unchanged.
"""

from __future__ import annotations

import base64
import dataclasses
import html
import os
import re

import numpy as np

from ._errors import RunError, StablefiltError
from ._runs import compare_rows, now, open_run
from ._store import atomic_write, read_json, read_log
from ._text import CAUTION, compare_table

#: Graphs up to this many nodes get their eigenvalues marked on the
#: frequency-response axis (a dense ``eigvalsh``); larger ones show the interval only.
EIGEN_LIMIT = 2000

#: The file ``stablefilt stress --save`` writes into a run folder.
STRESS_FILE = "stress.json"

PAGE = "report.html"

NOT_YET = ("Certified accuracy against eps is not drawn: it needs certified predictions (the smallest eps at "
           "which each test prediction can change), which stablefilt does not compute yet.")


class ReportError(StablefiltError):
    """A report cannot be written as asked."""


@dataclasses.dataclass(frozen=True)
class Figure:
    """One drawn figure: its file name, caption, and PNG bytes."""

    name: str
    caption: str
    png: bytes


def _slug(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9._-]+", "-", text).strip("-.") or "run"


def default_out(paths) -> str:
    """``<first run>/report``."""
    return os.path.join(paths[0], "report")


def _eps_in(cert: dict, eps: float):
    for k, v in cert.items():
        if abs(float(k) - eps) <= 1e-12 * eps:
            return v
    return None


def front_rows(paths, eps: float | None) -> tuple[list[dict], float]:
    """``compare`` rows of the runs and the eps of the front: ``eps`` if
    given, else the smallest eps every run's summary holds. A run whose
    summary lacks ``eps`` is certified at it (float64, as ``certify`` does)."""
    rows = compare_rows(paths, sort=True)
    if eps is None:
        common = set.intersection(*({float(k) for k in r["certified"]} for r in rows))
        if not common:
            raise ReportError("the runs share no eps in their summaries; pass --eps to certify them all at one")
        return rows, min(common)
    for r in rows:
        if _eps_in(r["certified"], eps) is None:
            from ._runcert import certify_run

            r["certified"] = {**r["certified"], repr(eps): certify_run(open_run(r["run"]), [eps]).model.at(eps).certified}
    return rows, eps


def run_figures(path: str, prefix: str) -> tuple[list[Figure], dict]:
    """The figures of one run and what the page says about it."""
    from . import _figures as F

    run = open_run(path)
    summary = run.summary
    if not isinstance(summary, dict) or "certificate" not in summary:
        raise RunError(f"run {path!r} has no summary.json with a certificate; it did not finish.")
    cert = summary["certificate"]
    layers = [np.asarray(layer["taps"], dtype=np.float64) for layer in run.params["layers"]]
    eig = np.linalg.eigvalsh(run.op.dense()) if run.op.nodes <= EIGEN_LIMIT else None
    consts = [lr["integral_lipschitz"] for lr in cert.get("layers", [])]
    figs = [Figure(f"{prefix}-responses.png",
                   "Frequency responses of every filter over the spectral interval"
                   + (", eigenvalues of S marked" if eig is not None else f" (graph over {EIGEN_LIMIT} nodes: "
                      "eigenvalues not marked)")
                   + "; right: lam h'(lam) within the integral Lipschitz constant ±C of the layer.",
                   F.png_bytes(F.response_figure(layers, run.spec.basis, run.manifest["spectral_interval"], eig,
                                                 consts if len(consts) == len(layers) else None)))]
    log = read_log(os.path.join(path, "log.jsonl"))
    if log:
        figs.append(Figure(f"{prefix}-training.png", "Training curves per epoch (log scale where a panel spans "
                           "two decades).", F.png_bytes(F.training_figure(log, summary.get("metric", "acc")))))
    spath = os.path.join(path, STRESS_FILE)
    stress = None
    if os.path.exists(spath):
        stress = read_json(spath, "stress results")
        rows = stress.get("rows") if isinstance(stress, dict) else None
        if not isinstance(rows, list) or not rows:
            raise RunError(f"stress results {spath!r} hold no rows; rewrite them with stablefilt stress --save.")
        try:
            png = F.png_bytes(F.stress_figure(rows))
        except (KeyError, TypeError, ValueError, AttributeError):
            raise RunError(f"stress results {spath!r} are not in the form stablefilt stress --save writes; "
                           "rewrite them with stablefilt stress --save.") from None
        figs.append(Figure(f"{prefix}-stress.png", "Measured (random perturbations) and attacked changes against "
                           "the certified and published bounds, log-log.", png))
    return figs, {"path": path, "summary": summary, "manifest": run.manifest, "stress": stress, "eigen": eig is not None}


def build(paths, eps: float | None = None, progress=None) -> tuple[list[Figure], str]:
    """All figures and the page for ``paths``, in memory."""
    if not paths:
        raise ReportError("give at least one run directory")
    figures, runs = [], []
    for i, p in enumerate(paths):
        if progress and len(paths) > 1:
            progress(f"drawing run {i + 1}/{len(paths)}: {p}")
        f, info = run_figures(p, f"{i + 1}-{_slug(os.path.basename(os.path.normpath(p)))}")
        figures += f
        runs.append((info, f))
    front = None
    if len(paths) > 1:
        from . import _figures as F

        rows, e = front_rows(paths, eps)
        front = (Figure("front.png", f"Test metric against the certified bound at eps = {e:g}, one point per run; "
                        "the non-dominated runs are joined.", F.png_bytes(F.front_figure(rows, e))), rows, e)
        figures.append(front[0])
    return figures, page(runs, front)


def write_report(paths, out: str | None = None, eps: float | None = None, progress=None) -> tuple[str, list[str]]:
    """Write the report of ``paths`` into ``out`` (default
    :func:`default_out`): ``report.html`` and one PNG per figure. Refuses an
    ``out`` that is a file, or one holding any of the files it would write;
    nothing is written before every figure is drawn. Returns ``(page path,
    files written)``."""
    out = out or default_out(paths)
    if os.path.exists(out) and not os.path.isdir(out):
        raise ReportError(f"--out {out!r} is a file; expected a folder for the report")
    for p in paths:
        if not os.path.isdir(p):
            raise RunError(f"run directory {p!r} does not exist." if not os.path.exists(p)
                           else f"run {p!r} is a file; expected a run directory.")
    figures, text = build(paths, eps, progress)
    names = [f.name for f in figures] + [PAGE]
    taken = [n for n in names if os.path.exists(os.path.join(out, n))]
    if taken:
        raise ReportError(f"--out {out!r} already holds {taken[0]}; choose a new folder so no earlier report is "
                          "overwritten")
    try:
        os.makedirs(out, exist_ok=True)
        written = []
        for f in figures:
            atomic_write(os.path.join(out, f.name), f.png)
            written.append(os.path.join(out, f.name))
        atomic_write(os.path.join(out, PAGE), text.encode("utf-8"))
    except OSError as exc:
        raise ReportError(f"cannot write the report into {out!r} ({exc.strerror or type(exc).__name__})") from None
    return os.path.join(out, PAGE), written + [os.path.join(out, PAGE)]


# ---------------------------------------------------------------------------
# The page.

CSS = """
body{font-family:system-ui,sans-serif;max-width:1060px;margin:2em auto;padding:0 1em;color:#111;line-height:1.45}
h1{font-size:1.6em}h2{font-size:1.3em;border-top:1px solid #ccc;padding-top:.8em;margin-top:2em}h3{font-size:1.05em}
table{border-collapse:collapse;margin:.5em 0;font-size:.9em}
td,th{border:1px solid #ccc;padding:.25em .6em;text-align:left;vertical-align:top}
th{background:#f2f2f2}td.n{text-align:right;font-variant-numeric:tabular-nums}
img{max-width:100%;height:auto;border:1px solid #eee}figure{margin:1em 0}figcaption{font-size:.9em;color:#333}
.caution{background:#fff4e0;border-left:4px solid #E69F00;padding:.6em 1em}code{background:#f4f4f4;padding:0 .2em}
"""


def _e(x) -> str:
    return html.escape(str(x), quote=True)


def _num(x) -> str:
    if x is None:
        return "-"
    if isinstance(x, bool) or not isinstance(x, (int, float)):
        return _e(x)
    return _e(f"{x:.6g}")


def _table(header, rows, numeric=()) -> str:
    head = "".join(f"<th>{_e(h)}</th>" for h in header)
    body = "".join("<tr>" + "".join(f'<td class="n">{_num(c)}</td>' if j in numeric else f"<td>{_e(c)}</td>"
                                    for j, c in enumerate(r)) + "</tr>" for r in rows)
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _plain(v) -> str:
    """A JSON value as words: ``{"lower": "exact"}`` -> ``lower: exact``."""
    if isinstance(v, dict):
        return "; ".join(f"{k}: {_plain(x)}" for k, x in v.items())
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_plain(x) for x in v) + "]"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, float):
        return f"{v:.6g}"
    return str(v)


def _kv(pairs) -> str:
    return "<table><tbody>" + "".join(f"<tr><th>{_e(str(k).replace('_', ' '))}</th><td>{_e(_plain(v))}</td></tr>"
                                      for k, v in pairs) + "</tbody></table>"


def _img(f: Figure) -> str:
    data = base64.b64encode(f.png).decode("ascii")
    return (f'<figure><img alt="{_e(f.caption)}" src="data:image/png;base64,{data}">'
            f"<figcaption>{_e(f.name)}: {_e(f.caption)}</figcaption></figure>")


def _run_section(info: dict, figs: list[Figure], index: int) -> str:
    s, m = info["summary"], info["manifest"]
    cert = s["certificate"]
    model, pen, graph = s.get("model", {}), s.get("penalty", {}), m.get("graph", {})
    iv = m.get("spectral_interval", [None, None])
    settings = [("run folder", info["path"]), ("name", s.get("name")),
                ("graph", f"{graph.get('nodes')} nodes, {graph.get('edges')} edges, shift operator {graph.get('kind')}"),
                ("spectral interval", f"[{_num(iv[0])}, {_num(iv[1])}] ({_plain(m.get('interval_method'))})"),
                ("model", f"features {model.get('features')}, K = {model.get('taps')} taps, {model.get('basis')} basis, "
                          f"{model.get('nonlinearity')}, readout {model.get('readout')}"),
                ("penalty", f"{pen.get('mode')}, weight {pen.get('weight')}"),
                ("epochs", s.get("epochs")), ("seed", m.get("seed")),
                ("input norm bound rho", cert.get("rho")),
                ("started / finished", f"{m.get('started')} / {m.get('finished')}")]
    metrics = _table(["metric", "value"], sorted(s.get("metrics", {}).items()), numeric=(1,))
    keys = sorted(cert.get("certified", {}), key=float)
    crows = [[k, cert["certified"].get(k), cert.get("published", {}).get(k), cert.get("per_unit", {}).get(k)]
             for k in keys]
    certs = _table(["eps", "certified", "published form (reference)", "certified per unit eps"], crows,
                   numeric=(1, 2, 3))
    lrows = [[i + 1, lr.get("integral_lipschitz"), lr.get("kernel"), lr.get("sup")]
             + [lr.get("change", {}).get(k) for k in keys] for i, lr in enumerate(cert.get("layers", []))]
    layers = _table(["layer", "integral Lipschitz C", "kernel", "sup ||H||"] + [f"change at eps {k}" for k in keys],
                    lrows, numeric=tuple(range(1, 4 + len(keys))))
    assumptions = _kv(cert.get("assumptions", {}).items())
    parts = [f'<h2 id="run-{index}">Run {index}: {_e(s.get("name") or info["path"])}</h2>',
             "<h3>Settings</h3>", _kv(settings), "<h3>Metrics</h3>", metrics,
             "<h3>Certificate (over the graph's eigenvalues)</h3>", certs, layers,
             "<h3>Assumptions the certificate rests on</h3>", assumptions, "<h3>Figures</h3>"]
    parts += [_img(f) for f in figs]
    if info["stress"] is None:
        parts.append("<p>No stress results in this run folder, so no measured-against-certified figure. Produce "
                     f"them with <code>stablefilt stress {_e(info['path'])} --save</code> (add <code>--attack</code> "
                     "for the attack bracket) and write the report again.</p>")
    else:
        st = info["stress"]
        srows = [[r.get("eps"), r.get("kind"), f"{r.get('covered')}/{r.get('samples')}", r.get("certified"),
                  r.get("max_change"), r.get("violations")] for r in st["rows"]]
        parts += [f"<p>Stress results saved {_e(st.get('saved', '?'))}:</p>",
                  _table(["eps", "kind", "covered", "certified", "max change", "violations"], srows,
                         numeric=(0, 3, 4, 5))]
    return "\n".join(parts)


def page(runs, front) -> str:
    """The HTML page: cautions, the front and comparison for several runs,
    then one section per run."""
    from ._version import __version__

    title = "stablefilt report: " + ", ".join(info["summary"].get("name") or info["path"] for info, _ in runs)
    parts = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
             f"<title>{_e(title)}</title><style>{CSS}</style></head><body>", f"<h1>{_e(title)}</h1>",
             f'<p class="caution"><strong>Caution.</strong> {_e(CAUTION)} Figures labelled <em>published</em> are '
             "first-order reference values, not certificates; measured and attacked changes are changes that "
             "actually happened.</p>",
             f"<p>{_e(NOT_YET)}</p>"]
    if front is not None:
        fig, rows, e = front
        header, lines = compare_table(rows)
        parts += ["<h2>Comparison</h2>", _img(fig), _table(header, lines)]
    parts += ["<ul>"] + [f'<li><a href="#run-{i + 1}">Run {i + 1}: {_e(info["path"])}</a></li>'
                         for i, (info, _) in enumerate(runs)] + ["</ul>"]
    parts += [_run_section(info, figs, i + 1) for i, (info, figs) in enumerate(runs)]
    parts.append(f"<p><small>Written by stablefilt {_e(__version__)} at {_e(now())}.</small></p></body></html>")
    return "\n".join(parts) + "\n"
