"""`likeness keys` end to end, checked from outside: os.stat for the key
file's mode, Python's sqlite3 for what the store holds, hashlib.blake2b
(RFC 7693 keyed BLAKE2b) for API-key hashes, PyNaCl for the re-sealed
template records, the key file and the records read from docs/key-file.md
and docs/template-format.md (readers in check_crypto_template.py).

* init: mode 0600, JSON with the current key id, no key material printed,
  refuses an existing file.
* api-create: the token matches the documented form; the hash stored in
  the SQLite file equals hashlib.blake2b(token, key=<apikey-hash-key>,
  digest_size=32); api-list never shows hashes; api-revoke marks the key.
* rotate: the key file is left byte for byte as it was; the store gains a
  wrapped data key (the only current one), which is unwrapped here with
  PyNaCl from the key file's key following docs/key-file.md ("Data keys in
  the store"); templates sealed by lkt_crypto_seal and put in the store's
  table end up under the new data key and decrypt with PyNaCl, under the
  unwrapped key, to the same values; a record that cannot be opened is
  counted, left as it is and audited; an expired one is left alone; one
  key_rotation audit record is appended.
* rotate --master: the key file gains a new current key and keeps the old
  ones; every data key is wrapped again under the new one and unwraps here
  to the same bytes; a store whose wrapped key was altered is refused with
  the key's id named.
"""
import json
import os
import re
import secrets
import sqlite3
import stat
import struct
import subprocess
import sys
import tempfile

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from lkref import check, finish, skip  # noqa: E402

try:
    import nacl.bindings
    import nacl.exceptions
except ImportError:
    skip("PyNaCl is not installed (Debian package python3-nacl)")
import check_crypto_template as spec  # noqa: E402

BIN = os.environ.get("LIKENESS_BIN", "")
CLI = os.path.join(BIN, "likeness")
TOOL = os.path.join(BIN, "lkt_crypto_seal")
for p in (CLI, TOOL):
    if not os.path.exists(p):
        skip(f"{p} is not built (set LIKENESS_BIN)")

# Operation numbers of include/likeness/audit.h (lk_audit_op).
AUDIT_KEY_ROTATION, AUDIT_TEMPLATE_REFUSED = 4, 6


def likeness(*args, ok=True):
    env = dict(os.environ)
    env.pop("LIKENESS_CONFIG", None)
    r = subprocess.run([CLI, *args], capture_output=True, text=True, env=env)
    if ok and r.returncode != 0:
        raise SystemExit(f"likeness {' '.join(args)} failed ({r.returncode}): {r.stderr}")
    return r


def wrap_ad(key_id, kek_id):
    """Associated data of a wrapped data key, docs/key-file.md."""
    a, b = key_id.encode(), kek_id.encode()
    return b"likeness-key-wrap-v1" + bytes([len(a)]) + a + bytes([len(b)]) + b


def unwrap(key_id, kek_id, kek, wrapped):
    """nonce (24) || XChaCha20-Poly1305-IETF(key) || tag, by PyNaCl; None if it fails."""
    if len(wrapped) != 72:
        return None
    try:
        return nacl.bindings.crypto_aead_xchacha20poly1305_ietf_decrypt(
            wrapped[24:], wrap_ad(key_id, kek_id), wrapped[:24], kek)
    except nacl.exceptions.CryptoError:
        return None


def data_keys(db):
    con = sqlite3.connect(db)
    rows = {k: (kek, bytes(w), cur) for k, kek, w, cur in
            con.execute("SELECT key_id, kek_id, wrapped, is_current FROM template_keys")}
    con.close()
    return rows


def template_row(db, tid):
    con = sqlite3.connect(db)
    (kid, blob), = con.execute("SELECT key_id, record FROM templates WHERE template_id=?",
                               (tid,)).fetchall()
    con.close()
    return kid, bytes(blob)


def no_secret(outputs, secrets_hex, what):
    text = "".join(outputs).lower()
    check(not any(h in text for h in secrets_hex), f"{what}: no key material printed")


