"""Expired templates are purged from the store file while the service runs
(a purge audit record says how many). SIGTERM drains likenessd: requests already accepted are answered (200),
the process exits 0 within the drain timeout, new connections are refused
afterwards, and the audit chain it leaves verifies and ends in a signed
checkpoint. HTTPS by curl; the chain checked by `likeness audit verify`.
Needs $LIKENESS_BIN/likenessd and likeness, curl, and LFW in $LIKENESS_SHARED."""
import json
import re
import os
import signal
import subprocess
import sys
import tempfile
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from lkref import (api_create, check, finish, free_port, init_key_file,  # noqa: E402
                   make_dev_certs, skip, start_likenessd, write_ini)

SRC = os.environ.get("LIKENESS_SOURCE", ".")
BIN = os.environ.get("LIKENESS_BIN", "build/bin")
SHARED = os.environ.get("LIKENESS_SHARED", "../shared")
LFW = os.path.join(SHARED, "datasets", "lfw", "lfw-deepfunneled")
A = os.path.join(LFW, "Aaron_Peirsol", "Aaron_Peirsol_0001.jpg")
B = os.path.join(LFW, "Aaron_Peirsol", "Aaron_Peirsol_0002.jpg")
for f in (os.path.join(BIN, "likenessd"), A, B):
    if not os.path.exists(f):
        skip(f"{f} is missing")

d = tempfile.mkdtemp(prefix="lk-drain-")
make_dev_certs(SRC, d + "/tls")
init_key_file(BIN + "/likeness", d + "/keys")
port = free_port()
cfg = d + "/cfg.ini"
write_ini(cfg, [("server", {"port": port, "cert_file": "tls/server.crt",
                            "key_file": "tls/server.key", "workers": 1, "queue_depth": 16,
                            "drain_timeout_s": 60}),
                ("templates", {"purge_interval_s": 1}),
                ("model", {"file": f"{SRC}/models/likeness-lfw.lkmodel"}),
                ("store", {"url": f"sqlite:{d}/store.db"}),
                ("keys", {"file": "keys"}),
                ("audit", {"checkpoint_interval": 1000})])
token = api_create(BIN + "/likeness", cfg, "t", "verify,audit,enrol")
url = f"https://127.0.0.1:{port}"
curl = ["curl", "-sS", "--cacert", d + "/tls/ca.crt"]
srv = start_likenessd(BIN + "/likenessd", cfg, d + "/log", curl, url + "/healthz", tries=100)

# A template that lives one second is gone from the file soon after.
import sqlite3  # noqa: E402
enrol = subprocess.run(curl + ["-H", "Authorization: Bearer " + token, "-F", "image=@" + A,
                               "-F", "ttl_seconds=1", url + "/v1/templates"],
                       capture_output=True, text=True)
tid = json.loads(enrol.stdout).get("template_id", "") if enrol.stdout.startswith("{") else ""
check(len(tid) == 32, f"enrolled a template with ttl_seconds 1 ({tid})")
gone = False
for _ in range(40):
    time.sleep(0.25)
    with sqlite3.connect(f"file:{d}/store.db?mode=ro", uri=True) as db:
        if db.execute("SELECT count(*) FROM templates WHERE template_id = ?", (tid,)).fetchone()[0] == 0:
            gone = True
            break
check(gone, "the expired template's row is deleted from the store (Python's sqlite3)")

# Six verifications on one worker: most of them wait in the queue when the
# signal arrives.
N = 6
clients = [subprocess.Popen(curl + ["-o", "/dev/null", "-w", "%{http_code}", "-H",
                                    "Authorization: Bearer " + token, "-F", "probe=@" + A,
                                    "-F", "reference=@" + B, url + "/v1/verifications"],
                            stdout=subprocess.PIPE, text=True) for _ in range(N)]
time.sleep(1.0)
t0 = time.time()
srv.send_signal(signal.SIGTERM)
# While it drains, the listener is closed: a new connection is refused
# although the process is still answering the requests it had accepted.
time.sleep(0.3)
during = subprocess.run(curl + ["--max-time", "5", url + "/healthz"], capture_output=True)
still_running = srv.poll() is None
codes = [c.communicate(timeout=120)[0] for c in clients]
check(still_running and during.returncode != 0,
      f"during the drain (process running: {still_running}) a new connection is refused "
      f"(curl exit {during.returncode})")
check(codes == ["200"] * N, f"every request accepted before SIGTERM is answered 200: {codes}")
try:
    rc = srv.wait(timeout=90)
except subprocess.TimeoutExpired:
    srv.kill()
    rc = None
check(rc == 0, f"likenessd exits 0 after draining (exit {rc}, {time.time() - t0:.1f} s)")
v = subprocess.run([BIN + "/likeness", "audit", "verify", "--config", cfg], capture_output=True,
                   text=True)
rep = json.loads(v.stdout) if v.stdout.strip().startswith("{") else {}
check(v.returncode == 0 and rep.get("ok") is True, f"the audit chain verifies: {v.stdout.strip()}")
check(rep.get("records") == N + 2,
      f"audit: enrolment + purge + one record per verification ({rep.get('records')} = {N} + 2)")
with sqlite3.connect(f"file:{d}/store.db?mode=ro", uri=True) as db:
    ops = [r[0] for r in db.execute("SELECT operation FROM audit_records ORDER BY seq")]
check(ops[:2] == [2, 7] and ops[2:] == [1] * N,
      f"audit operations in order: enrolment (2), purge (7), verifications (1) "
      f"per docs/audit-format.md: {ops}")
check(rep.get("checkpoints", 0) >= 1, "a checkpoint was signed at shutdown "
      f"({rep.get('checkpoints')} with checkpoint_interval 1000)")
logtext = open(d + "/log").read()
m = re.search(r"draining (\d+) requests in flight", logtext)
check(m is not None and int(m.group(1)) > 0 and "stopped" in logtext,
      f"the drain had requests in flight to finish ({m.group(1) if m else 'no drain line'})")
sys.exit(finish())
