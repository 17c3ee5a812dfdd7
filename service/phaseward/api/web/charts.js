// Charts drawn as inline SVG: bar gauges, capacity against load, the thermal forecast.

import { h, s } from './dom.js';
import * as fmt from './format.js';

const clamp = (x, lo, hi) => Math.min(hi, Math.max(lo, x));

/** Level of a value against a warning mark and a hard limit: 'ok', 'warn' or 'over'. */
export function level(value, hold, limit) {
  if (value == null) return 'none';
  if (limit != null && value >= limit) return 'over';
  if (hold != null && value >= hold) return 'warn';
  return 'ok';
}

/** A small horizontal gauge for a table cell; the numbers sit beside it as text. */
export function gauge({ value, lo = 0, hi, marks = [], state = 'ok' }) {
  const W = 120;
  const H = 14;
  const x = (v) => (clamp((v - lo) / (hi - lo), 0, 1) * W);
  const parts = [s('rect', { class: 'gauge-track', x: 0.5, y: 0.5, width: W - 1, height: H - 1, rx: 2 })];
  if (value != null && Number.isFinite(value)) {
    parts.push(s('rect', { class: `gauge-fill lvl-${state}`, x: 1.5, y: 1.5, width: Math.max(0, x(value) - 2), height: H - 3, rx: 1 }));
  }
  for (const m of marks) {
    if (m.at == null) continue;
    const at = clamp(x(m.at), 1, W - 1);
    parts.push(s('line', { class: `gauge-mark mark-${m.kind}`, x1: at, x2: at, y1: -1, y2: H + 1 }));
  }
  return s('svg', { class: 'gauge', viewBox: `-1 -2 ${W + 2} ${H + 4}`, width: W + 2, height: H + 4, 'aria-hidden': 'true', focusable: 'false' }, parts);
}

/** Capacity as a bar, with the present load and the rated load as marks. */
export function capacityChart({ capacity, load, rated }) {
  const W = 640;
  const H = 94;
  const left = 8;
  const right = 24;
  const top = 34;
  const barH = 26;
  const max = Math.max(capacity ?? 0, load ?? 0, rated ?? 0, 1) * 1.1;
  const x = (v) => left + (clamp(v, 0, max) / max) * (W - left - right);
  const parts = [
    s('rect', { class: 'cap-track', x: left, y: top, width: W - left - right, height: barH }),
  ];
  if (capacity != null) {
    parts.push(s('rect', { class: 'cap-bar', x: left, y: top, width: x(capacity) - left, height: barH }));
    const inside = x(capacity) - left > 170;
    parts.push(s('text', { class: `cap-bar-label${inside ? '' : ' outside'}`, x: inside ? left + 8 : x(capacity) + 8, y: top + barH / 2 + 4.5 }, `capacity ${fmt.amps(capacity)}`));
  }
  if (capacity != null && load != null && load > capacity) {
    parts.push(s('rect', { class: 'cap-short', x: x(capacity), y: top, width: x(load) - x(capacity), height: barH }));
  }
  if (rated != null) {
    const at = x(rated);
    parts.push(s('line', { class: 'cap-rated', x1: at, x2: at, y1: top - 4, y2: top + barH + 10 }));
    parts.push(s('text', { class: 'cap-rated-label', x: at, y: top + barH + 22, 'text-anchor': anchorFor(at, W) }, `rated load ${fmt.amps(rated, 0)}`));
  }
  if (load != null) {
    const at = x(load);
    parts.push(s('path', { class: 'cap-load', d: `M${at} ${top - 1} V${top + barH + 2} M${at - 5} ${top - 7} L${at} ${top - 1} L${at + 5} ${top - 7}` }));
    parts.push(s('text', { class: 'cap-load-label', x: at, y: top - 15, 'text-anchor': anchorFor(at, W) }, `present load ${fmt.amps(load)}`));
  }
  const label = `Capacity ${fmt.amps(capacity)} against the present load ${fmt.amps(load)}` +
    ` and the rated load ${fmt.amps(rated)}`;
  return s('svg', { class: 'capacity-chart', viewBox: `0 0 ${W} ${H}`, role: 'img', 'aria-label': label }, parts);
}

function anchorFor(x, width) {
  if (x < 90) return 'start';
  if (x > width - 90) return 'end';
  return 'middle';
}

function niceStep(range, targetTicks, steps) {
  for (const step of steps) if (range / step <= targetTicks) return step;
  return steps[steps.length - 1];
}

/**
 * The thermal forecast: every active phase's junction (the hottest drawn heavy), the board,
 * the junction limit and the warning line (limit minus warning margin).
 * Returns a <figure> with the chart and, in a disclosure, the same data as a table.
 */
