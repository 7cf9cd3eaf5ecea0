// gibbsline console: the bench overview, a channel's plots and cycles,
// and the alert list, over the JSON API (/api/v1). The token lives in
// this tab's session storage and travels as a header, never in a URL.
'use strict';

const TOKEN_KEY = 'gibbsline.token';
const WINDOWS = [['5 min', 3e5], ['1 h', 36e5], ['6 h', 216e5], ['24 h', 864e5], ['7 d', 6048e5]];
const RAW_SPAN_MS = 6e5; // up to 10 min, plots read raw readings; longer, buckets
const PLOT_BUCKETS = 600;
const SEVERITY_RANK = { info: 1, warning: 2, critical: 3 };

let page = null; // the page showing now: { stop() }

// ---------- small helpers ----------

function h(tag, attrs, ...children) {
  const el = document.createElement(tag);
  for (const [k, v] of Object.entries(attrs || {})) {
    if (v === undefined || v === null || v === false) continue;
    if (k.startsWith('on')) el.addEventListener(k.slice(2), v);
    else if (k === 'dataset') Object.assign(el.dataset, v);
    else el.setAttribute(k, v === true ? '' : v);
  }
  for (const c of children.flat()) {
    if (c === null || c === undefined) continue;
    el.append(c instanceof Node ? c : document.createTextNode(String(c)));
  }
  return el;
}

function pad(n, w = 2) { return String(Math.trunc(Math.abs(n))).padStart(w, '0'); }

// Local time in ISO 8601 with the offset: 2026-12-03T19:05:12+01:00.
function isoLocal(ms) {
  const d = new Date(ms);
  const off = -d.getTimezoneOffset();
  return d.getFullYear() + '-' + pad(d.getMonth() + 1) + '-' + pad(d.getDate()) + 'T' +
    pad(d.getHours()) + ':' + pad(d.getMinutes()) + ':' + pad(d.getSeconds()) +
    (off >= 0 ? '+' : '-') + pad(off / 60) + ':' + pad(off % 60);
}

function timeCell(ns) {
  if (!ns) return h('td', {}, '–');
  const ms = ns / 1e6;
  return h('td', { title: new Date(ms).toISOString(), class: 'time' }, isoLocal(ms));
}

function fmt(v, digits, unit) {
  if (v === null || v === undefined || !Number.isFinite(v)) return '–';
  return v.toFixed(digits) + (unit ? ' ' + unit : '');
}

function age(ms) {
  if (ms < 0) ms = 0;
  if (ms < 6e4) return (ms / 1e3).toFixed(0) + ' s';
  if (ms < 36e5) return (ms / 6e4).toFixed(0) + ' min';
  if (ms < 864e5) return (ms / 36e5).toFixed(1) + ' h';
  return (ms / 864e5).toFixed(1) + ' d';
}

// SOC and where it comes from: the fused count, or the model at an
// open-circuit estimate; unknown otherwise (never guessed under load).
function socOf(d) {
  if (!d) return { value: null, source: 'unknown' };
  // A chemistry's model not fitted to this cell is said so: built-in
  // models sit tens of mV off real cells.
  const note = d.ocv_model_basis === 'chemistry' ? ' · uncalibrated model' : '';
  if (d.soc_fused !== null && d.soc_fused !== undefined) return { value: d.soc_fused, source: 'counted' + note };
  if (d.soc_from_model !== null && d.soc_from_model !== undefined) {
    return { value: d.soc_from_model, source: 'model · ' + d.ocv_source.replace(/_/g, ' ') + note };
  }
  return { value: null, source: 'unknown' };
}

// ---------- API ----------

const api = {
  headers(extra) {
    const t = sessionStorage.getItem(TOKEN_KEY);
    return Object.assign({}, extra, t ? { Authorization: 'Bearer ' + t } : {});
  },
  async request(method, path, body) {
    const res = await fetch(path, {
      method,
      headers: this.headers(body ? { 'Content-Type': 'application/json' } : {}),
      body: body ? JSON.stringify(body) : undefined,
      cache: 'no-store',
    });
    const data = await res.json().catch(() => ({}));
    if (res.status === 401) askToken();
    if (!res.ok) {
      const err = new Error((data.error && data.error.message) || res.statusText);
      err.status = res.status;
      throw err;
    }
    return data;
  },
  get(path) { return this.request('GET', path); },
  post(path, body) { return this.request('POST', path, body); },
};

