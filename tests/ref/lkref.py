"""Helpers shared by the reference checks: a tally of checks, and the
matrix files the test tools read and write (int64 rows, int64 columns, then
row-major little-endian float64)."""
import numpy as np

failures = 0


def check(cond, msg):
    """Records one check; prints ok/FAIL with the message."""
    global failures
    if not cond:
        failures += 1
        print("FAIL:", msg)
    else:
        print("ok:", msg)


def finish():
    """Prints the tally; returns the process exit code."""
    print(f"{failures} failed")
    return 1 if failures else 0


def wmat(path, a):
    a = np.atleast_2d(np.asarray(a, dtype="<f8"))
    with open(path, "wb") as f:
        f.write(np.array(a.shape, "<i8").tobytes() + a.tobytes())


def rmat(path):
    with open(path, "rb") as f:
        r, c = np.frombuffer(f.read(16), "<i8")
        return np.frombuffer(f.read(), "<f8").reshape(r, c)


def skip(msg):
    """Exits with CTest's skip code, saying what is missing."""
    import sys
    print("SKIPPED: " + msg, file=sys.stderr)
    sys.exit(77)


def lfw_sample(root, seed, n):
    """A seeded choice of n LFW image paths under root (all .jpg, sorted first,
    so the choice does not depend on the file system's listing order)."""
    import os
    import random
    files = sorted(os.path.join(d, f) for d, _, fs in os.walk(root) for f in fs
                   if f.endswith(".jpg"))
    return random.Random(seed).sample(files, n)
