"""deploy/nginx/likeness.conf, rendered with local paths and ports
(tests/deploy/lkdeploy.py): `nginx -t` accepts it, its required settings are
there, and nginx run with it behaves as its comments say, in front of small
HTTPS stand-ins for replicas written here (Python's ssl and http.server):

- a 503 from the first replica: POST /v1/verifications is resent to the
  other (same X-Request-Id on both attempts); POST /v1/templates is not
  (the client gets the 503; no replica sees it twice);
- a refused connection: even POST /v1/templates moves to the other replica
  (nothing was sent);
- a body over 16 MiB: 413 from nginx, no replica sees it;
- a replica whose certificate another CA issued: 502, nothing reaches it
  (proxy_ssl_verify on).
The reference is nginx's documentation of proxy_next_upstream
(nginx.org/en/docs/http/ngx_http_upstream_module.html and
ngx_http_proxy_module.html). nginx is required: without it this check
fails, saying what to install."""
import http.client
import http.server
import os
import re
import shutil
import socket
import ssl
import subprocess
import sys
import tempfile
import threading
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
sys.path.insert(0, os.path.join(HERE, "..", "deploy"))
from lkref import check, finish  # noqa: E402
import lkdeploy as D  # noqa: E402

SRC = os.environ.get("LIKENESS_SOURCE", os.path.join(HERE, "..", ".."))
CONF = os.path.join(SRC, "deploy", "nginx", "likeness.conf")
NGINX = D.find_nginx()

base = tempfile.mkdtemp(prefix="lk-nginx-")
tls = os.path.join(base, "tls")
other = os.path.join(base, "other-ca")
D.make_certs(SRC, tls)
D.make_certs(SRC, other)
ctx = D.tls_context(os.path.join(tls, "ca.crt"))
text = open(CONF).read()

# ---- the settings the deployment relies on ----
# Directives as nginx reads them: comments dropped, one statement per ';' or
# '{'. Location blocks are found by their opening line.
code = re.sub(r"#[^\n]*", "", text)


def block(name):
    m = re.search(re.escape(name) + r"\s*\{", code)
    if not m:
        return ""
    depth, i = 1, m.end()
    while depth and i < len(code):
        depth += {"{": 1, "}": -1}.get(code[i], 0)
        i += 1
    return code[m.end():i - 1]


def directives(src, name):
    return [m.group(1).split() for m in re.finditer(r"(?m)^\s*" + name + r"\s+([^;{]*);", src)]


check(directives(code, "proxy_ssl_verify") == [["on"]], "proxy_ssl_verify on")
check(len(directives(code, "proxy_ssl_trusted_certificate")) == 1,
      "the replicas' CA is named (proxy_ssl_trusted_certificate)")
check(directives(code, "client_max_body_size") == [["16m"]], "client_max_body_size 16m")
servers = directives(block("upstream likeness_replicas"), "server")
check(len(servers) >= 2 and all(any(p.startswith("max_fails=") for p in s) and
                                any(p.startswith("fail_timeout=") for p in s) for s in servers),
      f"two or more replicas, each with max_fails and fail_timeout ({len(servers)})")
for d in ("proxy_connect_timeout", "proxy_read_timeout", "proxy_send_timeout",
          "client_body_timeout", "proxy_next_upstream_tries", "proxy_next_upstream_timeout"):
    check(len(directives(code, d)) == 1, f"{d} is set")
ver = directives(block("location = /v1/verifications"), "proxy_next_upstream")
enr = directives(block("location = /v1/templates"), "proxy_next_upstream")
check(ver and {"error", "timeout", "http_503", "non_idempotent"} <= set(ver[0]),
      f"POST /v1/verifications is resent after error, timeout, 503 ({ver})")
check(enr and "non_idempotent" not in enr[0] and "non_idempotent" not in code.replace(
    block("location = /v1/verifications"), ""),
      f"POST /v1/templates is never resent once sent (no non_idempotent outside "
      f"/v1/verifications) ({enr})")
check("non_idempotent" not in block("location /"), "nor is any other POST")

# ---- nginx -t ----
nport = D.free_port()
ng = os.path.join(base, "ng-t")
os.makedirs(ng)
conf = D.write_nginx(CONF, ng, nport, tls, [D.free_port(), D.free_port()])
t = subprocess.run([NGINX, "-t", "-c", conf, "-p", ng], capture_output=True, text=True)
print(t.stderr.strip())
check(t.returncode == 0, "nginx -t accepts the rendered configuration")
# The check can fail: the same file naming a certificate that is not there.
bad = os.path.join(ng, "bad.conf")
with open(bad, "w") as f:
    f.write(open(conf).read().replace(f"{tls}/server.crt", f"{tls}/absent.crt"))
t = subprocess.run([NGINX, "-t", "-c", bad, "-p", ng], capture_output=True, text=True)
check(t.returncode != 0, "nginx -t refuses it when a certificate is missing")


