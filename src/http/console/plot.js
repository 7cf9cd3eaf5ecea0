// gibbsline console: a small time-series plot on a canvas. Points are
// {t: ms since 1970, y, lo, hi}; lo/hi (optional) draw a band (a bucket's
// min and max). Dragging across the plot asks for a zoom to that span.
'use strict';

const TIME_STEPS_MS = [
  1, 2, 5, 10, 20, 50, 100, 200, 500,
  1e3, 2e3, 5e3, 1e4, 15e3, 3e4, 6e4, 12e4, 3e5, 6e5, 9e5, 18e5,
  36e5, 72e5, 108e5, 216e5, 432e5, 864e5, 1728e5, 6048e5,
];

function niceStep(span, count) {
  const raw = span / Math.max(count, 1);
  const mag = Math.pow(10, Math.floor(Math.log10(raw)));
  for (const m of [1, 2, 2.5, 5, 10]) {
    if (m * mag >= raw) return m * mag;
  }
  return 10 * mag;
}

function pad2(n) { return String(n).padStart(2, '0'); }

function timeLabel(ms, stepMs) {
  const d = new Date(ms);
  const hms = pad2(d.getHours()) + ':' + pad2(d.getMinutes()) +
    (stepMs < 6e4 ? ':' + pad2(d.getSeconds()) : '');
  const frac = stepMs < 1e3 ? '.' + String(d.getMilliseconds()).padStart(3, '0') : '';
  if (stepMs >= 864e5) return (d.getMonth() + 1) + '-' + pad2(d.getDate());
  if (stepMs >= 36e5) return (d.getMonth() + 1) + '-' + pad2(d.getDate()) + ' ' + hms;
  return hms + frac;
}

class Plot {
  constructor(canvas, opts) {
    this.canvas = canvas;
    this.label = opts.label;
    this.unit = opts.unit;
    this.digits = opts.digits ?? 3;
    this.colour = opts.colour ?? '#1f5f8b';
    this.points = [];
    this.t0 = 0;
    this.t1 = 1;
    this.onZoom = null;
    this.drag = null;
    canvas.addEventListener('mousedown', (e) => { this.drag = { x0: e.offsetX, x1: e.offsetX }; });
    canvas.addEventListener('mousemove', (e) => {
      if (this.drag) { this.drag.x1 = e.offsetX; this.draw(); }
    });
    canvas.addEventListener('mouseup', () => this.endDrag());
    canvas.addEventListener('mouseleave', () => { this.drag = null; this.draw(); });
  }

  setWindow(t0, t1) { this.t0 = t0; this.t1 = Math.max(t1, t0 + 1); }

  setPoints(points) { this.points = points.filter((p) => Number.isFinite(p.y)); this.publish(); }

  // Live points: appended in time order; what slid out of the window goes.
  append(points, keepFrom) {
    for (const p of points) {
      if (!Number.isFinite(p.y)) continue;
      const last = this.points[this.points.length - 1];
      if (!last || p.t >= last.t) this.points.push(p);
    }
    let cut = 0;
    while (cut < this.points.length && this.points[cut].t < keepFrom) cut++;
    if (cut > 0) this.points.splice(0, cut);
    this.publish();
  }

  publish() { this.canvas.dataset.points = String(this.points.length); }

  endDrag() {
    const d = this.drag;
    this.drag = null;
    if (d && Math.abs(d.x1 - d.x0) > 8 && this.onZoom) {
      const a = this.timeAt(Math.min(d.x0, d.x1));
      const b = this.timeAt(Math.max(d.x0, d.x1));
      this.onZoom(a, b);
    }
    this.draw();
  }

  layout() {
    const w = this.canvas.clientWidth || 600;
    const h = this.canvas.clientHeight || 180;
    return { w, h, left: 64, right: 12, top: 20, bottom: 24 };
  }

  timeAt(x) {
    const l = this.layout();
    const f = (x - l.left) / Math.max(l.w - l.left - l.right, 1);
    return this.t0 + Math.min(Math.max(f, 0), 1) * (this.t1 - this.t0);
  }

