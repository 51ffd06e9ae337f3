#!/usr/bin/python3
"""Checks lk_image_decode (through bin/lkt_image_decode) against Pillow 9.4,
OpenCV 4.6 and scikit-image 0.19 as Debian ships them.

References, beside each check below:
- decoded pixels: Pillow's Image.open(...).convert('RGB') (Debian's Pillow
  links libjpeg62-turbo and libpng16, so equal pixels are expected; the
  tolerance asked for is +-1 per channel and the measured maximum is printed);
  OpenCV's imread(IMREAD_COLOR) for 16-bit PNG;
- EXIF orientation: Pillow's ImageOps.exif_transpose;
- errors: the documented error codes of include/likeness/image.h on files
  cut, damaged or with hand-built headers (PNG chunk CRCs by zlib.crc32, as
  the PNG specification's CRC-32; JPEG frame header per ITU-T T.81 B.2.2);
- grayscale: cv2.cvtColor(COLOR_RGB2GRAY) exactly, skimage.color.rgb2gray
  within 1e-12.

Exit 0 when all pass, 1 on any failure, 77 (skipped, loudly) when the shared
data is absent and everything else passed.
"""
import glob
import os
import shutil
import struct
import subprocess
import sys
import tempfile
import time
import zlib

import cv2
import numpy as np
from PIL import Image, ImageOps
from skimage.color import rgb2gray

BIN = os.environ.get("LIKENESS_BIN", "")
TOOL = os.path.join(BIN, "lkt_image_decode")
SHARED = os.environ.get("LIKENESS_SHARED", "")

passed = 0
failed = 0
skipped_inputs = []
max_diff = {"jpeg": 0, "png": 0, "exif": 0, "lfw": 0}


def check(cond, what):
    global passed, failed
    if cond:
        passed += 1
    else:
        failed += 1
        print("FAIL:", what, flush=True)


def read_pnm(path):
    with open(path, "rb") as f:
        data = f.read()
    magic, dims, maxval, rest = data.split(b"\n", 3)
    w, h = map(int, dims.split())
    assert maxval == b"255"
    ch = 3 if magic == b"P6" else 1
    a = np.frombuffer(rest, dtype=np.uint8)
    assert a.size == w * h * ch, (a.size, w, h, ch)
    return a.reshape(h, w, ch) if ch == 3 else a.reshape(h, w)


def read_f64(path):
    with open(path, "rb") as f:
        data = f.read()
    head, rest = data.split(b"\n", 1)
    _, w, h = head.split()
    return np.frombuffer(rest, dtype="<f8").reshape(int(h), int(w))


def decode(path, *opts):
    """Returns (code_name, array); code_name is 'ok' on success."""
    out = path + ".out"
    p = subprocess.run([TOOL, *opts, path, out], capture_output=True, timeout=300)
    if p.returncode == 0:
        if "--gray709-f64" in opts:
            a = read_f64(out)
        else:
            a = read_pnm(out)
        os.unlink(out)
        return "ok", a
    err = p.stderr.decode(errors="replace").strip()
    if p.returncode == 2:
        return err.split(":", 1)[0], err
    return "tool_failure(%d)" % p.returncode, err


def compare(kind, name, path, ref, tol=1):
    code, ours = decode(path)
    if code != "ok":
        check(False, "%s: decoding failed: %s" % (name, ours))
        return None
    if ours.shape != ref.shape:
        check(False, "%s: shape %s, reference %s" % (name, ours.shape, ref.shape))
        return None
    d = int(np.abs(ours.astype(int) - ref.astype(int)).max()) if ours.size else 0
    max_diff[kind] = max(max_diff[kind], d)
    print("  %-40s %5dx%-5d max |diff| = %d" % (name, ref.shape[1], ref.shape[0], d))
    check(d <= tol, "%s: max difference %d > %d" % (name, d, tol))
    return ours


