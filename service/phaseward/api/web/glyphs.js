// Shapes that tell conditions apart without colour. Each glyph is paired with its word
// wherever it is shown; colour only repeats what the shape and the word already say.

import { h, s } from './dom.js';

const paths = {
  // Rail conditions.
  nominal: () => [s('circle', { cx: 10, cy: 10, r: 6.5, fill: 'currentColor' })],
  exposed: () => [
    s('path', { d: 'M10 2.5 L17.5 10 L10 17.5 L2.5 10 Z', fill: 'none', stroke: 'currentColor', 'stroke-width': 2 }),
    s('circle', { cx: 10, cy: 10, r: 2.2, fill: 'currentColor' }),
  ],
  // A ring with one segment missing: a rail running with a phase out.
  degraded: () => [
    s('path', { d: 'M13.25 4.37 A6.5 6.5 0 1 1 6.75 4.37', fill: 'none', stroke: 'currentColor', 'stroke-width': 3, 'stroke-linecap': 'butt' }),
  ],
  overloaded: () => [
    s('path', { d: 'M6.7 2 H13.3 L18 6.7 V13.3 L13.3 18 H6.7 L2 13.3 V6.7 Z', fill: 'currentColor' }),
    s('path', { d: 'M10 5.5 V11', class: 'cut-s', stroke: '#fff', 'stroke-width': 2.4, 'stroke-linecap': 'round' }),
    s('circle', { cx: 10, cy: 14.2, r: 1.4, class: 'cut-f', fill: '#fff' }),
  ],
  down: () => [
    s('rect', { x: 2.5, y: 2.5, width: 15, height: 15, fill: 'none', stroke: 'currentColor', 'stroke-width': 2 }),
    s('path', { d: 'M6 6 L14 14 M14 6 L6 14', stroke: 'currentColor', 'stroke-width': 2.2, 'stroke-linecap': 'round' }),
  ],
  unknown: () => [
    s('circle', { cx: 10, cy: 10, r: 6.5, fill: 'none', stroke: 'currentColor', 'stroke-width': 2, 'stroke-dasharray': '2.6 2.2' }),
  ],
  // Phase conditions.
  active: () => [s('rect', { x: 3.5, y: 3.5, width: 13, height: 13, rx: 1.5, fill: 'currentColor' })],
  isolated: () => [
    s('circle', { cx: 3.5, cy: 14.5, r: 2, fill: 'currentColor' }),
    s('circle', { cx: 16.5, cy: 14.5, r: 2, fill: 'currentColor' }),
    s('path', { d: 'M4.5 13.5 L14 4.5', stroke: 'currentColor', 'stroke-width': 2.2, 'stroke-linecap': 'round' }),
  ],
  suspect: () => [
    s('rect', { x: 3.5, y: 3.5, width: 13, height: 13, rx: 1.5, fill: 'none', stroke: 'currentColor', 'stroke-width': 2 }),
    s('path', { d: 'M3.5 16.5 L16.5 3.5 V16.5 Z', fill: 'currentColor' }),
  ],
  silent: () => [
    s('rect', { x: 3.5, y: 3.5, width: 13, height: 13, rx: 1.5, fill: 'none', stroke: 'currentColor', 'stroke-width': 2, 'stroke-dasharray': '3 2.4' }),
  ],
  // Event severities.
  info: () => [
    s('circle', { cx: 10, cy: 10, r: 7, fill: 'none', stroke: 'currentColor', 'stroke-width': 1.8 }),
    s('path', { d: 'M10 9 V14.5', stroke: 'currentColor', 'stroke-width': 2, 'stroke-linecap': 'round' }),
    s('circle', { cx: 10, cy: 6, r: 1.2, fill: 'currentColor' }),
  ],
  warning: () => [
    s('path', { d: 'M10 2.8 L18 17 L2 17 Z', fill: 'none', stroke: 'currentColor', 'stroke-width': 2, 'stroke-linejoin': 'round' }),
    s('path', { d: 'M10 7.5 V12.5', stroke: 'currentColor', 'stroke-width': 2.2, 'stroke-linecap': 'round' }),
    s('circle', { cx: 10, cy: 15, r: 1.1, fill: 'currentColor' }),
  ],
  critical: () => [
    s('path', { d: 'M10 1.5 L18.5 10 L10 18.5 L1.5 10 Z', fill: 'currentColor' }),
    s('path', { d: 'M10 6 V11', class: 'cut-s', stroke: '#fff', 'stroke-width': 2.2, 'stroke-linecap': 'round' }),
    s('circle', { cx: 10, cy: 14, r: 1.3, class: 'cut-f', fill: '#fff' }),
  ],
  // Verdicts and connection.
  carries: () => [
    s('path', { d: 'M3.5 10.5 L8 15 L16.5 5', fill: 'none', stroke: 'currentColor', 'stroke-width': 2.6, 'stroke-linecap': 'round', 'stroke-linejoin': 'round' }),
  ],
  overloads: () => [
    s('path', { d: 'M6.7 2 H13.3 L18 6.7 V13.3 L13.3 18 H6.7 L2 13.3 V6.7 Z', fill: 'currentColor' }),
    s('path', { d: 'M6.5 10 H13.5', class: 'cut-s', stroke: '#fff', 'stroke-width': 2.4, 'stroke-linecap': 'round' }),
  ],
  acked: () => [
    s('circle', { cx: 10, cy: 10, r: 7.5, fill: 'none', stroke: 'currentColor', 'stroke-width': 1.6 }),
    s('path', { d: 'M6 10.5 L9 13.5 L14.5 7', fill: 'none', stroke: 'currentColor', 'stroke-width': 2.2, 'stroke-linecap': 'round', 'stroke-linejoin': 'round' }),
  ],
  live: () => [
    s('circle', { cx: 10, cy: 10, r: 3.5, fill: 'currentColor' }),
    s('circle', { cx: 10, cy: 10, r: 7.5, fill: 'none', stroke: 'currentColor', 'stroke-width': 1.6 }),
  ],
  connecting: () => [
    s('circle', { cx: 10, cy: 10, r: 7, fill: 'none', stroke: 'currentColor', 'stroke-width': 2, 'stroke-dasharray': '2.5 2.5' }),
  ],
  retrying: () => [
    s('path', { d: 'M14.9 5.1 A7 7 0 1 0 17 10', fill: 'none', stroke: 'currentColor', 'stroke-width': 2, 'stroke-linecap': 'round' }),
    s('path', { d: 'M17 3.5 V8 H12.5', fill: 'none', stroke: 'currentColor', 'stroke-width': 2, 'stroke-linecap': 'round', 'stroke-linejoin': 'round' }),
  ],
};

export function glyph(name) {
  const draw = paths[name] || paths.unknown;
  return s('svg', { class: 'glyph', viewBox: '0 0 20 20', width: 20, height: 20, 'aria-hidden': 'true', focusable: 'false' }, draw());
}

export const RAIL_CONDITIONS = {
  nominal: 'Every phase is active and any single further loss still leaves capacity for the load.',
  exposed: 'Every phase is active, but one more loss would leave too little capacity.',
  degraded: 'At least one phase is out or cannot be vouched for; the survivors carry the load.',
  overloaded: 'The load exceeds what the active phases can carry, or a junction is forecast to pass its warning line (limit minus warning margin) within the watch horizon.',
  down: 'No phase is active, or the output has collapsed.',
  unknown: 'No telemetry has been judged under the present definition yet.',
};

/** A condition (rail or phase) or severity as glyph + word, e.g. <span class="tag c-degraded">. */
export function tag(kind, label = kind, extra = '') {
  return h('span', { class: `tag c-${kind}${extra ? ` ${extra}` : ''}` }, glyph(kind), h('span', { class: 'tag-word' }, label));
}

export function railTag(condition, extra = '') {
  return condition ? tag(condition, condition, extra) : tag('unknown', 'no data', extra);
}