// Server-sent events over fetch, so the token goes in a header. Calls
// onEvent(name, data) until stopped; reconnects after a break.
function follow(path, onEvent) {
  const ctl = new AbortController();
  let stopped = false;
  let retry = 500;
  const conn = document.getElementById('conn');
  async function once() {
    const res = await fetch(path, { headers: api.headers({ Accept: 'text/event-stream' }), signal: ctl.signal });
    if (res.status === 401) { askToken(); throw new Error('unauthenticated'); }
    if (!res.ok) throw new Error(res.statusText);
    conn.classList.add('up');
    retry = 500;
    const reader = res.body.getReader();
    const dec = new TextDecoder();
    let buf = '';
    for (;;) {
      const { value, done } = await reader.read();
      if (done) return;
      buf += dec.decode(value, { stream: true });
      let cut;
      while ((cut = buf.indexOf('\n\n')) >= 0) {
        const block = buf.slice(0, cut);
        buf = buf.slice(cut + 2);
        let name = 'message'; let data = '';
        for (const line of block.split('\n')) {
          if (line.startsWith('event:')) name = line.slice(6).trim();
          else if (line.startsWith('data:')) data += line.slice(5).trim();
        }
        if (data) onEvent(name, JSON.parse(data));
      }
    }
  }
  (async () => {
    while (!stopped) {
      try { await once(); } catch (e) { /* reconnect below */ }
      conn.classList.remove('up');
      if (stopped) return;
      await new Promise((r) => setTimeout(r, retry));
      retry = Math.min(retry * 2, 10000);
    }
  })();
  return () => { stopped = true; ctl.abort(); };
}

// ---------- token ----------

function askToken() {
  const dlg = document.getElementById('token-dialog');
  if (!dlg.open) dlg.showModal();
}

function setupToken() {
  const dlg = document.getElementById('token-dialog');
  document.getElementById('token-button').addEventListener('click', askToken);
  document.getElementById('token-cancel').addEventListener('click', () => dlg.close());
  document.getElementById('token-form').addEventListener('submit', () => {
    const v = document.getElementById('token-input').value.trim();
    if (v) sessionStorage.setItem(TOKEN_KEY, v); else sessionStorage.removeItem(TOKEN_KEY);
    document.getElementById('token-input').value = '';
    render();
  });
}

// ---------- bench overview ----------

function worstSeverity(alerts) {
  return alerts.reduce((w, a) => (SEVERITY_RANK[a.severity] > (SEVERITY_RANK[w] || 0) ? a.severity : w), '');
}

function channelCard(s, alerts, serverMs) {
  const c = s.channel;
  const r = s.latest;
  const d = r && r.derived;
  const soc = socOf(d);
  const mine = alerts.filter((a) => a.channel_id === c.channel_id);
  const worst = worstSeverity(mine);
  // Seen by the server's clock (a rig's clock may be replayed or off).
  const seen = s.last_arrival_unix_ns ? age(serverMs - s.last_arrival_unix_ns / 1e6) : 'not since start';
  const mode = d ? d.operating_mode : 'none';
  return h('a', { class: 'card sev-' + (worst || 'none'), href: '#/channel/' + encodeURIComponent(c.channel_id), dataset: { channel: c.channel_id } },
    h('div', { class: 'card-head' },
      h('span', { class: 'cid' }, c.channel_id),
      h('span', { class: 'mode mode-' + mode }, mode.replace(/_/g, ' '))),
    h('div', { class: 'chem' }, c.chemistry_id + (c.cells_in_series > 1 ? ' · ' + c.cells_in_series + ' cells' : '')),
    h('dl', {},
      h('dt', {}, 'V'), h('dd', {}, fmt(r && r.volts, 4)),
      h('dt', {}, 'A'), h('dd', {}, fmt(r && r.amps_charge_positive, 3)),
      h('dt', {}, '°C'), h('dd', {}, fmt(r && r.temp_c, 1)),
      h('dt', {}, 'SOC'), h('dd', { title: soc.source }, soc.value === null ? 'unknown' : fmt(100 * soc.value, 1, '%'), h('small', {}, ' ' + soc.source)),
      h('dt', {}, 'ΔG'), h('dd', {}, fmt(d && d.delta_g_kj_per_mol, 2, 'kJ/mol')),
      h('dt', {}, 'drive'), h('dd', {}, d && d.driving_force_v !== null ? fmt(1e3 * d.driving_force_v, 1, 'mV') : '–')),
    h('div', { class: 'card-foot' },
      h('span', { title: 'last reading stamped ' + (s.last_seen_unix_ns ? isoLocal(s.last_seen_unix_ns / 1e6) : 'never') }, 'seen ' + seen + (s.last_arrival_unix_ns ? ' ago' : '')),
      h('span', { class: 'alerts' }, mine.length ? mine.length + ' active (' + worst + ')' : 'no active alerts')));
}

