"""The report's own script and styles: zoomable maps, the scan overlay of a candidate, reviewer decisions.

Plain JavaScript and a canvas, no library and nothing from the network, so
report.html stays one file that works offline.  The page carries its data
in ``<script type="application/json" id="report-data">`` (built by
:func:`closurecheck.reporting.report.viewer_data`): keyframe scans as
little-endian int16 centimetres (x, y in the robot frame), keyframe poses
and candidate deltas as float32, all base64; figures as JSON numbers.

Frames: the maps are drawn in the frame of the first keyframe (its pose is
the origin, x forward); an overlay is drawn in the frame of the
candidate's ``from`` scan, with the ``to`` scan placed at the registered
delta (left) and at the odometry's delta (right).

``window.closurecheck`` exposes the views and ``openCandidate(k)`` so that
tests (and curious readers) can drive the page.
"""

VIEWER_CSS = """
.viewer{position:relative;border:1px solid #dde2e8;border-radius:4px;background:#fff;min-width:0}
.viewer canvas{display:block;width:100%;height:100%;cursor:grab;touch-action:none}
.viewer canvas:active{cursor:grabbing}
.viewer .vtitle{position:absolute;left:8px;top:6px;font-size:12px;font-weight:600;background:rgba(255,255,255,.85);
  padding:1px 5px;border-radius:3px;pointer-events:none}
.viewer .vtools{position:absolute;right:6px;top:6px;display:flex;gap:4px}
.viewer .vtools button{font-size:12px;min-width:26px;padding:2px 6px;border:1px solid #b9c3cf;background:#fff;
  border-radius:3px;cursor:pointer}
.pair{display:grid;grid-template-columns:1fr 1fr;gap:10px}
.pair .viewer{height:520px}
.hint{font-size:12px;color:#5b6b7c}
.legend span.sw{display:inline-block;width:14px;height:4px;margin:0 5px 3px 12px;vertical-align:middle}
.legend span.dot{display:inline-block;width:8px;height:8px;border-radius:4px;margin:0 5px 0 12px}
#overlay-panel{position:fixed;left:3vw;top:3vh;width:94vw;height:92vh;background:#fff;border:1px solid #8795a5;
  border-radius:6px;box-shadow:0 8px 40px rgba(0,0,0,.35);z-index:10;display:flex;flex-direction:column;
  padding:10px 14px}
#overlay-panel[hidden]{display:none}
#overlay-panel .ohead{display:flex;gap:12px;align-items:baseline;flex-wrap:wrap}
#overlay-panel .ohead h3{margin:0;font-size:16px}
#overlay-panel .obody{flex:1;display:grid;grid-template-columns:1fr 1fr 380px;gap:10px;min-height:0;margin-top:8px}
#overlay-panel .obody .viewer{height:100%}
#overlay-panel .ofig{overflow:auto;font-size:12px}
#overlay-panel .ofig table{width:100%} #overlay-panel .ofig td{white-space:normal}
#overlay-panel tr.decider td{background:#fff3cd;font-weight:600}
.decide{display:flex;gap:6px;flex-wrap:wrap;align-items:center;margin:8px 0}
.decide button,.dtools button{padding:4px 10px;border-radius:3px;border:1px solid #8795a5;background:#fff;
  cursor:pointer}
.decide button.acc{border-color:#1a9850;color:#11683a} .decide button.rej{border-color:#d73027;color:#a1221b}
.decide button.on{color:#fff} .decide button.acc.on{background:#1a9850} .decide button.rej.on{background:#d73027}
.decide input{flex:1;min-width:120px;padding:3px 5px}
.calls{display:grid;grid-template-columns:repeat(auto-fill,minmax(430px,1fr));gap:12px}
.call{border:1px solid #dde2e8;border-radius:5px;padding:8px}
.call .pair .viewer{height:200px}
.call h4{margin:0 0 4px;font-size:13px}
.call p{margin:2px 0 6px;font-size:12px}
#decisions-text{width:100%;min-height:120px;font-family:ui-monospace,Menlo,Consolas,monospace;font-size:12px}
.dtools{display:flex;gap:8px;margin:6px 0}
table.sortable tbody tr{cursor:pointer}
table.sortable tbody tr:hover td{background:#eef6ff}
"""

