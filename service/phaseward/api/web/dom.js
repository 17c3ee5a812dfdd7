// Small DOM builders: every text goes in as a text node, never as markup.

const SVG_NS = 'http://www.w3.org/2000/svg';

function append(el, children) {
  for (const child of children.flat(Infinity)) {
    if (child === null || child === undefined || child === false) continue;
    el.append(child instanceof Node ? child : document.createTextNode(String(child)));
  }
  return el;
}

function setAttrs(el, attrs) {
  for (const [name, value] of Object.entries(attrs || {})) {
    if (value === null || value === undefined || value === false) continue;
    if (name.startsWith('on') && typeof value === 'function') {
      el.addEventListener(name.slice(2), value);
    } else if (name === 'dataset') {
      Object.assign(el.dataset, value);
    } else {
      el.setAttribute(name, value === true ? '' : String(value));
    }
  }
  return el;
}

/** An HTML element: h('p', {class: 'x'}, 'text', child, ...). */
export function h(tag, attrs, ...children) {
  return append(setAttrs(document.createElement(tag), attrs), children);
}

/** An SVG element, same calling shape as h(). */
export function s(tag, attrs, ...children) {
  return append(setAttrs(document.createElementNS(SVG_NS, tag), attrs), children);
}

/** Replace the children of el, keeping keyboard focus on the element with the same
 * data-focus-key if one was focused before (live updates must not steal focus). */
export function replaceKeepingFocus(el, ...children) {
  const active = document.activeElement;
  const key = active && el.contains(active) ? active.getAttribute('data-focus-key') : null;
  el.replaceChildren();
  append(el, children);
  if (key) {
    const again = el.querySelector(`[data-focus-key="${CSS.escape(key)}"]`);
    if (again) again.focus({ preventScroll: true });
  }
  return el;
}
