// pulsefleet web page: fleet overview and device page. Vanilla JS, no
// framework, no network beyond this gateway. Live updates arrive as
// Server-Sent Events from /api/events; when they fail the page polls every 2 s.
'use strict';

const SVGNS = 'http://www.w3.org/2000/svg';
const app = document.getElementById('app');
const liveEl = document.getElementById('live');

// ---------- small helpers ----------

function h(tag, attrs, ...kids) {
  const el = document.createElement(tag);
  for (const [k, v] of Object.entries(attrs || {})) {
    if (v === null || v === undefined || v === false) continue;
    if (k.startsWith('on')) el.addEventListener(k.slice(2), v);
    else if (k === 'text') el.textContent = v;
    else el.setAttribute(k, v === true ? '' : v);
  }
  for (const k of kids.flat(Infinity)) {
    if (k === null || k === undefined || k === false) continue;
    el.append(k instanceof Node ? k : document.createTextNode(String(k)));
  }
  return el;
}

function s(tag, attrs, ...kids) {
  const el = document.createElementNS(SVGNS, tag);
  for (const [k, v] of Object.entries(attrs || {})) {
    if (v !== null && v !== undefined) el.setAttribute(k, v);
  }
  for (const k of kids.flat(Infinity)) {
    if (k === null || k === undefined) continue;
    el.append(k instanceof Node ? k : document.createTextNode(String(k)));
  }
  return el;
}

const num = (v, d) => (v === null || v === undefined || Number.isNaN(v)) ? '–' : Number(v).toFixed(d);
const pct = (v, d = 1) => (v === null || v === undefined) ? '–' : (100 * v).toFixed(d) + ' %';
const pad = n => String(n).padStart(2, '0');
function clock(ms) {
  if (!ms) return '–';
  const d = new Date(ms);
  return `${pad(d.getHours())}:${pad(d.getMinutes())}:${pad(d.getSeconds())}`;
}
function stamp(ms) {
  if (!ms) return '–';
  const d = new Date(ms);
  return `${d.getFullYear()}-${pad(d.getMonth() + 1)}-${pad(d.getDate())} ${clock(ms)}`;
}
function ago(ms, now) {
  if (!ms) return 'never';
  const s = Math.max(0, Math.round((now - ms) / 1000));
  if (s < 90) return `${s} s ago`;
  if (s < 5400) return `${Math.round(s / 60)} min ago`;
  if (s < 172800) return `${Math.round(s / 3600)} h ago`;
  return `${Math.round(s / 86400)} d ago`;
}

let toastTimer = 0;
function toast(msg, isErr) {
  const t = document.getElementById('toast');
  t.textContent = msg;
  t.className = 'toast' + (isErr ? ' err' : '');
  t.hidden = false;
  clearTimeout(toastTimer);
  toastTimer = setTimeout(() => { t.hidden = true; }, 6000);
}

async function api(path, body) {
  const csrf = document.querySelector('meta[name="csrf-token"]').content;
  const opt = body === undefined ? {} : {
    method: 'POST', headers: { 'Content-Type': 'application/json', 'X-CSRF-Token': csrf }, body: JSON.stringify(body),
  };
  const r = await fetch(path, opt);
  if (r.status === 401) { location.href = '/login'; throw new Error('not logged in'); }
  const data = await r.json().catch(() => ({}));
  if (!r.ok) throw new Error(data.error || `${r.status} ${r.statusText}`);
  return data;
}

// ---------- priority and connection: a word and a shape ----------

const PRIORITY = {
  high: { word: 'HIGH', shape: () => s('polygon', { points: '7,1 13,12 1,12', fill: 'currentColor' }) },
  medium: { word: 'MEDIUM', shape: () => s('polygon', { points: '7,0.5 13,6.5 7,12.5 1,6.5', fill: 'currentColor' }) },
  low: { word: 'LOW', shape: () => s('rect', { x: 2, y: 2, width: 9, height: 9, fill: 'currentColor' }) },
};

function badge(priority, acked) {
  const p = PRIORITY[priority];
  if (!p) return h('span', { class: 'badge none' }, '– no alarm');
  const icon = s('svg', { width: 14, height: 13, viewBox: '0 0 14 13', 'aria-hidden': 'true' }, p.shape());
  const label = `${p.word} priority alarm${acked ? ', acknowledged' : ''}`;
  return h('span', { class: `badge ${priority}${acked ? ' acked' : ''}`, role: 'img', 'aria-label': label, title: label },
    icon, p.word, acked ? h('span', { class: 'small' }, ' · ACK') : null);
}

