"""LBP codes and region histograms against scikit-image 0.19.

Reference: skimage.feature.local_binary_pattern(image, P, R,
method='nri_uniform') from Debian's python3-skimage, on the central 128x128
of 24 LFW deep-funneled images (seeded selection), 8-bit gray from Pillow's
convert('L'). Both sides get identical doubles: v/255, or, for the "tt"
runs, the Tan-Triggs image the tool wrote (LBP is what is checked there).
Pass: codes equal on >= 99.9% of the pixels of every configuration, and
every region histogram (Ahonen et al. 2006 region split, unit sum) within
1e-3 in L1 distance of the one made from skimage's codes.
"""
import os
import subprocess
import sys
import tempfile

import numpy as np

from lkref import lfw_sample  # noqa: E402

try:
    from PIL import Image
    from skimage.feature import local_binary_pattern
except ImportError as e:  # a missing reference library is a skip, loudly
    print(f"SKIPPED: reference library missing: {e}", file=sys.stderr)
    sys.exit(77)

SHARED = os.environ.get("LIKENESS_SHARED", "../shared")
BIN = os.environ.get("LIKENESS_BIN", "build/bin")
TOOL = os.path.join(BIN, "lkt_features_lbp")
LFW = os.path.join(SHARED, "datasets", "lfw", "lfw-deepfunneled")
N_IMAGES, CROP, SEED = 24, 128, 20240611
GRID = (8, 8)
# The extractor's operators (8 points, radii 1 and 2, on v/255 and on the
# Tan-Triggs image), plus a non-integer radius and a 16-point operator.
CONFIGS = [(8, 1.0, False), (8, 2.0, False), (8, 1.0, True), (8, 2.0, True),
           (12, 1.5, False), (16, 3.0, True)]


def region_histograms(codes, n_labels, gx, gy):
    h, w = codes.shape
    out = []
    for j in range(gy):
        for i in range(gx):
            reg = codes[j * h // gy:(j + 1) * h // gy, i * w // gx:(i + 1) * w // gx]
            out.append(np.bincount(reg.ravel().astype(np.int64), minlength=n_labels) / reg.size)
    return np.array(out)


def main():
    if not os.path.isdir(LFW):
        print(f"SKIPPED: LFW images not found at {LFW}", file=sys.stderr)
        return 77
    if not os.access(TOOL, os.X_OK):
        print(f"FAIL: tool {TOOL} not built", file=sys.stderr)
        return 1
    picks = lfw_sample(LFW, SEED, N_IMAGES)
    failures = tiny_failures = 0
    with tempfile.TemporaryDirectory() as tmp:
        stats = {c: [0, 0, 0.0] for c in CONFIGS}  # equal, total, worst hist L1
        for k, path in enumerate(picks):
            im = Image.open(path).convert("L")
            x0, y0 = (im.width - CROP) // 2, (im.height - CROP) // 2
            im = im.crop((x0, y0, x0 + CROP, y0 + CROP))
            pgm = os.path.join(tmp, f"{k}.pgm")
            im.save(pgm)
            pixels = np.asarray(im, dtype=np.float64) / 255.0
            prefix = os.path.join(tmp, f"{k}")
            specs = [f"{P},{R!r}" + (",tt" if tt else "") for (P, R, tt) in CONFIGS]
            subprocess.run([TOOL, pgm, str(GRID[0]), str(GRID[1]), prefix] + specs, check=True)
            for j, (P, R, tt) in enumerate(CONFIGS):
                ours = np.fromfile(f"{prefix}.{j}.codes.u8", dtype=np.uint8).reshape(CROP, CROP)
                hist = np.fromfile(f"{prefix}.{j}.hist.f64", dtype="<f8")
                if tt:
                    inp = np.fromfile(prefix + ".tt.f64", dtype="<f8").reshape(CROP, CROP)
                else:
                    inp = pixels
                ref = local_binary_pattern(inp, P, R, method="nri_uniform")
                n_labels = P * (P - 1) + 3
                ref_hist = region_histograms(ref, n_labels, *GRID)
                hist = hist.reshape(ref_hist.shape)
                st = stats[(P, R, tt)]
                st[0] += int(np.sum(ours == ref))
                st[1] += ours.size
                st[2] = max(st[2], float(np.abs(hist - ref_hist).sum(axis=1).max()))
        # Tiny images, where most samples fall outside and read 0: every code
        # must equal skimage's.
        rng = np.random.RandomState(SEED)
        for k, (hh, ww) in enumerate([(1, 1), (2, 3), (5, 7), (7, 5), (9, 9)]):
            a = (rng.rand(hh, ww) * 4).astype(np.uint8) * 60  # many ties
            pgm = os.path.join(tmp, f"tiny{k}.pgm")
            Image.fromarray(a).save(pgm)
            prefix = os.path.join(tmp, f"tiny{k}")
            specs = [f"{P},{R!r}" for (P, R, _) in CONFIGS]
            subprocess.run([TOOL, pgm, "1", "1", prefix] + specs, check=True)
            for j, (P, R, _) in enumerate(CONFIGS):
                ours = np.fromfile(f"{prefix}.{j}.codes.u8", dtype=np.uint8).reshape(hh, ww)
                ref = local_binary_pattern(a / 255.0, P, R, method="nri_uniform")
                if not np.array_equal(ours, ref):
                    print(f"FAIL tiny {hh}x{ww} P={P} R={R}: {int(np.sum(ours != ref))} codes differ")
                    tiny_failures += 1
        for (P, R, tt), (eq, tot, worst) in stats.items():
            frac = eq / tot
            ok = frac >= 0.999 and worst <= 1e-3
            failures += not ok
            print(f"P={P} R={R} tan_triggs={tt}: codes equal on {frac:.6f} of {tot} pixels, "
                  f"worst region histogram L1 distance {worst:.3g} -> {'ok' if ok else 'FAIL'}")
    print(f"tiny images: {'ok' if tiny_failures == 0 else 'FAIL'}")
    failures += tiny_failures > 0
    print(f"{len(CONFIGS) + 1 - failures} passed, {failures} failed")
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main())