# ---- nginx in front of stand-in replicas ----
class Replica:
    """An HTTPS server answering every request with a fixed status, and
    remembering (method, path, X-Request-Id) of each."""

    def __init__(self, status, cert_dir):
        self.status, self.seen = status, []
        rep = self

        class H(http.server.BaseHTTPRequestHandler):
            protocol_version = "HTTP/1.1"

            def log_message(self, *a):
                pass

            def handle_one(self):
                n = int(self.headers.get("Content-Length") or 0)
                self.rfile.read(n)
                rep.seen.append((self.command, self.path, self.headers.get("X-Request-Id")))
                body = b'{"ok":true}'
                self.send_response(rep.status)
                self.send_header("Content-Type", "application/json")
                self.send_header("Content-Length", str(len(body)))
                self.end_headers()
                self.wfile.write(body)

            do_GET = do_POST = do_DELETE = handle_one

        self.httpd = http.server.ThreadingHTTPServer(("127.0.0.1", 0), H)
        sctx = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)
        sctx.load_cert_chain(os.path.join(cert_dir, "server.crt"),
                             os.path.join(cert_dir, "server.key"))
        self.httpd.socket = sctx.wrap_socket(self.httpd.socket, server_side=True)
        self.port = self.httpd.server_address[1]
        threading.Thread(target=self.httpd.serve_forever, daemon=True).start()

    def posts(self, path):
        return [s for s in self.seen if s[0] == "POST" and s[1] == path]


def with_nginx(ports, fn):
    d = tempfile.mkdtemp(dir=base)
    port = D.free_port()
    c = D.write_nginx(CONF, d, port, tls, ports)
    p = subprocess.Popen([NGINX, "-c", c, "-p", d, "-g", "daemon off;"],
                         stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        for _ in range(100):  # until nginx accepts connections
            try:
                socket.create_connection(("127.0.0.1", port), 1).close()
                break
            except OSError:
                time.sleep(0.1)
        fn(port)
    finally:
        p.terminate()
        p.wait()


def post(port, path, body=b"x" * 1000):
    c = http.client.HTTPSConnection("127.0.0.1", port, context=ctx, timeout=30)
    try:
        c.request("POST", path, body=body, headers={"Content-Type": "application/octet-stream"})
        r = c.getresponse()
        r.read()
        return r.status
    except (OSError, http.client.HTTPException) as e:
        return type(e).__name__
    finally:
        c.close()


def scenario_503_verifications():
    s503, s200 = Replica(503, tls), Replica(200, tls)

    def run(port):
        sts = [post(port, "/v1/verifications") for _ in range(4)]
        check(sts == [200] * 4, f"503 first: verifications are resent and answered 200 ({sts})")
        got = s503.posts("/v1/verifications")
        check(len(got) >= 1, f"the 503 replica had some of them first ({len(got)})")
        ids = {x[2] for x in got}
        check(ids and ids <= {x[2] for x in s200.posts("/v1/verifications")} and
              all(re.fullmatch(r"[0-9a-f]{32}", i or "") for i in ids),
              "a resent verification carries the first attempt's X-Request-Id")
    with_nginx([s503.port, s200.port], run)


def scenario_503_templates():
    s503, s200 = Replica(503, tls), Replica(200, tls)

    def run(port):
        sts = [post(port, "/v1/templates") for _ in range(4)]
        got = len(s503.posts("/v1/templates")) + len(s200.posts("/v1/templates"))
        check(503 in sts and set(sts) <= {200, 503},
              f"503 first: an enrolment is not resent; the client gets the 503 ({sts})")
        check(got == 4, f"no enrolment reached a replica twice ({got} attempts for 4)")
    with_nginx([s503.port, s200.port], run)


def scenario_refused():
    dead, s200 = D.free_port(), Replica(200, tls)

    def run(port):
        sts = [post(port, "/v1/templates") for _ in range(4)]
        check(sts == [200] * 4 and len(s200.posts("/v1/templates")) == 4,
              f"a refused connection: enrolments move to the live replica ({sts})")
    with_nginx([dead, s200.port], run)


def scenario_big_body():
    s200 = Replica(200, tls)

    def run(port):
        st = post(port, "/v1/verifications", b"x" * (16 * 1024 * 1024 + 1))
        check(st == 413 and not s200.posts("/v1/verifications"),
              f"a body of 16 MiB + 1 byte: 413 from nginx, none reaches a replica ({st})")
        st = post(port, "/v1/verifications", b"x" * (16 * 1024 * 1024 - 4096))
        check(st == 200, f"a body just under 16 MiB passes ({st})")
    with_nginx([s200.port], run)


def scenario_wrong_ca():
    stranger = Replica(200, other)

    def run(port):
        st = post(port, "/v1/verifications")
        check(st == 502 and not stranger.seen,
              f"a replica whose certificate another CA issued gets nothing: 502 ({st})")
    with_nginx([stranger.port], run)


try:
    scenario_503_verifications()
    scenario_503_templates()
    scenario_refused()
    scenario_big_body()
    scenario_wrong_ca()
finally:
    shutil.rmtree(base, ignore_errors=True)
sys.exit(finish())
