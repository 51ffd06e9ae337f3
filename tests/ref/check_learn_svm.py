"""Linear SVM (dual coordinate descent) and LFW pairs parsing of the learn
module, against scikit-learn 1.2's LinearSVC (which wraps liblinear) on real
pair vectors, plus Platt scaling of the resulting decision values against
sklearn.calibration._sigmoid_calibration.

Inputs, built here with libraries the project did not write: LFW View 1
pairs (shared/datasets/lfw/pairsDevTrain.txt for training,
pairsDevTest.txt held out); each image is read with Pillow, converted to
gray, its central 120x120 (where the funneled face is) scaled to 48x48,
and described by scikit-image's HOG (9 orientations, 8x8 cells, 2x2 blocks:
900 values); a pair vector is the element-wise squared difference of the
two HOG vectors, standardised with sklearn's StandardScaler fitted on the
training pairs.

Checks:
- the C parser's pairs (fold, genuine, paths) equal a direct reading of the
  protocol files following the LFW README's layout;
- for hinge and squared-hinge loss, the primal objective
  0.5 (|w|^2 + b^2) + C sum loss (liblinear regularises the bias, which is
  a constant feature B = 1) of our model is within 0.1 % of the objective of
  LinearSVC's coef_/intercept_ computed with the same formula, and the
  decisions on the held-out pairs agree on >= 99.5 %;
- Platt A, B fitted on our held-out decision values within 1e-4 relative of
  sklearn's."""
import os
import subprocess
import sys
import tempfile
import time

import numpy as np

from lkref import check, finish, rmat, wmat  # noqa: E402

BIN = os.environ.get("LIKENESS_BIN", "")
SHARED = os.environ.get("LIKENESS_SHARED", "")
TOOL = os.path.join(BIN, "lkt_learn_ref")
LFW = os.path.join(SHARED, "datasets", "lfw")
if not os.access(TOOL, os.X_OK):
    print(f"SKIPPED: {TOOL} is not built (set LIKENESS_BIN)", file=sys.stderr)
    sys.exit(77)
for f in ("pairsDevTrain.txt", "pairsDevTest.txt", "pairs.txt", "lfw-deepfunneled"):
    if not os.path.exists(os.path.join(LFW, f)):
        print(f"SKIPPED: {os.path.join(LFW, f)} is missing (set LIKENESS_SHARED)", file=sys.stderr)
        sys.exit(77)

from PIL import Image  # noqa: E402
from skimage.feature import hog  # noqa: E402
from sklearn.calibration import _sigmoid_calibration  # noqa: E402
from sklearn.preprocessing import StandardScaler  # noqa: E402
from sklearn.svm import LinearSVC  # noqa: E402






def read_pairs(path):
    """LFW README layout: header "N" or "folds N"; per fold N matched
    "name i j" then N mismatched "name1 i name2 j"."""
    with open(path) as f:
        lines = [ln.split() for ln in f if ln.strip()]
    head = [int(t) for t in lines[0]]
    folds, per = (1, head[0]) if len(head) == 1 else head
    out, pos = [], 1
    img = lambda n, i: os.path.join(LFW, "lfw-deepfunneled", n, f"{n}_{int(i):04d}.jpg")
    for fold in range(folds):
        for genuine in (1, 0):
            for _ in range(per):
                t = lines[pos]
                pos += 1
                if genuine:
                    out.append((fold, 1, img(t[0], t[1]), img(t[0], t[2])))
                else:
                    out.append((fold, 0, img(t[0], t[1]), img(t[2], t[3])))
    return out


def check_parser():
    for name in ("pairsDevTrain.txt", "pairsDevTest.txt", "pairs.txt"):
        path = os.path.join(LFW, name)
        got = subprocess.run([TOOL, "pairs", path, LFW], check=True, capture_output=True,
                             text=True).stdout.splitlines()
        got = [tuple(ln.split(" ")) for ln in got]
        got = [(int(a), int(b), c, d) for a, b, c, d in got]
        ref = read_pairs(path)
        check(got == ref, f"{name}: {len(got)} parsed pairs equal the reference reading ({len(ref)})")
        exist = all(os.path.exists(p) for _, _, a, b in got[:50] for p in (a, b))
        check(exist, f"{name}: the first 50 pairs' image paths exist")


def features(paths):
    feats = {}
    for p in sorted(set(paths)):
        im = Image.open(p)
        im.draft("L", (125, 125))  # JPEG DCT scaling: decode at half size, faster
        im = im.convert("L")
        s = im.size[0] / 250.0
        im = im.crop((int(65 * s), int(65 * s), int(185 * s), int(185 * s))).resize((48, 48),
                                                                                    Image.BILINEAR)
        feats[p] = hog(np.asarray(im, np.float64) / 255.0, orientations=9, pixels_per_cell=(8, 8),
                       cells_per_block=(2, 2), block_norm="L2-Hys")
    return feats


