// pulsefleet web page: the fleet overview. Devices in attention order (the
// rule of internal/attention, which `pulsefleet devices` uses too), filters
// kept in the URL, and a windowed table: only the rows in view exist, and a
// row is rebuilt only when what it shows changed, so 5,000 devices stay
// responsive.
'use strict';

// ---------- attention order (internal/attention) ----------

const GROUP = { alarm: 0, technical: 1, novalue: 2, rest: 3 };

function group(e, t) {
  const d = e.d;
  if (prio(d.alarm_priority) || (d.active_conditions || []).length) return GROUP.alarm;
  if (valueAge(d, t).stale) return GROUP.novalue;
  if (n64(d.latest.flags) || !has(d.latest.spo2_pct)) return GROUP.technical;
  return GROUP.rest;
}

function announcedAt(e) {
  let t = 0;
  for (const ep of e.eps) { const a = n64(ep.announced_unix_ms); if (a && (!t || a < t)) t = a; }
  return t;
}

function attentionCompare(a, b) {
  if (a.g !== b.g) return a.g - b.g;
  if (a.g === GROUP.alarm) {
    const pa = RANK[prio(a.d.alarm_priority)], pb = RANK[prio(b.d.alarm_priority)];
    if (pa !== pb) return pb - pa;
    const ta = a.ann, tb = b.ann;
    if (ta !== tb && ta > 0 && tb > 0) return ta - tb;
    if ((ta > 0) !== (tb > 0)) return ta > 0 ? -1 : 1;
  }
  return a.id < b.id ? -1 : a.id > b.id ? 1 : 0;
}

// ---------- filters, kept in the URL ----------

const FILTERS = {
  priority: { label: 'Priority', options: [['', 'any'], ['high', 'high'], ['medium', 'medium'], ['low', 'low'], ['alarm', 'any alarm'], ['none', 'no alarm']] },
  state: { label: 'State', options: [['', 'any'], ['present', 'present or escalated'], ['latched', 'ended, not acknowledged'], ['acknowledged', 'acknowledged'], ['paused', 'paused'], ['technical', 'technical problem'], ['novalue', 'no current value'], ['ok', 'no problem']] },
  order: { label: 'Order', options: [['', 'attention'], ['id', 'device id']] },
};

function readFilters() {
  const q = new URLSearchParams(location.search);
  return { priority: q.get('priority') || '', state: q.get('state') || '', q: q.get('q') || '', order: q.get('order') || '' };
}

function writeFilters(f) {
  const q = new URLSearchParams(location.search);
  for (const k of ['priority', 'state', 'q', 'order']) { if (f[k]) q.set(k, f[k]); else q.delete(k); }
  const qs = q.toString();
  history.replaceState(null, '', location.pathname + (qs ? '?' + qs : ''));
}

function matches(e, f, t) {
  if (f.priority) {
    const p = e.alarm.priority;
    if (f.priority === 'alarm' ? !p : f.priority === 'none' ? !!p : p !== f.priority) return false;
  }
  if (f.state) {
    const st = e.alarm.state;
    const ok = { present: st === 'present' || st === 'escalated', latched: st === 'latched', acknowledged: st === 'acknowledged',
      paused: e.alarm.paused > 0, technical: e.g === GROUP.technical, novalue: e.g === GROUP.novalue, ok: e.g === GROUP.rest }[f.state];
    if (!ok) return false;
  }
  if (f.q) {
    const words = f.q.toLowerCase().split(/\s+/).filter(Boolean);
    if (!words.every(w => e.text.includes(w))) return false;
  }
  return true;
}

// ---------- columns: one function per column ----------
// Other scripts may add columns with PF.addColumn({key, title, cls, render(e, t)}, beforeKey).

