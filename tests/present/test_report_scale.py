"""The report at real-model scale: a synthetic sampled scan of a 12-layer x 12-head model
(tests/present/synthetic_scan.py, invented numbers written through the store API).

Each test names its source (docs/testing.md).
"""

from __future__ import annotations

import json
import re
import shutil
import subprocess

import numpy as np
import pytest

from composition.present.report import write_report
from composition.present.report import figures as fg
from tests.present.synthetic_scan import write_synthetic_scan

CHROMIUM = next((p for p in (shutil.which(n) for n in ("chromium", "chromium-browser")) if p), None)
CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                  "--disable-component-update", "--no-first-run", "--disable-sync"]
L, H = 12, 12


@pytest.fixture(scope="module")
def big(tmp_path_factory):
    root = tmp_path_factory.mktemp("scale")
    scan = write_synthetic_scan(root / "scan.h5", L, H)
    return scan, write_report(scan, root / "report", svg=False).parent  # SVGs: tests/present/test_report.py


def test_csv_tables_round_trip_every_head_id_in_pandas(big):
    """pandas.read_csv gives integer writer/responder layer and head columns (layer, head for
    heads.csv) in every CSV table of the report, covering all 144 head ids of the 12 x 12 model,
    and they agree with the layer.head label strings read as text; read as numbers, the labels
    merge 1.1 and 1.10 (why the integer columns are there).

    Reference library: pandas.read_csv.
    """
    pd = pytest.importorskip("pandas")
    from composition.store.scanfile import load_scan

    scan_path, report = big
    tables = report / "tables"
    every = {(l, h) for l in range(L) for h in range(H)}
    pairs = pd.read_csv(tables / "pairs.csv")
    ids = ["writer_layer", "writer_head", "responder_layer", "responder_head"]
    assert all(pairs[c].dtype.kind == "i" for c in ids)
    done = {tuple(int(v) for v in ix) for ix in np.argwhere(load_scan(scan_path).done)}
    assert set(map(tuple, pairs[ids].to_numpy().tolist())) == done
    heads_seen = set(map(tuple, pairs[ids[:2]].to_numpy().tolist())) | set(map(tuple, pairs[ids[2:]].to_numpy().tolist()))
    assert heads_seen == every
    assert pairs["writer"].nunique() < len({f"{l}.{h}" for l, h in every if l < L - 1})  # 1.1 == 1.10 as floats
    for name in sorted(p.name for p in tables.glob("*.csv")):
        text = pd.read_csv(tables / name, dtype=str)
        frame = pd.read_csv(tables / name)
        if name == "heads.csv":
            assert frame["layer"].dtype.kind == frame["head"].dtype.kind == "i"
            assert set(zip(frame["layer"], frame["head"])) == every
            assert (text["head_label"] == text["layer"] + "." + text["head"]).all()
        elif name != "sampling.csv":
            assert all(frame[c].dtype.kind == "i" for c in ids), name
            assert (text["writer"] == text["writer_layer"] + "." + text["writer_head"]).all(), name
            assert (text["responder"] == text["responder_layer"] + "." + text["responder_head"]).all(), name
    for k in (1, 10):
        for col in (f"ci_low_{k}", f"ci_high_{k}", f"bottom_ci_low_{k}", f"bottom_ci_high_{k}"):
            assert pairs[col].notna().all()
        assert (pairs[f"ci_low_{k}"] <= pairs[f"top_share_{k}"]).all()
    sampling = pd.read_csv(tables / "sampling.csv")
    assert sampling.loc[0, "seed"] == 7 and sampling.loc[0, "rows"] == 2000 and str(sampling.loc[0, "looks"]) == "2000"


