"""Model file against outside references and against its written spec.

* The checksum: Python's hashlib.blake2b(digest_size=32) (RFC 7693
  BLAKE2b, CPython's own implementation) over the same bytes must equal the
  digest the C writer stored.
* The spec (docs/model-format.md): the file is read here by an independent
  reader written from the spec's byte layout with struct/numpy; its fields
  must agree with the C library's JSON, and the score of random feature
  pairs computed by numpy from the documented formula (including the L2
  normalisation of the projected vector, section PRNM) must agree with
  lk_model_score, and the projected vectors with lk_model_project.
* The other direction: files written here from the spec (sections in
  another order, plus an unknown optional section, with and without PRNM)
  must load in C and score the same as numpy; PRNM files the spec says to
  refuse (mode 0, unknown mode, no PROJ) must be refused.
* Both encodings of the projection matrix (PROJ.encoding 1 = f64, 2 = f32):
  C-written files of each are read here; numpy-written f32 files (W rounded
  by numpy's astype(float32), IEEE 754 round to nearest) must score in C as
  numpy scores them with the rounded W; the C projections of the same model
  in f32 and f64 must differ by no more than the bound the spec documents;
  encodings 0 and 3 and a NaN binary32 element must be refused.
"""
import hashlib
import json
import os
import struct
import subprocess
import sys
import tempfile

import numpy as np

BIN = os.environ.get("LIKENESS_BIN", "")
TOOL = os.path.join(BIN, "lkt_model_dump")
if not os.path.exists(TOOL):
    print(f"SKIPPED: {TOOL} is not built (set LIKENESS_BIN)", file=sys.stderr)
    sys.exit(77)

failures = 0


def check(cond, msg):
    global failures
    if not cond:
        failures += 1
        print("FAIL:", msg, file=sys.stderr)


def run(*args, ok=True):
    r = subprocess.run([TOOL, *args], capture_output=True, text=True)
    if ok and r.returncode != 0:
        raise SystemExit(f"{TOOL} {' '.join(args)} failed: {r.stderr}")
    return r


# ---- independent reader, from docs/model-format.md ----

def read_str(p, o):
    (n,) = struct.unpack_from("<I", p, o)
    s = p[o + 4:o + 4 + n]
    assert len(s) == n
    return s.decode("utf-8", errors="strict"), o + 4 + n


def parse(data):
    assert data[:8] == b"LKMODEL\0", "magic"
    (version,) = struct.unpack_from("<I", data, 8)
    assert version == 1, version
    pos, sec = 12, {}
    while True:
        tag = data[pos:pos + 4]
        flags, length = struct.unpack_from("<IQ", data, pos + 4)
        payload = data[pos + 16:pos + 16 + length]
        assert len(payload) == length
        if tag == b"CSUM":
            assert length == 32 and pos + 16 + 32 == len(data)
            digest_at = pos + 16
            break
        assert tag not in sec
        sec[tag] = payload
        pos += 16 + length
    m = {"checksum": data[digest_at:], "digest_at": digest_at}
    m["id"] = sec[b"IDNT"].hex()
    p = sec[b"FEAT"]
    (m["d"],) = struct.unpack_from("<I", p, 0)
    m["config"], o = read_str(p, 4)
    assert o == len(p)
    d = m["d"]
    if b"PROJ" in sec:
        p = sec[b"PROJ"]
        k, dd, enc = struct.unpack_from("<III", p, 0)
        assert enc in (1, 2), enc
        esize, etype = (8, "<f8") if enc == 1 else (4, "<f4")
        assert dd == d and len(p) == 12 + 8 * d + esize * k * d
        m["mu"] = np.frombuffer(p, "<f8", d, 12)
        W = np.frombuffer(p, etype, k * d, 12 + 8 * d).reshape(k, d)
        assert np.all(np.isfinite(W)) and np.all(np.isfinite(m["mu"]))
        m["W"] = W.astype(np.float64)  # exact for binary32 values
        m["enc"] = "f64" if enc == 1 else "f32"
    m["l2"] = False
    if b"PRNM" in sec:
        p = sec[b"PRNM"]
        assert len(p) == 4 and b"PROJ" in sec
        (mode,) = struct.unpack_from("<I", p, 0)
        assert mode == 1, mode
        m["l2"] = True
    if b"STDZ" in sec:
        p = sec[b"STDZ"]
        (n,) = struct.unpack_from("<I", p, 0)
        assert len(p) == 4 + 16 * n
        m["smean"] = np.frombuffer(p, "<f8", n, 4)
        m["sscale"] = np.frombuffer(p, "<f8", n, 4 + 8 * n)
    p = sec[b"SVML"]
    (n,) = struct.unpack_from("<I", p, 0)
    (m["bias"],) = struct.unpack_from("<d", p, 4)
    m["w"] = np.frombuffer(p, "<f8", n, 12)
    assert len(p) == 12 + 8 * n
    m["A"], m["B"] = struct.unpack_from("<dd", sec[b"PLAT"], 0)
    p = sec[b"OPPT"]
    n, m["default_fmr"] = struct.unpack_from("<Id", p, 0)
    assert len(p) == 12 + 60 * n
    m["rows"] = [struct.unpack_from("<5dQQI", p, 12 + 60 * i) for i in range(n)]
    p = sec[b"PROV"]
    pv = {}
    pv["dataset"], o = read_str(p, 0)
    pv["training_pairs"], pv["calibration_pairs"], pv["evaluation_pairs"] = struct.unpack_from("<3Q", p, o)
    pv["created_utc"], o = read_str(p, o + 24)
    pv["command_line"], o = read_str(p, o)
    pv["software_version"], o = read_str(p, o)
    assert o == len(p)
    m["prov"] = pv
    return m


