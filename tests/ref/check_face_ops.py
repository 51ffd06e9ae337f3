"""Building blocks of the detector against OpenCV 4.6 (Debian python3-opencv):
- bilinear resize: cv2.resize(INTER_LINEAR_EXACT), the call OpenCV's cascade
  search makes at every scale, must match bit for bit (down- and up-scaling,
  odd sizes, the exact-halving case);
- integral images: cv2.integral3 (sum, squared sum, 45-degree tilted sum)
  must match exactly (squared sums compared modulo 2^32, how we keep them);
- pixel-area shrink (used before the search on large inputs): within one
  grey level of cv2.resize(INTER_AREA), which computes the same box filter in
  single precision;
- grouping: cv2.groupRectangles(rects, min_neighbors, eps) on raw windows must
  give the same boxes and class sizes."""
import os
import subprocess
import sys
import tempfile

import cv2
import numpy as np

shared = os.environ.get("LIKENESS_SHARED", "../shared")
bindir = os.environ.get("LIKENESS_BIN", "build/bin")
tool = os.path.join(bindir, "lkt_face_detect")
solvay = os.path.join(shared, "reference", "solvay-1927", "1280px-Solvay_conference_1927.png")
for p in (tool, solvay):
    if not os.path.exists(p):
        print(f"SKIPPED: missing {p}", file=sys.stderr)
        sys.exit(77)

fails = 0
rng = np.random.default_rng(7)
with tempfile.TemporaryDirectory() as tmp:
    noise = rng.integers(0, 256, (37, 53), dtype=np.uint8)
    imgs = {"solvay": cv2.imread(solvay, cv2.IMREAD_GRAYSCALE), "noise": noise}
    for name, img in imgs.items():
        src = os.path.join(tmp, name + ".png")
        cv2.imwrite(src, img)
        h, w = img.shape
        sizes = [(round(w / 1.1 ** k), round(h / 1.1 ** k)) for k in range(1, 12)]
        sizes += [(w // 2, h // 2), (w * 2 + 1, h + 3), (w - 1, h // 3), (1, 1)]
        if w % 2 == 0 and h % 2 == 0:
            sizes.append((w // 2, h // 2))
        for dw, dh in sizes:
            out = os.path.join(tmp, "r.png")
            subprocess.run([tool, "--resize", src, str(dw), str(dh), out], check=True)
            mine = cv2.imread(out, cv2.IMREAD_GRAYSCALE)
            ref = cv2.resize(img, (dw, dh), interpolation=cv2.INTER_LINEAR_EXACT)
            bad = int(np.count_nonzero(mine != ref))
            if bad:
                print(f"FAIL resize {name} -> {dw}x{dh}: {bad} pixels differ")
                fails += 1
        print(f"resize {name}: {len(sizes)} sizes checked")
        for dw, dh in [(round(w / f), round(h / f)) for f in (1.3, 2.0, 2.7, 6.1)]:
            out = os.path.join(tmp, "a.png")
            subprocess.run([tool, "--resize-area", src, str(dw), str(dh), out], check=True)
            mine = cv2.imread(out, cv2.IMREAD_GRAYSCALE).astype(int)
            ref = cv2.resize(img, (dw, dh), interpolation=cv2.INTER_AREA).astype(int)
            worst = int(np.abs(mine - ref).max())
            if worst > 1:
                print(f"FAIL area resize {name} -> {dw}x{dh}: differs by up to {worst}")
                fails += 1
        print(f"area resize {name}: 4 sizes within 1 grey level of INTER_AREA")

        small = img if img.size < 5000 else img[300:420, 500:660]
        ssrc = os.path.join(tmp, name + "_s.png")
        cv2.imwrite(ssrc, small)
        binf = os.path.join(tmp, "int.bin")
        subprocess.run([tool, "--integral", ssrc, binf], check=True)
        raw = np.fromfile(binf, dtype="<i4")
        hh, ww = small.shape[0] + 1, small.shape[1] + 1
        s, sq, t = raw[:hh * ww].reshape(hh, ww), raw[hh * ww:2 * hh * ww].reshape(hh, ww), \
            raw[2 * hh * ww:].reshape(hh, ww)
        rs, rsq, rt = cv2.integral3(small, sdepth=cv2.CV_32S, sqdepth=cv2.CV_64F)
        rsq_mod = (rsq.astype(np.uint64) % (1 << 32)).astype(np.uint32).view(np.int32)
        for what, a, b in (("sum", s, rs), ("sqsum", sq, rsq_mod), ("tilted", t, rt)):
            if a.shape != b.shape or np.any(a != b):
                print(f"FAIL integral {what} on {name}: "
                      f"{int(np.count_nonzero(a != b)) if a.shape == b.shape else 'shape'} differ")
                fails += 1
        print(f"integral {name} {small.shape[1]}x{small.shape[0]}: sum, sqsum, tilted checked")

    # Grouping: raw windows of the "alt" cascade on the Solvay photograph as
    # OpenCV itself produces them (minNeighbors 0 returns them ungrouped).
    casdir = os.environ.get("LIKENESS_CASCADE_DIR", "/usr/share/opencv4")
    xml = os.path.join(casdir, "haarcascades", "haarcascade_frontalface_alt.xml")
    if os.path.exists(xml):
        raw = cv2.CascadeClassifier(xml).detectMultiScale(imgs["solvay"], 1.1, 0)
        rects_txt = os.path.join(tmp, "rects.txt")
        with open(rects_txt, "w") as f:
            for r in raw:
                f.write("%d %d %d %d\n" % tuple(r))
        for mn, eps in ((1, 0.2), (3, 0.2), (5, 0.3)):
            ref, weights = cv2.groupRectangles([list(map(int, r)) for r in raw], mn, eps)
            ref = sorted((tuple(int(v) for v in r), int(wt)) for r, wt in zip(ref, weights))
            out = subprocess.run([tool, "--group", rects_txt, str(mn), str(eps)], check=True,
                                 capture_output=True, text=True).stdout
            got = sorted((tuple(int(v) for v in l.split()[:4]), int(l.split()[4]))
                         for l in out.splitlines() if l)
            if got != ref:
                print(f"FAIL group min_neighbors={mn} eps={eps}: {len(got)} vs {len(ref)} boxes")
                fails += 1
            else:
                print(f"group min_neighbors={mn} eps={eps}: {len(ref)} boxes from {len(raw)} "
                      f"windows, identical")
    else:
        print(f"SKIPPED part: no {xml}")
print("PASS" if fails == 0 else f"FAIL ({fails})")
sys.exit(1 if fails else 0)
