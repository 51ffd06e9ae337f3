"""Crash consistency of likenessd with its SQLite store (WAL, synchronous=FULL):
what the service acknowledged survives a kill -9, and so do the store file,
the audit chain and the key file when a key rotation is killed.

1. Eight rounds of: start likenessd (sanitized build); three client threads
   enrol photos and delete some of the templates they were answered 201 for;
   kill -9 the service at a random moment (seeded choice of 0.8 to 3.5 s);
   then, with the service down: Python's sqlite3 (SQLite's own
   `PRAGMA integrity_check`) says "ok", `likeness audit verify --config`
   passes, and the audit export holds a record of every acknowledged
   enrolment and deletion; restart: every template answered 201 (and not
   sent for deletion) answers GET 200, every deletion answered 204 answers
   GET 404.
2. Five rounds of key rotation while the service serves verifications:
   `likeness keys rotate --config` is killed -9 at a random moment (and in
   rounds 2 and 4 the service too, at the same moment); then the key file is
   intact (mode 0600, `likenessd --check-config` loads it), the service
   (restarted if it was killed) answers 200 to a verification against a
   sample of the templates, and a second rotation runs to completion (exit
   0, no record it could not open). At the end every template is verified
   against once.
The sanitizer logs of every run of the service are scanned for reports.
References: SQLite's integrity_check (through Python's sqlite3), POSIX file
modes (Python's os.stat), the service's own answers (status codes) as the
record of what was acknowledged."""
import atexit
import json
import os
import random
import signal
import sqlite3
import stat
import subprocess
import sys
import threading
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
sys.path.insert(0, os.path.join(os.path.dirname(HERE), "harden"))
from lkref import check, finish, skip  # noqa: E402
import lkservice as S  # noqa: E402

for f in (S.LIKENESSD, S.LIKENESS, S.lfw("Aaron_Peirsol", 1), S.MODEL):
    if not os.path.exists(f):
        skip(f"{f} is missing")

T0 = time.time()
rnd = random.Random(1927)
svc = S.Service("crash", server={"workers": 2, "queue_depth": 64})
full = svc.token("full", "verify,enrol,delete,audit")
atexit.register(lambda: svc.kill9() if svc.alive() else None)
FACES = [S.read(S.lfw("Aaron_Peirsol", i)) for i in (1, 2, 3, 4)]
PROBE = FACES[0]

created = {}        # template id -> round, answered 201
delete_sent = set()  # ids a DELETE was sent for (answered or not)
deleted = set()      # ids answered 204
reports = []


def san_check(label):
    rep = svc.sanitizer_report()
    if rep and rep not in reports:
        reports.append(rep)
        check(False, f"sanitizer report in the service's log ({label}):\n{rep}")


def loader(stop, rid, seed):
    r = random.Random(seed)
    mine = []
    while not stop.is_set():
        try:
            if mine and r.random() < 0.3:
                tid = mine.pop(r.randrange(len(mine)))
                delete_sent.add(tid)
                st, _, _ = svc.request("DELETE", "/v1/templates/" + tid, token=full, timeout=30)
                if st == 204:
                    deleted.add(tid)
            else:
                st, _, body = svc.enrol(full, [r.choice(FACES)], subject_ref=f"crash-{rid}",
                                        timeout=30)
                if st == 201:
                    tid = json.loads(body)["template_id"]
                    created[tid] = rid
                    mine.append(tid)
        except (OSError, ValueError, Exception):  # the service is gone: stop
            if not svc.alive():
                return
            time.sleep(0.05)


def integrity():
    con = sqlite3.connect(svc.store_path)
    try:
        return con.execute("PRAGMA integrity_check").fetchone()[0]
    finally:
        con.close()


def audit_verify():
    v = S.cli("audit", "verify", "--config", svc.cfg)
    try:
        rep = json.loads(v.stdout)
    except ValueError:
        rep = {}
    return v.returncode == 0 and rep.get("ok") is True, v.stdout.strip()[:300] + v.stderr[-300:]


def audit_ops():
    out = S.cli("audit", "export", "--config", svc.cfg).stdout
    ops = {}
    for ln in out.splitlines():
        if ln.strip():
            rec = json.loads(ln)
            if rec.get("template_id"):
                ops.setdefault(rec["template_id"], set()).add((rec["operation"], rec["status"]))
    return ops


# ------------------------------------------------ 1. kill -9 under enrolment load
print("--- kill -9 during enrolments and deletions")
lost, wrongly_present, no_audit = [], [], []
for rnd_i in range(8):
    svc.start()
    stop = threading.Event()
    threads = [threading.Thread(target=loader, args=(stop, f"{rnd_i}.{k}", rnd.random()),
                                daemon=True) for k in range(3)]
    for t in threads:
        t.start()
    delay = rnd.uniform(0.8, 3.5)
    time.sleep(delay)
    svc.kill9()
    stop.set()
    for t in threads:
        t.join(timeout=60)
    san_check(f"round {rnd_i}")
    ic = integrity()
    ok, txt = audit_verify()
    check(ic == "ok", f"round {rnd_i} (killed after {delay:.1f} s): PRAGMA integrity_check is {ic!r}")
    check(ok, f"round {rnd_i}: likeness audit verify passes after the kill: {txt}")
    ops = audit_ops()
    for tid in created:
        if ("enrolment", 201) not in ops.get(tid, set()):
            no_audit.append((tid, "enrolment"))
    for tid in deleted:
        if ("deletion", 204) not in ops.get(tid, set()):
            no_audit.append((tid, "deletion"))
    svc.start()
    for tid in list(created):
        if tid in delete_sent:
            continue
        st, _, _ = svc.request("GET", "/v1/templates/" + tid, token=full)
        if st != 200:
            lost.append((tid, st))
    for tid in deleted:
        st, _, _ = svc.request("GET", "/v1/templates/" + tid, token=full)
        if st != 404:
            wrongly_present.append((tid, st))
    svc.kill9() if rnd_i % 2 else svc.stop()
    print(f"round {rnd_i}: {len(created)} templates acknowledged, {len(deleted)} deletions "
          f"acknowledged so far")