function connection(d, now) {
  const on = d.connected;
  const icon = s('svg', { width: 10, height: 10, viewBox: '0 0 10 10', 'aria-hidden': 'true' },
    on ? s('circle', { cx: 5, cy: 5, r: 4.5, fill: '#2d6a3e' })
      : s('circle', { cx: 5, cy: 5, r: 3.8, fill: 'none', stroke: 'currentColor', 'stroke-width': 1.6 }));
  return h('span', { class: 'conn ' + (on ? 'online' : 'offline') }, icon,
    on ? 'connected' : `offline, seen ${ago(d.last_seen_ms, now)}`);
}

// The displayed priority is the highest active one; it counts as
// acknowledged when every announced active episode is.
function alarmState(d) {
  const eps = (d.active_episodes || []).filter(e => e.announced_ms);
  const acked = eps.length > 0 && eps.every(e => e.acked_by);
  const by = eps.filter(e => e.acked_by).map(e => `${e.acked_by} at ${clock(e.acked_ms)}`);
  return { eps, acked, by: [...new Set(by)] };
}

// ---------- charts ----------

function sparkline(points) {
  const w = 160, hgt = 32, lo = 80, hi = 100;
  const svg = s('svg', { class: 'spark', width: w, height: hgt, viewBox: `0 0 ${w} ${hgt}`, role: 'img' });
  const vals = (points || []).filter(p => p.spo2 !== null);
  if (vals.length === 0) {
    svg.setAttribute('aria-label', 'no SpO2 in the last 30 minutes');
    svg.append(s('text', { x: 4, y: 20, fill: '#5d6673', 'font-size': 11 }, 'no data'));
    return svg;
  }
  const t0 = points[0].t_ms, t1 = points[points.length - 1].t_ms || t0 + 1;
  const x = t => 2 + (w - 4) * (t - t0) / Math.max(1, t1 - t0);
  const y = v => 2 + (hgt - 4) * (hi - Math.max(lo, Math.min(hi, v))) / (hi - lo);
  svg.append(s('line', { class: 'limit', x1: 0, x2: w, y1: y(90), y2: y(90) }));
  let d = '', pen = false;
  for (const p of points) {
    if (p.spo2 === null) { pen = false; continue; }
    d += `${pen ? 'L' : 'M'}${x(p.t_ms).toFixed(1)},${y(p.spo2).toFixed(1)}`;
    pen = true;
  }
  svg.append(s('path', { class: 'line', d }));
  const last = vals[vals.length - 1].spo2;
  const min = Math.min(...vals.map(p => p.spo2));
  svg.setAttribute('aria-label', `SpO2 over the last 30 minutes, lowest ${min.toFixed(0)} %, last ${last.toFixed(0)} %`);
  return svg;
}

