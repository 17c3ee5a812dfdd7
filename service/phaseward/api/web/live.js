// The service's event stream (Server-Sent Events) read with fetch, so that every event kind
// arrives through one handler; resumes after the last id seen when the connection drops.

import { authHeaders } from './api.js';

const sleep = (ms) => new Promise((resolve) => setTimeout(resolve, ms));

/** Parse SSE text frames from a byte stream, calling onFrame({id, event, data}). */
async function readFrames(body, onFrame, onRetry) {
  const reader = body.pipeThrough(new TextDecoderStream()).getReader();
  let buffer = '';
  let frame = { id: null, event: 'message', data: [] };
  for (;;) {
    const { value, done } = await reader.read();
    if (done) return;
    buffer += value;
    const lines = buffer.split(/\r\n|\r|\n/);
    buffer = lines.pop();
    for (const line of lines) {
      if (line === '') {
        if (frame.data.length) onFrame({ id: frame.id, event: frame.event, data: frame.data.join('\n') });
        frame = { id: null, event: 'message', data: [] };
        continue;
      }
      if (line.startsWith(':')) continue;
      const colon = line.indexOf(':');
      const field = colon < 0 ? line : line.slice(0, colon);
      let text = colon < 0 ? '' : line.slice(colon + 1);
      if (text.startsWith(' ')) text = text.slice(1);
      if (field === 'data') frame.data.push(text);
      else if (field === 'event') frame.event = text;
      else if (field === 'id') frame.id = text;
      else if (field === 'retry' && /^\d+$/.test(text)) onRetry(Number(text));
    }
  }
}

/**
 * Follow the stream from after event id `afterId` (null: from the next new event).
 * onEvent(event) gets each parsed event; onState(state, info) gets 'connecting', 'live'
 * or 'retrying' (info: the delay in ms). Returns a function that stops following.
 */
export function follow({ afterId, onEvent, onState }) {
  let last = afterId;
  let retryMs = 2000;
  let stopped = false;
  let controller = null;

  async function run() {
    while (!stopped) {
      controller = new AbortController();
      onState('connecting');
      try {
        const url = last == null ? '/v1/events/stream' : `/v1/events/stream?after=${encodeURIComponent(last)}`;
        const res = await fetch(url, { headers: { accept: 'text/event-stream', ...authHeaders() }, cache: 'no-store', signal: controller.signal });
        if (!res.ok || !res.body) throw new Error(`the event stream answered ${res.status}`);
        onState('live');
        await readFrames(res.body, (frame) => {
          if (frame.id !== null && /^\d+$/.test(frame.id)) last = Number(frame.id);
          let event;
          try {
            event = JSON.parse(frame.data);
          } catch {
            return;
          }
          onEvent(event);
        }, (ms) => { retryMs = ms; });
      } catch (err) {
        if (stopped) return;
        console.warn('event stream:', err && err.message ? err.message : err);
      }
      if (stopped) return;
      onState('retrying', retryMs);
      await sleep(retryMs);
    }
  }
  run();
  return () => {
    stopped = true;
    if (controller) controller.abort();
  };
}
