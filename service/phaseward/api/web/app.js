// The operator page: the rails and their condition, one rail in detail, kept live from the
// service's event stream. Everything comes from this service's own API.

import { api, ApiError } from './api.js';
import { capacityChart, forecastChart, gauge, level } from './charts.js';
import { h, replaceKeepingFocus } from './dom.js';
import * as fmt from './format.js';
import { RAIL_CONDITIONS, glyph, railTag, tag } from './glyphs.js';
import { follow } from './live.js';

const REFRESH_MS = 30_000; // a safety net: events drive the page, this catches quiet changes
const STATUS_COALESCE_MS = 200; // one status fetch for a burst of events of one rail
const ANALYSES_DELAY_MS = 1_500; // screening and forecast are heavier: after the burst settles
// What the analyses were run for when no status had arrived yet: a status arriving later
// differs from it, so the analyses run again (they cannot forecast without the load).
const NO_STATUS = 'no status yet';
const HORIZON_S = 3_600;
const EVENTS_PAGE = 50;
const OPERATOR_KEY = 'phaseward.operator';
const SEVERITY_RANK = { down: 0, overloaded: 1, degraded: 2, exposed: 3, unknown: 4, nominal: 5 };

const state = {
  rails: new Map(), // id -> { rail, status, fetchedAt, seq }
  order: [],
  railsError: null,
  view: { kind: 'overview' },
  detail: null,
  live: { state: 'connecting', retryMs: 0, lastEvent: null },
};
const timers = { status: new Map(), analyses: null };
const $ = (id) => document.getElementById(id);

// ---------------------------------------------------------------------------------------
// Data

async function loadRails() {
  try {
    const rails = await api.rails();
    state.railsError = null;
    state.order = rails.map((r) => r.id);
    const known = new Set(state.order);
    for (const id of [...state.rails.keys()]) if (!known.has(id)) state.rails.delete(id);
    for (const r of rails) {
      const entry = state.rails.get(r.id) || { status: null, fetchedAt: 0, seq: 0 };
      entry.rail = r;
      state.rails.set(r.id, entry);
    }
    await Promise.all(state.order.map((id) => refreshStatus(id)));
  } catch (err) {
    state.railsError = err;
  }
  renderNav();
  if (state.view.kind === 'overview') renderOverview();
}

async function refreshStatus(id) {
  const entry = state.rails.get(id) || { rail: null, status: null, fetchedAt: 0, seq: 0 };
  state.rails.set(id, entry);
  const seq = ++entry.seq;
  let status;
  try {
    status = await api.status(id);
  } catch (err) {
    if (err instanceof ApiError && err.status === 404) {
      state.rails.delete(id);
      state.order = state.order.filter((x) => x !== id);
    }
    if (state.detail && state.detail.id === id) {
      state.detail.statusError = err;
      renderRail();
    }
    renderNav();
    return;
  }
  if (seq !== entry.seq) return; // a newer answer is on its way
  const before = entry.status ? entry.status.condition : undefined;
  entry.status = status;
  entry.fetchedAt = Date.now();
  if (before !== undefined && before !== status.condition) {
    announce(`Rail ${id} is now ${status.condition || 'without data'}.`);
  }
  renderNav();
  if (state.view.kind === 'overview') renderOverview();
  const d = state.detail;
  if (d && d.id === id) {
    d.statusError = null;
    if (d.spec === null || d.spec.version !== status.version) await loadSpec(d);
    renderRail();
    // The analyses start from the latest sample: redo them when it (or the verdict) moved.
    const mark = judged(status);
    if (d.analysedFor !== null && d.analysedFor !== mark) scheduleAnalyses();
  }
}

/** What the analyses depend on: the definition, the latest sample, the condition. */
function judged(status) {
  return `${status.version}/${status.last_sample ? status.last_sample.seq : '-'}/${status.condition}`;
}

function scheduleStatus(id) {
  if (timers.status.has(id)) return;
  timers.status.set(id, setTimeout(() => {
    timers.status.delete(id);
    refreshStatus(id);
  }, STATUS_COALESCE_MS));
}

async function loadSpec(d) {
  try {
    d.spec = await api.rail(d.id);
  } catch (err) {
    d.spec = null;
  }
}

async function loadEvents(d, { older = false } = {}) {
  try {
    const page = await api.events(d.id, { limit: EVENTS_PAGE, cursor: older ? d.nextCursor : null });
    mergeEvents(d, page.items);
    if (older || d.nextCursor === undefined) d.nextCursor = page.next_cursor;
    d.eventsError = null;
  } catch (err) {
    d.eventsError = err;
  }
  if (state.detail === d) renderEvents();
}

function mergeEvents(d, items) {
  const byId = new Map(d.events.map((e) => [e.id, e]));
  for (const e of items) if (e.rail_id === d.id) byId.set(e.id, e);
  d.events = [...byId.values()].sort((a, b) => b.id - a.id);
}

async function loadAnalyses(d) {
  const entry = state.rails.get(d.id);
  const status = entry ? entry.status : null;
  const seq = ++d.analysesSeq;
  d.analysedFor = status ? judged(status) : NO_STATUS;
  const present = status && status.load_a != null ? status.load_a : null;
  const loadA = present ?? (status ? status.rated_load_a : null);
  const [screening, forecast, ratings] = await Promise.allSettled([
    api.screening(d.id, d.depth),
    loadA == null
      ? Promise.reject(new Error('the rail has no load to forecast from'))
      : api.forecast(d.id, { load: { constant_a: loadA }, horizon_s: HORIZON_S, points: 120 }),
    api.ratings(d.id, d.ratingPairs),
  ]);
  if (state.detail !== d || seq !== d.analysesSeq) return; // left, or a newer run is on its way
  d.screening = screening.status === 'fulfilled' ? screening.value : null;
  d.screeningError = screening.status === 'rejected' ? screening.reason : null;
  d.forecast = forecast.status === 'fulfilled' ? forecast.value : null;
  d.forecastError = forecast.status === 'rejected' ? forecast.reason : null;
  d.forecastLoad = { loadA, note: present == null ? 'no telemetry yet: the rated load' : '' };
  d.ratings = ratings.status === 'fulfilled' ? ratings.value : null;
  d.ratingsError = ratings.status === 'rejected' ? ratings.reason : null;
  renderScreening();
  renderForecast();
  renderRatings();
}