const COLUMNS = [
  { key: 'device', title: 'Device', cls: 'dev', render: e => [h('a', { href: `/device/${encodeURIComponent(e.id)}` }, e.id),
    e.pid ? h('span', { class: 'pid', title: 'study participant (pseudonymous id)' }, ` ${e.pid}`) : null,
    h('span', { class: 'muted sub' }, [e.d.model, Object.entries(e.d.labels || {}).map(([k, v]) => `${k}=${v}`).join(' ')].filter(Boolean).join(' · '))] },
  { key: 'alarm', title: 'Alarm', cls: 'alarm', render: alarmCell },
  { key: 'spo2', title: 'SpO2 %', cls: 'num v-spo2', render: (e, t) => valueCell(e.d.latest.spo2_pct, 0, valueAge(e.d, t)) },
  { key: 'pulse', title: 'Pulse /min', cls: 'num v-pulse', render: (e, t) => valueCell(e.d.latest.pulse_bpm, 0, valueAge(e.d, t)) },
  { key: 'pi', title: 'PI %', cls: 'num v-pi wide', render: (e, t) => valueCell(e.d.latest.pi_pct, 2, valueAge(e.d, t)) },
  { key: 'sqi', title: 'SQI', cls: 'num v-sqi wide', render: (e, t) => valueCell(e.d.latest.sqi, 2, valueAge(e.d, t)) },
  { key: 'connection', title: 'Connection', cls: 'conncell', render: (e, t) => connection(e.d, t) },
  { key: 'uptime', title: 'Uptime 1 h / 24 h', cls: 'num wide', render: e => [uptime(e.q, '1h'), h('span', { class: 'muted' }, ' / '), uptime(e.q, '24h')] },
  { key: 'spark', title: 'SpO2, last 30 min', cls: 'wide', render: e => sparkline(e.spark, e.limits) },
  { key: 'battery', title: 'Battery', cls: 'num wide', render: e => has(e.d.battery_pct) && e.d.battery_pct >= 0 ? num(e.d.battery_pct, 0) + ' %' : '–' },
];
PF.addColumn = (col, beforeKey) => {
  const i = COLUMNS.findIndex(c => c.key === beforeKey);
  COLUMNS.splice(i < 0 ? COLUMNS.length : i, 0, col);
};

// uptime shows "-" while the window has no coverage (uptime_*_window_s 0).
function uptime(q, w) {
  if (!q || !(q[`uptime_${w}_window_s`] > 0)) return h('span', { title: 'no part of this window since the device was first seen' }, '–');
  return pct(q[`uptime_${w}`] || 0, 0);
}

function alarmCell(e, t) {
  const a = e.alarm, out = [badge(a.priority, a.state)];
  if (a.paused) out.push(pauseBadge(a.paused));
  const conds = e.d.active_conditions || [];
  if (conds.length) out.push(h('span', { class: 'conds' }, conds.map(label).join(', ')));
  if (a.priority && a.eps.length && a.unacked) {
    out.push(h('button', { class: 'primary ack', type: 'button', 'aria-label': `Acknowledge the alarms of ${e.id}`,
      onclick: ev => { ev.target.disabled = true; acknowledge(e.id); } }, 'Acknowledge'));
  }
  if (!a.unacked && a.by.length) out.push(h('span', { class: 'acknote' }, 'acknowledged by ' + a.by.join('; ')));
  return out;
}

// rowSig is what a row shows; the row is rebuilt only when it changes.
function rowSig(e, t) {
  const va = valueAge(e.d, t);
  return JSON.stringify([e.v, va.stale, va.stale ? Math.round(va.ageMS / 1000) : 0, Math.ceil(e.alarm.paused / 1000),
    e.d.connected ? 0 : Math.round((t - n64(e.d.last_seen_unix_ms)) / 10000)]);
}

function buildRow(e, t) {
  const tr = h('tr', { class: 'row' + (e.alarm.priority ? ` alarm-${e.alarm.priority}` : '') + (valueAge(e.d, t).stale ? ' stale-row' : ''), 'data-device': e.id });
  for (const c of COLUMNS) tr.append(h('td', { class: c.cls || '' }, c.render(e, t)));
  return tr;
}

// patchRow brings a shown row up to date cell by cell: only cells whose
// content changed are replaced. A stale row changes every second (its age);
// replacing the whole row then would also replace its Acknowledge button, and
// a click whose press and release fall on either side of that is lost.
function patchRow(tr, fresh) {
  tr.className = fresh.className;
  const cells = [...fresh.children];
  cells.forEach((td, i) => {
    const cur = tr.children[i];
    if (!cur) tr.append(td); else if (cur.outerHTML !== td.outerHTML) cur.replaceWith(td);
  });
  while (tr.children.length > cells.length) tr.lastElementChild.remove();
}

// ---------- the page ----------

