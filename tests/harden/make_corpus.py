#!/usr/bin/python3
"""Generates the bad-input corpus of tests/ref/check_harden_corpus.py into a
directory: images/ (crafted and converted files), bodies/ (whole request
bodies) and cases.json, one entry per request with the answer the contract
(README's problem table, api-spec/openapi.yaml) says it must get.

Deterministic: every random choice comes from seeded generators, and the
sources are the LFW photos and the 1927 Solvay photo in $LIKENESS_SHARED.
Nothing here is committed as a binary; run
    /usr/bin/python3 tests/harden/make_corpus.py OUTDIR
to look at the files.

Outside references for how the files are built (so a file is bad in exactly
the way its name says): the PNG specification (ISO/IEC 15948, W3C PNG 2nd
edition: chunk layout and CRC-32 section 5, IHDR 11.2.2, filter bytes 9.2,
zlib/deflate streams RFC 1950/1951 with the Adler-32 of RFC 1950 section 8),
JPEG (ITU-T T.81: markers B.1.1, frame header B.2.2, scan header B.2.3,
Huffman tables B.2.4.2 and the progressive EOBRUN coding G.1.2.2), and
Pillow 9.4 as the encoder of every ordinary JPEG and PNG.

Case fields (the test reads them):
  name, kind              identifier and family (for the summary)
  method, path            {tid} in the path is an enrolled template id
  ctype                   Content-Type header, or null for none
  body                    file under the corpus directory, or null; the
                          32 bytes TIDPLACEHOLDER... are replaced by the id
  auth                    full | verify | none | basic | empty-bearer |
                          garbage | unknown-id | wrong-secret | long
  headers                 extra request headers
  send                    http (http.client) | headers-first (Content-Length
                          sent, body only if no answer came first) | chunked
  expect                  status, type (slug) or types (one of, when the
                          contract allows either), field, image,
                          template_id_member (true/false), allow
  valid_image             a decodable image: the answer must also agree
                          with `likeness detect` on that file
  check_subject_ref       the enrolment must either be refused 400 on
                          field subject_ref or store exactly this value
"""
import base64
import io
import json
import os
import random
import struct
import sys
import zlib

import numpy as np
from PIL import Image

SRC = os.environ.get("LIKENESS_SOURCE",
                     os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))))
SHARED = os.environ.get("LIKENESS_SHARED", os.path.join(os.path.dirname(SRC), "shared"))
LFW = os.path.join(SHARED, "datasets", "lfw", "lfw-deepfunneled")
SOLVAY = os.path.join(SHARED, "reference", "solvay-1927", "1280px-Solvay_conference_1927.png")
TID_PLACEHOLDER = b"TIDPLACEHOLDERTIDPLACEHOLDER0000"  # 32 bytes, replaced at send time
BOUNDARY = "lkcorpus4b0undary"


def lfw(name, i):
    return os.path.join(LFW, name, f"{name}_{i:04d}.jpg")


def sources():
    return [lfw("Aaron_Peirsol", 1), lfw("Aaron_Peirsol", 2), SOLVAY]


# ------------------------------------------------------------------ PNG

def png_chunk(kind, data, crc=None):
    """One chunk: length, type, data, CRC-32 over type and data (PNG 5.3)."""
    c = zlib.crc32(kind + data) & 0xFFFFFFFF if crc is None else crc
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", c)


def ihdr(w, h, depth=8, ctype=2, interlace=0):
    return png_chunk(b"IHDR", struct.pack(">IIBBBBB", w, h, depth, ctype, 0, 0, interlace))


PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


def png_raw(w, h, depth, ctype, raw, extra=b""):
    """A PNG from raw scanlines (each led by its filter byte, PNG 9.2)."""
    return (PNG_MAGIC + ihdr(w, h, depth, ctype) + extra +
            png_chunk(b"IDAT", zlib.compress(raw, 9)) + png_chunk(b"IEND", b""))


def png_16bit_rgb(img):
    """16-bit RGB PNG (colour type 2, depth 16) from an 8-bit RGB image:
    each sample v becomes v * 257 (so its high byte is v), big-endian."""
    a = np.asarray(img.convert("RGB"), dtype=np.uint16) * 257
    h, w, _ = a.shape
    rows = a.astype(">u2").reshape(h, w * 3).tobytes()
    stride = w * 6
    raw = b"".join(b"\x00" + rows[y * stride:(y + 1) * stride] for y in range(h))
    return png_raw(w, h, 16, 2, raw)


def zeros_zlib(n_total, chunk=64 << 20):
    """A zlib stream (RFC 1950) that inflates to n_total zero bytes, built
    from one raw-deflate run of `chunk` zeros ended by a full flush, repeated
    (Z_FULL_FLUSH resets the compressor's state and ends on a byte boundary,
    so every repeat is the same bytes and raw deflate blocks can simply
    follow each other, RFC 1951 section 3.2.3), then the remainder in a final
    block. Adler-32 of n zeros: A = 1, B = n mod 65521 (RFC 1950 section 8)."""
    k, rest = divmod(n_total, chunk)
    piece = b""
    if k:
        c = zlib.compressobj(9, zlib.DEFLATED, -15)
        piece = c.compress(bytes(chunk)) + c.flush(zlib.Z_FULL_FLUSH)
    c = zlib.compressobj(9, zlib.DEFLATED, -15)
    tail = c.compress(bytes(rest)) + c.flush(zlib.Z_FINISH)
    adler = ((n_total % 65521) << 16) | 1
    return b"\x78\xda" + piece * k + tail + struct.pack(">I", adler)


def png_bomb(w, h, inflated):
    """A black 8-bit grey PNG of w x h whose single IDAT inflates to
    `inflated` bytes: the w*h+h bytes the rows need (filter 0, samples 0),
    and beyond that more zeros than the image can hold."""
    return PNG_MAGIC + ihdr(w, h, 8, 0) + png_chunk(b"IDAT", zeros_zlib(inflated)) + \
        png_chunk(b"IEND", b"")


# ------------------------------------------------------------------ JPEG

def jpeg_bytes(img, **kw):
    b = io.BytesIO()
    img.save(b, "JPEG", **kw)
    return b.getvalue()


