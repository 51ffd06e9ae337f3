"""A throwaway likenessd for the hardening checks: development certificates,
a fresh key file and SQLite store in a temporary directory, API keys made by
`likeness keys api-create`, and HTTPS helpers built on Python's ssl and
http.client (the client side is Python's, not ours).

The service runs with the sanitizer settings of a hardening run
(ASAN_OPTIONS=detect_leaks=1:abort_on_error=1,
UBSAN_OPTIONS=halt_on_error=1:print_stacktrace=1) whatever CTest exports, and
its stderr goes to a log file that sanitizer_report() scans."""
import http.client
import os
import re
import signal
import socket
import ssl
import subprocess
import sys
import tempfile
import time

sys.path.insert(0, os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "ref"))
from lkref import free_port, init_key_file, make_dev_certs, write_ini  # noqa: E402,F401

SRC = os.environ.get("LIKENESS_SOURCE",
                     os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))))
BIN = os.environ.get("LIKENESS_BIN", os.path.join(SRC, "build", "bin"))
SHARED = os.environ.get("LIKENESS_SHARED", os.path.join(os.path.dirname(SRC), "shared"))
LIKENESS = os.path.join(BIN, "likeness")
LIKENESSD = os.path.join(BIN, "likenessd")
MODEL = os.path.join(SRC, "models", "likeness-lfw.lkmodel")
LFW = os.path.join(SHARED, "datasets", "lfw", "lfw-deepfunneled")
SOLVAY = os.path.join(SHARED, "reference", "solvay-1927", "1280px-Solvay_conference_1927.png")

SAN_ENV = {"ASAN_OPTIONS": "detect_leaks=1:abort_on_error=1",
           "UBSAN_OPTIONS": "halt_on_error=1:print_stacktrace=1"}
# What AddressSanitizer, LeakSanitizer and UndefinedBehaviorSanitizer print
# (compiler-rt's report headers and the "runtime error:" lines of UBSan).
SAN_RE = re.compile(r"ERROR: (Address|Leak|Thread|Memory)Sanitizer|runtime error:|"
                    r"SUMMARY: (Address|Leak|Undefined|Thread)")


def lfw(name, i):
    return os.path.join(LFW, name, f"{name}_{i:04d}.jpg")


def read(path):
    with open(path, "rb") as f:
        return f.read()


def san_env():
    env = dict(os.environ)
    env.update(SAN_ENV)
    return env


def cli(*args, timeout=300, check=False):
    """Runs the likeness command (sanitized build: same sanitizer options)."""
    return subprocess.run([LIKENESS, *args], capture_output=True, text=True, timeout=timeout,
                          env=san_env(), check=check)


def multipart(fields, boundary="lkharden0b0undary"):
    """RFC 7578 multipart/form-data: fields is a list of (name, bytes, filename
    or None, content type or None). Returns (content type, body)."""
    out = bytearray()
    for name, data, filename, ctype in fields:
        out += f"--{boundary}\r\n".encode()
        disp = f'Content-Disposition: form-data; name="{name}"'
        if filename is not None:
            disp += f'; filename="{filename}"'
        out += disp.encode() + b"\r\n"
        if ctype:
            out += f"Content-Type: {ctype}\r\n".encode()
        out += b"\r\n" + data + b"\r\n"
    out += f"--{boundary}--\r\n".encode()
    return f"multipart/form-data; boundary={boundary}", bytes(out)


