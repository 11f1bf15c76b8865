// pulsefleet web page: shared helpers, alarm states, live updates and the
// route. Vanilla JS, no framework, no network beyond this gateway. The
// overview is fleet.js, the device page device.js, the charts charts.js;
// the element builder and the JSON call are kit.js's.
// The JSON is the API's messages through protojson (.proto field names;
// 64-bit integers as strings; a field at its zero value, or an unset
// optional value, is absent).
'use strict';

const PF = window.pulsefleet = {};
const SVGNS = 'http://www.w3.org/2000/svg';
const app = document.getElementById('app');
const liveEl = document.getElementById('live');

// ---------- small helpers ----------

const h = window.pfKit.el; // kit.js

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

const has = v => v !== null && v !== undefined && !Number.isNaN(v);
const n64 = v => (v === undefined || v === null) ? 0 : Number(v); // protojson int64: a string, absent = 0
const num = (v, d) => has(v) ? Number(v).toFixed(d) : '–';
const pct = (v, d = 1) => has(v) ? (100 * v).toFixed(d) + ' %' : '–';
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
function age(msAgo) {
  const s = Math.max(0, Math.round(msAgo / 1000));
  if (s < 90) return `${s} s`;
  if (s < 5400) return `${Math.round(s / 60)} min`;
  if (s < 172800) return `${Math.round(s / 3600)} h`;
  return `${Math.round(s / 86400)} d`;
}
const ago = (ms, now) => ms ? `${age(now - ms)} ago` : 'never';

let toastTimer = 0;
function toast(msg, isErr) {
  const t = document.getElementById('toast');
  t.textContent = msg;
  t.className = 'toast' + (isErr ? ' err' : '');
  t.hidden = false;
  clearTimeout(toastTimer);
  toastTimer = setTimeout(() => { t.hidden = true; }, 6000);
}

const api = window.pfKit.call; // kit.js: JSON with the CSRF token on writes

// ---------- the gateway clock, condition labels, stale values ----------

// The gateway's clock, advanced by the browser's between answers.
let clockBase = { server: Date.now(), local: Date.now() };
function setServerNow(ms) { clockBase = { server: ms, local: Date.now() }; }
function now() { return clockBase.server + (Date.now() - clockBase.local); }

let labels = {};
const label = c => labels[c] || c;

// A value older than the stale age (default from the gateway, 10 s;
// ?stale=S in the URL overrides) is never shown as current: the same rule
// as `pulsefleet devices --stale` (internal/attention.Stale).
let staleMS = 10000;
function setStale(ms) {
  const q = Number(new URLSearchParams(location.search).get('stale'));
  staleMS = q > 0 ? q * 1000 : ms;
}
function valueAge(d, t) {
  const l = d.latest;
  const tms = l ? n64(l.time_unix_ms) : 0;
  const ageMS = tms ? t - tms : Infinity;
  return { stale: !d.connected || !tms || ageMS > staleMS, ageMS, tms };
}

// ---------- priority and alarm state: a shape, a word, a colour ----------

const PRIORITY_OF = { PRIORITY_LOW: 'low', PRIORITY_MEDIUM: 'medium', PRIORITY_HIGH: 'high' };
const RANK = { '': 0, low: 1, medium: 2, high: 3 };
const prio = p => PRIORITY_OF[p] || '';

// Project shapes (our own): high an upward triangle, medium a diamond, low
// a square; filled while the condition is present, hollow once it ended.
const SHAPES = {
  high: fill => s('polygon', { points: '7,1 13,12 1,12', fill, stroke: 'currentColor', 'stroke-width': 1.5 }),
  medium: fill => s('polygon', { points: '7,0.8 13,6.5 7,12.2 1,6.5', fill, stroke: 'currentColor', 'stroke-width': 1.5 }),
  low: fill => s('rect', { x: 2, y: 2, width: 9, height: 9, fill, stroke: 'currentColor', 'stroke-width': 1.5 }),
};

// The states an alarm is shown in (docs/contracts.md, "Alarm states on the
// web page"), after the meanings of IEC 60601-1-8.
const STATES = {
  present: 'present',
  escalated: 'escalated',
  acknowledged: 'acknowledged',
  latched: 'ended, not acknowledged',
  ended: 'ended',
  withdrawn: 'withdrawn',
};

// episodeState is the state of one episode at t.
function episodeState(e) {
  const ended = n64(e.ended_unix_ms) > 0, acked = !!e.acknowledged_by;
  if (!n64(e.announced_unix_ms)) return 'withdrawn';
  if (!e.active) return 'ended';
  if (acked) return 'acknowledged';
  if (ended) return 'latched';
  return n64(e.escalated_unix_ms) ? 'escalated' : 'present';
}