def test_colour_scale_clips_one_outlier_at_the_stated_percentile():
    """The colour limits are the 99th percentile of |value - null|; one outlier is counted as
    clipped instead of setting the range; a floor keeps noise near the null pale.

    Reference library: numpy.percentile.
    """
    rng = np.random.default_rng(3)
    v = 0.125 + rng.normal(0, 0.01, 1000)
    v[7] = 0.9
    s = fg.colour_scale(v, 0.125, "score")
    hw = np.percentile(np.abs(v - 0.125), 99)
    assert s.hi == pytest.approx(0.125 + hw) and s.lo == pytest.approx(0.125 - hw)
    assert s.clipped == int((np.abs(v - 0.125) > hw).sum()) == 10
    assert "99th percentile" in s.range_text() and "10 cells" in s.range_text()
    floor = fg.colour_scale(0.5 + rng.normal(0, 0.001, 100), 0.5, "mp", min_half_width=0.1, bounds=(0, 1))
    assert (floor.lo, floor.hi, floor.clipped) == (pytest.approx(0.4), pytest.approx(0.6), 0)


def _srgb_to_linear(c):
    c = np.asarray(c, float)
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


def _linear_to_srgb(c):
    c = np.clip(c, 0, 1)
    return np.where(c <= 0.0031308, 12.92 * c, 1.055 * c ** (1 / 2.4) - 0.055)


def test_palette_stays_distinct_under_deuteranopia():
    """Under simulated deuteranopia the diverging map's two sides, raising vs lowering and
    compensating vs reinforcing stay far apart, and the null colour stays near-white.

    From memory: Machado, Oliveira & Fernandes (2009), simulation matrix for deuteranopia at
    severity 1.0, applied in linear RGB.
    """
    from matplotlib.colors import to_rgb

    deut = np.array([[0.367322, 0.860646, -0.227968], [0.280085, 0.672501, 0.047413],
                     [-0.011820, 0.042940, 0.968881]])

    def seen(hex_colour):
        return _linear_to_srgb(deut @ _srgb_to_linear(to_rgb(hex_colour)))

    c, p = fg.LABEL_COLOURS, fg.PREDICTION_COLOURS
    for a, b, apart in ((fg.LOW_COLOURS[1], fg.HIGH_COLOURS[1], 0.35), (fg.LOW_COLOURS[0], fg.HIGH_COLOURS[-1], 0.35),
                        (fg.LOW_COLOURS[2], fg.HIGH_COLOURS[0], 0.25),  # the pale tints next to the null
                        (c[1], c[-1], 0.35), (p[-1], p[1], 0.35)):
        assert np.linalg.norm(seen(a) - seen(b)) > apart, (a, b)
    assert min(to_rgb(fg.NULL_COLOUR)) > 0.93
    table = fg.colour_table()
    assert table[0] == fg.LOW_COLOURS[0] and table[-1] == fg.HIGH_COLOURS[-1] and len(table) == 256


def _chromium(url, *extra, tmp):
    profile = tmp / f"profile-{len(list(tmp.iterdir()))}"
    cmd = [CHROMIUM, *CHROMIUM_FLAGS, f"--user-data-dir={profile}", "--enable-logging=stderr", "--v=0",
           "--virtual-time-budget=8000", *extra, url]
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    return done.stdout, [line for line in done.stderr.splitlines() if ":CONSOLE" in line]