class Service:
    """One likenessd with its own directory, configuration and API keys."""

    def __init__(self, tag, server=None, limits=None, extra="", workdir=None):
        self.dir = workdir or tempfile.mkdtemp(prefix=f"lk-{tag}-")
        self.port = free_port()
        self.cfg = os.path.join(self.dir, "cfg.ini")
        self.log_path = os.path.join(self.dir, "likenessd.log")
        self.proc = None
        self.tokens = {}
        if not os.path.exists(os.path.join(self.dir, "tls", "server.crt")):
            make_dev_certs(SRC, os.path.join(self.dir, "tls"))
        if not os.path.exists(os.path.join(self.dir, "keys")):
            init_key_file(LIKENESS, os.path.join(self.dir, "keys"), env=san_env())
        srv = {"port": self.port, "cert_file": "tls/server.crt", "key_file": "tls/server.key",
               "workers": 2, "queue_depth": 64}
        srv.update(server or {})
        lim = {"rate_per_second": 100000, "burst": 100000}
        lim.update(limits or {})
        write_ini(self.cfg, [("server", srv), ("model", {"file": MODEL}),
                             ("store", {"url": f"sqlite:{self.store_path}"}),
                             ("keys", {"file": "keys"}), ("limits", lim),
                             ("audit", {"checkpoint_interval": 100})], extra)
        self.ctx = ssl.create_default_context(cafile=os.path.join(self.dir, "tls", "ca.crt"))

    @property
    def store_path(self):
        return os.path.join(self.dir, "store.db")

    @property
    def key_file(self):
        return os.path.join(self.dir, "keys")

    def token(self, name, scopes):
        """Makes an API key with the given scopes (comma list) and keeps it."""
        r = cli("keys", "api-create", "--config", self.cfg, "--name", name, "--scopes", scopes,
                check=True)
        self.tokens[name] = r.stdout.strip()
        return self.tokens[name]

    # ---- process
    def start(self, timeout=90):
        log = open(self.log_path, "a")
        self.proc = subprocess.Popen([LIKENESSD, "--config", self.cfg], stderr=log,
                                     stdout=subprocess.DEVNULL, env=san_env())
        log.close()
        t0 = time.time()
        while time.time() - t0 < timeout:
            if self.proc.poll() is not None:
                raise RuntimeError(f"likenessd exited with {self.proc.returncode}: "
                                   + self.log()[-2000:])
            try:
                st, _, _ = self.request("GET", "/readyz", timeout=5)
                if st == 200:
                    return
            except OSError:
                pass
            time.sleep(0.2)
        raise RuntimeError("likenessd did not become ready: " + self.log()[-2000:])

    def alive(self):
        return self.proc is not None and self.proc.poll() is None

    def kill9(self):
        if self.alive():
            self.proc.send_signal(signal.SIGKILL)
        if self.proc is not None:
            self.proc.wait(timeout=60)

    def stop(self, timeout=120):
        """SIGTERM (a drain) and the exit code; the leak check runs at exit."""
        if not self.alive():
            return self.proc.returncode if self.proc else None
        self.proc.send_signal(signal.SIGTERM)
        try:
            return self.proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
            return None

    def log(self):
        try:
            with open(self.log_path, errors="replace") as f:
                return f.read()
        except OSError:
            return ""

    def sanitizer_report(self):
        """The sanitizer lines of the log with some context, or ""."""
        text = self.log()
        m = SAN_RE.search(text)
        if not m:
            return ""
        start = max(0, text.rfind("\n", 0, max(0, m.start() - 200)))
        return text[start:start + 4000]

    # ---- HTTPS
    def conn(self, timeout=60, source=None):
        return http.client.HTTPSConnection("127.0.0.1", self.port, context=self.ctx,
                                           timeout=timeout, source_address=source)

    def request(self, method, path, body=None, headers=None, token=None, timeout=120,
                source=None):
        """One request on a fresh connection: (status, headers dict lower-case, body)."""
        h = dict(headers or {})
        if token:
            h["Authorization"] = "Bearer " + token
        c = self.conn(timeout, source)
        try:
            c.request(method, path, body=body, headers=h)
            r = c.getresponse()
            data = r.read()
            return r.status, {k.lower(): v for k, v in r.getheaders()}, data
        finally:
            c.close()

    def tls_socket(self, timeout=30, source=None):
        """A raw TLS socket to the service (handshake done)."""
        s = socket.create_connection(("127.0.0.1", self.port), timeout=timeout,
                                     source_address=(source, 0) if source else None)
        return self.ctx.wrap_socket(s, server_hostname="localhost")

    def verify_pair(self, token, probe, reference, timeout=120):
        ct, body = multipart([("probe", probe, "p.jpg", "image/jpeg"),
                              ("reference", reference, "r.jpg", "image/jpeg")])
        return self.request("POST", "/v1/verifications", body, {"Content-Type": ct}, token,
                            timeout)

    def enrol(self, token, images, subject_ref=None, timeout=120):
        fields = [("image", im, f"i{i}.jpg", "image/jpeg") for i, im in enumerate(images)]
        if subject_ref is not None:
            fields.append(("subject_ref", subject_ref.encode(), None, None))
        ct, body = multipart(fields)
        return self.request("POST", "/v1/templates", body, {"Content-Type": ct}, token, timeout)


def read_response(sock, limit=1 << 20):
    """Reads one HTTP/1.1 response from a raw socket: (status, headers, body)
    or (None, {}, b"") when the connection ends first."""
    buf = b""
    try:
        while b"\r\n\r\n" not in buf:
            d = sock.recv(65536)
            if not d:
                return None, {}, buf
            buf += d
            if len(buf) > limit:
                break
        head, _, rest = buf.partition(b"\r\n\r\n")
        lines = head.decode("latin-1").split("\r\n")
        status = int(lines[0].split()[1])
        hdrs = {}
        for ln in lines[1:]:
            k, _, v = ln.partition(":")
            hdrs[k.strip().lower()] = v.strip()
        n = int(hdrs.get("content-length", "0"))
        while len(rest) < n:
            d = sock.recv(65536)
            if not d:
                break
            rest += d
        return status, hdrs, rest[:n]
    except (OSError, ssl.SSLError, ValueError, IndexError):
        return None, {}, buf