function overviewPage(main) {
  const grid = h('div', { class: 'grid', id: 'overview' });
  main.replaceChildren(h('h1', {}, 'Bench'), grid);
  let timer = null;
  async function refresh() {
    try {
      const o = await api.get('/api/v1/overview');
      const serverMs = o.server_unix_ns / 1e6;
      grid.replaceChildren(...o.states.map((s) => channelCard(s, o.active_alerts, serverMs)));
      if (!o.states.length) grid.append(h('p', { class: 'note' }, 'No channels yet.'));
      grid.dataset.channels = String(o.states.length);
      setAlertCount(o.active_alerts.length);
    } catch (e) {
      grid.replaceChildren(h('p', { class: 'error' }, 'Could not read the bench: ' + e.message));
    }
    timer = setTimeout(refresh, 1000);
  }
  refresh();
  return { stop() { clearTimeout(timer); } };
}

function setAlertCount(n) {
  document.getElementById('alert-count').textContent = n ? String(n) : '';
}

// ---------- channel view ----------

const PLOTS = [
  ['volts', 'Voltage', 'V', 4, '#1f5f8b'],
  ['amps', 'Current (charge +)', 'A', 3, '#8b4a1f'],
  ['soc', 'SOC', '%', 1, '#2f7d3a'],
  ['dg', 'ΔG', 'kJ/mol', 2, '#6a3f8b'],
];

function readingPoints(readings) {
  const out = { volts: [], amps: [], soc: [], dg: [] };
  for (const r of readings) {
    const t = r.time_unix_ns / 1e6;
    const d = r.derived || {};
    out.volts.push({ t, y: r.volts });
    if (r.amps_charge_positive !== null) out.amps.push({ t, y: r.amps_charge_positive });
    const soc = socOf(d).value;
    if (soc !== null) out.soc.push({ t, y: 100 * soc });
    if (d.delta_g_kj_per_mol !== null && d.delta_g_kj_per_mol !== undefined) out.dg.push({ t, y: d.delta_g_kj_per_mol });
  }
  return out;
}

// Buckets: mean with a min–max band; current as the bucket's mean
// (charge passed over its width).
function bucketPoints(buckets, widthNs) {
  const out = { volts: [], amps: [], soc: [], dg: [] };
  const widthH = widthNs / 3.6e12;
  for (const b of buckets) {
    const t = (b.start_unix_ns + widthNs / 2) / 1e6;
    out.volts.push({ t, y: b.volts.mean, lo: b.volts.min, hi: b.volts.max });
    if (b.charge_ah_delta !== null) out.amps.push({ t, y: b.charge_ah_delta / widthH });
    if (b.soc) out.soc.push({ t, y: 100 * b.soc.mean, lo: 100 * b.soc.min, hi: 100 * b.soc.max });
    if (b.delta_g_kj_per_mol) {
      const g = b.delta_g_kj_per_mol;
      out.dg.push({ t, y: g.mean, lo: g.min, hi: g.max });
    }
  }
  return out;
}