def np_project(m, x):
    """y = W (x - mu), then y / ||y||_2 if PRNM says so (a zero y stays zero)."""
    x = x.astype(np.float64)
    if "W" not in m:
        return x
    y = m["W"] @ (x - m["mu"])
    if m["l2"]:
        n = np.linalg.norm(y)
        if n > 0:
            y = y / n
    return y


def np_score(m, a, b):
    """docs/model-format.md "Scoring", literally (mean applied to each vector)."""
    ya, yb = np_project(m, a), np_project(m, b)
    z = (ya - yb) ** 2
    if "smean" in m:
        z = (z - m["smean"]) / m["sscale"]
    f = float(m["w"] @ z + m["bias"])
    return f, 1.0 / (1.0 + np.exp(m["A"] * f + m["B"]))


def compare_scores(m, path, tmp, rng, tag):
    d = m["d"]
    npairs = 300
    a = rng.standard_normal((npairs, d)).astype("<f4")
    b = np.where(rng.random((npairs, 1)) < 0.3, a + 0.05 * rng.standard_normal((npairs, d)),
                 rng.standard_normal((npairs, d))).astype("<f4")
    inter = np.empty((2 * npairs, d), "<f4")
    inter[0::2], inter[1::2] = a, b
    fp = os.path.join(tmp, "pairs.f32")
    inter.tofile(fp)
    out = run("score", path, fp).stdout.split()
    got = np.array(out, dtype=np.float64).reshape(npairs, 2)
    want = np.array([np_score(m, a[i], b[i]) for i in range(npairs)])
    ef = np.max(np.abs(got[:, 0] - want[:, 0]) / (1 + np.abs(want[:, 0])))
    ep = np.max(np.abs(got[:, 1] - want[:, 1]))
    print(f"{tag}: {npairs} pairs, largest relative SVM-value difference {ef:.3g}, "
          f"probability {ep:.3g}, probabilities span {want[:, 1].min():.3f}..{want[:, 1].max():.3f}")
    # The library projects a - b and numpy a - mu, b - mu: rounding only.
    check(ef < 1e-9 and ep < 1e-9, f"{tag}: score differs from numpy (f {ef}, p {ep})")
    check(want[:, 1].max() - want[:, 1].min() > 0.1, f"{tag}: probabilities do not spread")
    # The projected vectors themselves (lk_model_project).
    vp = os.path.join(tmp, "vecs.f32")
    a[:20].tofile(vp)
    got = np.array([list(map(float, line.split())) for line in run("project", path, vp).stdout.splitlines()])
    want = np.array([np_project(m, x) for x in a[:20]])
    ey = np.max(np.abs(got - want)) / max(1.0, np.max(np.abs(want)))
    check(got.shape == want.shape and ey < 1e-12, f"{tag}: lk_model_project differs from numpy ({ey})")
    if m["l2"]:
        norms = np.linalg.norm(got, axis=1)
        check(np.max(np.abs(norms - 1)) < 1e-14, f"{tag}: projected vectors not unit length {norms}")
    return want