export function forecastChart({ forecast, phases, limitC, holdC, loadA, loadNote, tableOpen = false, onTableToggle = () => {} }) {
  const t = forecast.time_s;
  const J = forecast.junction_c;
  const figure = h('figure', { class: 'forecast' });
  const shown = phases.length ? phases : (J[0] || []).map((_, i) => i);
  const caption = h('figcaption', {},
    `Estimated junction temperatures over the next ${fmt.duration(t.length ? t[t.length - 1] : 3600)} if the load stays at ${fmt.amps(loadA)}`,
    loadNote ? ` (${loadNote})` : '', '.');
  if (forecast.runaway || !t.length) {
    figure.append(h('p', { class: 'notice lvl-over' }, 'The losses run away thermally: the junctions have no steady state at this load.',
      forecast.time_to_warning_s != null ? ` The warning line is reached after ${fmt.duration(forecast.time_to_warning_s)}.` : ''), caption);
    return figure;
  }
  const W = 720;
  const H = 320;
  const m = { l: 54, r: 128, t: 18, b: 46 };
  const horizon = t[t.length - 1] || 1;
  const series = shown.map((i) => ({ phase: i, values: J.map((row) => row[i]) }));
  let lo = Math.min(...forecast.board_c, ...series.flatMap((x) => x.values));
  let hi = Math.max(...series.flatMap((x) => x.values), limitC ?? -Infinity);
  const yStep = niceStep(hi - lo + 10, 7, [5, 10, 20, 25, 50, 100]);
  lo = Math.floor((lo - 2) / yStep) * yStep;
  hi = Math.ceil((hi + 2) / yStep) * yStep;
  const X = (ts) => m.l + (ts / horizon) * (W - m.l - m.r);
  const Y = (c) => m.t + (1 - (c - lo) / (hi - lo)) * (H - m.t - m.b);
  const parts = [];

  // Above the junction limit: hatched, so the forbidden region reads without colour.
  if (limitC != null) {
    parts.push(s('rect', { class: 'fc-forbidden', x: m.l, y: m.t, width: W - m.l - m.r, height: Math.max(0, Y(limitC) - m.t) }));
  }
  // Grid and axes.
  for (let c = lo; c <= hi + 1e-9; c += yStep) {
    parts.push(s('line', { class: 'fc-grid', x1: m.l, x2: W - m.r, y1: Y(c), y2: Y(c) }));
    parts.push(s('text', { class: 'fc-tick', x: m.l - 8, y: Y(c) + 4, 'text-anchor': 'end' }, `${c}`));
  }
  const xStepMin = niceStep(horizon / 60, 7, [1, 2, 5, 10, 15, 30, 60, 120, 240]);
  for (let mm = 0; mm * 60 <= horizon + 1e-6; mm += xStepMin) {
    const xx = X(mm * 60);
    parts.push(s('line', { class: 'fc-grid', x1: xx, x2: xx, y1: m.t, y2: H - m.b }));
    parts.push(s('text', { class: 'fc-tick', x: xx, y: H - m.b + 18, 'text-anchor': 'middle' }, `${mm}`));
  }
  parts.push(s('text', { class: 'fc-axis', x: (m.l + W - m.r) / 2, y: H - 8, 'text-anchor': 'middle' }, 'minutes from the latest sample'));
  parts.push(s('text', { class: 'fc-axis', x: 14, y: (m.t + H - m.b) / 2, transform: `rotate(-90 14 ${(m.t + H - m.b) / 2})`, 'text-anchor': 'middle' }, 'temperature, \u00b0C'));
  parts.push(s('rect', { class: 'fc-frame', x: m.l, y: m.t, width: W - m.l - m.r, height: H - m.t - m.b }));

  // Limits.
  if (limitC != null) {
    parts.push(s('line', { class: 'fc-limit', x1: m.l, x2: W - m.r, y1: Y(limitC), y2: Y(limitC) }));
    parts.push(s('text', { class: 'fc-limit-label', x: W - m.r + 6, y: Y(limitC) + 4 }, `limit ${fmt.celsius(limitC, 0)}`));
  }
  if (holdC != null) {
    parts.push(s('line', { class: 'fc-hold', x1: m.l, x2: W - m.r, y1: Y(holdC), y2: Y(holdC) }));
    parts.push(s('text', { class: 'fc-hold-label', x: W - m.r + 6, y: Y(holdC) + 4 }, `warning ${fmt.celsius(holdC, 0)}`));
  }

  // Series: the board dashed, other phases thin, the hottest heavy and labelled.
  const line = (values, cls) => s('polyline', { class: cls, points: values.map((v, k) => `${X(t[k]).toFixed(1)},${Y(v).toFixed(1)}`).join(' ') });
  parts.push(line(forecast.board_c, 'fc-board'));
  const peakOf = (x) => Math.max(...x.values);
  const hottest = series.reduce((a, b) => (peakOf(b) > peakOf(a) ? b : a), series[0]);
  for (const x of series) if (x !== hottest) parts.push(line(x.values, 'fc-phase'));
  if (hottest) parts.push(line(hottest.values, 'fc-hottest'));
  const endLabels = [];
  if (hottest) endLabels.push({ y: Y(hottest.values[hottest.values.length - 1]), text: `phase ${hottest.phase}`, cls: 'fc-hottest-label' });
  endLabels.push({ y: Y(forecast.board_c[forecast.board_c.length - 1]), text: 'board', cls: 'fc-board-label' });
  const taken = [Y(limitC ?? -1e9), Y(holdC ?? -1e9)];
  for (const lab of endLabels) {
    let y = lab.y;
    for (let guard = 0; guard < 6 && taken.some((o) => Math.abs(o - y) < 13); guard++) y += 13;
    taken.push(y);
    parts.push(s('text', { class: lab.cls, x: W - m.r + 6, y: y + 4 }, lab.text));
  }

  // When the warning line is reached.
  if (forecast.time_to_warning_s != null && forecast.time_to_warning_s <= horizon) {
    const xx = X(forecast.time_to_warning_s);
    parts.push(s('line', { class: 'fc-reach', x1: xx, x2: xx, y1: m.t, y2: H - m.b }));
    parts.push(s('text', { class: 'fc-reach-label', x: xx + (xx > W / 2 ? -6 : 6), y: H - m.b - 8, 'text-anchor': xx > W / 2 ? 'end' : 'start' },
      `phase ${forecast.warning_phase} reaches the warning line at ${fmt.duration(forecast.time_to_warning_s)}`));
  }

  const peak = forecast.peak;
  const summary = [
    hottest ? `Hottest: phase ${hottest.phase}, from ${fmt.celsius(hottest.values[0])} to ${fmt.celsius(hottest.values[hottest.values.length - 1])}` : '',
    peak ? `peak ${fmt.celsius(peak.temp_c)} at ${fmt.duration(peak.time_s)}` : '',
    forecast.verdict === 'holds' ? '' : `${forecast.verdict} after ${fmt.duration(forecast.verdict_at_s)}: ${forecast.verdict_cause}`,
    forecast.time_to_warning_s == null ? 'warning line not reached within the horizon' : `warning line reached by phase ${forecast.warning_phase} after ${fmt.duration(forecast.time_to_warning_s)}`,
    forecast.margin_to_warning_k == null ? '' : `smallest margin to the warning line ${fmt.kelvin(forecast.margin_to_warning_k)}`,
    ...forecast.cascade.filter((c) => c.cause !== 'requested').map((c) => `phase ${c.phase} ${c.cause === 'trip_current' ? 'trips on current' : 'shuts down at its junction limit'} after ${fmt.duration(c.at_s)}`),
  ].filter(Boolean).join('; ');
  const titleId = `fc-title-${Math.random().toString(36).slice(2, 8)}`;
  const svg = s('svg', { class: 'forecast-chart', viewBox: `0 0 ${W} ${H}`, role: 'img', 'aria-labelledby': titleId },
    s('title', { id: titleId }, `Thermal forecast. ${summary}.`), parts);
  figure.append(h('div', { class: 'chart-box' }, svg), caption, h('p', { class: 'chart-summary' }, `${summary}.`), forecastTable(forecast, shown, hottest, xStepMin, tableOpen, onTableToggle));
  return figure;
}