function scheduleAnalyses() {
  clearTimeout(timers.analyses);
  const d = state.detail;
  timers.analyses = setTimeout(() => {
    if (state.detail === d) loadAnalyses(d);
  }, ANALYSES_DELAY_MS);
}

// ---------------------------------------------------------------------------------------
// Live updates

function onLiveEvent(event) {
  state.live.lastEvent = event;
  renderLive();
  if (!state.rails.has(event.rail_id)) {
    loadRails(); // a rail this page has not seen yet
    return;
  }
  scheduleStatus(event.rail_id);
  const d = state.detail;
  if (d && d.id === event.rail_id) {
    mergeEvents(d, [event]);
    renderEvents();
  }
}

function onLiveState(liveState, retryMs) {
  state.live.state = liveState;
  state.live.retryMs = retryMs || 0;
  renderLive();
}

async function startLive() {
  let after = null;
  try {
    const newest = await api.newestEvent();
    after = newest.items.length ? newest.items[0].id : 0;
  } catch {
    after = null;
  }
  follow({ afterId: after, onEvent: onLiveEvent, onState: onLiveState });
}

function refreshVisible() {
  if (state.view.kind === 'overview') {
    loadRails();
  } else if (state.detail) {
    refreshStatus(state.detail.id);
    loadEvents(state.detail);
  }
}

// ---------------------------------------------------------------------------------------
// Rendering: shared pieces

function announce(text) {
  const el = $('announcer');
  el.textContent = '';
  setTimeout(() => { el.textContent = text; }, 50);
}

function ageText(entry) {
  const st = entry && entry.status;
  if (!st || !st.last_sample) return fmt.dash;
  return fmt.age(st.last_sample.age_s + (Date.now() - entry.fetchedAt) / 1000);
}

function ageEl(id) {
  return h('span', { 'data-age-of': id }, ageText(state.rails.get(id)));
}

function tickAges() {
  for (const el of document.querySelectorAll('[data-age-of]')) {
    const entry = state.rails.get(el.getAttribute('data-age-of'));
    if (entry) el.textContent = ageText(entry);
  }
}

function errorNotice(what, err) {
  return h('p', { class: 'notice lvl-warn' }, glyph('warning'), ` Could not load ${what}: ${err && err.message ? err.message : err}.`);
}

function renderLive() {
  const { state: liveState, retryMs, lastEvent } = state.live;
  const words = {
    connecting: 'Connecting to live updates\u2026',
    live: 'Live: the page follows the event stream',
    retrying: `Live updates interrupted; retrying in ${fmt.duration(retryMs / 1000)}`,
  };
  const el = $('live');
  if (el.dataset.state !== liveState || liveState === 'retrying') {
    el.className = `live live-${liveState}`;
    el.dataset.state = liveState;
    replaceKeepingFocus(el, glyph(liveState), h('span', { class: 'live-word' }, words[liveState]));
  }
  $('live-last').textContent = lastEvent ? `latest event #${lastEvent.id}, ${fmt.utc(lastEvent.time_s)}` : '';
  const echo = document.querySelector('.live-echo');
  if (echo) echo.textContent = liveState === 'live' ? 'following' : liveState;
}

function renderNav() {
  const list = $('rail-nav-list');
  const current = state.view.kind === 'rail' ? state.view.id : null;
  const items = state.order.map((id) => {
    const entry = state.rails.get(id);
    const condition = entry && entry.status ? entry.status.condition : null;
    return h('li', {},
      h('a', { href: `/rails/${id}`, 'data-route': true, 'data-focus-key': `nav-${id}`, 'aria-current': id === current ? 'page' : null },
        h('span', { class: 'nav-id' }, id), railTag(condition, 'tag-small')));
  });
  if (!items.length) items.push(h('li', { class: 'muted' }, state.railsError ? 'Rails could not be loaded.' : 'No rails yet.'));
  replaceKeepingFocus(list, items);
}

/** A table in a scroll box that keyboard users can scroll too. */
function tableBox(label, table) {
  return h('div', { class: 'table-wrap', role: 'region', 'aria-label': label, tabindex: '0', 'data-focus-key': `box-${label}` }, table);
}

function headingFocus() {
  const h1 = document.querySelector('main h1');
  if (h1) h1.focus({ preventScroll: false });
}

// ---------------------------------------------------------------------------------------
// Overview