def close(x, y):
    # cJSON prints %.15g unless that reads back within DBL_EPSILON (cJSON
    # 1.7 print_number/compare_double), so JSON may lose the last bit.
    return abs(x - y) <= 4e-16 * max(abs(x), abs(y))


def check_json(m, path, tag):
    j = json.loads(run("json", path).stdout)
    check(j["id"] == m["id"], f"{tag}: id {j['id']} vs {m['id']}")
    check(j["checksum_blake2b256"] == m["checksum"].hex(), f"{tag}: checksum hex")
    check(j["features"]["config"] == m["config"] and j["features"]["dimension"] == m["d"],
          f"{tag}: features")
    check(close(j["platt"]["A"], m["A"]) and close(j["platt"]["B"], m["B"]), f"{tag}: platt")
    check(close(j["default_target_fmr"], m["default_fmr"]), f"{tag}: default fmr")
    check(len(j["operating_points"]) == len(m["rows"]), f"{tag}: row count")
    for jr, r in zip(j["operating_points"], m["rows"]):
        got = (jr["target_fmr"], jr["probability_threshold"], jr["svm_threshold"],
               jr["measured_fmr"], jr["measured_fnmr"])
        check(all(close(x, y) for x, y in zip(got, r[:5])) and
              (jr["impostor_comparisons"], jr["genuine_comparisons"], jr["supported"]) ==
              (r[5], r[6], bool(r[7] & 1)), f"{tag}: row {r}")
    check(j["provenance"] == m["prov"], f"{tag}: provenance {j['provenance']} vs {m['prov']}")
    check(j["projection"] == ("W" in m), f"{tag}: projection flag")
    check(j.get("projection_encoding") == m.get("enc"),
          f"{tag}: projection_encoding {j.get('projection_encoding')} vs {m.get('enc')}")
    check(j["projection_norm"] == ("l2" if m["l2"] else "none"),
          f"{tag}: projection_norm {j['projection_norm']}")
    check("weights" not in json.dumps(j), f"{tag}: JSON must not hold weights")


# ---- independent writer, from docs/model-format.md ----

def section(tag, payload, flags=1):
    return tag + struct.pack("<IQ", flags, len(payload)) + payload


def pstr(s):
    b = s.encode("utf-8")
    return struct.pack("<I", len(b)) + b


