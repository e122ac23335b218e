"""Paper figures (``infer figure``): the requested width in inches, fonts set, labels as given, bad input.

References used below:
* PDF: the MediaBox is in default user-space units of 1/72 inch (ISO 32000-1:2008, §8.3.2.3 and §14.11.2);
  fonts embedded as TrueType carry a /FontFile2 stream (§9.9). Read from the file's bytes, not from matplotlib.
* PNG: the IHDR chunk holds the width and height in pixels, the pHYs chunk the pixels per metre with unit
  byte 1 (W3C PNG Specification, 2nd ed., 2003, §11.2.2 and §11.3.5.3); 1 inch = 0.0254 m (exact by definition).
"""
from __future__ import annotations

import re
import struct

import pytest

from infer.cli import main
from infer.report.figures import paper

@pytest.fixture(scope="module")
def chain(tmp_path_factory, quick_data):
    from conftest import quick_config_text
    d = tmp_path_factory.mktemp("paper")
    cfg = d / "run.toml"
    path = d / "chain.h5"
    cfg.write_text(quick_config_text(quick_data, path, steps=60, walkers=16))
    assert main(["run", str(cfg)]) == 0
    return path


def _png_chunks(path):
    data = path.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    i, out = 8, {}
    while i < len(data):
        n, kind = struct.unpack(">I4s", data[i:i + 8])
        out.setdefault(kind, data[i + 8:i + 8 + n])
        i += 12 + n
    return out


def _mediabox(path):
    boxes = re.findall(rb"/MediaBox\s*\[\s*([-\d.\s]+)\]", path.read_bytes())
    assert len(boxes) == 1
    return [float(v) for v in boxes[0].split()]


@pytest.mark.parametrize("width,inches", [("single", 3.4), ("double", 7.0)])
def test_pdf_is_the_column_width_with_embedded_truetype_fonts(chain, tmp_path, width, inches):
    out = tmp_path / f"tri-{width}.pdf"
    assert main(["figure", str(chain), "--params", "a_1,a_2,a_3", "--labels", r"a_1,\alpha_{2,0},A_3",
                 "--width", width, "--format", "pdf", "--out", str(out)]) == 0
    x0, y0, x1, y1 = _mediabox(out)
    assert (x1 - x0) / 72 == pytest.approx(inches, abs=1e-3)              # ISO 32000-1: 1/72 in
    assert (y1 - y0) / 72 == pytest.approx(inches, abs=1e-3)              # a triangle is square
    raw = out.read_bytes()
    fonts = set(re.findall(rb"/BaseFont\s*/([A-Za-z0-9+\-]+)", raw))
    assert fonts and all(b"STIX" in f for f in fonts), fonts
    assert b"/FontFile2" in raw and b"/Type3" not in raw                 # TrueType embedded, no Type 3


@pytest.mark.parametrize("width,inches", [("single", 3.4), ("double", 7.0)])
def test_png_has_the_width_in_pixels_and_its_dpi(chain, tmp_path, width, inches):
    out = tmp_path / f"m-{width}.png"
    assert main(["figure", str(chain), "--params", "a_2", "--width", width, "--out", str(out)]) == 0
    c = _png_chunks(out)
    w_px, h_px = struct.unpack(">II", c[b"IHDR"][:8])
    ppm_x, ppm_y, unit = struct.unpack(">IIB", c[b"pHYs"])
    assert unit == 1 and ppm_x == ppm_y
    dpi = ppm_x * 0.0254
    assert dpi == pytest.approx(paper.PNG_DPI, rel=1e-3)
    assert w_px / dpi == pytest.approx(inches, abs=2 / dpi)               # W3C PNG: pixels ÷ (pixels/in)
    assert h_px < w_px                                                    # one marginal: wider than tall


