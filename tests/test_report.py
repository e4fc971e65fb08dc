"""Figures (``stablefilt._figures``), the HTML report (``stablefilt report``),
``compare --plot`` and ``stress --save``: files written, of the expected
pixel size, not blank, axes labelled; the page parses, loads nothing from
outside, and holds every run's figures and tables; bad input exits 2 with one
line and changes nothing on disk."""

from __future__ import annotations

import base64
import html.parser
import io
import json
import os
import re
import shutil
import subprocess
import sys

import helpers as H
import numpy as np
import pytest

pytest.importorskip("matplotlib")  # the report extra; installed by `make test`

from matplotlib.image import imread  # noqa: E402

from stablefilt import _figures as F  # noqa: E402
from stablefilt import cli, make_basis  # noqa: E402
from stablefilt._errors import StablefiltError  # noqa: E402
from stablefilt._store import read_log  # noqa: E402
from stablefilt._text import CAUTION  # noqa: E402

#: A figure whose pixels vary less than this (RGB in [0, 1]) is blank; a
#: white page with a few thin lines is well above it (common practice: pixel
#: variance as a blank-image test).
MIN_VARIANCE = 1e-3


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    return H.plain_run(tmp_path_factory)[1], H.penalised_run(tmp_path_factory)[1]


def _pixels(png: bytes) -> np.ndarray:
    assert png[:8] == b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG specification, W3C 2003)
    return imread(io.BytesIO(png), format="png")


def _check_figure(fig, width_px, height_px):
    """Written as PNG, expected size, not blank, every axes labelled."""
    img = _pixels(F.png_bytes(fig))
    assert img.shape[:2] == (height_px, width_px)
    assert float(np.var(img[..., :3])) > MIN_VARIANCE
    axes = fig.get_axes()
    assert axes
    for ax in axes:
        assert ax.get_xlabel().strip() and ax.get_ylabel().strip() and ax.get_title().strip()
        assert ax.get_lines() or ax.collections
    return img


# ---------------------------------------------------------------------------
# Figures


def test_palette_is_okabe_ito_without_yellow():
    # Okabe & Ito, "Color Universal Design" (2008): the eight colours, from memory.
    okabe_ito = {"#000000", "#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7"}
    assert set(F.PALETTE) == okabe_ito - {"#F0E442"}


def test_response_figure_of_a_run(runs):
    from stablefilt import open_run

    run = open_run(runs[1])
    layers = [np.asarray(layer["taps"]) for layer in run.params["layers"]]
    eig = np.linalg.eigvalsh(run.op.dense())
    consts = [lr["integral_lipschitz"] for lr in run.summary["certificate"]["layers"]]
    fig = F.response_figure(layers, run.spec.basis, run.manifest["spectral_interval"], eig, consts)
    _check_figure(fig, 1000, int(round((3.0 * len(layers) + 0.4) * 100)))
    left, right = fig.get_axes()[:2]
    # One line per filter of the bank (8 features from 1 input), and the eigenvalue rug.
    assert len(left.get_lines()) == layers[0].shape[1] * layers[0].shape[2]
    assert len(left.collections[0].get_segments()) == len(eig)
    # The +-C lines sit at the summary's integral Lipschitz constant, and every
    # drawn lam h'(lam) lies within them (C is a sup over the interval, theory s.3).
    hl = [ln for ln in right.get_lines() if ln.get_linestyle() == "--"]
    assert sorted(ln.get_ydata()[0] for ln in hl) == pytest.approx([-consts[0], consts[0]])
    curves = [ln for ln in right.get_lines() if ln.get_linestyle() != "--"]
    assert max(np.max(np.abs(ln.get_ydata())) for ln in curves) <= consts[0] * (1 + 1e-6)


def test_response_figure_by_hand_and_derivative():
    """h(lam) = lam^2 on [0, 2] (monomial taps 0, 0, 1): lam h'(lam) = 2 lam^2,
    so C = 8 when not given (closed form)."""
    fig = F.response_figure([np.array([0.0, 0.0, 1.0])], make_basis("monomial"), (0.0, 2.0))
    _check_figure(fig, 1000, 340)
    left, right = fig.get_axes()
    x, y = left.get_lines()[0].get_data()
    assert y == pytest.approx(x ** 2, abs=1e-12)
    x, y = right.get_lines()[0].get_data()
    assert y == pytest.approx(2 * x ** 2, abs=1e-12)
    assert max(abs(ln.get_ydata()[0]) for ln in right.get_lines()[1:]) == pytest.approx(8.0)


