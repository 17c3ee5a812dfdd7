// Number and time formats shown to operators. Missing values show as an em dash.

const DASH = '\u2014';
const MINUS = '\u2212';

function signed(x, digits) {
  const text = Math.abs(x).toFixed(digits);
  return x < 0 && Number(text) !== 0 ? MINUS + text : text;
}

export function num(x, digits = 1) {
  return x === null || x === undefined || !Number.isFinite(x) ? DASH : signed(x, digits);
}

export const amps = (x, digits = 1) => (x == null ? DASH : `${num(x, digits)} A`);
export const celsius = (x, digits = 1) => (x == null ? DASH : `${num(x, digits)} \u00b0C`);
export const kelvin = (x, digits = 1) => (x == null ? DASH : `${num(x, digits)} K`);
export const volts = (x, digits = 3) => (x == null ? DASH : `${num(x, digits)} V`);
export const kPerW = (x, digits = 2) => (x == null ? DASH : `${num(x, digits)} K/W`);
export const percent = (x) => (x == null ? DASH : `${num(100 * x, 0)} %`);

/** A duration in the unit an operator reads fastest. */
export function duration(seconds) {
  if (seconds === null || seconds === undefined || !Number.isFinite(seconds)) return DASH;
  const abs = Math.abs(seconds);
  if (abs < 90) return `${Math.round(seconds)} s`;
  if (abs < 90 * 60) return `${num(seconds / 60, abs < 600 ? 1 : 0)} min`;
  if (abs < 48 * 3600) return `${num(seconds / 3600, 1)} h`;
  return `${num(seconds / 86400, 1)} d`;
}

/** A sample's age on the server's clock; a sample dated ahead of that clock (allowed within
 * the service's clock skew) says so instead of pretending to be fresh. */
export function age(seconds) {
  if (seconds === null || seconds === undefined || !Number.isFinite(seconds)) return DASH;
  if (seconds < 0) return `${duration(-seconds)} ahead of this server's clock`;
  return `${duration(seconds)} ago`;
}

/** Epoch seconds as an unambiguous UTC stamp. */
export function utc(epochSeconds) {
  if (epochSeconds == null) return DASH;
  const iso = new Date(epochSeconds * 1000).toISOString();
  return `${iso.slice(0, 10)} ${iso.slice(11, 19)} UTC`;
}

export function isoOf(epochSeconds) {
  return new Date(epochSeconds * 1000).toISOString();
}

export const dash = DASH;