check(len(created) >= 40 and len(deleted) >= 5,
      f"the load made {len(created)} enrolments and {len(deleted)} deletions")
check(not lost, f"every acknowledged enrolment survives the kills ({len(lost)} lost: {lost[:5]})")
check(not wrongly_present, f"every acknowledged deletion stays done ({wrongly_present[:5]})")
check(not no_audit, f"every acknowledged enrolment and deletion is in the audit chain "
      f"({len(no_audit)} missing: {no_audit[:5]})")

# ------------------------------------------------ 2. kill -9 during key rotation
print("--- kill -9 during key rotation")
alive_ids = [t for t in created if t not in delete_sent]


def verify_against(tid):
    ct, b = S.multipart([("probe", PROBE, "p.jpg", "image/jpeg"),
                         ("template_id", tid.encode(), None, None)])
    st, _, body = svc.request("POST", "/v1/verifications", b, {"Content-Type": ct}, full)
    return st, body


def key_file_ok():
    mode = stat.S_IMODE(os.stat(svc.key_file).st_mode)
    r = subprocess.run([S.LIKENESSD, "--config", svc.cfg, "--check-config"], capture_output=True,
                       text=True, env=S.san_env(), timeout=120)
    return mode, r.returncode, (r.stderr or r.stdout)[-300:]


svc.start()
rot_len = 1.5
for k in range(5):
    serving = threading.Event()
    answers = []

    def traffic():
        while not serving.is_set():
            try:
                answers.append(verify_against(rnd_ids[len(answers) % len(rnd_ids)])[0])
            except OSError:
                if not svc.alive():
                    return

    rnd_ids = rnd.sample(alive_ids, min(10, len(alive_ids)))
    ino = os.stat(svc.key_file).st_ino
    tr = threading.Thread(target=traffic, daemon=True)
    tr.start()
    rot = subprocess.Popen([S.LIKENESS, "keys", "rotate", "--config", svc.cfg, "--batch", "7"],
                           stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=S.san_env())
    # A random moment within a rotation's measured length (the first round
    # guesses 1.5 s).
    delay = rnd.uniform(0.05, 1.2 * rot_len)
    time.sleep(delay)
    both = k in (1, 3)
    rot.send_signal(signal.SIGKILL)
    if both:
        svc.kill9()
    rot.wait()
    serving.set()
    tr.join(timeout=60)
    # While the rotation ran (and was killed), every verification that got an
    # answer got 200; only a killed service may end a request without one.
    check((answers or both) and all(a == 200 for a in answers),
          f"rotation round {k}: {len(answers)} verifications during the killed rotation, "
          f"all 200 ({sorted(set(answers))})")
    san_check(f"rotation round {k}")
    mode, rc, txt = key_file_ok()
    check(mode == 0o600 and rc == 0, f"rotation round {k} (rotate killed after {delay:.2f} s"
          f"{', service killed too' if both else ''}): key file mode {oct(mode)}, "
          f"likenessd --check-config exit {rc} {'' if rc == 0 else txt}")
    check(integrity() == "ok", f"rotation round {k}: PRAGMA integrity_check is ok")
    if both:
        svc.start()
    keys_seen = set()
    for t in rnd.sample(alive_ids, min(20, len(alive_ids))):
        st, _, body = svc.request("GET", "/v1/templates/" + t, token=full)
        keys_seen.add(json.loads(body).get("key_id") if st == 200 else st)
    print(f"rotation round {k}: the killed rotation "
          f"{'had replaced' if os.stat(svc.key_file).st_ino != ino else 'had not yet replaced'}"
          f" the key file; a sample of 20 templates is sealed under {len(keys_seen)} key(s)")
    bad = [(t, st) for t in rnd.sample(alive_ids, min(15, len(alive_ids)))
           for st, _ in [verify_against(t)] if st != 200]
    check(not bad, f"rotation round {k}: verifications against 15 templates answer 200 {bad[:3]}")
    t_rot = time.time()
    r2 = S.cli("keys", "rotate", "--config", svc.cfg, timeout=300)
    rot_len = time.time() - t_rot
    check(r2.returncode == 0, f"rotation round {k}: a second rotation completes (exit "
          f"{r2.returncode}) {r2.stdout.strip()[-200:]} {r2.stderr.strip()[-200:] if r2.returncode else ''}")
    tmp_left = [f for f in os.listdir(svc.dir) if f.startswith(".keys.") and f.endswith(".tmp")]
    if tmp_left:
        print(f"note: killed rotation left {len(tmp_left)} temporary key file(s): {tmp_left}")

bad = []
for tid in alive_ids:
    st, body = verify_against(tid)
    if st != 200:
        bad.append((tid, st, body[:120]))
check(not bad, f"every one of the {len(alive_ids)} surviving templates opens after the "
      f"rotations (verification 200): {bad[:3]}")
ok, txt = audit_verify()
check(ok, f"likeness audit verify passes at the end: {txt[:200]}")
rc = svc.stop()
check(rc == 0, f"likenessd drains and exits 0 at the end ({rc})")
san_check("end")
check(not reports, "no sanitizer report in any run of the service")
print(f"total {time.time() - T0:.0f} s")
sys.exit(finish())