// timeChart draws one panel: a line of key (with an optional min..max band)
// over [from, to], dashed limit lines, shaded alarm episodes.
function timeChart(o) {
  const w = o.width || 900, hgt = o.height || 150, L = 44, R = 10, T = 18, B = 22;
  const svg = s('svg', { class: 'chart', width: '100%', viewBox: `0 0 ${w} ${hgt}`, preserveAspectRatio: 'none', role: 'img', 'aria-label': o.label });
  const x = t => L + (w - L - R) * (t - o.from) / (o.to - o.from);
  const y = v => T + (hgt - T - B) * (o.hi - Math.max(o.lo, Math.min(o.hi, v))) / (o.hi - o.lo);
  svg.append(s('text', { x: L, y: 12 }, o.label));
  for (const e of o.episodes || []) {
    const a = Math.max(o.from, e.announced_ms || e.onset_ms), b = Math.min(o.to, e.ended_ms || o.to);
    if (b > a) svg.append(s('rect', { class: 'ep', x: x(a), y: T, width: Math.max(1, x(b) - x(a)), height: hgt - T - B }));
  }
  for (const v of o.ticks) {
    svg.append(s('line', { class: 'grid', x1: L, x2: w - R, y1: y(v), y2: y(v) }));
    svg.append(s('text', { x: L - 6, y: y(v) + 4, 'text-anchor': 'end' }, v));
  }
  for (const v of o.limits || []) svg.append(s('line', { class: 'limit', x1: L, x2: w - R, y1: y(v), y2: y(v) }));
  // time axis: about 6 labels at round minutes
  const span = o.to - o.from;
  const steps = [60e3, 300e3, 600e3, 900e3, 1800e3, 3600e3, 7200e3, 14400e3, 21600e3, 43200e3, 86400e3];
  const step = steps.find(st => span / st <= 7) || 86400e3;
  const tz = new Date().getTimezoneOffset() * 60e3;
  for (let t = Math.ceil((o.from - tz) / step) * step + tz; t <= o.to; t += step) {
    svg.append(s('line', { class: 'grid', x1: x(t), x2: x(t), y1: T, y2: hgt - B }));
    const d = new Date(t);
    svg.append(s('text', { x: x(t), y: hgt - 6, 'text-anchor': 'middle' }, `${pad(d.getHours())}:${pad(d.getMinutes())}`));
  }
  svg.append(s('line', { class: 'axis', x1: L, x2: w - R, y1: hgt - B, y2: hgt - B }));
  const stepMS = (o.stepS || 1) * 1000;
  if (o.band) {
    // min..max band as one polygon per run of buckets with values
    let run = [];
    const flush = () => {
      if (run.length === 0) return;
      const top = run.map(b => `${x(b.t_ms).toFixed(1)},${y(b[o.band[1]]).toFixed(1)} ${x(b.t_ms + stepMS).toFixed(1)},${y(b[o.band[1]]).toFixed(1)}`);
      const bot = run.slice().reverse().map(b => `${x(b.t_ms + stepMS).toFixed(1)},${y(b[o.band[0]]).toFixed(1)} ${x(b.t_ms).toFixed(1)},${y(b[o.band[0]]).toFixed(1)}`);
      svg.append(s('polygon', { class: 'band', points: top.concat(bot).join(' ') }));
      run = [];
    };
    for (const b of o.buckets) { if (b[o.band[0]] === null) flush(); else run.push(b); }
    flush();
  }
  let d = '', pen = false, prev = null;
  for (const b of o.buckets) {
    const v = b[o.key];
    if (v === null || (prev !== null && b.t_ms - prev > 1.5 * stepMS)) pen = false;
    if (v === null) continue;
    d += `${pen ? 'L' : 'M'}${x(b.t_ms + stepMS / 2).toFixed(1)},${y(v).toFixed(1)}`;
    pen = true;
    prev = b.t_ms;
  }
  if (d) svg.append(s('path', { class: 'line', d }));
  return svg;
}

function waveform(raw) {
  const w = 900, hgt = 140;
  const svg = s('svg', { class: 'chart', width: '100%', viewBox: `0 0 ${w} ${hgt}`, preserveAspectRatio: 'none', role: 'img',
    'aria-label': `raw red and infrared samples, ${(raw.red.length / raw.rate_hz).toFixed(1)} s at ${raw.rate_hz} Hz` });
  const lanes = [['red', 'line2', 'red'], ['ir', 'line', 'infrared']];
  lanes.forEach(([key, cls, name], i) => {
    const v = raw[key];
    const lo = Math.min(...v), hi = Math.max(...v);
    const top = 8 + i * (hgt / 2), lane = hgt / 2 - 16;
    const x = j => 60 + (w - 70) * j / Math.max(1, v.length - 1);
    const y = u => top + lane * (hi === lo ? 0.5 : (hi - u) / (hi - lo));
    svg.append(s('text', { x: 4, y: top + lane / 2 + 4 }, name));
    let d = '';
    v.forEach((u, j) => { d += `${j ? 'L' : 'M'}${x(j).toFixed(1)},${y(u).toFixed(1)}`; });
    svg.append(s('path', { class: cls, d }));
  });
  return svg;
}

// ---------- live updates ----------

let source = null, pollTimer = 0, refreshTimer = 0, refreshFn = null, pointFn = null;

function setLive(on, text) {
  liveEl.className = 'live ' + (on ? 'on' : 'off');
  liveEl.textContent = text;
}

function scheduleRefresh(delay) {
  if (refreshTimer) return;
  refreshTimer = setTimeout(() => { refreshTimer = 0; if (refreshFn) refreshFn(); }, delay);
}

