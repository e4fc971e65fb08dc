"""Figures of runs, drawn with matplotlib (the optional ``report`` extra, the
only module of the package that imports it): frequency responses with the
integral-Lipschitz envelope, training curves, the accuracy-stability front
across runs, and stress measurements against certificates.

Every function returns a ``matplotlib.figure.Figure`` built without pyplot,
so no global backend or window state is touched; :func:`png_bytes` renders it
with the Agg canvas. Inputs are the JSON forms of run files (``log.jsonl``
records, ``compare`` rows, saved stress results) and plain arrays, so the
figures do not depend on how certificates are computed.

Colours: the Okabe & Ito colour-blind-safe palette ("Color Universal Design",
2008; common practice), without its yellow, which is too faint for lines on
white.
"""

from __future__ import annotations

import io

import numpy as np

from ._errors import StablefiltError

#: Okabe & Ito palette, yellow left out: black, orange, sky blue, bluish
#: green, blue, vermillion, reddish purple.
PALETTE = ("#000000", "#E69F00", "#56B4E9", "#009E73", "#0072B2", "#D55E00", "#CC79A7")

#: Figure width in inches and the resolution PNGs are written at: a figure
#: ``WIDTH`` inches wide is ``WIDTH * DPI`` pixels wide.
WIDTH = 10.0
DPI = 100


def _matplotlib():
    """Import matplotlib's object API, or say how to install it."""
    try:
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure
    except ImportError:
        raise StablefiltError("figures need matplotlib; install it with pip install 'stablefilt[report]'.") from None
    return Figure, FigureCanvasAgg


