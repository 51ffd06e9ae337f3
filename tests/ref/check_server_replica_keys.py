"""Two likenessd replicas share one store (SQLite in WAL mode, two
processes), each with its own copy of the key file, as replicas on several
hosts would. A template enrolled through replica A; `likeness keys rotate`
run with a third copy of the key file; then a verification against that
template through replica B, an enrolment through B and a verification
against it through A: all answered 200 (HTTPS by curl). Every copy of the key
file is left byte for byte as it was; the template rows (read with Python's
sqlite3) name the new data key; `likeness audit verify` passes. A replica
whose key file lacks the key the data keys are wrapped under refuses to
start, naming the data key.
Needs $LIKENESS_BIN/likenessd and likeness, curl, and LFW in $LIKENESS_SHARED."""
import base64
import json
import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import tempfile

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from lkref import (api_create, check, finish, free_port, init_key_file,  # noqa: E402
                   make_dev_certs, skip, start_likenessd, write_ini)

SRC = os.environ.get("LIKENESS_SOURCE", ".")
BIN = os.environ.get("LIKENESS_BIN", "build/bin")
SHARED = os.environ.get("LIKENESS_SHARED", "../shared")
LFW = os.path.join(SHARED, "datasets", "lfw", "lfw-deepfunneled")
A = os.path.join(LFW, "Aaron_Peirsol", "Aaron_Peirsol_0001.jpg")
B = os.path.join(LFW, "Aaron_Peirsol", "Aaron_Peirsol_0002.jpg")
MODEL = os.path.join(SRC, "models", "likeness-lfw.lkmodel")
for f in (os.path.join(BIN, "likenessd"), os.path.join(BIN, "likeness"), A, B, MODEL):
    if not os.path.exists(f):
        skip(f"{f} is missing")
if not shutil.which("curl"):
    skip("curl is not installed")

d = tempfile.mkdtemp(prefix="lk-replicas-")
make_dev_certs(SRC, d + "/tls")
init_key_file(BIN + "/likeness", d + "/keys.orig")


def setup(name, keyfile_src):
    """A directory of its own with a copy of the key file and a configuration."""
    os.makedirs(f"{d}/{name}", exist_ok=True)
    kf = f"{d}/{name}/keys"
    shutil.copyfile(keyfile_src, kf)
    os.chmod(kf, 0o600)
    port = free_port()
    cfg = f"{d}/{name}/cfg.ini"
    write_ini(cfg, [("server", {"port": port, "cert_file": f"{d}/tls/server.crt",
                                "key_file": f"{d}/tls/server.key", "workers": 1,
                                "queue_depth": 16, "drain_timeout_s": 30}),
                    ("model", {"file": MODEL}),
                    ("store", {"url": f"sqlite:{d}/store.db"}),
                    ("keys", {"file": kf}),
                    ("audit", {"checkpoint_interval": 1000})])
    return cfg, kf, port


cfg_a, kf_a, port_a = setup("a", d + "/keys.orig")
cfg_b, kf_b, port_b = setup("b", d + "/keys.orig")
cfg_c, kf_c, _ = setup("cli", d + "/keys.orig")
orig = open(d + "/keys.orig", "rb").read()
token = api_create(BIN + "/likeness", cfg_c, "t", "verify,enrol,audit")
curl = ["curl", "-sS", "--cacert", d + "/tls/ca.crt", "-H", "Authorization: Bearer " + token]


def start(name, cfg, port):
    return start_likenessd(BIN + "/likenessd", cfg, f"{d}/{name}/log", curl,
                           f"https://127.0.0.1:{port}/healthz")


def call(args):
    """(status, JSON body or {}) of one request."""
    r = subprocess.run(curl + ["-w", "\n%{http_code}"] + args, capture_output=True, text=True)
    body, _, code = r.stdout.rpartition("\n")
    try:
        j = json.loads(body) if body.strip().startswith("{") else {}
    except ValueError:
        j = {}
    return int(code) if code.isdigit() else 0, j


def enrol(port, image):
    return call(["-F", "image=@" + image, f"https://127.0.0.1:{port}/v1/templates"])


