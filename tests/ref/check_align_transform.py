"""Alignment is equivariant to similarity transforms of the photo.

For a seeded selection of LFW deep-funneled photos, a known similarity T
(rotation up to +-20 degrees, scale 0.7-1.4, shift up to +-30 px) is applied
with OpenCV's cv2.warpAffine (bilinear, replicated border) into a 400x400
canvas. lkt_align_face (our detector with the frontal-face cascade, our eye
locator, our alignment) runs on the original and on the transformed photo.
The eyes found in the transformed photo are mapped back through T^-1 and
then into the original's canonical crop with the original's alignment
matrix: if detection + eyes + alignment are consistent they land on the
canonical eye positions. Pass: median distance <= 3 crop pixels (our own
bound, under a tenth of the crop's 35-pixel eye distance). The Pearson
correlation of the two crops is reported and must have
a median >= 0.85 (own bound: two bilinear resamplings and a 1-2 px eye
jitter keep it well above that on faces).

Outside references also checked on every crop:
- our crop equals cv2.warpAffine(gray, m, (96,112), INTER_LINEAR,
  BORDER_REPLICATE) of the same matrix within 2 gray levels (OpenCV
  interpolates with 1/32-pixel fixed-point weights, we in double);
- m equals cv2.estimateAffinePartial2D of the two eye centres onto the
  canonical positions (2 points define a similarity exactly);
- sharpness equals the variance of cv2.Laplacian(crop, CV_64F, ksize=1)
  over the interior, and mean / clipped fraction equal numpy's.
"""
import json
import os
import random
import subprocess
import sys
import tempfile

import cv2
import numpy as np

from lkref import skip  # noqa: E402

N_IMAGES = 36     # photos drawn; >= 30 must have a face in both versions
N_STEEP = 6       # of them also rolled by 28-32 degrees
SEED = 20261202
CANVAS = 400
CANON = np.array([[30.3, 51.7], [65.5, 51.7]])  # lk_align_params_default