def _figure(height: float):
    Figure, FigureCanvasAgg = _matplotlib()
    fig = Figure(figsize=(WIDTH, height), dpi=DPI, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def png_bytes(fig) -> bytes:
    """The figure as PNG bytes at :data:`DPI` (size ``figsize * DPI`` pixels)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI)
    return buf.getvalue()


def image_bytes(fig, fmt: str) -> bytes:
    """The figure in ``fmt`` (``png``, ``svg`` or ``pdf``)."""
    buf = io.BytesIO()
    fig.savefig(buf, format=fmt, dpi=DPI)
    return buf.getvalue()


def _spans_decades(values) -> bool:
    """True when every value is positive and the largest is at least 100x the smallest."""
    v = np.asarray([x for x in values if x is not None], dtype=np.float64)
    return v.size > 0 and bool(np.all(v > 0)) and v.max() >= 100 * v.min()


def _rug(ax, eigenvalues, label=None):
    if eigenvalues is not None and len(eigenvalues):
        ax.vlines(eigenvalues, 0.0, 0.04, transform=ax.get_xaxis_transform(), color=PALETTE[5], linewidth=0.8,
                  label=label)


# ---------------------------------------------------------------------------
# Frequency responses.


def response_figure(layers, basis, interval, eigenvalues=None, constants=None, points: int = 400):
    """Frequency responses ``h(lam)`` of every filter of each layer over the
    spectral interval (left) and ``lam h'(lam)`` against the integral
    Lipschitz constant ``+-C`` (right): a response may be steep near 0 but
    must flatten as ``|lam|`` grows (slope at most ``C / |lam|``,
    docs/theory.md section 3).

    Args:
      layers: taps per layer, each ``(K,)`` or ``(K, F_in, F_out)``.
      basis: the :class:`~stablefilt._filters.Basis` of the taps.
      interval: ``(lower, upper)`` spectral interval.
      eigenvalues: the graph's eigenvalues, marked along the axis, or None.
      constants: the integral Lipschitz constant per layer (drawn as ``+-C``);
        None computes ``max |lam h'(lam)|`` on the plotted grid.
    Returns: a Figure, one row of two panels per layer.
    """
    from ._filters import frequency_response, response_derivative

    lo, hi = float(interval[0]), float(interval[1])
    pad = 0.02 * max(hi - lo, 1e-12)
    lam = np.linspace(lo, hi, points)
    fig = _figure(3.0 * len(layers) + 0.4)
    axes = fig.subplots(len(layers), 2, squeeze=False)
    for i, taps in enumerate(layers):
        taps = np.asarray(taps, dtype=np.float64)
        h = frequency_response(taps, lam, basis).reshape(points, -1)
        dh = (lam[:, None] * response_derivative(taps, lam, basis).reshape(points, -1))
        count = h.shape[1]
        c = float(np.max(np.abs(dh))) if constants is None else float(constants[i])
        shape = "1 filter" if taps.ndim == 1 else f"{taps.shape[1]} x {taps.shape[2]} filters"
        alpha = 1.0 if count <= 8 else max(0.15, 8.0 / count)
        left, right = axes[i]
        for j in range(count):
            color = PALETTE[j % len(PALETTE)]
            left.plot(lam, h[:, j], color=color, linewidth=1.0, alpha=alpha)
            right.plot(lam, dh[:, j], color=color, linewidth=1.0, alpha=alpha)
        _rug(left, eigenvalues, "eigenvalues of S")
        _rug(right, eigenvalues)
        for sign in (1, -1):
            right.axhline(sign * c, color=PALETTE[0], linestyle="--", linewidth=1.2,
                          label=f"±C = ±{c:.3g} (integral Lipschitz constant)" if sign == 1 else None)
        if c > 0:  # room above +C for the legend, below -C for the eigenvalue marks
            right.set_ylim(-1.4 * c, 1.5 * c)
        left.set_title(f"layer {i + 1}: frequency responses ({shape}, K = {taps.shape[0]}, {basis.kind})")
        right.set_title(f"layer {i + 1}: lam h'(lam) within ±C")
        for ax in (left, right):
            ax.set_xlim(lo - pad, hi + pad)
            ax.set_xlabel("graph frequency lam (eigenvalue of S)")
            ax.grid(True, color="#dddddd", linewidth=0.6)
        y0, y1 = left.get_ylim()
        left.set_ylim(y0 - 0.08 * (y1 - y0), y1)  # room for the eigenvalue marks
        left.set_ylabel("frequency response h(lam)")
        right.set_ylabel("lam h'(lam)")
        right.legend(loc="upper right", fontsize=8, frameon=False)
        if eigenvalues is not None and len(eigenvalues) and i == 0:
            left.legend(loc="upper right", fontsize=8, frameon=False)
    return fig


# ---------------------------------------------------------------------------
# Training curves.


def _series(records, key):
    return [r.get(key) for r in records if "epoch" in r and "stopped" not in r]


def training_figure(records, metric: str):
    """Training curves from ``log.jsonl`` records: task loss, penalty,
    train and validation metric, and the certified (solid) and published
    (dashed) bounds per eps, each on a log scale when its values span two
    decades or more.

    Args:
      records: the log's epoch records (dicts).
      metric: ``acc`` or ``rmse``.
    Returns: a Figure of four panels.
    """
    recs = [r for r in records if "epoch" in r and "stopped" not in r]
    epochs = [r["epoch"] for r in recs]
    fig = _figure(7.0)
    (a, b), (c, d) = fig.subplots(2, 2)
    for ax, key, label in ((a, "task_loss", "task loss"), (b, "penalty", "penalty term (weighted, added to the loss)")):
        ys = _series(recs, key)
        ax.plot(epochs, ys, color=PALETTE[4], marker="o", markersize=3)
        if _spans_decades(ys):
            ax.set_yscale("log")
        ax.set_ylabel(label)
        ax.set_title(label)
    name = "accuracy (fraction correct)" if metric == "acc" else "RMSE (target units)"
    for k, (key, lab) in enumerate(((f"train_{metric}", "train"), (f"val_{metric}", "validation"))):
        c.plot(epochs, _series(recs, key), color=PALETTE[1 + 2 * k], marker="o", markersize=3, label=lab)
    c.set_ylabel(name)
    c.set_title(f"{name}, train and validation")
    c.legend(fontsize=8, frameon=False)
    keys = sorted({k for r in recs for k in r.get("certified", {})}, key=float)
    allv = []
    for k, key in enumerate(keys):
        col = PALETTE[(k + 3) % len(PALETTE)]
        cert = [r.get("certified", {}).get(key) for r in recs]
        pub = [r.get("published", {}).get(key) for r in recs]
        d.plot(epochs, cert, color=col, marker="o", markersize=3, label=f"certified, eps = {key}")
        d.plot(epochs, pub, color=col, linestyle="--", linewidth=1.0, label=f"published form, eps = {key}")
        allv += cert + pub
    if _spans_decades(allv):
        d.set_yscale("log")
    d.set_ylabel("bound on ||Phi(S) x - Phi(S_hat) x||_F")
    d.set_title("certified bound per epoch")
    d.legend(fontsize=8, frameon=False, loc="best")
    for ax in (a, b, c, d):
        ax.set_xlabel("epoch")
        ax.grid(True, color="#dddddd", linewidth=0.6)
    return fig


# ---------------------------------------------------------------------------
# The accuracy-stability front.


def _eps_value(cert: dict, eps: float):
    for k, v in cert.items():
        if abs(float(k) - eps) <= 1e-12 * max(abs(eps), 1e-300):
            return v
    return None


def _dominates(q: dict, p: dict) -> bool:
    """``q`` is at least as good as ``p`` on bound and metric, and better on one."""
    gm = q["metric"] >= p["metric"] if p["higher"] else q["metric"] <= p["metric"]
    sm = q["metric"] > p["metric"] if p["higher"] else q["metric"] < p["metric"]
    return q["bound"] <= p["bound"] and gm and (q["bound"] < p["bound"] or sm)


def front_points(rows, eps: float) -> list[dict]:
    """``[{"label", "bound", "metric", "front"}]`` from ``compare`` rows:
    the certified bound at ``eps`` and the test metric of each run, and
    whether no other run is at least as good on both with one strictly
    better (``front``, the non-dominated runs). Accuracy is better higher,
    RMSE lower; a smaller bound is better."""
    pts = []
    for r in rows:
        m = r["metric"]
        w = r["penalty_weight"]
        w = max(w) if isinstance(w, list) else w
        model = r.get("model", {})
        label = f"penalty {w:g}, K {model.get('taps', '?')}, {model.get('basis', '?')}"
        pts.append({"label": label, "run": r.get("name") or r["run"], "bound": _eps_value(r["certified"], eps),
                    "metric": float(r[f"test_{m}"]), "higher": m == "acc"})
    missing = [p["run"] for p in pts if p["bound"] is None]
    if missing:
        raise StablefiltError(f"run {missing[0]!r} has no certified bound at eps {eps:g}.")
    for p in pts:
        p["front"] = not any(_dominates(q, p) for q in pts if q is not p)
    return pts


def front_figure(rows, eps: float):
    """Test metric against the certified bound at ``eps``, one point per run
    (``compare`` rows, each with its certified bound at ``eps``), the
    non-dominated runs joined, each labelled with penalty weight, taps and
    basis. The bound axis is logarithmic when it spans two decades."""
    pts = front_points(rows, eps)
    metric = rows[0]["metric"]
    logx = _spans_decades([p["bound"] for p in pts])
    bx = {id(p): (np.log10(p["bound"]) if logx else p["bound"]) for p in pts}  # distances as drawn
    xr = max(bx.values()) - min(bx.values()) or 1.0
    yr = max(p["metric"] for p in pts) - min(p["metric"] for p in pts) or 1.0
    fig = _figure(5.5)
    ax = fig.subplots()
    front = sorted((p for p in pts if p["front"]), key=lambda p: p["bound"])
    ax.plot([p["bound"] for p in front], [p["metric"] for p in front], color=PALETTE[4], linewidth=1.2,
            marker="o", markersize=7, label="non-dominated runs (joined)")
    dominated = [p for p in pts if not p["front"]]
    if dominated:
        ax.plot([p["bound"] for p in dominated], [p["metric"] for p in dominated], color=PALETTE[5], marker="s",
                markersize=7, linestyle="none", label="dominated runs")
    for p in pts:
        # A label goes below its point when a run close by (within 5% of both
        # ranges) sits higher, so neighbouring labels do not overprint.
        below = any(q["metric"] > p["metric"] and abs(bx[id(q)] - bx[id(p)]) <= 0.05 * xr
                    and q["metric"] - p["metric"] <= 0.05 * yr for q in pts if q is not p)
        ax.annotate(f"{p['run']}\n{p['label']}", (p["bound"], p["metric"]), textcoords="offset points",
                    xytext=(6, -8) if below else (6, 6), va="top" if below else "bottom", fontsize=8)
    if logx:
        ax.set_xscale("log")
    ax.margins(0.2)
    ax.set_xlabel(f"certified bound on the output change at eps = {eps:g} (inputs with ||x||_F <= rho)")
    ax.set_ylabel("test accuracy (fraction correct)" if metric == "acc" else "test RMSE (target units)")
    better = "up and left" if metric == "acc" else "down and left"
    ax.set_title(f"accuracy-stability front ({len(pts)} runs; better is {better})")
    ax.grid(True, color="#dddddd", linewidth=0.6)
    ax.legend(fontsize=8, frameon=False, loc="lower right")
    return fig


# ---------------------------------------------------------------------------
# Stress measurements against certificates.


def stress_figure(rows):
    """Measured and attacked output changes against eps beside the certified
    and published bounds, log-log, from saved stress rows (dicts of
    :class:`~stablefilt._stress.StressRow`). Changes of exactly 0 (a
    relabelling) cannot be drawn on a log axis and are left out. Edge rows
    are drawn at their nominal eps (the jitter was ``2 eps``)."""
    fig = _figure(5.5)
    ax = fig.subplots()
    eps = sorted({float(r["eps"]) for r in rows})
    by = {e: next(r for r in rows if float(r["eps"]) == e) for e in eps}
    ax.plot(eps, [by[e]["certified"] for e in eps], color=PALETTE[0], marker="D", linewidth=1.6,
            label="certified (inputs with ||x||_F <= rho)")
    ax.plot(eps, [by[e]["published"] for e in eps], color=PALETTE[0], marker="x", linestyle="--", linewidth=1.0,
            label="published form (first order, reference only)")
    kinds = [k for k in dict.fromkeys(r["kind"] for r in rows) if k != "attack"]
    for k, kind in enumerate(kinds):
        pts = [(float(r["eps"]), r["max_change"]) for r in rows if r["kind"] == kind and r["max_change"] > 0]
        if pts:
            ax.plot(*zip(*pts), marker="o", linestyle=":", color=PALETTE[(k + 1) % len(PALETTE)],
                    label=f"measured, {kind} (max over samples)")
    att = [r for r in rows if r["kind"] == "attack"]
    for key, lab, col, mk in (("attack_free_change", "attack, free input of norm rho", PALETTE[5], "^"),
                              ("attack_change", "attack, one test signal", PALETTE[6], "v"),
                              ("attack_certified", "input-specific certificate of that signal", PALETTE[6], "_")):
        pts = [(float(r["eps"]), r[key]) for r in att if r.get(key)]
        if pts:
            ax.plot(*zip(*pts), marker=mk, linestyle="-" if key != "attack_certified" else "--", color=col,
                    markersize=8, label=lab)
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("relative perturbation size eps (||E||_2)")
    ax.set_ylabel("output change ||Phi(S) x - Phi(S_hat) x||_F")
    ax.set_title("measured and attacked changes against the certificates")
    ax.grid(True, which="both", color="#e6e6e6", linewidth=0.5)
    ax.legend(fontsize=8, frameon=False, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    return fig
