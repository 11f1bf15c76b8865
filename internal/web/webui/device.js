// pulsefleet web page: one device. Values, alarm state, trend charts with
// the limits of the device's own alarm profile, quality, episodes, raw
// waveform.
'use strict';

const RANGES = [{ m: 15, label: '15 min' }, { m: 30, label: '30 min' }, { m: 60, label: '1 h' }, { m: 360, label: '6 h' }, { m: 1440, label: '24 h' }];

function uptimeText(q, w) {
  return q[`uptime_${w}_window_s`] > 0 ? pct(q[`uptime_${w}`] || 0) : '–';
}

function qualityTable(q) {
  q = q || {};
  const n = k => n64(q[k]);
  const dist = (d, digits, unit) => d ? `${num(d.p10 || 0, digits)} / ${num(d.p50 || 0, digits)} / ${num(d.p90 || 0, digits)}${unit}` : '–';
  const rows = [
    ['Sessions / reconnects', `${n('sessions')} / ${n('reconnects')}`],
    ['Uptime 1 h / 24 h / 7 d', `${uptimeText(q, '1h')} / ${uptimeText(q, '24h')} / ${uptimeText(q, '7d')}`],
    ['Messages accepted', n('chunks_accepted')],
    ['Lost (sequence gaps)', n('chunks_lost')],
    ['Duplicates / late / rejected', `${n('duplicates')} / ${n('late_chunks')} / ${n('chunks_rejected')}`],
    ['Clock drift', has(q.clock_drift_ppm) ? `${num(q.clock_drift_ppm, 1)} ppm` : 'not yet estimated'],
    ['Effective sample rate', has(q.effective_sample_rate_hz) ? `${num(q.effective_sample_rate_hz, 2)} Hz` : '–'],
    ['Seconds with valid SpO2', pct(q.valid_spo2_share || 0)],
    ['Clipping / low resolution', `${pct(q.clipping_share || 0)} / ${pct(q.low_resolution_share || 0)}`],
    ['SQI p10 / p50 / p90', dist(q.sqi, 2, '')],
    ['PI p10 / p50 / p90', dist(q.pi_pct, 2, ' %')],
    ['Battery', has(q.battery_pct) && q.battery_pct >= 0 ? `${num(q.battery_pct, 0)} %` : 'unknown'],
  ];
  return h('dl', { class: 'facts', id: 'quality' }, rows.map(([k, v]) => [h('dt', null, k), h('dd', null, String(v))]));
}

function episodesTable(eps, id) {
  const today = new Date().toDateString();
  const body = eps.map(e => {
    const st = episodeState(e), onset = n64(e.onset_unix_ms);
    return h('tr', { class: e.active ? `alarm-${prio(e.priority)}` : '', 'data-episode': e.episode_id },
      h('td', null, label(e.condition)),
      h('td', null, badge(prio(e.priority), st)),
      h('td', null, new Date(onset).toDateString() === today ? clock(onset) : stamp(onset)),
      h('td', null, n64(e.announced_unix_ms) ? clock(n64(e.announced_unix_ms)) : 'not announced'),
      h('td', null, n64(e.ended_unix_ms) ? clock(n64(e.ended_unix_ms)) : (e.active ? 'condition present' : (e.moved_to_gateway ? `moved to ${e.moved_to_gateway}` : '–'))),
      h('td', { class: 'num' }, has(e.min_spo2_pct) ? num(e.min_spo2_pct, 0) + ' %' : '–'),
      h('td', { class: 'num' }, e.area_below_limit_pct_s ? num(e.area_below_limit_pct_s, 0) : '–'),
      h('td', null, e.acknowledged_by ? `${e.acknowledged_by} at ${clock(n64(e.acknowledged_unix_ms))}` :
        (e.active && n64(e.announced_unix_ms) ? h('button', { type: 'button', class: 'ack', onclick: ev => { ev.target.disabled = true; acknowledge(id, e.episode_id); } }, 'Acknowledge') : '–')));
  });
  return h('div', { class: 'scroll' }, h('table', { id: 'episodes' },
    h('thead', null, h('tr', null, ['Condition', 'Alarm', 'Onset', 'Announced', 'Ended', 'Lowest SpO2', 'Area below limit %·s', 'Acknowledged'].map(t => h('th', { scope: 'col' }, t)))),
    h('tbody', null, body.length ? body : h('tr', null, h('td', { colspan: 8, class: 'muted' }, 'No alarm episodes recorded.')))));
}

// bucketsOf turns QueryTrend buckets (protojson) into chart rows.
function bucketsOf(trend, stepS) {
  const st = (x, k) => x && x.count ? x[k] || 0 : null;
  return (trend.buckets || []).map(b => ({
    t: n64(b.start_unix_ms), spo2: st(b.spo2_pct, 'mean'), spo2_min: st(b.spo2_pct, 'min'), spo2_max: st(b.spo2_pct, 'max'),
    pulse: st(b.pulse_bpm, 'mean'), sqi: st(b.sqi, 'mean'), sqi_min: st(b.sqi, 'min'), coverage: Math.min(1, (b.points || 0) / stepS),
  }));
}

