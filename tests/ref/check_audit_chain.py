"""The audit chain as stored by the SQLite store, read back independently.

A reader written from docs/audit-format.md alone, with Debian's Python
(sqlite3, hashlib.blake2b, PyNaCl's Ed25519), opens the database file the C
code wrote, re-encodes every record, recomputes the chain, verifies each
checkpoint's Ed25519 signature and compares everything with what was
stored. Also: the file is in WAL mode and passes SQLite's integrity check,
and PyNaCl's Ed25519 is standard Ed25519 (RFC 8032 section 7.1, TEST 1)."""
import hashlib
import math
import os
import sqlite3
import struct
import subprocess
import sys
import tempfile

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from lkref import check, finish, skip  # noqa: E402

try:
    import nacl.exceptions
    import nacl.signing
except ImportError:
    skip("PyNaCl (Debian package python3-nacl) is not installed")

BIN = os.environ.get("LIKENESS_BIN", "build/bin")
TOOL = os.path.join(BIN, "lkt_store_audit_fill")
if not os.path.exists(TOOL):
    skip(f"{TOOL} is not built")

# ---- RFC 8032 section 7.1, TEST 1 (empty message). Values as published in
# the RFC (recalled from memory, and cross-checked against several other
# projects' copies of the vector).
SEED = bytes.fromhex("9d61b19deffd5a60ba844af492ec2cc44449c5697b326919703bac031cae7f60")
PUB = bytes.fromhex("d75a980182b10ab7d54bfed3c964073a0ee172f3daa62325af021a68f707511a")
SIG = bytes.fromhex("e5564300c360ac729086e2cc806e828a84877f1eb8e5d974d873e065224901555fb8821590"
                    "a33bacc61e39701cf9b46bd25bf5f0595bbe24655141438e7a100b")
sk = nacl.signing.SigningKey(SEED)
check(bytes(sk.verify_key) == PUB, "RFC 8032 TEST 1: public key from the seed")
check(sk.sign(b"").signature == SIG, "RFC 8032 TEST 1: signature of the empty message")
try:
    nacl.signing.VerifyKey(PUB).verify(b"", SIG)
    check(True, "RFC 8032 TEST 1: signature verifies")
except nacl.exceptions.BadSignatureError:
    check(False, "RFC 8032 TEST 1: signature verifies")

# ---- the encoding of docs/audit-format.md, written from the document.


def tlv(tag, value):
    return bytes([tag]) + struct.pack(">I", len(value)) + value


def f64(x):
    if x is None or math.isnan(x):
        return bytes.fromhex("7ff8000000000000")
    if x == 0.0:
        x = 0.0  # negative zero encodes as positive zero
    return struct.pack(">d", x)


def canonical(row):
    (seq, time_ms, op, caller, request_id, template_id, decision, score, threshold,
     model_id, reasons, status) = row[:12]
    t = lambda s: s.encode("utf-8")  # noqa: E731
    return (b"\x01" + tlv(1, struct.pack(">Q", seq)) + tlv(2, struct.pack(">q", time_ms)) +
            tlv(3, struct.pack(">B", op)) + tlv(4, t(caller)) + tlv(5, t(request_id)) +
            tlv(6, t(template_id)) + tlv(7, t(decision)) + tlv(8, f64(score)) +
            tlv(9, f64(threshold)) + tlv(10, t(model_id)) + tlv(11, t(reasons)) +
            tlv(12, struct.pack(">i", status)))


# The worked example printed in docs/audit-format.md.
example = canonical((1, 1796205600123, 1, "", "", "", "", None, None, "", "", 0))
doc_hex = ("01" "01000000080000000000000001" "0200000008000001a236325d7b" "030000000101"
           "0400000000" "0500000000" "0600000000" "0700000000" "08000000087ff8000000000000"
           "09000000087ff8000000000000" "0a00000000" "0b00000000" "0c0000000400000000")
check(example.hex() == doc_hex, "the reader reproduces the document's example encoding")


def chain_hash(prev, enc):
    return hashlib.blake2b(b"likeness-audit-v1" + prev + enc, digest_size=32).digest()


