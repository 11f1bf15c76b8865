// pulsefleet web page: charts (SVG, drawn by hand). Limit lines come from
// the alarm profile the device runs; the SpO2 axis fits the data and the
// limits.
'use strict';

// fitAxis returns [lo, hi] holding every value and limit with a margin,
// within [floor, ceil], at least minSpan wide, on whole steps.
function fitAxis(values, limits, floor, ceil, minSpan, step) {
  const all = values.filter(has).concat(limits.filter(has));
  if (!all.length) return [Math.max(floor, ceil - minSpan), ceil];
  let lo = Math.min(...all), hi = Math.max(...all);
  lo = Math.floor((lo - step / 2) / step) * step;
  hi = Math.ceil((hi + step / 2) / step) * step;
  if (hi - lo < minSpan) { const mid = (hi + lo) / 2; lo = mid - minSpan / 2; hi = mid + minSpan / 2; }
  lo = Math.max(floor, Math.floor(lo / step) * step);
  hi = Math.min(ceil, Math.ceil(hi / step) * step);
  if (hi <= lo) hi = lo + step;
  return [lo, hi];
}

function ticksOf(lo, hi, want) {
  const raw = (hi - lo) / want;
  const step = [0.1, 0.2, 0.25, 0.5, 1, 2, 5, 10, 20, 25, 50].find(v => v >= raw) || 100;
  const out = [];
  for (let v = Math.ceil(lo / step) * step; v <= hi + 1e-9; v += step) out.push(Math.round(v * 100) / 100);
  return out;
}

function sparkline(spark, limits) {
  const w = 120, hgt = 32;
  const svg = s('svg', { class: 'spark', width: w, height: hgt, viewBox: `0 0 ${w} ${hgt}`, role: 'img' });
  const vals = spark ? spark.spo2 : [];
  const some = vals.filter(has);
  if (!some.length) {
    svg.setAttribute('aria-label', 'no SpO2 in the last 30 minutes');
    svg.append(s('text', { x: 4, y: 20, 'font-size': 11 }, 'no data'));
    return svg;
  }
  const lims = (limits || []).map(l => l.limit);
  const [lo, hi] = fitAxis(some, lims, 50, 100, 10, 1);
  const x = i => 2 + (w - 4) * i / Math.max(1, vals.length - 1);
  const y = v => 2 + (hgt - 4) * (hi - Math.max(lo, Math.min(hi, v))) / (hi - lo);
  for (const l of limits || []) svg.append(s('line', { class: 'limit', 'data-limit': l.limit, x1: 0, x2: w, y1: y(l.limit), y2: y(l.limit) }));
  let d = '', pen = false;
  vals.forEach((v, i) => {
    if (!has(v)) { pen = false; return; }
    d += `${pen ? 'L' : 'M'}${x(i).toFixed(1)},${y(v).toFixed(1)}`;
    pen = true;
  });
  svg.append(s('path', { class: 'line', d }));
  vals.forEach((v, i) => { // a value without neighbours is a dot
    if (has(v) && !has(vals[i - 1]) && !has(vals[i + 1])) svg.append(s('circle', { class: 'dot', cx: x(i), cy: y(v), r: 1.6 }));
  });
  const lim = (limits || []).map(l => `${l.label} ${l.limit} %`).join(', ');
  svg.setAttribute('aria-label', `SpO2 over the last 30 minutes, lowest ${Math.min(...some).toFixed(0)} %, last ${some[some.length - 1].toFixed(0)} %${lim ? '; limit ' + lim : ''}`);
  return svg;
}