PF.fleetPage = async function fleetPage() {
  document.title = 'pulsefleet · fleet';
  document.getElementById('crumbs').textContent = 'fleet overview';
  let f = readFilters();
  const entries = new Map(); // id -> entry
  let view = [];             // entries after filter and order
  const rows = new Map();    // id -> {tr, sig}
  let rowH = 0, shown = [];

  const counts = h('div', { class: 'counts', id: 'counts', 'aria-live': 'polite' });
  const selects = Object.entries(FILTERS).map(([k, def]) => h('label', null, def.label + ' ',
    h('select', { id: `f-${k}`, onchange: ev => { f[k] = ev.target.value; changed(); } }, def.options.map(([v, t]) => h('option', { value: v }, t)))));
  const search = h('input', { id: 'f-q', type: 'search', placeholder: 'id, label or model', 'aria-label': 'search devices by id, label or model',
    oninput: ev => { f.q = ev.target.value.trim(); changed(); } });
  const clear = h('button', { type: 'button', id: 'f-clear', onclick: () => { f = { priority: '', state: '', q: '', order: '' }; syncControls(); changed(); } }, 'Clear');
  const showing = h('span', { class: 'muted', id: 'showing' });
  const bar = h('div', { class: 'filters', role: 'search' }, selects, h('label', null, 'Search ', search), clear, showing);
  const head = h('tr', null, COLUMNS.map(c => h('th', { scope: 'col', class: c.cls.replace(/\bv-\w+/g, '') }, c.title)));
  const topPad = h('tr', { class: 'pad', 'aria-hidden': 'true' }), botPad = h('tr', { class: 'pad', 'aria-hidden': 'true' });
  const body = h('tbody', null, topPad, botPad);
  const table = h('table', { class: 'fleet', id: 'fleet' }, h('thead', null, head), body);
  const empty = h('p', { class: 'muted', id: 'empty', hidden: true });
  const legend = h('div', { class: 'legend', 'aria-label': 'legend' },
    ['present', 'escalated', 'latched', 'acknowledged'].map(st => h('span', null, badge('high', st))),
    h('span', null, badge('medium', 'present')), h('span', null, badge('low', 'present')),
    h('span', null, h('span', { class: 'val stale' }, h('s', null, '98'), h('span', { class: 'age' }, ', 14 s old')), ' a value that is not current'),
    h('span', null, 'dashed line in a sparkline: the device\'s SpO2 alarm limit'));
  app.replaceChildren(h('h1', null, 'Fleet'), counts, bar, h('div', { class: 'tablewrap' }, table), empty, legend);

  function syncControls() {
    for (const k of Object.keys(FILTERS)) document.getElementById(`f-${k}`).value = f[k];
    search.value = f.q;
  }
  syncControls();

  function changed() { writeFilters(f); recompute(); render(true); }

  // recompute filters and orders the entries.
  function recompute() {
    const t = now();
    for (const e of entries.values()) e.g = group(e, t);
    view = [...entries.values()].filter(e => matches(e, f, t));
    if (f.order === 'id') view.sort((a, b) => a.id < b.id ? -1 : a.id > b.id ? 1 : 0); else view.sort(attentionCompare);
    const all = [...entries.values()];
    const c = p => all.filter(e => e.alarm.priority === p).length;
    const link = (k, v, content, id) => h('a', { href: '?' + new URLSearchParams({ [k]: v }), id, onclick: ev => { ev.preventDefault(); f = { priority: '', state: '', q: '', order: f.order, [k]: v }; syncControls(); changed(); } }, content);
    counts.replaceChildren(
      ...['high', 'medium', 'low'].map(p => link('priority', p, [badge(p, 'present'), h('b', { class: 'n', id: `count-${p}` }, String(c(p)))], null)),
      link('state', 'latched', ['ended, not acknowledged ', h('b', { id: 'count-latched' }, String(all.filter(e => e.alarm.state === 'latched').length))]),
      link('state', 'technical', ['technical ', h('b', { id: 'count-technical' }, String(all.filter(e => e.g === GROUP.technical).length))]),
      link('state', 'novalue', ['no current value ', h('b', { id: 'count-novalue' }, String(all.filter(e => e.g === GROUP.novalue).length))]),
      h('span', null, h('b', { id: 'count-all' }, String(all.length)), ' devices'));
    showing.textContent = view.length === all.length ? '' : `showing ${view.length} of ${all.length}`;
    empty.hidden = view.length > 0;
    empty.textContent = all.length ? 'No device matches these filters.' : 'No device has connected yet.';
  }

  // render puts the rows in view into the table: a row is built only when
  // new or changed; the rest of the table is two spacer rows.
  function render(force) {
    const t = now();
    if (!rowH) {
      const probe = view[0];
      if (!probe) { body.replaceChildren(topPad, botPad); shown = []; return; }
      const tr = buildRow(probe, t);
      body.replaceChildren(topPad, tr, botPad);
      rowH = tr.getBoundingClientRect().height || 48;
      rows.set(probe.id, { tr, sig: rowSig(probe, t) });
    }
    const top = table.getBoundingClientRect().top + head.getBoundingClientRect().height;
    const first = Math.max(0, Math.floor(-top / rowH) - 10);
    const last = Math.min(view.length, first + Math.ceil(window.innerHeight / rowH) + 20);
    const ids = [];
    const trs = [];
    for (let i = first; i < last; i++) {
      const e = view[i];
      const sig = rowSig(e, t);
      let r = rows.get(e.id);
      if (!r) {
        r = { tr: buildRow(e, t), sig };
        rows.set(e.id, r);
      } else if (r.sig !== sig) {
        patchRow(r.tr, buildRow(e, t));
        r.sig = sig;
      }
      ids.push(e.id);
      trs.push(r.tr);
    }
    topPad.style.height = `${first * rowH}px`;
    botPad.style.height = `${(view.length - last) * rowH}px`;
    if (force || ids.length !== shown.length || ids.some((id, i) => id !== shown[i] || trs[i].parentNode !== body)) {
      body.replaceChildren(topPad, ...trs, botPad);
    }
    shown = ids;
    if (rows.size > 4 * (last - first) + 200) { // forget rows far out of view
      const keep = new Set(ids);
      for (const id of rows.keys()) if (!keep.has(id)) rows.delete(id);
    }
  }
  PF.render = render;

  // apply merges an /api/fleet answer (sparks only when it carries them).
  function apply(data) {
    setServerNow(n64(data.now_ms));
    labels = data.labels || labels;
    const seen = new Set();
    for (const x of data.devices) {
      const d = x.device;
      d.latest = d.latest || {};
      const old = entries.get(d.device_id);
      const e = old || { id: d.device_id };
      e.d = d; e.eps = x.active_episodes || []; e.pid = x.participant || '';
      // slow parts (quality, sparkline) come with every minute's full answer; sv counts them
      if (x.quality !== undefined || !old) { e.q = x.quality; e.sv = (e.sv || 0) + 1; }
      if (x.spark !== undefined || !old) { e.spark = x.spark; e.limits = x.spo2_limits || []; e.sv = (e.sv || 0) + 1; }
      e.alarm = deviceAlarm(d, e.eps, now());
      e.ann = announcedAt(e);
      e.text = [e.id, e.pid, d.model || '', ...Object.entries(d.labels || {}).map(([k, v]) => `${k}=${v} ${v}`)].join(' ').toLowerCase();
      e.v = JSON.stringify([d, e.eps, e.pid]) + e.sv;
      entries.set(e.id, e);
      seen.add(e.id);
    }
    for (const id of [...entries.keys()]) if (!seen.has(id)) { entries.delete(id); rows.delete(id); }
  }
  PF.apply = data => { apply(data); recompute(); render(); };
  PF.view = () => view.map(e => e.id);

  let busy = false, lastSpark = 0;
  refreshFn = async () => {
    if (busy) { scheduleRefresh(500); return; }
    busy = true;
    const withSpark = Date.now() - lastSpark > 60000;
    try {
      const data = await api('/api/fleet' + (withSpark ? '' : '?spark=0&quality=0'));
      if (withSpark) lastSpark = Date.now();
      const first = !entries.size, t0 = performance.now();
      if (first) setStale(n64(data.stale_ms) || 10000);
      apply(data);
      recompute();
      render();
      if (first) PF.firstApplyMS = performance.now() - t0; // the benchmark reads it
    } catch (e) {
      setLive(false, 'gateway unreachable: ' + e.message);
    } finally {
      busy = false;
    }
  };
  pointFn = p => {
    const e = entries.get(p.device_id);
    if (!e) { scheduleRefresh(500); return; }
    e.d.latest = p;
    e.v = JSON.stringify([e.d, e.eps]) + e.sv;
    if (rows.has(p.device_id)) render();
  };
  let frame = 0;
  const onScroll = () => { if (!frame) frame = requestAnimationFrame(() => { frame = 0; render(); }); };
  window.addEventListener('scroll', onScroll, { passive: true });
  window.addEventListener('resize', () => { rowH = 0; rows.clear(); onScroll(); });
  await refreshFn();
  const many = entries.size > 300;
  setInterval(refreshFn, many ? 5000 : 15000);
  setInterval(() => { const t = now(); let regroup = false; for (const e of entries.values()) if (group(e, t) !== e.g) { regroup = true; break; } if (regroup) recompute(); render(); }, 1000);
  startLive(many ? '?points=0' : '?points=1');
};