async function history(id, t0, t1) {
  const q = 'start_unix_ns=' + Math.floor(t0 * 1e6) + '&end_unix_ns=' + Math.ceil(t1 * 1e6);
  const base = '/api/v1/channels/' + encodeURIComponent(id);
  if (t1 - t0 <= RAW_SPAN_MS) {
    const r = await api.get(base + '/readings?' + q + '&limit=20000');
    return readingPoints(r.readings);
  }
  const width = Math.max(1e6, Math.floor(((t1 - t0) * 1e6) / PLOT_BUCKETS));
  const b = await api.get(base + '/buckets?' + q + '&bucket_width_ns=' + width);
  return bucketPoints(b.buckets, b.bucket_width_ns);
}

function statePanel(s) {
  const r = s.latest; const d = r && r.derived; const e = s.estimator || {};
  const soc = socOf(d);
  const row = (k, v) => [h('dt', {}, k), h('dd', {}, v)];
  return h('dl', { class: 'state' },
    row('mode', d ? d.operating_mode.replace(/_/g, ' ') : '–'),
    row('voltage', fmt(r && r.volts, 4, 'V')),
    row('current', fmt(r && r.amps_charge_positive, 3, 'A')),
    row('SOC', (soc.value === null ? 'unknown' : fmt(100 * soc.value, 1, '%')) + ' (' + soc.source + ')'),
    row('ΔG', fmt(d && d.delta_g_kj_per_mol, 2, 'kJ/mol')),
    row('log₁₀ Q / K', d ? fmt(d.log10_q, 2) + ' / ' + fmt(d.log10_k, 2) : '–'),
    row('E_eq per cell', fmt(d && d.equilibrium_cell_volts, 4, 'V')),
    row('driving force', d && d.driving_force_v !== null ? fmt(1e3 * d.driving_force_v, 1, 'mV') : '–'),
    row('charge', fmt(d && d.charge_ah, 4, 'Ah')),
    row('energy', fmt(d && d.energy_wh, 3, 'Wh')),
    row('R', fmt(e.resistance_ohm, 4, 'Ω') + (e.resistance_source ? ' (' + e.resistance_source + ')' : '')),
    row('last reading', r ? isoLocal(r.time_unix_ns / 1e6) : '–'));
}

function cyclesTable(cycles) {
  const head = ['run', '#', 'start', 'end', 'Ah in', 'Ah out', 'Wh in', 'Wh out', 'CE', 'EE', 'VE', 'SOC start', 'SOC end', ''];
  return h('table', { class: 'cycles', id: 'cycles' },
    h('thead', {}, h('tr', {}, head.map((x) => h('th', {}, x)))),
    h('tbody', {}, cycles.map((c) => h('tr', {},
      h('td', {}, c.run_id), h('td', {}, c.index), timeCell(c.start_unix_ns), timeCell(c.end_unix_ns),
      h('td', {}, fmt(c.charge_in_ah, 4)), h('td', {}, fmt(c.charge_out_ah, 4)),
      h('td', {}, fmt(c.energy_in_wh, 3)), h('td', {}, fmt(c.energy_out_wh, 3)),
      h('td', {}, fmt(c.coulombic_efficiency, 3)), h('td', {}, fmt(c.energy_efficiency, 3)),
      h('td', {}, fmt(c.voltage_efficiency, 3)),
      h('td', {}, c.start_soc === null ? '–' : fmt(100 * c.start_soc, 1, '%')),
      h('td', {}, c.end_soc === null ? '–' : fmt(100 * c.end_soc, 1, '%')),
      h('td', {}, [c.open ? 'open' : '', c.partial ? 'partial' : '', c.discharge_only ? 'half' : ''].filter(Boolean).join(' '))))));
}

