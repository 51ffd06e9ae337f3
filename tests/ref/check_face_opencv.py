"""Agreement of our cascade detector with OpenCV 4.6's
cv2.CascadeClassifier.detectMultiScale (Debian python3-opencv), run on the
same 8-bit gray pixels with the same cascade XML and parameters, both at full
resolution (our max_long_side 0).

Gray images are made here once (cv2.imread + cv2.cvtColor(BGR2GRAY)) and
written as PNG, so both detectors read identical pixels whatever the JPEG
decoders do. Images: the Solvay photograph and 200 LFW images chosen with a
fixed seed. Cascades: haarcascade_frontalface_alt (Haar) and
lbpcascade_frontalface_improved (multi-block LBP), scale 1.1, 3 neighbours;
haarcascade_eye and haarcascade_eye_tree_eyeglasses (decision trees and
tilted features) on 40 central crops of LFW faces. Pass: for each cascade at
least 95% of OpenCV's boxes have one of ours at IoU >= 0.7 (greedy one-to-one
matching), and we report no more than 5% extra boxes. Exact equality is
reported too."""
import os
import subprocess
import sys
import tempfile

import cv2
import numpy as np

shared = os.environ.get("LIKENESS_SHARED", "../shared")
bindir = os.environ.get("LIKENESS_BIN", "build/bin")
casdir = os.environ.get("LIKENESS_CASCADE_DIR", "/usr/share/opencv4")
tool = os.path.join(bindir, "lkt_face_detect")
solvay = os.path.join(shared, "reference", "solvay-1927", "1280px-Solvay_conference_1927.png")
lfw = os.path.join(shared, "datasets", "lfw", "lfw-deepfunneled")
cascades = {
    "haar_alt": os.path.join(casdir, "haarcascades", "haarcascade_frontalface_alt.xml"),
    "lbp_improved": os.path.join(casdir, "lbpcascades", "lbpcascade_frontalface_improved.xml"),
    "haar_eye": os.path.join(casdir, "haarcascades", "haarcascade_eye.xml"),
    # Decision trees (not stumps) and 45-degree tilted features:
    "haar_eye_tree_tilted": os.path.join(casdir, "haarcascades",
                                         "haarcascade_eye_tree_eyeglasses.xml"),
}
for p in [tool, solvay, lfw] + list(cascades.values()):
    if not os.path.exists(p):
        print(f"SKIPPED: missing {p}", file=sys.stderr)
        sys.exit(77)

people = sorted(os.listdir(lfw))
files = sorted(os.path.join(lfw, d, f) for d in people
               for f in os.listdir(os.path.join(lfw, d)) if f.endswith(".jpg"))
if len(files) < 200:
    print(f"SKIPPED: only {len(files)} LFW images under {lfw}", file=sys.stderr)
    sys.exit(77)
rng = np.random.default_rng(20261202)  # fixed selection
pick = [files[i] for i in sorted(rng.choice(len(files), 200, replace=False))]


def iou(a, b):
    x0, y0 = max(a[0], b[0]), max(a[1], b[1])
    x1, y1 = min(a[0] + a[2], b[0] + b[2]), min(a[1] + a[3], b[1] + b[3])
    inter = max(0, x1 - x0) * max(0, y1 - y0)
    return inter / float(a[2] * a[3] + b[2] * b[3] - inter)


def ours(cascade, paths):
    out = subprocess.run([tool, cascade] + paths + ["--scale", "1.1", "--neighbors", "3",
                                                    "--max-long-side", "0"],
                         check=True, capture_output=True, text=True).stdout
    res, cur = {}, None
    for line in out.splitlines():
        if line.startswith("== "):
            cur = line[3:]
            res[cur] = []
        elif line.strip():
            res[cur].append(tuple(int(v) for v in line.split()[:4]))
    if len(paths) == 1:  # single-image output has no header
        res = {paths[0]: [tuple(int(v) for v in l.split()[:4]) for l in out.splitlines() if l]}
    return res


def compare(name, cascade, grays):
    clf = cv2.CascadeClassifier(cascade)
    mine = ours(cascade, list(grays))
    n_ref = n_match = n_ours = n_exact_imgs = 0
    for path in grays:
        g = cv2.imread(path, cv2.IMREAD_UNCHANGED)
        ref = [tuple(int(v) for v in r) for r in clf.detectMultiScale(g, 1.1, 3)]
        got = mine.get(path, [])
        n_ref += len(ref)
        n_ours += len(got)
        n_exact_imgs += sorted(ref) == sorted(got)
        free = list(got)
        for r in ref:
            best = max(free, key=lambda b: iou(r, b), default=None)
            if best is not None and iou(r, best) >= 0.7:
                n_match += 1
                free.remove(best)
    agree = n_match / n_ref if n_ref else 1.0
    extra = (n_ours - n_match) / max(n_ref, 1)
    print(f"{name}: OpenCV {n_ref} boxes, ours {n_ours}, matched {n_match} "
          f"({100 * agree:.1f}% at IoU>=0.7), extra {100 * extra:.1f}%, "
          f"identical box lists on {n_exact_imgs}/{len(grays)} images")
    return n_ref > 0 and agree >= 0.95 and extra <= 0.05


ok = True
with tempfile.TemporaryDirectory() as tmp:
    grays = []
    for i, src in enumerate([solvay] + pick):
        bgr = cv2.imread(src, cv2.IMREAD_COLOR)
        gray = cv2.cvtColor(bgr, cv2.COLOR_BGR2GRAY)
        path = os.path.join(tmp, f"g{i:03d}.png")
        cv2.imwrite(path, gray)
        grays.append(path)
    ok &= compare("haar_alt", cascades["haar_alt"], grays)
    ok &= compare("lbp_improved", cascades["lbp_improved"], grays)
    crops = []
    for i, path in enumerate(grays[1:41]):
        # Deep-funneled LFW images hold the face in their centre.
        g = cv2.imread(path, cv2.IMREAD_UNCHANGED)[60:190, 60:190]
        cp = os.path.join(tmp, f"c{i:03d}.png")
        cv2.imwrite(cp, g)
        crops.append(cp)
    ok &= compare("haar_eye", cascades["haar_eye"], crops)
    ok &= compare("haar_eye_tree_tilted", cascades["haar_eye_tree_tilted"], crops)
print("PASS" if ok else "FAIL")
sys.exit(0 if ok else 1)
