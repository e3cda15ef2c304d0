"""The report's explorer: an interactive writer x responder heatmap inside the page.

Self-contained: the data is inline JSON (``<script type="application/json">``), the script
inline, the heatmap an inline SVG built by the script; no network, no library. Hovering a
cell shows writer, responder, the statistic's value, the pair's label, q-value and rows
evaluated; clicking selects the pair and shows its numbers, its percentile histogram (the
20-bin histogram of every scanned pair is embedded) and the responder view (the responder
against every writer) and writer view (the writer against every responder) with 95 %
intervals. A head menu draws both views for any head.
"""

from __future__ import annotations

import json

import numpy as np

from ...interpret.predict import PREDICTION_WORDS
from . import figures as fg


def _num(values: np.ndarray, digits: int = 4) -> list:
    """Finite floats at ``digits`` significant digits, None for NaN/inf. # [P] -> list"""
    out = []
    for x in np.asarray(values, dtype=np.float64).tolist():
        out.append(float(f"{x:.{digits}g}") if x == x and abs(x) != float("inf") else None)
    return out


def _int(values: np.ndarray) -> list:
    return [int(v) for v in np.asarray(values).tolist()]


def explorer_data(scan, comp: dict, maps: list, words, sampling) -> dict:
    """Everything the explorer draws, as plain lists (one entry per pair shown by any heatmap)."""
    L, H = scan.label.shape[:2]
    ms_any = np.zeros(scan.done.shape, bool)
    for m in maps:
        if m.source == "model":
            ms_any |= np.isfinite(m.values)
    idx = np.argwhere(scan.done | ms_any)  # [P, 4]
    sel = tuple(idx.T)
    j = len(scan.k) - 1
    done = scan.done[sel]
    signs = {1: "+", -1: "\u2212", 0: "0"}
    pred = comp["prediction"][sel]
    data = {
        "L": L, "H": H, "n": int(scan.attrs["keys_per_row"]), "k": int(scan.k[-1]),
        "min_effect": float(scan.attrs.get("min_effect", 0.05)), "sampling": sampling.short(),
        "seed": sampling.seed, "looks": "/".join(map(str, sampling.looks)),
        "labels": {str(k): v for k, v in words.labels.items()},
        "predictions": {str(code): PREDICTION_WORDS[code] for code in (-1, 1, 0)},
        "lut": fg.colour_table(), "grey": fg.UNDECIDED_COLOUR,
        "w": _int(idx[:, 0] * H + idx[:, 1]), "r": _int(idx[:, 2] * H + idx[:, 3]), "s": _int(done),
        "mp": _num(scan.mean_percentile[sel]), "mlo": _num(scan.mean_ci_low[sel]), "mhi": _num(scan.mean_ci_high[sel]),
        "top": _num(scan.top_share[sel][:, j]), "tlo": _num(scan.ci_low[sel][:, j]), "thi": _num(scan.ci_high[sel][:, j]),
        "bot": _num(scan.bottom_share[sel][:, j]), "blo": _num(scan.bottom_ci_low[sel][:, j]),
        "bhi": _num(scan.bottom_ci_high[sel][:, j]),
        "q": _num(scan.q_value[sel], 2), "lab": _int(scan.label[sel]), "rows": _int(scan.rows_evaluated[sel]),
        "pred": _int(pred),
        "signs": ["".join(signs.get(int(comp[n][i]), "?") for n in ("s_writer", "s_response", "s_responder"))
                  if p in (-1, 1) else "" for i, p in zip(map(tuple, idx), pred)],
        "hist": [h if s else 0 for h, s in zip(scan.histogram[sel].tolist(), done.tolist())],
        "stats": [], "values": {}, "undecided": {},
    }
    for m in maps:
        meta = {"key": m.key, "title": m.title, "wl": list(m.axes.writer_layers), "rl": list(m.axes.responder_layers),
                "source": m.source}
        if m.categories is not None:
            codes = m.values[sel]
            data["values"][m.key] = [int(c) if int(c) in m.categories else None for c in codes.tolist()]
            meta["cats"] = {str(k): [w, m.colours[k]] for k, w in m.categories.items()}
        else:
            s = m.scale
            data["values"][m.key] = _num(m.values[sel])
            meta.update(log2=s.log2, centre=s.centre, hw=s.half_width, lo=s.lo, hi=s.hi, unit=s.unit)
            if m.undecided is not None:
                data["undecided"][m.key] = _int(m.undecided[sel])
        data["stats"].append(meta)
    return data