def write_model(rng, d, k, prnm=None, proj=True, enc=2, nan_at=None):
    """prnm: None (no PRNM section) or (flags, mode). proj=False leaves PROJ
    out (SVM and STDZ then have k = d). enc: PROJ.encoding written (2 = f32,
    W rounded by numpy; 1 = f64; anything else is written as an f32 file with
    that code). nan_at: index of W to replace by a NaN."""
    if not proj:
        k = d
    mu = rng.standard_normal(d)
    W = rng.standard_normal((k, d)) / np.sqrt(d)
    sm = rng.random(k)
    ss = 0.5 + rng.random(k)
    w = -np.abs(rng.standard_normal(k)) / np.sqrt(k)
    bias, A, B = 2.0, -1.3, 0.2
    if prnm is not None:
        # Unit vectors: pair values about 4/k, so rescale to keep scores spread.
        sm, ss = sm / k, ss / k
    rows = [(1e-4, 0.95, 1.2, 1.5e-4, 0.4, 50000, 900, 0),
            (1e-3, 0.7, 0.4, 0.9e-3, 0.2, 50000, 900, 1)]
    prov = {"dataset": "written by numpy", "training_pairs": 11, "calibration_pairs": 22,
            "evaluation_pairs": 33, "created_utc": "2026-12-02T05:10:00Z",
            "command_line": "", "software_version": "spec-1"}
    config = "crop=64x64;lbp=u2"
    secs = [
        section(b"PROV", pstr(prov["dataset"]) + struct.pack("<3Q", 11, 22, 33) +
                pstr(prov["created_utc"]) + pstr(prov["command_line"]) +
                pstr(prov["software_version"]), flags=0),
        section(b"OPPT", struct.pack("<Id", len(rows), 5e-3) +
                b"".join(struct.pack("<5dQQI", *r) for r in rows)),
        section(b"ZZZZ", b"future optional data", flags=0),
        section(b"SVML", struct.pack("<Id", k, bias) + w.astype("<f8").tobytes()),
        section(b"STDZ", struct.pack("<I", k) + sm.astype("<f8").tobytes() + ss.astype("<f8").tobytes()),
    ]
    if proj:
        Wb = W.astype("<f8" if enc == 1 else "<f4").reshape(-1)
        if nan_at is not None:
            Wb[nan_at] = np.nan
        secs.append(section(b"PROJ", struct.pack("<III", k, d, enc) + mu.astype("<f8").tobytes() +
                            Wb.tobytes()))
    secs += [
        section(b"PLAT", struct.pack("<dd", A, B)),
        section(b"FEAT", struct.pack("<I", d) + pstr(config)),
        section(b"IDNT", bytes(range(16))),
    ]
    if prnm is not None:
        # Before PROJ's position in the C writer's order: the order must not matter.
        secs.insert(1, section(b"PRNM", struct.pack("<I", prnm[1]), flags=prnm[0]))
    body = b"LKMODEL\0" + struct.pack("<I", 1) + b"".join(secs)
    body += b"CSUM" + struct.pack("<IQ", 1, 32)
    data = body + hashlib.blake2b(body, digest_size=32).digest()
    return data