function renderOverview() {
  const main = $('main');
  document.title = 'Rails \u00b7 phaseward';
  const rank = (id) => {
    const st = state.rails.get(id).status;
    return SEVERITY_RANK[st && st.condition ? st.condition : 'unknown'];
  };
  const ids = [...state.order].sort((a, b) => rank(a) - rank(b) || a.localeCompare(b));
  const rows = ids.map((id) => {
    const entry = state.rails.get(id);
    const st = entry.status;
    const out = st ? st.phases.filter((p) => p.condition !== 'active').length : 0;
    return h('tr', { class: `row-${st && st.condition ? st.condition : 'unknown'}` },
      h('th', { scope: 'row' }, h('a', { href: `/rails/${id}`, 'data-route': true, 'data-focus-key': `ov-${id}` }, id),
        h('span', { class: 'rail-name' }, entry.rail ? entry.rail.spec.name : '')),
      h('td', {}, railTag(st ? st.condition : null)),
      h('td', { class: 'num' }, fmt.amps(st ? st.load_a : null)),
      h('td', { class: 'num' }, fmt.amps(st && st.capacity ? st.capacity.capacity_a : null)),
      h('td', { class: 'num' }, fmt.amps(st && st.capacity ? st.capacity.headroom_a : null)),
      h('td', { class: 'num' }, st && st.thermal && st.thermal.hottest_phase != null
        ? `${fmt.celsius(st.thermal.hottest_temp_c)} (phase ${st.thermal.hottest_phase})` : fmt.dash),
      h('td', { class: 'num' }, st && st.phases.length ? `${out} of ${st.phases.length}` : fmt.dash),
      h('td', {}, ageEl(id)));
  });
  const body = state.railsError
    ? errorNotice('the rails', state.railsError)
    : rows.length
      ? tableBox('Rails', h('table', { class: 'overview' },
        h('caption', {}, `${rows.length} rail${rows.length === 1 ? '' : 's'}, worst condition first.`),
        h('thead', {}, h('tr', {},
          ...['Rail', 'Condition', 'Load', 'Capacity', 'Headroom', 'Hottest junction', 'Phases out', 'Latest sample']
            .map((x) => h('th', { scope: 'col' }, x)))),
        h('tbody', {}, rows)))
      : h('p', { class: 'empty' }, 'No rails are defined yet. Define one with POST /v1/rails; this list looks again every half minute.');
  replaceKeepingFocus(main,
    h('div', { class: 'page-head' }, h('h1', { tabindex: '-1', 'data-focus-key': 'h1' }, 'Rails')),
    h('p', { class: 'lede' }, 'Every rail this service watches, with its condition now. Choose a rail for its phases, forecast, screening and events.'),
    body,
    legend());
}

function legend() {
  return h('section', { class: 'legend', 'aria-labelledby': 'legend-title' },
    h('h2', { id: 'legend-title' }, 'What the conditions mean'),
    h('dl', {}, Object.entries(RAIL_CONDITIONS).map(([k, text]) => [
      h('dt', {}, railTag(k === 'unknown' ? null : k)), h('dd', {}, text)])));
}

// ---------------------------------------------------------------------------------------
// One rail

function newDetail(id) {
  return {
    id, spec: null, statusError: null, events: [], nextCursor: undefined, eventsError: null,
    screening: null, screeningError: null, forecast: null, forecastError: null, forecastLoad: null,
    ratings: null, ratingsError: null, ratingPairs: false,
    depth: 1, onlyOpen: false, forecastTableOpen: false, analysesSeq: 0, analysedFor: null,
  };
}

function section(id, title, lede) {
  return h('section', { id: `sec-${id}`, class: `panel panel-${id}`, 'aria-labelledby': `sec-${id}-title` },
    h('h2', { id: `sec-${id}-title`, tabindex: '-1' }, title),
    lede ? h('p', { class: 'panel-lede' }, lede) : null,
    h('div', { class: 'panel-body', id: `sec-${id}-body` }, h('p', { class: 'loading' }, 'Loading\u2026')));
}

function mountRail(d) {
  document.title = `${d.id} \u00b7 phaseward`;
  replaceKeepingFocus($('main'),
    h('div', { class: 'page-head' },
      h('p', { class: 'crumbs' }, h('a', { href: '/', 'data-route': true }, '\u2190 All rails')),
      h('h1', { tabindex: '-1', id: 'rail-title', 'data-focus-key': 'h1' }, d.id),
      h('p', { class: 'rail-name', id: 'rail-name' })),
    h('div', { id: 'rail-condition', class: 'condition-band' }),
    h('aside', { class: 'caution', id: 'caution', 'aria-labelledby': 'caution-title' },
      h('h2', { id: 'caution-title' }, 'Safety caution'), h('p', { id: 'caution-text' }, '\u2026')),
    h('div', { class: 'rail-grid' },
      section('capacity', 'Capacity against load'),
      section('thermal', 'Junctions now', 'Estimated from the thermal model and corrected by the sensors.'),
      section('phases', 'Phases'),
      section('forecast', 'Thermal forecast, next hour', 'At the present load; from the state of the latest sample.'),
      section('screening', 'N\u22121 screening', 'What one more loss would leave, weakest first.'),
      section('ratings', 'How much load, for how long', 'The highest constant load from the present state, as the rail is and after one more loss (or two), with no junction past its warning line and no phase past its current rating or trip current.'),
      section('events', 'Events', 'Newest first, live.')));
}

function renderRail() {
  const d = state.detail;
  if (!d) return;
  const entry = state.rails.get(d.id);
  const st = entry ? entry.status : null;
  if (d.statusError && !st) {
    const notFound = d.statusError instanceof ApiError && d.statusError.status === 404;
    replaceKeepingFocus($('main'),
      h('div', { class: 'page-head' },
        h('p', { class: 'crumbs' }, h('a', { href: '/', 'data-route': true }, '\u2190 All rails')),
        h('h1', { tabindex: '-1', 'data-focus-key': 'h1' }, notFound ? `No rail named \u201c${d.id}\u201d` : d.id)),
      notFound ? h('p', {}, 'It may have been deleted. The list of rails is on the left.') : errorNotice('the status', d.statusError));
    return;
  }
  if (!st) return;
  if (!$('rail-title')) {
    mountRail(d);
    if (d.nextCursor !== undefined || d.eventsError) renderEvents(); // they came before the status
  }
  const spec = d.spec ? d.spec.spec : null;
  $('rail-name').textContent = spec ? `${spec.name} \u00b7 definition version ${st.version}` : `definition version ${st.version}`;
  $('caution-text').textContent = st.caution;
  renderCondition(st);
  renderCapacity(st);
  renderThermal(st, spec);
  renderPhases(st, spec);
}