def pair_matrix(pairs, feats):
    X = np.array([(feats[a] - feats[b]) ** 2 for _, _, a, b in pairs])
    y = np.array([1.0 if g else -1.0 for _, g, _, _ in pairs])
    return X, y


def primal(w, b, X, y, C, loss):
    m = np.maximum(0.0, 1.0 - y * (X @ w + b))
    return 0.5 * (w @ w + b * b) + C * np.sum(m if loss == 1 else m * m)


def main():
    check_parser()
    train = read_pairs(os.path.join(LFW, "pairsDevTrain.txt"))
    test = read_pairs(os.path.join(LFW, "pairsDevTest.txt"))
    t0 = time.time()
    feats = features([p for pr in train + test for p in pr[2:]])
    print(f"features for {len(feats)} images in {time.time() - t0:.1f} s")
    Xtr, ytr = pair_matrix(train, feats)
    Xte, yte = pair_matrix(test, feats)
    sc = StandardScaler().fit(Xtr)
    # The library takes float32 features: give sklearn exactly the same values.
    Xtr = sc.transform(Xtr).astype(np.float32).astype(np.float64)
    Xte = sc.transform(Xte).astype(np.float32).astype(np.float64)
    print(f"train {Xtr.shape}, test {Xte.shape}")
    with tempfile.TemporaryDirectory() as tmp:
        p = lambda s: os.path.join(tmp, s)
        wmat(p("X.bin"), Xtr)
        wmat(p("y.bin"), ytr)
        wmat(p("T.bin"), Xte)
        for loss, C, shrink in ((1, 0.01, 1), (2, 0.01, 1), (1, 0.01, 0)):
            lname = "hinge" if loss == 1 else "squared_hinge"
            out = subprocess.run([TOOL, "svm", p("X.bin"), p("y.bin"), repr(C), str(loss), "1e-3",
                                  str(shrink), p("T.bin"), p("m.bin"), p("dec.bin")], check=True,
                                 capture_output=True, text=True).stdout
            print(out.strip())
            m = rmat(p("m.bin"))[0]
            d = Xtr.shape[1]
            w, b, obj, secs = m[:d], m[d], m[d + 1], m[d + 3]
            dec = rmat(p("dec.bin"))[:, 0]
            t0 = time.time()
            ref = LinearSVC(loss=lname, dual=True, C=C, tol=1e-6, max_iter=1000000,
                            intercept_scaling=1.0, fit_intercept=True, random_state=0).fit(Xtr, ytr)
            ref_secs = time.time() - t0
            rw, rb = ref.coef_[0], ref.intercept_[0]
            ref_obj = primal(rw, rb, Xtr, ytr, C, loss)
            our_obj = primal(w, b, Xtr, ytr, C, loss)
            tag = f"{lname} C={C} shrinking={shrink}"
            check(abs(our_obj - obj) <= 1e-9 * ref_obj,
                  f"{tag}: the tool's objective {obj:.8f} matches the formula {our_obj:.8f}")
            gap = (our_obj - ref_obj) / ref_obj
            check(abs(gap) < 1e-3, f"{tag}: primal objective {our_obj:.6f} vs LinearSVC {ref_obj:.6f} "
                  f"(relative gap {gap:+.2e}); our training {secs:.2f} s, sklearn {ref_secs:.2f} s")
            agree = np.mean(np.sign(dec) == np.sign(ref.decision_function(Xte)))
            acc = np.mean(np.sign(dec) == yte)
            check(agree >= 0.995, f"{tag}: held-out decisions agree on {100 * agree:.2f} % of "
                  f"{len(yte)} pairs (our held-out accuracy {100 * acc:.1f} %, "
                  f"sklearn {100 * ref.score(Xte, yte):.1f} %)")
            dd = np.max(np.abs(dec - (Xte @ w + b)))
            check(dd < 1e-6 * max(1.0, np.max(np.abs(dec))), f"{tag}: decision values = X w + b "
                  f"(max diff {dd:.1e})")
            if loss == 1 and shrink == 1:
                wmat(p("f.bin"), dec)
                wmat(p("fy.bin"), yte)
                subprocess.run([TOOL, "platt", p("f.bin"), p("fy.bin"), p("ab.bin")], check=True)
                A, B = rmat(p("ab.bin"))[0]
                sa, sb = _sigmoid_calibration(dec, yte)
                da, db = abs(A - sa) / abs(sa), abs(B - sb) / max(abs(sb), 1e-3)
                check(da < 1e-4 and db < 1e-4, f"Platt on held-out SVM outputs: A={A:.7f} B={B:.7f} "
                      f"vs sklearn {sa:.7f} {sb:.7f} (relative diff {da:.1e}, {db:.1e})")
    sys.exit(finish())


if __name__ == "__main__":
    main()