def main():
    shared = os.environ.get("LIKENESS_SHARED", "../shared")
    bindir = os.environ.get("LIKENESS_BIN", "build/bin")
    casc = os.environ.get("LIKENESS_CASCADE_DIR", "/usr/share/opencv4")
    root = os.path.join(shared, "datasets/lfw/lfw-deepfunneled")
    tool = os.path.join(bindir, "lkt_align_face")
    cascade = os.path.join(casc, "haarcascades/haarcascade_frontalface_alt.xml")
    if not os.path.isdir(root):
        skip("LFW not found at %s (set LIKENESS_SHARED)" % root)
    if not os.path.isfile(cascade):
        skip("frontal-face cascade not found at %s (install opencv-data)" % cascade)
    if not os.access(tool, os.X_OK):
        print("FAIL: %s not built" % tool)
        sys.exit(1)

    rnd = random.Random(SEED)
    people = sorted(os.listdir(root))
    files = []
    for p in rnd.sample(people, N_IMAGES):
        names = sorted(os.listdir(os.path.join(root, p)))
        files.append(os.path.join(root, p, rnd.choice(names)))

    tmp = tempfile.mkdtemp(prefix="lk_align_")
    # cases: (photo index, T, kind); kind "main" = rotation to +-20 degrees, scale 0.7-1.4, "steep" =
    # a roll of 28-32 degrees, beyond what an upright frontal cascade finds,
    # to exercise the search on rotated copies (lk_face_find_eyes).
    cases = []
    for i in range(N_IMAGES):
        cases.append((i, rnd.uniform(-20.0, 20.0), rnd.uniform(0.7, 1.4),
                      rnd.uniform(-30, 30), rnd.uniform(-30, 30), "main"))
    for i in range(N_STEEP):
        sign = 1.0 if i % 2 == 0 else -1.0
        cases.append((i, sign * rnd.uniform(28.0, 32.0), rnd.uniform(0.9, 1.2),
                      rnd.uniform(-20, 20), rnd.uniform(-20, 20), "steep"))
    args, grays, bgrs = [], [], []
    for i, f in enumerate(files):
        bgr = cv2.imread(f)
        if bgr is None:
            print("FAIL: cannot read " + f)
            sys.exit(1)
        po = os.path.join(tmp, "o%02d.png" % i)
        cv2.imwrite(po, bgr)  # PNG: both sides decode the same pixels
        args.append(po)
        bgrs.append(bgr)
        grays.append(cv2.cvtColor(bgr, cv2.COLOR_BGR2GRAY))
    transforms = []
    for j, (i, ang, scale, sx, sy, kind) in enumerate(cases):
        h, w = bgrs[i].shape[:2]
        T = cv2.getRotationMatrix2D(((w - 1) / 2.0, (h - 1) / 2.0), ang, scale)
        T[0, 2] += (CANVAS - w) / 2.0 + sx
        T[1, 2] += (CANVAS - h) / 2.0 + sy
        warped = cv2.warpAffine(bgrs[i], T, (CANVAS, CANVAS), flags=cv2.INTER_LINEAR,
                                borderMode=cv2.BORDER_REPLICATE)
        pt = os.path.join(tmp, "t%02d.png" % j)
        cv2.imwrite(pt, warped)
        args.append(pt)
        transforms.append(T)
        grays.append(cv2.cvtColor(warped, cv2.COLOR_BGR2GRAY))

    run = subprocess.run([tool, "--crop-dir", tmp] + args, capture_output=True, text=True)
    if run.returncode != 0:
        print("FAIL: lkt_align_face exited %d: %s" % (run.returncode, run.stderr[-2000:]))
        sys.exit(1)
    res = [json.loads(line) for line in run.stdout.splitlines()]
    assert len(res) == len(args)

    def crop_of(r):
        return cv2.imread(os.path.join(tmp, "crop_%d.png" % r["index"]), cv2.IMREAD_GRAYSCALE)

    failures = []
    warp_diff, m_diff, lap_rel, times = [], [], [], []
    for r, g in zip(res, grays):
        if r["faces"] == 0:
            continue
        times.append(r["us"]["align"] + r["us"]["quality"])
        crop = crop_of(r)
        m = np.array(r["m"]).reshape(2, 3)
        ref = cv2.warpAffine(g, m, (96, 112), flags=cv2.INTER_LINEAR,
                             borderMode=cv2.BORDER_REPLICATE)
        warp_diff.append(int(np.abs(ref.astype(int) - crop.astype(int)).max()))
        src = np.array([r["left"], r["right"]], dtype=np.float64)
        est, _ = cv2.estimateAffinePartial2D(src, CANON)
        m_diff.append(float(np.abs(est - m).max() / max(1.0, np.abs(m).max())))
        lap = cv2.Laplacian(crop, cv2.CV_64F, ksize=1)[1:-1, 1:-1]
        lap_rel.append(abs(lap.var() - r["sharpness"]) / max(1.0, lap.var()))
        if abs(crop.astype(np.float64).mean() - r["mean_gray"]) > 1e-3 or \
           abs(((crop <= 5) | (crop >= 250)).mean() - r["clipped"]) > 1e-4:
            failures.append("exposure measures differ from numpy on image %d" % r["index"])

    stats = {}
    for kind in ("main", "steep"):
        eye_err, corr = [], []
        n = found_t = retried = both = 0
        for j, case in enumerate(cases):
            if case[5] != kind:
                continue
            n += 1
            ro, rt = res[case[0]], res[N_IMAGES + j]
            found_t += rt["faces"] > 0
            retried += rt["faces"] > 0 and rt["angle"] != 0
            if ro["faces"] == 0 or rt["faces"] == 0:
                continue
            both += 1
            Tinv = cv2.invertAffineTransform(transforms[j])
            Mo = np.array(ro["m"]).reshape(2, 3)
            for k, key in enumerate(("left", "right")):
                back = Tinv @ np.array(rt[key] + [1.0])    # transformed photo -> original
                incrop = Mo @ np.append(back, 1.0)         # original -> original's crop
                eye_err.append(float(np.hypot(*(incrop - CANON[k]))))
            co, ct = crop_of(ro), crop_of(rt)
            corr.append(float(np.corrcoef(co.ravel().astype(float),
                                          ct.ravel().astype(float))[0, 1]))
        eye_err = np.array(eye_err)
        stats[kind] = (both, eye_err, corr)
        print("[%s] transformed photos %d: face found %d (%d via the rotated search); "
              "both versions %d" % (kind, n, found_t, retried, both))
        if both:
            print("[%s] eye position difference in crop px: median %.2f, mean %.2f, "
                  "90th pct %.2f, max %.2f" % (kind, np.median(eye_err), eye_err.mean(),
                                              np.percentile(eye_err, 90), eye_err.max()))
            print("[%s] Pearson correlation of the two crops: median %.3f, min %.3f"
                  % (kind, np.median(corr), np.min(corr)))
        if kind == "steep":
            stats["steep_retried"] = retried
    print("originals with a face: %d of %d" % (sum(r["faces"] > 0 for r in res[:N_IMAGES]),
                                                 N_IMAGES))
    print("crop vs cv2.warpAffine: max abs diff %d gray levels" % max(warp_diff))
    print("matrix vs cv2.estimateAffinePartial2D: max rel diff %.2e" % max(m_diff))
    print("sharpness vs cv2.Laplacian variance: max rel diff %.2e" % max(lap_rel))
    print("align+quality time per face (this build): median %.0f us" % np.median(times))

    both, eye_err, corr = stats["main"]
    if both < 30:
        failures.append("only %d photos had a face in both versions (need >= 30)" % both)
    if both and np.median(eye_err) > 3.0:
        failures.append("median eye difference %.2f > 3 crop px" % np.median(eye_err))
    if both and np.median(corr) < 0.85:
        failures.append("median crop correlation %.3f < 0.85" % np.median(corr))
    # Steep rolls: the rotated search must find at least half of them, and
    # their eyes must agree as well (own bounds).
    both_s, eye_s, _ = stats["steep"]
    if both_s < N_STEEP // 2:
        failures.append("only %d of %d steeply rolled faces found" % (both_s, N_STEEP))
    if stats["steep_retried"] == 0:
        failures.append("the rotated search never ran on steeply rolled faces")
    if both_s and np.median(eye_s) > 3.0:
        failures.append("steep rolls: median eye difference %.2f > 3 crop px" % np.median(eye_s))
    if max(warp_diff) > 2:
        failures.append("crop differs from cv2.warpAffine by %d > 2" % max(warp_diff))
    if max(m_diff) > 1e-5:
        failures.append("matrix differs from cv2.estimateAffinePartial2D by %.2e" % max(m_diff))
    if max(lap_rel) > 1e-6:
        failures.append("sharpness differs from cv2.Laplacian by %.2e" % max(lap_rel))
    for f in failures:
        print("FAIL: " + f)
    sys.exit(1 if failures else 0)


if __name__ == "__main__":
    main()
