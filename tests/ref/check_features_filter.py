"""HOG and Gaussian blur against their reference libraries.

- HOG: skimage.feature.hog (Debian's python3-skimage 0.19.3) with several
  parameter sets, including the extractor's default (9 orientations, 8-px
  cells, 2x2 blocks, L2-Hys, transform_sqrt) and all four block norms, on
  LFW crops whose sides are not multiples of the cell size. Pass: max |diff|
  <= 1e-9 (skimage's own test demands 7 decimals). Orientation counts
  divisible by 4 are left out on purpose: they put a bin edge at 45 degrees,
  which pixels with |gx| == |gy| hit, and on which side numpy's arctan2
  rounds (SIMD or libm, by CPU) is not reproducible to the last bit.
- Blur: scipy.ndimage.gaussian_filter(img, sigma) with its defaults
  (mode='reflect', truncate=4.0), the blur of the Tan-Triggs difference of
  Gaussians, for the paper's sigmas 1 and 2, a non-integer sigma, and a sigma
  whose kernel is longer than the image. Pass: max |diff| <= 1e-12.
Input: central crops of 8 LFW deep-funneled images (seeded), gray from
Pillow's convert('L'), as v/255 doubles on both sides.
"""
import os
import subprocess
import sys
import tempfile

import numpy as np

from lkref import lfw_sample  # noqa: E402

try:
    from PIL import Image
    from scipy.ndimage import gaussian_filter
    from skimage.feature import hog
except ImportError as e:
    print(f"SKIPPED: reference library missing: {e}", file=sys.stderr)
    sys.exit(77)

SHARED = os.environ.get("LIKENESS_SHARED", "../shared")
BIN = os.environ.get("LIKENESS_BIN", "build/bin")
TOOL = os.path.join(BIN, "lkt_features_filter")
LFW = os.path.join(SHARED, "datasets", "lfw", "lfw-deepfunneled")
N_IMAGES, SEED = 8, 977
CROP_W, CROP_H = 101, 115  # deliberately not multiples of the cell sizes
NORMS = ["L1", "L1-sqrt", "L2", "L2-Hys"]
# (orientations, cell, block, norm index, transform_sqrt)
HOG_SETS = [(9, 8, 2, 3, 1), (9, 8, 3, 0, 0), (7, 6, 2, 1, 1), (6, 7, 1, 2, 0), (9, 8, 2, 3, 0)]
SIGMAS = [1.0, 2.0, 1.3, 40.0]


def main():
    if not os.path.isdir(LFW):
        print(f"SKIPPED: LFW images not found at {LFW}", file=sys.stderr)
        return 77
    if not os.access(TOOL, os.X_OK):
        print(f"FAIL: tool {TOOL} not built", file=sys.stderr)
        return 1
    picks = lfw_sample(LFW, SEED, N_IMAGES)
    worst_hog = {s: 0.0 for s in HOG_SETS}
    worst_blur = {s: 0.0 for s in SIGMAS}
    with tempfile.TemporaryDirectory() as tmp:
        for k, path in enumerate(picks):
            im = Image.open(path).convert("L")
            x0, y0 = (im.width - CROP_W) // 2, (im.height - CROP_H) // 2
            im = im.crop((x0, y0, x0 + CROP_W, y0 + CROP_H))
            pgm = os.path.join(tmp, f"{k}.pgm")
            im.save(pgm)
            img = np.asarray(im, dtype=np.float64) / 255.0
            out = os.path.join(tmp, "out.f64")
            for s in HOG_SETS:
                o, c, b, nrm, sq = s
                subprocess.run([TOOL, "hog", pgm, str(o), str(c), str(b), str(nrm), str(sq), out],
                               check=True)
                ours = np.fromfile(out, dtype="<f8")
                ref = hog(img, orientations=o, pixels_per_cell=(c, c), cells_per_block=(b, b),
                          block_norm=NORMS[nrm], transform_sqrt=bool(sq), feature_vector=True)
                if ours.shape != ref.shape:
                    print(f"FAIL hog {s}: {ours.shape} values, skimage {ref.shape}")
                    worst_hog[s] = np.inf
                    continue
                worst_hog[s] = max(worst_hog[s], float(np.abs(ours - ref).max()))
            for sigma in SIGMAS:
                subprocess.run([TOOL, "blur", pgm, repr(sigma), out], check=True)
                ours = np.fromfile(out, dtype="<f8").reshape(img.shape)
                ref = gaussian_filter(img, sigma)
                worst_blur[sigma] = max(worst_blur[sigma], float(np.abs(ours - ref).max()))
    passed = failed = 0
    for s, d in worst_hog.items():
        ok = d <= 1e-9
        passed, failed = passed + ok, failed + (not ok)
        print(f"hog orientations={s[0]} cell={s[1]} block={s[2]} norm={NORMS[s[3]]} "
              f"sqrt={s[4]}: max |diff| {d:.3g} -> {'ok' if ok else 'FAIL'}")
    for sigma, d in worst_blur.items():
        ok = d <= 1e-12
        passed, failed = passed + ok, failed + (not ok)
        print(f"gaussian sigma={sigma}: max |diff| {d:.3g} -> {'ok' if ok else 'FAIL'}")
    print(f"{passed} passed, {failed} failed")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