with tempfile.TemporaryDirectory() as tmp:
    db = os.path.join(tmp, "store.db")
    keys = os.path.join(tmp, "keys")
    N, INTERVAL = 157, 25
    out = subprocess.run([TOOL, "fill", db, keys, str(N), str(INTERVAL)], capture_output=True,
                         text=True)
    check(out.returncode == 0, f"tool fills the store ({out.stderr.strip()})")
    if out.returncode != 0:
        sys.exit(finish())
    pub = bytes.fromhex(out.stdout.split()[1])
    dump = subprocess.run([TOOL, "canonical", db], capture_output=True, text=True, check=True)
    c_canon = {int(a): bytes.fromhex(b) for a, b in (ln.split() for ln in dump.stdout.splitlines())}

    con = sqlite3.connect(db)
    check(con.execute("PRAGMA journal_mode").fetchone()[0] == "wal", "journal_mode is wal")
    check(con.execute("PRAGMA integrity_check").fetchone()[0] == "ok", "integrity_check ok")
    check(con.execute("PRAGMA user_version").fetchone()[0] == 2, "schema version 2 (docs/store-schema.md)")

    rows = con.execute("SELECT seq, time_ms, operation, caller, request_id, template_id,"
                       " decision, score, threshold, model_id, reasons, status, prev_hash, hash"
                       " FROM audit_records ORDER BY seq").fetchall()
    check([r[0] for r in rows] == list(range(1, N + 1)), f"seqs 1..{N} without gaps")
    prev = bytes(32)
    bad_enc = bad_prev = bad_hash = 0
    hashes = {}
    for r in rows:
        enc = canonical(r)
        if enc != c_canon.get(r[0]):
            bad_enc += 1
            if bad_enc == 1:
                print(f"  seq {r[0]}: python {enc.hex()}\n  seq {r[0]}: C      "
                      f"{c_canon.get(r[0], b'').hex()}")
        if bytes(r[12]) != prev:
            bad_prev += 1
        h = chain_hash(prev, enc)
        if h != bytes(r[13]):
            bad_hash += 1
        hashes[r[0]] = h
        prev = h
    check(bad_enc == 0, f"canonical encoding of all {N} records equals lk_audit_canonical's")
    check(bad_prev == 0, "every prev_hash is the previous record's recomputed hash")
    check(bad_hash == 0, "every stored hash equals BLAKE2b-256 recomputed in Python")
    kinds = {
        "NaN score": any(r[7] is None for r in rows),
        "negative time": any(r[1] < 0 for r in rows),
        "non-ASCII text": any(any(ord(ch) > 127 for ch in r[3]) for r in rows),
        "255-byte text": any(len(r[4].encode()) == 255 for r in rows),
        "negative status": any(r[11] < 0 for r in rows),
        "zero threshold": any(r[8] == 0.0 for r in rows),
    }
    for k, v in kinds.items():
        check(v, f"the data exercises: {k}")

    cps = con.execute("SELECT seq, hash, public_key, signature FROM audit_checkpoints"
                      " ORDER BY seq").fetchall()
    want = [s for s in range(INTERVAL, N + 1, INTERVAL)] + ([N] if N % INTERVAL else [])
    check([c[0] for c in cps] == want, f"checkpoints at {want}")
    vk = nacl.signing.VerifyKey(pub)
    good = 0
    for seq, h, pk, sig in cps:
        msg = b"likeness-audit-checkpoint-v1" + struct.pack(">Q", seq) + bytes(h)
        ok = bytes(h) == hashes.get(seq) and bytes(pk) == pub
        try:
            vk.verify(msg, bytes(sig))
        except nacl.exceptions.BadSignatureError:
            ok = False
        good += ok
    check(good == len(cps) and good > 0,
          f"all {len(cps)} checkpoint signatures verify with PyNaCl over the documented message")
    # The same check must fail for a wrong message (the test can fail).
    seq, h, pk, sig = cps[0]
    try:
        vk.verify(b"likeness-audit-checkpoint-v1" + struct.pack(">Q", seq + 1) + bytes(h),
                  bytes(sig))
        check(False, "a signature does not verify for another seq")
    except nacl.exceptions.BadSignatureError:
        check(True, "a signature does not verify for another seq")
    con.close()

sys.exit(finish())