function startLive(query) {
  if (!window.EventSource) { startPolling(); return; }
  source = new EventSource('/api/events' + query);
  source.onopen = () => { setLive(true, 'live'); clearInterval(pollTimer); pollTimer = 0; };
  source.onerror = () => { setLive(false, 'reconnecting… (updating every 2 s)'); startPolling(); };
  source.addEventListener('device', () => scheduleRefresh(300));
  source.addEventListener('episode', () => scheduleRefresh(200));
  source.addEventListener('point', ev => { if (pointFn) pointFn(JSON.parse(ev.data)); });
}

function startPolling() {
  if (pollTimer) return;
  pollTimer = setInterval(() => { if (refreshFn) refreshFn(); }, 2000);
}

// ---------- fleet overview ----------

async function acknowledge(id, episodeID) {
  try {
    const r = await api(`/api/device/${encodeURIComponent(id)}/acknowledge`, episodeID ? { episode_id: episodeID } : {});
    const n = r.acknowledged.length;
    toast(`Acknowledged ${n} alarm${n === 1 ? '' : 's'} of ${id}.`);
  } catch (e) {
    toast(`Acknowledgement of ${id} failed: ${e.message}`, true);
  }
  if (refreshFn) refreshFn();
}

function alarmCell(d) {
  const st = alarmState(d);
  const cell = h('td', { class: 'alarm' }, badge(d.priority, d.priority && st.acked));
  if (d.conditions.length) cell.append(h('span', { class: 'conds' }, d.conditions.join(', ')));
  if (d.priority && st.eps.length && !st.acked) {
    cell.append(' ', h('button', { class: 'primary ack', type: 'button', 'data-device': d.id,
      'aria-label': `Acknowledge the alarms of ${d.id}`, onclick: ev => { ev.target.disabled = true; acknowledge(d.id); } }, 'Acknowledge'));
  }
  if (st.acked && st.by.length) cell.append(h('span', { class: 'acknote' }, 'acknowledged by ' + st.by.join('; ')));
  return cell;
}

function fleetRow(d, now) {
  const l = d.latest || {};
  const stale = !d.connected;
  const cls = (d.priority ? `alarm-${d.priority}` : '');
  return h('tr', { class: cls, 'data-device': d.id },
    h('td', { class: 'dev' }, h('a', { href: `/device/${encodeURIComponent(d.id)}` }, d.id),
      h('span', { class: 'muted' }, [d.model, d.labels && Object.entries(d.labels).map(([k, v]) => `${k}=${v}`).join(' ')].filter(Boolean).join(' · '))),
    h('td', null, connection(d, now)),
    h('td', { class: 'num' }, pct(d.uptime_1h, 0), h('span', { class: 'muted' }, ' / '), pct(d.uptime_24h, 0)),
    h('td', { class: 'num v-spo2' + (stale ? ' stale' : '') }, num(l.spo2, 0)),
    h('td', { class: 'num v-pulse' + (stale ? ' stale' : '') }, num(l.pulse, 0)),
    h('td', { class: 'num v-pi' + (stale ? ' stale' : '') }, num(l.pi, 2)),
    h('td', { class: 'num v-sqi' + (stale ? ' stale' : '') }, num(l.sqi, 2)),
    alarmCell(d),
    h('td', null, sparkline(d.spark)),
    h('td', { class: 'num' }, d.battery_pct === null ? '–' : num(d.battery_pct, 0) + ' %'));
}