function renderCondition(st) {
  const c = st.condition;
  const ls = st.last_sample;
  replaceKeepingFocus($('rail-condition'),
    h('div', { class: `condition-main c-${c || 'unknown'}`, 'data-condition': c || 'unknown' },
      h('span', { class: 'condition-glyph' }, glyph(c || 'unknown')),
      h('p', { class: 'condition-word' }, h('span', { class: 'visually-hidden' }, 'Rail condition: '), c || 'no data'),
      h('p', { class: 'condition-text' }, RAIL_CONDITIONS[c || 'unknown'])),
    h('dl', { class: 'facts' },
      fact('Latest sample', ls ? `#${ls.seq}, ` : fmt.dash, ls ? ageEl(st.rail_id) : null),
      fact('Input', fmt.volts(ls ? ls.vin_v : null, 2)),
      fact('Output', fmt.volts(ls ? ls.vout_v : null, 3)),
      fact('Ambient', fmt.celsius(ls ? ls.ambient_c : null)),
      fact('Live stream', h('span', { class: 'live-echo' }, state.live.state === 'live' ? 'following' : state.live.state))));
}

function fact(term, ...value) {
  return h('div', { class: 'fact' }, h('dt', {}, term), h('dd', {}, ...value));
}

function renderCapacity(st) {
  const cap = st.capacity;
  const body = $('sec-capacity-body');
  if (!cap) {
    replaceKeepingFocus(body, h('p', { class: 'empty' }, `No telemetry yet. The rail must deliver ${fmt.amps(st.rated_load_a)}.`));
    return;
  }
  const by = cap.binding === 'rating' ? `phase ${cap.binding_phase}'s current rating`
    : cap.binding === 'trip_current' ? `phase ${cap.binding_phase}'s trip current`
      : cap.binding === 'warning_line' ? `phase ${cap.binding_phase}'s junction warning line` : 'nothing (no active phase)';
  const short = cap.headroom_a < 0;
  replaceKeepingFocus(body,
    h('div', { class: 'chart-box' }, capacityChart({ capacity: cap.capacity_a, load: st.load_a, rated: st.rated_load_a })),
    short ? h('p', { class: 'notice lvl-over' }, glyph('overloads'), ` The load exceeds the capacity by ${fmt.amps(-cap.headroom_a)}.`) : null,
    h('dl', { class: 'facts' },
      fact('Capacity', fmt.amps(cap.capacity_a)),
      fact('Limited by', by),
      fact('Present load', fmt.amps(st.load_a), st.load_assumed_a != null
        ? h('span', { class: 'sub' }, ` of which ${fmt.amps(st.load_assumed_a)} assumed for phases without a reading`) : null),
      fact('Headroom now', h('span', { class: short ? 'neg' : '' }, fmt.amps(cap.headroom_a))),
      fact('Rated load', fmt.amps(st.rated_load_a)),
      fact('Headroom at rated', h('span', { class: cap.headroom_rated_a < 0 ? 'neg' : '' }, fmt.amps(cap.headroom_rated_a)))));
}

function renderThermal(st, spec) {
  const th = st.thermal;
  const body = $('sec-thermal-body');
  if (!th) {
    replaceKeepingFocus(body, h('p', { class: 'empty' }, 'No telemetry yet.'));
    return;
  }
  const limits = phaseLimits(st, spec);
  const hot = th.hottest_phase;
  const lvl = hot == null ? 'none' : level(th.hottest_temp_c, limits[hot].hold, limits[hot].limit);
  replaceKeepingFocus(body,
    h('dl', { class: 'facts' },
      fact('Hottest junction', hot == null ? fmt.dash : h('span', { class: `lvl-text lvl-${lvl}` }, `${fmt.celsius(th.hottest_temp_c)}, phase ${hot}`)),
      fact('Margin to its limit', fmt.kelvin(th.margin_to_limit_k)),
      fact('Margin to warning line', h('span', { class: th.margin_to_warning_k != null && th.margin_to_warning_k < 0 ? 'neg' : '' }, fmt.kelvin(th.margin_to_warning_k))),
      fact('Reaches warning line', th.runaway ? 'thermal runaway: no steady state'
        : th.time_to_warning_s == null ? 'not within the watch horizon' : `in ${fmt.duration(th.time_to_warning_s)} (phase ${th.warning_phase})`),
      fact('Board', fmt.celsius(th.board_c)),
      fact('Board path cooling', driftText(th.board_drift))));
}

/** Cooling drift of one path (status ``drift``): the extra thermal resistance the readings
 * imply while a thermal.drift episode is open, else how far the test stands from raising. */
function driftText(d) {
  if (!d) return fmt.dash;
  if (!d.raised) return h('span', {}, 'no drift', h('span', { class: 'sub' }, ` (test ${fmt.num(d.statistic, 0)} of ${fmt.num(d.threshold, 0)})`));
  return h('span', { class: 'lvl-text lvl-warn drift' },
    `drift +${fmt.kPerW(d.extra_k_per_w)} \u00b1${fmt.num(d.extra_se_k_per_w, 2)}`,
    h('span', { class: 'sub' },
      d.recent_k_per_w != null ? `recently +${fmt.kPerW(d.recent_k_per_w)} \u00b1${fmt.num(d.recent_se_k_per_w, 2)}` : '',
      d.since_s != null ? ` \u00b7 since ${fmt.utc(d.since_s)}` : ''));
}

