"""Failover of two likenessd replicas behind nginx, sharing one PostgreSQL
store (tests/pg/pg-test-server.sh) and one key file:

1. an enrolment through replica 1 is found and verifies through replica 2
   (same score from both);
2. two replicas append audit records at once (verifications through each
   directly) and `likeness audit verify` passes: one chain, two writers;
3. through nginx (deploy/nginx/likeness.conf, rendered with local paths),
   4 client threads post enrolments of LFW photos for about 20 s, and
   replica 1 is killed with SIGKILL in the middle (then started again).
   Afterwards every 201 names a template that exists (GET through nginx
   answers 200 with the same id; psql finds the row and its audit record),
   every other answer is a retryable error (502/503/504, a connection
   error) or the photo's own 422 quality problem, never a wrong one, and
   the audit chain written by both replicas verifies.
The references: PostgreSQL's own client psql for what is stored, nginx's
documented retry behaviour (deploy/nginx/likeness.conf), the API's status
codes (api-spec/openapi.yaml).

nginx and the PostgreSQL 15 server are required: without them this check
fails (it does not skip), saying what to install."""
import http.client
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import tempfile
import threading
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
sys.path.insert(0, os.path.join(HERE, "..", "deploy"))
from lkref import check, finish, skip, lfw_sample  # noqa: E402
import lkdeploy as D  # noqa: E402

SRC = os.environ.get("LIKENESS_SOURCE", os.path.join(HERE, "..", ".."))
BIN = os.environ.get("LIKENESS_BIN", "build/bin")
SHARED = os.environ.get("LIKENESS_SHARED", os.path.join(SRC, "..", "shared"))
LFW = os.path.join(SHARED, "datasets", "lfw", "lfw-deepfunneled")
MODEL = os.path.join(SRC, "models", "likeness-lfw.lkmodel")
CLI = os.path.join(BIN, "likeness")
DAEMON = os.path.join(BIN, "likenessd")
PSQL = os.path.join(D.PGBIN, "psql")

NGINX = D.find_nginx()
D.need_postgres()
for p in (CLI, DAEMON):
    if not os.path.exists(p):
        skip(f"{p} is not built")
if not os.path.isdir(LFW):
    skip(f"LFW is missing: {LFW}")

LOAD_S = 20.0        # enrolment load through nginx
KILL_AT_S = 6.0      # replica 1 gets SIGKILL this far into the load
RESTART_AT_S = 9.0   # and is started again here
THREADS = 4
# Quality problems of the photo itself: the expected 4xx of an enrolment.
QUALITY = {"no-face", "multiple-faces", "face-too-small", "poor-quality"}
RETRYABLE = {502, 503, 504}

base = tempfile.mkdtemp(prefix="lk-failover-")
procs = {}


def cleanup():
    # SIGTERM first: nginx's master stops its workers only when it is asked
    # (a SIGKILLed master leaves them running); replicas drain.
    for p in procs.values():
        if p.poll() is None:
            p.terminate()
    for p in procs.values():
        try:
            p.wait(timeout=15)
        except subprocess.TimeoutExpired:
            p.kill()
            p.wait()
    D.stop_postgres(SRC, base)
    shutil.rmtree(base, ignore_errors=True)


def run(args, **kw):
    return subprocess.run(args, capture_output=True, text=True, **kw)


def psql(url, sql):
    out = run([PSQL, "-X", "-q", "-A", "-t", "-d", url, "-c", sql])
    if out.returncode != 0:
        raise RuntimeError("psql: " + out.stderr.strip())
    return [ln for ln in out.stdout.splitlines() if ln]


def request(port, method, path, ctx, body=None, ctype=None, token=None, timeout=60):
    """One request on a new connection: (status, parsed JSON or None)."""
    c = http.client.HTTPSConnection("127.0.0.1", port, context=ctx, timeout=timeout)
    h = {}
    if token:
        h["Authorization"] = "Bearer " + token
    if ctype:
        h["Content-Type"] = ctype
    try:
        c.request(method, path, body=body, headers=h)
        r = c.getresponse()
        data = r.read()
        try:
            j = json.loads(data) if data else None
        except ValueError:
            j = None
        return r.status, j
    finally:
        c.close()


def start_replica(name, cfg):
    log = open(os.path.join(base, name + ".log"), "a")
    procs[name] = subprocess.Popen([DAEMON, "--config", cfg], stdout=log, stderr=log)
    return procs[name]