@pytest.mark.skipif(CHROMIUM is None, reason="Chromium is not installed (Debian: apt-get install -y chromium)")
def test_144_head_report_in_headless_chromium(big, tmp_path):
    """In headless Chromium the 144-head report shows, for every heatmap, head labels or zoomed
    blocks that label every head; the explorer draws one hoverable cell per computed pair of
    the first statistic and has hover text for every drawable cell of every statistic; the
    sampled-scan notice is present; no console messages.

    Reference library: Chromium (Debian package), --dump-dom.
    """
    from composition.store.scanfile import load_scan

    scan_path, report = big
    dom, console = _chromium((report / "index.html").as_uri(), "--dump-dom", tmp=tmp_path)
    assert console == []
    figures = re.findall(r'<figure id="fig-([a-z0-9_]+)" data-kind="heatmap" data-heads-labelled="(\w+)" '
                         r'data-zooms="(\d+)"', dom)
    assert len(figures) == 11
    for key, labelled, zooms in figures:
        assert labelled == "all" or int(zooms) > 0, key
        if labelled != "all":
            block = dom[dom.index(f'id="fig-{key}"'):]
            block = block[:block.index("</figure>")]
            assert block.count('<div class="zoom"') == int(zooms) == 3
    done = int(load_scan(scan_path).done.sum())
    assert int(re.search(r'data-explorer-cells="(\d+)"', dom).group(1)) == done == 9504
    assert len(re.findall(r'<rect class="c" data-p="\d+"', dom)) == done
    expected = json.loads(re.search(r"data-explorer-expected=\"([^\"]+)\"", dom).group(1).replace("&quot;", '"'))
    assert expected["mean_percentile"] == done and expected["q_composition"] == done and len(expected) == 11
    assert 'data-hover-complete="true"' in dom
    sample = re.search(r'data-hover-sample="([^"]+)"', dom).group(1)
    assert "writer" in sample and "rows 2000 of 4096" in sample and "q " in sample
    notice = re.search(r'<div class="sampling sampled" id="sampling-notice" data-sampled="true">(.*?)</div>', dom, re.S)
    assert notice and "2,000 of 4,096 rows" in notice.group(1) and "seed 7" in notice.group(1)
    loaded = re.search(r'data-heatmaps-loaded="(\d+)"', dom).group(1)
    assert loaded == re.search(r'data-heatmaps-total="(\d+)"', dom).group(1) == "11"
    zooms = sum(int(z) for _, _, z in figures)
    assert int(re.search(r'data-hover-images="(\d+)"', dom).group(1)) == 11 + zooms


_PROBE = """<script>
window.addEventListener('load', function () {
  var out = [];
  document.querySelectorAll('details.zooms').forEach(function (d) { d.open = true; });
  [['#fig-mean_percentile > img', 1, 10, 2, 3], ['#fig-q_composition .zoom:last-child img', 9, 11, 11, 10]]
  .forEach(function (t) {
    var img = document.querySelector(t[0]), b = img.getBoundingClientRect(), H = 12;
    var e = img.dataset.extent.split(',').map(Number), wl = img.dataset.wl.split(',').map(Number),
        rl = img.dataset.rl.split(',').map(Number);
    var row = wl.indexOf(t[1]) * H + t[2], col = rl.indexOf(t[3]) * H + t[4];
    var x = b.left + (e[0] + (col + 0.5) / (rl.length * H) * (e[2] - e[0])) * b.width;
    var y = b.top + (e[1] + (row + 0.5) / (wl.length * H) * (e[3] - e[1])) * b.height;
    img.dispatchEvent(new MouseEvent('mousemove', {bubbles: true, clientX: x, clientY: y}));
    out.push(document.getElementById('tip').textContent);
  });
  document.documentElement.setAttribute('data-probe', out.join(' | '));
});
</script>"""


@pytest.mark.skipif(CHROMIUM is None, reason="Chromium is not installed (Debian: apt-get install -y chromium)")
def test_static_heatmap_images_hover_the_cell_under_the_pointer(big, tmp_path):
    """A pointer at the centre of cell 1.10 -> 2.3 of the mean-percentile overview, and of cell
    9.11 -> 11.10 of a zoomed Q-composition block, shows that pair's hover text: the PNG's
    recorded data area maps pointer positions to cells in a real browser.

    Reference library: Chromium (Debian package), --dump-dom; DOM MouseEvent.
    """
    _, report = big
    probe = report / "probe.html"
    probe.write_text((report / "index.html").read_text().replace("</body>", _PROBE + "</body>"))
    dom, console = _chromium(probe.as_uri(), "--dump-dom", "--window-size=1400,2000", tmp=tmp_path)
    assert console == []
    text = re.search(r'data-probe="([^"]*)"', dom).group(1)
    first, second = text.split(" | ")
    assert first.startswith("writer 1.10 \u2192 responder 2.3") and "Mean percentile" in first
    assert second.startswith("writer 9.11 \u2192 responder 11.10") and "Q-composition" in second
