"""Quality thresholds against LFW: ordinary photos pass, degraded ones do not.

LFW deep-funneled photos are real single-subject face photos that a face
comparison service must accept, so the default thresholds must let almost
all of them through. Degradations made with OpenCV (cv2.GaussianBlur,
exposure scaling with cv2.convertScaleAbs, downscaling with cv2.resize
INTER_AREA) must trip the matching reason code. The test prints the measured
distribution and the share of photos passing each check (the figures quoted
in src/align/quality.c come from a run with LK_ALIGN_QUALITY_N=1000 on an
-O2 build).

Bounds (own choices, from the distribution measured on 1000 photos):
- >= 90% of the LFW sample usable (no blocking reason);
- >= 90% of photos blurred with a Gaussian of sigma 3 px flagged too_blurry;
- >= 90% of photos darkened to 25% or brightened by +140 flagged
  badly_exposed (among those where a face is still found);
- >= 90% of photos shrunk to 90x90 px flagged face_too_small (when found);
- a side-by-side montage of two photos flagged multiple_faces.
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

REASONS = ["no_face", "multiple_faces", "face_too_small", "too_blurry", "badly_exposed",
           "too_rotated"]


def main():
    shared = os.environ.get("LIKENESS_SHARED", "../shared")
    bindir = os.environ.get("LIKENESS_BIN", "build/bin")
    casc = os.environ.get("LIKENESS_CASCADE_DIR", "/usr/share/opencv4")
    root = os.path.join(shared, "datasets/lfw/lfw-deepfunneled")
    tool = os.path.join(bindir, "lkt_align_face")
    if not os.path.isdir(root):
        skip("LFW not found at %s (set LIKENESS_SHARED)" % root)
    if not os.path.isfile(os.path.join(casc, "haarcascades/haarcascade_frontalface_alt.xml")):
        skip("frontal-face cascade not found under %s (install opencv-data)" % casc)
    if not os.access(tool, os.X_OK):
        print("FAIL: %s not built" % tool)
        sys.exit(1)
    n = int(os.environ.get("LK_ALIGN_QUALITY_N", "100"))
    n_deg = max(10, n // 5)

    rnd = random.Random(7)
    people = sorted(os.listdir(root))
    files = []
    for p in rnd.sample(people, n):
        names = sorted(os.listdir(os.path.join(root, p)))
        files.append(os.path.join(root, p, rnd.choice(names)))

    tmp = tempfile.mkdtemp(prefix="lk_quality_")
    args, kinds = list(files), ["lfw"] * n
    for i, f in enumerate(files[:n_deg]):
        bgr = cv2.imread(f)
        variants = {
            "blur": cv2.GaussianBlur(bgr, (0, 0), 3.0),
            "dark": cv2.convertScaleAbs(bgr, alpha=0.25),
            "bright": cv2.convertScaleAbs(bgr, alpha=1.0, beta=140),
            "small": cv2.resize(bgr, (90, 90), interpolation=cv2.INTER_AREA),
        }
        for k, im in variants.items():
            path = os.path.join(tmp, "%s%03d.png" % (k, i))
            cv2.imwrite(path, im)
            args.append(path)
            kinds.append(k)
    # Two photos side by side: two faces of the same size.
    pair = np.hstack([cv2.imread(files[-1]), cv2.imread(files[-2])])
    path = os.path.join(tmp, "pair.png")
    cv2.imwrite(path, pair)
    args.append(path)
    kinds.append("pair")

    run = subprocess.run([tool] + args, capture_output=True, text=True)
    if run.returncode != 0:
        print("FAIL: lkt_align_face exited %d: %s" % (run.returncode, run.stderr[-2000:]))
        sys.exit(1)
    res = [json.loads(line) for line in run.stdout.splitlines()]
    assert len(res) == len(args)

    failures = []
    lfw = [r for r, k in zip(res, kinds) if k == "lfw"]
    found = [r for r in lfw if r["faces"] > 0]
    print("LFW sample: %d photos, face found in %d, eyes located (not estimated) in %d"
          % (n, len(found), sum(r["found"] for r in found)))
    for key in ("face_size", "eye_distance", "roll", "sharpness", "mean_gray", "clipped"):
        v = np.array([r[key] for r in found])
        print("  %-12s pct 1/5/50/95/99: %s" % (key, " / ".join(
            "%.3g" % x for x in np.percentile(v, [1, 5, 50, 95, 99]))))
    for reason in REASONS + ["eyes_estimated"]:
        k = sum(reason in r["reasons"] for r in lfw)
        print("  %-15s flagged %5.1f%%  (passing %5.1f%%)" % (reason, 100.0 * k / n,
                                                            100.0 - 100.0 * k / n))
    usable = sum(r["usable"] for r in lfw) / n
    print("  usable %.1f%%" % (100 * usable))
    if usable < 0.90:
        failures.append("only %.1f%% of LFW usable (need >= 90%%)" % (100 * usable))

    def share(kind, reason, among_found=False):
        rs = [r for r, k in zip(res, kinds) if k == kind]
        if among_found:
            rs = [r for r in rs if r["faces"] > 0]
        hit = sum(reason in r["reasons"] for r in rs)
        print("%-5s: %d of %d flagged %s" % (kind, hit, len(rs), reason))
        return hit / len(rs) if rs else 0.0, len(rs)

    for kind, reason, among in (("blur", "too_blurry", True), ("dark", "badly_exposed", True),
                                ("bright", "badly_exposed", True),
                                ("small", "face_too_small", True)):
        frac, cnt = share(kind, reason, among)
        if cnt < n_deg // 2 or frac < 0.9:
            failures.append("%s: %.0f%% of %d flagged %s (need >= 90%% of >= %d)"
                            % (kind, 100 * frac, cnt, reason, n_deg // 2))
    frac, _ = share("pair", "multiple_faces")
    if frac < 1.0:
        failures.append("montage of two photos not flagged multiple_faces")
    for f in failures:
        print("FAIL: " + f)
    sys.exit(1 if failures else 0)


if __name__ == "__main__":
    main()