// timeChart draws one panel over [from, to]: a line of key (with an
// optional band), the profile's limits (dashed) with their hysteresis band
// (the value at which the condition clears), and the episodes shaded by
// priority (hatched once ended).
function timeChart(o) {
  const w = o.width || 900, hgt = o.height || 150, L = 44, R = 10, T = 18, B = 22;
  const svg = s('svg', { class: 'chart', width: '100%', viewBox: `0 0 ${w} ${hgt}`, preserveAspectRatio: 'none', role: 'img', 'aria-label': o.label, 'data-chart': o.key });
  const x = t => L + (w - L - R) * (t - o.from) / (o.to - o.from);
  const y = v => T + (hgt - T - B) * (o.hi - Math.max(o.lo, Math.min(o.hi, v))) / (o.hi - o.lo);
  svg.append(s('text', { x: L, y: 12 }, o.label));
  for (const e of o.episodes || []) {
    const a = Math.max(o.from, n64(e.announced_unix_ms) || n64(e.onset_unix_ms)), b = Math.min(o.to, n64(e.ended_unix_ms) || o.to);
    if (b > a) svg.append(s('rect', { class: `ep ep-${prio(e.priority)}`, x: x(a), y: T, width: Math.max(1, x(b) - x(a)), height: hgt - T - B },
      s('title', null, `${label(e.condition)}, ${prio(e.priority)} priority, ${clock(a)}–${n64(e.ended_unix_ms) ? clock(b) : 'now'}`)));
  }
  for (const v of o.ticks) {
    svg.append(s('line', { class: 'grid', x1: L, x2: w - R, y1: y(v), y2: y(v) }));
    svg.append(s('text', { x: L - 6, y: y(v) + 4, 'text-anchor': 'end' }, v));
  }
  for (const l of o.limits || []) {
    const a = Math.min(l.limit, l.clear_at), b = Math.max(l.limit, l.clear_at);
    if (b > a) svg.append(s('rect', { class: 'hyst', x: L, width: w - L - R, y: y(b), height: Math.max(0.5, y(a) - y(b)) },
      s('title', null, `${l.label}: alarm ${l.below ? 'below' : 'above'} ${l.limit}, clears at ${l.clear_at}`)));
    svg.append(s('line', { class: `limit lim-${l.priority}`, 'data-limit': l.limit, 'data-condition': l.condition, x1: L, x2: w - R, y1: y(l.limit), y2: y(l.limit) }));
    svg.append(s('text', { class: 'limtext', x: w - R - 2, y: y(l.limit) + (l.below ? 12 : -3), 'text-anchor': 'end' }, `${l.label} ${l.limit}`));
    if (has(l.escalate_at)) svg.append(s('line', { class: 'limit esc', 'data-limit': l.escalate_at, x1: L, x2: w - R, y1: y(l.escalate_at), y2: y(l.escalate_at) }));
  }
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
    let run = [];
    const flush = () => {
      if (!run.length) return;
      const top = run.map(b => `${x(b.t).toFixed(1)},${y(b[o.band[1]]).toFixed(1)} ${x(b.t + stepMS).toFixed(1)},${y(b[o.band[1]]).toFixed(1)}`);
      const bot = run.slice().reverse().map(b => `${x(b.t + stepMS).toFixed(1)},${y(b[o.band[0]]).toFixed(1)} ${x(b.t).toFixed(1)},${y(b[o.band[0]]).toFixed(1)}`);
      svg.append(s('polygon', { class: 'band', points: top.concat(bot).join(' ') }));
      run = [];
    };
    for (const b of o.buckets) { if (!has(b[o.band[0]])) flush(); else run.push(b); }
    flush();
  }
  let d = '', pen = false, prev = null;
  for (const b of o.buckets) {
    const v = b[o.key];
    if (!has(v) || (prev !== null && b.t - prev > 1.5 * stepMS)) pen = false;
    if (!has(v)) continue;
    d += `${pen ? 'L' : 'M'}${x(b.t + stepMS / 2).toFixed(1)},${y(v).toFixed(1)}`;
    pen = true;
    prev = b.t;
  }
  if (d) svg.append(s('path', { class: 'line', d }));
  return svg;
}

function waveform(raw) {
  const w = 900, hgt = 140;
  const svg = s('svg', { class: 'chart', width: '100%', viewBox: `0 0 ${w} ${hgt}`, preserveAspectRatio: 'none', role: 'img',
    'aria-label': `raw red and infrared samples, ${(raw.red.length / raw.rate_hz).toFixed(1)} s at ${raw.rate_hz} Hz` });
  [['red', 'line2', 'red'], ['ir', 'line', 'infrared']].forEach(([key, cls, name], i) => {
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