def audit_verify(url, keys):
    v = run([CLI, "audit", "verify", "--store", url, "--key-file", keys])
    try:
        rep = json.loads(v.stdout)
    except ValueError:
        rep = {}
    return v.returncode, rep, (v.stdout + v.stderr).strip()


try:
    t_begin = time.time()
    url = D.start_postgres(SRC, base, D.free_port())
    print("store:", url)
    tls = os.path.join(base, "tls")
    D.make_certs(SRC, tls)
    ctx = D.tls_context(os.path.join(tls, "ca.crt"))
    keys = os.path.join(base, "keys")
    run([CLI, "keys", "init", "--key-file", keys], check=True)
    mk = run([CLI, "keys", "api-create", "--store", url, "--key-file", keys, "--name", "failover",
              "--scopes", "verify,enrol,delete,audit"])
    check(mk.returncode == 0, f"likeness keys api-create --store {url} makes an API key "
          f"{mk.stderr.strip()}")
    token = mk.stdout.strip()

    ports = [D.free_port(), D.free_port()]
    cfgs = []
    for i, p in enumerate(ports):
        cfg = os.path.join(base, f"r{i + 1}.ini")
        # A checkpoint every 25 records: both replicas sign some.
        D.write_replica_config(cfg, p, tls, MODEL, url, keys, workers=1, checkpoint_interval=25)
        cfgs.append(cfg)
    for i in range(2):
        start_replica(f"r{i + 1}", cfgs[i])
    for i in range(2):
        ok = D.wait_ready(ports[i], ctx, procs[f"r{i + 1}"])
        if not ok:
            print(open(os.path.join(base, f"r{i + 1}.log")).read()[-3000:])
        check(ok, f"replica {i + 1} on port {ports[i]} is ready (GET /readyz 200)")
    if not all(D.https_status(p, "/readyz", ctx) == 200 for p in ports):
        raise SystemExit(finish())

    photos = lfw_sample(LFW, 7, 240)
    A = os.path.join(LFW, "Aaron_Peirsol", "Aaron_Peirsol_0001.jpg")
    B = os.path.join(LFW, "Aaron_Peirsol", "Aaron_Peirsol_0002.jpg")
    img = {p: open(p, "rb").read() for p in photos + [A, B]}

    # ---- 1. one store behind both replicas ----
    ct, body = D.multipart([("image", "a.jpg", img[A]), ("subject_ref", None, b"failover-a")])
    st, j = request(ports[0], "POST", "/v1/templates", ctx, body, ct, token)
    tid = (j or {}).get("template_id", "")
    check(st == 201 and re.fullmatch(r"[0-9a-f]{32}", tid or ""),
          f"enrolment through replica 1 answers 201 with a template id ({st}, {tid})")
    st2, j2 = request(ports[1], "GET", f"/v1/templates/{tid}", ctx, token=token)
    check(st2 == 200 and (j2 or {}).get("template_id") == tid,
          f"replica 2 finds the template enrolled through replica 1 ({st2})")
    ct, body = D.multipart([("probe", "b.jpg", img[B]), ("template_id", None, tid.encode())])
    scores = []
    for i, p in enumerate(ports):
        st3, j3 = request(p, "POST", "/v1/verifications", ctx, body, ct, token)
        check(st3 == 200 and (j3 or {}).get("reference_type") == "template",
              f"verification against that template through replica {i + 1} answers 200 ({st3})")
        scores.append((j3 or {}).get("score"))
    check(scores[0] is not None and scores[0] == scores[1],
          f"both replicas give the same score for the same probe and template ({scores})")

    # ---- 2. two replicas append to one audit chain at once ----
    before = int(psql(url, "SELECT count(*) FROM audit_records")[0])
    results = []

    def verifier(port, n):
        for _ in range(n):
            try:
                results.append(request(port, "POST", "/v1/verifications", ctx, body, ct,
                                       token)[0])
            except OSError as e:
                results.append(repr(e))

    ts = [threading.Thread(target=verifier, args=(ports[i % 2], 12)) for i in range(4)]
    for t in ts:
        t.start()
    for t in ts:
        t.join()
    after = int(psql(url, "SELECT count(*) FROM audit_records")[0])
    check(results == [200] * 48, f"48 verifications, 24 through each replica at once: all 200 "
          f"({sorted(set(map(str, results)))})")
    check(after - before == 48, f"48 more audit records ({after - before})")
    rc, rep, txt = audit_verify(url, keys)
    check(rc == 0 and rep.get("ok") is True,
          f"audit verify passes after concurrent appends by two replicas: {txt}")
    gaps = psql(url, "SELECT count(*) FROM audit_records a WHERE a.seq > 1 AND NOT EXISTS "
                     "(SELECT 1 FROM audit_records b WHERE b.seq = a.seq - 1)")
    check(gaps == ["0"], f"psql: the sequence numbers have no gap ({gaps})")

    # ---- 3. failover under an enrolment load through nginx ----
    ngdir = os.path.join(base, "nginx")
    os.makedirs(ngdir)
    nport = D.free_port()
    conf = D.write_nginx(os.path.join(SRC, "deploy", "nginx", "likeness.conf"), ngdir, nport,
                         tls, ports)
    t = run([NGINX, "-t", "-c", conf, "-p", ngdir])
    check(t.returncode == 0, "nginx -t accepts the rendered configuration " + t.stderr.strip())
    nglog = open(os.path.join(ngdir, "stderr.log"), "w")
    procs["nginx"] = subprocess.Popen([NGINX, "-c", conf, "-p", ngdir, "-g", "daemon off;"],
                                      stdout=nglog, stderr=nglog)
    check(D.wait_ready(nport, ctx, procs["nginx"], 20),
          f"nginx on port {nport} answers /readyz 200 from a replica")

    events = []  # (thread, t_start, t_end, status or error text, template id, problem type)
    lock = threading.Lock()
    t0 = time.time()

    def loader(k):
        i = 0
        conn = None
        while time.time() - t0 < LOAD_S:
            photo = photos[(k * 60 + i) % len(photos)]
            ct_, body_ = D.multipart([("image", os.path.basename(photo), img[photo]),
                                      ("subject_ref", None, f"load-{k}-{i}".encode())])
            i += 1
            ts_ = time.time() - t0
            try:
                if conn is None:
                    conn = http.client.HTTPSConnection("127.0.0.1", nport, context=ctx,
                                                       timeout=60)
                conn.request("POST", "/v1/templates", body=body_,
                             headers={"Authorization": "Bearer " + token, "Content-Type": ct_})
                r = conn.getresponse()
                data = r.read()
                try:
                    j_ = json.loads(data)
                except ValueError:
                    j_ = {}
                ev = (k, ts_, time.time() - t0, r.status, j_.get("template_id", ""),
                      str(j_.get("type", "")).rsplit("/", 1)[-1])
                if r.getheader("Connection", "").lower() == "close":
                    conn.close()
                    conn = None
            except (OSError, http.client.HTTPException) as e:
                ev = (k, ts_, time.time() - t0, "conn:" + type(e).__name__, "", "")
                if conn:
                    conn.close()
                conn = None
            with lock:
                events.append(ev)
        if conn:
            conn.close()

    ths = [threading.Thread(target=loader, args=(k,)) for k in range(THREADS)]
    for th in ths:
        th.start()
    time.sleep(KILL_AT_S)
    t_kill = time.time() - t0
    procs["r1"].send_signal(signal.SIGKILL)
    procs["r1"].wait()
    time.sleep(RESTART_AT_S - KILL_AT_S)
    t_restart = time.time() - t0
    start_replica("r1", cfgs[0])
    back = D.wait_ready(ports[0], ctx, procs["r1"], 30)
    t_back = time.time() - t0
    for th in ths:
        th.join()
    t_end = time.time() - t0
    check(back, f"replica 1 starts again after SIGKILL and is ready ({t_back:.1f} s)")

    created = [e for e in events if e[3] == 201]
    retryable = [e for e in events if e[3] in RETRYABLE or str(e[3]).startswith("conn:")]
    quality = [e for e in events if e[3] == 422 and e[5] in QUALITY]
    other = [e for e in events if e not in created and e not in retryable and e not in quality]
    in_flight = [e for e in events if e[1] < t_kill < e[2]]
    outage = [e for e in events if e[2] > t_kill and e[1] < t_back]
    print(f"load: {len(events)} enrolments in {t_end:.1f} s through nginx; replica 1 killed at "
          f"{t_kill:.1f} s, started again at {t_restart:.1f} s, ready at {t_back:.1f} s")
    print(f"  answered 201: {len(created)}; retryable errors: {len(retryable)} "
          f"({sorted(set(str(e[3]) for e in retryable))}); 422 quality problems: "
          f"{len(quality)}; anything else: {len(other)}")
    print(f"  in flight at the kill: {len(in_flight)} "
          f"({sorted(str(e[3]) for e in in_flight)}); during the outage (kill to ready): "
          f"{len(outage)}, of them 201: {sum(1 for e in outage if e[3] == 201)}, retryable: "
          f"{sum(1 for e in outage if e in retryable)}")
    check(len(created) >= 20, f"the load enrolled something ({len(created)} answered 201)")
    check(not other, f"no answer is wrong: every one is 201, a retryable 502/503/504 or "
          f"connection error, or a 422 quality problem ({other[:5]})")
    check(any(e[1] > t_kill for e in created),
          "enrolments go on being answered 201 after replica 1 is killed")

    ids = [e[4] for e in created]
    check(len(set(ids)) == len(ids) and all(re.fullmatch(r"[0-9a-f]{32}", x) for x in ids),
          "every 201 names its own template id")
    missing_get = []
    for x in ids:
        st, j = request(nport, "GET", f"/v1/templates/{x}", ctx, token=token)
        if st != 200 or (j or {}).get("template_id") != x:
            missing_get.append((x, st))
    check(not missing_get, f"GET through nginx answers 200 with the same id for each of the "
          f"{len(ids)} templates answered 201 ({missing_get[:5]})")
    stored = set(psql(url, "SELECT template_id FROM templates"))
    check(set(ids) <= stored, f"psql: every template answered 201 is a row of templates "
          f"({len(set(ids) - stored)} missing)")
    audited = set(psql(url, "SELECT template_id FROM audit_records WHERE operation = 2 "
                            "AND status = 201"))
    check(set(ids) <= audited, f"psql: every template answered 201 has its enrolment audit "
          f"record ({len(set(ids) - audited)} missing)")
    # Rows no client was told about: enrolments in flight when replica 1
    # died, committed before the kill (the client got an error). The template
    # and its audit record commit in one transaction, so every stored
    # template has its enrolment record.
    known = set(ids) | {tid}
    unacked = stored - known
    unaudited = stored - audited - {tid} - set(ids)
    print(f"  templates stored without a 201 to any client: {len(unacked)}, of them without "
          f"an enrolment audit record: {len(unaudited)}")
    check(not unaudited, f"every stored template has its enrolment audit record "
          f"({len(unaudited)} without)")
    check(len(unacked) <= len(in_flight) + THREADS,
          f"templates stored without a 201 come only from requests in flight at the kill "
          f"({len(unacked)} <= {len(in_flight)} in flight)")

    log = open(os.path.join(ngdir, "access.log")).read()
    r1_all = [ln for ln in log.splitlines()
              if f"127.0.0.1:{ports[0]}" in ln.split("upstream=")[-1]]
    print(f"  nginx access log: {len(r1_all)} attempts sent to replica 1 in all")
    # The restarted replica's own counters (a new process starts at 0): once
    # fail_timeout has passed, nginx sends it enrolments again.
    c = http.client.HTTPSConnection("127.0.0.1", ports[0], context=ctx, timeout=10)
    c.request("GET", "/metrics")
    met = c.getresponse().read().decode()
    c.close()
    again = sum(float(m.group(1)) for m in re.finditer(
        r'^likeness_http_requests_total\{route="/v1/templates",method="POST",status="201"\} '
        r'(\S+)$', met, re.M))
    check(again > 0, f"nginx sends enrolments to replica 1 again after its restart "
          f"({again:.0f} answered 201 by the new process)")

    rc, rep, txt = audit_verify(url, keys)
    check(rc == 0 and rep.get("ok") is True,
          f"audit verify passes on the chain written by both replicas through the kill: {txt}")
    n_rec = int(psql(url, "SELECT count(*) FROM audit_records")[0])
    check(rep.get("records") == n_rec, f"it covers every record ({rep.get('records')} of {n_rec})")

    # The service after the failover: verifications through nginx answer 200.
    ct, body = D.multipart([("probe", "b.jpg", img[B]), ("template_id", None, tid.encode())])
    sts = [request(nport, "POST", "/v1/verifications", ctx, body, ct, token)[0]
           for _ in range(6)]
    check(sts == [200] * 6, f"verifications through nginx after the failover: {sts}")
    print(f"total {time.time() - t_begin:.1f} s")
except SystemExit:
    cleanup()
    raise
except Exception:
    cleanup()
    raise
cleanup()
sys.exit(finish())