def test_fonts_and_labels_follow_the_width(chain):
    sample, _, _ = paper.chain_draws(chain)
    sizes = {}
    for width in ("single", "double"):
        fig = paper.paper_figure(sample, ["a_1", "a_3"], ["$a_1$", r"$\Omega_{3}$"], width)
        bottom_left, bottom_right = fig.axes[2], fig.axes[3]
        assert bottom_left.get_xlabel() == "$a_1$" and bottom_right.get_xlabel() == r"$\Omega_{3}$"
        assert bottom_left.get_ylabel() == r"$\Omega_{3}$"
        lab = bottom_left.xaxis.label
        assert lab.get_fontsize() == pytest.approx(paper.PAPER[width]["axes.labelsize"])
        assert "STIXGeneral" in lab.get_fontfamily() or lab.get_fontfamily() == ["serif"]
        tick = bottom_left.get_xticklabels()[0]
        assert tick.get_fontsize() == pytest.approx(paper.PAPER[width]["xtick.labelsize"])
        assert fig.get_size_inches()[0] == pytest.approx(paper.WIDTHS[width])
        sizes[width] = lab.get_fontsize()
    assert sizes["single"] < sizes["double"]


def test_bad_input_is_one_line_and_touches_nothing(chain, tmp_path, capsys):
    keep = tmp_path / "keep.pdf"
    keep.write_bytes(b"mine")
    cases = [
        (["--params", "a_1,zz"], tmp_path / "a.pdf", "no parameter 'zz'"),
        (["--params", "a_1,a_2", "--labels", "a"], tmp_path / "b.pdf", "1 label(s) for 2 parameter(s)"),
        (["--params", "a_1", "--labels", r"\frac{"], tmp_path / "c.pdf", "not valid mathtext"),
        (["--params", "a_1", "--format", "png"], tmp_path / "d.pdf", "must end in .png"),
        (["--params", "a_1"], tmp_path / "e.svg", "format must be one of pdf, png"),
        (["--params", "a_1,a_1"], tmp_path / "f.pdf", "named twice"),
        (["--params", "a_1"], keep, "already exists"),
        (["--params", "a_1", "--width", "triple"], tmp_path / "g.pdf", "invalid choice"),
    ]
    for extra, out, words in cases:
        code = main(["figure", str(chain), *extra, "--out", str(out)])
        err = capsys.readouterr().err
        assert code == 2 and words in err and len(err.strip().splitlines()) == 1, (extra, err)
        if out != keep:
            assert not out.exists()
    assert keep.read_bytes() == b"mine"
    assert main(["figure", str(tmp_path / "none.h5"), "--params", "a_1", "--out", str(tmp_path / "h.pdf")]) == 2
    assert "no such chain file" in capsys.readouterr().err


def test_label_lists_keep_commas_inside_braces():
    assert paper.split_list(r"\omega_b,\theta_{*,0}, A") == [r"\omega_b", r"\theta_{*,0}", "A"]


def test_a_weighted_sample_is_drawn_with_its_weights(tmp_path):
    """The surrogate engine's output kind (importance-weighted draws): the weights shape the marginal."""
    import numpy as np
    from infer.analysis.weighted import WeightedSample
    rng = np.random.default_rng(5)
    x = rng.uniform(-3, 3, size=(20000, 2))
    lw = -0.5 * np.sum(x ** 2, axis=1)                   # weights turn uniform draws into N(0, 1) ones
    ws = WeightedSample(("u", "v"), (), x, np.zeros((len(x), 0)), lw, lw, lw, tex={"u": "u", "v": "v"})
    fig = paper.paper_figure(ws, ["u", "v"], ["$u$", "$v$"], "double")
    diag = fig.axes[0]
    xs, ys = max(diag.lines, key=lambda ln: len(ln.get_xdata())).get_data()
    assert abs(xs[np.argmax(ys)]) < 0.3                  # peaked at 0, not flat as the unweighted draws
    assert ys[np.argmin(np.abs(xs - 2.0))] < 0.25        # N(0, 1) at 2σ: exp(−2) = 0.135 of the peak
    out = paper.write(fig, tmp_path / "w.pdf", "pdf", "double")
    x0, _, x1, _ = _mediabox(out)
    assert (x1 - x0) / 72 == pytest.approx(7.0, abs=1e-3)
