"""The PostgreSQL store, against a throwaway PostgreSQL 15 server
(tests/pg/pg-test-server.sh) on a free loopback port:

1. the store's C test suite (test_store_sqlite with LIKENESS_TEST_STORE_URL)
   runs against it;
2. two processes append 500 audit records each to one fresh database at
   once (they also migrate it at once), and `likeness audit verify` passes;
3. an independent reader, psql (PostgreSQL's own client) and Python's
   hashlib and PyNaCl, written from docs/audit-format.md, re-encodes every
   row, recomputes the chain and checks every checkpoint's signature;
   column types and the server's durability settings are as
   docs/store-schema.md says;
4. the server goes away while a store is open: calls fail with
   LK_ERR_STORE (store), the process does not crash, and once the server is
   back the same handle works again.

The PostgreSQL server binaries are required: without them this check fails
(it does not skip), saying what to install."""
import hashlib
import json
import math
import os
import re
import shutil
import socket
import struct
import subprocess
import sys
import tempfile

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from lkref import check, finish, skip  # noqa: E402

PGBIN = "/usr/lib/postgresql/15/bin"
missing = [t for t in ("initdb", "pg_ctl", "postgres", "psql")
           if not os.access(os.path.join(PGBIN, t), os.X_OK)]
if missing:
    print(f"FAIL: {', '.join(missing)} not found in {PGBIN}: install the PostgreSQL 15 server "
          "and client (apt-get install postgresql-15 postgresql-client-15, or run "
          "deploy/install-deps.sh)", file=sys.stderr)
    sys.exit(1)
PSQL = os.path.join(PGBIN, "psql")

try:
    import nacl.exceptions
    import nacl.signing
except ImportError:
    skip("PyNaCl (Debian package python3-nacl) is not installed")

SRC = os.environ.get("LIKENESS_SOURCE", os.path.join(os.path.dirname(__file__), "..", ".."))
BIN = os.environ.get("LIKENESS_BIN", "build/bin")
SERVER = os.path.join(SRC, "tests", "pg", "pg-test-server.sh")
UNIT = os.path.join(BIN, "test_store_sqlite")
TOOL = os.path.join(BIN, "lkt_store_audit_fill")
CLI = os.path.join(BIN, "likeness")
for p in (UNIT, TOOL, CLI):
    if not os.path.exists(p):
        skip(f"{p} is not built")

# ---- docs/audit-format.md, written from the document ----


def tlv(tag, value):
    return bytes([tag]) + struct.pack(">I", len(value)) + value


def f64(x):
    if x is None or math.isnan(x):
        return bytes.fromhex("7ff8000000000000")
    if x == 0.0:
        x = 0.0  # negative zero encodes as positive zero
    return struct.pack(">d", x)


def canonical(seq, time_ms, op, caller, request_id, template_id, decision, score, threshold,
              model_id, reasons, status):
    return (b"\x01" + tlv(1, struct.pack(">Q", seq)) + tlv(2, struct.pack(">q", time_ms)) +
            tlv(3, struct.pack(">B", op)) + tlv(4, caller) + tlv(5, request_id) +
            tlv(6, template_id) + tlv(7, decision) + tlv(8, f64(score)) +
            tlv(9, f64(threshold)) + tlv(10, model_id) + tlv(11, reasons) +
            tlv(12, struct.pack(">i", status)))


def chain_hash(prev, enc):
    return hashlib.blake2b(b"likeness-audit-v1" + prev + enc, digest_size=32).digest()


# The worked example printed in docs/audit-format.md.
example = canonical(1, 1796205600123, 1, b"", b"", b"", b"", None, None, b"", b"", 0)
check(example.hex() == "01" "01000000080000000000000001" "0200000008000001a236325d7b"
      "030000000101" "0400000000" "0500000000" "0600000000" "0700000000"
      "08000000087ff8000000000000" "09000000087ff8000000000000" "0a00000000" "0b00000000"
      "0c0000000400000000", "the reader reproduces the document's example encoding")