function channelPage(main, id) {
  let span = WINDOWS[0][1];
  // The window ends at the newest reading, by the rig's clock (a replayed
  // or simulated rig stamps its own times); until one is known, now.
  let endMs = null;
  let live = true;
  let range = null;
  const plots = {};
  const canvases = PLOTS.map(([key]) => h('canvas', { class: 'plot', id: 'plot-' + key }));
  const status = h('span', { class: 'note', id: 'window-note' });
  const back = h('button', { type: 'button', hidden: true, id: 'back-live', onclick: () => { live = true; range = null; back.hidden = true; load(); } }, 'Back to live');
  const chooser = h('select', { id: 'window', onchange: () => { span = Number(chooser.value); live = true; range = null; back.hidden = true; load(); } },
    WINDOWS.map(([label, ms]) => h('option', { value: ms }, 'last ' + label)));
  const panel = h('div', { id: 'state-panel' });
  const cycles = h('div', { id: 'cycles-box' });
  main.replaceChildren(
    h('h1', {}, h('a', { href: '#/' }, 'Bench'), ' › ', id),
    h('div', { class: 'toolbar' }, chooser, back, status, h('span', { class: 'note' }, 'drag across a plot to zoom')),
    h('div', { class: 'channel' }, h('div', { class: 'plots' }, canvases), panel),
    h('h2', {}, 'Cycles'), cycles);
  PLOTS.forEach(([key, label, unit, digits, colour], i) => {
    plots[key] = new window.GibbsPlot(canvases[i], { label, unit, digits, colour });
    plots[key].onZoom = (a, b) => { live = false; range = [a, b]; back.hidden = false; load(); };
  });
  const draw = () => Object.values(plots).forEach((p) => p.draw());

  async function load() {
    if (endMs === null) {
      try {
        const s = await api.get('/api/v1/channels/' + encodeURIComponent(id) + '/state');
        endMs = s.latest ? s.latest.time_unix_ns / 1e6 : Date.now();
      } catch (e) { endMs = Date.now(); }
    }
    const [t0, t1] = range || [endMs - span, endMs];
    status.textContent = isoLocal(t0) + ' → ' + (range ? isoLocal(t1) : 'latest');
    try {
      const pts = await history(id, t0, t1);
      for (const [key] of PLOTS) { plots[key].setWindow(t0, t1); plots[key].setPoints(pts[key]); }
      draw();
    } catch (e) { status.textContent = 'Could not read history: ' + e.message; }
  }
  async function refreshSide() {
    try {
      panel.replaceChildren(statePanel(await api.get('/api/v1/channels/' + encodeURIComponent(id) + '/state')));
      cycles.replaceChildren(cyclesTable((await api.get('/api/v1/channels/' + encodeURIComponent(id) + '/cycles')).cycles));
    } catch (e) { panel.replaceChildren(h('p', { class: 'error' }, e.message)); }
  }
  const stopFeed = follow('/api/v1/live?channel_id=' + encodeURIComponent(id), (name, data) => {
    if (name !== 'readings' || !live) return;
    const pts = readingPoints(data.readings);
    const newest = data.readings.length ? data.readings[data.readings.length - 1].time_unix_ns / 1e6 : endMs;
    endMs = Math.max(endMs || 0, newest);
    for (const [key] of PLOTS) { plots[key].setWindow(endMs - span, endMs); plots[key].append(pts[key], endMs - span); }
    draw();
  });
  const side = setInterval(refreshSide, 2000);
  window.addEventListener('resize', draw);
  load(); refreshSide();
  return { stop() { stopFeed(); clearInterval(side); window.removeEventListener('resize', draw); } };
}

// ---------- alerts ----------

function alertRow(a, onAck) {
  return h('tr', { class: 'sev-' + a.severity, dataset: { alert: a.alert_id } },
    timeCell(a.raised_unix_ns), h('td', {}, a.channel_id), h('td', {}, a.kind.replace(/_/g, ' ')),
    h('td', { class: 'sev' }, a.severity), h('td', { class: 'msg' }, a.message),
    h('td', {}, fmt(a.trigger_value, 4) + ' / ' + fmt(a.threshold, 4) + ' ' + a.unit),
    a.cleared_unix_ns ? timeCell(a.cleared_unix_ns) : h('td', {}, 'active'),
    h('td', {}, a.acknowledged_by ? a.acknowledged_by + (a.acknowledge_note ? ': ' + a.acknowledge_note : '')
      : h('button', { type: 'button', class: 'ack', onclick: () => onAck(a) }, 'Acknowledge')));
}

