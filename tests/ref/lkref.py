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


# ---- a throwaway likenessd: shared by the service checks here, by
# tests/harden/lkservice.py and by tests/deploy/lkdeploy.py.

def free_port():
    """A TCP port of 127.0.0.1 that was free a moment ago (bound to port 0,
    then released)."""
    import socket
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def make_dev_certs(src, tls_dir):
    """Development CA, server and client certificates in tls_dir, made by
    certs-example/make-dev-certs.sh."""
    import os
    import subprocess
    subprocess.run(["sh", os.path.join(src, "certs-example", "make-dev-certs.sh"), tls_dir],
                   check=True, capture_output=True)


def init_key_file(likeness, path, env=None):
    """A fresh master key file made by `likeness keys init`."""
    import subprocess
    subprocess.run([likeness, "keys", "init", "--key-file", path], check=True,
                   capture_output=True, env=env)


def write_ini(path, sections, extra=""):
    """A likenessd configuration: sections is a list of (name, {key: value})
    written in order, then extra (raw text) appended."""
    with open(path, "w") as f:
        for name, keys in sections:
            f.write(f"[{name}]\n" + "".join(f"{k} = {v}\n" for k, v in keys.items()))
        f.write(extra)


def api_create(likeness, cfg, name, scopes, env=None):
    """A new API key (`likeness keys api-create`) with scopes (comma list)."""
    import subprocess
    return subprocess.run([likeness, "keys", "api-create", "--config", cfg, "--name", name,
                           "--scopes", scopes], check=True, capture_output=True, text=True,
                          env=env).stdout.strip()


def start_likenessd(likenessd, cfg, log_path, curl, url, tries=150):
    """Starts likenessd --config cfg (stderr to log_path) and polls url with
    the curl command line every 0.2 s until it answers, at most tries times
    or until the process exits; returns the process."""
    import subprocess
    import time
    with open(log_path, "w") as log:
        p = subprocess.Popen([likenessd, "--config", cfg], stderr=log)
    for _ in range(tries):
        if p.poll() is not None:
            break
        if subprocess.run(curl + [url], capture_output=True).returncode == 0:
            break
        time.sleep(0.2)
    return p
