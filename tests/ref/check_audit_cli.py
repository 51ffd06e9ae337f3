"""`likeness audit verify` and `likeness audit export` against a store whose
SQLite file is tampered with directly through Python's sqlite3 (an outside
writer, as an attacker with file access would be). Each tampering must make
verify exit 1 and name the right first bad seq; export lines must parse as
JSON and equal the rows as Python reads them (times formatted with Python's
datetime, RFC 3339)."""
import datetime
import json
import math
import os
import shutil
import sqlite3
import subprocess
import sys
import tempfile

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from lkref import check, finish, skip  # noqa: E402

BIN = os.environ.get("LIKENESS_BIN", "build/bin")
TOOL = os.path.join(BIN, "lkt_store_audit_fill")
CLI = os.path.join(BIN, "likeness")
for p in (TOOL, CLI):
    if not os.path.exists(p):
        skip(f"{p} is not built")

N, INTERVAL = 45, 10  # checkpoints at 10, 20, 30, 40 and the head, 45
OPS = {1: "verification", 2: "enrolment", 3: "deletion", 4: "key_rotation",
       5: "authentication_failure", 6: "template_refused", 7: "purge"}  # docs/audit-format.md

tmp = tempfile.mkdtemp(prefix="lk_audit_cli_")
env = dict(os.environ)
env.pop("LIKENESS_CONFIG", None)
try:
    db = os.path.join(tmp, "store.db")
    keys = os.path.join(tmp, "keys")
    r = subprocess.run([TOOL, "fill", db, keys, str(N), str(INTERVAL)], capture_output=True,
                       text=True)
    if r.returncode != 0:
        check(False, f"tool fills the store: {r.stderr}")
        sys.exit(finish())
    pub = r.stdout.split()[1]

    def verify(path, *extra):
        args = [CLI, "audit", "verify", "--store", "sqlite:" + path]
        args += list(extra) if extra else ["--key-file", keys]
        p = subprocess.run(args, capture_output=True, text=True, env=env)
        try:
            rep = json.loads(p.stdout)
        except ValueError:
            rep = None
        return p.returncode, rep, p.stderr

    rc, rep, err = verify(db)
    check(rc == 0 and rep and rep["ok"] and rep["records"] == N and rep["checkpoints"] == 5
          and rep["first_bad_seq"] is None, f"intact store verifies with the key file ({err.strip()})")
    rc, rep, err = verify(db, "--public-key", pub)
    check(rc == 0 and rep and rep["ok"], "intact store verifies with --public-key only")
    other = ("00" if pub[:2] != "00" else "11") + pub[2:]
    rc, rep, err = verify(db, "--public-key", other)
    check(rc == 1 and rep and not rep["ok"] and rep["first_bad_seq"] == 10,
          "another public key: the first checkpoint (10) is refused")
    rc, rep, err = verify(db, "--public-key", "abc")
    check(rc == 2, "a malformed public key is a usage error")

    cols = ["time_ms", "operation", "caller", "request_id", "template_id", "decision", "score",
            "threshold", "model_id", "reasons", "status", "prev_hash", "hash"]

    def swap(con, a, b):
        ra = con.execute(f"SELECT {', '.join(cols)} FROM audit_records WHERE seq = ?",
                         (a,)).fetchone()
        rb = con.execute(f"SELECT {', '.join(cols)} FROM audit_records WHERE seq = ?",
                         (b,)).fetchone()
        sets = ", ".join(f"{c} = ?" for c in cols)
        con.execute(f"UPDATE audit_records SET {sets} WHERE seq = ?", (*rb, a))
        con.execute(f"UPDATE audit_records SET {sets} WHERE seq = ?", (*ra, b))

    cases = [
        ("UPDATE a field of record 17",
         lambda c: c.execute("UPDATE audit_records SET caller = 'someone-else' WHERE seq = 17"),
         17),
        ("UPDATE the score of record 8",
         lambda c: c.execute("UPDATE audit_records SET score = 0.99 WHERE seq = 8"), 8),
        ("DELETE record 23", lambda c: c.execute("DELETE FROM audit_records WHERE seq = 23"), 23),
        ("swap the contents of records 31 and 32", lambda c: swap(c, 31, 32), 31),
        ("delete the tail from record 38",
         lambda c: c.execute("DELETE FROM audit_records WHERE seq >= 38"), 38),
        ("forge the signature of checkpoint 20",
         lambda c: c.execute("UPDATE audit_checkpoints SET signature ="
                             " zeroblob(64) WHERE seq = 20"), 20),
    ]
    for i, (what, tamper, want) in enumerate(cases):
        path = os.path.join(tmp, f"tampered{i}.db")
        src = sqlite3.connect(db)
        dst = sqlite3.connect(path)
        src.backup(dst)
        src.close()
        tamper(dst)
        dst.commit()
        dst.close()
        rc, rep, err = verify(path)
        check(rc == 1 and rep is not None and not rep["ok"] and rep["first_bad_seq"] == want
              and f"seq {want}" in err,
              f"{what}: exit 1, first bad seq {want} "
              f"(got exit {rc}, {rep and rep['first_bad_seq']}; stderr: {err.strip()})")

    # ---- export
    con = sqlite3.connect(db)
    rows = con.execute("SELECT seq, time_ms, operation, caller, request_id, template_id,"
                       " decision, score, threshold, model_id, reasons, status, prev_hash, hash"
                       " FROM audit_records ORDER BY seq").fetchall()
    con.close()

    def expected(row):
        (seq, ms, op, caller, req, tid, dec, score, thr, model, reasons, status, prev, h) = row
        s, milli = divmod(ms, 1000)
        t = datetime.datetime(1970, 1, 1, tzinfo=datetime.timezone.utc) + \
            datetime.timedelta(seconds=s)
        num = lambda x: None if x is None or not math.isfinite(x) else x  # noqa: E731
        return {"seq": seq, "time": t.strftime("%Y-%m-%dT%H:%M:%S") + f".{milli:03d}Z",
                "operation": OPS[op], "caller": caller, "request_id": req, "template_id": tid,
                "decision": dec, "score": num(score), "threshold": num(thr), "model_id": model,
                "reasons": reasons.split(",") if reasons else [], "status": status,
                "prev_hash": bytes(prev).hex(), "hash": bytes(h).hex()}

    p = subprocess.run([CLI, "audit", "export", "--store", db], capture_output=True, text=True,
                       env=env)
    lines = p.stdout.splitlines()
    check(p.returncode == 0 and len(lines) == N, f"export writes {N} lines ({p.stderr.strip()})")
    parsed, bad = [], 0
    for ln in lines:
        try:
            parsed.append(json.loads(ln))
        except ValueError:
            bad += 1
    check(bad == 0, "every export line is a JSON object")
    mism = [e["seq"] for e, row in zip(parsed, rows) if e != expected(row)]
    if mism:
        k = mism[0] - 1
        print("  export:  ", parsed[k], "\n  expected:", expected(rows[k]))
    check(not mism and len(parsed) == len(rows), f"export equals the rows (mismatches: {mism[:5]})")

    outf = os.path.join(tmp, "part.jsonl")
    p = subprocess.run([CLI, "audit", "export", "--store", db, "--after", "40", "--limit", "3",
                        "-o", outf], capture_output=True, text=True, env=env)
    with open(outf) as f:
        seqs = [json.loads(ln)["seq"] for ln in f]
    check(p.returncode == 0 and seqs == [41, 42, 43], f"--after 40 --limit 3 -o FILE: {seqs}")
    p = subprocess.run([CLI, "audit", "export", "--store", db, "--limit", "x"],
                       capture_output=True, text=True, env=env)
    check(p.returncode == 2, "a malformed --limit is a usage error")
finally:
    shutil.rmtree(tmp, ignore_errors=True)

sys.exit(finish())