/** Per phase: junction limit, warning line (limit minus warning margin), current limits. */
function phaseLimits(st, spec) {
  const count = st.phases.length || (spec ? spec.phase_count : 0);
  const out = [];
  for (let i = 0; i < count; i++) {
    const p = st.phases[i];
    let margin = null;
    let ocl = null;
    if (spec) {
      const o = (spec.overrides || []).find((x) => x.index === i) || {};
      margin = o.warning_margin_k ?? spec.phase.warning_margin_k;
      ocl = o.overcurrent_limit_a ?? spec.phase.overcurrent_limit_a;
    }
    const limit = p ? p.junction_limit_c : null;
    out.push({ limit, hold: limit != null && margin != null ? limit - margin : null, rated: p ? p.rated_current_a : null, ocl });
  }
  return out;
}

/** What a phase's figures rest on: an implausible reading (suspect), a held last good reading,
 * or none at all (and what the load assumed for it). */
function readingNote(p) {
  const notes = [];
  if (p.implausible) {
    const got = p.implausible.current_a != null && p.implausible.rule.startsWith('current')
      ? fmt.amps(p.implausible.current_a) : fmt.celsius(p.implausible.temp_c);
    notes.push(`suspect: implausible reading ${got} (${p.implausible.rule.replace(/_/g, ' ')}), left out`);
  }
  if (p.reading === 'held') notes.push(`last good reading, ${fmt.duration(p.reading_age_s)} old`);
  if (p.reading === 'missing') notes.push('no reading');
  if (p.assumed_a != null) notes.push(`load assumes ${fmt.amps(p.assumed_a)}`);
  return notes.length ? h('span', { class: 'sub' }, notes.join(' \u00b7 ')) : null;
}

function renderPhases(st, spec) {
  const body = $('sec-phases-body');
  if (!st.phases.length) {
    replaceKeepingFocus(body, h('p', { class: 'empty' }, 'No telemetry yet.'));
    return;
  }
  const limits = phaseLimits(st, spec);
  const th = st.thermal;
  const ambient = st.last_sample && st.last_sample.ambient_c != null ? st.last_sample.ambient_c : 25;
  const rows = st.phases.map((p) => {
    const lim = limits[p.index];
    const est = th ? th.estimated_junction_c[p.index] : null;
    const std = th ? th.junction_std_k[p.index] : null;
    const on = p.condition === 'active';
    const iState = on ? level(p.current_a, lim.rated, lim.ocl) : 'off';
    const jState = on ? level(est, lim.hold, lim.limit) : 'off';
    const iMax = Math.max(lim.ocl ?? lim.rated * 1.3, p.current_a ?? 0) * 1.05;
    const jLo = Math.min(25, ambient, est ?? ambient);
    const jHi = Math.max(lim.limit + 10, est ?? 0);
    return h('tr', { class: `phase-row row-${p.condition}`, 'data-phase': p.index },
      h('th', { scope: 'row' }, `${p.index}`),
      h('td', { class: 'phase-condition' }, tag(p.condition), readingNote(p)),
      h('td', { class: 'with-gauge' },
        h('span', { class: `num lvl-text lvl-${iState}` }, fmt.amps(p.current_a)),
        gauge({ value: p.current_a, lo: 0, hi: iMax, state: iState, marks: [{ at: lim.rated, kind: 'hold' }, { at: lim.ocl, kind: 'limit' }] }),
        h('span', { class: 'sub' }, `rated ${fmt.amps(lim.rated, 0)}`, lim.ocl != null ? ` \u00b7 trip ${fmt.amps(lim.ocl, 0)}` : '')),
      h('td', { class: 'num' }, fmt.percent(p.share)),
      h('td', { class: 'with-gauge' },
        h('span', { class: `num lvl-text lvl-${jState}` }, fmt.celsius(est), std != null ? h('span', { class: 'pm' }, ` \u00b1${fmt.num(std, 1)}`) : null),
        gauge({ value: est, lo: jLo, hi: jHi, state: jState, marks: [{ at: lim.hold, kind: 'hold' }, { at: lim.limit, kind: 'limit' }] }),
        h('span', { class: 'sub' }, lim.hold != null ? `warning ${fmt.celsius(lim.hold, 0)} \u00b7 ` : '', `limit ${fmt.celsius(lim.limit, 0)}`)),
      h('td', { class: 'num' }, fmt.celsius(p.temp_c)),
      h('td', {}, p.flags.length ? p.flags.map((f) => f.replace(/_/g, ' ')).join(', ') : fmt.dash),
      h('td', { class: 'drift-cell' }, driftText(p.drift)));
  });
  replaceKeepingFocus(body,
    tableBox('Phases', h('table', { class: 'phases' },
      h('caption', { class: 'visually-hidden' }, 'Per phase: condition, current against its rating, estimated junction temperature against its limit, cooling drift'),
      h('thead', {}, h('tr', {},
        h('th', { scope: 'col' }, 'Phase'),
        h('th', { scope: 'col' }, 'Condition'),
        h('th', { scope: 'col' }, 'Current'),
        h('th', { scope: 'col' }, 'Share'),
        h('th', { scope: 'col' }, 'Junction (estimate)'),
        h('th', { scope: 'col' }, 'Sensor'),
        h('th', { scope: 'col' }, 'Flags'),
        h('th', { scope: 'col' }, 'Cooling (to the board)'))),
      h('tbody', {}, rows))),
    gaugeKey());
}

function gaugeKey() {
  return h('p', { class: 'gauge-key' },
    h('span', { class: 'key key-hold' }, 'dashed mark: rating or warning line'),
    h('span', { class: 'key key-limit' }, 'solid mark: trip current or junction limit'),
    h('span', { class: 'key key-warn' }, 'hatched bar: past the dashed mark'),
    h('span', { class: 'key key-over' }, 'cross-hatched bar: past the solid mark'));
}