async function fleetPage() {
  document.title = 'pulsefleet · fleet';
  document.getElementById('crumbs').textContent = 'fleet overview';
  const table = h('table', { class: 'fleet', id: 'fleet' },
    h('caption', { class: 'muted small' }, ''),
    h('thead', null, h('tr', null,
      h('th', { scope: 'col' }, 'Device'), h('th', { scope: 'col' }, 'Connection'),
      h('th', { scope: 'col', class: 'num' }, 'Uptime 1 h / 24 h'),
      h('th', { scope: 'col', class: 'num' }, 'SpO2 %'), h('th', { scope: 'col', class: 'num' }, 'Pulse /min'),
      h('th', { scope: 'col', class: 'num' }, 'PI %'), h('th', { scope: 'col', class: 'num' }, 'SQI'),
      h('th', { scope: 'col' }, 'Alarm'), h('th', { scope: 'col' }, 'SpO2, last 30 min'),
      h('th', { scope: 'col', class: 'num' }, 'Battery'))),
    h('tbody'));
  const summary = h('p', { class: 'summary', id: 'summary' });
  const legend = h('div', { class: 'legend', 'aria-label': 'legend' },
    h('span', null, badge('high')), h('span', null, badge('medium')), h('span', null, badge('low')),
    h('span', null, badge('high', true), ' acknowledged'),
    h('span', null, 'dashed line in a sparkline: SpO2 90 %'));
  app.replaceChildren(h('h1', null, 'Fleet'), summary, table, legend);

  refreshFn = async () => {
    let data;
    try { data = await api('/api/fleet'); } catch (e) { setLive(false, 'gateway unreachable: ' + e.message); return; }
    const rows = data.devices.map(d => fleetRow(d, data.now_ms));
    table.tBodies[0].replaceChildren(...rows);
    if (!rows.length) table.tBodies[0].append(h('tr', null, h('td', { colspan: 10, class: 'muted' }, 'No device has connected yet.')));
    const conn = data.devices.filter(d => d.connected).length;
    const alarms = data.devices.filter(d => d.priority).length;
    summary.replaceChildren(h('b', null, String(data.devices.length)), ' devices · ', h('b', null, String(conn)), ' connected · ',
      h('b', { id: 'alarm-count' }, String(alarms)), ` with an active alarm · as of ${clock(data.now_ms)}`);
  };
  pointFn = p => {
    const row = table.querySelector(`tr[data-device="${CSS.escape(p.device)}"]`);
    if (!row) { scheduleRefresh(500); return; }
    row.querySelector('.v-spo2').textContent = num(p.spo2, 0);
    row.querySelector('.v-pulse').textContent = num(p.pulse, 0);
    row.querySelector('.v-pi').textContent = num(p.pi, 2);
    row.querySelector('.v-sqi').textContent = num(p.sqi, 2);
  };
  await refreshFn();
  // Every second of every device is worth streaming for a pilot-sized fleet;
  // a large one gets connection and alarm events live and values every 5 s.
  const many = table.tBodies[0].rows.length > 300;
  setInterval(() => refreshFn(), many ? 5000 : 15000); // uptime and sparklines
  startLive(many ? '?points=0' : '?points=1');
}

// ---------- device page ----------

const RANGES = [{ m: 15, label: '15 min' }, { m: 30, label: '30 min' }, { m: 60, label: '1 h' }, { m: 360, label: '6 h' }, { m: 1440, label: '24 h' }];

function qualityTable(q) {
  const rows = [
    ['Sessions / reconnects', `${q.sessions} / ${q.reconnects}`],
    ['Uptime 1 h / 24 h / 7 d', `${pct(q.uptime_1h)} / ${pct(q.uptime_24h)} / ${pct(q.uptime_7d)}`],
    ['Messages accepted', q.chunks_accepted],
    ['Lost (sequence gaps)', q.chunks_lost],
    ['Duplicates / late / rejected', `${q.duplicates} / ${q.late_chunks} / ${q.chunks_rejected}`],
    ['Clock drift', q.clock_drift_ppm != null ? `${num(q.clock_drift_ppm, 1)} ppm` : 'not yet estimated'],
    ['Effective sample rate', q.effective_sample_rate_hz != null ? `${num(q.effective_sample_rate_hz, 2)} Hz` : '–'],
    ['Seconds with valid SpO2', pct(q.valid_spo2_share)],
    ['Clipping / low resolution', `${pct(q.clipping_share)} / ${pct(q.low_resolution_share)}`],
    ['SQI p10 / p50 / p90', q.sqi ? `${num(q.sqi.p10, 2)} / ${num(q.sqi.p50, 2)} / ${num(q.sqi.p90, 2)}` : '–'],
    ['PI p10 / p50 / p90', q.pi_pct ? `${num(q.pi_pct.p10, 2)} / ${num(q.pi_pct.p50, 2)} / ${num(q.pi_pct.p90, 2)} %` : '–'],
    ['Battery', q.battery_pct === null ? 'unknown' : `${num(q.battery_pct, 0)} %`],
  ];
  return h('dl', { class: 'facts', id: 'quality' }, rows.map(([k, v]) => [h('dt', null, k), h('dd', null, String(v))]));
}

