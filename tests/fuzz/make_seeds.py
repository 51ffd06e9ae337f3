#!/usr/bin/python3
"""Regenerates the seed corpora of the fuzz targets (tests/fuzz/corpus/*)
deterministically: run with Debian's /usr/bin/python3 (Pillow, PyNaCl).

  /usr/bin/python3 tests/fuzz/make_seeds.py

Images come from Pillow, except the PNG variants Pillow does not write
(Adam7 interlacing, 16-bit RGB, 2-bit grey, an eXIf chunk), which are written
here from the PNG specification (ISO/IEC 15948). Model files are written
from docs/model-format.md, template records from docs/template-format.md
with the fixed keys of fuzz_template.h, audit inputs in the operation
language of fuzz_audit.c. Regression inputs in tests/fuzz/regressions are
not touched here; run.sh adds them to each target's corpus."""

import base64
import hashlib
import io
import os
import shutil
import struct
import sys
import zlib

from PIL import Image

HERE = os.path.dirname(os.path.abspath(__file__))
CORPUS = os.path.join(HERE, "corpus")


def out(target, name, data):
    d = os.path.join(CORPUS, target)
    os.makedirs(d, exist_ok=True)
    assert len(data) < 20000, f"{target}/{name} is {len(data)} bytes"
    with open(os.path.join(d, name), "wb") as f:
        f.write(data)


# ---- images ----