def section(scan, comp: dict, maps: list, words, sampling) -> str:
    """The explorer's HTML: controls, the map, the side panel, the data and the script."""
    data = json.dumps(explorer_data(scan, comp, maps, words, sampling), separators=(",", ":"))
    data = data.replace("</", "<\\/")
    return f"""<h2 id="explorer">Explorer: find any pair</h2>
<p class="muted">Pick a statistic; hover a cell for writer, responder, value, label, q-value and rows evaluated;
click it for the pair's numbers and percentile histogram and for the responder's view (its mean percentile
against every writer) and the writer's view (against every responder), with 95 % intervals. Pick any head
below to draw its two views. Same colour scales and limits as the static figures.</p>
<div class="controls">statistic <select id="ex-stat"></select> head view <select id="ex-head"></select></div>
<div class="explorer"><div class="map" id="ex-map"></div><div class="panel" id="ex-panel">
<p class="muted">Click a cell to select its pair.</p></div></div>
<div id="ex-views"></div>
<script type="application/json" id="explorer-data">{data}</script>
<script>{_SCRIPT}</script>"""


_SCRIPT = r"""
(function () {
  var D = JSON.parse(document.getElementById('explorer-data').textContent);
  var H = D.H, P = D.w.length, root = document.documentElement;
  var tip = document.getElementById('tip'), map = document.getElementById('ex-map');
  var panel = document.getElementById('ex-panel'), views = document.getElementById('ex-views');
  var statSel = document.getElementById('ex-stat'), headSel = document.getElementById('ex-head');
  var byKey = {};
  D.stats.forEach(function (s) { byKey[s.key] = s; var o = document.createElement('option');
    o.value = s.key; o.textContent = s.title; statSel.appendChild(o); });
  for (var i = 0; i < D.L * H; i++) { var o = document.createElement('option');
    o.value = i; o.textContent = hl(i); headSel.appendChild(o); }
  function hl(i) { return Math.floor(i / H) + '.' + (i % H); }
  function f(x, d) { if (x === null || x === undefined) return '\u2013'; return (+x).toFixed(d === undefined ? 3 : d); }
  function fq(q) { if (q === null) return '\u2013'; if (q === 0) return '<1e-300'; return q >= 0.01 ? q.toFixed(2) : q.toExponential(1); }
  function iv(x, lo, hi, d) { return (lo === null || lo === hi) ? f(x, d) : f(x, d) + ' [' + f(lo, d) + ', ' + f(hi, d) + ']'; }
  function esc(t) { return String(t).replace(/&/g, '&amp;').replace(/</g, '&lt;'); }
  function shown(st, v) { return st.log2 ? Math.log2(v) : v; }
  function valueText(st, v) {
    if (v === null) return 'no value';
    if (st.cats) return st.cats[v] ? st.cats[v][0] : 'no value';
    return st.log2 ? '\u00d7' + (+v).toPrecision(3) : (+v).toPrecision(4);
  }
  function colour(st, p) {
    var v = D.values[st.key][p];
    if (v === null) return null;
    if (st.cats) return st.cats[v] ? st.cats[v][1] : null;
    if (D.undecided[st.key] && D.undecided[st.key][p]) return D.grey;
    var x = Math.min(st.hi, Math.max(st.lo, shown(st, v)));
    var t = (x - (st.centre - st.hw)) / (2 * st.hw);
    return D.lut[Math.max(0, Math.min(D.lut.length - 1, Math.round(t * (D.lut.length - 1))))];
  }
  function hover(st, p) {
    var lines = ['<b>writer ' + hl(D.w[p]) + ' \u2192 responder ' + hl(D.r[p]) + '</b>',
                 esc(st.title) + ': ' + esc(valueText(st, D.values[st.key][p]))];
    if (D.undecided[st.key] && D.undecided[st.key][p]) lines.push('interval contains the null (grey)');
    if (D.s[p]) {
      lines.push('label: ' + esc(D.labels[D.lab[p]] || 'not computed') + ' \u00b7 q ' + fq(D.q[p]) +
                 ' \u00b7 rows ' + D.rows[p] + ' of ' + D.n);
      lines.push('mean percentile ' + iv(D.mp[p], D.mlo[p], D.mhi[p]));
      if (D.signs[p]) lines.push(esc(D.predictions[D.pred[p]]) + ' (s_U s_QK s_R ' + D.signs[p] + ')');
    } else { lines.push('not scanned: model-space score only'); }
    return lines.join('<br>');
  }
  function draw(key) {
    var st = byKey[key], wl = st.wl, rl = st.rl;
    var rowOf = {}, colOf = {}, nr = wl.length * H, nc = rl.length * H;
    wl.forEach(function (l, a) { for (var h = 0; h < H; h++) rowOf[l * H + h] = a * H + h; });
    rl.forEach(function (l, a) { for (var h = 0; h < H; h++) colOf[l * H + h] = a * H + h; });
    var avail = Math.max(300, (map.clientWidth || 760) - 70);
    var c = Math.max(4, Math.min(20, Math.floor(avail / nc), Math.floor(900 / nr)));
    var every = c >= 13, left = every ? 40 : 34, top = every ? 36 : 34;
    var W = left + nc * c + 6, Ht = top + nr * c + 6, out = [];
    out.push('<svg width="' + W + '" height="' + Ht + '" font-size="' +
             (every ? 9 : 10) + '" font-family="DejaVu Sans Mono, monospace">');
    out.push('<rect x="' + left + '" y="' + top + '" width="' + nc * c + '" height="' + nr * c + '" fill="#fff" stroke="#c3cad4"/>');
    var n = 0;
    for (var p = 0; p < P; p++) {
      var row = rowOf[D.w[p]], col = colOf[D.r[p]];
      if (row === undefined || col === undefined) continue;
      var fill = colour(st, p);
      if (fill === null) continue;
      out.push('<rect class="c" data-p="' + p + '" x="' + (left + col * c) + '" y="' + (top + row * c) +
               '" width="' + c + '" height="' + c + '" fill="' + fill + '"/>');
      n += 1;
    }
    wl.forEach(function (l, a) {
      if (a) out.push('<line x1="' + left + '" x2="' + (left + nc * c) + '" y1="' + (top + a * H * c) + '" y2="' + (top + a * H * c) + '" stroke="#2f3a48"/>');
      if (every) { for (var h = 0; h < H; h++) out.push('<text x="' + (left - 3) + '" y="' + (top + (a * H + h + 0.75) * c) + '" text-anchor="end">' + l + '.' + h + '</text>'); }
      else out.push('<text x="' + (left - 3) + '" y="' + (top + (a + 0.5) * H * c + 4) + '" text-anchor="end">L' + l + '</text>');
    });
    rl.forEach(function (l, a) {
      if (a) out.push('<line y1="' + top + '" y2="' + (top + nr * c) + '" x1="' + (left + a * H * c) + '" x2="' + (left + a * H * c) + '" stroke="#2f3a48"/>');
      if (every) { for (var h = 0; h < H; h++) { var x = left + (a * H + h + 0.7) * c; out.push('<text transform="translate(' + x + ',' + (top - 3) + ') rotate(-90)">' + l + '.' + h + '</text>'); } }
      else out.push('<text x="' + (left + (a + 0.5) * H * c) + '" y="' + (top - 6) + '" text-anchor="middle">L' + l + '</text>');
    });
    out.push('<text x="' + left + '" y="11" fill="#566273" font-family="DejaVu Sans, sans-serif">responder \u2192 (across) \u00b7 writer \u2193 (down)' + (every ? '' : ' \u00b7 L = layer; hover for layer.head') + '</text>');
    out.push('</svg>');
    map.innerHTML = out.join('');
    map.dataset.key = key;
    root.setAttribute('data-explorer-stat', key);
    root.setAttribute('data-explorer-cells', n);
    return n;
  }
  map.addEventListener('mousemove', function (ev) {
    var p = ev.target.dataset ? ev.target.dataset.p : undefined;
    if (p === undefined) { tip.style.display = 'none'; return; }
    tip.innerHTML = hover(byKey[map.dataset.key], +p);
    tip.style.display = 'block';
    tip.style.left = Math.min(window.innerWidth - 430, ev.clientX + 14) + 'px';
    tip.style.top = (ev.clientY + 14) + 'px';
  });
  map.addEventListener('mouseleave', function () { tip.style.display = 'none'; });
  map.addEventListener('click', function (ev) { var p = ev.target.dataset ? ev.target.dataset.p : undefined;
    if (p !== undefined) select(+p); });
  function histogram(h) {
    var n = h.reduce(function (a, b) { return a + b; }, 0) || 1, W = 320, Hh = 120, b = h.length, bw = (W - 30) / b;
    var mx = Math.max.apply(null, h.map(function (x) { return x / n; }).concat([2 / b]));
    var out = ['<svg width="' + W + '" height="' + (Hh + 24) + '" font-size="9" font-family="DejaVu Sans, sans-serif">'];
    h.forEach(function (x, i) { var y = (x / n) / mx * Hh;
      out.push('<rect x="' + (24 + i * bw) + '" y="' + (Hh - y + 4) + '" width="' + (bw - 1) + '" height="' + y +
               '" fill="' + ((i + 0.5) / b < 0.5 ? D.lut[40] : D.lut[215]) + '"/>'); });
    var ny = Hh - (1 / b) / mx * Hh + 4;
    out.push('<line x1="24" x2="' + (W - 6) + '" y1="' + ny + '" y2="' + ny + '" stroke="#1d2733" stroke-dasharray="3,2"/>');
    out.push('<text x="24" y="' + (Hh + 18) + '">0</text><text x="' + (W - 12) + '" y="' + (Hh + 18) + '">1</text>');
    out.push('<text x="' + (W / 2 - 40) + '" y="' + (Hh + 18) + '">percentile (1 = top)</text></svg>');
    return out.join('');
  }
  function select(p) {
    var k = D.k, rows = [];
    rows.push('<b>writer ' + hl(D.w[p]) + ' \u2192 responder ' + hl(D.r[p]) + '</b>');
    if (D.s[p]) {
      rows.push('label: ' + esc(D.labels[D.lab[p]] || 'not computed') + ' \u00b7 q ' + fq(D.q[p]));
      rows.push('rows evaluated: ' + D.rows[p] + ' of ' + D.n + (D.seed === null ? ' (exact)' : ' \u00b7 seed ' + D.seed + ' \u00b7 looks ' + D.looks));
      rows.push('mean percentile: ' + iv(D.mp[p], D.mlo[p], D.mhi[p]));
      rows.push('top-' + k + ' share: ' + iv(D.top[p], D.tlo[p], D.thi[p], 4) + ' (null ' + (k / D.n).toPrecision(3) + ')');
      rows.push('bottom-' + k + ' share: ' + iv(D.bot[p], D.blo[p], D.bhi[p], 4));
      if (D.signs[p]) rows.push('prediction: ' + esc(D.predictions[D.pred[p]]) + ' (s_U s_QK s_R ' + D.signs[p] + ')');
    } else rows.push('not scanned: model-space scores only');
    D.stats.forEach(function (st) { if (!st.cats && st.source === 'model') rows.push(esc(st.title) + ': ' + esc(valueText(st, D.values[st.key][p]))); });
    panel.innerHTML = rows.join('<br>') + (D.s[p] && D.hist[p] ? '<div>' + histogram(D.hist[p]) + '</div>' : '');
    panel.dataset.p = p;
    headSel.value = D.r[p];
    headView(D.r[p], D.w[p]);
  }
  function chart(title, ps, other) {
    if (!ps.length) return '<p class="muted">' + esc(title) + ': no scanned pair.</p>';
    var step = Math.max(5, Math.min(14, Math.floor(1000 / ps.length))), W = 50 + ps.length * step, Hc = 150, top = 8;
    var y = function (v) { return top + (1 - v) * Hc; };
    var out = ['<div class="muted">' + esc(title) + '</div><svg width="' + W + '" height="' + (Hc + 46) + '" font-size="8" font-family="DejaVu Sans Mono, monospace">'];
    out.push('<rect x="40" width="' + (W - 40) + '" y="' + y(0.5 + D.min_effect) + '" height="' + (y(0.5 - D.min_effect) - y(0.5 + D.min_effect)) + '" fill="#eef0f3"/>');
    out.push('<line x1="40" x2="' + W + '" y1="' + y(0.5) + '" y2="' + y(0.5) + '" stroke="#1d2733"/>');
    [0, 0.5, 1].forEach(function (t) { out.push('<text x="36" y="' + (y(t) + 3) + '" text-anchor="end">' + t + '</text>'); });
    ps.forEach(function (p, i) {
      var x = 44 + (i + 0.5) * step, col = D.lab[p] === 1 ? D.lut[230] : (D.lab[p] === -1 ? D.lut[25] : '#8a94a3');
      if (D.mlo[p] !== null && D.mlo[p] !== D.mhi[p]) out.push('<line x1="' + x + '" x2="' + x + '" y1="' + y(D.mlo[p]) + '" y2="' + y(D.mhi[p]) + '" stroke="#5b6675"/>');
      out.push('<circle class="v" data-p="' + p + '" cx="' + x + '" cy="' + y(D.mp[p]) + '" r="3" fill="' + col + '" stroke="#2f3a48" stroke-width="0.4"/>');
      if (step >= 9) out.push('<text transform="translate(' + (x + 3) + ',' + (Hc + top + 6) + ') rotate(90)">' + hl(other(p)) + '</text>');
    });
    out.push('</svg>');
    return out.join('');
  }
  function headView(responder, writer) {
    var asR = [], asW = [];
    for (var p = 0; p < P; p++) { if (!D.s[p]) continue; if (D.r[p] === responder) asR.push(p); if (D.w[p] === writer) asW.push(p); }
    views.innerHTML = chart('Responder ' + hl(responder) + ': mean percentile against every writer (95 % intervals)', asR, function (p) { return D.w[p]; }) +
                      chart('Writer ' + hl(writer) + ': mean percentile against every responder (95 % intervals)', asW, function (p) { return D.r[p]; });
  }
  views.addEventListener('mousemove', function (ev) {
    var p = ev.target.dataset ? ev.target.dataset.p : undefined;
    if (p === undefined) { tip.style.display = 'none'; return; }
    tip.innerHTML = hover(byKey.mean_percentile || D.stats[0], +p); tip.style.display = 'block';
    tip.style.left = Math.min(window.innerWidth - 430, ev.clientX + 14) + 'px'; tip.style.top = (ev.clientY + 14) + 'px';
  });
  views.addEventListener('click', function (ev) { var p = ev.target.dataset ? ev.target.dataset.p : undefined; if (p !== undefined) select(+p); });
  // hover on the static heatmap images: the PNG's data area is known (data-extent), so a
  // pointer position maps to a cell
  var at = {}, LH = D.L * H;
  for (var p = 0; p < P; p++) at[D.w[p] * LH + D.r[p]] = p;
  document.addEventListener('DOMContentLoaded', function () {  // the figures come after this script
  var hoverImgs = document.querySelectorAll('img[data-hover]');
  hoverImgs.forEach(function (img) {
    var ext = img.dataset.extent.split(',').map(Number), st = byKey[img.dataset.hover];
    var wl = img.dataset.wl.split(',').map(Number), rl = img.dataset.rl.split(',').map(Number);
    if (!st) return;
    img.addEventListener('mousemove', function (ev) {
      var b = img.getBoundingClientRect();
      var fx = ((ev.clientX - b.left) / b.width - ext[0]) / (ext[2] - ext[0]);
      var fy = ((ev.clientY - b.top) / b.height - ext[1]) / (ext[3] - ext[1]);
      var col = Math.floor(fx * rl.length * H), row = Math.floor(fy * wl.length * H), p;
      if (fx >= 0 && fx < 1 && fy >= 0 && fy < 1) {
        var w = wl[Math.floor(row / H)] * H + row % H, r = rl[Math.floor(col / H)] * H + col % H;
        p = at[w * LH + r];
      }
      if (p === undefined || D.values[st.key][p] === null) { tip.style.display = 'none'; img.style.cursor = ''; return; }
      img.style.cursor = 'crosshair';
      tip.innerHTML = hover(st, p); tip.style.display = 'block';
      tip.style.left = Math.min(window.innerWidth - 430, ev.clientX + 14) + 'px'; tip.style.top = (ev.clientY + 14) + 'px';
    });
    img.addEventListener('mouseleave', function () { tip.style.display = 'none'; });
    img.addEventListener('click', function (ev) {
      if (tip.style.display !== 'block') return;
      var m = /writer (\d+)\.(\d+) \u2192 responder (\d+)\.(\d+)/.exec(tip.textContent);
      if (m) { select(at[(+m[1] * H + +m[2]) * LH + +m[3] * H + +m[4]]);
               document.getElementById('explorer').scrollIntoView(); }
    });
  });
  root.setAttribute('data-hover-images', hoverImgs.length);
  });
  statSel.addEventListener('change', function () { draw(statSel.value); });
  headSel.addEventListener('change', function () { headView(+headSel.value, +headSel.value); });
  // self-check for the browser test: every drawable cell of every statistic has hover text
  var complete = true, expected = {};
  D.stats.forEach(function (st) {
    var m = 0, wl = {}, rl = {};
    st.wl.forEach(function (l) { wl[l] = 1; }); st.rl.forEach(function (l) { rl[l] = 1; });
    for (var p = 0; p < P; p++) {
      if (D.values[st.key][p] === null || !wl[Math.floor(D.w[p] / H)] || !rl[Math.floor(D.r[p] / H)]) continue;
      if (colour(st, p) === null) continue;
      m += 1;
      if (hover(st, p).indexOf('writer ' + hl(D.w[p])) < 0) complete = false;
    }
    expected[st.key] = m;
  });
  root.setAttribute('data-explorer-expected', JSON.stringify(expected));
  root.setAttribute('data-hover-complete', complete);
  var first = D.stats[0].key;
  draw(first);
  var best = -1, eff = -1;
  for (var p = 0; p < P; p++) if (D.s[p] && (D.lab[p] === 1 || D.lab[p] === -1) && Math.abs(D.mp[p] - 0.5) > eff) { eff = Math.abs(D.mp[p] - 0.5); best = p; }
  if (best < 0) for (var p = 0; p < P; p++) if (D.s[p]) { best = p; break; }
  if (best >= 0) select(best);
  var cell = map.querySelector('rect.c');
  if (cell) { cell.dispatchEvent(new MouseEvent('mousemove', {bubbles: true, clientX: 10, clientY: 10}));
    root.setAttribute('data-hover-sample', tip.textContent); tip.style.display = 'none'; }
})();
"""