function episodesTable(eps, id) {
  const body = eps.map(e => h('tr', { class: e.active ? `alarm-${e.priority}` : '' },
    h('td', null, e.condition),
    h('td', null, badge(e.priority, !!e.acked_by)),
    h('td', null, (new Date(e.onset_ms)).toDateString() === (new Date()).toDateString() ? clock(e.onset_ms) : stamp(e.onset_ms)),
    h('td', null, e.announced_ms ? clock(e.announced_ms) : 'not announced'),
    h('td', null, e.ended_ms ? clock(e.ended_ms) : (e.active ? 'active' : '–')),
    h('td', { class: 'num' }, e.min_spo2 === null ? '–' : num(e.min_spo2, 0) + ' %'),
    h('td', null, e.acked_by ? `${e.acked_by} at ${clock(e.acked_ms)}` :
      (e.active && e.announced_ms ? h('button', { type: 'button', class: 'ack', onclick: ev => { ev.target.disabled = true; acknowledge(id, e.id); } }, 'Acknowledge') : '–'))));
  return h('div', { class: 'scroll' }, h('table', { id: 'episodes' },
    h('thead', null, h('tr', null, ['Condition', 'Priority', 'Onset', 'Announced', 'Ended', 'Lowest SpO2', 'Acknowledged'].map(t => h('th', { scope: 'col' }, t)))),
    h('tbody', null, body.length ? body : h('tr', null, h('td', { colspan: 7, class: 'muted' }, 'No alarm episodes recorded.')))));
}