def gradient(mode, w, h):
    im = Image.new("RGB", (w, h))
    im.putdata([((x * 255) // max(w - 1, 1), (y * 255) // max(h - 1, 1), (x * y * 7) & 255)
                for y in range(h) for x in range(w)])
    return im.convert(mode)


def pil(im, fmt, **kw):
    b = io.BytesIO()
    im.save(b, fmt, **kw)
    return b.getvalue()


def png_chunk(tag, data):
    return struct.pack(">I", len(data)) + tag + data + struct.pack(">I", zlib.crc32(tag + data))


# Adam7 passes (ISO/IEC 15948, 8.2): x start, y start, x step, y step.
ADAM7 = [(0, 0, 8, 8), (4, 0, 8, 8), (0, 4, 4, 8), (2, 0, 4, 4), (0, 2, 2, 4), (1, 0, 2, 2),
         (0, 1, 1, 2)]


def png_raw(w, h, color_type, depth, pixel, interlace=False, extra=b""):
    """pixel(x, y) -> list of sample values; rows filtered with type 0 (None)."""
    def row(xs, y):
        samples = [s for x in xs for s in pixel(x, y)]
        if depth == 16:
            return b"\0" + b"".join(struct.pack(">H", s) for s in samples)
        if depth == 8:
            return b"\0" + bytes(samples)
        bits = "".join(format(s, f"0{depth}b") for s in samples)
        bits += "0" * (-len(bits) % 8)
        return b"\0" + int(bits, 2).to_bytes(len(bits) // 8, "big") if bits else b"\0"
    raw = b""
    if interlace:
        for x0, y0, dx, dy in ADAM7:
            xs = list(range(x0, w, dx))
            if not xs:
                continue
            for y in range(y0, h, dy):
                raw += row(xs, y)
    else:
        for y in range(h):
            raw += row(range(w), y)
    ihdr = struct.pack(">IIBBBBB", w, h, depth, color_type, 0, 0, 1 if interlace else 0)
    return (b"\x89PNG\r\n\x1a\n" + png_chunk(b"IHDR", ihdr) + extra +
            png_chunk(b"IDAT", zlib.compress(raw, 9)) + png_chunk(b"IEND", b""))


def tiff_orientation(value):
    """A big-endian TIFF structure with one IFD0 entry: Orientation (0x0112),
    SHORT, count 1 (TIFF 6.0 sections 2 and 8)."""
    return (b"MM\0\x2a" + struct.pack(">I", 8) + struct.pack(">H", 1) +
            struct.pack(">HHIHH", 0x0112, 3, 1, value, 0) + struct.pack(">I", 0))


def images():
    rgb = gradient("RGB", 16, 12)
    out("image", "rgb420.jpg", pil(rgb, "JPEG", quality=75))
    out("image", "rgb444.jpg", pil(rgb, "JPEG", quality=90, subsampling=0))
    out("image", "gray.jpg", pil(gradient("L", 8, 8), "JPEG", quality=75))
    out("image", "progressive.jpg", pil(gradient("RGB", 24, 16), "JPEG", quality=70,
                                        progressive=True))
    out("image", "cmyk.jpg", pil(gradient("CMYK", 8, 8), "JPEG", quality=75))
    out("image", "restart.jpg", pil(gradient("RGB", 32, 16), "JPEG", quality=60, restart_marker_blocks=1))
    exif = Image.Exif()
    exif[0x0112] = 6  # Orientation: rotate 90 CW to view
    out("image", "exif6.jpg", pil(gradient("RGB", 16, 8), "JPEG", quality=75, exif=exif.tobytes()))
    exif[0x0112] = 5
    out("image", "exif5_gray.jpg", pil(gradient("L", 8, 16), "JPEG", quality=75, exif=exif.tobytes()))

    out("image", "rgb.png", pil(gradient("RGB", 12, 9), "PNG"))
    out("image", "gray.png", pil(gradient("L", 10, 7), "PNG"))
    out("image", "gray16.png", pil(gradient("L", 9, 6).point(lambda v: v * 257).convert("I"), "PNG"))
    out("image", "rgba.png", pil(gradient("RGBA", 7, 7), "PNG"))
    out("image", "gray_alpha.png", pil(gradient("LA", 6, 5), "PNG"))
    pal = gradient("RGB", 8, 8).convert("P", palette=Image.ADAPTIVE, colors=8)
    out("image", "palette_trns.png", pil(pal, "PNG", transparency=bytes([0, 128] + [255] * 6)))
    out("image", "interlaced.png", png_raw(11, 9, 2, 8, lambda x, y: [x * 23, y * 28, (x ^ y) * 16],
                                           interlace=True))
    out("image", "interlaced_gray16.png", png_raw(9, 10, 0, 16, lambda x, y: [(x * 7000 + y * 300) & 0xFFFF],
                                                  interlace=True))
    out("image", "rgb16.png", png_raw(5, 4, 2, 16, lambda x, y: [x * 13000, y * 16000, 65535 - x * 999]))
    out("image", "gray2.png", png_raw(7, 3, 0, 2, lambda x, y: [(x + y) & 3]))
    out("image", "exif3.png", png_raw(6, 4, 2, 8, lambda x, y: [x * 40, y * 60, 0],
                                      extra=png_chunk(b"eXIf", tiff_orientation(3))))


# ---- request bodies ----

def multipart(boundary, parts):
    b = b""
    for name, filename, ctype, data in parts:
        b += b"--" + boundary + b"\r\n"
        disp = b'Content-Disposition: form-data; name="' + name + b'"'
        if filename:
            disp += b'; filename="' + filename + b'"'
        b += disp + b"\r\n"
        if ctype:
            b += b"Content-Type: " + ctype + b"\r\n"
        b += b"\r\n" + data + b"\r\n"
    return b + b"--" + boundary + b"--\r\n"


JPEG_STUB = b"\xff\xd8\xff\xe0\x00\x10JFIF\x00\x01\x01\x00\x00\x01\x00\x01\x00\x00\xff\xd9"
TID = b"00112233445566778899aabbccddeeff"


def requests():
    mp_verify = multipart(b"lkfuzz", [(b"probe", b"a.jpg", b"image/jpeg", JPEG_STUB),
                                      (b"reference", b"b.jpg", b"image/jpeg", JPEG_STUB),
                                      (b"target_fmr", None, None, b"0.001")])
    mp_verify_tid = multipart(b"lkfuzz", [(b"probe", b"a.png", b"image/png", b"\x89PNG\r\n\x1a\n"),
                                          (b"template_id", None, None, TID)])
    mp_enrol = multipart(b"lkfuzz", [(b"image", b"1.jpg", b"image/jpeg", JPEG_STUB),
                                     (b"images", b"2.jpg", None, JPEG_STUB),
                                     (b"subject_ref", None, b"text/plain; charset=utf-8",
                                      "visitor-\u00e9".encode()),
                                     (b"ttl_seconds", None, None, b"86400")])
    for target in ("multipart",):
        out(target, "verify.txt", b"multipart/form-data; boundary=lkfuzz\n" + mp_verify)
        out(target, "quoted.txt", b'multipart/form-data; charset=utf-8; boundary="lkfuzz"\n' +
            mp_verify_tid)
        out(target, "enrol.txt", b"Multipart/Form-Data;boundary=lkfuzz\n" + mp_enrol)
        out(target, "preamble.txt", b"multipart/form-data; boundary=lkfuzz\n" +
            b"preamble text\r\n" + mp_verify + b"epilogue")
        out(target, "noheaders.txt", b"multipart/form-data; boundary=x\n--x\r\n\r\nabc\r\n--x--")
        out(target, "padding.txt", b"multipart/form-data; boundary=lkfuzz\n"
            b"--lkfuzz \t\r\nContent-Disposition: form-data; name=\"a\\\"b\"\r\n\r\n\r\n--lkfuzz--")
    b64 = base64.b64encode(JPEG_STUB).decode()
    # Byte 0 of a request input: bit 0 kind (0 verify, 1 enrol), bits 1-3 the
    # Content-Type (fuzz_request.c's table: 0 JSON, 1 multipart, 7 from the input).
    out("request", "verify.json", b"\x00" + (
        '{"probe": "%s", "reference": "%s", "target_fmr": 0.0001}' % (b64, b64)).encode())
    out("request", "verify_tid.json", b"\x04" + (
        '{"probe":"%s","template_id":"%s"}' % (b64, TID.decode())).encode())
    out("request", "enrol.json", b"\x01" + (
        '{"images": ["%s", "%s"], "subject_ref": "visitor-\\u00e9", "ttl_seconds": 3600}\n'
        % (b64, b64)).encode())
    out("request", "enrol_null.json", b"\x09" + ('{"images":["%s"],"subject_ref":null}' % b64).encode())
    out("request", "verify.form", b"\x02" + mp_verify)
    out("request", "verify_tid.form", b"\x06" + mp_verify_tid)
    out("request", "enrol.form", b"\x03" + mp_enrol)
    out("request", "own_type.form", b"\x0f" + b"multipart/form-data; boundary=lkfuzz\n" + mp_enrol)
    out("request", "own_type.json", b"\x0e" + b"application/json\n" +
        ('{"probe":"%s","reference":"%s"}' % (b64, b64)).encode())
    out("request", "unsupported.txt", b"\x0c" + b"probe=abc")


# ---- model files (docs/model-format.md) ----

def section(tag, payload, flags=1):
    return tag + struct.pack("<IQ", flags, len(payload)) + payload


def pstr(s):
    b = s.encode("utf-8")
    return struct.pack("<I", len(b)) + b


def f64s(v):
    return struct.pack("<%dd" % len(v), *v)


def model(d, k, enc=2, l2=False, stdz=True, extra=b""):
    n = k if k else d
    secs = [section(b"IDNT", bytes(range(16))),
            section(b"FEAT", struct.pack("<I", d) + pstr("crop=64x64;lbp=u2"))]
    if k:
        mean = [0.01 * i for i in range(d)]
        W = [((i * 7 + j * 3) % 11 - 5) / 8.0 for i in range(k) for j in range(d)]
        mat = f64s(W) if enc == 1 else struct.pack("<%df" % len(W), *W)
        secs.append(section(b"PROJ", struct.pack("<III", k, d, enc) + f64s(mean) + mat))
        if l2:
            secs.append(section(b"PRNM", struct.pack("<I", 1)))
    if stdz:
        secs.append(section(b"STDZ", struct.pack("<I", n) + f64s([0.1] * n) + f64s([0.5 + 0.1 * i for i in range(n)])))
    secs.append(section(b"SVML", struct.pack("<Id", n, 2.0) + f64s([-0.25 * (i + 1) for i in range(n)])))
    secs.append(section(b"PLAT", struct.pack("<dd", -1.3, 0.2)))
    rows = [(1e-4, 0.95, 1.2, 1.5e-4, 0.4, 50000, 900, 0),
            (1e-3, 0.7, 0.4, 0.9e-3, 0.2, 50000, 900, 1)]
    secs.append(section(b"OPPT", struct.pack("<Id", len(rows), 5e-3) +
                        b"".join(struct.pack("<5dQQI", *r) for r in rows)))
    secs.append(section(b"PROV", pstr("fuzz seed") + struct.pack("<3Q", 10, 20, 30) +
                        pstr("2025-01-02T03:04:05Z") + pstr("make_seeds.py") + pstr("0.1.0")))
    body = b"LKMODEL\0" + struct.pack("<I", 1) + b"".join(secs) + extra
    body += b"CSUM" + struct.pack("<IQ", 1, 32)
    return body + hashlib.blake2b(body, digest_size=32).digest()


def models():
    out("model", "proj_f32_l2.lkmodel", model(6, 3, enc=2, l2=True))
    out("model", "proj_f64.lkmodel", model(5, 2, enc=1, stdz=False))
    out("model", "noproj.lkmodel", model(4, 0))
    out("model", "optional_section.lkmodel",
        model(3, 2, extra=section(b"ZZZZ", b"optional, skipped", flags=0)))


# ---- template records (docs/template-format.md) ----

# fuzz_template.h: keep in step.
KEYS = {"t0123456789abcdef": bytes(range(32)),
        "tfedcba9876543210": bytes(range(0xa0, 0xc0))}
MODEL_ID = b"0f1e2d3c4b5a69788796a5b4c3d2e1f0"
CONFIG = b"crop=64x64;lbp=u2"


def record(key_id, values, nonce):
    from nacl.bindings import crypto_aead_xchacha20poly1305_ietf_encrypt
    kid = key_id.encode()
    header = (b"LKTR" + struct.pack("<HB", 1, len(kid)) + kid + TID + MODEL_ID +
              hashlib.blake2b(CONFIG, digest_size=32).digest() + struct.pack("<I", len(values)) +
              nonce)
    return header + crypto_aead_xchacha20poly1305_ietf_encrypt(f64s(values), header, nonce,
                                                               KEYS[key_id])


def templates():
    out("template", "current_4.rec", record("tfedcba9876543210", [0.5, -0.25, 0.125, 1e-300],
                                            bytes(range(24))))
    out("template", "old_1.rec", record("t0123456789abcdef", [1.0], bytes(range(1, 25))))
    out("template", "old_16.rec", record("t0123456789abcdef", [i / 16 for i in range(16)],
                                         bytes(range(2, 26))))


# ---- configuration files ----

def configs():
    with open(os.path.join(HERE, "..", "..", "deploy", "likenessd.ini.example"), "rb") as f:
        out("config", "example.ini", f.read())
    out("config", "minimal.ini", b"[store]\nurl = sqlite:store.db\n[keys]\nfile = keys\n")
    out("config", "clients.ini", b"""[server]
listen = ::1
port = 9443
client_ca_file = ca.pem
workers = 2
max_body_bytes = 1048576
[model]
target_fmr = 1e-3
[store]
url = sqlite:/var/lib/likeness/store.db
[keys]
file = /etc/likeness/keys
[limits]
rate_per_second = 0.5
burst = 3
[templates]
default_ttl_s = 3600
max_ttl_s = 86400
[audit]
checkpoint_interval = 10
[client:desk-1]
subject = CN=desk-1,O=Example
scopes = verify,enrol
[client:auditor]
subject = CN=auditor
scopes = audit
""")
    out("config", "continuation.ini", b"; comment\n[store]\nurl = sqlite:a.db ; inline\n"
        b"  continued\n[keys]\nfile=k\n[server]\ntls_priorities = NORMAL\n")


# ---- audit programs (fuzz_audit.c) ----

def audits():
    # op % 5: 0 honest record, 1 record from fields, 2 checkpoint, 3 encode, 4 parse a name
    out("audit", "honest10_checkpoint", b"\x00" * 10 + b"\x02\x00" + b"\x00" * 8)
    full = (b"\x01" + b"\x00" + struct.pack(">Q", 1700000000000) + b"\x05" +
            b"\x0dlkk_0011aabb22" + b"\x04req1" + b"\x20" + TID + b"\x05match" + b"\x20" + MODEL_ID +
            b"\x00" + struct.pack(">d", 0.93) + struct.pack(">d", 0.7) + b"\x00\xc8" + b"\x00")
    out("audit", "full_record", b"\x00\x00" + full + b"\x03\x40" + b"\x02\x01\x01" + b"\x00" * 8)
    out("audit", "names", b"\x04\x0cverification\x04\x07unknown\x04\x05purge")
    out("audit", "tampered", b"\x00\x00\x01\x00" + b"\x00" * 8 + b"\x02" + b"\x00" * 6 +
        b"\xff" * 16 + b"\x00" * 18 + b"\x02" + b"\x11" * 32)
    out("audit", "many", b"\x00" * 1100 + b"\x02\x00" + b"\x00" * 8 + b"\x02\x01\x07" + b"\x00" * 8)


def main():
    if os.path.isdir(CORPUS):
        shutil.rmtree(CORPUS)
    images()
    requests()
    models()
    templates()
    configs()
    audits()
    total = sum(os.path.getsize(os.path.join(r, f)) for r, _, fs in os.walk(CORPUS) for f in fs)
    assert total < 1 << 20, f"corpus is {total} bytes"
    print(f"seeds written to {CORPUS}: {total} bytes")
    return 0


if __name__ == "__main__":
    sys.exit(main())
