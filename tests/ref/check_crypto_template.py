"""Template records, key file, API-key hashes and audit signatures against
outside references, with readers written from docs/template-format.md and
docs/key-file.md alone.

* XChaCha20-Poly1305: the published vector of draft-irtf-cfrg-xchacha-03
  Appendix A.3.1 through PyNaCl (libsodium's Python binding) and through the
  C tool's direct libsodium call (the same call, argument order and
  constants as src/crypto/template.c).
* Records written by the C library are parsed here from the spec, their
  header checked (BLAKE2b-256 of the configuration by hashlib) and decrypted
  with nacl.bindings.crypto_aead_xchacha20poly1305_ietf_decrypt using the
  key read from the key file; the values must be bit-identical.
* Records written here from the spec (PyNaCl) must open in C, and a few
  damaged ones must be refused with the documented codes.
* API-key hashes: hashlib.blake2b(token, key=..., digest_size=32) (RFC 7693
  keyed BLAKE2b, CPython's own implementation).
* Audit signatures: nacl.signing.VerifyKey (Ed25519, RFC 8032), public key
  derived here from the seed in the key file by nacl.signing.SigningKey.
* Rotation: the re-sealed record names the new key and decrypts here with it.
"""
import hashlib
import os
import re
import secrets
import stat
import struct
import subprocess
import sys
import tempfile

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from lkref import check, finish, skip  # noqa: E402

try:
    import nacl.bindings as nb
    import nacl.exceptions
    import nacl.signing
except ImportError:
    skip("PyNaCl is not installed (Debian package python3-nacl)")

BIN = os.environ.get("LIKENESS_BIN", "")
TOOL = os.path.join(BIN, "lkt_crypto_seal")


def run(*args, ok=True):
    r = subprocess.run([TOOL, *args], capture_output=True, text=True)
    if ok and r.returncode != 0:
        raise SystemExit(f"{TOOL} {' '.join(args)} failed: {r.stderr}")
    return r


# ---- independent readers, from the docs ----

def read_keyfile(path):
    """docs/key-file.md: returns (template keys {id: bytes}, current id,
    apikey hash key, audit seed)."""
    lines = open(path, encoding="ascii").read().split("\n")
    assert lines[0] == "likeness-keys 1", lines[0]
    keys, current, api, seed = {}, None, None, None
    for line in lines[1:]:
        f = line.split()
        if not f or f[0].startswith("#"):
            continue
        if f[0] == "template-key":
            assert len(f) in (3, 4) and re.fullmatch(r"[a-z0-9_-]{1,31}", f[1]) and f[1] not in keys
            keys[f[1]] = bytes.fromhex(f[2])
            assert len(keys[f[1]]) == 32
            if len(f) == 4:
                assert f[3] == "current" and current is None
                current = f[1]
        elif f[0] == "apikey-hash-key":
            assert len(f) == 2 and api is None
            api = bytes.fromhex(f[1])
        elif f[0] == "audit-signing-seed":
            assert len(f) == 2 and seed is None
            seed = bytes.fromhex(f[1])
        else:
            raise AssertionError(f"unknown line {line!r}")
    assert current and len(api) == 32 and len(seed) == 32
    return keys, current, api, seed


def parse_record(rec):
    """docs/template-format.md, Layout."""
    assert rec[:4] == b"LKTR"
    (version,) = struct.unpack_from("<H", rec, 4)
    n = rec[6]
    assert version == 1 and 1 <= n <= 31
    kid = rec[7:7 + n].decode("ascii")
    o = 7 + n
    h = {"version": version, "key_id": kid,
         "template_id": rec[o:o + 32].decode("ascii"),
         "model_id": rec[o + 32:o + 64].decode("ascii"),
         "digest": rec[o + 64:o + 96]}
    (h["dim"],) = struct.unpack_from("<I", rec, o + 96)
    h["nonce"] = rec[o + 100:o + 124]
    h["header"] = rec[:o + 124]
    h["ct"] = rec[o + 124:]
    assert len(rec) == 131 + n + 8 * h["dim"] + 16, (len(rec), n, h["dim"])
    return h


def open_record(rec, key):
    h = parse_record(rec)
    pt = nb.crypto_aead_xchacha20poly1305_ietf_decrypt(h["ct"], h["header"], h["nonce"], key)
    return h, list(struct.unpack(f"<{h['dim']}d", pt))