def verify(port, tid, image):
    body = f"{d}/req.json"
    with open(body, "w") as f:
        json.dump({"probe": base64.b64encode(open(image, "rb").read()).decode(),
                   "template_id": tid}, f)
    return call(["-H", "Content-Type: application/json", "--data-binary", "@" + body,
                       f"https://127.0.0.1:{port}/v1/verifications"])


def template_key(tid):
    with sqlite3.connect(f"file:{d}/store.db?mode=ro", uri=True) as db:
        row = db.execute("SELECT key_id FROM templates WHERE template_id = ?", (tid,)).fetchone()
    return row[0] if row else None


srv_a = start("a", cfg_a, port_a)
srv_b = start("b", cfg_b, port_b)
try:
    check(srv_a.poll() is None and srv_b.poll() is None, "both replicas started")
    st, j = enrol(port_a, A)
    tid1 = j.get("template_id", "")
    check(st == 201 and len(tid1) == 32, f"enrolment through replica A: {st}")
    key0 = template_key(tid1)

    rot = subprocess.run([BIN + "/likeness", "keys", "rotate", "--config", cfg_c],
                         capture_output=True, text=True)
    res = json.loads(rot.stdout) if rot.stdout.strip().startswith("{") else {}
    dk = res.get("key_id", "")
    check(rot.returncode == 0 and dk.startswith("d") and res.get("previous_key_id") == key0 and
          res.get("resealed") == 1,
          f"likeness keys rotate with a third copy of the key file: {rot.stdout.strip()} "
          f"{rot.stderr.strip()[-300:]}")
    check(template_key(tid1) == dk, f"the template is re-sealed under the new data key {dk}")

    st, j = verify(port_b, tid1, B)
    check(st == 200 and "score" in j, f"verification against it through replica B: {st} "
          f"{j.get('decision') or j}")
    st, j = enrol(port_b, B)
    tid2 = j.get("template_id", "")
    check(st == 201 and len(tid2) == 32 and template_key(tid2) == dk,
          f"enrolment through replica B, sealed under {template_key(tid2)}")
    st, j = verify(port_a, tid2, A)
    check(st == 200 and "score" in j, f"verification against it through replica A: {st} "
          f"{j.get('decision') or j}")
    st, j = verify(port_a, tid1, B)
    check(st == 200, f"replica A still verifies against the first template: {st}")
    check(all(open(k, "rb").read() == orig for k in (kf_a, kf_b, kf_c)),
          "every copy of the key file is left byte for byte as it was")

    # A replica whose key file does not hold the KEK cannot start.
    init_key_file(BIN + "/likeness", d + "/keys.other")
    cfg_x, _, port_x = setup("x", d + "/keys.other")
    srv_x = subprocess.Popen([BIN + "/likenessd", "--config", cfg_x], stderr=subprocess.PIPE,
                             text=True)
    try:
        _, err = srv_x.communicate(timeout=120)
    except subprocess.TimeoutExpired:
        srv_x.kill()
        _, err = srv_x.communicate()
    check(srv_x.returncode not in (0, None) and dk in err,
          f"a replica with another key file refuses to start, naming {dk}: "
          f"{err.strip().splitlines()[-1:] if err.strip() else err}")
finally:
    for p in (srv_a, srv_b):
        if p.poll() is None:
            p.send_signal(signal.SIGTERM)
    for p in (srv_a, srv_b):
        try:
            p.wait(timeout=60)
        except subprocess.TimeoutExpired:
            p.kill()

v = subprocess.run([BIN + "/likeness", "audit", "verify", "--config", cfg_c],
                   capture_output=True, text=True)
rep = json.loads(v.stdout) if v.stdout.strip().startswith("{") else {}
check(v.returncode == 0 and rep.get("ok") is True, f"the audit chain verifies: {v.stdout.strip()}")
with sqlite3.connect(f"file:{d}/store.db?mode=ro", uri=True) as db:
    ops = [r[0] for r in db.execute("SELECT operation FROM audit_records ORDER BY seq")]
# Operation numbers of include/likeness/audit.h: 1 verify, 2 enrol, 4 key_rotation.
check(ops.count(4) == 1 and ops.count(2) == 2 and ops.count(1) == 3,
      f"audit: one key rotation, two enrolments, three verifications: {ops}")
shutil.rmtree(d, ignore_errors=True)
sys.exit(finish())