PF.devicePage = async function devicePage(id) {
  document.title = `pulsefleet · ${id}`;
  document.getElementById('crumbs').replaceChildren(h('a', { href: '/' }, 'fleet'), ` › ${id}`);
  let range = 30;
  const head = h('div', { class: 'panel', id: 'device-head' });
  const alarm = h('div', { class: 'panel', id: 'alarm' });
  const trend = h('div', { class: 'panel', id: 'trend' });
  const quality = h('div', { class: 'panel' });
  const episodes = h('div', { class: 'panel' });
  const raw = h('div', { class: 'panel', id: 'raw' });
  let built = false;

  const seg = h('span', { class: 'seg', role: 'group', 'aria-label': 'trend range' }, RANGES.map(r =>
    h('button', { type: 'button', 'aria-pressed': String(r.m === range), onclick: () => { range = r.m; seg.querySelectorAll('button').forEach(b => b.setAttribute('aria-pressed', String(b.textContent === r.label))); loadTrend(); } }, r.label)));
  let last = null;

  async function loadTrend() {
    let t;
    try { t = await api(`/api/device/${encodeURIComponent(id)}/trend?minutes=${range}`); } catch (e) { return; }
    const buckets = bucketsOf(t.trend, t.step_s);
    const lim = q => (last.profile ? last.profile.limits : []).filter(l => l.quantity === q);
    const values = (k) => buckets.map(b => b[k]);
    const limVals = ls => ls.flatMap(l => [l.limit, l.clear_at, has(l.escalate_at) ? l.escalate_at : null]);
    const [slo, shi] = fitAxis(values('spo2_min').concat(values('spo2_max')), limVals(lim('spo2')), 50, 100, 10, 1);
    const [plo, phi] = fitAxis(values('pulse'), limVals(lim('pulse')), 0, 300, 40, 5);
    const common = { from: n64(t.from_ms), to: n64(t.to_ms), buckets, stepS: t.step_s, episodes: last.episodes.filter(e => n64(e.announced_unix_ms)) };
    const prof = last.profile ? `${last.profile.name} (${last.profile.origin === 'device' ? 'set for this device' : 'gateway default'})` : 'unknown';
    trend.replaceChildren(h('h2', null, 'Trend'), seg,
      timeChart({ ...common, key: 'spo2', band: ['spo2_min', 'spo2_max'], lo: slo, hi: shi, ticks: ticksOf(slo, shi, 5), limits: lim('spo2'), label: 'SpO2 % (mean, band: min to max per step)' }),
      timeChart({ ...common, key: 'pulse', lo: plo, hi: phi, ticks: ticksOf(plo, phi, 4), limits: lim('pulse'), label: 'Pulse /min', height: 120 }),
      timeChart({ ...common, key: 'sqi', band: ['sqi_min', 'sqi'], lo: 0, hi: 1, ticks: [0, 0.5, 1], limits: lim('sqi'), label: 'Signal quality index (mean; band down to the lowest)', height: 110 }),
      timeChart({ ...common, key: 'coverage', lo: 0, hi: 1, ticks: [0, 1], label: 'Share of seconds received per step', height: 80 }),
      h('div', { class: 'legend' }, h('span', null, `limits: alarm profile ${prof}`), h('span', null, 'dashed: alarm limit; light band: up to where the condition clears (hysteresis); dotted: escalation'),
        h('span', null, 'shaded: announced alarm episodes, coloured by priority (the episode table names each)'), h('span', null, `step ${t.step_s} s`)));
  }

  async function loadRaw() {
    let r;
    try { r = await api(`/api/device/${encodeURIComponent(id)}/raw?seconds=5`); } catch (e) { return; }
    raw.replaceChildren(h('h2', null, 'Raw waveform excerpt'),
      ...(r.captured ? [waveform(r), h('p', { class: 'muted small' }, `${(r.red.length / r.rate_hz).toFixed(1)} s from ${stamp(r.start_ms)} at ${r.rate_hz} Hz (device clock); each channel scaled to its own range`)]
        : [h('p', { class: 'muted' }, 'No raw samples captured for this device (raw capture is off, or it sends summaries).')]));
  }

  function showValues() {
    const d = last.device, l = d.latest || {}, t = now(), va = valueAge(d, t);
    const v = (k, key, digits, unit) => h('div', null, h('span', { class: 'k' }, k), h('span', { class: 'v', id: `v-${key}` }, valueCell(l[`${key === 'spo2' ? 'spo2_pct' : key === 'pulse' ? 'pulse_bpm' : key === 'pi' ? 'pi_pct' : 'sqi'}`], digits, va)), unit);
    return h('div', { class: 'values', id: 'values' },
      h('div', null, h('span', { class: 'k' }, 'Connection'), connection(d, t)),
      v('SpO2', 'spo2', 0, ' %'), v('Pulse', 'pulse', 0, ' /min'), v('PI', 'pi', 2, ' %'), v('SQI', 'sqi', 2, ''),
      h('div', null, h('span', { class: 'k' }, 'Flags'), h('span', { id: 'v-flags' }, flagNames(n64(l.flags)).join(', ') || 'none')),
      d.spo2_note ? h('div', null, h('span', { class: 'k' }, 'SpO2'), h('span', { id: 'v-spo2-note' }, `not available: ${d.spo2_note}`)) : null,
      h('div', null, h('span', { class: 'k' }, 'Last value'), h('span', { id: 'v-time' }, n64(l.time_unix_ms) ? `${clock(n64(l.time_unix_ms))}${va.stale ? ', not current' : ''}` : 'none yet')));
  }

  function showAlarm() {
    const d = last.device, t = now(), a = deviceAlarm(d, last.episodes, t);
    const pauseSel = h('select', { 'aria-label': 'pause length' }, [120, 300, 600].map(s => h('option', { value: s }, `${s / 60} min`)));
    alarm.replaceChildren(h('h2', null, 'Alarm'),
      h('div', { class: 'alarmline' }, badge(a.priority, a.state), a.paused ? pauseBadge(a.paused) : null,
        (d.active_conditions || []).length ? h('span', { class: 'conds' }, d.active_conditions.map(label).join(', ')) : null,
        !a.unacked && a.by.length ? h('span', { class: 'acknote' }, 'acknowledged by ' + a.by.join('; ')) : null),
      h('div', { class: 'actions' },
        h('button', { type: 'button', class: 'primary ack', disabled: !(a.priority && a.eps.length && a.unacked), onclick: ev => { ev.target.disabled = true; acknowledge(id); } }, 'Acknowledge all'),
        pauseSel,
        h('button', { type: 'button', onclick: async () => { try { await api(`/api/device/${encodeURIComponent(id)}/pause`, { duration_s: Number(pauseSel.value), reason: 'paused from the web page' }); toast('Announcements paused.'); } catch (e) { toast(e.message, true); } refreshFn(); } }, 'Pause announcements'),
        a.paused ? h('button', { type: 'button', onclick: async () => { try { await api(`/api/device/${encodeURIComponent(id)}/pause`, { duration_s: 0 }); } catch (e) { toast(e.message, true); } refreshFn(); } }, 'Resume') : null),
      h('p', { class: 'muted small' }, 'Pausing stops announcement only; conditions are still evaluated and logged.'));
  }

  refreshFn = async () => {
    let data;
    try { data = await api(`/api/device/${encodeURIComponent(id)}`); } catch (e) {
      if (e.status === 404) { location.reload(); return; } // the server page says so once
      setLive(false, 'gateway unreachable: ' + e.message);
      return;
    }
    setServerNow(n64(data.now_ms));
    if (!last) setStale(n64(data.stale_ms) || 10000);
    labels = data.labels || labels;
    last = data;
    last.device.latest = last.device.latest || {};
    const d = data.device;
    if (!built) { app.replaceChildren(head, alarm, trend, h('div', { class: 'grid' }, quality, episodes), raw); built = true; }
    head.replaceChildren(h('h1', null, [d.device_id, data.participant ? h('span', { class: 'pid', title: 'study participant (pseudonymous id)' }, ` ${data.participant}`) : null]),
      h('p', { class: 'muted' }, [d.model, d.firmware && `firmware ${d.firmware}`, d.mode && `${d.mode.replace('MODE_', '').toLowerCase()} mode`,
        d.profile && `profile ${d.profile}`, d.calibration && `calibration ${d.calibration}`].filter(Boolean).join(' · ')),
      showValues());
    showAlarm();
    quality.replaceChildren(h('h2', null, 'Signal quality and uptime'), qualityTable(data.quality));
    episodes.replaceChildren(h('h2', null, 'Recent alarm episodes'), episodesTable(data.episodes, id),
      h('p', { class: 'muted', id: 'episodes-scope' }, 'Episodes stored by this gateway only. In a fleet of several gateways, a device that moved has its other episodes on the gateways it streamed to before: pulsefleet episodes --gateway A,B,... lists them all.'));
    loadTrend();
    loadRaw();
  };
  pointFn = p => {
    if (!last || p.device_id !== id) return;
    last.device.latest = p;
    document.getElementById('values').replaceWith(showValues());
  };
  await refreshFn();
  setInterval(refreshFn, 10000);
  setInterval(() => { if (last) { document.getElementById('values').replaceWith(showValues()); } }, 1000);
  startLive(`?device=${encodeURIComponent(id)}&points=1`);
};

const FLAG_NAMES = [[1, 'no pulse'], [2, 'sensor off'], [4, 'clipping'], [8, 'motion'], [16, 'insufficient resolution'], [32, 'calibration anchor in progress']];
function flagNames(f) { return FLAG_NAMES.filter(([b]) => f & b).map(([, n]) => n); }