# ---- the advisory lock key: "LKNSAUDT" as a big-endian int64, in code and docs ----
key = int.from_bytes(b"LKNSAUDT", "big")
with open(os.path.join(SRC, "docs", "store-schema.md"), encoding="utf-8") as f:
    doc = f.read()
with open(os.path.join(SRC, "src", "store", "postgres.c"), encoding="utf-8") as f:
    code = f.read()
check(str(key) in doc and f"0x{key:016x}" in doc,
      f"docs/store-schema.md gives the audit lock key {key} (0x{key:016x})")
check(f"0x{key:016x}" in code and str(key) in code, "src/store/postgres.c uses that key")


def free_port():
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def psql(url, sql):
    out = subprocess.run([PSQL, "-X", "-q", "-A", "-t", "-F", "|", "-v", "ON_ERROR_STOP=1",
                          "-d", url, "-c", sql], capture_output=True, text=True)
    if out.returncode != 0:
        raise RuntimeError(f"psql: {sql}: {out.stderr.strip()}")
    return [ln.split("|") for ln in out.stdout.splitlines() if ln]


def with_db(url, name):
    return url.rsplit("/", 1)[0] + "/" + name


base = tempfile.mkdtemp(prefix="lk_pg_")
os.chmod(base, 0o711)  # the server runs as the postgres user and must reach data/
data = os.path.join(base, "data")
env = dict(os.environ)
env.pop("LIKENESS_CONFIG", None)
env.pop("LIKENESS_STORE_URL", None)
started = False
try:
    port = free_port()
    out = subprocess.run(["bash", SERVER, "start", data, str(port)], capture_output=True,
                         text=True)
    if out.returncode != 0:
        print(out.stderr, file=sys.stderr)
    check(out.returncode == 0, f"pg-test-server.sh starts a server on 127.0.0.1:{port}")
    if out.returncode != 0:
        sys.exit(finish())
    started = True
    url = out.stdout.strip().splitlines()[-1]
    check(url == f"postgres://postgres@127.0.0.1:{port}/likeness_test", f"its URL: {url}")
    again = subprocess.run(["bash", SERVER, "start", data, str(port)], capture_output=True,
                           text=True)
    check(again.returncode == 0 and again.stdout.strip() == url, "start again: idempotent")
    check(psql(url, "SHOW fsync") == [["on"]] and psql(url, "SHOW synchronous_commit") ==
          [["on"]], "the test server has fsync and synchronous_commit on")
    check(psql(url, "SHOW listen_addresses") == [["127.0.0.1"]], "it listens on loopback only")

    # ---- 1. the C suite ----
    unit = subprocess.run([UNIT], capture_output=True, text=True,
                          env=dict(env, LIKENESS_TEST_STORE_URL=url))
    tail = (unit.stdout + unit.stderr).strip().splitlines()[-3:]
    check(unit.returncode == 0 and "PostgreSQL" in unit.stdout and " 0 failed" in unit.stdout,
          f"the store's C test suite passes on PostgreSQL: {' / '.join(tail)}")
    if unit.returncode != 0:
        print(unit.stderr[-4000:], file=sys.stderr)

    # ---- 2. two processes, one chain ----
    psql(url, "CREATE DATABASE likeness_fill")
    furl = with_db(url, "likeness_fill")
    keys = os.path.join(base, "keys")
    subprocess.run([TOOL, "keygen", keys], check=True)
    N, INTERVAL = 500, 50
    procs = [subprocess.Popen([TOOL, "fill", furl, keys, str(N), str(INTERVAL)],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for _ in range(2)]
    results = [p.communicate(timeout=600) for p in procs]
    for i, (p, (o, e)) in enumerate(zip(procs, results)):
        check(p.returncode == 0, f"process {i + 1} appended {N} records ({e.strip()[:300]})")
    pub = bytes.fromhex(results[0][0].split()[1])

    verify = subprocess.run([CLI, "audit", "verify", "--store", furl, "--key-file", keys],
                            capture_output=True, text=True, env=env)
    try:
        rep = json.loads(verify.stdout)
    except ValueError:
        rep = {}
    check(verify.returncode == 0 and rep.get("ok") is True and rep.get("records") == 2 * N,
          f"likeness audit verify --store {furl} passes with {2 * N} records "
          f"({verify.stdout.strip()[:200]} {verify.stderr.strip()[:300]})")

    # ---- 3. independent reading with psql ----
    types = {(t, c): d for t, c, d in psql(furl, "SELECT table_name, column_name, data_type"
                                                  " FROM information_schema.columns"
                                                  " WHERE table_schema = 'public'")}
    want = {("audit_records", "seq"): "bigint", ("audit_records", "time_ms"): "bigint",
            ("audit_records", "score"): "double precision",
            ("audit_records", "threshold"): "double precision",
            ("audit_records", "hash"): "bytea", ("audit_records", "prev_hash"): "bytea",
            ("audit_checkpoints", "signature"): "bytea", ("templates", "record"): "bytea",
            ("templates", "expires_ms"): "bigint", ("api_keys", "hash"): "bytea",
            ("likeness_schema", "version"): "integer",
            ("template_keys", "key_id"): "text", ("template_keys", "kek_id"): "text",
            ("template_keys", "wrapped"): "bytea", ("template_keys", "created_ms"): "bigint",
            ("template_keys", "is_current"): "boolean"}
    bad = {k: (types.get(k), v) for k, v in want.items() if types.get(k) != v}
    check(not bad, f"column types as documented {bad or ''}")
    check(psql(furl, "SELECT application, version FROM likeness_schema") ==
          [["likeness", "2"]], "likeness_schema: application likeness, version 2")

    hx = "encode(convert_to({}, 'UTF8'), 'hex')"
    f8 = "coalesce(encode(float8send({}), 'hex'), '')"
    rows = psql(furl, "SELECT seq, time_ms, operation, " +
                ", ".join(hx.format(c) for c in ("caller", "request_id", "template_id",
                                                 "decision", "model_id", "reasons")) +
                ", " + f8.format("score") + ", " + f8.format("threshold") +
                ", status, encode(prev_hash, 'hex'), encode(hash, 'hex')"
                " FROM audit_records ORDER BY seq")
    check([int(r[0]) for r in rows] == list(range(1, 2 * N + 1)),
          f"seqs 1..{2 * N} without gaps or duplicates")
    dump = subprocess.run([TOOL, "canonical", furl], capture_output=True, text=True, check=True)
    c_canon = {int(a): bytes.fromhex(b) for a, b in (ln.split() for ln in dump.stdout.splitlines())}

    def num(h):
        return None if h == "" else struct.unpack(">d", bytes.fromhex(h))[0]

    prev = bytes(32)
    bad_enc = bad_prev = bad_hash = 0
    hashes = {}
    for r in rows:
        seq, t, op = int(r[0]), int(r[1]), int(r[2])
        caller, req, tid, dec, model, reasons = (bytes.fromhex(x) for x in r[3:9])
        enc = canonical(seq, t, op, caller, req, tid, dec, num(r[9]), num(r[10]), model,
                        reasons, int(r[11]))
        bad_enc += enc != c_canon.get(seq)
        bad_prev += bytes.fromhex(r[12]) != prev
        h = chain_hash(prev, enc)
        bad_hash += h != bytes.fromhex(r[13])
        hashes[seq] = h
        prev = h
    check(bad_enc == 0, f"canonical encoding of all {len(rows)} rows equals lk_audit_canonical's")
    check(bad_prev == 0, "every prev_hash is the previous row's recomputed hash")
    check(bad_hash == 0, "every stored hash equals BLAKE2b-256 recomputed with hashlib")
    check(any(r[9] == "" for r in rows) and any(r[1].startswith("-") for r in rows) and
          any(len(bytes.fromhex(r[4])) == 255 for r in rows) and
          any(any(b > 127 for b in bytes.fromhex(r[3])) for r in rows),
          "the rows include NULL (NaN) scores, negative times, 255-byte and UTF-8 texts")

    cps = psql(furl, "SELECT seq, encode(hash, 'hex'), encode(public_key, 'hex'),"
                     " encode(signature, 'hex') FROM audit_checkpoints ORDER BY seq")
    cp_seqs = [int(c[0]) for c in cps]
    multiples = list(range(INTERVAL, 2 * N + 1, INTERVAL))
    check(set(multiples) <= set(cp_seqs) and len(cp_seqs) <= len(multiples) + 2,
          f"checkpoints at every multiple of {INTERVAL} (and the heads): {cp_seqs}")
    vk = nacl.signing.VerifyKey(pub)
    good = 0
    for seq, h, pk, sig in cps:
        seq, h = int(seq), bytes.fromhex(h)
        ok = h == hashes.get(seq) and bytes.fromhex(pk) == pub
        try:
            vk.verify(b"likeness-audit-checkpoint-v1" + struct.pack(">Q", seq) + h,
                      bytes.fromhex(sig))
        except nacl.exceptions.BadSignatureError:
            ok = False
        good += ok
    check(good == len(cps) > 0, f"all {len(cps)} checkpoint signatures verify with PyNaCl")

    # A tampered row must be found by both readers (the checks can fail).
    psql(furl, "UPDATE audit_records SET status = status + 1 WHERE seq = 321")
    verify = subprocess.run([CLI, "audit", "verify", "--store", furl, "--key-file", keys],
                            capture_output=True, text=True, env=env)
    try:
        rep = json.loads(verify.stdout)
    except ValueError:
        rep = {}
    check(verify.returncode != 0 and rep.get("first_bad_seq") == 321,
          f"a row edited with psql is found at seq 321 ({verify.stdout.strip()[:200]})")
    psql(furl, "UPDATE audit_records SET status = status - 1 WHERE seq = 321")

    # ---- 4. the server goes away and comes back ----
    od = subprocess.Popen([TOOL, "outage", furl, keys], stdin=subprocess.PIPE,
                          stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)

    def ask(cmd):
        od.stdin.write(cmd + "\n")
        od.stdin.flush()
        return od.stdout.readline().strip()

    check(od.stdout.readline().strip() == "up", "a store is open")
    check(ask("append") == "ok", "append while the server is up")
    subprocess.run(["bash", SERVER, "pause", data], check=True)
    down = [ask("ping"), ask("append")]
    check(all(a.startswith("error store_error ") and ("unreachable" in a or "lost" in a)
              for a in down), f"with the server down, calls answer LK_ERR_STORE: {down}")
    subprocess.run(["bash", SERVER, "resume", data], check=True)
    up = [ask("ping"), ask("append")]
    check(up == ["ok", "ok"], f"the same handle reconnects once the server is back: {up}")
    od.stdin.close()
    rc = od.wait(timeout=60)
    err_text = od.stderr.read()
    check(rc == 0, f"the process ran to its end (exit {rc}) {err_text[-500:]}")
    verify = subprocess.run([CLI, "audit", "verify", "--store", furl, "--key-file", keys],
                            capture_output=True, text=True, env=env)
    rep = json.loads(verify.stdout) if verify.stdout.strip().startswith("{") else {}
    check(verify.returncode == 0 and rep.get("records") == 2 * N + 2,
          f"the chain still verifies with {2 * N + 2} records after the outage")

    # With the server stopped for good, the command line fails cleanly.
    subprocess.run(["bash", SERVER, "pause", data], check=True)
    verify = subprocess.run([CLI, "audit", "verify", "--store", furl, "--key-file", keys],
                            capture_output=True, text=True, env=env)
    check(verify.returncode > 0 and re.search(r"unreachable", verify.stderr) is not None,
          f"likeness audit verify with the server down: exit {verify.returncode}, "
          f"{verify.stderr.strip()[:300]}")
finally:
    if started:
        stop = subprocess.run(["bash", SERVER, "stop", data], capture_output=True, text=True)
        check(stop.returncode == 0 and not os.path.exists(data),
              f"pg-test-server.sh stop removes the cluster {stop.stderr.strip()}")
    shutil.rmtree(base, ignore_errors=True)

sys.exit(finish())