function alertsPage(main) {
  const sev = h('select', { id: 'f-severity' }, ['', 'info', 'warning', 'critical'].map((s) => h('option', { value: s }, s || 'any severity')));
  const chan = h('input', { id: 'f-channel', placeholder: 'channel (all)', size: 14 });
  const active = h('input', { id: 'f-active', type: 'checkbox' });
  const body = h('tbody', {});
  const table = h('table', { class: 'alerts', id: 'alerts' },
    h('thead', {}, h('tr', {}, ['raised', 'channel', 'kind', 'severity', 'message', 'value / threshold', 'cleared', 'acknowledged'].map((x) => h('th', {}, x)))), body);
  const note = h('p', { class: 'note' });
  main.replaceChildren(h('h1', {}, 'Alerts'),
    h('div', { class: 'toolbar' }, sev, chan, h('label', {}, active, ' active only')), table, note);
  let pending = null;
  async function refresh() {
    const q = new URLSearchParams({ limit: '500' });
    if (sev.value) q.set('min_severity', sev.value);
    if (chan.value.trim()) q.set('channel_id', chan.value.trim());
    if (active.checked) q.set('active_only', 'true');
    try {
      // Newest first: page to the end, keep the last 500.
      let after = 0; let rows = [];
      for (let i = 0; i < 50; i++) {
        q.set('after_alert_id', String(after));
        const r = await api.get('/api/v1/alerts?' + q);
        rows = rows.concat(r.alerts).slice(-500);
        if (!r.next_after_alert_id) break;
        after = r.next_after_alert_id;
      }
      rows.reverse();
      body.replaceChildren(...rows.map((a) => alertRow(a, acknowledge)));
      table.dataset.rows = String(rows.length);
      note.textContent = rows.length ? '' : 'No alerts match.';
      setAlertCount(rows.filter((a) => !a.cleared_unix_ns).length);
    } catch (e) { note.textContent = 'Could not read alerts: ' + e.message; }
  }
  const soon = () => { clearTimeout(pending); pending = setTimeout(refresh, 150); };
  for (const el of [sev, chan, active]) el.addEventListener('change', soon);
  const stopFeed = follow('/api/v1/live', (name) => { if (name === 'alert') soon(); });
  refresh();
  return { stop() { stopFeed(); clearTimeout(pending); } };
}

function acknowledge(a) {
  const dlg = document.getElementById('ack-dialog');
  document.getElementById('ack-what').textContent = a.kind.replace(/_/g, ' ') + ' on ' + a.channel_id + ' (alert ' + a.alert_id + ')';
  document.getElementById('ack-error').textContent = '';
  const form = document.getElementById('ack-form');
  form.onsubmit = async (ev) => {
    ev.preventDefault();
    try {
      await api.post('/api/v1/alerts/' + a.alert_id + '/acknowledge', {
        acknowledged_by: document.getElementById('ack-name').value.trim(),
        note: document.getElementById('ack-note').value.trim(),
      });
      dlg.close();
      if (page && page.refresh) page.refresh();
      render();
    } catch (e) {
      document.getElementById('ack-error').textContent =
        e.status === 403 ? 'Your token may read but not acknowledge (operator role needed).' : e.message;
    }
  };
  document.getElementById('ack-cancel').onclick = () => dlg.close();
  dlg.showModal();
}

// ---------- routing ----------

function render() {
  if (page) page.stop();
  const main = document.getElementById('main');
  const hash = location.hash || '#/';
  const m = hash.match(/^#\/channel\/(.+)$/);
  for (const a of document.querySelectorAll('nav a')) a.classList.toggle('here', a.getAttribute('href') === hash);
  if (m) page = channelPage(main, decodeURIComponent(m[1]));
  else if (hash === '#/alerts') page = alertsPage(main);
  else page = overviewPage(main);
}

window.addEventListener('hashchange', render);
setupToken();
render();