def test_training_figure(runs):
    log = read_log(os.path.join(runs[1], "log.jsonl"))
    fig = F.training_figure(log, "acc")
    _check_figure(fig, 1000, 700)
    bound = fig.get_axes()[3]
    # Two eps in the tiny config, each with certified and published curves, one point per epoch.
    assert len(bound.get_lines()) == 4
    assert all(len(ln.get_xdata()) == len(log) for ln in bound.get_lines())
    # Published is 1-2 orders above certified here: the bound panel spans decades, so log scale.
    assert bound.get_yscale() == "log"


def _row(name, weight, acc, c, taps=5):
    return {"run": name, "name": name, "metric": "acc", "test_acc": acc, "penalty_weight": weight,
            "penalty_mode": "integral_lipschitz", "model": {"taps": taps, "basis": "chebyshev"},
            "certified": {"0.001": c}, "published": {"0.001": 10 * c}, "layers": [], "rho": 1.0}


def test_front_points_and_figure():
    # By hand: b is better on both than d; a, b, c trade accuracy for bound.
    rows = [_row("a", 0.0, 0.96, 90.0), _row("b", 0.5, 0.935, 10.6), _row("c", 2.0, 0.90, 0.5),
            _row("d", 0.2, 0.93, 11.0)]
    pts = F.front_points(rows, 1e-3)
    assert [p["front"] for p in pts] == [True, True, True, False]
    assert pts[1]["label"] == "penalty 0.5, K 5, chebyshev"
    fig = F.front_figure(rows, 1e-3)
    _check_figure(fig, 1000, 550)
    ax = fig.get_axes()[0]
    joined = ax.get_lines()[0]
    assert list(joined.get_xdata()) == [0.5, 10.6, 90.0]  # the front, by bound
    assert ax.get_xscale() == "log"  # 0.5 to 90 spans two decades
    texts = " ".join(t.get_text() for t in ax.texts)
    assert all(name in texts for name in "abcd")
    with pytest.raises(StablefiltError, match="eps 0.01"):
        F.front_figure(rows, 1e-2)


def test_stress_figure_with_attack_and_zero_changes():
    base = {"certified": 1.0, "published": 30.0, "samples": 2, "covered": 2, "violations": 0}
    rows = []
    for eps in (1e-3, 1e-2):
        s = eps / 1e-3
        rows += [{**base, "eps": eps, "kind": "relative", "max_change": 0.1 * s, "certified": s, "published": 30 * s},
                 {**base, "eps": eps, "kind": "relabel", "max_change": 0.0, "certified": s, "published": 30 * s},
                 {**base, "eps": eps, "kind": "attack", "max_change": 0.3 * s, "certified": s, "published": 30 * s,
                  "attack_change": 0.2 * s, "attack_certified": 0.5 * s, "attack_free_change": 0.3 * s}]
    fig = F.stress_figure(rows)
    _check_figure(fig, 1000, 550)
    ax = fig.get_axes()[0]
    assert ax.get_xscale() == "log" and ax.get_yscale() == "log"
    labels = [ln.get_label() for ln in ax.get_lines()]
    assert not any("relabel" in lab for lab in labels)  # changes of 0 cannot sit on a log axis
    assert sum("attack" in lab for lab in labels) == 2 and any("certified" in lab for lab in labels)


def test_missing_matplotlib_is_one_sentence(monkeypatch):
    monkeypatch.setitem(sys.modules, "matplotlib.figure", None)  # makes the import fail
    with pytest.raises(StablefiltError) as info:
        F.training_figure([], "acc")
    msg = str(info.value)
    assert "pip install 'stablefilt[report]'" in msg and msg.count(".") <= 2 and "\n" not in msg


def test_importing_the_package_does_not_import_matplotlib():
    code = "import sys, stablefilt, stablefilt.cli, stablefilt._report; print('matplotlib' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "False"


# ---------------------------------------------------------------------------
# The HTML page


