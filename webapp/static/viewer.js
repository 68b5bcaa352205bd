/* Limen reading viewer: draws linear 16-bit region data on a canvas with window/level, invert and zoom,
   one image pixel per device pixel (times a fixed magnification), and collects the reader's choice.
   No inline script anywhere (the Content-Security-Policy forbids it); the pages pass their settings in
   data- attributes. The truth never comes to the browser before the response is stored. */
(function () {
  "use strict";

  var csrf = (document.querySelector('meta[name="csrf-token"]') || {}).content || "";

  function fetchJSON(url, body) {
    var opts = { credentials: "same-origin", headers: { "Accept": "application/json" } };
    if (body !== undefined) {
      opts.method = "POST";
      opts.headers["Content-Type"] = "application/json";
      opts.headers["X-CSRFToken"] = csrf;
      opts.body = JSON.stringify(body);
    }
    return fetch(url, opts).then(function (r) {
      return r.json().catch(function () { return {}; }).then(function (data) { return { status: r.status, data: data }; });
    });
  }

  function fetchPixels(url) {
    return fetch(url, { credentials: "same-origin" }).then(function (r) {
      if (!r.ok) { throw new Error("region request failed (" + r.status + ")"); }
      return r.arrayBuffer();
    }).then(function (buf) { return new Uint16Array(buf); });
  }

  /* ------------------------------------------------------------------ the canvas viewer
     Shows K panels side by side. A trial of an M-alternative study is M tiles, one per candidate site, each
     centred on its site, in the trial's own random order (the server's): a frame with four ticks points at
     each tile's centre and its number sits below it, all outside the image, in CSS-sized type so they read at
     1x. The display check (and trials of studies opened by earlier releases) is one panel with its sites
     marked by arcs. */
  function Viewer(pixelsCanvas, overlayCanvas) {
    this.canvas = pixelsCanvas;
    this.overlay = overlayCanvas;
    this.ctx = pixelsCanvas.getContext("2d");
    this.octx = overlayCanvas.getContext("2d");
    this.off = document.createElement("canvas");
    this.lut = new Uint8ClampedArray(65536);
    this.window = 1000; this.level = 500; this.invert = false; this.zoom = 1; this.baseZoom = 1;
    this.sites = []; this.selected = -1; this.marks = {}; this.panels = 1; this.tiles = false;
  }

  /* data: panels x rows x cols values; tiles: one choice per panel (true) or sites inside one panel (false) */
  Viewer.prototype.setImage = function (data, rows, cols, panels, tiles) {
    this.data = data; this.rows = rows; this.cols = cols; this.panels = panels || 1; this.tiles = !!tiles;
    this.off.width = cols * this.panels; this.off.height = rows;
    this.image = this.off.getContext("2d").createImageData(cols * this.panels, rows);
  };

  Viewer.prototype.choices = function () { return this.tiles ? this.panels : this.sites.length; };

  Viewer.prototype.autoWindow = function () {
    // robust centre and spread of the region: median and the 2nd-98th percentile range
    var n = this.data.length, step = Math.max(1, Math.floor(n / 20000)), s = [];
    for (var i = 0; i < n; i += step) { s.push(this.data[i]); }
    s.sort(function (a, b) { return a - b; });
    var q = function (p) { return s[Math.min(s.length - 1, Math.floor(p * s.length))]; };
    this.level = q(0.5);
    this.window = Math.max(2, 1.6 * (q(0.98) - q(0.02)));
  };

  Viewer.prototype.buildLut = function () {
    var lo = this.level - this.window / 2, w = this.window, lut = this.lut, inv = this.invert;
    for (var v = 0; v < 65536; v++) {
      var g = (v - lo) / w * 255;
      g = g < 0 ? 0 : (g > 255 ? 255 : g);
      lut[v] = inv ? 255 - g : g;
    }
  };

  /* layout in device pixels: tiles of cols*zoom, gaps and a label strip that do not scale with zoom */
  Viewer.prototype.geom = function () {
    var dpr = window.devicePixelRatio || 1, z = this.zoom, t = this.tiles;
    var g = { dpr: dpr, z: z, tw: this.cols * z, th: this.rows * z,
              pad: t ? Math.round(14 * dpr) : 0, gap: t ? Math.round(26 * dpr) : 0, lab: t ? Math.round(24 * dpr) : 0 };
    g.W = 2 * g.pad + this.panels * g.tw + (this.panels - 1) * g.gap;
    g.H = 2 * g.pad + g.th + g.lab;
    g.x = function (k) { return g.pad + k * (g.tw + g.gap); };
    return g;
  };

  Viewer.prototype.draw = function () {
    if (!this.data) { return; }
    this.buildLut();
    var px = this.image.data, d = this.data, lut = this.lut, rows = this.rows, cols = this.cols, K = this.panels;
    // panel k's pixel (r, c) goes to column k*cols + c of the off-screen strip
    for (var k = 0, i = 0; k < K; k++) {
      for (var r = 0; r < rows; r++) {
        var j = 4 * (r * cols * K + k * cols);
        for (var c = 0; c < cols; c++, i++, j += 4) {
          var gv = lut[d[i]];
          px[j] = gv; px[j + 1] = gv; px[j + 2] = gv; px[j + 3] = 255;
        }
      }
    }
    this.off.getContext("2d").putImageData(this.image, 0, 0);
    var g = this.geom();
    if (this.canvas.width !== g.W || this.canvas.height !== g.H) {
      this.canvas.width = g.W; this.canvas.height = g.H;
      this.overlay.width = g.W; this.overlay.height = g.H;
      this.canvas.style.width = (g.W / g.dpr) + "px"; this.canvas.style.height = (g.H / g.dpr) + "px";
      this.overlay.style.width = (g.W / g.dpr) + "px"; this.overlay.style.height = (g.H / g.dpr) + "px";
    }
    this.ctx.imageSmoothingEnabled = false;
    this.ctx.clearRect(0, 0, g.W, g.H);
    for (k = 0; k < K; k++) {
      this.ctx.drawImage(this.off, k * cols, 0, cols, rows, g.x(k), g.pad, g.tw, g.th);
    }
    this.drawOverlay();
  };

  Viewer.prototype.ringRadius = function () {
    var s = this.sites, best = Infinity;
    for (var i = 0; i < s.length; i++) {
      for (var j = i + 1; j < s.length; j++) {
        best = Math.min(best, Math.hypot(s[i][0] - s[j][0], s[i][1] - s[j][1]));
      }
    }
    return isFinite(best) ? 0.38 * best : 20;
  };

  Viewer.prototype.colour = function (k) {
    var mark = this.marks[k];
    return mark === "true" ? "rgba(127,183,126,0.95)" : (mark === "wrong" ? "rgba(199,116,107,0.95)"
      : (k === this.selected ? "rgba(95,168,160,0.95)" : "rgba(175,180,186,0.75)"));
  };

  Viewer.prototype.drawOverlay = function () {
    var c = this.octx, g = this.geom(), dpr = g.dpr;
    c.clearRect(0, 0, this.overlay.width, this.overlay.height);
    c.textAlign = "center"; c.textBaseline = "middle";
    if (this.tiles) {
      c.font = "600 " + Math.round(15 * dpr) + "px system-ui, sans-serif";
      for (var k = 0; k < this.panels; k++) {
        var x0 = g.x(k), y0 = g.pad, on = k === this.selected || this.marks[k];
        var off = Math.round(4 * dpr), tick = Math.round(7 * dpr), cx = x0 + g.tw / 2, cy = y0 + g.th / 2;
        c.strokeStyle = this.colour(k); c.lineWidth = (on ? 3 : 1) * dpr;
        c.strokeRect(x0 - off, y0 - off, g.tw + 2 * off, g.th + 2 * off);
        c.lineWidth = 2 * dpr;
        c.beginPath();   // ticks outside the frame point at the tile's centre row and column (the site)
        c.moveTo(cx, y0 - off - tick); c.lineTo(cx, y0 - off);
        c.moveTo(cx, y0 + g.th + off); c.lineTo(cx, y0 + g.th + off + tick);
        c.moveTo(x0 - off - tick, cy); c.lineTo(x0 - off, cy);
        c.moveTo(x0 + g.tw + off, cy); c.lineTo(x0 + g.tw + off + tick, cy);
        c.stroke();
        c.fillStyle = this.colour(k);
        c.fillText(String(k + 1), cx, y0 + g.th + off + tick + g.lab / 2);
      }
      return;
    }
    var z = g.z, r = this.ringRadius() * z;
    c.font = Math.round(12 * dpr) + "px system-ui, sans-serif";
    for (var s = 0; s < this.sites.length; s++) {
      var y = (this.sites[s][0] + 0.5) * z + g.pad, x = (this.sites[s][1] + 0.5) * z + g.pad;
      var colour = this.colour(s), width = (s === this.selected || this.marks[s] ? 2 : 1) * dpr;
      // four short arcs leave the site's centre and its surroundings untouched; a dark edge keeps the
      // marks legible on bright and dark noise alike
      for (var pass = 0; pass < 2; pass++) {
        c.strokeStyle = pass ? colour : "rgba(20,21,23,0.55)";
        c.lineWidth = pass ? width : width + 2 * dpr;
        for (var q = 0; q < 4; q++) {
          c.beginPath(); c.arc(x, y, r, q * Math.PI / 2 + 0.35, (q + 1) * Math.PI / 2 - 0.35); c.stroke();
        }
      }
      c.lineWidth = 3 * dpr; c.strokeStyle = "rgba(20,21,23,0.7)";
      c.strokeText(String(s + 1), x + r * 0.95, y - r * 0.95);
      c.fillStyle = colour;
      c.fillText(String(s + 1), x + r * 0.95, y - r * 0.95);
    }
  };

  /* each choice's box on the canvas, in device pixels: [x, y, width, height] of its tile (the whole panel when
     the sites share one) */
  Viewer.prototype.boxes = function () {
    var g = this.geom(), out = [];
    for (var k = 0; k < this.panels; k++) { out.push([g.x(k), g.pad, g.tw, g.th]); }
    return out;
  };

  /* the choice under a click: the tile (its frame and label count) or the nearest site within reach */
  Viewer.prototype.siteAt = function (evt) {
    var rect = this.canvas.getBoundingClientRect(), g = this.geom();
    var x = (evt.clientX - rect.left) / rect.width * this.canvas.width;
    var y = (evt.clientY - rect.top) / rect.height * this.canvas.height;
    if (this.tiles) {
      for (var k = 0; k < this.panels; k++) {
        if (x >= g.x(k) - g.gap / 2 && x < g.x(k) + g.tw + g.gap / 2 && y >= 0 && y <= g.H) { return k; }
      }
      return -1;
    }
    var col = (x - g.pad) / g.z, row = (y - g.pad) / g.z;
    var best = -1, bestD = Infinity, r = this.ringRadius() * 1.3;
    for (var s = 0; s < this.sites.length; s++) {
      var d = Math.hypot(this.sites[s][0] + 0.5 - row, this.sites[s][1] + 0.5 - col);
      if (d < bestD) { bestD = d; best = s; }
    }
    return bestD <= r ? best : -1;
  };

  /* mouse: a drag changes window (horizontal) and level (vertical); a click without movement picks a site */
  Viewer.prototype.attachMouse = function (onPick, onChange, allowWL) {
    var self = this, down = null;
    this.canvas.addEventListener("mousedown", function (e) {
      down = { x: e.clientX, y: e.clientY, w: self.window, l: self.level, moved: false };
      e.preventDefault();
    });
    window.addEventListener("mousemove", function (e) {
      if (!down || !allowWL) { return; }
      var dx = e.clientX - down.x, dy = e.clientY - down.y;
      if (Math.abs(dx) + Math.abs(dy) > 3) { down.moved = true; }
      if (!down.moved) { return; }
      self.window = Math.max(2, down.w * Math.exp(dx / 200));
      self.level = down.l - dy * down.w / 300;
      self.draw(); onChange();
    });
    window.addEventListener("mouseup", function (e) {
      if (!down) { return; }
      var wasClick = !down.moved;
      down = null;
      if (wasClick) { var k = self.siteAt(e); if (k >= 0) { onPick(k); } }
    });
  };

  function screenInfo() {
    var zoom = (window.outerWidth && window.innerWidth) ? window.outerWidth / window.innerWidth : null;
    return { screen_width: window.screen.width, screen_height: window.screen.height,
             device_pixel_ratio: window.devicePixelRatio || 1, browser_zoom: zoom };
  }

  function setStatus(text, cls) {
    var el = document.getElementById("status");
    if (!el) { return; }
    el.textContent = text; el.className = cls || "";
  }

  /* ------------------------------------------------------------------ display check page */
  function runCheck(root) {
    var v = new Viewer(document.getElementById("pixels"), document.getElementById("overlay"));
    var size = parseInt(root.dataset.size, 10), confirmBtn = document.getElementById("confirm");
    v.sites = JSON.parse(root.dataset.sites);
    function load() {
      v.selected = -1; confirmBtn.disabled = true;
      fetchPixels(root.dataset.patternUrl + "?t=" + Date.now()).then(function (data) {
        v.setImage(data, size, size, 1, false);
        v.window = 65535; v.level = 32767.5;   // fixed: stored grey levels shown as they are
        v.draw();
        root.dataset.ready = String(Date.now());
      }).catch(function (err) { setStatus(err.message, "bad"); });
    }
    function pick(k) { v.selected = k; confirmBtn.disabled = false; v.drawOverlay(); }
    v.attachMouse(pick, function () {}, false);
    document.addEventListener("keydown", function (e) {
      if (e.target && e.target.tagName === "INPUT") { return; }
      var k = parseInt(e.key, 10);
      if (k >= 1 && k <= v.sites.length) { pick(k - 1); }
      if (e.key === "Enter" && !confirmBtn.disabled) { confirmBtn.click(); }
    });
    confirmBtn.addEventListener("click", function () {
      if (v.selected < 0) { return; }
      confirmBtn.disabled = true;
      var body = screenInfo();
      body.site = v.selected;
      body.viewing_distance_mm = parseFloat(document.getElementById("distance").value);
      fetchJSON(root.dataset.answerUrl, body).then(function (r) {
        if (r.status !== 200) { setStatus(r.data.error || "request failed", "bad"); confirmBtn.disabled = false; return; }
        if (r.data.passed) { setStatus("Found. Starting…", "good"); window.location.assign(r.data.next); return; }
        setStatus("That was not the site with the disc. Dim the room light or raise the display's brightness " +
                  "and look again: a new pattern is shown (attempt " + r.data.attempts + ").", "bad");
        load();
      });
    });
    load();
  }

  /* ------------------------------------------------------------------ requests that survive a bad moment
     A request that fails on the way (network down, server restarting, 502/503/504) is sent again after a
     growing pause (0.5 s doubling to 8 s) while the page says "reconnecting"; nothing the reader did is lost.
     A response sent again is stored once: the server answers the second copy with 409 "already answered". */
  function retrying(send, onWait) {
    var delay = 500;
    function attempt() {
      return send().then(function (r) {
        if (r.status === 502 || r.status === 503 || r.status === 504) { throw new Error("server busy (" + r.status + ")"); }
        return r;
      }).catch(function (err) {
        if (err && err.fatal) { throw err; }
        onWait(true, delay);
        return new Promise(function (resolve) { window.setTimeout(resolve, delay); }).then(function () {
          delay = Math.min(8000, delay * 2);
          return attempt();
        });
      });
    }
    return attempt().then(function (r) { onWait(false); return r; });
  }

  function fetchPixelsRaw(url) {
    return fetch(url, { credentials: "same-origin" }).then(function (r) {
      if (r.status >= 500) { return { status: r.status }; }
      if (!r.ok) { var e = new Error("region request failed (" + r.status + ")"); e.fatal = true; throw e; }
      return r.arrayBuffer().then(function (buf) { return { status: r.status, data: new Uint16Array(buf) }; });
    });
  }

  /* ------------------------------------------------------------------ reading page */
  function runReader(root) {
    var v = new Viewer(document.getElementById("pixels"), document.getElementById("overlay"));
    var confirmBtn = document.getElementById("confirm"), trial = null, shownAt = 0, busy = false;
    var userWL = null;      // the reader's window/level carries over from trial to trial until reset
    var base = null;        // the study's own window/level: W/L are shown relative to it, the same for every trial

    function waiting(on, delay) {
      root.classList.toggle("reconnecting", !!on);
      if (on) { setStatus("Reconnecting… (trying again in " + Math.round(delay / 100) / 10 + " s)", "bad"); root.dataset.reconnecting = "1"; }
      else if (root.dataset.reconnecting) { delete root.dataset.reconnecting; setStatus("Connected again.", "good"); }
    }
    function showWL() {
      if (base) {
        document.getElementById("wl-window").textContent = "×" + (v.window / base.window).toFixed(2);
        var dl = (v.level - base.level) / base.window;
        document.getElementById("wl-level").textContent = (dl >= 0 ? "+" : "−") + Math.abs(dl).toFixed(2);
      } else {
        document.getElementById("wl-window").textContent = Math.round(v.window);
        document.getElementById("wl-level").textContent = Math.round(v.level);
      }
      document.getElementById("wl-zoom").textContent = v.zoom + "×";
      document.getElementById("wl-invert").textContent = v.invert ? "on" : "off";
      document.getElementById("choice").textContent = v.selected >= 0 ? String(v.selected + 1) : "none";
      if (v.data) { root.dataset.boxes = JSON.stringify(v.boxes()); }
    }
    function resetWL() {
      if (base) { v.window = base.window; v.level = base.level; } else { v.autoWindow(); }
    }
    function changed() { userWL = { window: v.window, level: v.level }; showWL(); }
    function pick(k) {
      if (!trial || busy) { return; }
      v.selected = k; confirmBtn.disabled = false; v.drawOverlay(); showWL();
    }
    function progress(t) {
      var el = document.getElementById("progress");
      el.max = Math.max(1, t.total); el.value = t.answered;
      document.getElementById("progress-text").textContent = t.practice
        ? "Practice " + t.practice_number + " of " + t.practice_total
        : "Trial " + t.number + " of " + t.total;
      document.getElementById("practice-tag").classList.toggle("hidden", !t.practice);
    }
    function next() {
      busy = true; confirmBtn.disabled = true;
      retrying(function () { return fetchJSON(root.dataset.nextUrl); }, waiting).then(function (r) {
        if (r.status !== 200) { setStatus(r.data.error || "cannot load the next trial", "bad"); return null; }
        if (r.data.done) {
          root.classList.add("hidden");
          document.getElementById("done").classList.remove("hidden");
          return null;
        }
        trial = r.data;
        progress(trial);
        document.getElementById("max-key").textContent = String(trial.m);
        return retrying(function () { return fetchPixelsRaw(trial.region_url); }, waiting).then(function (px) {
          var tiles = !!trial.tiles;
          v.setImage(px.data, trial.rows, trial.cols, tiles ? trial.tiles : 1, tiles);
          v.sites = tiles ? [] : trial.sites; v.selected = -1; v.marks = {};
          base = (trial.window && trial.level !== undefined) ? { window: trial.window, level: trial.level } : null;
          v.baseZoom = trial.magnification || 1;
          if (v.zoom < v.baseZoom) { v.zoom = v.baseZoom; }
          if (userWL) { v.window = userWL.window; v.level = userWL.level; } else { resetWL(); }
          v.draw(); showWL(); if (!root.dataset.reconnecting) { setStatus(""); }
          shownAt = performance.now(); busy = false;
          root.dataset.m = String(trial.m);   // for assistive tools and the browser tests
          root.dataset.sites = JSON.stringify(tiles ? [] : trial.sites);
          root.dataset.ready = trial.trial;
        });
      }).catch(function (err) { setStatus(err.message, "bad"); });
    }
    function submit() {
      if (!trial || busy || v.selected < 0) { return; }
      busy = true; confirmBtn.disabled = true; delete root.dataset.ready;
      var body = { response_ms: Math.round(performance.now() - shownAt),
                   window: v.window, level: v.level, zoom: v.zoom, inverted: v.invert };
      body[trial.tiles ? "chosen_position" : "chosen_site"] = v.selected;
      retrying(function () { return fetchJSON(trial.response_url, body); }, waiting).then(function (r) {
        if (r.status === 409 && r.data.duplicate) { next(); return; }     // already stored (a resend, another tab)
        if (r.status !== 200) { setStatus(r.data.error || "the response was not stored", "bad"); busy = false; confirmBtn.disabled = false; return; }
        var fb = r.data.feedback;
        if (fb) {
          var right = trial.tiles ? fb.true_position : fb.true_site;
          v.marks = {}; v.marks[right] = "true";
          if (!fb.correct) { v.marks[v.selected] = "wrong"; }
          v.drawOverlay();
          setStatus(fb.correct ? "Correct." : "Not this time: the disc was at " + (trial.tiles ? "tile " : "site ") + (right + 1) + ".",
                    fb.correct ? "good" : "bad");
          window.setTimeout(next, 900);
        } else { next(); }
      }).catch(function (err) { setStatus(err.message, "bad"); busy = false; confirmBtn.disabled = false; });
    }
    v.attachMouse(pick, changed, true);
    confirmBtn.addEventListener("click", submit);
    document.getElementById("reset").addEventListener("click", function () {
      userWL = null; resetWL(); v.invert = false; v.zoom = v.baseZoom; v.draw(); showWL();
    });
    document.addEventListener("keydown", function (e) {
      if (!trial) { return; }
      var k = parseInt(e.key, 10), step = v.window * 0.08;
      if (k >= 1 && k <= v.choices()) { pick(k - 1); e.preventDefault(); return; }
      switch (e.key) {
        case "Enter": case " ": submit(); break;
        case "ArrowLeft": v.window = Math.max(2, v.window / 1.12); v.draw(); changed(); break;
        case "ArrowRight": v.window = v.window * 1.12; v.draw(); changed(); break;
        case "ArrowUp": v.level += step; v.draw(); changed(); break;
        case "ArrowDown": v.level -= step; v.draw(); changed(); break;
        case "i": case "I": v.invert = !v.invert; v.draw(); showWL(); break;
        case "+": case "=": v.zoom = Math.min(8, v.zoom + 1); v.draw(); showWL(); break;
        case "-": case "_": v.zoom = Math.max(v.baseZoom, v.zoom - 1); v.draw(); showWL(); break;
        case "r": case "R": document.getElementById("reset").click(); break;
        default: return;
      }
      e.preventDefault();
    });
    next();
  }

  document.addEventListener("DOMContentLoaded", function () {
    var check = document.getElementById("check"), reader = document.getElementById("reader");
    if (check) { runCheck(check); }
    if (reader) { runReader(reader); }
  });
})();
