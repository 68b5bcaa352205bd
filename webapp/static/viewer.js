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

  /* ------------------------------------------------------------------ the canvas viewer */
  function Viewer(pixelsCanvas, overlayCanvas) {
    this.canvas = pixelsCanvas;
    this.overlay = overlayCanvas;
    this.ctx = pixelsCanvas.getContext("2d");
    this.octx = overlayCanvas.getContext("2d");
    this.off = document.createElement("canvas");
    this.lut = new Uint8ClampedArray(65536);
    this.window = 1000; this.level = 500; this.invert = false; this.zoom = 1; this.baseZoom = 1;
    this.sites = []; this.selected = -1; this.marks = {};
  }

  Viewer.prototype.setImage = function (data, rows, cols) {
    this.data = data; this.rows = rows; this.cols = cols;
    this.off.width = cols; this.off.height = rows;
    this.image = this.off.getContext("2d").createImageData(cols, rows);
  };

  Viewer.prototype.autoWindow = function () {
    // robust centre and spread of the region: median and the 2nd–98th percentile range
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

  Viewer.prototype.draw = function () {
    if (!this.data) { return; }
    this.buildLut();
    var px = this.image.data, d = this.data, lut = this.lut;
    for (var i = 0, j = 0; i < d.length; i++, j += 4) {
      var g = lut[d[i]];
      px[j] = g; px[j + 1] = g; px[j + 2] = g; px[j + 3] = 255;
    }
    this.off.getContext("2d").putImageData(this.image, 0, 0);
    var dpr = window.devicePixelRatio || 1, z = this.zoom;
    // canvas backing store in device pixels: one image pixel = z device pixels
    var w = this.cols * z, h = this.rows * z;
    if (this.canvas.width !== w || this.canvas.height !== h) {
      this.canvas.width = w; this.canvas.height = h;
      this.overlay.width = w; this.overlay.height = h;
      this.canvas.style.width = (w / dpr) + "px"; this.canvas.style.height = (h / dpr) + "px";
      this.overlay.style.width = (w / dpr) + "px"; this.overlay.style.height = (h / dpr) + "px";
    }
    this.ctx.imageSmoothingEnabled = false;
    this.ctx.drawImage(this.off, 0, 0, w, h);
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

  Viewer.prototype.drawOverlay = function () {
    var c = this.octx, z = this.zoom, r = this.ringRadius() * z, dpr = window.devicePixelRatio || 1;
    c.clearRect(0, 0, this.overlay.width, this.overlay.height);
    c.font = Math.round(12 * dpr) + "px system-ui, sans-serif";
    c.textAlign = "center"; c.textBaseline = "middle";
    for (var k = 0; k < this.sites.length; k++) {
      var y = (this.sites[k][0] + 0.5) * z, x = (this.sites[k][1] + 0.5) * z;
      var mark = this.marks[k];
      c.lineWidth = (k === this.selected || mark ? 2 : 1) * dpr;
      c.strokeStyle = mark === "true" ? "rgba(127,183,126,0.95)" : (mark === "wrong" ? "rgba(199,116,107,0.95)"
        : (k === this.selected ? "rgba(95,168,160,0.95)" : "rgba(175,180,186,0.7)"));
      // four short arcs leave the site's centre and its surroundings untouched; a dark edge keeps the
      // marks legible on bright and dark noise alike
      var colour = c.strokeStyle, width = c.lineWidth;
      for (var pass = 0; pass < 2; pass++) {
        c.strokeStyle = pass ? colour : "rgba(20,21,23,0.55)";
        c.lineWidth = pass ? width : width + 2 * dpr;
        for (var q = 0; q < 4; q++) {
          c.beginPath(); c.arc(x, y, r, q * Math.PI / 2 + 0.35, (q + 1) * Math.PI / 2 - 0.35); c.stroke();
        }
      }
      c.lineWidth = 3 * dpr; c.strokeStyle = "rgba(20,21,23,0.7)";
      c.strokeText(String(k + 1), x + r * 0.95, y - r * 0.95);
      c.fillStyle = colour;
      c.fillText(String(k + 1), x + r * 0.95, y - r * 0.95);
    }
  };

  Viewer.prototype.siteAt = function (evt) {
    var rect = this.canvas.getBoundingClientRect();
    var col = (evt.clientX - rect.left) / rect.width * this.cols;
    var row = (evt.clientY - rect.top) / rect.height * this.rows;
    var best = -1, bestD = Infinity, r = this.ringRadius() * 1.3;
    for (var k = 0; k < this.sites.length; k++) {
      var d = Math.hypot(this.sites[k][0] + 0.5 - row, this.sites[k][1] + 0.5 - col);
      if (d < bestD) { bestD = d; best = k; }
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
        v.setImage(data, size, size);
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

  /* ------------------------------------------------------------------ reading page */
  function runReader(root) {
    var v = new Viewer(document.getElementById("pixels"), document.getElementById("overlay"));
    var confirmBtn = document.getElementById("confirm"), trial = null, shownAt = 0, busy = false;
    var userWL = null;      // the reader's window/level carries over from trial to trial until reset

    function showWL() {
      document.getElementById("wl-window").textContent = Math.round(v.window);
      document.getElementById("wl-level").textContent = Math.round(v.level);
      document.getElementById("wl-zoom").textContent = v.zoom + "×";
      document.getElementById("wl-invert").textContent = v.invert ? "on" : "off";
      document.getElementById("choice").textContent = v.selected >= 0 ? String(v.selected + 1) : "none";
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
      fetchJSON(root.dataset.nextUrl).then(function (r) {
        if (r.status !== 200) { setStatus(r.data.error || "cannot load the next trial", "bad"); return null; }
        if (r.data.done) {
          root.classList.add("hidden");
          document.getElementById("done").classList.remove("hidden");
          return null;
        }
        trial = r.data;
        progress(trial);
        document.getElementById("max-key").textContent = String(trial.m);
        return fetchPixels(trial.region_url).then(function (data) {
          v.setImage(data, trial.rows, trial.cols);
          v.sites = trial.sites; v.selected = -1; v.marks = {};
          v.baseZoom = trial.magnification || 1;
          if (v.zoom < v.baseZoom) { v.zoom = v.baseZoom; }
          if (userWL) { v.window = userWL.window; v.level = userWL.level; } else { v.autoWindow(); }
          v.draw(); showWL(); setStatus("");
          shownAt = performance.now(); busy = false;
          root.dataset.sites = JSON.stringify(trial.sites);   // for assistive tools and the browser tests
          root.dataset.ready = trial.trial;
        });
      }).catch(function (err) { setStatus(err.message, "bad"); });
    }
    function submit() {
      if (!trial || busy || v.selected < 0) { return; }
      busy = true; confirmBtn.disabled = true; delete root.dataset.ready;
      var body = { chosen_site: v.selected, response_ms: Math.round(performance.now() - shownAt),
                   window: v.window, level: v.level, zoom: v.zoom, inverted: v.invert };
      fetchJSON(trial.response_url, body).then(function (r) {
        if (r.status === 409 && r.data.duplicate) { next(); return; }     // already stored (another tab)
        if (r.status !== 200) { setStatus(r.data.error || "the response was not stored", "bad"); busy = false; confirmBtn.disabled = false; return; }
        var fb = r.data.feedback;
        if (fb) {
          v.marks = {}; v.marks[fb.true_site] = "true";
          if (!fb.correct) { v.marks[v.selected] = "wrong"; }
          v.drawOverlay();
          setStatus(fb.correct ? "Correct." : "Not this time: the disc was at site " + (fb.true_site + 1) + ".",
                    fb.correct ? "good" : "bad");
          window.setTimeout(next, 900);
        } else { next(); }
      }).catch(function (err) { setStatus(err.message, "bad"); busy = false; confirmBtn.disabled = false; });
    }
    v.attachMouse(pick, changed, true);
    confirmBtn.addEventListener("click", submit);
    document.getElementById("reset").addEventListener("click", function () {
      userWL = null; v.autoWindow(); v.invert = false; v.zoom = v.baseZoom; v.draw(); showWL();
    });
    document.addEventListener("keydown", function (e) {
      if (!trial) { return; }
      var k = parseInt(e.key, 10), step = v.window * 0.08;
      if (k >= 1 && k <= v.sites.length) { pick(k - 1); e.preventDefault(); return; }
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