  yRange() {
    let lo = Infinity; let hi = -Infinity;
    for (const p of this.points) {
      if (p.t < this.t0 || p.t > this.t1) continue;
      lo = Math.min(lo, p.lo ?? p.y); hi = Math.max(hi, p.hi ?? p.y);
    }
    if (!Number.isFinite(lo)) return [0, 1];
    if (hi - lo < 1e-9 * Math.max(1, Math.abs(hi))) {
      // A flat line: a band a few of the plot's last digits wide.
      const m = Math.max(Math.abs(hi) * 1e-3, 5 * Math.pow(10, -this.digits));
      return [lo - m, hi + m];
    }
    const m = (hi - lo) * 0.05;
    return [lo - m, hi + m];
  }

  draw() {
    const c = this.canvas;
    const l = this.layout();
    const dpr = window.devicePixelRatio || 1;
    if (c.width !== Math.round(l.w * dpr) || c.height !== Math.round(l.h * dpr)) {
      c.width = Math.round(l.w * dpr); c.height = Math.round(l.h * dpr);
    }
    const g = c.getContext('2d');
    g.setTransform(dpr, 0, 0, dpr, 0, 0);
    g.clearRect(0, 0, l.w, l.h);
    const [y0, y1] = this.yRange();
    const pw = l.w - l.left - l.right;
    const ph = l.h - l.top - l.bottom;
    const X = (t) => l.left + ((t - this.t0) / (this.t1 - this.t0)) * pw;
    const Y = (y) => l.top + (1 - (y - y0) / (y1 - y0)) * ph;
    this.drawAxes(g, l, X, Y, y0, y1);
    this.drawBand(g, X, Y);
    this.drawLine(g, X, Y);
    if (this.drag) {
      g.fillStyle = 'rgba(31,95,139,0.15)';
      g.fillRect(Math.min(this.drag.x0, this.drag.x1), l.top, Math.abs(this.drag.x1 - this.drag.x0), ph);
    }
  }

  drawAxes(g, l, X, Y, y0, y1) {
    g.strokeStyle = '#d4d8dd'; g.fillStyle = '#4a5560'; g.lineWidth = 1;
    g.font = '11px system-ui, sans-serif';
    g.textAlign = 'right'; g.textBaseline = 'middle';
    const ys = niceStep(y1 - y0, 4);
    for (let y = Math.ceil(y0 / ys) * ys; y <= y1; y += ys) {
      g.beginPath(); g.moveTo(l.left, Y(y)); g.lineTo(l.w - l.right, Y(y)); g.stroke();
      g.fillText(y.toFixed(Math.max(0, -Math.floor(Math.log10(ys)) + 1)), l.left - 4, Y(y));
    }
    const span = this.t1 - this.t0;
    const ts = TIME_STEPS_MS.find((s) => span / s <= 7) ?? 6048e5;
    const offset = new Date(this.t0).getTimezoneOffset() * 6e4;
    g.textAlign = 'center'; g.textBaseline = 'top';
    for (let t = Math.ceil((this.t0 - offset) / ts) * ts + offset; t <= this.t1; t += ts) {
      g.beginPath(); g.moveTo(X(t), l.top); g.lineTo(X(t), l.h - l.bottom); g.stroke();
      g.fillText(timeLabel(t, ts), X(t), l.h - l.bottom + 4);
    }
    g.textAlign = 'left'; g.fillStyle = '#1d2730';
    g.fillText(this.label + ' (' + this.unit + ')', l.left, 4);
  }

  drawBand(g, X, Y) {
    const band = this.points.filter((p) => p.lo !== undefined && p.hi !== undefined);
    if (band.length < 2) return;
    g.fillStyle = 'rgba(31,95,139,0.18)';
    g.beginPath();
    band.forEach((p, i) => (i ? g.lineTo(X(p.t), Y(p.hi)) : g.moveTo(X(p.t), Y(p.hi))));
    for (let i = band.length - 1; i >= 0; i--) g.lineTo(X(band[i].t), Y(band[i].lo));
    g.closePath(); g.fill();
  }

  drawLine(g, X, Y) {
    g.strokeStyle = this.colour; g.lineWidth = 1.5;
    g.beginPath();
    let started = false;
    for (const p of this.points) {
      if (p.gap) { started = false; continue; }
      if (started) g.lineTo(X(p.t), Y(p.y)); else { g.moveTo(X(p.t), Y(p.y)); started = true; }
    }
    g.stroke();
    if (this.points.length === 1) {
      const p = this.points[0];
      g.fillStyle = this.colour; g.fillRect(X(p.t) - 2, Y(p.y) - 2, 4, 4);
    }
  }
}

window.GibbsPlot = Plot;