VIEWER_JS = r"""
(function(){
'use strict';
var el = document.getElementById('report-data');
if (!el) { return; }
var D = JSON.parse(el.textContent);

function bytes(s){ var b = atob(s), n = b.length, u = new Uint8Array(n); for (var i = 0; i < n;
  i++) u[i] = b.charCodeAt(i); return u.buffer; }
var PTS = new Int16Array(bytes(D.scans.points));
var OFF = D.scans.offsets;
var ODOM = new Float32Array(bytes(D.odom)), POSE = new Float32Array(bytes(D.poses));
var K = OFF.length - 1;
var C = D.cands, NC = C.src.length;
var DELTA = new Float32Array(bytes(C.delta)), COVXY = new Float32Array(bytes(C.cov_xy));

// Farthest point of each scan from its robot (m): a scan out of view is skipped whole.
var REACH = new Float32Array(K);
for (var k = 0; k < K; k++) { var r = 0; for (var i = OFF[k]; i < OFF[k + 1];
  i++) { var x = PTS[2 * i], y = PTS[2 * i + 1]; var q = x * x + y * y; if (q > r) r = q;
  } REACH[k] = Math.sqrt(r) / 100; }

function pose(arr, k){ return [arr[3 * k], arr[3 * k + 1], arr[3 * k + 2]]; }
function wrap(a){ while (a > Math.PI) a -= 2 * Math.PI; while (a <= -Math.PI) a += 2 * Math.PI; return a; }
function between(a, b){ var c = Math.cos(a[2]), s = Math.sin(a[2]), dx = b[0] - a[0], dy = b[1] - a[1];
  return [c * dx + s * dy, -s * dx + c * dy, wrap(b[2] - a[2])]; }
function hex(c){ return [parseInt(c.substr(1, 2), 16), parseInt(c.substr(3, 2), 16), parseInt(c.substr(5, 2), 16)]; }
function fmt(v, d){ if (v === null || v === undefined || (typeof v === 'number' && !isFinite(v))) return '—';
  if (typeof v !== 'number') return String(v); var a = Math.abs(v);
  if (a !== 0 && (a < 1e-3 || a >= 1e5)) return v.toExponential(2); return String(+v.toPrecision(d || 4)); }

// ---------------------------------------------------------------- views
var VIEWS = {};
function View(box, opts){
  var self = this;
  this.box = box; this.opts = opts; this.cam = opts.cam || {x: 0, y: 0, s: 1};
  this.group = [this]; this.segments = [];
  this.canvas = document.createElement('canvas');
  box.appendChild(this.canvas);
  if (opts.title) { var t = document.createElement('div'); t.className = 'vtitle'; t.textContent = opts.title;
    box.appendChild(t); }
  var tools = document.createElement('div'); tools.className = 'vtools';
  [['+', 'zoom in', function(){ self.zoomAt(null, 1.6);
    }], ['\u2212', 'zoom out', function(){ self.zoomAt(null, 1 / 1.6); }],
   ['fit', 'fit the whole map (or double-click)', function(){ self.fit(); }]].forEach(function(b){
    var e = document.createElement('button'); e.type = 'button'; e.textContent = b[0]; e.title = b[1];
    e.addEventListener('click', b[2]); tools.appendChild(e); });
  box.appendChild(tools);
  var down = null, moved = 0;
  this.canvas.addEventListener('wheel', function(ev){
    ev.preventDefault();
    var r = self.canvas.getBoundingClientRect();
    self.zoomAt([ev.clientX - r.left, ev.clientY - r.top],
      Math.exp(-ev.deltaY * (ev.deltaMode === 1 ? 0.05 : 0.0015)));
  }, {passive: false});
  this.canvas.addEventListener('pointerdown', function(ev){ down = [ev.clientX, ev.clientY]; moved = 0;
    try { self.canvas.setPointerCapture(ev.pointerId); } catch (e) {} });
  this.canvas.addEventListener('pointermove', function(ev){
    if (!down) return;
    var dx = ev.clientX - down[0], dy = ev.clientY - down[1];
    moved += Math.abs(dx) + Math.abs(dy); down = [ev.clientX, ev.clientY];
    self.cam.x -= dx / self.cam.s; self.cam.y += dy / self.cam.s; self.changed();
  });
  this.canvas.addEventListener('pointerup', function(ev){
    var wasDown = down; down = null;
    if (wasDown && moved < 4) { var r = self.canvas.getBoundingClientRect();
      self.click(ev.clientX - r.left, ev.clientY - r.top); }
  });
  this.canvas.addEventListener('dblclick', function(ev){ ev.preventDefault(); self.fit(); });
}
View.prototype.size = function(){
  var r = this.canvas.getBoundingClientRect(), dpr = window.devicePixelRatio || 1;
  var w = Math.max(1, Math.round(r.width)), h = Math.max(1, Math.round(r.height));
  if (this.canvas.width !== Math.round(w * dpr) || this.canvas.height !== Math.round(h * dpr)) {
    this.canvas.width = Math.round(w * dpr); this.canvas.height = Math.round(h * dpr); }
  this.w = w; this.h = h; this.dpr = dpr;
};
View.prototype.toScreen = function(x, y){
  return [this.w / 2 + (x - this.cam.x) * this.cam.s, this.h / 2 - (y - this.cam.y) * this.cam.s]; };
View.prototype.toWorld = function(sx, sy){
  return [this.cam.x + (sx - this.w / 2) / this.cam.s, this.cam.y - (sy - this.h / 2) / this.cam.s]; };
View.prototype.zoomAt = function(at, f){
  this.size();
  var p = at || [this.w / 2, this.h / 2], w = this.toWorld(p[0], p[1]);
  // Down to a millimetre per pixel: centimetres stand out on a 100 m site.
  this.cam.s = Math.min(1000, Math.max(1e-3, this.cam.s * f));
  this.cam.x = w[0] - (p[0] - this.w / 2) / this.cam.s; this.cam.y = w[1] + (p[1] - this.h / 2) / this.cam.s;
  this.changed();
};
View.prototype.fit = function(){
  this.size();
  var b = this.opts.bounds();
  if (!b) return;
  var bw = Math.max(b[2] - b[0], 0.5), bh = Math.max(b[3] - b[1], 0.5);
  this.cam.x = (b[0] + b[2]) / 2; this.cam.y = (b[1] + b[3]) / 2;
  this.cam.s = 0.92 * Math.min(this.w / bw, this.h / bh);
  this.changed();
};
View.prototype.changed = function(){
  var g = this.group;
  if (this.pending) return;
  this.pending = true;
  var self = this;
  var run = function(){ self.pending = false; g.forEach(function(v){ v.draw(); }); };
  if (window.requestAnimationFrame) window.requestAnimationFrame(run); else setTimeout(run, 16);
};
View.prototype.draw = function(){
  this.size();
  var ctx = this.canvas.getContext('2d');
  ctx.setTransform(1, 0, 0, 1, 0, 0);
  ctx.fillStyle = '#fff'; ctx.fillRect(0, 0, this.canvas.width, this.canvas.height);
  this.segments = [];
  this.opts.draw(this, ctx);
  ctx.setTransform(this.dpr, 0, 0, this.dpr, 0, 0);
  scaleBar(this, ctx);
  this.drawn = (this.drawn || 0) + 1;
};
View.prototype.click = function(sx, sy){
  var best = -1, bestD = 7;
  this.segments.forEach(function(g){
    var ax = g[1], ay = g[2], bx = g[3], by = g[4], vx = bx - ax, vy = by - ay, L = vx * vx + vy * vy;
    var t = L > 0 ? Math.max(0, Math.min(1, ((sx - ax) * vx + (sy - ay) * vy) / L)) : 0;
    var dx = ax + t * vx - sx, dy = ay + t * vy - sy, d = Math.sqrt(dx * dx + dy * dy);
    if (d < bestD) { bestD = d; best = g[0]; }
  });
  if (best >= 0) openCandidate(best);
};
function link(views){ views.forEach(function(v){ v.group = views; v.cam = views[0].cam; }); }

function scaleBar(view, ctx){
  var target = 110 / view.cam.s, p = Math.pow(10, Math.floor(Math.log10(target))), len = p;
  [1, 2, 5, 10].forEach(function(m){ if (m * p <= target) len = m * p; });
  var px = len * view.cam.s, x0 = 12, y0 = view.h - 14;
  ctx.strokeStyle = '#1d2733'; ctx.lineWidth = 2; ctx.beginPath(); ctx.moveTo(x0, y0); ctx.lineTo(x0 + px, y0);
    ctx.stroke();
  ctx.fillStyle = '#1d2733'; ctx.font = '11px system-ui,sans-serif';
  var txt = len >= 1 ? (+len.toPrecision(3)) + ' m'
    : (len >= 0.01 ? (+(len * 100).toPrecision(3)) + ' cm' : (+(len * 1000).toPrecision(3)) + ' mm');
  ctx.fillText(txt, x0, y0 - 5);
}

// Scan points of keyframes ``list`` ([k, pose, rgb] each) into the canvas's pixels.
// Alpha builds up where points pile up: walls seen from many poses come out
// solid, a person or cart that moved leaves a faint trail.
function drawScans(view, ctx, list, alpha){
  var W = view.canvas.width, H = view.canvas.height, dpr = view.dpr, S = view.cam.s * dpr;
  var img = ctx.getImageData(0, 0, W, H), d = img.data;
  var size = Math.max(1, Math.min(5, Math.round(0.012 * S)));
  var a0 = alpha || 0.45;
  for (var n = 0; n < list.length; n++) {
    var k = list[n][0], p = list[n][1], rgb = list[n][2], sz = size + (list[n][3] || 0);
    var cx = W / 2 + (p[0] - view.cam.x) * S, cy = H / 2 - (p[1] - view.cam.y) * S, reach = REACH[k] * S + size;
    if (cx + reach < 0 || cy + reach < 0 || cx - reach > W || cy - reach > H) continue;
    var c = Math.cos(p[2]) * S * 0.01, s = Math.sin(p[2]) * S * 0.01;
    for (var i = OFF[k]; i < OFF[k + 1]; i++) {
      var qx = PTS[2 * i], qy = PTS[2 * i + 1];
      var sx = Math.floor(cx + c * qx - s * qy - sz / 2 + 0.5),
        sy = Math.floor(cy - (s * qx + c * qy) - sz / 2 + 0.5);
      for (var u = 0; u < sz; u++) for (var v = 0; v < sz; v++) {
        var X = sx + u, Y = sy + v;
        if (X < 0 || Y < 0 || X >= W || Y >= H) continue;
        var j = (Y * W + X) * 4;
        d[j] += (rgb[0] - d[j]) * a0; d[j + 1] += (rgb[1] - d[j + 1]) * a0; d[j + 2] += (rgb[2] - d[j + 2]) * a0;
          d[j + 3] = 255;
      }
    }
  }
  ctx.putImageData(img, 0, 0);
}

function keyframeList(poses, rgb){ var out = []; for (var k = 0; k < K; k++) out.push([k, pose(poses, k), rgb]);
  return out; }
function boundsOf(poses){
  var b = [Infinity, Infinity, -Infinity, -Infinity];
  for (var k = 0; k < K; k++) { var x = poses[3 * k], y = poses[3 * k + 1]; b[0] = Math.min(b[0], x - 3);
    b[1] = Math.min(b[1], y - 3); b[2] = Math.max(b[2], x + 3); b[3] = Math.max(b[3], y + 3); }
  return K ? b : null;
}
function drawTrajectory(view, ctx, poses){
  ctx.setTransform(view.dpr, 0, 0, view.dpr, 0, 0);
  ctx.strokeStyle = D.colours.trajectory; ctx.globalAlpha = 0.8; ctx.lineWidth = 1; ctx.beginPath();
  for (var k = 0; k < K; k++) { var p = view.toScreen(poses[3 * k], poses[3 * k + 1]); if (k) ctx.lineTo(p[0], p[1]);
    else ctx.moveTo(p[0], p[1]); }
  ctx.stroke(); ctx.globalAlpha = 1;
  if (K) { var s = view.toScreen(poses[0], poses[1]); ctx.fillStyle = D.colours.trajectory; ctx.beginPath();
    ctx.arc(s[0], s[1], 4, 0, 2 * Math.PI); ctx.fill(); }
}
// Closure lines between keyframes (clickable); ``which(k)`` gives the colour of candidate k or null.
function drawClosures(view, ctx, poses, which, width){
  ctx.setTransform(view.dpr, 0, 0, view.dpr, 0, 0);
  for (var k = 0; k < NC; k++) {
    var col = which(k); if (!col) continue;
    var a = view.toScreen(poses[3 * C.src[k]], poses[3 * C.src[k] + 1]), b = view.toScreen(poses[3 * C.dst[k]],
      poses[3 * C.dst[k] + 1]);
    if (Math.max(a[0], b[0]) < 0 || Math.max(a[1], b[1]) < 0 || Math.min(a[0], b[0]) > view.w || Math.min(a[1],
      b[1]) > view.h) continue;
    ctx.strokeStyle = col; ctx.lineWidth = width || 1.2; ctx.globalAlpha = 0.8;
    ctx.beginPath(); ctx.moveTo(a[0], a[1]); ctx.lineTo(b[0], b[1]); ctx.stroke();
    ctx.globalAlpha = 1; ctx.fillStyle = col;
    ctx.fillRect(a[0] - 1.5, a[1] - 1.5, 3, 3); ctx.fillRect(b[0] - 1.5, b[1] - 1.5, 3, 3);
    view.segments.push([k, a[0], a[1], b[0], b[1]]);
  }
  if (SELECTED >= 0 && which(SELECTED)) {
    var a2 = view.toScreen(poses[3 * C.src[SELECTED]], poses[3 * C.src[SELECTED] + 1]),
      b2 = view.toScreen(poses[3 * C.dst[SELECTED]], poses[3 * C.dst[SELECTED] + 1]);
    ctx.strokeStyle = '#ffbf00'; ctx.lineWidth = 4; ctx.globalAlpha = 0.7; ctx.beginPath(); ctx.moveTo(a2[0], a2[1]);
      ctx.lineTo(b2[0], b2[1]); ctx.stroke(); ctx.globalAlpha = 1;
  }
}
// 3-sigma position ellipses of the verified closures at their ``to`` keyframe, magnified D.ellipse_scale times.
function drawEllipses(view, ctx, poses){
  ctx.setTransform(view.dpr, 0, 0, view.dpr, 0, 0);
  ctx.strokeStyle = D.colours.ellipse; ctx.lineWidth = 0.8; ctx.globalAlpha = 0.75;
  var m = 3 * D.ellipse_scale;
  for (var k = 0; k < NC; k++) {
    if (!C.acc[k]) continue;
    var sxx = COVXY[3 * k], sxy = COVXY[3 * k + 1], syy = COVXY[3 * k + 2];
    if (!isFinite(sxx + sxy + syy)) continue;
    var th = poses[3 * C.src[k] + 2], c = Math.cos(th), s = Math.sin(th);
    // Rotate the src-frame covariance into the map frame: R C R^T.
    var a = c * c * sxx - 2 * c * s * sxy + s * s * syy, b = c * s * (sxx - syy) + (c * c - s * s) * sxy,
      e = s * s * sxx + 2 * c * s * sxy + c * c * syy;
    var tr = (a + e) / 2, det = Math.sqrt(Math.max(0, (a - e) * (a - e) / 4 + b * b));
    var l1 = Math.max(0, tr + det), l2 = Math.max(0, tr - det), ang = 0.5 * Math.atan2(2 * b, a - e);
    var px = poses[3 * C.dst[k]], py = poses[3 * C.dst[k] + 1];
    ctx.beginPath();
    for (var i = 0; i <= 32; i++) {
      var t = 2 * Math.PI * i / 32, u = Math.sqrt(l1) * m * Math.cos(t), v = Math.sqrt(l2) * m * Math.sin(t);
      var q = view.toScreen(px + Math.cos(ang) * u - Math.sin(ang) * v, py + Math.sin(ang) * u + Math.cos(ang) * v);
      if (i) ctx.lineTo(q[0], q[1]); else ctx.moveTo(q[0], q[1]);
    }
    ctx.stroke();
  }
  ctx.globalAlpha = 1;
}

var GROUP_COLOUR = D.group_colours;
function rejectedColour(k){ return C.acc[k] ? null : GROUP_COLOUR[D.reason_groups[C.reason[k]]]; }
function acceptedColour(k){ return C.acc[k] ? D.colours.accept : null; }
var MAP_RGB = hex(D.colours.map), ODOM_RGB = hex(D.colours.odom), FAINT_RGB = hex('#b8c2cc');

function mapView(id, title, poses, rgb, layers){
  var box = document.getElementById(id); if (!box) return null;
  var v = new View(box, {title: title, bounds: function(){ return boundsOf(poses); }, draw: function(view, ctx){
    drawScans(view, ctx, keyframeList(poses, rgb), rgb === FAINT_RGB ? 0.25 : 0.45);
    drawTrajectory(view, ctx, poses);
    (layers || []).forEach(function(f){ f(view, ctx); });
  }});
  VIEWS[id] = v; return v;
}

// ---------------------------------------------------------------- the overlay of one candidate
var SELECTED = -1;
var SRC_RGB = hex(D.colours.scan_from), DST_RGB = hex(D.colours.scan_to);
function registeredDelta(k){ var d = [DELTA[3 * k], DELTA[3 * k + 1], DELTA[3 * k + 2]];
  return isFinite(d[0] + d[1] + d[2]) ? d : null; }
function odometryDelta(k){ return between(pose(ODOM, C.src[k]), pose(ODOM, C.dst[k])); }
function pairBounds(k){
  var b = [Infinity, Infinity, -Infinity, -Infinity], ds = [[0, 0, 0]], r = registeredDelta(k);
  if (r) ds.push(r); ds.push(odometryDelta(k));
  [[C.src[k], [0, 0, 0]]].concat(ds.slice(1).map(function(d){ return [C.dst[k], d]; })).forEach(function(e){
    var kk = e[0], p = e[1], c = Math.cos(p[2]), s = Math.sin(p[2]);
    for (var i = OFF[kk]; i < OFF[kk + 1];
      i++) { var x = PTS[2 * i] / 100, y = PTS[2 * i + 1] / 100, X = p[0] + c * x - s * y, Y = p[1] + s * x + c * y;
      if (X < b[0]) b[0] = X; if (Y < b[1]) b[1] = Y; if (X > b[2]) b[2] = X; if (Y > b[3]) b[3] = Y; }
  });
  return isFinite(b[0]) ? b : [-5, -5, 5, 5];
}
function pairView(box, title, k, registered){
  var v = new View(box, {title: title, bounds: function(){ return pairBounds(v.k); }, draw: function(view, ctx){
    var kk = view.k; if (kk < 0) return;
    var d = registered ? registeredDelta(kk) : odometryDelta(kk);
    // The from scan one pixel larger: where the two coincide, blue rims the orange.
    var list = [[C.src[kk], [0, 0, 0], SRC_RGB, 1]];
    if (d) list.push([C.dst[kk], d, DST_RGB, 0]);
    drawScans(view, ctx, list, 0.8);
    ctx.setTransform(view.dpr, 0, 0, view.dpr, 0, 0);
    [[0, 0, 0, D.colours.scan_from]].concat(d ? [[d[0], d[1], d[2], D.colours.scan_to]] : []).forEach(function(p){
      var s = view.toScreen(p[0], p[1]); ctx.strokeStyle = p[3]; ctx.lineWidth = 2; ctx.beginPath();
        ctx.arc(s[0], s[1], 5, 0, 2 * Math.PI);
      ctx.moveTo(s[0], s[1]); ctx.lineTo(s[0] + 14 * Math.cos(p[2]), s[1] - 14 * Math.sin(p[2])); ctx.stroke(); });
    if (!d) { ctx.fillStyle = '#a1221b'; ctx.font = '13px system-ui,sans-serif';
      ctx.fillText('registration produced no alignment', 12, 44); }
  }});
  v.k = -1; return v;
}

var panel = document.getElementById('overlay-panel');
var PANEL = null;
function decisionButtons(container, k, noteInput){
  container.querySelectorAll('button[data-decision]').forEach(function(b){
    b.onclick = function(){ setDecision(k, b.getAttribute('data-decision'), noteInput ? noteInput.value : '');
      showDecision(container, k); };
  });
  showDecision(container, k);
}
function showDecision(container, k){
  var cur = currentDecision(k);
  container.querySelectorAll('button[data-decision]').forEach(function(b){
    b.classList.toggle('on', cur === b.getAttribute('data-decision')); });
}
function figureRows(k){
  var rows = [], chk = C.check[k] >= 0 ? D.checks[C.check[k]] : null, decider = chk ? D.check_figures[chk] : null;
  D.figure_order.forEach(function(name){
    var vals = C.figs[name]; if (!vals) return;
    var v = vals[k]; if (v === null || v === undefined) return;
    var bound = D.bounds[name];
    rows.push('<tr' + (decider
      && decider.indexOf(name) >= 0 ? ' class="decider"' : '') + '><td class="txt">' + esc(D.figure_text[name]
      || name) + '</td><td>' + fmt(v) + '</td><td>' + (bound !== undefined ? esc(D.bound_text[name]
      || '') + ' ' + fmt(bound) : '') + '</td></tr>');
  });
  return rows.join('');
}
function esc(s){
  var map = {'&': '&amp;', '<': '&lt;', '>': '&gt;', '"': '&quot;', "'": '&#39;'};
  return String(s).replace(/[&<>"']/g, function(c){ return map[c]; }); }
function describe(k){
  var reason = D.reasons[C.reason[k]], chk = C.check[k] >= 0 ? D.checks[C.check[k]] : null;
  var margin = C.margin[k];
  var txt = (C.acc[k] ? 'verified' : 'rejected') + ': ' + reason + ' \u2014 ' + D.reason_text[reason];
  var m = (margin === null
    || margin === undefined) ? 'no margin (not decided by a bound on a figure)' : ('margin ' + fmt(margin,
    3) + ' against ' + D.check_text[chk]);
  return [txt, m];
}
function openCandidate(k){
  if (!panel || k < 0 || k >= NC) return;
  SELECTED = k;
  if (!PANEL) {
    PANEL = {reg: pairView(document.getElementById('overlay-registered'), 'at the registered pose', -1, true),
             odo: pairView(document.getElementById('overlay-odometry'), 'at the odometry pose (for contrast)', -1,
               false)};
    link([PANEL.reg, PANEL.odo]); VIEWS['overlay-registered'] = PANEL.reg; VIEWS['overlay-odometry'] = PANEL.odo;
    panel.querySelector('.oclose').addEventListener('click', closePanel);
    document.addEventListener('keydown', function(e){ if (e.key === 'Escape') closePanel(); });
  }
  panel.hidden = false;
  var t = describe(k);
  panel.querySelector('.otitle').textContent = 'scans ' + D.ids[C.src[k]] + ' (from, blue) and ' + D.ids[C.dst[k]]
    + ' (to, orange)';
  panel.querySelector('.overdict').textContent = t[0];
  panel.querySelector('.omargin').textContent = t[1];
  panel.querySelector('.ofigs').innerHTML = figureRows(k);
  var note = panel.querySelector('input.onote'); note.value = '';
  decisionButtons(panel.querySelector('.decide'), k, note);
  PANEL.reg.k = k; PANEL.odo.k = k; PANEL.reg.fit();
  Object.keys(VIEWS).forEach(function(id){ if (VIEWS[id].opts.closures) VIEWS[id].changed(); });
}
function closePanel(){ if (panel) panel.hidden = true; SELECTED = -1;
  Object.keys(VIEWS).forEach(function(id){ if (VIEWS[id].opts.closures) VIEWS[id].changed(); }); }

// ---------------------------------------------------------------- reviewer decisions
var HEADER = 'from,to,decision,note';
var area = document.getElementById('decisions-text');
function csvCell(s){ s = String(s || ''); return /[",\n\r]/.test(s) ? '"' + s.replace(/"/g, '""') + '"' : s; }
function lines(){ return (area ? area.value : '').split(/\r?\n/).filter(function(l){ return l.trim() !== ''; }); }
function pairKey(a, b){ a = +a; b = +b; return Math.min(a, b) + ',' + Math.max(a, b); }
function findLine(ls, k){ var key = pairKey(D.ids[C.src[k]], D.ids[C.dst[k]]); for (var i = 0; i < ls.length;
  i++) { var f = ls[i].split(','); if (f.length >= 3 && pairKey(f[0], f[1]) === key) return i; } return -1; }
function currentDecision(k){ var ls = lines(), i = findLine(ls, k); return i < 0 ? null : ls[i].split(',')[2].trim();
  }
function setDecision(k, word, note){
  if (!area) return;
  var ls = lines(); if (!ls.length || ls[0].replace(/\s/g, '') !== HEADER) ls.unshift(HEADER);
  var row = [D.ids[C.src[k]], D.ids[C.dst[k]], word, csvCell(note)].join(',');
  var i = findLine(ls, k); if (i >= 0) ls[i] = row; else ls.push(row);
  area.value = ls.join('\n') + '\n';
  var n = document.getElementById('decisions-count'); if (n) n.textContent = String(ls.length - 1);
}
var copyBtn = document.getElementById('decisions-copy');
if (copyBtn) copyBtn.addEventListener('click', function(){
  area.select();
  var done = function(){ copyBtn.textContent = 'copied'; setTimeout(function(){ copyBtn.textContent = 'copy';
    }, 1500); };
  if (navigator.clipboard && window.isSecureContext) navigator.clipboard.writeText(area.value).then(done, function(){
    document.execCommand('copy'); done(); });
  else { document.execCommand('copy'); done(); }
});
var saveBtn = document.getElementById('decisions-save');
if (saveBtn) saveBtn.addEventListener('click', function(){
  var a = document.createElement('a'); a.href = URL.createObjectURL(new Blob([area.value], {type: 'text/csv'}));
  a.download = 'decisions.csv'; document.body.appendChild(a); a.click(); a.remove();
});
var clearBtn = document.getElementById('decisions-clear');
if (clearBtn) clearBtn.addEventListener('click', function(){ area.value = HEADER + '\n'; });

// ---------------------------------------------------------------- wiring
var odo = mapView('map-odometry', 'odometry only', ODOM, ODOM_RGB);
var opt = mapView('map-optimised', 'with verified loop closures', POSE, MAP_RGB, [function(view, ctx){
  drawClosures(view, ctx, POSE, acceptedColour, 1); }]);
if (opt) opt.opts.closures = true;
if (odo && opt) link([odo, opt]);
var acc = mapView('loops-verified', 'verified closures', POSE, FAINT_RGB, [function(view, ctx){
  drawClosures(view, ctx, POSE, acceptedColour, 1.4); drawEllipses(view, ctx, POSE); }]);
var rej = mapView('loops-rejected', 'rejected candidates', POSE, FAINT_RGB, [function(view, ctx){
  drawClosures(view, ctx, POSE, rejectedColour, 1); }]);
[acc, rej].forEach(function(v){ if (v) v.opts.closures = true; });
if (acc && rej) link([acc, rej]);
[odo, acc].forEach(function(v){ if (v) v.fit(); });

document.querySelectorAll('.call').forEach(function(card){
  var k = +card.getAttribute('data-k');
  var a = pairView(card.querySelector('.call-registered'), 'registered', k, true),
    b = pairView(card.querySelector('.call-odometry'), 'odometry', k, false);
  a.k = k; b.k = k; link([a, b]); a.fit();
  VIEWS['call-' + k] = a;
  card.querySelector('.call-open').addEventListener('click', function(){ openCandidate(k); });
  decisionButtons(card.querySelector('.decide'), k, null);
});
var table = document.getElementById('candidates');
if (table) table.tBodies[0].addEventListener('click', function(e){ var tr = e.target.closest('tr');
  if (tr && tr.hasAttribute('data-k')) openCandidate(+tr.getAttribute('data-k')); });
window.addEventListener('resize', function(){ Object.keys(VIEWS).forEach(function(id){ VIEWS[id].changed(); }); });
window.closurecheck = {views: VIEWS, openCandidate: openCandidate, candidates: NC, keyframes: K,
                       decide: function(k, word, note){ setDecision(k, word, note || ''); }};
})();
"""