// deviceAlarm sums up a device's active episodes: the highest priority and
// the most pressing state at it (present or escalated, then latched, then
// acknowledged), who acknowledged, and the pause.
function deviceAlarm(d, eps, t) {
  const act = (eps || []).filter(e => e.active && n64(e.announced_unix_ms));
  let priority = prio(d.alarm_priority);
  for (const e of act) if (RANK[prio(e.priority)] > RANK[priority]) priority = prio(e.priority);
  const top = act.filter(e => prio(e.priority) === priority);
  const order = ['escalated', 'present', 'latched', 'acknowledged'];
  let state = '';
  for (const st of order) if (top.some(e => episodeState(e) === st)) { state = st; break; }
  if (priority && !state) state = 'present';
  const by = [...new Set(act.filter(e => e.acknowledged_by).map(e => `${e.acknowledged_by} at ${clock(n64(e.acknowledged_unix_ms))}`))];
  const pausedUntil = n64(d.alarms_paused_until_unix_ms);
  return { priority, state, eps: act, by, unacked: act.some(e => !e.acknowledged_by), paused: pausedUntil > t ? pausedUntil - t : 0 };
}

// badge shows a priority and a state by shape, word and colour.
function badge(priority, state) {
  if (!priority) return h('span', { class: 'badge none', 'data-state': 'none' }, 'no alarm');
  const hollow = state === 'latched' || state === 'ended' || state === 'withdrawn';
  const icon = s('svg', { width: 14, height: 13, viewBox: '0 0 14 13', 'aria-hidden': 'true' },
    SHAPES[priority](hollow ? 'none' : 'currentColor'),
    state === 'acknowledged' ? s('line', { x1: 0.5, y1: 12.5, x2: 13.5, y2: 0.5, stroke: '#fff', 'stroke-width': 2.5 }) : null,
    state === 'acknowledged' ? s('line', { x1: 0.5, y1: 12.5, x2: 13.5, y2: 0.5, stroke: 'currentColor', 'stroke-width': 1 }) : null);
  const word = priority.toUpperCase(), st = STATES[state] || state;
  const text = `${word} priority alarm, ${st}`;
  return h('span', { class: `badge ${priority} st-${state}`, 'data-state': state, 'data-priority': priority, role: 'img', 'aria-label': text, title: text },
    icon, h('b', null, word), h('span', { class: 'stword' }, st));
}

function pauseBadge(msLeft) {
  const m = Math.floor(msLeft / 60000), sec = Math.round((msLeft % 60000) / 1000);
  const text = `announcements paused, ${m}:${pad(sec)} left`;
  return h('span', { class: 'badge paused', 'data-state': 'paused', role: 'img', 'aria-label': text, title: text },
    s('svg', { width: 12, height: 12, viewBox: '0 0 12 12', 'aria-hidden': 'true' },
      s('rect', { x: 2, y: 1, width: 3, height: 10, fill: 'currentColor' }), s('rect', { x: 7, y: 1, width: 3, height: 10, fill: 'currentColor' })),
    h('b', null, 'PAUSED'), h('span', { class: 'stword' }, `${m}:${pad(sec)} left`));
}

function connection(d, t) {
  const on = !!d.connected;
  const icon = s('svg', { width: 10, height: 10, viewBox: '0 0 10 10', 'aria-hidden': 'true' },
    on ? s('circle', { cx: 5, cy: 5, r: 4.5, fill: 'currentColor' })
      : s('circle', { cx: 5, cy: 5, r: 3.8, fill: 'none', stroke: 'currentColor', 'stroke-width': 1.6 }));
  return h('span', { class: 'conn ' + (on ? 'online' : 'offline') }, icon,
    on ? 'connected' : d.moved_to_gateway ? `moved to ${d.moved_to_gateway} (its alarms are evaluated there)`
      : `offline, seen ${ago(n64(d.last_seen_unix_ms), t)}`);
}

// value shows one latest value: live, or (stale) muted with its age, never
// in the live style.
function valueCell(v, digits, va) {
  if (!has(v)) return h('span', { class: 'val none' }, '–');
  const txt = Number(v).toFixed(digits);
  if (!va.stale) return h('span', { class: 'val live' }, txt);
  const old = va.tms ? `${age(va.ageMS)} old` : 'no time';
  return h('span', { class: 'val stale', title: `last value ${txt}, ${old}: not current` },
    h('s', null, txt), h('span', { class: 'age' }, `, ${old}`));
}

async function acknowledge(id, episodeID) {
  try {
    const r = await api(`/api/device/${encodeURIComponent(id)}/acknowledge`, episodeID ? { episode_id: episodeID } : {});
    const n = (r.episodes || []).length;
    toast(`Acknowledged ${n} alarm${n === 1 ? '' : 's'} of ${id}.`);
  } catch (e) {
    toast(`Acknowledgement of ${id} failed: ${e.message}`, true);
  }
  if (refreshFn) refreshFn();
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

// ---------- route (after every script has loaded) ----------

window.addEventListener('DOMContentLoaded', () => {
  const missing = app.dataset.missing;
  if (missing) {
    document.title = 'pulsefleet · unknown device';
    document.getElementById('crumbs').replaceChildren(h('a', { href: '/' }, 'fleet'), ' › unknown device');
    setLive(false, 'not watching');
    app.replaceChildren(h('div', { class: 'missing', id: 'missing', role: 'alert' },
      h('h1', null, 'Unknown device'), h('p', null, missing), h('p', null, h('a', { href: '/' }, 'Back to the fleet overview'))));
    return;
  }
  const m = location.pathname.match(/^\/device\/([^/]+)$/);
  if (m) PF.devicePage(decodeURIComponent(m[1])); else PF.fleetPage();
});