function renderForecast() {
  const d = state.detail;
  const body = $('sec-forecast-body');
  if (!d || !body) return;
  if (d.forecastError) {
    replaceKeepingFocus(body, errorNotice('the forecast', d.forecastError));
    return;
  }
  if (!d.forecast) return;
  const entry = state.rails.get(d.id);
  const st = entry ? entry.status : null;
  const limits = st ? phaseLimits(st, d.spec ? d.spec.spec : null) : [];
  const active = st && st.phases.length ? st.phases.filter((p) => p.condition === 'active').map((p) => p.index) : [];
  const considered = active.length ? active : limits.map((_, i) => i);
  const pick = (key) => {
    const values = considered.map((i) => limits[i] && limits[i][key]).filter((v) => v != null);
    return values.length ? Math.min(...values) : null;
  };
  replaceKeepingFocus(body, forecastChart({
    forecast: d.forecast, phases: active, limitC: pick('limit'), holdC: pick('hold'),
    loadA: d.forecastLoad.loadA, loadNote: d.forecastLoad.note,
    tableOpen: d.forecastTableOpen, onTableToggle: (open) => { d.forecastTableOpen = open; },
  }));
}

function cascadeText(c) {
  const steps = (c.cascade || []).map((x) => `phase ${x.phase} ${x.cause === 'trip_current' ? 'trips' : 'overheats'} after ${fmt.duration(x.at_s)}`);
  if (c.down_at_s != null) steps.push(`the rail is down after ${fmt.duration(c.down_at_s)}`);
  return steps.length ? steps.join(', then ') : 'holds';
}

function renderScreening() {
  const d = state.detail;
  const body = $('sec-screening-body');
  if (!d || !body) return;
  const depthSelect = h('select', { id: 'screen-depth', 'data-focus-key': 'screen-depth', onchange: (e) => {
    d.depth = Number(e.target.value);
    loadAnalyses(d);
  } },
  h('option', { value: '1', selected: d.depth === 1 }, 'every single further loss'),
  h('option', { value: '2', selected: d.depth === 2 }, 'every pair of further losses'));
  const controls = h('p', { class: 'controls' }, h('label', { for: 'screen-depth' }, 'Screen '), depthSelect);
  if (d.screeningError) {
    replaceKeepingFocus(body, controls, errorNotice('the screening', d.screeningError));
    return;
  }
  const sc = d.screening;
  if (!sc) return;
  const n = sc.overloading.length;
  const verdict = sc.secure
    ? h('p', { class: 'verdict lvl-ok' }, glyph('carries'), ` Secure at ${fmt.amps(sc.load_a)}: every case leaves capacity for the load.`)
    : h('p', { class: 'verdict lvl-over' }, glyph('overloads'), ` Not secure at ${fmt.amps(sc.load_a)}: ${n} of ${sc.cases.length} case${sc.cases.length === 1 ? '' : 's'} would overload the rail.`);
  const rows = sc.cases.map((c) => h('tr', { class: c.overloads ? 'row-overloads' : 'row-carries' },
    h('th', { scope: 'row' }, `phase${c.lose_phases.length > 1 ? 's' : ''} ${c.lose_phases.join(' + ')}`),
    h('td', { class: 'num' }, fmt.amps(c.capacity_a)),
    h('td', { class: `num${c.headroom_a < 0 ? ' neg' : ''}` }, fmt.amps(c.headroom_a)),
    h('td', { class: 'nowrap' }, c.binding === 'none' ? fmt.dash : `phase ${c.binding_phase} ${BINDS[c.binding] ?? c.binding}`),
    h('td', { class: 'num' }, c.runaway ? 'runaway' : fmt.celsius(c.steady_hottest_c)),
    h('td', { class: 'num' }, c.time_to_warning_s == null ? 'not within horizon' : `${fmt.duration(c.time_to_warning_s)} (phase ${c.warning_phase})`),
    h('td', {}, cascadeText(c)),
    h('td', {}, c.overloads ? tag('overloads', 'overloads') : tag('carries', 'carries the load'))));
  replaceKeepingFocus(body, controls, verdict,
    tableBox('Screening cases', h('table', { class: 'screening' },
      h('caption', { class: 'visually-hidden' }, 'N-1 screening cases, weakest first'),
      h('thead', {}, h('tr', {},
        ...['Further loss', 'Capacity', 'Headroom', 'Limited by', 'Steady hottest junction', 'Reaches warning line', 'Then', 'Verdict']
          .map((x) => h('th', { scope: 'col' }, x)))),
      h('tbody', {}, rows))));
}

const BINDS = { rating: 'current rating', trip_current: 'trip current', warning_line: 'warning line', none: 'no phase left' };

function renderRatings() {
  const d = state.detail;
  const body = $('sec-ratings-body');
  if (!d || !body) return;
  const casesSelect = h('select', { id: 'ratings-cases', 'data-focus-key': 'ratings-cases', onchange: (e) => {
    d.ratingPairs = e.target.value === 'pairs';
    loadAnalyses(d);
  } },
  h('option', { value: 'singles', selected: !d.ratingPairs }, 'every single further loss'),
  h('option', { value: 'pairs', selected: d.ratingPairs }, 'every single and every pair of further losses'));
  const controls = h('p', { class: 'controls' }, h('label', { for: 'ratings-cases' }, 'Rate '), casesSelect);
  if (d.ratingsError) {
    replaceKeepingFocus(body, controls, errorNotice('the ratings', d.ratingsError));
    return;
  }
  const r = d.ratings;
  if (!r) return;
  const heads = r.durations_s.map((s) => (s == null ? 'Indefinitely' : fmt.duration(s)));
  const rows = r.cases.map((c) => h('tr', {},
    h('th', { scope: 'row' }, c.lose_phases.length ? `lose phase${c.lose_phases.length > 1 ? 's' : ''} ${c.lose_phases.join(' + ')}` : 'as it is'),
    ...c.ratings.map((x) => h('td', { class: `num${x.headroom_a < 0 ? ' neg' : ''}`, title: `limited by ${BINDS[x.binding] ?? x.binding}${x.binding_phase == null ? '' : ` of phase ${x.binding_phase}`}` },
      fmt.amps(x.rating_a), h('span', { class: 'sub' }, ` ${BINDS[x.binding] ?? x.binding}`)))));
  replaceKeepingFocus(body, controls,
    h('p', {}, `Present load ${fmt.amps(r.load_a)}. Each cell: the highest constant load for that long, and what limits it.`),
    tableBox('Time-limited ratings', h('table', { class: 'ratings' },
      h('caption', { class: 'visually-hidden' }, 'Time-limited ratings per further loss and duration'),
      h('thead', {}, h('tr', {}, h('th', { scope: 'col' }, 'Case'), ...heads.map((x) => h('th', { scope: 'col' }, x)))),
      h('tbody', {}, rows))));
}

