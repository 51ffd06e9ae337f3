#!/usr/bin/env node
// Validates JSON bodies against the schemas of api-spec/openapi.yaml.
//
// stdin: JSON Lines, each {"schema": "<components/schemas name>", "body": <any>}
//        (an optional "label" is echoed back).
// stdout: one JSON line per input line, in order:
//        {"index": i, "label": ..., "schema": ..., "valid": bool, "errors": [...]}
// exit: 0 if every body is valid, 1 if any is not (or a line is unreadable or
//       names an unknown schema), 2 if the specification cannot be compiled.
//
// Options: --spec FILE (default ../../api-spec/openapi.yaml beside this file),
//          --list (print the schema names, one a line, and exit).
//
// The schemas are JSON Schema 2020-12 (OpenAPI 3.1), checked with Ajv's
// 2020-12 validator and ajv-formats; every components/schemas entry is
// compiled up front, so a broken schema fails even when no body uses it.
import { readFileSync } from 'node:fs';
import { createInterface } from 'node:readline';
import { dirname, resolve } from 'node:path';
import { fileURLToPath } from 'node:url';
import Ajv2020 from 'ajv/dist/2020.js';
import addFormats from 'ajv-formats';
import YAML from 'yaml';

const here = dirname(fileURLToPath(import.meta.url));
let specPath = resolve(here, '../../api-spec/openapi.yaml');
let listOnly = false;
const argv = process.argv.slice(2);
for (let i = 0; i < argv.length; i++) {
  if (argv[i] === '--spec' && i + 1 < argv.length) specPath = resolve(argv[++i]);
  else if (argv[i] === '--list') listOnly = true;
  else {
    process.stderr.write(`validate.mjs: unknown argument '${argv[i]}'; usage: validate.mjs [--spec FILE] [--list] < lines.jsonl\n`);
    process.exit(2);
  }
}

const BASE = 'urn:likeness:openapi';
const PREFIX = '#/components/schemas/';

// OpenAPI refers to schemas as '#/components/schemas/X'; inside one schema
// resource with $id BASE those become BASE#/$defs/X.
function rewriteRefs(node) {
  if (Array.isArray(node)) return node.map(rewriteRefs);
  if (node && typeof node === 'object') {
    const out = {};
    for (const [k, v] of Object.entries(node)) {
      if (k === '$ref' && typeof v === 'string') {
        if (!v.startsWith(PREFIX)) throw new Error(`unsupported $ref '${v}' (only ${PREFIX}NAME)`);
        out[k] = `${BASE}#/$defs/${v.slice(PREFIX.length)}`;
      } else {
        out[k] = rewriteRefs(v);
      }
    }
    return out;
  }
  return node;
}

let validators;
try {
  const doc = YAML.parse(readFileSync(specPath, 'utf8'));
  const schemas = doc?.components?.schemas;
  if (!schemas || typeof schemas !== 'object') throw new Error(`${specPath} has no components/schemas`);
  if (listOnly) {
    for (const name of Object.keys(schemas)) process.stdout.write(name + '\n');
    process.exit(0);
  }
  // strictTypes off: allOf-composed problem schemas list properties without
  // repeating `type: object`; strictRequired off: `oneOf` branches that only
  // say which member is required. Both are valid JSON Schema.
  const ajv = new Ajv2020({ allErrors: true, strict: true, strictTypes: false, strictRequired: false, allowUnionTypes: true });
  addFormats(ajv);
  ajv.addSchema({ $id: BASE, $defs: rewriteRefs(schemas) });
  validators = new Map();
  for (const name of Object.keys(schemas)) {
    validators.set(name, ajv.compile({ $ref: `${BASE}#/$defs/${name}` }));
  }
} catch (e) {
  process.stderr.write(`validate.mjs: cannot compile the schemas of ${specPath}: ${e.message}\n`);
  process.exit(2);
}

let failed = 0;
let index = 0;
const rl = createInterface({ input: process.stdin, crlfDelay: Infinity });
for await (const line of rl) {
  if (line.trim() === '') continue;
  const result = { index, label: null, schema: null, valid: false, errors: [] };
  index++;
  let item;
  try {
    item = JSON.parse(line);
  } catch (e) {
    result.errors.push({ message: `input line is not JSON: ${e.message}` });
  }
  if (item !== undefined) {
    result.label = item.label ?? null;
    result.schema = item.schema ?? null;
    const v = validators.get(item.schema);
    if (!v) {
      result.errors.push({ message: `no schema named '${item.schema}' in components/schemas` });
    } else if (!('body' in item)) {
      result.errors.push({ message: 'input line has no "body"' });
    } else if (v(item.body)) {
      result.valid = true;
    } else {
      result.errors = v.errors.map((e) => ({
        path: e.instancePath || '/',
        keyword: e.keyword,
        message: e.message,
        params: e.params,
        schemaPath: e.schemaPath,
      }));
    }
  }
  if (!result.valid) failed++;
  process.stdout.write(JSON.stringify(result) + '\n');
}
process.exit(failed ? 1 : 0);
