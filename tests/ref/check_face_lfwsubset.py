"""The cascade's window classifier on scikit-image's lfw_subset
(../shared/reference/lfw-subset/lfw_subset.npy: 200 windows of 25x25 in
[0,1]; the first 100 are LFW faces, the last 100 non-faces).

Each window is scaled to 8 bits (round(255 v)) and resized to the cascade's
training window with cv2.resize(INTER_AREA), then classified as one window
(lkt_face_detect --window: all stages at the cascade's own size, no search).
Reference for every single verdict: OpenCV's detectMultiScale on the same
window-sized image with minNeighbors=0, which evaluates exactly one window
(scale 1, position (0,0)) and returns it if it passes. Pass: identical
verdicts on all 200 windows, and the face acceptance rate at least 0.3
above the non-face acceptance rate (a classifier that tells faces apart).
The measured rates are printed."""
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
npy = os.path.join(shared, "reference", "lfw-subset", "lfw_subset.npy")
cascades = [("haarcascade_frontalface_alt", os.path.join(casdir, "haarcascades",
                                                         "haarcascade_frontalface_alt.xml"), 20),
            ("haarcascade_frontalface_default", os.path.join(casdir, "haarcascades",
                                                             "haarcascade_frontalface_default.xml"), 24)]
for p in [tool, npy] + [c[1] for c in cascades]:
    if not os.path.exists(p):
        print(f"SKIPPED: missing {p}", file=sys.stderr)
        sys.exit(77)
windows = np.load(npy)
if windows.shape != (200, 25, 25):
    print(f"FAIL: unexpected shape {windows.shape}")
    sys.exit(1)

ok = True
with tempfile.TemporaryDirectory() as tmp:
    for name, xml, size in cascades:
        paths, ref = [], []
        clf = cv2.CascadeClassifier(xml)
        for i, w in enumerate(windows):
            u8 = np.clip(np.rint(w * 255.0), 0, 255).astype(np.uint8)
            img = cv2.resize(u8, (size, size), interpolation=cv2.INTER_AREA)
            p = os.path.join(tmp, f"{name}_{i:03d}.png")
            cv2.imwrite(p, img)
            paths.append(p)
            ref.append(len(clf.detectMultiScale(img, 1.1, 0)) > 0)
        out = subprocess.run([tool, xml, "--window"] + paths, check=True, capture_output=True,
                             text=True).stdout
        got = [line.split()[0] == "1" for line in out.splitlines() if not line.startswith("==")]
        same = sum(a == b for a, b in zip(got, ref)) if len(got) == 200 else 0
        face_rate = sum(got[:100]) / 100.0
        nonface_rate = sum(got[100:]) / 100.0
        print(f"{name}: faces accepted {face_rate:.2f}, non-faces accepted {nonface_rate:.2f}; "
              f"OpenCV faces {sum(ref[:100]) / 100:.2f}, non-faces {sum(ref[100:]) / 100:.2f}; "
              f"same verdict on {same}/200")
        ok &= same == 200 and face_rate - nonface_rate >= 0.3
print("PASS" if ok else "FAIL")
sys.exit(0 if ok else 1)
