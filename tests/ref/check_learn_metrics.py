"""ROC, AUC, EER, FNMR at a fixed FMR, best-accuracy threshold and the Wilson
interval of the learn module, checked against scikit-learn 1.2
(sklearn.metrics.roc_curve, roc_auc_score, accuracy_score) and SciPy
(scipy.stats.binomtest(...).proportion_ci(method='wilson')), on scores with
many ties and on tie-free scores."""
import os
import subprocess
import sys
import tempfile

import numpy as np

from lkref import check, finish, rmat, wmat  # noqa: E402
from scipy.stats import binomtest
from sklearn.metrics import accuracy_score, roc_auc_score, roc_curve

BIN = os.environ.get("LIKENESS_BIN", "")
TOOL = os.path.join(BIN, "lkt_learn_ref")
if not os.access(TOOL, os.X_OK):
    print(f"SKIPPED: {TOOL} is not built (set LIKENESS_BIN)", file=sys.stderr)
    sys.exit(77)






def reference_eer(fpr, fnr):
    """EER from sklearn's ROC: first point where FNMR <= FMR, linear
    interpolation of FNMR - FMR to zero along the segment before it."""
    d = fnr - fpr
    k = int(np.argmax(d <= 0))
    t = d[k - 1] / (d[k - 1] - d[k])
    return fpr[k - 1] + t * (fpr[k] - fpr[k - 1])


def run_case(tmp, name, scores, labels):
    wmat(os.path.join(tmp, "s.bin"), scores)
    wmat(os.path.join(tmp, "g.bin"), labels)
    subprocess.run([TOOL, "roc", os.path.join(tmp, "s.bin"), os.path.join(tmp, "g.bin"),
                    os.path.join(tmp, "roc.bin"), os.path.join(tmp, "sum.bin")], check=True)
    roc = rmat(os.path.join(tmp, "roc.bin"))
    s = rmat(os.path.join(tmp, "sum.bin"))[0]
    fpr, tpr, thr = roc_curve(labels, scores, drop_intermediate=False)
    fnr = 1.0 - tpr
    # sklearn 1.2 puts max+1 as the first threshold; ours is +inf (nothing accepted).
    check(roc.shape[0] == len(thr), f"{name}: {roc.shape[0]} ROC points vs sklearn {len(thr)}")
    if roc.shape[0] != len(thr):
        return
    check(np.isinf(roc[0, 0]) and np.array_equal(roc[1:, 0], thr[1:]), f"{name}: thresholds equal")
    check(np.max(np.abs(roc[:, 1] - fpr)) < 1e-15, f"{name}: FMR equals sklearn fpr")
    check(np.max(np.abs(roc[:, 2] - fnr)) < 1e-15, f"{name}: FNMR equals 1 - sklearn tpr")
    auc = roc_auc_score(labels, scores)
    check(abs(s[0] - auc) < 1e-12, f"{name}: AUC {s[0]:.15f} vs roc_auc_score {auc:.15f} "
          f"(diff {abs(s[0] - auc):.2e})")
    eer = reference_eer(fpr, fnr)
    check(abs(s[1] - eer) < 1e-12, f"{name}: EER {s[1]:.6f} vs {eer:.6f} from sklearn's ROC")
    ng, ni = int(labels.sum()), int((1 - labels).sum())
    for col, target in ((3, 1e-2), (7, 1e-3)):
        k = np.nonzero(fpr <= target)[0][-1]  # smallest threshold with FMR <= target
        ref_t = np.inf if k == 0 else thr[k]
        check(s[col] == ref_t and abs(s[col + 1] - fpr[k]) < 1e-15 and abs(s[col + 2] - fnr[k]) < 1e-15,
              f"{name}: at FMR {target:g}: threshold {s[col]:.6g} FMR {s[col + 1]:.5f} FNMR {s[col + 2]:.5f}"
              f" vs sklearn {ref_t:.6g} {fpr[k]:.5f} {fnr[k]:.5f}")
        # Rule of 30 (Doddington et al. 2000): n impostors support FMR >= 30/n.
        check(bool(s[col + 3]) == (target >= 30.0 / ni), f"{name}: FMR {target:g} supported flag "
              f"{int(s[col + 3])} with {ni} impostor comparisons")
    # Best accuracy: brute force over every distinct threshold with sklearn's accuracy_score.
    # Counting per threshold with sorted arrays (accuracy_score per threshold
    # would take minutes on 42,000 thresholds); accuracy_score then checks
    # the threshold the library chose.
    cands = np.concatenate([np.unique(scores), [np.inf]])
    gs, im = np.sort(scores[labels > 0]), np.sort(scores[labels <= 0])
    accepted_gen = gs.size - np.searchsorted(gs, cands, side="left")
    rejected_imp = np.searchsorted(im, cands, side="left")
    best = np.max((accepted_gen + rejected_imp) / scores.size)
    check(abs(s[12] - best) < 1e-15, f"{name}: best accuracy {s[12]:.5f} vs brute force {best:.5f}")
    got = accuracy_score(labels, (scores >= s[11]).astype(int))
    check(abs(got - best) < 1e-15 and abs(s[13] - got) < 1e-15,
          f"{name}: accuracy at the chosen threshold {got:.5f} (tool says {s[13]:.5f})")
    k = np.nonzero(fpr <= 1e-2)[0][-1]
    ci = binomtest(int(round(fpr[k] * ni)), ni).proportion_ci(0.95, method="wilson")
    check(abs(s[14] - ci.low) < 1e-9 and abs(s[15] - ci.high) < 1e-9,
          f"{name}: Wilson 95% CI of FMR [{s[14]:.6f}, {s[15]:.6f}] vs scipy [{ci.low:.6f}, {ci.high:.6f}]")


def main():
    rng = np.random.default_rng(20260412)
    with tempfile.TemporaryDirectory() as tmp:
        # Many ties: scores on a 0.05 grid.
        n = 3000
        lab = (rng.random(n) < 0.4).astype(float)
        sc = np.round((rng.normal(size=n) + 1.5 * lab) * 20) / 20
        run_case(tmp, "tied", sc, lab)
        # No ties, larger impostor set so the 1e-3 point is supported.
        lab = np.concatenate([np.ones(2000), np.zeros(40000)])
        sc = rng.normal(size=lab.size) + 2.5 * lab
        run_case(tmp, "continuous", sc, lab)
        # Tiny set with a tie across classes.
        run_case(tmp, "tiny", np.array([0.9, 0.5, 0.5, 0.1, 0.7, 0.3]),
                 np.array([1, 1, 0, 0, 0, 1], dtype=float))
    sys.exit(finish())


if __name__ == "__main__":
    main()