function renderEvents() {
  const d = state.detail;
  const body = $('sec-events-body');
  if (!d || !body) return;
  const only = h('input', { type: 'checkbox', id: 'only-open', 'data-focus-key': 'only-open', checked: d.onlyOpen, onchange: (e) => {
    d.onlyOpen = e.target.checked;
    renderEvents();
  } });
  const controls = h('p', { class: 'controls' }, only, h('label', { for: 'only-open' }, ' Only unacknowledged events'));
  const shown = d.onlyOpen ? d.events.filter((e) => !e.acked_by) : d.events;
  const open = d.events.filter((e) => !e.acked_by).length;
  const rows = shown.map((e) => h('tr', { class: `event-row sev-${e.severity}${e.acked_by ? ' is-acked' : ''}`, 'data-event-id': e.id, 'data-kind': e.kind },
    h('td', { class: 'when' }, h('time', { datetime: fmt.isoOf(e.time_s) },
      h('span', { class: 'clock' }, fmt.utc(e.time_s).slice(11, 19)), h('span', { class: 'sub' }, `${fmt.utc(e.time_s).slice(0, 10)} UTC`))),
    h('td', {}, tag(e.severity)),
    h('th', { scope: 'row', class: 'kind' }, e.kind, securityBadge(e) || (e.details && e.details.cleared ? h('span', { class: 'cleared' }, 'cleared') : null)),
    h('td', { class: 'num' }, e.phase == null ? fmt.dash : `${e.phase}`),
    h('td', { class: 'message' }, e.message, signature(e), weakestLoss(e), driftDetail(e)),
    h('td', { class: 'ack' }, ackCell(e))));
  replaceKeepingFocus(body,
    controls,
    h('p', { class: 'counts', 'aria-live': 'off' }, `${d.events.length} loaded, ${open} unacknowledged.`),
    d.eventsError ? errorNotice('the events', d.eventsError) : null,
    rows.length
      ? tableBox('Events', h('table', { class: 'events' },
        h('caption', { class: 'visually-hidden' }, 'Events of this rail, newest first'),
        h('thead', {}, h('tr', {},
          ...['Time', 'Severity', 'Kind', 'Phase', 'Message', 'Acknowledgement'].map((x) => h('th', { scope: 'col' }, x)))),
        h('tbody', {}, rows)))
      : h('p', { class: 'empty' }, d.onlyOpen ? 'Nothing left to acknowledge.' : 'No events yet.'),
    d.nextCursor ? h('p', {}, h('button', { type: 'button', class: 'quiet', 'data-focus-key': 'older', onclick: () => loadEvents(d, { older: true }) }, 'Load older events')) : null);
}

// capacity.exposed (N-1 security lost or regained) reads too much like the rail condition
// "exposed": say which it is, and name the weakest further loss.
function securityBadge(e) {
  if (e.kind !== 'capacity.exposed') return null;
  const regained = !!(e.details && e.details.cleared);
  return h('span', { class: `n1-badge${regained ? ' is-regained' : ''}` }, regained ? 'N-1 regained' : 'N-1 lost');
}

function weakestLoss(e) {
  const d = e.details;
  if (e.kind !== 'capacity.exposed' || !d || d.cleared || !d.weakest) return null;
  const lost = d.weakest.lose_phases.join(', ');
  const short = typeof d.shortfall_a === 'number' && d.shortfall_a > 0 ? `${fmt.num(d.shortfall_a, 1)} A short` : 'overheats the survivors';
  return h('span', { class: 'signature' }, `Weakest further loss: phase ${lost}, ${short} (${d.overloading_losses} of ${d.single_losses} single losses overload)`);
}

function driftDetail(e) {
  const d = e.details;
  if (e.kind !== 'thermal.drift' || !d || d.cleared) return null;
  const where = d.channel === 'board' ? 'board path to ambient' : `phase ${e.phase} to the board`;
  const recent = d.recent_k_per_w != null ? `; recently +${fmt.kPerW(d.recent_k_per_w)} \u00b1${fmt.num(d.recent_se_k_per_w, 2)}` : '';
  return h('span', { class: 'signature drift' }, `Extra thermal resistance, ${where}: +${fmt.kPerW(d.extra_k_per_w)} \u00b1${fmt.num(d.extra_se_k_per_w, 2)} since ${fmt.utc(d.since_t_s)}${recent} (test ${fmt.num(d.statistic, 1)} over ${fmt.num(d.threshold, 0)})`);
}

function signature(e) {
  const sig = e.details && e.details.signature;
  if (!sig || !sig.kind) return null;
  const conf = typeof sig.confidence === 'number' ? `, confidence ${fmt.num(sig.confidence, 2)}` : '';
  const source = sig.source === 'capture' ? ` (from capture ${sig.capture_id})` : '';
  const used = (sig.used || []).filter((k) => sig.evidence && sig.evidence[k] != null);
  const evidence = used.length
    ? h('span', { class: 'sub evidence' }, `Evidence: ${used.map((k) => `${k.replace(/_/g, ' ')} ${fmt.num(sig.evidence[k], 3)}`).join('; ')}`)
    : null;
  return h('span', { class: 'signature' }, `Fault class: ${String(sig.kind).replace(/_/g, ' ')}${conf}${source}${sig.reason ? ` \u2014 ${sig.reason}` : ''}`, evidence);
}

