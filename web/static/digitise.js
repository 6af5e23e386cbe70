// The digitising page: the image on a canvas (zoom, move), the five steps, and the JSON API
// (/api/v1/plots/<id>/...) for every change, so the work is kept on the server as it goes.
// Coordinates: "image" pixels (px, py) as the server stores them; "screen" pixels are CSS
// pixels inside the canvas: screen = offset + image * scale.  The canvas carries the current
// scale and offset in data-scale, data-ox, data-oy (the browser test reads them).
(function () {
  "use strict";
  var root = document.getElementById("digi");
  if (!root) { return; }
  var canvas = document.getElementById("digi-canvas");
  var ctx = canvas.getContext("2d");
  var api = root.dataset.api;
  var csrf = root.dataset.csrf;
  var W = Number(root.dataset.width), H = Number(root.dataset.height);
  var statusEl = document.getElementById("digi-status");
  var errorEl = document.getElementById("digi-error");
  var COLOURS = ["#b3261e", "#1f5fa8", "#2d7d46", "#8a4fb8", "#c46a00", "#007a7a", "#6d5b00", "#b0337a"];
  var FIT_COLOUR = "#ffd000";

  var view = { scale: 1, ox: 0, oy: 0 };
  var img = new Image();
  var ready = false;
  var st = { marks: [], box: null, curves: [], axes: null, saved: null };
  var step = 1, selected = 0, boxCorner = null, drag = null, reach = 12;

  // -- talking to the server ------------------------------------------------------------------
  function call(method, path, body) {
    var opts = { method: method, credentials: "same-origin", headers: { "Accept": "application/json" } };
    if (method !== "GET") { opts.headers["X-CSRF-Token"] = csrf; }
    if (body !== undefined) { opts.headers["Content-Type"] = "application/json"; opts.body = JSON.stringify(body); }
    return fetch(api + path, opts).then(function (r) {
      return r.json().catch(function () { return {}; }).then(function (d) {
        if (!r.ok) {
          var e = (d.errors && d.errors[0]) || { message: "the server answered " + r.status };
          throw e;
        }
        return d;
      });
    });
  }
  // the API's field names in the page's words: marks[2].value -> mark 3 value
  function fieldWords(f) {
    return String(f).replace(/^marks\[(\d+)\]/, function (_, k) { return "mark " + (Number(k) + 1); })
      .replace(/^curves\[(\d+)\]/, function (_, k) { return "curve " + (Number(k) + 1); })
      .replace(/\.points\[(\d+)\]/, function (_, k) { return " point " + (Number(k) + 1); })
      .replace(".grid_v", " grid voltage").replace(".value", " value").replace(".px", " position")
      .replace(/^seed$/, "the click").replace(/^box$/, "plot area");
  }
  function problem(e) {
    var where = e.field ? fieldWords(e.field) + ": " : "";
    var text = where + (e.message || String(e));
    errorEl.textContent = text.charAt(0).toUpperCase() + text.slice(1);
  }
  function clearProblem() { errorEl.textContent = ""; }
  // the mark or curve whose "type its value" prompt the status line shows ({kind, i} or null):
  // typing the value answers it, and the line then says what was typed
  var asking = null;
  function say(text, ask) { statusEl.textContent = text; asking = ask || null; }
  function answered(kind, i, text) {
    if (asking && asking.kind === kind && asking.i === i) { say(text, asking); }
  }

  // every change goes out one at a time, in order, each with the state as it is when sent, so a
  // slow answer can never put older work back over newer
  var queue = Promise.resolve();
  function inTurn(fn) {
    var p = queue.then(fn, fn);
    queue = p.catch(function () { return null; });
    return p;
  }

  var timers = {};
  function later(key, fn, ms) {
    clearTimeout(timers[key]);
    timers[key] = setTimeout(fn, ms === undefined ? 350 : ms);
  }

  // marks the server can use: a value typed; `sent` remembers which local mark each is
  function completeMarks() {
    var out = [], idx = [];
    st.marks.forEach(function (m, i) {
      if (m.value !== "" && m.value !== null && isFinite(Number(m.value))) {
        out.push({ px: m.px, py: m.py, axis: m.axis, value: Number(m.value) });
        idx.push(i);
      }
    });
    return { marks: out, idx: idx };
  }
  function saveAxes() { return inTurn(sendAxes); }
  function saveCurves() { return inTurn(sendCurves); }
  function sendAxes() {
    var c = completeMarks();
    return call("PUT", "/axes", { marks: c.marks, box: st.box }).then(function (d) {
      clearProblem();
      st.axes = d.axes;
      st.residuals = {};
      if (d.axes) {
        c.idx.forEach(function (li, k) {
          st.residuals[li] = { off: d.axes.residuals[k], worst: d.axes.worst === k, exact: d.axes.exact[k] };
        });
      }
      st.counts = d.counts;
      mergeData(d.curves);
      updateMarks();
      draw();
    }, function (e) {
      var m = /^marks\[(\d+)\]/.exec(e.field || "");  // the server counts only the marks sent
      if (m) { e.field = "marks[" + c.idx[Number(m[1])] + "]" + e.field.slice(m[0].length); }
      e.message = String(e.message || "").replace(/marks\[(\d+)\]/g, function (_, k) {
        return "mark " + (c.idx[Number(k)] + 1);
      });
      problem(e);
    });
  }
  function curvesBody() {
    return st.curves.map(function (c) {
      var g = c.grid_v === "" || c.grid_v === null || c.grid_v === undefined ? null : Number(c.grid_v);
      var out = { grid_v: isFinite(g) ? g : null, points: c.points };
      if (c.seed) { out.seed = c.seed; }
      return out;
    });
  }
  function sendCurves() {
    return call("PUT", "/curves", { curves: curvesBody() }).then(function (d) {
      clearProblem();
      mergeData(d.curves);
      updateCurves();
    }, problem);
  }
  function mergeData(curves) {
    if (!curves) { return; }
    curves.forEach(function (c, i) { if (st.curves[i]) { st.curves[i].va = c.va; st.curves[i].ia_ma = c.ia_ma; } });
  }

  // -- the view -----------------------------------------------------------------------------
  function size() {
    var r = canvas.getBoundingClientRect();
    var dpr = window.devicePixelRatio || 1;
    canvas.width = Math.round(r.width * dpr);
    canvas.height = Math.round(r.height * dpr);
    ctx.setTransform(dpr, 0, 0, dpr, 0, 0);
  }
  function fit() {
    var r = canvas.getBoundingClientRect();
    var s = Math.min(r.width / W, r.height / H);
    view.scale = s;
    view.ox = (r.width - W * s) / 2;
    view.oy = (r.height - H * s) / 2;
    draw();
  }
  function zoomAt(factor, sx, sy) {
    var s = Math.max(0.05, Math.min(40, view.scale * factor));
    var ix = (sx - view.ox) / view.scale, iy = (sy - view.oy) / view.scale;
    view.scale = s;
    view.ox = sx - ix * s;
    view.oy = sy - iy * s;
    draw();
  }
  function toScreen(px, py) { return [view.ox + px * view.scale, view.oy + py * view.scale]; }
  function toImage(sx, sy) { return [(sx - view.ox) / view.scale, (sy - view.oy) / view.scale]; }
  function inImage(p) { return p[0] >= 0 && p[1] >= 0 && p[0] <= W && p[1] <= H; }

  function dot(x, y, r, fill, stroke) {
    ctx.beginPath();
    ctx.arc(x, y, r, 0, 2 * Math.PI);
    if (fill) { ctx.fillStyle = fill; ctx.fill(); }
    if (stroke) { ctx.strokeStyle = stroke; ctx.stroke(); }
  }
  function label(text, x, y, colour) {
    ctx.font = "600 13px system-ui, sans-serif";
    var w = ctx.measureText(text).width;
    ctx.fillStyle = "rgba(255,255,255,0.88)";
    ctx.fillRect(x - 2, y - 13, w + 4, 17);
    ctx.fillStyle = colour;
    ctx.fillText(text, x, y);
  }
  function draw() {
    var r = canvas.getBoundingClientRect();
    ctx.clearRect(0, 0, r.width, r.height);
    ctx.fillStyle = "#ece6da";
    ctx.fillRect(0, 0, r.width, r.height);
    canvas.dataset.scale = String(view.scale);
    canvas.dataset.ox = String(view.ox);
    canvas.dataset.oy = String(view.oy);
    document.getElementById("zoom-level").textContent = Math.round(view.scale * 100) + " %";
    if (!ready) { return; }
    ctx.imageSmoothingEnabled = view.scale < 2;
    ctx.drawImage(img, view.ox, view.oy, W * view.scale, H * view.scale);
    ctx.lineWidth = 1.5;
    // the plot area
    var b = st.box;
    if (b) {
      var a = toScreen(b[0], b[1]), c = toScreen(b[2], b[3]);
      ctx.setLineDash([8, 5]);
      ctx.strokeStyle = "#a65f00";
      ctx.lineWidth = 2;
      ctx.strokeRect(a[0], a[1], c[0] - a[0], c[1] - a[1]);
      ctx.setLineDash([]);
    }
    if (boxCorner) { var q = toScreen(boxCorner[0], boxCorner[1]); dot(q[0], q[1], 5, "#a65f00"); }
    // the fit, drawn back as a broad translucent band under the points: a point off the band
    // is a point the fit does not follow
    if (st.saved && st.saved.overlay) {
      ctx.lineWidth = 8;
      ctx.lineCap = "round";
      ctx.lineJoin = "round";
      ctx.strokeStyle = FIT_COLOUR;
      ctx.globalAlpha = 0.75;
      st.saved.overlay.forEach(function (o) {
        ctx.beginPath();
        for (var i = 0; i < o.px.length; i++) {
          var s = toScreen(o.px[i], o.py[i]);
          if (i === 0) { ctx.moveTo(s[0], s[1]); } else { ctx.lineTo(s[0], s[1]); }
        }
        ctx.stroke();
      });
      ctx.globalAlpha = 1;
      ctx.lineCap = "butt";
    }
    // the curves
    st.curves.forEach(function (c, ci) {
      var col = COLOURS[ci % COLOURS.length];
      var pts = c.points.map(function (p) { return toScreen(p[0], p[1]); });
      ctx.strokeStyle = col;
      ctx.lineWidth = 1.5;
      ctx.beginPath();
      pts.forEach(function (s, i) { if (i === 0) { ctx.moveTo(s[0], s[1]); } else { ctx.lineTo(s[0], s[1]); } });
      ctx.stroke();
      var big = step === 4 && ci === selected;
      pts.forEach(function (s) { dot(s[0], s[1], big ? 5 : 3.5, big ? "#fff" : col, col); });
      if (pts.length) {
        var last = pts[pts.length - 1];
        label((c.grid_v === null || c.grid_v === "" ? "?" : c.grid_v) + " V", last[0] + 6, last[1] - 4, col);
      }
    });
    // the axis marks
    st.marks.forEach(function (m, i) {
      var s = toScreen(m.px, m.py);
      var col = m.axis === "va" ? "#1f5fa8" : "#2d7d46";
      var res = st.residuals && st.residuals[i];
      ctx.strokeStyle = col;
      ctx.lineWidth = 2;
      ctx.beginPath();
      ctx.moveTo(s[0] - 10, s[1]); ctx.lineTo(s[0] - 3, s[1]);
      ctx.moveTo(s[0] + 3, s[1]); ctx.lineTo(s[0] + 10, s[1]);
      ctx.moveTo(s[0], s[1] - 10); ctx.lineTo(s[0], s[1] - 3);
      ctx.moveTo(s[0], s[1] + 3); ctx.lineTo(s[0], s[1] + 10);
      ctx.stroke();
      if (res && res.worst) { ctx.lineWidth = 3; dot(s[0], s[1], 14, null, "#d00000"); }
      label((i + 1) + ": " + (m.value === "" ? "?" : m.value) + (m.axis === "va" ? " V" : " mA"), s[0] + 8, s[1] + 20, col);
    });
  }

  // -- the step panels ------------------------------------------------------------------------
  function setStep(n) {
    step = n;
    document.querySelectorAll(".step").forEach(function (li) {
      li.classList.toggle("open", Number(li.dataset.step) === n);
    });
    boxCorner = null;
    var hints = {
      1: "Click a labelled tick on an axis.", 2: "Click a corner of the plot area.",
      3: "Click once on a curve.", 4: "Correct the points of the chosen curve.", 5: "Save the curves and fit them."
    };
    say(hints[n]);
    if (n === 4) { renderEdit(); }
    draw();
  }
  function cell(tr, content) {
    var td = document.createElement("td");
    if (typeof content === "string") { td.textContent = content; } else if (content) { td.appendChild(content); }
    tr.appendChild(td);
    return td;
  }
  function button(text, title, fn) {
    var b = document.createElement("button");
    b.type = "button";
    b.className = "quiet small";
    b.textContent = text;
    b.title = title;
    b.setAttribute("aria-label", title);
    b.addEventListener("click", fn);
    return b;
  }
  function renderMarks() {
    var body = document.querySelector("#marks tbody");
    body.textContent = "";
    st.marks.forEach(function (m, i) {
      var tr = document.createElement("tr");
      cell(tr, String(i + 1));
      var sel = document.createElement("select");
      sel.setAttribute("aria-label", "axis of mark " + (i + 1));
      [["va", "plate V"], ["ia", "current mA"]].forEach(function (o) {
        var op = document.createElement("option");
        op.value = o[0]; op.textContent = o[1]; op.selected = m.axis === o[0];
        sel.appendChild(op);
      });
      sel.addEventListener("change", function () { m.axis = sel.value; draw(); later("axes", saveAxes); });
      cell(tr, sel);
      var inp = document.createElement("input");
      inp.className = "value";
      inp.inputMode = "decimal";
      inp.size = 6;
      inp.value = m.value;
      inp.setAttribute("aria-label", "value of mark " + (i + 1));
      inp.addEventListener("input", function () {
        m.value = inp.value.trim();
        answered("mark", i, m.value === "" ? "Mark " + (i + 1) + " placed: type its value." :
          "Mark " + (i + 1) + ": " + m.value + (m.axis === "va" ? " V" : " mA") + ". Click the next mark, or go on.");
        draw();
        later("axes", saveAxes, 600);
      });
      inp.addEventListener("keydown", function (e) { if (e.key === "Enter") { later("axes", saveAxes, 0); } });
      cell(tr, inp);
      cell(tr, "").className = "num off";
      cell(tr, button("✕", "delete mark " + (i + 1), function () {
        st.marks.splice(i, 1); st.residuals = {}; asking = null; renderMarks(); draw(); saveAxes();
      }));
      body.appendChild(tr);
    });
    updateMarks();
  }
  // the server's answer shown in place (rebuilding the rows would take the focus from a value
  // being typed)
  function updateMarks() {
    document.querySelectorAll("#marks tbody tr").forEach(function (tr, i) {
      var res = st.residuals && st.residuals[i];
      tr.classList.toggle("worst", Boolean(res && res.worst));
      // two marks on an axis fit it exactly: no distance to show, so none is claimed
      var off = tr.querySelector("td.off");
      off.textContent = res ? (res.exact ? "exact" : res.off.toFixed(1) + " px") : "—";
      off.title = res && res.exact ? "two marks fix this axis exactly; a third mark on it gives a check" : "";
    });
    var sum = document.getElementById("axes-summary");
    var counts = { va: 0, ia: 0 };
    st.marks.forEach(function (m) { if (m.value !== "") { counts[m.axis] += 1; } });
    var need = [];
    if (counts.va < 2) { need.push((2 - counts.va) + " more on the plate voltage axis"); }
    if (counts.ia < 2) { need.push((2 - counts.ia) + " more on the current axis"); }
    if (need.length) {
      sum.className = "hint";
      sum.textContent = "Still needed: " + need.join(", ") + ".";
      document.getElementById("state-1").textContent = "";
    } else if (st.axes) {
      var worst = -1;
      st.marks.forEach(function (m, i) { if (st.residuals[i] && st.residuals[i].worst) { worst = i; } });
      var w = st.marks[worst];
      sum.className = w ? "warn" : "ok";
      sum.textContent = st.axes.summary +
        (w ? " Mark " + (worst + 1) + " (" + (w.axis === "va" ? "plate voltage " : "current ") + w.value + ") is " +
          st.residuals[worst].off.toFixed(1) + " px from where the other marks put that value: check its position and value." : "");
      document.getElementById("state-1").textContent = w ? "check mark " + (worst + 1) : "✓";
    }
  }
  function renderCurves() {
    var body = document.querySelector("#curves tbody");
    body.textContent = "";
    st.curves.forEach(function (c, i) {
      var tr = document.createElement("tr");
      var sw = document.createElement("span");
      sw.className = "swatch";
      sw.style.background = COLOURS[i % COLOURS.length];
      cell(tr, sw);
      var inp = document.createElement("input");
      inp.className = "grid-v";
      inp.inputMode = "decimal";
      inp.size = 6;
      inp.value = c.grid_v === null || c.grid_v === undefined ? "" : c.grid_v;
      inp.placeholder = "e.g. -2";
      inp.setAttribute("aria-label", "grid voltage of curve " + (i + 1));
      inp.addEventListener("input", function () {
        c.grid_v = inp.value.trim();
        answered("curve", i, c.grid_v === "" ? "Curve " + (i + 1) + ": " + c.points.length + " points. Type its grid voltage." :
          "Curve " + (i + 1) + ": grid " + c.grid_v + " V, " + c.points.length + " points. Click the next curve, or go on.");
        draw();
        later("curves", saveCurves, 600);
      });
      cell(tr, inp);
      cell(tr, "").className = "num count";
      cell(tr, button("✕", "delete curve " + (i + 1), function () {
        st.curves.splice(i, 1); asking = null; selected = Math.min(selected, Math.max(0, st.curves.length - 1));
        renderCurves(); draw(); saveCurves();
      }));
      body.appendChild(tr);
    });
    updateCurves();
  }
  function updateCurves() {
    document.querySelectorAll("#curves tbody tr").forEach(function (tr, i) {
      if (st.curves[i]) { tr.querySelector("td.count").textContent = String(st.curves[i].points.length); }
    });
    document.getElementById("state-3").textContent = st.curves.length ? "(" + st.curves.length + ")" : "";
    renderEdit();
  }
  function renderEdit() {
    var sel = document.getElementById("edit-curve");
    sel.textContent = "";
    st.curves.forEach(function (c, i) {
      var op = document.createElement("option");
      op.value = String(i);
      op.textContent = "curve " + (i + 1) + " (grid " + (c.grid_v === "" || c.grid_v === null ? "?" : c.grid_v) + " V, " +
        c.points.length + " points)";
      op.selected = i === selected;
      sel.appendChild(op);
    });
    document.getElementById("edit-hint").textContent = st.curves.length ?
      "The chosen curve's points are drawn larger." : "Trace a curve first (step 3).";
  }
  function renderBox() {
    var b = st.box;
    document.getElementById("box-summary").textContent = b ?
      "From (" + Math.round(b[0]) + ", " + Math.round(b[1]) + ") to (" + Math.round(b[2]) + ", " + Math.round(b[3]) + ") px." :
      (boxCorner ? "First corner placed; click the opposite one." : "Whole image.");
    document.getElementById("state-2").textContent = b ? "✓" : "";
  }
  function renderSaved(d) {
    var out = document.getElementById("save-result");
    out.textContent = "";
    if (!d) { return; }
    var h = document.createElement("p");
    h.className = d.failed ? "error" : "ok";
    h.textContent = (d.earlier ? "Saved earlier. " : "") + (d.failed ? "Stored, but the fit failed:" :
      "Stored and fitted. The fit is drawn over the image as a yellow band under the points.");
    out.appendChild(h);
    (d.units || []).forEach(function (u) {
      var p = document.createElement("p");
      var a = document.createElement("a");
      a.href = root.dataset.tubeUrl.replace("TUBE", encodeURIComponent(u.tube));
      a.textContent = u.tube + (u.section ? ":" + u.section : "");
      p.appendChild(a);
      var t = " — " + u.fit.model + (u.fit.converged ? (u.fit.rms_ma !== undefined && u.fit.rms_ma !== null ?
        ", points off the fit by " + Number(u.fit.rms_ma).toPrecision(2) + " mA rms" : "") :
        ", failed" + (u.fit.failure ? ": " + u.fit.failure : ""));
      p.appendChild(document.createTextNode(t));
      p.className = "unit";
      out.appendChild(p);
    });
  }

  // -- clicks on the image ------------------------------------------------------------------
  function nearestPoint(c, sx, sy, within) {
    var best = -1, bd = within * within;
    c.points.forEach(function (p, i) {
      var s = toScreen(p[0], p[1]);
      var d = (s[0] - sx) * (s[0] - sx) + (s[1] - sy) * (s[1] - sy);
      if (d <= bd) { bd = d; best = i; }
    });
    return best;
  }
  function click(sx, sy) {
    var p = toImage(sx, sy);
    if (!inImage(p)) { say("That is outside the image."); return; }
    clearProblem();
    if (step === 1) {
      var axis = document.querySelector("input[name=next-axis]:checked").value;
      st.marks.push({ px: p[0], py: p[1], axis: axis, value: "" });
      renderMarks();
      draw();
      var inputs = document.querySelectorAll("#marks input.value");
      inputs[inputs.length - 1].focus();
      say("Mark " + st.marks.length + " placed: type its value.", { kind: "mark", i: st.marks.length - 1 });
    } else if (step === 2) {
      if (!boxCorner) { boxCorner = p; renderBox(); draw(); return; }
      st.box = [Math.min(boxCorner[0], p[0]), Math.min(boxCorner[1], p[1]), Math.max(boxCorner[0], p[0]), Math.max(boxCorner[1], p[1])];
      boxCorner = null;
      renderBox();
      draw();
      saveAxes();
    } else if (step === 3) {
      say("Following the curve…");
      inTurn(function () { return call("POST", "/trace", { seed: p, box: st.box }); }).then(function (d) {
        st.curves.push({ grid_v: "", points: d.points, seed: d.seed, va: d.va, ia_ma: d.ia_ma });
        selected = st.curves.length - 1;
        renderCurves();
        draw();
        var inputs = document.querySelectorAll("#curves input.grid-v");
        inputs[inputs.length - 1].focus();
        say("Curve " + st.curves.length + ": " + d.points.length + " points. Type its grid voltage.",
          { kind: "curve", i: st.curves.length - 1 });
        saveCurves();
      }, function (e) { say("No curve found there."); problem(e); });
    } else if (step === 4) {
      var c = st.curves[selected];
      if (!c) { return; }
      var tool = document.querySelector("input[name=tool]:checked").value;
      if (tool === "add") {
        c.points.push(p);
        c.points.sort(function (a, b) { return a[0] - b[0]; });
      } else if (tool === "delete") {
        var k = nearestPoint(c, sx, sy, reach);
        if (k < 0) { say("No point of this curve there."); return; }
        c.points.splice(k, 1);
      } else {
        return;
      }
      renderCurves();
      draw();
      saveCurves();
    }
  }

  function pos(e) {
    var r = canvas.getBoundingClientRect();
    return [e.clientX - r.left, e.clientY - r.top];
  }
  canvas.addEventListener("pointerdown", function (e) {
    var s = pos(e);
    canvas.setPointerCapture(e.pointerId);
    reach = e.pointerType === "touch" ? 24 : 12;  // how near a point a press must be to take it [px]
    drag = { start: s, last: s, moved: false, point: -1 };
    if (step === 4 && st.curves[selected] && document.querySelector("input[name=tool]:checked").value === "move") {
      drag.point = nearestPoint(st.curves[selected], s[0], s[1], reach);
    }
  });
  canvas.addEventListener("pointermove", function (e) {
    var s = pos(e);
    if (!drag) { return; }
    if (!drag.moved && Math.abs(s[0] - drag.start[0]) + Math.abs(s[1] - drag.start[1]) < 5) { return; }
    drag.moved = true;
    if (drag.point >= 0) {
      var p = toImage(s[0], s[1]);
      p[0] = Math.max(0, Math.min(W, p[0]));
      p[1] = Math.max(0, Math.min(H, p[1]));
      st.curves[selected].points[drag.point] = p;
    } else {
      view.ox += s[0] - drag.last[0];
      view.oy += s[1] - drag.last[1];
    }
    drag.last = s;
    draw();
  });
  canvas.addEventListener("pointerup", function (e) {
    var s = pos(e);
    var d = drag;
    drag = null;
    if (!d) { return; }
    if (!d.moved) { click(s[0], s[1]); return; }
    if (d.point >= 0) {
      st.curves[selected].points.sort(function (a, b) { return a[0] - b[0]; });
      draw();
      saveCurves();
      say("Point moved.");
    }
  });
  canvas.addEventListener("pointercancel", function () { drag = null; });
  canvas.addEventListener("wheel", function (e) {
    e.preventDefault();
    var s = pos(e);
    zoomAt(e.deltaY < 0 ? 1.2 : 1 / 1.2, s[0], s[1]);
  }, { passive: false });
  canvas.addEventListener("keydown", function (e) {
    var r = canvas.getBoundingClientRect();
    if (e.key === "+" || e.key === "=") { zoomAt(1.25, r.width / 2, r.height / 2); }
    else if (e.key === "-") { zoomAt(0.8, r.width / 2, r.height / 2); }
    else if (e.key === "0") { fit(); }
  });
  function centreZoom(f) { var r = canvas.getBoundingClientRect(); zoomAt(f, r.width / 2, r.height / 2); }
  document.getElementById("zoom-in").addEventListener("click", function () { centreZoom(1.25); });
  document.getElementById("zoom-out").addEventListener("click", function () { centreZoom(0.8); });
  document.getElementById("zoom-fit").addEventListener("click", fit);
  document.querySelectorAll(".step-head").forEach(function (b) {
    b.addEventListener("click", function () { setStep(Number(b.parentNode.dataset.step)); });
  });
  document.querySelectorAll("button.next").forEach(function (b) {
    b.addEventListener("click", function () { setStep(Number(b.dataset.go)); });
  });
  document.getElementById("box-clear").addEventListener("click", function () {
    st.box = null; boxCorner = null; renderBox(); draw(); saveAxes();
  });
  document.getElementById("edit-curve").addEventListener("change", function (e) {
    selected = Number(e.target.value); draw();
  });
  document.getElementById("save-form").addEventListener("submit", function (e) {
    e.preventDefault();
    var f = e.target;
    var body = { tube: f.tube.value.trim(), type: f.type.value, section: f.section.value.trim(), model: f.model.value };
    var btn = f.querySelector("button[type=submit]");
    btn.disabled = true;
    say("Saving and fitting…");
    // pending edits first, so the server saves what is on the screen
    clearTimeout(timers.axes); clearTimeout(timers.curves);
    saveAxes();
    saveCurves();
    inTurn(function () {
      if (errorEl.textContent) { throw { message: errorEl.textContent }; }
      return call("POST", "/measurement", body);
    }).then(function (d) {
      clearProblem();
      st.saved = { overlay: d.overlay, units: d.units, failed: d.failed };
      renderSaved(d);
      draw();
      say(d.failed ? "Stored; the fit failed." : "Stored and fitted.");
    }, function (err) { problem(err); say("Not saved."); }).then(function () { btn.disabled = false; });
  });
  window.addEventListener("resize", function () { size(); draw(); });

  // -- start: the image and the stored work -------------------------------------------------
  canvas.style.aspectRatio = W + " / " + H;  // the view takes the image's shape (up to a height limit)
  size();
  draw();
  img.addEventListener("load", function () {
    ready = true;
    size();
    fit();
  });
  img.addEventListener("error", function () { say("The image could not be loaded."); });
  img.src = root.dataset.image;
  call("GET", "").then(function (d) {
    st.marks = d.marks.map(function (m) { return { px: m.px, py: m.py, axis: m.axis, value: String(m.value) }; });
    st.box = d.box;
    st.curves = d.curves.map(function (c) {
      return { grid_v: c.grid_v === null ? "" : String(c.grid_v), points: c.points, seed: c.seed, va: c.va, ia_ma: c.ia_ma };
    });
    st.axes = d.axes;
    st.residuals = {};
    if (d.axes) {
      d.axes.residuals.forEach(function (off, k) { st.residuals[k] = { off: off, worst: d.axes.worst === k, exact: d.axes.exact[k] }; });
    }
    if (d.saved) {
      st.saved = d.saved;
      renderSaved({ failed: d.saved.failed, earlier: true, units: [{ tube: d.saved.tube, section: d.saved.section,
        fit: { model: d.saved.model, converged: !d.saved.failed, failure: null } }] });
    }
    renderMarks();
    renderCurves();
    renderBox();
    var first = d.saved ? 5 : (!d.axes ? 1 : (d.curves.length ? 4 : 3));
    setStep(first);
    root.dataset.loaded = "1";
  }, problem);
}());