class _Page(html.parser.HTMLParser):
    """Tags, their attributes and the text of a page (html.parser, standard library)."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags, self.text = [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


def _parse(path):
    with open(path, encoding="utf-8") as fh:
        source = fh.read()
    p = _Page()
    p.feed(source)
    p.close()
    return p, source, " ".join(" ".join(p.text).split())


def _external(tags):
    """Attributes that would load something from outside the page."""
    bad = []
    for tag, attrs in tags:
        if tag == "link" or (tag == "script" and "src" in attrs):
            bad.append((tag, attrs))
        for key in ("src", "href", "srcset", "data", "poster", "action"):
            v = (attrs.get(key) or "").strip().lower()
            if v and not (v.startswith("data:") or v.startswith("#")):
                bad.append((tag, key, v[:40]))
    return bad


def test_report_of_two_runs(runs, tmp_path, capsys):
    copy = str(tmp_path / "plain")
    shutil.copytree(runs[0], copy)
    # Stress results saved into the copied run, for the measured-against-certified figure.
    assert cli.main(["stress", copy, "--samples", "1", "--kinds", "relative,scaling", "--eps", "1e-3", "--eps",
                     "1e-2", "--save"]) == 0
    with open(os.path.join(copy, "stress.json")) as fh:
        saved = H.strict_json(fh.read())
    assert len(saved["rows"]) == 4 and saved["violations"] == 0 and saved["kinds"] == ["relative", "scaling"]
    out = str(tmp_path / "rep")
    capsys.readouterr()
    assert cli.main(["report", copy, runs[1], "--out", out]) == 0
    stdout = capsys.readouterr().out
    assert "report written to" in stdout
    pngs = sorted(f for f in os.listdir(out) if f.endswith(".png"))
    assert pngs == ["1-plain-responses.png", "1-plain-stress.png", "1-plain-training.png",
                    "2-run-responses.png", "2-run-training.png", "front.png"]
    for name in pngs:
        with open(os.path.join(out, name), "rb") as fh:
            img = _pixels(fh.read())
        assert img.shape[1] == 1000 and float(np.var(img[..., :3])) > MIN_VARIANCE
    page, source, text = _parse(os.path.join(out, "report.html"))
    assert not _external(page.tags)
    assert not re.search(r"""(src|href)\s*=\s*["']?\s*(https?:|//)""", source, re.I)
    assert "@import" not in source and "url(" not in source  # no outside styles or fonts
    # Every figure embedded, byte for byte.
    embedded = [base64.b64decode(a["src"].split(",", 1)[1]) for t, a in page.tags if t == "img"]
    files = []
    for name in pngs:
        with open(os.path.join(out, name), "rb") as fh:
            files.append(fh.read())
    assert sorted(embedded) == sorted(files)
    # Every run's tables, assumptions and cautions, and the comparison.
    for run_dir in (copy, runs[1]):
        with open(os.path.join(run_dir, "summary.json")) as fh:
            s = json.load(fh)
        assert run_dir in text and s["name"] in text
        assert s["certificate"]["assumptions"]["perturbation_model"] in text
        assert f"{s['certificate']['certified']['0.001']:.6g}" in text
    assert CAUTION in text and "Comparison" in text and "not drawn" in text
    assert sum(1 for t, _ in page.tags if t == "table") >= 2 * 5 + 1


def test_report_of_one_run_default_out_and_no_stress(runs, tmp_path, capsys):
    copy = str(tmp_path / "one")
    shutil.copytree(runs[1], copy)
    before = H.snapshot(copy)
    assert cli.main(["report", copy]) == 0
    out = os.path.join(copy, "report")
    assert sorted(os.listdir(out)) == ["1-one-responses.png", "1-one-training.png", "report.html"]
    assert H.snapshot(copy) == before  # the run's own files untouched
    _, _, text = _parse(os.path.join(out, "report.html"))
    assert f"stablefilt stress {copy} --save" in text and "Comparison" not in text
    # A second report into the same folder is refused and changes nothing.
    held = H.snapshot(out)
    msg = H.one_line_exit_2(capsys, ["report", copy])
    assert "already holds" in msg
    assert H.snapshot(out) == held