def png_bytes(img, **kw):
    b = io.BytesIO()
    img.save(b, "PNG", **kw)
    return b.getvalue()


def jpeg_segments(data):
    """(marker, offset of the marker, segment length) up to the first SOS."""
    out, i = [], 2
    while i + 4 <= len(data):
        assert data[i] == 0xFF
        m = data[i + 1]
        n = struct.unpack(">H", data[i + 2:i + 4])[0]
        out.append((m, i, n))
        if m == 0xDA:
            break
        i += 2 + n
    return out


def jpeg_patch_sof(data, w=None, h=None, precision=None, marker=None, ncomp=None):
    """Rewrites fields of the frame header (T.81 B.2.2: P, Y, X, Nf)."""
    b = bytearray(data)
    for m, off, _ in jpeg_segments(data):
        if m in (0xC0, 0xC1, 0xC2):
            if marker is not None:
                b[off + 1] = marker
            if precision is not None:
                b[off + 4] = precision
            if h is not None:
                b[off + 5:off + 7] = struct.pack(">H", h)
            if w is not None:
                b[off + 7:off + 9] = struct.pack(">H", w)
            if ncomp is not None:
                b[off + 9] = ncomp
            return bytes(b)
    raise ValueError("no SOF")


def jpeg_scan_flood(w, h, n_ac_scans):
    """A valid progressive JPEG (SOF2) of a flat mid-grey w x h picture, one
    component, with one DC first scan and then n_ac_scans identical AC first
    scans (Ss=1, Se=63, Ah=Al=0). Every scan is legal: a first scan with
    Al=0 leaves each coefficient's bit position at 0, so a repeat of it is
    not a bogus progression (T.81 G.1.1.1.1). Each AC scan codes one EOBRUN
    covering all blocks (T.81 G.1.2.2: symbol r<<4 plus r extra bits)."""
    assert w % 8 == 0 and h % 8 == 0
    nb = (w // 8) * (h // 8)
    r = nb.bit_length() - 1
    assert 1 <= r <= 14
    def seg(marker, payload):
        return bytes([0xFF, marker]) + struct.pack(">H", len(payload) + 2) + payload
    def bits_to_bytes(bits):
        bits += "1" * (-len(bits) % 8)  # pad with 1-bits (T.81 F.1.2.3)
        out = bytearray(int(bits[i:i + 8], 2) for i in range(0, len(bits), 8))
        return bytes(out).replace(b"\xff", b"\xff\x00")  # byte stuffing
    out = b"\xff\xd8"
    out += seg(0xDB, b"\x00" + bytes([1] * 64))                       # DQT, all ones
    out += seg(0xC2, struct.pack(">BHHB", 8, h, w, 1) + b"\x01\x11\x00")  # SOF2
    counts = [0] * 16
    counts[0] = 1
    out += seg(0xC4, b"\x00" + bytes(counts) + b"\x00")               # DC: '0' = category 0
    counts = [0] * 16
    counts[0], counts[1] = 1, 1
    out += seg(0xC4, b"\x10" + bytes(counts) + bytes([0x00, r << 4]))  # AC: '0' EOB, '10' EOBr
    out += seg(0xDA, b"\x01\x01\x00\x00\x00\x00") + bits_to_bytes("0" * nb)
    extra = format(nb - (1 << r), f"0{r}b")
    ac = seg(0xDA, b"\x01\x01\x00\x01\x3f\x00") + bits_to_bytes("10" + extra)
    return out + ac * n_ac_scans + b"\xff\xd9"


# ------------------------------------------------------------------ corpus

class Corpus:
    def __init__(self, out):
        self.out = out
        self.cases = []
        os.makedirs(os.path.join(out, "images"), exist_ok=True)
        os.makedirs(os.path.join(out, "bodies"), exist_ok=True)
        self.face = open(lfw("Aaron_Peirsol", 1), "rb").read()
        self.face2 = open(lfw("Aaron_Peirsol", 2), "rb").read()
        self.face_img = Image.open(lfw("Aaron_Peirsol", 1))
        self.face_img.load()

    def save(self, sub, name, data):
        p = os.path.join(sub, name)
        with open(os.path.join(self.out, p), "wb") as f:
            f.write(data)
        return p

    def add(self, name, kind, expect, method="POST", path="/v1/verifications", ctype=None,
            body=None, auth="full", headers=None, send="http", **extra):
        assert all(c["name"] != name for c in self.cases), name
        if isinstance(body, (bytes, bytearray)):
            body = self.save("bodies", name + ".bin", bytes(body))
        self.cases.append(dict(name=name, kind=kind, method=method, path=path, ctype=ctype,
                               body=body, auth=auth, headers=headers or {}, send=send,
                               expect=expect, **extra))

    # -- bodies
    @staticmethod
    def mp(fields, boundary=BOUNDARY):
        out = bytearray()
        for name, data, filename, ct in fields:
            out += f"--{boundary}\r\n".encode()
            d = f'Content-Disposition: form-data; name="{name}"'
            if filename:
                d += f'; filename="{filename}"'
            out += d.encode() + b"\r\n"
            if ct:
                out += f"Content-Type: {ct}\r\n".encode()
            out += b"\r\n" + data + b"\r\n"
        out += f"--{boundary}--\r\n".encode()
        return bytes(out)

    MPCT = f"multipart/form-data; boundary={BOUNDARY}"

    def image_case(self, name, kind, data, expect, valid=False, where="probe", part_ct="image/jpeg"):
        """The image as the probe (multipart), or as the reference (JSON) or
        the second enrolment image (multipart)."""
        img = self.save("images", name + ".img", data)
        e = dict(expect)
        extra = {"valid_image": img} if valid else {}
        if where == "probe":
            e.setdefault("image", "probe") if e.get("status") == 422 else None
            body = self.mp([("probe", data, "p", part_ct), ("reference", self.face2, "r.jpg",
                                                             "image/jpeg")])
            self.add(name, kind, e, ctype=self.MPCT, body=body, **extra)
        elif where == "reference-json":
            e.setdefault("image", "reference") if e.get("status") == 422 else None
            body = json.dumps({"probe": base64.b64encode(self.face).decode(),
                               "reference": base64.b64encode(data).decode()}).encode()
            self.add(name, kind, e, ctype="application/json", body=body, **extra)
        elif where == "enrol":
            e.setdefault("image", "image[1]") if e.get("status") == 422 else None
            body = self.mp([("image", self.face, "a.jpg", "image/jpeg"),
                            ("image", data, "b", part_ct)])
            self.add(name, kind, e, path="/v1/templates", ctype=self.MPCT, body=body, **extra)


def p422(slug, **kw):
    return dict(status=422, type=slug, **kw)


def p400(field=None):
    e = dict(status=400, type="malformed-request")
    if field is not None:
        e["field"] = field
    return e


def build(out):
    c = Corpus(out)
    face, face2, fimg = c.face, c.face2, c.face_img
    rnd = random.Random(20270101)
    png_face = png_bytes(fimg)

    # ---- zero-byte, truncated
    c.add("image-zero-bytes-multipart", "truncated", p400("probe"), ctype=c.MPCT,
          body=c.mp([("probe", b"", "p.jpg", "image/jpeg"), ("reference", face2, "r.jpg", None)]))
    c.add("image-zero-bytes-json", "truncated", p400("probe"), ctype="application/json",
          body=json.dumps({"probe": "", "reference": base64.b64encode(face2).decode()}).encode())
    for label, n in [("soi-only", 2), ("20-bytes", 20), ("10pct", len(face) // 10),
                     ("50pct", len(face) // 2), ("90pct", len(face) * 9 // 10),
                     ("no-eoi", len(face) - 2)]:
        c.image_case(f"jpeg-truncated-{label}", "truncated", face[:n], p422("corrupt-image"))
    c.image_case("jpeg-truncated-50pct-as-reference", "truncated", face[:len(face) // 2],
                 p422("corrupt-image"), where="reference-json")
    c.image_case("jpeg-truncated-50pct-in-enrolment", "truncated", face[:len(face) // 2],
                 p422("corrupt-image"), where="enrol")
    for label, n in [("4-bytes", 4), ("magic-only", 8), ("40-bytes", 40),
                     ("50pct", len(png_face) // 2), ("no-iend", len(png_face) - 12)]:
        c.image_case(f"png-truncated-{label}", "truncated", png_face[:n], p422("corrupt-image"),
                     part_ct="image/png")

    # ---- corrupt
    segs = {m: (off, n) for m, off, n in jpeg_segments(face)}
    off, n = segs[0xC4]
    b = bytearray(face)
    b[off + 5:off + 21] = bytes([255] * 16)  # BITS counts summing to 4080 (> 256)
    c.image_case("jpeg-bogus-huffman-table", "corrupt", bytes(b), p422("corrupt-image"))
    c.image_case("jpeg-sof-zero-components", "corrupt", jpeg_patch_sof(face, ncomp=0),
                 p422("corrupt-image"))
    b = bytearray(face)
    sos = segs[0xDA][0]
    mid = (sos + len(face)) // 2
    b[mid:mid + 2] = b"\xff\xd9"  # an EOI in the middle of the entropy-coded data
    c.image_case("jpeg-eoi-inside-scan", "corrupt", bytes(b), p422("corrupt-image"))
    b = bytearray(face)
    b[mid:mid + 64] = bytes(64)
    # Zeroed entropy-coded bytes may or may not decode without a warning:
    # the answer must be the offline tool's (same decoder) and never 5xx.
    c.image_case("jpeg-zeroed-scan-bytes", "corrupt", bytes(b), {"same_as_cli": True},
                 valid=True)
    for k in range(4):
        b = bytearray(face)
        for _ in range(8):
            i = rnd.randrange(sos + 20, len(face) - 2)
            b[i] ^= 1 << rnd.randrange(8)
        c.image_case(f"jpeg-bitflips-{k}", "corrupt", bytes(b), {"same_as_cli": True},
                     valid=True)
    b = bytearray(png_face)
    b[29] ^= 0x01  # inside IHDR data: its CRC no longer matches
    c.image_case("png-ihdr-bad-crc", "corrupt", bytes(b), p422("corrupt-image"))
    raw8 = b"".join(b"\x00" + bytes([128] * 48) for _ in range(16))
    good = png_raw(16, 16, 8, 0, raw8)
    idat = good.index(b"IDAT")
    b = bytearray(good)
    b[idat + 8] ^= 0xFF  # a data byte of the critical IDAT chunk: CRC fails
    c.image_case("png-idat-bad-crc", "corrupt", bytes(b), p422("corrupt-image"))
    bad_z = PNG_MAGIC + ihdr(16, 16, 8, 0) + png_chunk(b"IDAT", b"\x78\x9c\xff\xff\xff\xff") + \
        png_chunk(b"IEND", b"")
    c.image_case("png-bad-zlib-stream", "corrupt", bad_z, p422("corrupt-image"))
    bad_f = b"".join(b"\x05" + bytes([128] * 16) for _ in range(16))  # filter type 5 (9.2)
    c.image_case("png-bad-filter-type", "corrupt", png_raw(16, 16, 8, 0, bad_f),
                 p422("corrupt-image"))
    c.image_case("png-bit-depth-3", "corrupt", png_raw(16, 16, 3, 0, raw8), p422("corrupt-image"))
    c.image_case("png-colour-type-5", "corrupt", png_raw(16, 16, 8, 5, raw8),
                 p422("corrupt-image"))
    c.image_case("png-palette-without-plte", "corrupt", png_raw(16, 16, 8, 3, b"".join(
        b"\x00" + bytes(16) for _ in range(16))), p422("corrupt-image"))
    c.image_case("png-no-idat", "corrupt", PNG_MAGIC + ihdr(16, 16, 8, 0) +
                 png_chunk(b"IEND", b""), p422("corrupt-image"))

    # ---- wrong magic numbers
    magic = {
        "gif87a": b"GIF87a" + bytes(64), "gif89a": b"GIF89a" + bytes(64),
        "bmp": b"BM" + bytes(64), "tiff-le": b"II*\x00" + bytes(64),
        "tiff-be": b"MM\x00*" + bytes(64), "webp": b"RIFF\x00\x00\x00\x00WEBPVP8 " + bytes(64),
        "heif": b"\x00\x00\x00\x18ftypheic" + bytes(64), "pdf": b"%PDF-1.4\n" + bytes(64),
        "elf": b"\x7fELF\x02\x01\x01" + bytes(64), "html": b"<!doctype html><p>hello</p>",
        "png-magic-one-byte-off": b"\x89PNG\r\n\x1a\x0b" + png_face[8:],
        "jpeg-soi-then-garbage": b"\xff\xd8\x00" + face[3:],
        "text": b"this is not an image",
    }
    for label, data in magic.items():
        c.image_case(f"magic-{label}", "wrong-magic", data, p422("unsupported-image"))
    c.image_case("jpeg-12-bit-precision", "wrong-magic", jpeg_patch_sof(face, precision=12),
                 p422("unsupported-image"))
    c.image_case("jpeg-lossless-sof3", "wrong-magic", jpeg_patch_sof(face, marker=0xC3),
                 p422("unsupported-image"))

    # ---- huge declared dimensions
    for w, h in [(65535, 65535), (16385, 100), (100, 16385), (16000, 16000), (8000, 6000)]:
        c.image_case(f"jpeg-sof-{w}x{h}", "huge-dimensions", jpeg_patch_sof(face, w=w, h=h),
                     p422("image-too-large"))
    c.image_case("jpeg-sof-0x0", "huge-dimensions", jpeg_patch_sof(face, w=0, h=0),
                 p422("corrupt-image"))
    c.image_case("jpeg-sof-6000x6000-data-for-250x250", "huge-dimensions",
                 jpeg_patch_sof(face, w=6000, h=6000), p422("corrupt-image"))
    tail = png_chunk(b"IDAT", zlib.compress(bytes(64))) + png_chunk(b"IEND", b"")
    for w, h in [(16385, 1), (1, 16385), (100000, 100000), (0x7FFFFFFF, 1), (16384, 16384),
                 (7000, 6000)]:
        c.image_case(f"png-ihdr-{w}x{h}", "huge-dimensions", PNG_MAGIC + ihdr(w, h, 8, 0) + tail,
                     p422("image-too-large"), part_ct="image/png")
    c.image_case("png-ihdr-2^31x1", "huge-dimensions", PNG_MAGIC + ihdr(0x80000000, 1, 8, 0) + tail,
                 p422("corrupt-image"), part_ct="image/png")
    c.image_case("png-ihdr-0x0", "huge-dimensions", PNG_MAGIC + ihdr(0, 0, 8, 0) + tail,
                 p422("corrupt-image"), part_ct="image/png")
    c.image_case("png-ihdr-20000x20000-as-reference", "huge-dimensions",
                 PNG_MAGIC + ihdr(20000, 20000, 8, 2) + tail, p422("image-too-large"),
                 where="reference-json")

    # ---- decompression bombs: a black picture, IDAT of zeros
    # Under the pixel budget (6000 x 6000 = 36 Mpx): the rows need 36 MB.
    # The exact one decodes (a black picture: no face). The other's IDAT
    # inflates to 1.5 GiB, far more than the rows: the decompressed data of
    # a PNG is exactly its filtered scanlines (PNG specification, section
    # 10.1 and 11.2.4), so the surplus makes the file damaged (corrupt-image,
    # README) -- and refusing it at the first surplus byte is also what keeps
    # a 16 MiB upload from costing a worker minutes of inflating.
    need = 6000 * 6000 + 6000
    exact = PNG_MAGIC + ihdr(6000, 6000, 8, 0) + png_chunk(b"IDAT", zeros_zlib(need)) + \
        png_chunk(b"IEND", b"")
    c.image_case("png-bomb-36mpx-exact", "bomb", exact, p422("no-face"), valid=True,
                 part_ct="image/png")
    c.image_case("png-bomb-36mpx-1.5GiB-idat", "bomb", png_bomb(6000, 6000, 24 * (64 << 20)),
                 p422("corrupt-image"), part_ct="image/png")
    # Over the budget: refused from IHDR before anything is inflated.
    big = png_bomb(16000, 16000, 24 * (64 << 20))
    c.image_case("png-bomb-256mpx-1.5GiB-idat", "bomb", big, p422("image-too-large"),
                 part_ct="image/png")
    # 16-bit RGBA, 6250 x 6250 = 39.06 Mpx: 312 MB of rows, a black picture.
    c.image_case("png-bomb-16-bit-rgba-39mpx", "bomb",
                 PNG_MAGIC + ihdr(6250, 6250, 16, 6) +
                 png_chunk(b"IDAT", zeros_zlib(6250 * (1 + 6250 * 8))) + png_chunk(b"IEND", b""),
                 p422("no-face"), valid=True, part_ct="image/png")

    # ---- progressive JPEG scan floods (a flat grey picture: no face)
    c.image_case("jpeg-progressive-400-scans", "scan-flood", jpeg_scan_flood(256, 256, 399),
                 p422("no-face"), valid=True)
    c.image_case("jpeg-progressive-2000-scans", "scan-flood", jpeg_scan_flood(256, 256, 1999),
                 p422("corrupt-image"))
    c.image_case("jpeg-progressive-20000-scans", "scan-flood", jpeg_scan_flood(1024, 1024, 19999),
                 p422("corrupt-image"))

    # ---- valid images of every kind: accepted (200) or a quality problem
    # that `likeness detect` also reports.
    rgba = fimg.convert("RGBA")
    a = np.asarray(rgba).copy()
    a[..., 3] = np.linspace(0, 255, a.shape[1], dtype=np.uint8)[None, :]
    pal = fimg.convert("P", palette=Image.ADAPTIVE, colors=256)
    pal_t = pal.copy()
    pal_t.info["transparency"] = 0
    exif = Image.Exif()
    exif[0x0112] = 3  # Orientation: rotated 180 degrees (EXIF 2.32, TIFF tag 274)
    valid = {
        "jpeg-cmyk": (jpeg_bytes(fimg.convert("CMYK"), quality=95), "image/jpeg"),
        "jpeg-grey": (jpeg_bytes(fimg.convert("L"), quality=95), "image/jpeg"),
        "jpeg-progressive": (jpeg_bytes(fimg, quality=95, progressive=True), "image/jpeg"),
        "jpeg-exif-orientation-3": (jpeg_bytes(fimg.rotate(180), quality=95, exif=exif.tobytes()),
                                    "image/jpeg"),
        "png-rgb-16-bit": (png_16bit_rgb(fimg), "image/png"),
        "png-grey-16-bit": (png_bytes(Image.fromarray(
            (np.asarray(fimg.convert("L"), dtype=np.uint16) * 257)).convert("I;16")), "image/png"),
        "png-rgba": (png_bytes(Image.fromarray(a, "RGBA")), "image/png"),
        "png-grey-alpha": (png_bytes(Image.fromarray(a, "RGBA").convert("LA")), "image/png"),
        "png-palette": (png_bytes(pal), "image/png"),
        "png-palette-trns": (png_bytes(pal_t), "image/png"),
        "jpeg-face-sent-as-image-png": (face, "image/png"),
        "png-face-sent-as-text-plain": (png_face, "text/plain"),
    }
    for label, (data, ct) in valid.items():
        c.image_case(f"valid-{label}", "valid", data, {"valid": True}, valid=True, part_ct=ct)
    c.image_case("valid-png-rgb-16-bit-in-enrolment", "valid", valid["png-rgb-16-bit"][0],
                 {"valid": True}, valid=True, where="enrol")
    c.image_case("valid-jpeg-cmyk-as-reference", "valid", valid["jpeg-cmyk"][0],
                 {"valid": True}, valid=True, where="reference-json")

    # ---- tiny, faceless and crowded pictures
    tiny = {
        "png-1x1": png_bytes(Image.new("RGB", (1, 1), (120, 90, 80))),
        "jpeg-1x1": jpeg_bytes(Image.new("RGB", (1, 1), (120, 90, 80))),
        "png-8x8": png_bytes(fimg.resize((8, 8))),
        "jpeg-8x8": jpeg_bytes(fimg.resize((8, 8))),
        "png-grey-1x1-1-bit": png_bytes(Image.new("1", (1, 1), 1)),
        "png-noise-256": png_bytes(Image.fromarray(
            np.random.default_rng(7).integers(0, 256, (256, 256, 3), dtype=np.uint8))),
        "jpeg-noise-640x480": jpeg_bytes(Image.fromarray(
            np.random.default_rng(8).integers(0, 256, (480, 640, 3), dtype=np.uint8))),
        "png-flat-grey-250": png_bytes(Image.new("L", (250, 250), 128)),
        "jpeg-black-250": jpeg_bytes(Image.new("RGB", (250, 250))),
        "png-white-250": png_bytes(Image.new("RGB", (250, 250), (255, 255, 255))),
    }
    for label, data in tiny.items():
        c.image_case(f"noface-{label}", "no-face", data, p422("no-face"), valid=True)
    c.image_case("face-shrunk-to-40px", "no-face", jpeg_bytes(fimg.resize((40, 40)), quality=95),
                 {"valid": True}, valid=True)
    # The whole 1927 Solvay photo: its 29 faces are 40-60 px, under the
    # engine's smallest face (10 % of the short side), so the answer is
    # whatever `likeness detect` says of it. Crops around the nearest pairs
    # and foursomes of its hand-checked faces (faces.csv), enlarged twice
    # (bicubic), hold several faces of a usable size: multiple-faces.
    solvay = open(SOLVAY, "rb").read()
    c.image_case("solvay-1927-whole-png", "several-faces", solvay, {"valid": True}, valid=True,
                 part_ct="image/png")
    simg = Image.open(SOLVAY).convert("RGB")
    with open(os.path.join(os.path.dirname(SOLVAY), "faces.csv")) as f:
        boxes = [tuple(int(v) for v in ln.split(",")) for ln in f.read().split()[1:]]

    def crop(group):
        x0 = min(b[0] for b in group) - 30
        y0 = min(b[1] for b in group) - 30
        x1 = max(b[0] + b[2] for b in group) + 30
        y1 = max(b[1] + b[3] for b in group) + 30
        im = simg.crop((x0, y0, x1, y1))
        return im.resize((im.width * 2, im.height * 2), Image.BICUBIC)

    def dist(a, b):
        return (a[0] - b[0]) ** 2 + (a[1] - b[1]) ** 2
    pairs = sorted(((a, b) for i, a in enumerate(boxes) for b in boxes[i + 1:]),
                   key=lambda ab: (dist(*ab), ab))
    c.image_case("solvay-1927-pair-0-png", "several-faces", png_bytes(crop(pairs[0])),
                 p422("multiple-faces"), valid=True, part_ct="image/png")
    c.image_case("solvay-1927-pair-1-jpeg-as-reference", "several-faces",
                 jpeg_bytes(crop(pairs[1]), quality=95), p422("multiple-faces"), valid=True,
                 where="reference-json")
    c.image_case("solvay-1927-pair-2-jpeg-in-enrolment", "several-faces",
                 jpeg_bytes(crop(pairs[2]), quality=95), p422("multiple-faces"), valid=True,
                 where="enrol")
    first = boxes[0]
    four = sorted(boxes, key=lambda b: (dist(b, first), b))[:4]
    c.image_case("solvay-1927-four-faces-jpeg", "several-faces",
                 jpeg_bytes(crop(four), quality=95), p422("multiple-faces"), valid=True)

    # ---- content types
    pair = c.mp([("probe", face, "p.jpg", "image/jpeg"), ("reference", face2, "r.jpg",
                                                         "image/jpeg")])
    for label, ct in [("text-plain", "text/plain"), ("application-xml", "application/xml"),
                      ("form-urlencoded", "application/x-www-form-urlencoded"),
                      ("multipart-mixed", f"multipart/mixed; boundary={BOUNDARY}"),
                      ("image-jpeg", "image/jpeg"), ("application-jsonx", "application/jsonx"),
                      ("empty", "")]:
        c.add(f"ctype-{label}", "content-type", dict(status=415, type="unsupported-media-type"),
              ctype=ct, body=pair)
    c.add("ctype-missing", "content-type", dict(status=415, type="unsupported-media-type"),
          ctype=None, body=pair)
    c.add("ctype-json-with-multipart-body", "content-type", p400(), ctype="application/json",
          body=pair)
    c.add("ctype-missing-on-enrolment", "content-type",
          dict(status=415, type="unsupported-media-type"), path="/v1/templates", ctype=None,
          body=pair)

    # ---- broken multipart
    c.add("multipart-no-boundary-parameter", "multipart", p400(), ctype="multipart/form-data",
          body=pair)
    c.add("multipart-empty-boundary", "multipart", p400(), ctype="multipart/form-data; boundary=",
          body=pair)
    c.add("multipart-boundary-71-chars", "multipart", p400(),
          ctype="multipart/form-data; boundary=" + "b" * 71,
          body=c.mp([("probe", face, "p", None), ("reference", face2, "r", None)], "b" * 71))
    c.add("multipart-unterminated-quoted-boundary", "multipart", p400(),
          ctype=f'multipart/form-data; boundary="{BOUNDARY}', body=pair)
    c.add("multipart-other-boundary-in-body", "multipart", p400(),
          ctype="multipart/form-data; boundary=notthisone", body=pair)
    c.add("multipart-no-closing-delimiter", "multipart", p400(), ctype=c.MPCT,
          body=pair[:-(len(BOUNDARY) + 6)])
    c.add("multipart-truncated-in-image", "multipart", p400(), ctype=c.MPCT,
          body=pair[:len(pair) // 3])
    c.add("multipart-preamble-only", "multipart", p400(), ctype=c.MPCT, body=b"just a preamble\r\n")
    c.add("multipart-empty-body", "multipart", p400(), ctype=c.MPCT, body=b"")
    c.add("multipart-part-without-disposition", "multipart", p400(), ctype=c.MPCT,
          body=f"--{BOUNDARY}\r\nContent-Type: image/jpeg\r\n\r\n".encode() + face +
          f"\r\n--{BOUNDARY}--\r\n".encode())
    c.add("multipart-disposition-without-name", "multipart", p400(), ctype=c.MPCT,
          body=f'--{BOUNDARY}\r\nContent-Disposition: form-data; filename="p.jpg"\r\n\r\n'.encode()
          + face + f"\r\n--{BOUNDARY}--\r\n".encode())
    c.add("multipart-40-parts", "multipart", p400(), ctype=c.MPCT,
          body=c.mp([("probe", face, "p", None)] + [("x%d" % i, b"1", None, None)
                                                    for i in range(40)]))
    c.add("multipart-8kb-part-header", "multipart", p400(), ctype=c.MPCT,
          body=f"--{BOUNDARY}\r\nContent-Disposition: form-data; name=\"probe\"\r\nX-Pad: "
          .encode() + b"a" * 8192 + b"\r\n\r\n" + face + f"\r\n--{BOUNDARY}--\r\n".encode())
    c.add("multipart-lf-line-endings", "multipart", p400(), ctype=c.MPCT,
          body=pair.replace(b"\r\n", b"\n"))
    c.add("multipart-probe-twice", "multipart", p400("probe"), ctype=c.MPCT,
          body=c.mp([("probe", face, "p", None), ("probe", face, "p", None),
                     ("reference", face2, "r", None)]))
    c.add("multipart-unknown-field", "multipart", p400(), ctype=c.MPCT,
          body=c.mp([("probe", face, "p", None), ("reference", face2, "r", None),
                     ("debug", b"1", None, None)]))

    # ---- missing and bad fields
    c.add("verify-no-probe", "missing-field", p400("probe"), ctype=c.MPCT,
          body=c.mp([("reference", face2, "r", None)]))
    c.add("verify-no-reference", "missing-field", p400("reference"), ctype=c.MPCT,
          body=c.mp([("probe", face, "p", None)]))
    c.add("verify-reference-and-template", "missing-field", p400("template_id"), ctype=c.MPCT,
          body=c.mp([("probe", face, "p", None), ("reference", face2, "r", None),
                     ("template_id", TID_PLACEHOLDER, None, None)]))
    c.add("verify-json-empty-object", "missing-field", p400("probe"), ctype="application/json",
          body=b"{}")
    c.add("enrol-no-image", "missing-field", p400("image"), path="/v1/templates", ctype=c.MPCT,
          body=c.mp([("subject_ref", b"v-1", None, None)]))
    c.add("enrol-json-images-empty", "missing-field", p400("images"), path="/v1/templates",
          ctype="application/json", body=b'{"images":[]}')
    c.add("enrol-json-images-not-array", "missing-field", p400("images"), path="/v1/templates",
          ctype="application/json", body=json.dumps({"images": base64.b64encode(face).decode()})
          .encode())
    c.add("enrol-11-images", "missing-field", p400("image"), path="/v1/templates", ctype=c.MPCT,
          body=c.mp([("image", face, "i", None)] * 11))
    b64face = base64.b64encode(face).decode()
    for label, val in [("number", 1), ("null", None), ("object", {"a": 1}), ("array", [b64face])]:
        c.add(f"verify-json-probe-{label}", "missing-field", p400("probe"),
              ctype="application/json", body=json.dumps({"probe": val, "reference": b64face})
              .encode())
    for label, val in [("zero", "0"), ("one", "1"), ("negative", "-0.1"), ("nan", "nan"),
                       ("inf", "inf"), ("hex-float", "0x1p-4"), ("trailing-junk", "0.01x"),
                       ("below-smallest-point", "1e-9"), ("empty", "")]:
        c.add(f"verify-target-fmr-{label}", "missing-field", p400("target_fmr"), ctype=c.MPCT,
              body=c.mp([("probe", face, "p", None), ("reference", face2, "r", None),
                         ("target_fmr", val.encode(), None, None)]))
    for label, val in [("zero", 0), ("string", "0.01"), ("huge-exponent", "1e400")]:
        raw = ('{"probe":"%s","reference":"%s","target_fmr":%s}' %
               (b64face, b64face, val if label != "string" else '"0.01"')).encode()
        c.add(f"verify-json-target-fmr-{label}", "missing-field", p400("target_fmr"),
              ctype="application/json", body=raw)
    for label, val in [("zero", "0"), ("negative", "-5"), ("fraction", "1.5"),
                       ("huge", "99999999999999999999999"), ("text", "soon")]:
        c.add(f"enrol-ttl-{label}", "missing-field", p400("ttl_seconds"), path="/v1/templates",
              ctype=c.MPCT, body=c.mp([("image", face, "i", None),
                                       ("ttl_seconds", val.encode(), None, None)]))
    c.add("enrol-json-ttl-1e400", "missing-field", p400("ttl_seconds"), path="/v1/templates",
          ctype="application/json", body=('{"images":["%s"],"ttl_seconds":1e400}' % b64face)
          .encode())

    # ---- invalid base64
    for label, val in [("bang", "!!!!"), ("no-padding", b64face.rstrip("=")[:-1]),
                       ("url-alphabet", b64face.replace("+", "-").replace("/", "_")
                        if ("+" in b64face or "/" in b64face) else "-_-_"),
                       ("line-breaks", base64.encodebytes(face).decode()),
                       ("spaces", " " + b64face), ("padding-in-middle", "QQ==" + b64face),
                       ("data-uri", "data:image/jpeg;base64," + b64face)]:
        c.add(f"base64-{label}", "base64", p400("probe"), ctype="application/json",
              body=json.dumps({"probe": val, "reference": b64face}).encode())
    # A NUL escape after a complete base64 image: the string as a whole is
    # not base64 (RFC 4648 section 4), whatever a C string would see.
    c.add("base64-nul-escape-then-junk", "base64", p400("probe"), ctype="application/json",
          body=('{"probe":"%s\\u0000!!junk","reference":"%s"}' % (b64face, b64face)).encode())

    # ---- JSON structure
    c.add("json-nested-arrays-100k", "json", p400(), ctype="application/json",
          body=b"[" * 100000 + b"]" * 100000)
    c.add("json-nested-objects-100k", "json", p400(), ctype="application/json",
          body=b'{"probe":' * 100000 + b"1" + b"}" * 100000)
    c.add("json-unclosed-100k", "json", p400(), ctype="application/json", body=b"[" * 100000)
    c.add("json-100k-keys", "json", p400(), ctype="application/json",
          body=("{" + ",".join('"k%d":%d' % (i, i) for i in range(100000)) + "}").encode())
    c.add("json-100k-images", "json", p400("images"), path="/v1/templates",
          ctype="application/json", body=b'{"images":[' + b",".join([b'"QUJD"'] * 100000) + b"]}")
    c.add("json-top-level-array", "json", p400(), ctype="application/json", body=b"[]")
    c.add("json-trailing-garbage", "json", p400(), ctype="application/json",
          body=b'{"probe":"QUJD"} x')
    c.add("json-truncated", "json", p400(), ctype="application/json",
          body=json.dumps({"probe": b64face, "reference": b64face}).encode()[:5000])

    # ---- invalid UTF-8 (RFC 3629) in JSON and in subject_ref
    for label, bad in [("lone-continuation", b"\x80"), ("ff-byte", b"\xff"),
                       ("overlong-slash", b"\xc0\xaf"), ("utf16-surrogate", b"\xed\xa0\x80"),
                       ("over-u10ffff", b"\xf4\x90\x80\x80"), ("truncated-3-byte", b"\xe2\x82")]:
        c.add(f"json-invalid-utf8-{label}", "utf8", p400(), path="/v1/templates",
              ctype="application/json",
              body=b'{"images":["' + b64face.encode() + b'"],"subject_ref":"v' + bad + b'"}')
        c.add(f"subject-ref-invalid-utf8-{label}", "utf8", p400("subject_ref"),
              path="/v1/templates", ctype=c.MPCT,
              body=c.mp([("image", face, "i", None), ("subject_ref", b"v" + bad, None, None)]))
    c.add("json-lone-surrogate-escape", "utf8", p400(), path="/v1/templates",
          ctype="application/json",
          body=('{"images":["%s"],"subject_ref":"\\udc00"}' % b64face).encode())
    c.add("subject-ref-256-bytes", "utf8", p400("subject_ref"), path="/v1/templates",
          ctype=c.MPCT, body=c.mp([("image", face, "i", None),
                                   ("subject_ref", "é".encode() * 128, None, None)]))
    c.add("subject-ref-nul-multipart", "utf8", p400("subject_ref"), path="/v1/templates",
          ctype=c.MPCT, body=c.mp([("image", face, "i", None),
                                   ("subject_ref", b"visitor\x00-42", None, None)]))
    c.add("subject-ref-nul-escape-json", "utf8", {"subject_ref_roundtrip": True},
          path="/v1/templates", ctype="application/json",
          body=('{"images":["%s"],"subject_ref":"visitor\\u0000-42"}' % b64face).encode(),
          check_subject_ref="visitor\u0000-42")
    c.add("subject-ref-255-bytes-multibyte", "utf8", {"subject_ref_roundtrip": True},
          path="/v1/templates", ctype=c.MPCT,
          body=c.mp([("image", face, "i", None),
                     ("subject_ref", ("€" * 85).encode(), None, None)]),
          check_subject_ref="€" * 85)

    # ---- template ids in the path (GET and DELETE) and in bodies
    weird = {
        "unknown-well-formed": ("0123456789abcdef0123456789abcdef", True),
        "uppercase-hex": ("0123456789ABCDEF0123456789ABCDEF", False),
        "31-chars": ("0123456789abcdef0123456789abcde", False),
        "33-chars": ("0123456789abcdef0123456789abcdef0", False),
        "traversal-encoded": ("..%2F..%2Fetc%2Fpasswd", False),
        "traversal-plain": ("../../etc/passwd", False),
        "sql": ("1'%20OR%20'1'='1", False),
        "nul": ("%00", False),
        "10kb": ("a" * 10240, False),
        "dot-dot-encoded": ("%2e%2e", False),
        "invalid-utf8": ("%FF%FE", False),
        "known-then-nul": ("{tid}%00", False),
        "known-then-nul-traversal": ("{tid}%00..%2F..%2Fetc%2Fpasswd", False),
        "known-then-slash": ("{tid}/", False),
        "known-then-query-like": ("{tid}%3Fx=1", False),
    }
    for label, (tid, member) in weird.items():
        for method in ("GET", "DELETE"):
            c.add(f"path-template-{label}-{method.lower()}", "template-id",
                  dict(status=404, type="template-not-found", template_id_member=member),
                  method=method, path="/v1/templates/" + tid, body=None)
    for label, val in [("traversal", b"../../etc/passwd"), ("sql", b"1' OR '1'='1"),
                       ("nul", b"\x00" * 32), ("known-then-nul", TID_PLACEHOLDER + b"\x00"),
                       ("10kb", b"a" * 10240), ("uppercase", b"0123456789ABCDEF0123456789ABCDEF"),
                       ("invalid-utf8", b"\xff" * 32)]:
        c.add(f"body-template-id-{label}", "template-id", p400("template_id"), ctype=c.MPCT,
              body=c.mp([("probe", face, "p", None), ("template_id", val, None, None)]))
    c.add("body-template-id-unknown", "template-id",
          dict(status=404, type="template-not-found", template_id_member=True), ctype=c.MPCT,
          body=c.mp([("probe", face, "p", None),
                     ("template_id", b"fedcba9876543210fedcba9876543210", None, None)]))
    for label, val in [("traversal", "../../etc/passwd"), ("sql", "1' OR '1'='1"),
                       ("number", 12345)]:
        c.add(f"json-template-id-{label}", "template-id", p400("template_id"),
              ctype="application/json",
              body=json.dumps({"probe": b64face, "template_id": val}).encode())
    c.add("json-template-id-known-then-nul-escape", "template-id", p400("template_id"),
          ctype="application/json",
          body=b'{"probe":"' + b64face.encode() + b'","template_id":"' + TID_PLACEHOLDER +
          b'\\u0000"}')

    # ---- authentication and scopes
    for label in ["none", "basic", "empty-bearer", "garbage", "unknown-id", "wrong-secret",
                  "long"]:
        c.add(f"auth-{label}", "auth", dict(status=401, type="unauthorised"), auth=label,
              ctype=c.MPCT, body=pair)
    c.add("auth-none-on-template", "auth", dict(status=401, type="unauthorised"), auth="none",
          method="GET", path="/v1/templates/{tid}")
    c.add("scope-verify-only-enrols", "auth", dict(status=403, type="forbidden",
                                                   required_scope="enrol"),
          auth="verify", path="/v1/templates", ctype=c.MPCT,
          body=c.mp([("image", face, "i", None)]))
    c.add("scope-verify-only-deletes", "auth", dict(status=403, type="forbidden",
                                                    required_scope="delete"),
          auth="verify", method="DELETE", path="/v1/templates/{tid}")
    c.add("scope-verify-only-reads-audit", "auth", dict(status=403, type="forbidden",
                                                        required_scope="audit"),
          auth="verify", method="GET", path="/v1/audit/records")

    # ---- methods and routes
    for method, path, allow in [("GET", "/v1/verifications", "POST"),
                                ("PUT", "/v1/verifications", "POST"),
                                ("DELETE", "/v1/verifications", "POST"),
                                ("PUT", "/v1/templates", "POST"),
                                ("POST", "/v1/templates/{tid}", "GET, DELETE"),
                                ("PATCH", "/v1/templates/{tid}", "GET, DELETE"),
                                ("DELETE", "/v1/model", "GET"), ("POST", "/healthz", "GET"),
                                ("TRACE", "/metrics", "GET"), ("OPTIONS", "/v1/model", "GET"),
                                ("FROB", "/v1/audit/records", "GET")]:
        slug = path.strip("/").replace("/", "-").replace("{", "").replace("}", "")
        c.add(f"method-{method.lower()}-{slug}", "method",
              dict(status=405, type="method-not-allowed", allow=allow), method=method, path=path)
    for path in ["/v1/verifications/", "/v2/verifications", "/v1", "/etc/passwd",
                 "/v1/../../etc/passwd", "/v1/verifications%00"]:
        c.add("route-" + path.strip("/").replace("/", "-").replace("%", "pct"), "route",
              dict(status=404, type="not-found"), method="GET", path=path)

    # ---- oversize (max_body_bytes = 2 MiB in the test's configuration)
    big = c.mp([("probe", face, "p", None), ("reference", face2, "r", None),
                ("pad", b"x" * (2 * 1024 * 1024 + 1), None, None)])
    c.add("oversize-content-length", "oversize", dict(status=413, type="payload-too-large",
                                                      limit_bytes=2 * 1024 * 1024),
          ctype=c.MPCT, body=big, send="headers-first")
    c.add("oversize-chunked", "oversize", dict(status=413, type="payload-too-large",
                                               limit_bytes=2 * 1024 * 1024),
          ctype=c.MPCT, body=big, send="chunked")
    c.add("oversize-declared-1e18", "oversize", dict(status=413, type="payload-too-large",
                                                     limit_bytes=2 * 1024 * 1024),
          ctype=c.MPCT, body=None, send="headers-first",
          headers={"Content-Length": "1000000000000000000"})
    c.add("oversize-json-base64", "oversize", dict(status=413, type="payload-too-large",
                                                   limit_bytes=2 * 1024 * 1024),
          ctype="application/json", body=json.dumps(
              {"probe": base64.b64encode(bytes(1600 * 1024)).decode(), "reference": b64face})
          .encode(), send="headers-first")
    c.add("oversize-enrolment-unauthenticated", "oversize",
          dict(status=413, type="payload-too-large", limit_bytes=2 * 1024 * 1024),
          auth="none", path="/v1/templates", ctype=c.MPCT, body=big, send="headers-first")
    just = c.mp([("probe", face, "p", None), ("reference", face2, "r", None)])
    pad = 2 * 1024 * 1024 - len(just) - 200
    at_limit = c.mp([("probe", face, "p", None), ("reference", face2, "r", None),
                     ("pad", b"x" * pad, None, None)])
    assert len(at_limit) <= 2 * 1024 * 1024
    c.add("under-limit-with-unknown-pad-field", "oversize", p400(), ctype=c.MPCT, body=at_limit)

    with open(os.path.join(out, "cases.json"), "w") as f:
        json.dump(c.cases, f, indent=1)
    return c.cases


if __name__ == "__main__":
    if len(sys.argv) != 2:
        sys.exit("usage: make_corpus.py OUTDIR")
    cases = build(sys.argv[1])
    kinds = {}
    for k in cases:
        kinds[k["kind"]] = kinds.get(k["kind"], 0) + 1
    print(f"{len(cases)} cases:", ", ".join(f"{k} {v}" for k, v in kinds.items()))