def write_record(key_id, key, tid, mid, config, values, nonce=None):
    """docs/template-format.md, written here: header, then the AEAD with the
    header as associated data."""
    kid = key_id.encode("ascii")
    header = (b"LKTR" + struct.pack("<HB", 1, len(kid)) + kid + tid.encode() + mid.encode() +
              hashlib.blake2b(config.encode(), digest_size=32).digest() +
              struct.pack("<I", len(values)) + (nonce or secrets.token_bytes(24)))
    pt = struct.pack(f"<{len(values)}d", *values)
    return header + nb.crypto_aead_xchacha20poly1305_ietf_encrypt(pt, header, header[-24:], key)


def bits(values):
    return struct.pack(f"<{len(values)}d", *values)


# ---- the checks ----

def check_xchacha():
    # draft-irtf-cfrg-xchacha-03, Appendix A.3.1 (AEAD_XChaCha20_Poly1305).
    # Recalled from memory, then compared with several independent published
    # copies of the draft's appendix.
    pt = (b"Ladies and Gentlemen of the class of '99: If I could offer you only one tip for "
          b"the future, sunscreen would be it.")
    aad = bytes.fromhex("50515253c0c1c2c3c4c5c6c7")
    key = bytes(range(0x80, 0xa0))
    iv = bytes(range(0x40, 0x58))
    ct = bytes.fromhex(
        "bd6d179d3e83d43b9576579493c0e939572a1700252bfaccbed2902c21396cbb"
        "731c7f1b0b4aa6440bf3a82f4eda7e39ae64c6708c54c216cb96b72e1213b452"
        "2f8c9ba40db5d945b11b69b982c1bb9e3f3fac2bc369488f76b2383565d3fff9"
        "21f9664c97637da9768812f615c68b13b52e")
    tag = bytes.fromhex("c0875924c1c7987947deafd8780acf49")
    py = nb.crypto_aead_xchacha20poly1305_ietf_encrypt(pt, aad, iv, key)
    check(py == ct + tag, "draft A.3.1 through PyNaCl")
    c = bytes.fromhex(run("xchacha").stdout.strip())
    check(c == ct + tag, "draft A.3.1 through the C tool's libsodium call")