async function devicePage(id) {
  document.title = `pulsefleet · ${id}`;
  document.getElementById('crumbs').replaceChildren(h('a', { href: '/' }, 'fleet'), ` › ${id}`);
  let range = 30;
  const head = h('div', { class: 'panel', id: 'device-head' });
  const alarm = h('div', { class: 'panel', id: 'alarm' });
  const trend = h('div', { class: 'panel', id: 'trend' });
  const quality = h('div', { class: 'panel' });
  const episodes = h('div', { class: 'panel' });
  const raw = h('div', { class: 'panel', id: 'raw' });
  app.replaceChildren(head, alarm, trend, h('div', { class: 'grid' }, quality, episodes), raw);

  const seg = h('span', { class: 'seg', role: 'group', 'aria-label': 'trend range' }, RANGES.map(r =>
    h('button', { type: 'button', 'aria-pressed': String(r.m === range), onclick: () => { range = r.m; seg.querySelectorAll('button').forEach(b => b.setAttribute('aria-pressed', String(b.textContent === r.label))); loadTrend(); } }, r.label)));
  let lastEpisodes = [];

  async function loadTrend() {
    let t;
    try { t = await api(`/api/device/${encodeURIComponent(id)}/trend?minutes=${range}`); } catch (e) { return; }
    const common = { from: t.from_ms, to: t.to_ms, buckets: t.buckets, stepS: t.step_s, episodes: lastEpisodes.filter(e => e.announced_ms) };
    trend.replaceChildren(h('h2', null, 'Trend'), seg,
      timeChart({ ...common, key: 'spo2', band: ['spo2_min', 'spo2_max'], lo: 70, hi: 100, ticks: [70, 80, 90, 100], limits: [90], label: 'SpO2 % (mean, band: min to max per step)' }),
      timeChart({ ...common, key: 'pulse', lo: 30, hi: 180, ticks: [40, 80, 120, 160], label: 'Pulse /min', height: 120 }),
      timeChart({ ...common, key: 'sqi', band: ['sqi_min', 'sqi'], lo: 0, hi: 1, ticks: [0, 0.5, 1], label: 'Signal quality index (mean; band down to the lowest)', height: 110 }),
      timeChart({ ...common, key: 'coverage', lo: 0, hi: 1, ticks: [0, 1], label: 'Share of seconds received per step', height: 80 }),
      h('div', { class: 'legend' }, h('span', null, 'shaded: announced alarm episodes'), h('span', null, 'dashed: SpO2 90 %'),
        h('span', null, `step ${t.step_s} s`)));
  }

  async function loadRaw() {
    let r;
    try { r = await api(`/api/device/${encodeURIComponent(id)}/raw?seconds=5`); } catch (e) { return; }
    raw.replaceChildren(h('h2', null, 'Raw waveform excerpt'),
      ...(r.captured ? [waveform(r), h('p', { class: 'muted small' }, `${(r.red.length / r.rate_hz).toFixed(1)} s from ${stamp(r.start_ms)} at ${r.rate_hz} Hz (device clock); each channel scaled to its own range`)]
        : [h('p', { class: 'muted' }, 'No raw samples captured for this device (raw capture is off, or it sends summaries).')]));
  }

  refreshFn = async () => {
    let data;
    try { data = await api(`/api/device/${encodeURIComponent(id)}`); } catch (e) {
      head.replaceChildren(h('h1', null, id), h('p', { class: 'muted' }, e.message));
      return;
    }
    const d = data.device, l = d.latest || {};
    lastEpisodes = data.episodes;
    head.replaceChildren(h('h1', null, d.id),
      h('p', { class: 'muted' }, [d.model, d.firmware && `firmware ${d.firmware}`, d.mode && `${d.mode} mode`, d.profile && `profile ${d.profile}`, d.calibration && `calibration ${d.calibration}`].filter(Boolean).join(' · ')),
      h('div', { class: 'values' },
        h('div', null, h('span', { class: 'k' }, 'Connection'), connection(d, data.now_ms)),
        h('div', null, h('span', { class: 'k' }, 'SpO2'), h('span', { class: 'v', id: 'v-spo2' }, num(l.spo2, 0)), ' %'),
        h('div', null, h('span', { class: 'k' }, 'Pulse'), h('span', { class: 'v', id: 'v-pulse' }, num(l.pulse, 0)), ' /min'),
        h('div', null, h('span', { class: 'k' }, 'PI'), h('span', { class: 'v', id: 'v-pi' }, num(l.pi, 2)), ' %'),
        h('div', null, h('span', { class: 'k' }, 'SQI'), h('span', { class: 'v', id: 'v-sqi' }, num(l.sqi, 2))),
        h('div', null, h('span', { class: 'k' }, 'Flags'), h('span', { id: 'v-flags' }, (l.flags || []).join(', ') || 'none')),
        h('div', null, h('span', { class: 'k' }, 'Last value'), h('span', { id: 'v-time' }, clock(l.t_ms)))));
    const st = alarmState(d);
    const pauseSel = h('select', { 'aria-label': 'pause length' }, [120, 300, 600].map(s => h('option', { value: s }, `${s / 60} min`)));
    alarm.replaceChildren(h('h2', null, 'Alarm'),
      h('div', null, badge(d.priority, d.priority && st.acked), d.conditions.length ? h('span', { class: 'conds' }, d.conditions.join(', ')) : null,
        st.acked && st.by.length ? h('span', { class: 'acknote' }, 'acknowledged by ' + st.by.join('; ')) : null,
        d.paused_until_ms ? h('span', { class: 'acknote' }, `announcements paused until ${clock(d.paused_until_ms)}`) : null),
      h('div', { class: 'actions' },
        h('button', { type: 'button', class: 'primary ack', disabled: !(d.priority && st.eps.length && !st.acked), onclick: ev => { ev.target.disabled = true; acknowledge(id); } }, 'Acknowledge all'),
        pauseSel,
        h('button', { type: 'button', onclick: async () => { try { await api(`/api/device/${encodeURIComponent(id)}/pause`, { duration_s: Number(pauseSel.value), reason: 'paused from the web page' }); toast('Announcements paused.'); } catch (e) { toast(e.message, true); } refreshFn(); } }, 'Pause announcements'),
        d.paused_until_ms ? h('button', { type: 'button', onclick: async () => { try { await api(`/api/device/${encodeURIComponent(id)}/pause`, { duration_s: 0 }); } catch (e) { toast(e.message, true); } refreshFn(); } }, 'Resume') : null),
      h('p', { class: 'muted small' }, 'Pausing stops announcement only; conditions are still evaluated and logged.'));
    quality.replaceChildren(h('h2', null, 'Signal quality and uptime'), qualityTable(data.quality));
    episodes.replaceChildren(h('h2', null, 'Recent alarm episodes'), episodesTable(data.episodes, id));
    loadTrend();
    loadRaw();
  };
  pointFn = p => {
    if (p.device !== id) return;
    const set = (sel, v) => { const e = document.getElementById(sel); if (e) e.textContent = v; };
    set('v-spo2', num(p.spo2, 0)); set('v-pulse', num(p.pulse, 0)); set('v-pi', num(p.pi, 2)); set('v-sqi', num(p.sqi, 2));
    set('v-flags', (p.flags || []).join(', ') || 'none'); set('v-time', clock(p.t_ms));
  };
  await refreshFn();
  setInterval(() => refreshFn(), 10000);
  startLive(`?device=${encodeURIComponent(id)}&points=1`);
}

// ---------- route ----------

const m = location.pathname.match(/^\/device\/([^/]+)$/);
if (m) devicePage(decodeURIComponent(m[1])); else fleetPage();