function forecastTable(forecast, shown, hottest, stepMin, open, onToggle) {
  const t = forecast.time_s;
  const rows = [];
  for (let mm = 0; mm * 60 <= t[t.length - 1] + 1e-6; mm += stepMin) {
    let k = 0;
    while (k + 1 < t.length && Math.abs(t[k + 1] - mm * 60) <= Math.abs(t[k] - mm * 60)) k++;
    const row = forecast.junction_c[k];
    rows.push(h('tr', {},
      h('th', { scope: 'row' }, `${mm} min`),
      h('td', {}, hottest ? fmt.celsius(row[hottest.phase]) : fmt.dash),
      h('td', {}, fmt.celsius(Math.max(...shown.map((i) => row[i])))),
      h('td', {}, fmt.celsius(forecast.board_c[k]))));
  }
  return h('details', { class: 'as-table', open, ontoggle: (e) => onToggle(e.currentTarget.open) },
    h('summary', { 'data-focus-key': 'forecast-table' }, 'The forecast as a table'),
    h('table', {},
      h('thead', {}, h('tr', {},
        h('th', { scope: 'col' }, 'Time'),
        h('th', { scope: 'col' }, hottest ? `Phase ${hottest.phase} junction` : 'Junction'),
        h('th', { scope: 'col' }, 'Hottest junction'),
        h('th', { scope: 'col' }, 'Board'))),
      h('tbody', {}, rows)));
}