def main():
    rng = secrets.SystemRandom()
    check_xchacha()
    with tempfile.TemporaryDirectory() as tmp:
        kf = os.path.join(tmp, "service.keys")
        run("init", kf)
        st = os.stat(kf)
        check(stat.S_ISREG(st.st_mode) and stat.S_IMODE(st.st_mode) == 0o600,
              f"key file mode {oct(st.st_mode)}")
        keys, current, api, seed = read_keyfile(kf)
        check(re.fullmatch(r"t[0-9a-f]{16}", current) is not None, f"key id shape {current}")
        r = run("init", kf, ok=False)
        check(r.returncode == 2 and r.stderr.startswith("key_error"), "init over an existing file")

        mid = secrets.token_hex(16)
        config = "crop=64x64;hog=8x8/9;lbp=u2;ünïcode"
        records = []
        for dim in (1, 7, 128, 300):
            tid = secrets.token_hex(16)
            values = [rng.uniform(-5, 5) for _ in range(dim)]
            if dim > 2:
                values[1], values[2] = -0.0, 5e-324
            vin, rp = os.path.join(tmp, "v.f64"), os.path.join(tmp, f"r{dim}.lktr")
            open(vin, "wb").write(bits(values))
            kid = run("seal", kf, tid, mid, config, vin, rp).stdout.strip()
            rec = open(rp, "rb").read()
            h, got = open_record(rec, keys[current])
            check(kid == current and h["key_id"] == current, f"dim {dim}: key id {h['key_id']}")
            check(h["template_id"] == tid and h["model_id"] == mid and h["dim"] == dim,
                  f"dim {dim}: header ids and dim")
            check(h["digest"] == hashlib.blake2b(config.encode(), digest_size=32).digest(),
                  f"dim {dim}: configuration digest equals hashlib.blake2b")
            check(bits(got) == bits(values), f"dim {dim}: PyNaCl-decrypted values bit-identical")
            # Associated data covers the header: a changed digest byte fails in PyNaCl too.
            bad = bytearray(rec)
            bad[7 + len(current) + 64] ^= 1  # first byte of the configuration digest
            try:
                open_record(bytes(bad), keys[current])
                check(False, f"dim {dim}: PyNaCl opened a record with a changed header")
            except nacl.exceptions.CryptoError:
                check(True, f"dim {dim}: header is authenticated (PyNaCl refuses a changed digest)")
            records.append((tid, rp, values))

        # Records written here from the spec open in C.
        for dim in (1, 33):
            tid = secrets.token_hex(16)
            values = [rng.gauss(0, 1) for _ in range(dim)]
            rp, out = os.path.join(tmp, "py.lktr"), os.path.join(tmp, "out.f64")
            open(rp, "wb").write(write_record(current, keys[current], tid, mid, config, values))
            r = run("open", kf, tid, mid, config, rp, out)
            check(r.stdout.strip() == "ok" and open(out, "rb").read() == bits(values),
                  f"Python-written record of dim {dim} opens in C: {r.stdout.strip()} {r.stderr}")
            cases = [("another model id", dict(mid=secrets.token_hex(16)), "template_mismatch"),
                     ("another configuration", dict(config=config + ";x"), "template_mismatch"),
                     ("another template id", dict(tid=secrets.token_hex(16)), "template_invalid"),
                     ("unknown key id", dict(key_id="tffffffffffffffff"), "key_error"),
                     ("wrong key", dict(key=bytes(32)), "template_invalid")]
            for tag, kw, want in cases:
                a = dict(key_id=current, key=keys[current], tid=tid, mid=mid, config=config)
                a.update(kw)
                open(rp, "wb").write(write_record(a["key_id"], a["key"], a["tid"], a["mid"],
                                                  a["config"], values))
                got = run("open", kf, tid, mid, config, rp, out).stdout.strip()
                check(got == want, f"Python-written record, {tag}: {got}, want {want}")

        # API keys: the stored hash is keyed BLAKE2b-256 of the whole token.
        for _ in range(5):
            token, hhex = run("apikey", kf).stdout.split()
            check(re.fullmatch(r"lkk_[0-9a-f]{16}_[A-Za-z0-9_-]{43}", token) is not None,
                  f"token shape {token[:21]}...")
            want = hashlib.blake2b(token.encode(), key=api, digest_size=32).hexdigest()
            check(hhex == want, "API-key hash equals hashlib.blake2b(token, key=..., digest_size=32)")
        # A token made here (canonical base64url of 32 bytes).
        import base64
        token = ("lkk_" + secrets.token_hex(8) + "_" +
                 base64.urlsafe_b64encode(secrets.token_bytes(32)).decode().rstrip("="))
        hhex = run("apihash", kf, token).stdout.strip()
        check(hhex == hashlib.blake2b(token.encode(), key=api, digest_size=32).hexdigest(),
              "hash of a Python-made token")

        # Audit signatures verify with PyNaCl; the public key is the seed's.
        msg = b"likeness-audit-checkpoint-v1" + struct.pack(">Q", 7) + secrets.token_bytes(32)
        mp = os.path.join(tmp, "msg")
        open(mp, "wb").write(msg)
        pk_hex, sig_hex = run("sign", kf, mp).stdout.split()
        want_pk = bytes(nacl.signing.SigningKey(seed).verify_key)
        check(bytes.fromhex(pk_hex) == want_pk, "audit public key equals PyNaCl's from the seed")
        vk = nacl.signing.VerifyKey(want_pk)
        try:
            vk.verify(msg, bytes.fromhex(sig_hex))
            check(True, "audit signature verifies with nacl.signing.VerifyKey")
        except nacl.exceptions.BadSignatureError:
            check(False, "audit signature does not verify with nacl.signing.VerifyKey")
        try:
            vk.verify(msg[:-1] + bytes([msg[-1] ^ 1]), bytes.fromhex(sig_hex))
            check(False, "signature verified for another message")
        except nacl.exceptions.BadSignatureError:
            check(True, "signature refused for another message")
        check(bytes(nacl.signing.SigningKey(seed).sign(msg).signature) == bytes.fromhex(sig_hex),
              "signature equals PyNaCl's (Ed25519 is deterministic)")

        # Rotation and re-sealing.
        new_id = run("rotate", kf).stdout.strip()
        keys2, current2, api2, seed2 = read_keyfile(kf)
        check(current2 == new_id and new_id != current, f"current key after rotation {current2}")
        check(all(keys2.get(k) == v for k, v in keys.items()), "rotation keeps the old keys")
        check(api2 == api and seed2 == seed, "rotation keeps the fixed keys")
        check(stat.S_IMODE(os.stat(kf).st_mode) == 0o600, "rotated key file mode")
        for tid, rp, values in records:
            np_ = rp + ".new"
            kid = run("reseal", kf, tid, rp, np_).stdout.strip()
            rec = open(np_, "rb").read()
            h, got = open_record(rec, keys2[new_id])
            check(kid == new_id and h["key_id"] == new_id and h["model_id"] == mid and
                  bits(got) == bits(values), f"re-sealed dim {len(values)} under {h['key_id']}")
            h_old, got_old = open_record(open(rp, "rb").read(), keys2[current])
            check(bits(got_old) == bits(values), "old record still decrypts with the old key")
    return finish()


if __name__ == "__main__":
    if not os.path.exists(TOOL):
        skip(f"{TOOL} is not built (set LIKENESS_BIN)")
    sys.exit(main())