def test_report_bad_input_changes_nothing(runs, tmp_path, capsys):
    out = tmp_path / "rep"
    msg = H.one_line_exit_2(capsys, ["report", runs[0], str(tmp_path / "missing"), "--out", str(out)])
    assert "missing" in msg and not out.exists()
    f = tmp_path / "afile"
    f.write_text("keep")
    msg = H.one_line_exit_2(capsys, ["report", runs[0], "--out", str(f)])
    assert "is a file" in msg and f.read_text() == "keep"
    # Stress results in a form report cannot read: one line, nothing written.
    copy = str(tmp_path / "bad-stress")
    shutil.copytree(runs[0], copy)
    with open(os.path.join(copy, "stress.json"), "w") as fh:
        json.dump({"rows": [{"eps": "small"}]}, fh)
    assert "stress --save" in H.one_line_exit_2(capsys, ["report", copy, "--out", str(out)])
    assert not out.exists()
    assert "at most one" in H.one_line_exit_2(capsys, ["report", runs[0], "--eps", "1e-3", "--eps", "1e-2",
                                                      "--out", str(out)])
    assert not out.exists()


def test_compare_plot(runs, tmp_path, capsys):
    plot = tmp_path / "front.png"
    capsys.readouterr()
    assert cli.main(["compare", runs[0], runs[1], "--plot", str(plot)]) == 0
    img = _pixels(plot.read_bytes())
    assert img.shape[:2] == (550, 1000) and float(np.var(img[..., :3])) > MIN_VARIANCE
    held = plot.read_bytes()
    msg = H.one_line_exit_2(capsys, ["compare", runs[0], runs[1], "--plot", str(plot)])
    assert "already exists" in msg and plot.read_bytes() == held
    msg = H.one_line_exit_2(capsys, ["compare", runs[0], "--plot", str(tmp_path / "front.gif")])
    assert ".png" in msg and not (tmp_path / "front.gif").exists()
    # The --csv file is not created when --plot is refused.
    msg = H.one_line_exit_2(capsys, ["compare", runs[0], "--plot", str(plot), "--csv", str(tmp_path / "t.csv")])
    assert not (tmp_path / "t.csv").exists()


def test_stress_save_keeps_the_earlier_result(runs, tmp_path, capsys):
    copy = str(tmp_path / "s")
    shutil.copytree(runs[1], copy)
    argv = ["stress", copy, "--samples", "1", "--kinds", "scaling", "--eps", "1e-3", "--save", "--json"]
    assert cli.main(argv) == 0
    printed = H.strict_json(capsys.readouterr().out)
    with open(os.path.join(copy, "stress.json")) as fh:
        first = fh.read()
    assert H.strict_json(first)["rows"] == printed["rows"]
    assert cli.main(argv) == 0
    with open(os.path.join(copy, "stress.json.previous")) as fh:
        assert fh.read() == first


def _browser():
    for name in ("chromium", "chromium-browser", "google-chrome", "chrome"):
        path = shutil.which(name)
        if path:
            return path
    return None


@pytest.mark.skipif(_browser() is None, reason="no headless Chromium on this machine")
def test_page_renders_in_a_headless_browser(runs, tmp_path):
    out = tmp_path / "rep"
    assert cli.main(["report", runs[0], runs[1], "--out", str(out)]) == 0
    shot = tmp_path / "shot.png"
    subprocess.run([_browser(), "--headless", "--disable-gpu", "--no-sandbox", "--window-size=1100,3000",
                    f"--screenshot={shot}", (out / "report.html").as_uri()], capture_output=True, timeout=120)
    img = _pixels(shot.read_bytes())
    assert float(np.var(img[..., :3])) > MIN_VARIANCE
    # Every embedded image decodes as a PNG (what the browser loads).
    page, _, _ = _parse(out / "report.html")
    for tag, attrs in page.tags:
        if tag == "img":
            _pixels(base64.b64decode(attrs["src"].split(",", 1)[1]))


def test_front_at_an_eps_the_summaries_lack(runs):
    """--eps not in the summaries: each run is certified at it (float64, as
    ``certify`` does), and the bound at 0.05 is above the one at 0.01 (the
    certificate grows with eps, docs/theory.md section 5)."""
    from stablefilt._report import front_rows

    rows, e = front_rows(list(runs), 0.05)
    assert e == 0.05
    for r in rows:
        assert F._eps_value(r["certified"], 0.05) > r["certified"]["0.01"]
    rows, e = front_rows(list(runs), None)
    assert e == 0.001  # the smallest eps both summaries hold (tiny config: 0.001 and 0.01)
