// The service's HTTP API, same origin only.

export class ApiError extends Error {
  constructor(status, body) {
    const detail = body && typeof body === 'object' && body.detail ? body.detail : `HTTP ${status}`;
    super(typeof detail === 'string' ? detail : JSON.stringify(detail));
    this.status = status;
    this.field = body && typeof body === 'object' ? body.field ?? null : null;
  }
}

// A service that needs keys answers 401; the page then asks once for a key and keeps it for
// this browser tab only (sessionStorage), sending it as a bearer token.
const KEY = 'phaseward-key';

export function authHeaders() {
  const key = sessionStorage.getItem(KEY);
  return key ? { authorization: `Bearer ${key}` } : {};
}

function askForKey() {
  const key = window.prompt('This phaseward service needs an access key (role read or operate):');
  if (key && key.trim()) sessionStorage.setItem(KEY, key.trim());
  return Boolean(key && key.trim());
}

async function request(method, path, body, retried = false) {
  const init = { method, headers: { accept: 'application/json', ...authHeaders() }, cache: 'no-store' };
  if (body !== undefined) {
    init.headers['content-type'] = 'application/json';
    init.body = JSON.stringify(body);
  }
  const res = await fetch(path, init);
  if (res.status === 401 && !retried && askForKey()) return request(method, path, body, true);
  const text = await res.text();
  let parsed = null;
  try {
    parsed = text ? JSON.parse(text) : null;
  } catch {
    parsed = null;
  }
  if (!res.ok) throw new ApiError(res.status, parsed);
  return parsed;
}

const rail = (id) => `/v1/rails/${encodeURIComponent(id)}`;

export const api = {
  rails: () => request('GET', '/v1/rails?limit=1000'),
  rail: (id) => request('GET', rail(id)),
  status: (id) => request('GET', `${rail(id)}/status`),
  events: (id, { limit = 50, cursor = null } = {}) =>
    request('GET', `${rail(id)}/events?limit=${limit}${cursor ? `&cursor=${encodeURIComponent(cursor)}` : ''}`),
  newestEvent: () => request('GET', '/v1/events?limit=1'),
  screening: (id, depth = 1) => request('GET', `${rail(id)}/screening?depth=${depth}`),
  forecast: (id, body) => request('POST', `${rail(id)}/forecast`, body),
  ratings: (id, pairs = false) => request('GET', `${rail(id)}/ratings${pairs ? '?pairs=true' : ''}`),
  ack: (eventId, by, note) =>
    request('POST', `/v1/events/${encodeURIComponent(eventId)}/ack`, { by, note: note || null }),
};