def main():
    with tempfile.TemporaryDirectory() as tmp:
        kf = os.path.join(tmp, "service.keys")
        db = os.path.join(tmp, "store.sqlite")
        svc = ["--store", db, "--key-file", kf]

        # ---- init ----
        r = likeness("keys", "init", "--key-file", kf)
        st = os.stat(kf)
        check(stat.S_ISREG(st.st_mode) and stat.S_IMODE(st.st_mode) == 0o600,
              f"init: key file mode {oct(stat.S_IMODE(st.st_mode))}")
        keys, current, api, seed = spec.read_keyfile(kf)
        out = json.loads(r.stdout)
        check(out == {"key_file": kf, "key_id": current}, f"init JSON {out}")
        all_hex = [k.hex() for k in keys.values()] + [api.hex(), seed.hex()]
        no_secret([r.stdout, r.stderr], all_hex, "init")
        before = open(kf, "rb").read()
        r = likeness("keys", "init", "--key-file", kf, ok=False)
        check(r.returncode == 1 and "exists" in r.stderr and open(kf, "rb").read() == before,
              "init refuses an existing key file and leaves it alone")
        r = likeness("keys", "init", "--help")
        check(r.returncode == 0 and "usage: likeness keys init" in r.stdout, "init --help")

        # ---- API keys ----
        tokens = {}
        for name, scopes in (("alice", "verify,enrol"), ("auditor", "audit"),
                             ("ops", "verify,enrol,delete,audit")):
            r = likeness("keys", "api-create", "--name", name, "--scopes", scopes, *svc)
            token = r.stdout.strip()
            check(re.fullmatch(r"lkk_[0-9a-f]{16}_[A-Za-z0-9_-]{43}", token) is not None,
                  f"api-create {name}: stdout is only the token")
            check("once" in r.stderr and token[4:20] in r.stderr and token not in r.stderr,
                  f"api-create {name}: id and a shown-once note on stderr, not the token")
            tokens[token[4:20]] = (token, name, scopes)
        r = likeness("keys", "api-create", "--name", "x", "--scopes", "verify,sudo", *svc, ok=False)
        check(r.returncode == 2 and "sudo" in r.stderr, "api-create refuses an unknown scope")
        con = sqlite3.connect(db)
        rows = con.execute("SELECT id, name, hash, revoked_ms FROM api_keys").fetchall()
        check(len(rows) == 3, f"{len(rows)} API keys stored")
        for kid, name, h, revoked in rows:
            token = tokens[kid][0]
            want = spec.hashlib.blake2b(token.encode(), key=api, digest_size=32).digest()
            check(bytes(h) == want and name == tokens[kid][1] and revoked == 0,
                  f"stored hash of {name} equals hashlib.blake2b(token, key=apikey-hash-key)")
        con.close()
        victim = next(k for k, v in tokens.items() if v[1] == "auditor")
        r = likeness("keys", "api-revoke", victim, *svc)
        check(json.loads(r.stdout)["id"] == victim, "api-revoke JSON")
        r = likeness("keys", "api-revoke", "0000000000000000", *svc, ok=False)
        check(r.returncode == 1, "api-revoke of an unknown id fails")
        r = likeness("keys", "api-list", *svc)
        listed = [json.loads(line) for line in r.stdout.splitlines()]
        check(len(listed) == 3 and all(set(k) == {"id", "name", "scopes", "created", "revoked"}
                                       for k in listed), f"api-list fields {listed[:1]}")
        for k in listed:
            check(sorted(k["scopes"]) == sorted(tokens[k["id"]][2].split(",")) and
                  (k["revoked"] is not None) == (k["id"] == victim) and
                  re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{3}Z", k["created"]),
                  f"api-list row {k['name']}")
        hashes = [spec.hashlib.blake2b(v[0].encode(), key=api, digest_size=32).hexdigest()
                  for v in tokens.values()]
        no_secret([r.stdout, r.stderr], hashes + [v[0] for v in tokens.values()], "api-list")

        # ---- rotate ----
        mid = secrets.token_hex(16)
        config = "crop=64x64;hog=8x8/9"
        rng = secrets.SystemRandom()
        templates = {}
        con = sqlite3.connect(db)
        for i in range(7):
            tid = secrets.token_hex(16)
            values = [rng.uniform(-1, 1) for _ in range(24)]
            vin, rp = os.path.join(tmp, "v.f64"), os.path.join(tmp, "r.lktr")
            open(vin, "wb").write(spec.bits(values))
            subprocess.run([TOOL, "seal", kf, tid, mid, config, vin, rp], check=True,
                           capture_output=True)
            templates[tid] = values
            con.execute("INSERT INTO templates(template_id, subject_ref, key_id, model_id, "
                        "created_ms, expires_ms, image_count, record) VALUES (?,?,?,?,?,?,?,?)",
                        (tid, f"s{i}", current, mid, 1, 0, 1, open(rp, "rb").read()))
        # One damaged record (last byte of the tag) and one expired template.
        bad_tid, old_tid = secrets.token_hex(16), secrets.token_hex(16)
        rec = bytearray(spec.write_record(current, keys[current], bad_tid, mid, config, [1.0]))
        rec[-1] ^= 1
        con.execute("INSERT INTO templates VALUES (?,?,?,?,?,?,?,?)",
                    (bad_tid, "", current, mid, 1, 0, 1, bytes(rec)))
        con.execute("INSERT INTO templates VALUES (?,?,?,?,?,?,?,?)",
                    (old_tid, "", current, mid, 1, 2, 1,
                     spec.write_record(current, keys[current], old_tid, mid, config, [2.0])))
        con.commit()
        con.close()

        kf_bytes = open(kf, "rb").read()
        r = likeness("keys", "rotate", *svc, "--batch", "3", ok=False)
        res = json.loads(r.stdout)
        check(open(kf, "rb").read() == kf_bytes, "rotate leaves the key file byte for byte")
        check(r.returncode == 1, f"rotate exits 1 when a record failed ({r.returncode})")
        dk1 = res["key_id"]
        check(re.fullmatch(r"d[0-9a-f]{16}", dk1) is not None and
              res["previous_key_id"] == current and res["kek_id"] == current,
              f"rotate JSON key ids {res}")
        check(res["resealed"] == 7 and res["failed"] == 1 and res["gone"] == 1 and
              res["failed_template_ids"] == [bad_tid], f"rotate counts {res}")
        check("pass 1" in r.stderr and bad_tid in r.stderr, "progress and the failure on stderr")
        rows = data_keys(db)
        check(list(rows) == [dk1] and rows[dk1][0] == current and rows[dk1][2] == 1,
              f"one data key in the store, wrapped under {current}, current")
        key1 = unwrap(dk1, current, keys[current], rows[dk1][1])
        check(key1 is not None and key1 not in keys.values(),
              "the data key unwraps with PyNaCl under the file's key (docs/key-file.md)")
        no_secret([r.stdout, r.stderr], [k.hex() for k in keys.values()] +
                  [key1.hex() if key1 else "-"], "rotate")

        con = sqlite3.connect(db)
        rows = {t: (k, bytes(b)) for t, k, b in
                con.execute("SELECT template_id, key_id, record FROM templates")}
        for tid, values in templates.items():
            kid, blob = rows[tid]
            h, got = spec.open_record(blob, key1)
            check(kid == dk1 and h["key_id"] == dk1 and h["template_id"] == tid and
                  h["model_id"] == mid and spec.bits(got) == spec.bits(values),
                  f"template {tid[:8]}: under the data key, decrypts with PyNaCl to the same "
                  "values")
        check(rows[bad_tid] == (current, bytes(rec)), "the damaged record is left as it was")
        check(rows[old_tid][0] == current, "the expired template is left alone")
        audit = con.execute("SELECT operation, caller, decision, template_id, reasons "
                            "FROM audit_records ORDER BY seq").fetchall()
        con.close()
        rot = [a for a in audit if a[0] == AUDIT_KEY_ROTATION]
        ref = [a for a in audit if a[0] == AUDIT_TEMPLATE_REFUSED]
        check(len(rot) == 1 and rot[0][1].startswith("cli:") and rot[0][2] == "ok" and
              rot[0][3] == "" and rot[0][4] == "", f"one key_rotation audit record {rot}")
        check(len(ref) == 1 and ref[0][3] == bad_tid and ref[0][4] == "template_invalid",
              f"template_refused audit record {ref}")

        # A second rotation: a second data key, the only current one; every
        # good record moves again, the damaged one stays; the file is untouched.
        r = likeness("keys", "rotate", *svc, ok=False)
        res2 = json.loads(r.stdout)
        dk2 = res2["key_id"]
        check(res2["resealed"] == 7 and res2["failed"] == 1 and res2["passes"] >= 1 and
              res2["previous_key_id"] == dk1 and dk2 != dk1, f"second rotation {res2}")
        check(open(kf, "rb").read() == kf_bytes, "second rotation leaves the key file as it was")
        rows = data_keys(db)
        check(sorted(rows) == sorted([dk1, dk2]) and rows[dk2][2] == 1 and rows[dk1][2] == 0,
              "two data keys, only the new one current")
        key2 = unwrap(dk2, current, keys[current], rows[dk2][1])
        check(key2 is not None and key2 != key1, "the second data key unwraps, a new key")
        for tid, values in templates.items():
            kid, blob = template_row(db, tid)
            h, got = spec.open_record(blob, key2)
            check(kid == dk2 and spec.bits(got) == spec.bits(values),
                  f"template {tid[:8]} after the second rotation")

        # --master: a new key-file key; every data key wrapped again under it.
        r = likeness("keys", "rotate", "--master", *svc, ok=False)
        res3 = json.loads(r.stdout)
        keys3, current3, api3, seed3 = spec.read_keyfile(kf)
        check(current3 != current and res3.get("master_key_id") == current3 and
              res3.get("rewrapped") == 2 and res3["key_id"] == dk2 and
              res3["kek_id"] == current3 and res3["failed"] == 1,
              f"rotate --master JSON {res3}")
        check(all(keys3.get(k) == v for k, v in keys.items()) and api3 == api and seed3 == seed,
              "rotate --master keeps every earlier key of the file")
        rows = data_keys(db)
        check(all(rows[k][0] == current3 for k in (dk1, dk2)) and rows[dk2][2] == 1,
              f"both data keys now wrapped under {current3}")
        check(unwrap(dk1, current3, keys3[current3], rows[dk1][1]) == key1 and
              unwrap(dk2, current3, keys3[current3], rows[dk2][1]) == key2 and
              unwrap(dk2, current, keys[current], rows[dk2][1]) is None,
              "re-wrapped data keys unwrap to the same bytes, only under the new file key")
        for tid, values in templates.items():
            kid, blob = template_row(db, tid)
            check(kid == dk2 and spec.bits(spec.open_record(blob, key2)[1]) == spec.bits(values),
                  f"template {tid[:8]} still under the current data key after --master")
        check("--master" in likeness("keys", "rotate", "--help").stdout, "rotate --help")

        # An altered wrapping is refused, naming the data key.
        con = sqlite3.connect(db)
        w = bytearray(rows[dk1][1])
        w[30] ^= 0x40
        con.execute("UPDATE template_keys SET wrapped = ? WHERE key_id = ?", (bytes(w), dk1))
        con.commit()
        con.close()
        r = likeness("keys", "rotate", *svc, ok=False)
        check(r.returncode == 1 and dk1 in r.stderr and "authentication" in r.stderr and
              len(data_keys(db)) == 2, f"altered wrapped key refused: {r.stderr.strip()}")

        r = likeness("keys", "rotate", "--batch", "0", *svc, ok=False)
        check(r.returncode == 2, "--batch 0 refused")
    return finish()


sys.exit(main())
