"""Eye centres against OpenCV's eye cascade on LFW.

Reference: OpenCV 4.6 (Debian) cv2.CascadeClassifier with
haarcascade_frontalface_alt.xml for the face box and haarcascade_eye.xml run
on the upper 60% of that box; a photo is kept when exactly one eye box lies
in each half of the face box, and the reference eye centre is that box's
centre (in pixel-centre coordinates: OpenCV's box (x, y, w, h) covers pixel
centres x .. x+w-1, so its centre is x + w/2 - 0.5).

Our lkt_align_face runs on the same face boxes (IMAGE@x,y,w,h: detection is
checked elsewhere), so only the eye locator is compared. Error of a photo =
the larger of the two eyes' distances over the reference inter-eye distance
(the "worse eye" normalised error of Jesorsky et al., AVBPA 2001).

Two sets: the photos as they are (LFW deep-funneled faces are already
roughly upright and centred, so the fixed-proportion fallback is close
there too) and the same photos rolled by 10-14 degrees with cv2.warpAffine
(reference centres moved by the known transform), where a locator that
only returned the fallback would be far off.

Bounds (own choices, from a run on 596 upright photos: 94.6% under 0.25,
median 0.073): in each set >= 85% of photos under 0.25 and median under
0.12; rolled: median below the fallback's; upright: median at most 0.02
above the fallback's.
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

N_PEOPLE = 150
SEED = 11  # not the seed the fallback proportions were measured with (1)
# lk_eye_params_default expected centres, relative to the face box:
EXPECT = (0.307, 0.393, 0.672, 0.385)


def main():
    shared = os.environ.get("LIKENESS_SHARED", "../shared")
    bindir = os.environ.get("LIKENESS_BIN", "build/bin")
    casc = os.environ.get("LIKENESS_CASCADE_DIR", "/usr/share/opencv4")
    root = os.path.join(shared, "datasets/lfw/lfw-deepfunneled")
    tool = os.path.join(bindir, "lkt_align_face")
    fpath = os.path.join(casc, "haarcascades/haarcascade_frontalface_alt.xml")
    epath = os.path.join(casc, "haarcascades/haarcascade_eye.xml")
    if not os.path.isdir(root):
        skip("LFW not found at %s (set LIKENESS_SHARED)" % root)
    if not (os.path.isfile(fpath) and os.path.isfile(epath)):
        skip("cascades not found under %s (install opencv-data)" % casc)
    if not os.access(tool, os.X_OK):
        print("FAIL: %s not built" % tool)
        sys.exit(1)
    fc, ec = cv2.CascadeClassifier(fpath), cv2.CascadeClassifier(epath)

    rnd = random.Random(SEED)
    people = sorted(os.listdir(root))
    tmp = tempfile.mkdtemp(prefix="lk_eyes_")
    args, refs, boxes, kinds = [], [], [], []
    rolled = []  # (path, gray, reference in the rolled photo)
    for p in rnd.sample(people, N_PEOPLE):
        f = os.path.join(root, p, rnd.choice(sorted(os.listdir(os.path.join(root, p)))))
        g = cv2.cvtColor(cv2.imread(f), cv2.COLOR_BGR2GRAY)
        faces = fc.detectMultiScale(g, 1.1, 3)
        if len(faces) == 0:
            continue
        x, y, w, h = (int(v) for v in max(faces, key=lambda r: r[2] * r[3]))
        eyes = ec.detectMultiScale(g[y:y + h * 6 // 10, x:x + w], 1.1, 3)
        left = [e for e in eyes if e[0] + e[2] / 2 < w / 2]
        right = [e for e in eyes if e[0] + e[2] / 2 >= w / 2]
        if len(left) != 1 or len(right) != 1:
            continue
        lb, rb = left[0], right[0]
        ref = (x + lb[0] + lb[2] / 2 - 0.5, y + lb[1] + lb[3] / 2 - 0.5,
               x + rb[0] + rb[2] / 2 - 0.5, y + rb[1] + rb[3] / 2 - 0.5)
        refs.append(ref)
        boxes.append((x, y, w, h))
        args.append("%s@%d,%d,%d,%d" % (f, x, y, w, h))
        kinds.append("upright")
        # The same photo rolled by 10-14 degrees (either way) about its
        # centre: still found by the upright cascade, but the eyes leave the
        # fixed proportions; the reference centres move with the known T.
        ang = rnd.choice((-1.0, 1.0)) * rnd.uniform(10.0, 14.0)
        T = cv2.getRotationMatrix2D(((g.shape[1] - 1) / 2.0, (g.shape[0] - 1) / 2.0), ang, 1.0)
        gr = cv2.warpAffine(g, T, (g.shape[1], g.shape[0]), flags=cv2.INTER_LINEAR,
                            borderMode=cv2.BORDER_REPLICATE)
        faces = fc.detectMultiScale(gr, 1.1, 3)
        if len(faces) == 0:
            continue
        bx = tuple(int(v) for v in max(faces, key=lambda r: r[2] * r[3]))
        lt = T @ np.array([ref[0], ref[1], 1.0])
        rt = T @ np.array([ref[2], ref[3], 1.0])
        path = os.path.join(tmp, "r%03d.png" % len(rolled))
        cv2.imwrite(path, gr)
        rolled.append(("%s@%d,%d,%d,%d" % ((path,) + bx), (lt[0], lt[1], rt[0], rt[1]), bx))
    for a, ref, bx in rolled:
        args.append(a)
        refs.append(ref)
        boxes.append(bx)
        kinds.append("rolled")
    if kinds.count("upright") < 50 or kinds.count("rolled") < 40:
        print("FAIL: only %d upright / %d rolled reference pairs from the eye cascade"
              % (kinds.count("upright"), kinds.count("rolled")))
        sys.exit(1)
    run = subprocess.run([tool] + args, capture_output=True, text=True)
    if run.returncode != 0:
        print("FAIL: lkt_align_face exited %d: %s" % (run.returncode, run.stderr[-2000:]))
        sys.exit(1)
    res = [json.loads(line) for line in run.stdout.splitlines()]

    errs = {"upright": ([], []), "rolled": ([], [])}
    located = {"upright": 0, "rolled": 0}
    for r, ref, (x, y, w, h), kind in zip(res, refs, boxes, kinds):
        ipd = np.hypot(ref[2] - ref[0], ref[3] - ref[1])
        err = max(np.hypot(r["left"][0] - ref[0], r["left"][1] - ref[1]),
                  np.hypot(r["right"][0] - ref[2], r["right"][1] - ref[3])) / ipd
        est = (x - 0.5 + EXPECT[0] * w, y - 0.5 + EXPECT[1] * h,
               x - 0.5 + EXPECT[2] * w, y - 0.5 + EXPECT[3] * h)
        errs[kind][0].append(err)
        errs[kind][1].append(max(np.hypot(est[0] - ref[0], est[1] - ref[1]),
                                 np.hypot(est[2] - ref[2], est[3] - ref[3])) / ipd)
        located[kind] += r["found"]
    failures = []
    med = {}
    for kind in ("upright", "rolled"):
        ours, fallback = np.array(errs[kind][0]), np.array(errs[kind][1])
        med[kind] = (np.median(ours), np.median(fallback))
        print("[%s] photos %d, eyes located (not estimated) %d" % (kind, len(ours), located[kind]))
        print("[%s] worse-eye error / inter-eye distance: ours median %.3f, 90th pct %.3f, "
              "< 0.1: %.1f%%, < 0.25: %.1f%%" % (kind, np.median(ours), np.percentile(ours, 90),
                                                100 * (ours < 0.1).mean(),
                                                100 * (ours < 0.25).mean()))
        print("[%s] fixed-proportion fallback: median %.3f, < 0.25: %.1f%%"
              % (kind, np.median(fallback), 100 * (fallback < 0.25).mean()))
        if (ours < 0.25).mean() < 0.85:
            failures.append("%s: only %.1f%% under 0.25" % (kind, 100 * (ours < 0.25).mean()))
        if np.median(ours) > 0.12:
            failures.append("%s: median error %.3f > 0.12" % (kind, np.median(ours)))
    # Upright LFW faces are pre-aligned (deep funneling), so the fallback is
    # already close there: ours must not be worse by more than 0.02. Rolled
    # faces are where locating matters: ours must beat the fallback.
    if med["upright"][0] > med["upright"][1] + 0.02:
        failures.append("upright: locator worse than the fixed-proportion fallback")
    if med["rolled"][0] >= med["rolled"][1]:
        failures.append("rolled: locator no better than the fixed-proportion fallback")
    for f in failures:
        print("FAIL: " + f)
    sys.exit(1 if failures else 0)


if __name__ == "__main__":
    main()
