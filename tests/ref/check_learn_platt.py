"""Platt scaling of the learn module (Newton with backtracking, Lin, Lin &
Weng 2007) against scikit-learn 1.2's sklearn.calibration._sigmoid_calibration,
which minimises the same objective with the same targets (Platt 2000:
hi = (N+ + 1)/(N+ + 2), lo = 1/(N- + 2)) and the same sign convention,
P = 1/(1 + exp(A f + B)), but with scipy's BFGS. A and B must agree to
1e-4 relative. As a tighter second reference, the same objective is also
minimised with scipy.optimize.minimize (BFGS, gtol 1e-10) started from
sklearn's answer."""
import os
import subprocess
import sys
import tempfile

import numpy as np

from lkref import check, finish, rmat, wmat  # noqa: E402
from scipy.optimize import minimize
from scipy.special import expit, xlogy
from sklearn.calibration import _sigmoid_calibration

BIN = os.environ.get("LIKENESS_BIN", "")
TOOL = os.path.join(BIN, "lkt_learn_ref")
if not os.access(TOOL, os.X_OK):
    print(f"SKIPPED: {TOOL} is not built (set LIKENESS_BIN)", file=sys.stderr)
    sys.exit(77)






def tight_reference(f, y, ab0):
    n1 = float((y > 0).sum())
    n0 = y.size - n1
    t = np.where(y > 0, (n1 + 1) / (n1 + 2), 1 / (n0 + 2))

    def obj(ab):
        p = expit(-(ab[0] * f + ab[1]))
        return -(xlogy(t, p) + xlogy(1 - t, 1 - p)).sum()

    def grad(ab):
        p = expit(-(ab[0] * f + ab[1]))
        return np.array([np.dot(t - p, f), np.sum(t - p)])

    return minimize(obj, ab0, jac=grad, method="BFGS", options={"gtol": 1e-10, "maxiter": 10000}).x


def main():
    rng = np.random.default_rng(7)
    cases = []
    # Linear-SVM-like decision values: classes around -1 and +1.
    y = np.concatenate([np.ones(1100), -np.ones(1100)])
    cases.append(("balanced", rng.normal(size=y.size) * 0.8 + 0.9 * y, y))
    # Imbalanced (1:9) and wider spread.
    y = np.concatenate([np.ones(300), -np.ones(2700)])
    cases.append(("imbalanced", rng.normal(size=y.size) * 2.0 + 1.5 * y, y))
    # Poorly separated, small.
    y = np.concatenate([np.ones(60), -np.ones(40)])
    cases.append(("weak", rng.normal(size=y.size) + 0.3 * y, y))
    # Shifted scores (non-zero B).
    y = np.concatenate([np.ones(500), -np.ones(500)])
    cases.append(("shifted", rng.normal(size=y.size) * 0.5 + 0.7 * y + 3.0, y))
    with tempfile.TemporaryDirectory() as tmp:
        for name, f, y in cases:
            wmat(os.path.join(tmp, "f.bin"), f)
            wmat(os.path.join(tmp, "y.bin"), y)
            subprocess.run([TOOL, "platt", os.path.join(tmp, "f.bin"), os.path.join(tmp, "y.bin"),
                            os.path.join(tmp, "ab.bin")], check=True)
            A, B = rmat(os.path.join(tmp, "ab.bin"))[0]
            sa, sb = _sigmoid_calibration(f, y)
            ra, rb = tight_reference(f, y, np.array([sa, sb]))
            da, db = abs(A - sa) / abs(sa), abs(B - sb) / max(abs(sb), 1e-3)
            check(da < 1e-4 and db < 1e-4,
                  f"{name}: A={A:.8f} B={B:.8f} vs sklearn A={sa:.8f} B={sb:.8f} "
                  f"(relative diff {da:.2e}, {db:.2e})")
            ta, tb = abs(A - ra) / abs(ra), abs(B - rb) / max(abs(rb), 1e-3)
            check(ta < 1e-6 and tb < 1e-6,
                  f"{name}: vs tight BFGS A={ra:.10f} B={rb:.10f} (relative diff {ta:.2e}, {tb:.2e})")
    sys.exit(finish())


if __name__ == "__main__":
    main()