def expect_code(name, path, want, *opts):
    t0 = time.monotonic()
    code, msg = decode(path, *opts)
    dt = time.monotonic() - t0
    print("  %-40s -> %-18s (%.2f s)" % (name, code, dt))
    check(code == want, "%s: got %s, expected %s (%s)" % (name, code, want,
                                                      msg if code != "ok" else ""))
    if code == want and code != "ok":
        # Messages must say what to do, not just what went wrong.
        check(len(msg) > len(want) + 20, "%s: message too short: %r" % (name, msg))


def synth(h, w, seed):
    """Smooth gradients, texture, noise and an off-centre block: natural enough
    for JPEG to work on, and asymmetric so every flip and rotation differs."""
    rng = np.random.default_rng(seed)
    y, x = np.mgrid[0:h, 0:w].astype(float)
    img = np.stack([x * 255 / max(w - 1, 1), y * 255 / max(h - 1, 1),
                    128 + 100 * np.sin(x / 5.0) * np.cos(y / 7.0)], -1)
    img += rng.normal(0, 12, (h, w, 3))
    img[h // 8:h // 3 + 1, w // 10:w // 2 + 1] = [230, 40, 40]
    return np.clip(img, 0, 255).astype(np.uint8)


def png_chunk(ctype, data):
    # PNG spec 5.3: length, type, data, CRC-32 over type and data.
    return struct.pack(">I", len(data)) + ctype + data + struct.pack(">I", zlib.crc32(ctype + data))


PNG_SIG = b"\x89PNG\r\n\x1a\n"


def png_adam7(a):
    """8-bit RGB PNG, interlaced with Adam7 (PNG spec 8.2), filter type 0 on
    every row: Pillow and OpenCV cannot write interlaced PNG."""
    h, w, _ = a.shape
    raw = b""
    # (x0, y0, dx, dy) of the seven passes, PNG spec 8.2.
    for x0, y0, dx, dy in [(0, 0, 8, 8), (4, 0, 8, 8), (0, 4, 4, 8), (2, 0, 4, 4),
                           (0, 2, 2, 4), (1, 0, 2, 2), (0, 1, 1, 2)]:
        sub = a[y0::dy, x0::dx]
        if sub.shape[0] == 0 or sub.shape[1] == 0:
            continue
        for row in sub:
            raw += b"\x00" + row.tobytes()
    ihdr = struct.pack(">IIBBBBB", w, h, 8, 2, 0, 0, 1)
    return PNG_SIG + png_chunk(b"IHDR", ihdr) + png_chunk(b"IDAT", zlib.compress(raw)) + \
        png_chunk(b"IEND", b"")


def png_header_only(w, h):
    ihdr = struct.pack(">IIBBBBB", w, h, 8, 2, 0, 0, 0)
    return PNG_SIG + png_chunk(b"IHDR", ihdr) + png_chunk(b"IEND", b"")


def jpeg_segments(data):
    """(marker, offset of marker) for the segments before SOS (T.81 B.1.1)."""
    pos, out = 2, []
    while pos + 4 <= len(data):
        assert data[pos] == 0xFF
        m = data[pos + 1]
        out.append((m, pos))
        if m == 0xDA:
            break
        pos += 2 + struct.unpack(">H", data[pos + 2:pos + 4])[0]
    return out


def jpeg_patch_sof(data, w=None, h=None, precision=None):
    """Rewrites the frame header (T.81 B.2.2: Lf, P, Y, X, Nf, ...)."""
    b = bytearray(data)
    for m, off in jpeg_segments(data):
        if m in (0xC0, 0xC1, 0xC2):
            if precision is not None:
                b[off + 4] = precision
            if h is not None:
                b[off + 5:off + 7] = struct.pack(">H", h)
            if w is not None:
                b[off + 7:off + 9] = struct.pack(">H", w)
            return bytes(b)
    raise AssertionError("no SOF")


def write(path, data):
    with open(path, "wb") as f:
        f.write(data)
    return path


def main():
    if not os.access(TOOL, os.X_OK):
        print("FAIL: %s is not built (set LIKENESS_BIN, build lkt_image_decode)" % TOOL)
        return 1
    tmp = tempfile.mkdtemp(prefix="lk_image_")
    try:
        return run_checks(tmp)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


def run_checks(tmp):
    rgb = synth(157, 203, 1)  # odd sides exercise chroma edge handling
    rgb_even = synth(192, 256, 2)

    # ---- JPEG variants vs Pillow ------------------------------------------
    print("JPEG vs Pillow convert('RGB'):")
    jpeg_cases = [
        ("baseline 4:2:0 q90 odd size", rgb, dict(quality=90, subsampling=2)),
        ("baseline 4:2:0 q50", rgb_even, dict(quality=50, subsampling=2)),
        ("baseline 4:2:2", rgb, dict(quality=90, subsampling=1)),
        ("baseline 4:4:4", rgb, dict(quality=95, subsampling=0)),
        ("progressive 4:2:0", rgb, dict(quality=85, progressive=True, subsampling=2)),
        ("progressive 4:4:4", rgb_even, dict(quality=85, progressive=True, subsampling=0)),
        ("optimized Huffman", rgb, dict(quality=80, optimize=True)),
        ("1x1", rgb[:1, :1], dict(quality=90)),
        ("17x9", rgb[:9, :17], dict(quality=90)),
    ]
    for name, arr, kw in jpeg_cases:
        p = os.path.join(tmp, "j_%s.jpg" % name.replace(" ", "_").replace(":", ""))
        Image.fromarray(arr, "RGB").save(p, "JPEG", **kw)
        compare("jpeg", name, p, np.asarray(Image.open(p).convert("RGB")))
    p = os.path.join(tmp, "j_gray.jpg")
    Image.fromarray(rgb[..., 1], "L").save(p, "JPEG", quality=90)
    compare("jpeg", "grayscale", p, np.asarray(Image.open(p).convert("RGB")))
    p = os.path.join(tmp, "j_gray_prog.jpg")
    Image.fromarray(rgb_even[..., 0], "L").save(p, "JPEG", quality=90, progressive=True)
    compare("jpeg", "grayscale progressive", p, np.asarray(Image.open(p).convert("RGB")))
    # Pillow writes CMYK JPEGs with an Adobe APP14 marker and inverted samples.
    cmyk = np.concatenate([rgb, rgb[..., :1] // 2], -1)
    p = os.path.join(tmp, "j_cmyk.jpg")
    Image.fromarray(cmyk, "CMYK").save(p, "JPEG", quality=90)
    check(Image.open(p).mode == "CMYK", "Pillow did not write a CMYK JPEG")
    compare("jpeg", "CMYK (Adobe inverted)", p, np.asarray(Image.open(p).convert("RGB")))

    # YCCK: made by TurboJPEG through lkt_image_ycck (Pillow cannot write it).
    ycck_tool = os.path.join(BIN, "lkt_image_ycck")
    raw = os.path.join(tmp, "cmyk.raw")
    write(raw, cmyk.tobytes())
    p = os.path.join(tmp, "j_ycck.jpg")
    ok = os.access(ycck_tool, os.X_OK)
    check(ok, "%s is not built" % ycck_tool)
    if ok:
        r = subprocess.run([ycck_tool, raw, str(cmyk.shape[1]), str(cmyk.shape[0]), "90", p],
                           capture_output=True, timeout=120)
        ok = r.returncode == 0
        check(ok, "lkt_image_ycck failed: %r" % r.stderr)
    if ok:
        data = open(p, "rb").read()
        # Adobe APP14 (0xFFEE): "Adobe", version, flags0, flags1, transform;
        # transform 2 means YCCK (Adobe Technical Note 5116).
        app14 = [off for m, off in jpeg_segments(data) if m == 0xEE]
        check(len(app14) == 1 and data[app14[0] + 4:app14[0] + 9] == b"Adobe" and
              data[app14[0] + 15] == 2, "lkt_image_ycck did not write a YCCK JPEG")
        compare("jpeg", "YCCK (Adobe inverted)", p, np.asarray(Image.open(p).convert("RGB")))

    # ---- PNG variants vs Pillow / OpenCV ----------------------------------
    print("PNG vs Pillow convert('RGB') (alpha dropped) and OpenCV:")
    rng = np.random.default_rng(3)
    alpha = rng.integers(0, 256, rgb.shape[:2], dtype=np.uint8)
    png_cases = [
        ("RGB", Image.fromarray(rgb, "RGB")),
        ("RGBA", Image.fromarray(np.dstack([rgb, alpha]), "RGBA")),
        ("gray", Image.fromarray(rgb[..., 2], "L")),
        ("gray+alpha", Image.fromarray(np.dstack([rgb[..., 0], alpha]), "LA")),
        ("palette", Image.fromarray(rgb, "RGB").quantize(64)),
        ("1-bit", Image.fromarray(rgb[..., 0] > 128)),
    ]
    for name, im in png_cases:
        p = os.path.join(tmp, "p_%s.png" % name.replace(" ", "_").replace("+", "_"))
        im.save(p)
        compare("png", name, p, np.asarray(Image.open(p).convert("RGB")))
    p = os.path.join(tmp, "p_palette_trns.png")
    Image.fromarray(rgb, "RGB").quantize(32).save(p, transparency=0)
    compare("png", "palette + tRNS", p, np.asarray(Image.open(p).convert("RGB")))
    # 16-bit: Pillow opens 16-bit gray as mode I (convert('RGB') would clip),
    # so the reference is its raw 16-bit samples' high byte, the reduction
    # libpng's png_set_strip_16 documents; OpenCV's imread(IMREAD_COLOR)
    # reduces the same way and is checked as well.
    g16 = (rgb[..., 1].astype(np.uint16) * 257 + rng.integers(0, 257, rgb.shape[:2])).astype(np.uint16)
    p = os.path.join(tmp, "p_gray16.png")
    Image.fromarray(g16, "I;16").save(p)
    raw = np.asarray(Image.open(p)).astype(np.int64)
    check(raw.max() > 255, "the 16-bit gray PNG does not hold 16-bit values")
    compare("png", "gray 16-bit vs Pillow >> 8", p, np.repeat((raw >> 8)[..., None], 3, -1))
    compare("png", "gray 16-bit vs OpenCV", p, cv2.imread(p, cv2.IMREAD_COLOR)[..., ::-1])
    rgb16 = (rgb.astype(np.uint16) * 257 + rng.integers(0, 257, rgb.shape)).astype(np.uint16)
    p = os.path.join(tmp, "p_rgb16.png")
    cv2.imwrite(p, rgb16[..., ::-1])
    compare("png", "RGB 16-bit (OpenCV-written)", p, np.asarray(Image.open(p).convert("RGB")))
    compare("png", "RGB 16-bit vs OpenCV", p, cv2.imread(p, cv2.IMREAD_COLOR)[..., ::-1])
    p = os.path.join(tmp, "p_rgba16.png")
    cv2.imwrite(p, np.dstack([rgb16, rgb16[..., :1]])[..., [2, 1, 0, 3]])
    compare("png", "RGBA 16-bit vs OpenCV", p, cv2.imread(p, cv2.IMREAD_COLOR)[..., ::-1])
    for shape in [(29, 37), (1, 1), (3, 10)]:
        a = rgb[:shape[0], :shape[1]].copy()
        p = write(os.path.join(tmp, "p_adam7_%dx%d.png" % shape), png_adam7(a))
        pil = Image.open(p)
        check(pil.info.get("interlace") == 1, "Pillow does not see the PNG as interlaced")
        compare("png", "interlaced %dx%d vs Pillow" % shape, p, np.asarray(pil.convert("RGB")),
                tol=0)
        compare("png", "interlaced %dx%d vs source" % shape, p, a, tol=0)

    # ---- EXIF orientation vs ImageOps.exif_transpose ----------------------
    print("EXIF orientation vs ImageOps.exif_transpose:")
    asym = synth(24, 40, 4)
    for fmt in ("JPEG", "PNG"):
        for o in list(range(1, 9)) + [9]:
            exif = Image.Exif()
            exif[0x0112] = o
            p = os.path.join(tmp, "o%d.%s" % (o, fmt.lower()))
            kw = dict(quality=95) if fmt == "JPEG" else {}
            Image.fromarray(asym, "RGB").save(p, fmt, exif=exif.tobytes(), **kw)
            im = Image.open(p)
            check(im.getexif().get(0x0112) == o, "%s orientation %d not stored" % (fmt, o))
            ref = np.asarray(ImageOps.exif_transpose(im).convert("RGB"))
            stored = np.asarray(Image.open(p).convert("RGB"))
            if 2 <= o <= 8:
                # The test could not fail if the transform were the identity.
                check(ref.shape != stored.shape or (ref != stored).any(),
                      "%s orientation %d: reference equals the stored image" % (fmt, o))
            compare("exif", "%s orientation %d" % (fmt, o), p, ref, tol=0)

    # ---- LFW and astronaut ------------------------------------------------
    print("shared data vs Pillow:")
    lfw = os.path.join(SHARED, "datasets/lfw/lfw-deepfunneled")
    astro = os.path.join(SHARED, "reference/hog/astronaut.png")
    lfw_files = []
    if os.path.isdir(lfw):
        people = sorted(os.listdir(lfw))
        for i in range(0, len(people), max(1, len(people) // 6)):
            fs = sorted(glob.glob(os.path.join(lfw, people[i], "*.jpg")))
            if fs:
                lfw_files.append(fs[0])
        for f in lfw_files:
            compare("lfw", os.path.basename(f), f, np.asarray(Image.open(f).convert("RGB")))
    else:
        skipped_inputs.append(lfw)
    if os.path.isfile(astro):
        compare("png", "astronaut.png", astro, np.asarray(Image.open(astro).convert("RGB")))
    else:
        skipped_inputs.append(astro)

    # ---- grayscale vs OpenCV and scikit-image -----------------------------
    print("grayscale:")
    cube = np.random.default_rng(5).integers(0, 256, (256, 256, 3), dtype=np.uint8)
    cube[0, :, :] = np.arange(256)[:, None]  # every gray level
    cube[1, :8] = [[0, 0, 0], [255, 255, 255], [255, 0, 0], [0, 255, 0], [0, 0, 255],
                   [255, 255, 0], [0, 255, 255], [255, 0, 255]]
    p_cube = os.path.join(tmp, "cube.png")
    Image.fromarray(cube, "RGB").save(p_cube)
    gray_inputs = [("random colours", p_cube), ("synthetic JPEG",
                                                os.path.join(tmp, "j_baseline_420_q90_odd_size.jpg"))]
    gray_inputs += [(os.path.basename(f), f) for f in lfw_files[:3]]
    if os.path.isfile(astro):
        gray_inputs.append(("astronaut.png", astro))
    for name, p in gray_inputs:
        code, ours_rgb = decode(p)
        if code != "ok":
            check(False, "%s: %s" % (name, ours_rgb))
            continue
        code, g = decode(p, "--gray601")
        ref = cv2.cvtColor(np.ascontiguousarray(ours_rgb), cv2.COLOR_RGB2GRAY)
        nd = int((g != ref).sum()) if code == "ok" else -1
        print("  %-40s BT.601 vs cv2 RGB2GRAY: %d pixels differ" % (name, nd))
        check(code == "ok" and nd == 0, "%s: BT.601 gray differs from OpenCV in %d pixels" % (name, nd))
        code, f = decode(p, "--gray709-f64")
        ref = rgb2gray(ours_rgb)
        d = float(np.abs(f - ref).max()) if code == "ok" else float("inf")
        print("  %-40s BT.709 f64 vs skimage rgb2gray: max |diff| = %.3g" % (name, d))
        check(d <= 1e-12, "%s: BT.709 gray differs from skimage by %g" % (name, d))

    # ---- truncated and damaged files --------------------------------------
    print("truncated and damaged files:")
    for src in ("j_baseline_420_q90_odd_size.jpg", "j_progressive_420.jpg"):
        data = open(os.path.join(tmp, src), "rb").read()
        sos = [off for m, off in jpeg_segments(data) if m == 0xDA][0]
        for cut in sorted({2, 3, 20, sos, sos + 20, len(data) // 2, len(data) - 100,
                           len(data) - 2, len(data) - 1}):
            p = write(os.path.join(tmp, "cut.jpg"), data[:cut])
            expect_code("%s cut at %d/%d" % (src[:14], cut, len(data)), p, "image_corrupt")
    data = open(os.path.join(tmp, "p_RGB.png"), "rb").read()
    for cut in (4, 8, 20, 33, 41, len(data) // 2, len(data) - 12, len(data) - 1):
        p = write(os.path.join(tmp, "cut.png"), data[:cut])
        expect_code("PNG cut at %d/%d" % (cut, len(data)), p, "image_corrupt")

    jdata = open(os.path.join(tmp, "j_baseline_420_q90_odd_size.jpg"), "rb").read()
    segs = dict((m, off) for m, off in jpeg_segments(jdata))
    b = bytearray(jdata)
    b[3] ^= 0xFF  # APP0 marker code 0xE0 -> 0x1F, not a marker T.81 allows
    expect_code("JPEG bad marker after SOI", write(os.path.join(tmp, "c1.jpg"), bytes(b)),
                "image_corrupt")
    b = bytearray(jdata)
    b[segs[0xC4] + 5:segs[0xC4] + 21] = b"\xff" * 16  # DHT code counts beyond 256 codes
    expect_code("JPEG bogus Huffman table", write(os.path.join(tmp, "c2.jpg"), bytes(b)),
                "image_corrupt")
    b = bytearray(jdata)
    b[segs[0xC0] + 9] = 0  # zero components in the frame header
    expect_code("JPEG frame with 0 components", write(os.path.join(tmp, "c3.jpg"), bytes(b)),
                "image_corrupt")
    g = np.random.default_rng(6).integers(0, 256, 600, dtype=np.uint8).tobytes()
    mid = (sos + len(jdata)) // 2
    expect_code("JPEG garbage in the scan",
                write(os.path.join(tmp, "c4.jpg"), jdata[:mid] + g + jdata[mid + len(g):]),
                "image_corrupt")
    expect_code("JPEG garbage after SOI", write(os.path.join(tmp, "c5.jpg"), b"\xff\xd8\xff" + g),
                "image_corrupt")
    # Policy (src/image/decode.c): any libjpeg warning is damage. Stray bytes
    # before a marker raise JWRN_EXTRANEOUS_DATA, which Pillow tolerates.
    b = jdata[:segs[0xC0]] + b"\x00\x01\x02" + jdata[segs[0xC0]:]
    Image.open(write(os.path.join(tmp, "c7.jpg"), b)).load()  # Pillow: fine
    expect_code("JPEG extraneous bytes before SOF", os.path.join(tmp, "c7.jpg"), "image_corrupt")
    expect_code("JPEG 12-bit frame", write(os.path.join(tmp, "c6.jpg"),
                                           jpeg_patch_sof(jdata, precision=12)),
                "image_unsupported")
    pdata = open(os.path.join(tmp, "p_RGB.png"), "rb").read()
    b = bytearray(pdata)
    b[18] ^= 0x01  # a width byte inside IHDR: CRC no longer matches
    expect_code("PNG flipped IHDR byte", write(os.path.join(tmp, "c1.png"), bytes(b)),
                "image_corrupt")
    ihdr = struct.pack(">IIBBBBB", 10, 10, 7, 2, 0, 0, 0)  # bit depth 7: not in PNG spec 11.2.2
    expect_code("PNG invalid bit depth (CRC ok)",
                write(os.path.join(tmp, "c2.png"), PNG_SIG + png_chunk(b"IHDR", ihdr) + pdata[33:]),
                "image_corrupt")
    b = bytearray(pdata)
    idat = pdata.index(b"IDAT")
    b[idat + 60] ^= 0x55  # inside IDAT data: chunk CRC fails
    expect_code("PNG flipped IDAT byte", write(os.path.join(tmp, "c3.png"), bytes(b)),
                "image_corrupt")
    expect_code("PNG without IDAT", write(os.path.join(tmp, "c4.png"), png_header_only(64, 64)),
                "image_corrupt")
    expect_code("random bytes", write(os.path.join(tmp, "g.bin"), g), "image_unsupported")
    expect_code("GIF header", write(os.path.join(tmp, "g.gif"), b"GIF89a" + g), "image_unsupported")
    p = os.path.join(tmp, "real.bmp")
    Image.fromarray(rgb, "RGB").save(p)
    expect_code("BMP file", p, "image_unsupported")
    expect_code("empty file", write(os.path.join(tmp, "empty.jpg"), b""), "image_corrupt")

    # ---- size limits from the header --------------------------------------
    print("size limits (checked on the header; times are for information only):")
    expect_code("PNG header 20000x20000",
                write(os.path.join(tmp, "big1.png"), png_header_only(20000, 20000)),
                "image_too_large")
    expect_code("PNG header 10000x5000 (50 MP)",
                write(os.path.join(tmp, "big2.png"), png_header_only(10000, 5000)),
                "image_too_large")
    expect_code("PNG header 16384x16384",
                write(os.path.join(tmp, "big3.png"), png_header_only(16384, 16384)),
                "image_too_large")
    expect_code("JPEG frame 20000x20000",
                write(os.path.join(tmp, "big1.jpg"), jpeg_patch_sof(jdata, 20000, 20000)),
                "image_too_large")
    expect_code("JPEG frame 10000x5000 (50 MP)",
                write(os.path.join(tmp, "big2.jpg"), jpeg_patch_sof(jdata, 10000, 5000)),
                "image_too_large")
    expect_code("JPEG frame 6000x6000 (36 MP), 10 kB of data",
                write(os.path.join(tmp, "big3.jpg"), jpeg_patch_sof(jdata, 6000, 6000)),
                "image_corrupt")
    # Configurable limits, on a 203x157 JPEG and a 256x192 PNG.
    pj = os.path.join(tmp, "j_baseline_420_q90_odd_size.jpg")
    pp = os.path.join(tmp, "p_RGB.png")
    expect_code("JPEG 203x157, max side 202", pj, "image_too_large", "--max-side", "202")
    expect_code("JPEG 203x157, max side 203", pj, "ok", "--max-side", "203")
    expect_code("JPEG 203x157, max pixels 31870", pj, "image_too_large", "--max-pixels", "31870")
    expect_code("JPEG 203x157, max pixels 31871", pj, "ok", "--max-pixels", "31871")
    expect_code("PNG 203x157, max side 202", pp, "image_too_large", "--max-side", "202")
    expect_code("PNG 203x157, max pixels 31870", pp, "image_too_large", "--max-pixels", "31870")
    expect_code("PNG 203x157, max pixels 31871", pp, "ok", "--max-pixels", "31871")

    print("measured max |ours - reference| per channel: " +
          ", ".join("%s %d" % kv for kv in max_diff.items()))
    print("%d passed, %d failed" % (passed, failed))
    if failed:
        return 1
    if skipped_inputs:
        print("SKIPPED: shared inputs missing: %s (set LIKENESS_SHARED)" % ", ".join(skipped_inputs))
        return 77
    return 0


if __name__ == "__main__":
    sys.exit(main())
