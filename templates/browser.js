/* grouplevel slice browser: plain JavaScript on canvases, data from the page only.
   The data block (#sb-data) holds deflated, base64-encoded arrays in canonical RAS
   order (x left->right, y posterior->anterior, z ventral->dorsal); see
   grouplevel/report/browser.py. Names are only ever written with textContent or drawn
   on a canvas, never parsed as HTML. */
(function () {
  "use strict";

  var source = document.getElementById("sb-data");
  var status = document.getElementById("sb-status");
  if (!source || !status) { return; }
  var data = JSON.parse(source.textContent);

  var PLANES = {
    coronal: { fixed: 1, h: 0, v: 2, word: "AP", hLow: "L", hHigh: "R", vLow: "V", vHigh: "D" },
    sagittal: { fixed: 0, h: 1, v: 2, word: "ML", hLow: "P", hHigh: "A", vLow: "V", vHigh: "D" },
    axial: { fixed: 2, h: 0, v: 1, word: "DV", hLow: "L", hHigh: "R", vLow: "P", vHigh: "A" }
  };
  var AXIS_WORD = ["ML", "AP", "DV"];
  var OUTLINE = "rgba(245, 240, 215, 0.85)";
  var CURSOR = "#ffffff";  /* white over a black rim: visible on grey and on both hues */
  var ACCENT = "#3a6ea5";
  var MAX_WIDTH = 720;
  var MAX_HEIGHT = 520;
  var MISSING = -32768;

  var el = function (id) { return document.getElementById(id); };
  var ui = {
    body: el("sb-body"), result: el("sb-result"), slice: el("sb-slice"),
    sliceText: el("sb-slice-mm"), threshold: el("sb-threshold"),
    thresholdText: el("sb-threshold-value"), survivors: el("sb-survivors"),
    survivorsWords: el("sb-survivors-words"), outlines: el("sb-outlines"),
    canvas: el("sb-canvas"), bar: el("sb-colourbar"), pos: el("sb-pos"),
    region: el("sb-region"), z: el("sb-z"), effect: el("sb-effect"), p: el("sb-p"),
    readoutTitle: el("sb-readout-title"), forest: el("sb-forest"),
    animalsTable: el("sb-animals-table"), animalsNote: el("sb-animals-note"),
    shown: el("sb-shown")
  };

  function bytes(b64) {
    var text = atob(b64);
    var out = new Uint8Array(text.length);
    for (var i = 0; i < text.length; i++) { out[i] = text.charCodeAt(i); }
    return out;
  }

  function inflate(b64) {
    var stream = new Blob([bytes(b64)]).stream().pipeThrough(new DecompressionStream("deflate"));
    return new Response(stream).arrayBuffer();
  }

  function fmt(v) {
    if (!Number.isFinite(v)) { return "—"; }
    var a = Math.abs(v);
    if (a !== 0 && (a >= 1e4 || a < 1e-3)) { return v.toExponential(3); }
    return v.toPrecision(4);
  }

  function fmtP(p) {
    if (!Number.isFinite(p)) { return "—"; }
    return p < 1e-3 ? p.toExponential(2) : p.toFixed(4);
  }

  /* Two-sided p of a normal deviate, erfc(|z|/sqrt 2), by the Chebyshev fit of erfc
     with fractional error below 1.2e-7 everywhere (Press, Teukolsky, Vetterling &
     Flannery 1992, Numerical Recipes in C, 2nd ed., section 6.2, erfcc). The z map has
     the same two-sided p as the t map (grouplevel writes z so), so p needs no array. */
  function twoSidedP(z) {
    var x = Math.abs(z) / Math.SQRT2, t = 1 / (1 + 0.5 * x);
    return t * Math.exp(-x * x - 1.26551223 + t * (1.00002368 + t * (0.37409196 +
      t * (0.09678418 + t * (-0.18628806 + t * (0.27886807 + t * (-1.13520398 +
      t * (1.48851587 + t * (-0.82215223 + t * 0.17087277)))))))));
  }

  function signed(v) { return (v >= 0 ? "+" : "-") + Math.abs(v).toFixed(2); }

  var shape = data.shape, nx = shape[0], ny = shape[1], nz = shape[2];
  var A = data.affine;
  var grey = null, labels = null, results = [];
  var state = { r: 0, plane: "coronal", slice: [0, 0, 0], cursor: [0, 0, 0], hover: null };

  function index(i, j, k) { return (i * ny + j) * nz + k; }

  function world(ijk) {
    var out = [0, 0, 0];
    for (var a = 0; a < 3; a++) {
      out[a] = A[a][0] * ijk[0] + A[a][1] * ijk[1] + A[a][2] * ijk[2] + A[a][3];
    }
    return out;
  }

  /* AP, ML, DV from the origin (grouplevel.anatomy.coordinates.to_stereotaxic). */
  function stereotaxic(ijk) {
    var mm = world(ijk), o = data.origin;
    return [mm[1] - o[1], mm[0] - o[0], mm[2] - o[2]];
  }

  function axisStep(a) { return Math.hypot(A[0][a], A[1][a], A[2][a]); }

  function load() {
    var jobs = [inflate(data.grey).then(function (b) { grey = new Uint8Array(b); })];
    if (data.labels) {
      jobs.push(inflate(data.labels).then(function (b) { labels = new Uint16Array(b); }));
    }
    data.results.forEach(function (r, n) {
      var res = { spec: r, animals: null };
      results[n] = res;
      jobs.push(inflate(r.mask).then(function (b) { res.mask = new Uint8Array(b); }));
      ["z", "effect"].forEach(function (key) {
        jobs.push(inflate(r[key]).then(function (b) { res[key] = new Float32Array(b); }));
      });
      jobs.push(inflate(r.survive).then(function (b) { res.survive = new Uint8Array(b); }));
      if (r.animals) {
        var an = { spec: r.animals };
        res.animals = an;
        jobs.push(inflate(r.animals.effect).then(function (b) { an.effect = new Int16Array(b); }));
        jobs.push(inflate(r.animals.se).then(function (b) { an.se = new Int16Array(b); }));
        jobs.push(inflate(r.animals.runs).then(function (b) { an.runs = new Uint8Array(b); }));
        an.firstRun = [];
        r.animals.run_labels.reduce(function (n, labels) { an.firstRun.push(n); return n + labels.length; }, 0);
        if (r.animals.run_values) {
          jobs.push(inflate(r.animals.run_values).then(function (b) { an.values = new Int16Array(b); }));
        }
      }
    });
    return Promise.all(jobs).then(function () {
      results.forEach(function (res) {
        res.position = new Int32Array(nx * ny * nz).fill(-1);
        var n = 0, peak = -1, best = -1;
        for (var g = 0; g < res.mask.length; g++) {
          if (res.mask[g]) {
            res.position[g] = n;
            var a = Math.abs(res.z[n]);
            if (a > best) { best = a; peak = g; }
            n++;
          }
        }
        res.peak = peak;
      });
    });
  }

  function fromIndex(g) {
    var k = g % nz, rest = (g - k) / nz, j = rest % ny, i = (rest - j) / ny;
    return [i, j, k];
  }

  function planeSize(plane) {
    var P = PLANES[plane];
    return [shape[P.h], shape[P.v]];
  }

  /* voxel of the plane's pixel (h, v) with v counted from the bottom */
  function voxelAt(plane, h, v) {
    var P = PLANES[plane], ijk = [0, 0, 0];
    ijk[P.fixed] = state.slice[P.fixed];
    ijk[P.h] = h;
    ijk[P.v] = v;
    return ijk;
  }

  function visible(res, n) {
    if (n < 0) { return false; }
    var z = res.z[n];
    if (!Number.isFinite(z) || Math.abs(z) < Number(ui.threshold.value)) { return false; }
    return !ui.survivors.checked || res.survive[n] === 1;
  }

  function colour(res, z) {
    /* the shown range of |z| (threshold to the largest) onto each half of the signed
       scale, as in the static figures: the weakest shown value gets the deepest colour */
    var zmax = res.spec.zmax || 1;
    var low = Math.min(Number(ui.threshold.value) || 0, zmax);
    var share = Math.max(0, Math.min(1, (Math.abs(z) - low) / Math.max(zmax - low, 1e-9)));
    var t = 0.5 + 0.5 * (z < 0 ? -share : share);
    return data.lut[Math.round(t * (data.lut.length - 1))];
  }

  function draw() {
    var res = results[state.r], P = PLANES[state.plane];
    var size = planeSize(state.plane), nh = size[0], nv = size[1];
    var sh = axisStep(P.h), sv = axisStep(P.v);
    var width = Math.min(MAX_WIDTH, Math.max(240, ui.body.clientWidth - 8));
    var scale = Math.min(width / (nh * sh), MAX_HEIGHT / (nv * sv));
    var cw = Math.max(1, Math.round(nh * sh * scale)), ch = Math.max(1, Math.round(nv * sv * scale));
    var canvas = ui.canvas;
    if (canvas.width !== cw || canvas.height !== ch) { canvas.width = cw; canvas.height = ch; }
    var off = document.createElement("canvas");
    off.width = nh; off.height = nv;
    var octx = off.getContext("2d");
    var img = octx.createImageData(nh, nv);
    var shown = 0;
    for (var v = 0; v < nv; v++) {
      for (var h = 0; h < nh; h++) {
        var ijk = voxelAt(state.plane, h, v);
        var g = index(ijk[0], ijk[1], ijk[2]);
        var o = 4 * ((nv - 1 - v) * nh + h);
        var n = res.position[g], rgb;
        if (visible(res, n)) { rgb = colour(res, res.z[n]); shown++; } else {
          var gv = grey[g];
          rgb = [gv, gv, gv];
        }
        img.data[o] = rgb[0]; img.data[o + 1] = rgb[1]; img.data[o + 2] = rgb[2];
        img.data[o + 3] = 255;
      }
    }
    octx.putImageData(img, 0, 0);
    var ctx = canvas.getContext("2d");
    ctx.imageSmoothingEnabled = false;
    ctx.drawImage(off, 0, 0, cw, ch);
    var px = cw / nh, py = ch / nv;
    if (labels && ui.outlines.checked) { drawOutlines(ctx, nh, nv, px, py); }
    drawCursor(ctx, px, py, nv);
    drawOrientation(ctx, cw, ch, P);
    ui.shown.textContent = shown + " voxel" + (shown === 1 ? "" : "s") +
      " coloured in this slice (|z| ≥ " + Number(ui.threshold.value).toFixed(2) +
      (ui.survivors.checked ? ", surviving " + res.spec.threshold : ", uncorrected") + ").";
  }

  function drawOutlines(ctx, nh, nv, px, py) {
    ctx.beginPath();
    for (var v = 0; v < nv; v++) {
      for (var h = 0; h < nh; h++) {
        var a = voxelAt(state.plane, h, v), la = labels[index(a[0], a[1], a[2])];
        var y0 = (nv - 1 - v) * py;
        if (h + 1 < nh) {
          var b = voxelAt(state.plane, h + 1, v);
          if (labels[index(b[0], b[1], b[2])] !== la) {
            ctx.moveTo((h + 1) * px, y0); ctx.lineTo((h + 1) * px, y0 + py);
          }
        }
        if (v + 1 < nv) {
          var c = voxelAt(state.plane, h, v + 1);
          if (labels[index(c[0], c[1], c[2])] !== la) {
            ctx.moveTo(h * px, y0); ctx.lineTo((h + 1) * px, y0);
          }
        }
      }
    }
    ctx.strokeStyle = OUTLINE;
    ctx.lineWidth = 1;
    ctx.stroke();
  }

  function drawCursor(ctx, px, py, nv) {
    var P = PLANES[state.plane], c = state.cursor;
    if (c[P.fixed] !== state.slice[P.fixed]) { return; }
    var x = (c[P.h] + 0.5) * px, y = (nv - 1 - c[P.v] + 0.5) * py;
    ctx.lineWidth = 3;
    ctx.strokeStyle = "#000000";
    ctx.strokeRect(x - px / 2 - 2, y - py / 2 - 2, px + 4, py + 4);
    ctx.lineWidth = 1.5;
    ctx.strokeStyle = CURSOR;
    ctx.strokeRect(x - px / 2 - 2, y - py / 2 - 2, px + 4, py + 4);
  }

  function drawOrientation(ctx, cw, ch, P) {
    ctx.font = "12px sans-serif";
    ctx.fillStyle = "#ffffff";
    ctx.textBaseline = "middle";
    ctx.textAlign = "left"; ctx.fillText(P.hLow, 4, ch / 2);
    ctx.textAlign = "right"; ctx.fillText(P.hHigh, cw - 4, ch / 2);
    ctx.textAlign = "center";
    ctx.textBaseline = "top"; ctx.fillText(P.vHigh, cw / 2, 3);
    ctx.textBaseline = "bottom"; ctx.fillText(P.vLow, cw / 2, ch - 3);
  }

  function drawBar() {
    var res = results[state.r], canvas = ui.bar, ctx = canvas.getContext("2d");
    var w = canvas.width, h = canvas.height, barH = 12;
    ctx.clearRect(0, 0, w, h);
    for (var x = 0; x < w; x++) {
      var rgb = data.lut[Math.round(x / (w - 1) * (data.lut.length - 1))];
      ctx.fillStyle = "rgb(" + rgb[0] + "," + rgb[1] + "," + rgb[2] + ")";
      ctx.fillRect(x, 0, 1, barH);
    }
    ctx.fillStyle = "#1f2328";
    ctx.font = "11px sans-serif";
    ctx.textBaseline = "top";
    var zmax = res.spec.zmax;
    ctx.textAlign = "left"; ctx.fillText("z " + (-zmax).toFixed(1), 0, barH + 2);
    var low = Math.min(Number(ui.threshold.value) || 0, zmax);
    ctx.textAlign = "center";
    ctx.fillText(low > 0 ? "\u00b1" + low.toFixed(1) : "0", w / 2, barH + 2);
    ctx.textAlign = "right"; ctx.fillText(zmax.toFixed(1), w, barH + 2);
  }

  function regionText(g) {
    if (!labels) { return "no atlas"; }
    var entry = data.regions[labels[g]];
    if (!entry || !entry[0]) { return "no atlas label here"; }
    return entry[1] ? entry[0] + " (" + entry[1] + ")" : entry[0];
  }

  function readout(ijk, title) {
    var res = results[state.r], g = index(ijk[0], ijk[1], ijk[2]), n = res.position[g];
    var s = stereotaxic(ijk);
    ui.readoutTitle.textContent = title;
    ui.pos.textContent = "AP " + signed(s[0]) + ", ML " + signed(s[1]) + ", DV " +
      signed(s[2]) + " mm from " + data.origin_name;
    ui.region.textContent = regionText(g);
    if (n < 0) {
      ui.z.textContent = "outside the analysis mask";
      ui.effect.textContent = "—";
      ui.p.textContent = "—";
      return;
    }
    ui.z.textContent = fmt(res.z[n]) + (res.survive[n] ? " (survives " + res.spec.threshold + ")" : "");
    ui.effect.textContent = fmt(res.effect[n]);
    ui.p.textContent = fmtP(twoSidedP(res.z[n])) + " (two-sided, uncorrected)";
  }

  function animalRows(res, n) {
    var an = res.animals, V = res.spec.voxels, rows = [];
    an.spec.ids.forEach(function (id, a) {
      var qe = an.effect[a * V + n], qs = an.se[a * V + n];
      var labels = an.spec.run_labels[a] || [], values = null;
      if (an.values) {
        values = labels.map(function (_, k) {
          var r = an.firstRun[a] + k, q = an.values[r * V + n];
          return q === MISSING ? NaN : q * an.spec.run_scale[r];
        });
      }
      rows.push({
        id: id,
        effect: qe === MISSING ? NaN : qe * an.spec.effect_scale[a],
        se: qs === MISSING ? NaN : qs * an.spec.se_scale[a],
        runs: an.runs[a * V + n],
        labels: labels,
        values: values
      });
    });
    return rows;
  }

  function showAnimals() {
    var res = results[state.r], c = state.cursor;
    var g = index(c[0], c[1], c[2]), n = res.position[g];
    var body = ui.animalsTable.tBodies[0];
    while (body.firstChild) { body.removeChild(body.firstChild); }
    var ctx = ui.forest.getContext("2d");
    ctx.clearRect(0, 0, ui.forest.width, ui.forest.height);
    var none = res.spec.animals_left_out ? "The per-animal estimates of this result are " +
      "too large for the page; they are in its folder's animal_*.nii.gz maps." :
      !res.animals ? "This result has no per-animal estimates in its folder." :
      n < 0 ? "The selected voxel is outside the analysis mask." : "";
    ui.forest.hidden = ui.animalsTable.hidden = Boolean(none);
    if (none) {
      ui.animalsNote.textContent = none;
      return;
    }
    var s = stereotaxic(c);
    ui.animalsNote.textContent = "At AP " + signed(s[0]) + ", ML " + signed(s[1]) + ", DV " +
      signed(s[2]) + " mm (" + regionText(g) + "): " + res.animals.spec.what +
      ", ± 1.96 SE; the vertical line is the group effect there (" + fmt(res.effect[n]) + ")." +
      (res.animals.values ? " Rings: each run's own value." :
        " Each run's own value is not kept for a study this size (the folder keeps it only " +
        "for small studies): the table lists each animal's runs and how many have data here.");
    var rows = animalRows(res, n);
    rows.forEach(function (row) {
      var tr = document.createElement("tr");
      var th = document.createElement("th");
      th.scope = "row";
      th.textContent = row.id;
      tr.appendChild(th);
      var total = row.labels.length;
      var runs = row.labels.map(function (label, k) {
        return row.values ? label + ": " + (Number.isFinite(row.values[k]) ? fmt(row.values[k]) : "no data") : label;
      });
      [fmt(row.effect), fmt(row.se), row.runs + " of " + total, runs.join("; ")]
        .forEach(function (text, col) {
          var td = document.createElement("td");
          td.textContent = text;
          if (col < 3) { td.className = "num"; }
          tr.appendChild(td);
        });
      body.appendChild(tr);
    });
    drawForest(rows, res.effect[n]);
  }

  function niceTicks(lo, hi) {
    var span = hi - lo, raw = span / 4, mag = Math.pow(10, Math.floor(Math.log10(raw)));
    var step = [1, 2, 5, 10].map(function (m) { return m * mag; })
      .find(function (s) { return s >= raw; });
    var out = [];
    for (var t = Math.ceil(lo / step) * step; t <= hi + 1e-12; t += step) { out.push(t); }
    return out;
  }

  function drawForest(rows, group) {
    var canvas = ui.forest, rowH = 18, left = 70, right = 12, top = 8, bottom = 34;
    canvas.height = top + bottom + rowH * rows.length;
    var ctx = canvas.getContext("2d"), w = canvas.width;
    ctx.clearRect(0, 0, w, canvas.height);
    var lo = Math.min(0, group), hi = Math.max(0, group);
    rows.forEach(function (r) {
      if (Number.isFinite(r.effect)) {
        var half = Number.isFinite(r.se) ? 1.96 * r.se : 0;
        lo = Math.min(lo, r.effect - half); hi = Math.max(hi, r.effect + half);
      }
      (r.values || []).forEach(function (v) {
        if (Number.isFinite(v)) { lo = Math.min(lo, v); hi = Math.max(hi, v); }
      });
    });
    if (hi === lo) { hi = lo + 1; }
    var pad = 0.05 * (hi - lo);
    lo -= pad; hi += pad;
    var X = function (v) { return left + (v - lo) / (hi - lo) * (w - left - right); };
    var bottomY = top + rowH * rows.length;
    ctx.font = "11px sans-serif";
    ctx.strokeStyle = "#9aa3ad"; ctx.fillStyle = "#5b6470";
    ctx.textAlign = "center"; ctx.textBaseline = "top";
    niceTicks(lo, hi).forEach(function (t) {
      ctx.beginPath(); ctx.moveTo(X(t), bottomY); ctx.lineTo(X(t), bottomY + 4); ctx.stroke();
      ctx.fillText(String(Number(t.toPrecision(6))), X(t), bottomY + 6);
    });
    ctx.textAlign = "right";
    ctx.fillText("estimate (map units)", w - right, bottomY + 18);
    ctx.setLineDash([3, 3]);
    ctx.beginPath(); ctx.moveTo(X(0), top); ctx.lineTo(X(0), bottomY); ctx.stroke();
    ctx.setLineDash([]);
    ctx.strokeStyle = ACCENT; ctx.lineWidth = 2;
    ctx.beginPath(); ctx.moveTo(X(group), top); ctx.lineTo(X(group), bottomY); ctx.stroke();
    ctx.lineWidth = 1.5;
    rows.forEach(function (r, n) {
      var y = top + rowH * (n + 0.5);
      ctx.fillStyle = "#1f2328"; ctx.textAlign = "right"; ctx.textBaseline = "middle";
      ctx.fillText(r.id.length > 10 ? r.id.slice(0, 9) + "…" : r.id, left - 6, y);
      if (!Number.isFinite(r.effect)) {
        ctx.fillStyle = "#5b6470"; ctx.textAlign = "left";
        ctx.fillText("no data", left + 4, y);
        return;
      }
      if (Number.isFinite(r.se)) {
        ctx.strokeStyle = "#1f2328";
        ctx.beginPath();
        ctx.moveTo(X(r.effect - 1.96 * r.se), y); ctx.lineTo(X(r.effect + 1.96 * r.se), y);
        ctx.stroke();
      }
      ctx.strokeStyle = "#7a8591";
      ctx.lineWidth = 1;
      (r.values || []).forEach(function (v) {
        if (Number.isFinite(v)) { ctx.beginPath(); ctx.arc(X(v), y, 2.5, 0, 2 * Math.PI); ctx.stroke(); }
      });
      ctx.lineWidth = 1.5;
      ctx.fillStyle = "#1f2328";
      ctx.beginPath(); ctx.arc(X(r.effect), y, 3.5, 0, 2 * Math.PI); ctx.fill();
    });
  }

  function setSliceControl() {
    var P = PLANES[state.plane];
    ui.slice.max = String(shape[P.fixed] - 1);
    ui.slice.value = String(state.slice[P.fixed]);
    var c = [0, 0, 0];
    c[P.fixed] = state.slice[P.fixed];
    var s = stereotaxic(c);
    var word = PLANES[state.plane].word;
    var value = { AP: s[0], ML: s[1], DV: s[2] }[word];
    ui.sliceText.textContent = word + " " + signed(value) + " mm";
    ui.slice.setAttribute("aria-valuetext", word + " " + signed(value) + " millimetres");
  }

  function update(withAnimals) {
    setSliceControl();
    draw();
    readout(state.hover || state.cursor, state.hover ? "Under the pointer" : "Selected voxel");
    if (withAnimals) { showAnimals(); }
  }

  function select(ijk) {
    state.cursor = ijk.slice();
    state.slice = ijk.slice();
    update(true);
  }

  function pointerVoxel(evt) {
    var rect = ui.canvas.getBoundingClientRect(), size = planeSize(state.plane);
    var h = Math.floor((evt.clientX - rect.left) / rect.width * size[0]);
    var row = Math.floor((evt.clientY - rect.top) / rect.height * size[1]);
    if (h < 0 || row < 0 || h >= size[0] || row >= size[1]) { return null; }
    return voxelAt(state.plane, h, size[1] - 1 - row);
  }

  function chooseResult(n) {
    state.r = n;
    var res = results[n];
    ui.threshold.max = String(Math.ceil(res.spec.zmax * 10) / 10);
    if (Number(ui.threshold.value) > Number(ui.threshold.max)) { ui.threshold.value = "0"; }
    ui.thresholdText.textContent = Number(ui.threshold.value).toFixed(2);
    ui.survivorsWords.textContent = res.spec.threshold;
    drawBar();
    select(res.peak >= 0 ? fromIndex(res.peak) : state.cursor);
  }

  function wire() {
    data.results.forEach(function (r, n) {
      var opt = document.createElement("option");
      opt.value = String(n);
      opt.textContent = r.heading;
      ui.result.appendChild(opt);
    });
    ui.result.addEventListener("change", function () { chooseResult(Number(ui.result.value)); });
    Array.prototype.forEach.call(document.querySelectorAll("input[name=sb-plane]"), function (radio) {
      radio.addEventListener("change", function () {
        if (radio.checked) { state.plane = radio.value; state.hover = null; update(false); }
      });
    });
    ui.slice.addEventListener("input", function () {
      state.slice[PLANES[state.plane].fixed] = Number(ui.slice.value);
      update(false);
    });
    ui.threshold.addEventListener("input", function () {
      ui.thresholdText.textContent = Number(ui.threshold.value).toFixed(2);
      drawBar();
      draw();
    });
    ui.survivors.addEventListener("change", draw);
    ui.outlines.addEventListener("change", draw);
    ui.canvas.addEventListener("mousemove", function (evt) {
      var ijk = pointerVoxel(evt);
      state.hover = ijk;
      if (ijk) { readout(ijk, "Under the pointer"); }
    });
    ui.canvas.addEventListener("mouseleave", function () {
      state.hover = null;
      readout(state.cursor, "Selected voxel");
    });
    ui.canvas.addEventListener("click", function (evt) {
      var ijk = pointerVoxel(evt);
      if (ijk) { state.hover = null; select(ijk); }
    });
    ui.canvas.addEventListener("keydown", onKey);
    window.addEventListener("resize", function () { draw(); });
  }

  function onKey(evt) {
    var P = PLANES[state.plane], c = state.cursor.slice(), used = true;
    if (evt.key === "ArrowLeft") { c[P.h] -= 1; } else if (evt.key === "ArrowRight") { c[P.h] += 1; }
    else if (evt.key === "ArrowUp") { c[P.v] += 1; } else if (evt.key === "ArrowDown") { c[P.v] -= 1; }
    else if (evt.key === "PageUp") { c[P.fixed] += 1; } else if (evt.key === "PageDown") { c[P.fixed] -= 1; }
    else { used = false; }
    if (!used) { return; }
    evt.preventDefault();
    for (var a = 0; a < 3; a++) { c[a] = Math.max(0, Math.min(shape[a] - 1, c[a])); }
    state.hover = null;
    select(c);
  }

  if (typeof DecompressionStream === "undefined") {
    status.textContent = "This browser cannot unpack the slice browser's data (it needs " +
      "DecompressionStream, in every current browser); the static figures below show the maps.";
    return;
  }
  load().then(function () {
    ui.body.hidden = false;
    status.textContent = "Grid " + nx + " × " + ny + " × " + nz + " voxels of " +
      AXIS_WORD.map(function (w, a) { return axisStep(a).toFixed(3); }).join(" × ") +
      " mm over " + data.background + ".";
    wire();
    chooseResult(0);
    document.getElementById("slice-browser").setAttribute("data-ready", "true");
  }).catch(function (err) {
    status.textContent = "The slice browser could not unpack its data (" + err + ").";
  });
})();