def main():
    rng = np.random.default_rng(20261202)
    with tempfile.TemporaryDirectory() as tmp:
        cases = [("projection+standardisation", 64, 20, 1, 0, "f32"),
                 ("projection", 48, 10, 0, 0, "f32"),
                 ("no projection", 30, 0, 1, 0, "f32"),
                 ("projection+L2+standardisation", 64, 20, 1, 1, "f32"),
                 ("projection+L2", 20, 32, 0, 1, "f32"),
                 ("f64 projection+standardisation", 64, 20, 1, 0, "f64"),
                 ("f64 projection+L2", 20, 32, 0, 1, "f64")]
        for seed, (tag, d, k, stdz, l2, enc) in enumerate(cases, start=5):
            path = os.path.join(tmp, f"m{seed}.lkmodel")
            run("make", path, str(seed), str(d), str(k), str(stdz), str(l2), enc)
            data = open(path, "rb").read()
            m = parse(data)
            check(m.get("enc") == (enc if k > 0 else None), f"{tag}: encoding {m.get('enc')}")
            # RFC 7693 BLAKE2b-256 via hashlib, over every byte before the digest.
            ref = hashlib.blake2b(data[:m["digest_at"]], digest_size=32).digest()
            check(ref == m["checksum"], f"{tag}: stored checksum differs from hashlib.blake2b")
            check(("W" in m) == (k > 0) and ("smean" in m) == bool(stdz) and m["l2"] == bool(l2),
                  f"{tag}: optional sections")
            check_json(m, path, tag)
            compare_scores(m, path, tmp, rng, tag)
            # One changed byte in a weight: refused as model_format.
            bad = bytearray(data)
            bad[len(bad) // 2] ^= 0x10
            bp = os.path.join(tmp, "bad.lkmodel")
            open(bp, "wb").write(bytes(bad))
            r = run("json", bp, ok=False)
            check(r.returncode == 2 and r.stderr.startswith("model_format:") and "checksum" in r.stderr,
                  f"{tag}: corrupted file not refused: {r.returncode} {r.stderr}")

        # A file written here from the spec alone.
        data = write_model(rng, 40, 12)
        path = os.path.join(tmp, "numpy.lkmodel")
        open(path, "wb").write(data)
        m = parse(data)
        check(m["id"] == bytes(range(16)).hex(), "numpy file id")
        check_json(m, path, "numpy-written")
        compare_scores(m, path, tmp, rng, "numpy-written")

        # The same numpy model in both encodings: the C projections differ
        # by at most the documented bound 2^-24 sum_j |W_ij| |x_j - mu_j|
        # (plus the binary64 rounding of two d-term sums, 2 d 2^-53 of it).
        paths, models = {}, {}
        for enc in (1, 2):
            data = write_model(np.random.default_rng(31), 60, 16, enc=enc)
            paths[enc] = os.path.join(tmp, f"numpy-enc{enc}.lkmodel")
            open(paths[enc], "wb").write(data)
            models[enc] = parse(data)
            compare_scores(models[enc], paths[enc], tmp, rng, f"numpy-written encoding {enc}")
        W64, W32 = models[1]["W"], models[2]["W"]
        rel = np.max(np.abs(W32 - W64) / np.abs(W64))
        check(rel <= 2.0 ** -24, f"f32 element rounding {rel} above 2^-24")
        x = rng.standard_normal((50, 60)).astype("<f4")
        vp = os.path.join(tmp, "vecs-enc.f32")
        x.tofile(vp)
        y = {e: np.array([list(map(float, line.split()))
                          for line in run("project", paths[e], vp).stdout.splitlines()])
             for e in (1, 2)}
        absum = np.abs(W64) @ np.abs(x.astype(np.float64) - models[1]["mu"]).T  # k x n
        bound = (2.0 ** -24 + 2 * 60 * 2.0 ** -53) * absum.T
        ratio = np.max(np.abs(y[2] - y[1]) / (2.0 ** -24 * absum.T))
        check(np.all(np.abs(y[2] - y[1]) <= bound), f"f32 projection outside the bound ({ratio})")
        print(f"f32 vs f64 numpy-written model: W rounding {rel:.3g} (<= 2^-24 = {2.0 ** -24:.3g}); "
              f"|y32 - y64| reaches {ratio:.3f} of the documented bound; files "
              f"{os.path.getsize(paths[2])} / {os.path.getsize(paths[1])} bytes")

        # The same model with PRNM (REQUIRED and not) written here: C must
        # normalise exactly as numpy does.
        for flags in (1, 0):
            rng2 = np.random.default_rng(7)
            data = write_model(rng2, 40, 12, prnm=(flags, 1))
            path = os.path.join(tmp, f"numpy-l2-{flags}.lkmodel")
            open(path, "wb").write(data)
            m = parse(data)
            check(m["l2"], "numpy PRNM parsed")
            check_json(m, path, f"numpy-written L2 flags={flags}")
            compare_scores(m, path, tmp, rng, f"numpy-written L2 flags={flags}")
        # Files the spec says to refuse.
        refusals = [("PRNM mode 0", dict(prnm=(1, 0)), "PRNM.mode"),
                    ("PRNM mode 2", dict(prnm=(1, 2)), "upgrade"),
                    ("PRNM without PROJ", dict(prnm=(1, 1), proj=False), "no projection"),
                    ("PROJ.encoding 0", dict(enc=0), "PROJ.encoding"),
                    ("PROJ.encoding 3", dict(enc=3), "upgrade"),
                    ("NaN in an f32 W", dict(nan_at=5), "PROJ.matrix[5]"),
                    ("NaN in an f64 W", dict(enc=1, nan_at=5), "PROJ.matrix[5]")]
        for tag, kw, needle in refusals:
            data = write_model(np.random.default_rng(8), 40, 12, **kw)
            path = os.path.join(tmp, "refused.lkmodel")
            open(path, "wb").write(data)
            r = run("json", path, ok=False)
            check(r.returncode == 2 and r.stderr.startswith("model_format:") and needle in r.stderr,
                  f"{tag}: not refused as expected: {r.returncode} {r.stderr}")
            print(f"{tag}: refused: {r.stderr.strip()}")
        # Without PRNM the PROJ-less numpy file is fine (the refusal above is PRNM's).
        data = write_model(np.random.default_rng(8), 40, 12, proj=False)
        path = os.path.join(tmp, "noproj.lkmodel")
        open(path, "wb").write(data)
        compare_scores(parse(data), path, tmp, rng, "numpy-written no projection")

    if failures:
        print(f"{failures} checks failed", file=sys.stderr)
        sys.exit(1)
    print("all model checks passed")


main()