function ackCell(e) {
  if (e.acked_by) {
    return h('span', { class: 'acked', tabindex: '-1', 'data-focus-key': `ack-${e.id}` },
      tag('acked', `acknowledged by ${e.acked_by}`, 'tag-quiet'),
      e.ack_note ? h('span', { class: 'ack-note' }, `\u201c${e.ack_note}\u201d`) : null,
      e.acked_at ? h('span', { class: 'sub' }, fmt.utc(Date.parse(e.acked_at) / 1000)) : null);
  }
  return h('button', {
    type: 'button', class: 'ack-button', 'data-focus-key': `ack-${e.id}`,
    'aria-label': `Acknowledge event ${e.id}: ${e.message}`,
    onclick: (ev) => openAck(e, ev.currentTarget),
  }, 'Acknowledge');
}

// ---------------------------------------------------------------------------------------
// Acknowledging

let ackTarget = null;

function openAck(event, opener) {
  ackTarget = { event, opener };
  const dialog = $('ack-dialog');
  $('ack-title').textContent = `Acknowledge event #${event.id}`;
  $('ack-what').textContent = `${event.severity} \u00b7 ${event.kind}${event.phase == null ? '' : ` \u00b7 phase ${event.phase}`}: ${event.message} (${fmt.utc(event.time_s)})`;
  const by = $('ack-by');
  by.value = localStorage.getItem(OPERATOR_KEY) || '';
  $('ack-note').value = '';
  showAckError(null);
  dialog.showModal();
  (by.value ? $('ack-note') : by).focus();
}

function showAckError(text, field = null) {
  const el = $('ack-error');
  el.hidden = !text;
  el.textContent = text || '';
  for (const input of [$('ack-by'), $('ack-note')]) input.removeAttribute('aria-invalid');
  if (field) field.setAttribute('aria-invalid', 'true');
}

async function submitAck(e) {
  e.preventDefault();
  if (!ackTarget) return;
  const by = $('ack-by').value.trim();
  const note = $('ack-note').value.trim();
  if (!by) {
    showAckError('Give your name: an acknowledgement records who made it.', $('ack-by'));
    $('ack-by').focus();
    return;
  }
  const submit = $('ack-submit');
  submit.disabled = true;
  try {
    const updated = await api.ack(ackTarget.event.id, by, note);
    localStorage.setItem(OPERATOR_KEY, by);
    const d = state.detail;
    if (d) mergeEvents(d, [updated]);
    const id = updated.id;
    ackTarget = null;
    $('ack-dialog').close();
    renderEvents();
    const again = document.querySelector(`[data-focus-key="ack-${id}"]`) || $('sec-events-title');
    again.focus();
    announce(`Event ${id} acknowledged by ${updated.acked_by}.`);
  } catch (err) {
    const field = err.field === 'by' ? $('ack-by') : err.field === 'note' ? $('ack-note') : null;
    showAckError(`Not recorded: ${err.message}.`, field);
  } finally {
    submit.disabled = false;
  }
}

function setUpAckDialog() {
  $('ack-form').addEventListener('submit', submitAck);
  $('ack-cancel').addEventListener('click', () => $('ack-dialog').close());
  $('ack-dialog').addEventListener('close', () => {
    if (ackTarget && ackTarget.opener && ackTarget.opener.isConnected) ackTarget.opener.focus();
    ackTarget = null;
  });
}

// ---------------------------------------------------------------------------------------
// Routing

function routeOf(pathname) {
  const m = pathname.match(/^\/rails\/([a-z0-9][a-z0-9-]{0,63})\/?$/);
  return m ? { kind: 'rail', id: m[1] } : { kind: 'overview' };
}

let shownPath = null;

function show(view, moveFocus) {
  shownPath = location.pathname;
  state.view = view;
  clearTimeout(timers.analyses);
  if (view.kind === 'overview') {
    state.detail = null;
    renderOverview();
  } else {
    const d = newDetail(view.id);
    state.detail = d;
    replaceKeepingFocus($('main'), h('div', { class: 'page-head' }, h('h1', { tabindex: '-1', 'data-focus-key': 'h1' }, view.id)), h('p', { class: 'loading' }, 'Loading\u2026'));
    loadEvents(d); // the events need no status: fetched beside it, for a first view sooner
    refreshStatus(view.id).then(() => {
      if (state.detail !== d) return;
      if (moveFocus) headingFocus();
      loadAnalyses(d);
    });
  }
  renderNav();
  if (moveFocus) headingFocus();
}

function navigate(href) {
  const url = new URL(href, location.href);
  if (url.pathname !== location.pathname) history.pushState({}, '', url.pathname);
  show(routeOf(url.pathname), true);
}

document.addEventListener('click', (e) => {
  const a = e.target.closest && e.target.closest('a[data-route]');
  if (!a || e.defaultPrevented || e.button !== 0 || e.metaKey || e.ctrlKey || e.shiftKey || e.altKey) return;
  e.preventDefault();
  navigate(a.href);
});
window.addEventListener('popstate', () => {
  if (location.pathname === shownPath) return; // a fragment (the skip link), not a new view
  show(routeOf(location.pathname), true);
});

// ---------------------------------------------------------------------------------------

async function main() {
  setUpAckDialog();
  renderLive();
  await startLive();
  show(routeOf(location.pathname), false);
  await loadRails();
  setInterval(refreshVisible, REFRESH_MS);
  setInterval(tickAges, 5_000);
  document.body.dataset.ready = 'true';
}

main();
