"""likenessd over HTTPS, end to end, against its contract (api-spec/openapi.yaml).

A real likenessd is started on a free port with development certificates
(certs-example/make-dev-certs.sh), a fresh key file, SQLite store and API keys
made by the `likeness` command. Every endpoint and every problem type that can
be caused from outside is exercised with LFW photos and crafted images.
References the project did not write:
  - the JSON Schemas of api-spec/openapi.yaml, checked by Ajv (tests/api/validate.mjs,
    JSON Schema 2020-12) for every JSON body answered;
  - RFC 9457 (problem details: application/problem+json, type/status members),
    RFC 9110 (Allow, Retry-After), RFC 6750 section 3 (WWW-Authenticate: Bearer),
    RFC 9562 section 5.4 (UUID version 4), RFC 3339 (timestamps);
  - curl's multipart/form-data encoder (RFC 7578) for the main verification;
  - OpenSSL (`openssl s_client`, and `openssl s_server` as a control) for the
    TLS protocol versions; Python's ssl module for HTTPS and mutual TLS;
  - Prometheus text exposition format 0.0.4 for /metrics;
  - Python's sqlite3 to read and alter the store file; zlib's crc32 for the
    PNG chunk CRC (PNG specification, ISO/IEC 15948 section 5.3); Pillow for
    crafted images;
  - the offline `likeness verify` / `likeness detect` answers for the same
    photos (the service must report the same scores, to 1e-9, and the same
    quality reasons).
Needs: $LIKENESS_BIN/likenessd and likeness, $LIKENESS_SHARED (LFW, the 1927
Solvay photo), curl, openssl, node and npm (for tests/api)."""
import base64
import datetime
import http.client
import io
import json
import os
import re
import shutil
import signal
import sqlite3
import ssl
import stat
import struct
import subprocess
import sys
import tempfile
import threading
import time
import zlib

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from lkref import check, finish, free_port, skip  # noqa: E402

SRC = os.environ.get("LIKENESS_SOURCE",
                     os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))))
BIN = os.environ.get("LIKENESS_BIN", os.path.join(SRC, "build", "bin"))
SHARED = os.environ.get("LIKENESS_SHARED", os.path.join(os.path.dirname(SRC), "shared"))
LIKENESS = os.path.join(BIN, "likeness")
LIKENESSD = os.path.join(BIN, "likenessd")
LFW = os.path.join(SHARED, "datasets", "lfw", "lfw-deepfunneled")
SOLVAY = os.path.join(SHARED, "reference", "solvay-1927", "1280px-Solvay_conference_1927.png")
SOLVAY_FACES = os.path.join(SHARED, "reference", "solvay-1927", "faces.csv")
MODEL = os.path.join(SRC, "models", "likeness-lfw.lkmodel")
API_DIR = os.path.join(SRC, "tests", "api")
CERT_SCRIPT = os.path.join(SRC, "certs-example", "make-dev-certs.sh")

UUID4_RE = re.compile(r"^[0-9a-f]{8}-[0-9a-f]{4}-4[0-9a-f]{3}-[89ab][0-9a-f]{3}-[0-9a-f]{12}$")
REQID_RE = re.compile(r"^[A-Za-z0-9._-]{1,64}$")
TOKEN_RE = re.compile(r"lkk_[0-9a-f]{16}_[A-Za-z0-9_-]{43}")
HEX32_RE = re.compile(r"^[0-9a-f]{32}$")
KEYID_RE = re.compile(r"^[td][0-9a-f]{16}$")
TIME_RE = re.compile(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}\.\d{3}Z$")

# The problem types of the contract: slug -> (status, schema of the spec).
PROBLEMS = {
    "no-face": (422, "ImageProblem"), "multiple-faces": (422, "ImageProblem"),
    "face-too-small": (422, "ImageProblem"), "poor-quality": (422, "ImageProblem"),
    "unsupported-image": (422, "ImageProblem"), "corrupt-image": (422, "ImageProblem"),
    "image-too-large": (422, "ImageProblem"),
    "template-not-found": (404, "TemplateNotFoundProblem"),
    "template-unusable": (409, "TemplateUnusableProblem"),
    "unauthorised": (401, "UnauthorisedProblem"), "forbidden": (403, "ForbiddenProblem"),
    "rate-limited": (429, "RateLimitedProblem"),
    "payload-too-large": (413, "PayloadTooLargeProblem"),
    "malformed-request": (400, "MalformedRequestProblem"),
    "unsupported-media-type": (415, "UnsupportedMediaTypeProblem"),
    "not-found": (404, "NotFoundProblem"), "method-not-allowed": (405, "MethodNotAllowedProblem"),
    "overloaded": (503, "OverloadedProblem"), "not-ready": (503, "NotReadyProblem"),
    "internal-error": (500, "InternalErrorProblem"),
}
# Quality reason -> problem slug (api-spec: poor-quality covers the last three).
REASON_SLUG = {"no_face": "no-face", "multiple_faces": "multiple-faces",
               "face_too_small": "face-too-small", "too_blurry": "poor-quality",
               "badly_exposed": "poor-quality", "too_rotated": "poor-quality"}
REASON_ORDER = ["no_face", "multiple_faces", "face_too_small", "too_blurry", "badly_exposed",
                "too_rotated"]

MAX_BODY = 2 * 1024 * 1024
UNKNOWN_PATHS = ("/", "/v1", "/v1/verification", "/v2/verifications", "/v1/template",
                 "/healthz/x", "/v1/audit", "/metrics.json")
WORKERS = 2

# Everything collected for one Ajv run at the end: (label, schema, body).
BODIES = []
SEEN_SLUGS = set()
RESPONSES = []          # (label, X-Request-Id header or None, request id sent or None)
AUDIT_EXPECT = []       # (request_id, operation, status, template_id or "") in the order made


# ---------------------------------------------------------------- helpers

def lfw(name, i):
    return os.path.join(LFW, name, f"{name}_{i:04d}.jpg")


def read(path):
    with open(path, "rb") as f:
        return f.read()


def b64(data):
    return base64.b64encode(data).decode()


def run(args, timeout=120, **kw):
    return subprocess.run(args, capture_output=True, text=True, timeout=timeout, **kw)


def json_objects(text):
    """The JSON values printed one after another (pretty-printed) on stdout."""
    dec, i, out = json.JSONDecoder(), 0, []
    while True:
        while i < len(text) and text[i].isspace():
            i += 1
        if i >= len(text):
            return out
        obj, i = dec.raw_decode(text, i)
        out.append(obj)


def parse_time(s):
    return datetime.datetime.strptime(s, "%Y-%m-%dT%H:%M:%S.%fZ")


class Resp:
    def __init__(self, status, headers, body, error=None):
        self.status, self.headers, self.body, self.error = status, headers, body, error
        self._json = None

    def header(self, name):
        for k, v in self.headers:
            if k.lower() == name.lower():
                return v
        return None

    @property
    def ctype(self):
        return (self.header("Content-Type") or "").strip()

    @property
    def json(self):
        if self._json is None:
            try:
                self._json = json.loads(self.body.decode("utf-8"))
            except (ValueError, UnicodeDecodeError):
                self._json = False
        return self._json if self._json is not False else None

    def __repr__(self):
        return f"HTTP {self.status} {self.ctype} {self.body[:300]!r}{' ' + self.error if self.error else ''}"


class Client:
    """HTTPS requests with http.client; a new connection per request."""

    def __init__(self, port, ca, cert=None, key=None):
        self.port = port
        self.ctx = ssl.create_default_context(cafile=ca)
        if cert:
            self.ctx.load_cert_chain(cert, key)

    def req(self, method, path, body=None, headers=None, token=None, label=None, req_id=None,
            chunked=False):
        h = {}
        if token:
            h["Authorization"] = "Bearer " + token
        if req_id:
            h["X-Request-Id"] = req_id
        h.update(headers or {})
        conn = http.client.HTTPSConnection("localhost", self.port, context=self.ctx, timeout=120)
        try:
            if chunked:
                conn.request(method, path, body=iter(body), headers=h, encode_chunked=True)
            else:
                conn.request(method, path, body=body, headers=h)
        except (OSError, http.client.HTTPException) as e:
            # The service may answer (413) and close before the body is sent.
            try:
                r = conn.getresponse()
                resp = Resp(r.status, r.getheaders(), r.read())
            except (OSError, http.client.HTTPException):
                resp = Resp(0, [], b"", f"request failed: {e}")
            conn.close()
            RESPONSES.append((label or f"{method} {path}", resp.header("X-Request-Id"), req_id))
            return resp
        try:
            r = conn.getresponse()
            resp = Resp(r.status, r.getheaders(), r.read())
        except (OSError, http.client.HTTPException) as e:
            resp = Resp(0, [], b"", f"no response: {e}")
        conn.close()
        if resp.status:
            RESPONSES.append((label or f"{method} {path}", resp.header("X-Request-Id"), req_id))
        return resp

    def json_post(self, path, obj, **kw):
        return self.req("POST", path, json.dumps(obj).encode(),
                        {"Content-Type": "application/json"}, **kw)


def multipart(fields, boundary="lkTestBoundary7MA4YWxkTrZu0gW"):
    """RFC 7578 multipart/form-data: fields are (name, bytes or str, filename or None)."""
    out = io.BytesIO()
    for name, value, filename in fields:
        out.write(f"--{boundary}\r\n".encode())
        if filename:
            out.write(f'Content-Disposition: form-data; name="{name}"; filename="{filename}"\r\n'
                      "Content-Type: application/octet-stream\r\n\r\n".encode())
        else:
            out.write(f'Content-Disposition: form-data; name="{name}"\r\n\r\n'.encode())
        out.write(value.encode() if isinstance(value, str) else value)
        out.write(b"\r\n")
    out.write(f"--{boundary}--\r\n".encode())
    return out.getvalue(), f"multipart/form-data; boundary={boundary}"


def curl(port, ca, method, path, args, token=None, tmp=None, req_id=None):
    """One request with the curl command; returns Resp (the last header block)."""
    hfile = os.path.join(tmp, "curl.headers")
    bfile = os.path.join(tmp, "curl.body")
    cmd = ["curl", "-sS", "--cacert", ca, "-X", method, "-D", hfile, "-o", bfile,
           "-w", "%{http_code}", "--max-time", "120"]
    if token:
        cmd += ["-H", f"Authorization: Bearer {token}"]
    if req_id:
        cmd += ["-H", f"X-Request-Id: {req_id}"]
    cmd += args + [f"https://localhost:{port}{path}"]
    r = run(cmd, timeout=150)
    if r.returncode != 0 and not os.path.exists(hfile):
        return Resp(0, [], b"", f"curl exit {r.returncode}: {r.stderr.strip()}")
    text = open(hfile, "rb").read().decode("latin-1")
    blocks = [b for b in re.split(r"\r?\n\r?\n", text) if b.strip()]
    headers = []
    status = int(r.stdout.strip() or 0)
    if blocks:
        lines = blocks[-1].splitlines()
        for ln in lines[1:]:
            if ":" in ln:
                k, v = ln.split(":", 1)
                headers.append((k.strip(), v.strip()))
    body = open(bfile, "rb").read() if os.path.exists(bfile) else b""
    for f in (hfile, bfile):
        if os.path.exists(f):
            os.unlink(f)
    resp = Resp(status, headers, body)
    RESPONSES.append((f"curl {method} {path}", resp.header("X-Request-Id"), req_id))
    return resp


def expect_json(label, r, status, schema):
    """A JSON success answer of the given status, queued for schema validation."""
    check(r.status == status, f"{label}: HTTP {status}" + ("" if r.status == status else f" (got {r!r})"))
    if r.status == status and status != 204:
        check(r.ctype.split(";")[0].strip() == "application/json",
              f"{label}: Content-Type application/json (got '{r.ctype}')")
        body = r.json
        check(body is not None, f"{label}: body is JSON")
        if body is not None:
            BODIES.append((label, schema, body))
        return body
    return None


def expect_problem(label, r, slug, path, **ext):
    """An RFC 9457 problem of the given slug: status, media type, members."""
    status, schema = PROBLEMS[slug]
    if r.status != status:
        check(False, f"{label}: HTTP {status} {slug} (got {r!r})")
        return None
    check(True, f"{label}: HTTP {status}")
    check(r.ctype.split(";")[0].strip() == "application/problem+json",
          f"{label}: Content-Type application/problem+json (got '{r.ctype}')")
    body = r.json
    if not isinstance(body, dict):
        check(False, f"{label}: problem body is a JSON object ({r.body[:200]!r})")
        return None
    SEEN_SLUGS.add(body.get("type", "").rsplit("/", 1)[-1])
    check(body.get("type") == f"/problems/{slug}",
          f"{label}: type /problems/{slug} (got {body.get('type')})")
    check(body.get("status") == status, f"{label}: member status {status} (got {body.get('status')})")
    check(body.get("instance") == path.split("?")[0],
          f"{label}: instance {path.split('?')[0]} (got {body.get('instance')})")
    check(body.get("request_id") is not None and body.get("request_id") == r.header("X-Request-Id"),
          f"{label}: request_id equals the X-Request-Id header")
    for k, v in ext.items():
        if v is PRESENT:
            check(k in body, f"{label}: has member {k}")
        elif v is ABSENT:
            check(k not in body, f"{label}: has no member {k} (got {body.get(k)!r})")
        else:
            check(body.get(k) == v, f"{label}: {k} = {v!r} (got {body.get(k)!r})")
    BODIES.append((label, schema, body))
    return body


def ck(cond, msg):
    """check() that also returns the condition."""
    check(cond, msg)
    return bool(cond)


AUTH_FAIL_IDS = iter(range(1, 1000))
PRESENT = object()
ABSENT = object()


class Server:
    def __init__(self, cfg, port, log):
        self.cfg, self.port, self.log = cfg, port, log
        self.proc = None

    def start(self, ca):
        self.logf = open(self.log, "ab")
        self.proc = subprocess.Popen([LIKENESSD, "--config", self.cfg], stdout=self.logf,
                                     stderr=subprocess.STDOUT)
        ctx = ssl.create_default_context(cafile=ca)
        deadline = time.time() + 60
        while time.time() < deadline:
            if self.proc.poll() is not None:
                return False
            try:
                conn = http.client.HTTPSConnection("localhost", self.port, context=ctx, timeout=5)
                conn.request("GET", "/healthz")
                st = conn.getresponse().status
                conn.close()
                if st == 200:
                    return True
            except (OSError, http.client.HTTPException):
                pass
            time.sleep(0.2)
        return False

    def stop(self):
        """SIGTERM; returns the exit status (None if it had to be killed)."""
        if self.proc is None:
            return None
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(60)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
                self.logf.close()
                return None
        self.logf.close()
        return self.proc.returncode

    def alive(self):
        return self.proc is not None and self.proc.poll() is None


def write_config(path, port, d, store, keyfile, rate=1000, burst=1000, workers=WORKERS,
                 queue_depth=64, mtls=True):
    lines = ["[server]", "listen = 127.0.0.1", f"port = {port}",
             f"cert_file = {d}/certs/server.crt", f"key_file = {d}/certs/server.key"]
    if mtls:
        lines.append(f"client_ca_file = {d}/certs/ca.crt")
    lines += [f"workers = {workers}", f"queue_depth = {queue_depth}",
              f"max_body_bytes = {MAX_BODY}", "",
              "[model]", f"file = {MODEL}", "",
              "[store]", f"url = sqlite:{store}", "",
              "[keys]", f"file = {keyfile}", "",
              "[limits]", f"rate_per_second = {rate}", f"burst = {burst}", "",
              "[audit]", "checkpoint_interval = 10", ""]
    if mtls:
        lines += ["[client:desk]", "subject = CN=visitor-desk-1,O=Example Visitor Desk",
                  "scopes = verify", ""]
    with open(path, "w") as f:
        f.write("\n".join(lines))


def api_key(cfg, name, scopes):
    r = run([LIKENESS, "keys", "api-create", "--config", cfg, "--name", name, "--scopes", scopes])
    m = TOKEN_RE.search(r.stdout)
    check(r.returncode == 0 and m is not None,
          f"likeness keys api-create --name {name} --scopes {scopes} prints a token"
          + ("" if m else f" ({r.stderr.strip()[:200]})"))
    return m.group(0) if m else "lkk_0000000000000000_" + "A" * 43


def cli_verify(a, b, fmr=None):
    args = [LIKENESS, "verify", "--model", MODEL] + (["--fmr", repr(fmr)] if fmr else []) + [a, b]
    r = run(args)
    try:
        return json_objects(r.stdout)[0]
    except (ValueError, IndexError):
        return {"error": {"type": "no output", "detail": r.stderr}}


def cli_detect(paths):
    r = run([LIKENESS, "detect"] + paths, timeout=300)
    try:
        out = json_objects(r.stdout)
    except ValueError:
        out = []
    return {o.get("image"): o for o in out}


# ---------------------------------------------------------------- crafted images

def png_chunk(kind, data):
    # PNG chunk: length, type, data, CRC-32 over type and data (ISO/IEC 15948, 5.3).
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))


def huge_png(width, height):
    """A PNG whose IHDR declares width x height, 8-bit gray, with one tiny IDAT."""
    ihdr = struct.pack(">IIBBBBB", width, height, 8, 0, 0, 0, 0)
    return (b"\x89PNG\r\n\x1a\n" + png_chunk(b"IHDR", ihdr)
            + png_chunk(b"IDAT", zlib.compress(b"\x00" * 16)) + png_chunk(b"IEND", b""))


def make_images(d):
    """Writes the crafted images; returns {name: path}."""
    from PIL import Image, ImageFilter
    out = {}

    def save(name, img, fmt="PNG", **kw):
        p = os.path.join(d, name)
        img.save(p, fmt, **kw)
        out[name] = p

    save("gray.png", Image.new("L", (640, 480), 128))
    import random
    rnd = random.Random(11)
    noise = Image.frombytes("L", (320, 240), bytes(rnd.randrange(256) for _ in range(320 * 240)))
    save("noise.png", noise)
    face = Image.open(lfw("Colin_Powell", 1)).convert("RGB")
    # Tiny faces: LFW photo shrunk, pasted on a gray canvas (the detector
    # searches faces down to a tenth of the short side, the quality gate
    # wants 60 px).
    for size, canvas in ((100, (400, 300)), (110, (420, 320)), (90, (360, 280)),
                         (120, (480, 400))):
        c = Image.new("RGB", canvas, (120, 120, 120))
        c.paste(face.resize((size, size), Image.LANCZOS), ((canvas[0] - size) // 2,
                                                         (canvas[1] - size) // 2))
        save(f"tiny_{size}.png", c)
    # Poor quality candidates: blurred, darkened, brightened.
    for sigma in (3, 4, 6):
        save(f"blur_{sigma}.png", face.filter(ImageFilter.GaussianBlur(sigma)))
    save("dark.png", face.point(lambda v: v // 4))
    save("bright.png", face.point(lambda v: min(255, v + 140)))
    # Several faces: a crop of the 1927 Solvay photo around three front-row
    # faces (faces.csv), enlarged so each is above the minimum face size.
    solvay = Image.open(SOLVAY).convert("L")
    crop = solvay.crop((420, 420, 660, 560))
    for k in (2, 3):
        save(f"group_x{k}.png", crop.resize((crop.width * k, crop.height * k), Image.LANCZOS))
    two = Image.new("RGB", (520, 260), (128, 128, 128))
    two.paste(face, (5, 5))
    two.paste(Image.open(lfw("Tony_Blair", 1)).convert("RGB"), (265, 5))
    save("two_faces.png", two)
    # Not images / damaged images.
    p = os.path.join(d, "text.txt")
    with open(p, "wb") as f:
        f.write(b"visitor badge number 0142\n")
    out["text.txt"] = p
    p = os.path.join(d, "truncated.jpg")
    jpg = read(lfw("Colin_Powell", 1))
    with open(p, "wb") as f:
        f.write(jpg[:len(jpg) * 2 // 5])
    out["truncated.jpg"] = p
    save("face.gif", face.convert("P"), fmt="GIF")
    for w, h in ((20000, 20000), (8000, 6000)):
        p = os.path.join(d, f"huge_{w}x{h}.png")
        with open(p, "wb") as f:
            f.write(huge_png(w, h))
        out[f"huge_{w}x{h}.png"] = p
    return out


# ---------------------------------------------------------------- Prometheus text

SAMPLE_RE = re.compile(r"^([a-zA-Z_:][a-zA-Z0-9_:]*)(?:\{(.*)\})?[ \t]+(\S+)(?:[ \t]+(-?\d+))?$")
LABEL_RE = re.compile(r'\s*([a-zA-Z_][a-zA-Z0-9_]*)="((?:[^"\\\n]|\\[\\"n])*)"\s*(?:,|$)')


def parse_prometheus(text):
    """Prometheus text format 0.0.4: HELP/TYPE comments, samples
    `name{label="value",...} value [timestamp]`. Returns (types, samples, errors)."""
    types, helps, samples, errors = {}, {}, [], []
    for n, line in enumerate(text.split("\n"), 1):
        if line == "":
            continue
        if line.startswith("# HELP "):
            parts = line[7:].split(" ", 1)
            helps[parts[0]] = parts[1] if len(parts) > 1 else ""
            continue
        if line.startswith("# TYPE "):
            parts = line[7:].split(" ")
            if len(parts) != 2 or parts[1] not in ("counter", "gauge", "histogram", "summary",
                                                   "untyped"):
                errors.append(f"line {n}: bad TYPE line {line!r}")
            elif parts[0] in types:
                errors.append(f"line {n}: second TYPE line for {parts[0]}")
            else:
                types[parts[0]] = parts[1]
            continue
        if line.startswith("#"):
            continue
        m = SAMPLE_RE.match(line)
        if not m:
            errors.append(f"line {n}: not a sample: {line!r}")
            continue
        name, lab, value = m.group(1), m.group(2), m.group(3)
        labels = {}
        if lab:
            pos = 0
            while pos < len(lab):
                lm = LABEL_RE.match(lab, pos)
                if not lm or lm.end() == pos:
                    errors.append(f"line {n}: bad labels {lab!r}")
                    break
                labels[lm.group(1)] = lm.group(2)
                pos = lm.end()
        try:
            v = float(value)
        except ValueError:
            errors.append(f"line {n}: bad value {value!r}")
            continue
        family = name
        for suf in ("_bucket", "_sum", "_count"):
            if name.endswith(suf) and types.get(name[:-len(suf)]) in ("histogram", "summary"):
                family = name[:-len(suf)]
        if family not in types:
            errors.append(f"line {n}: sample {name} without a preceding TYPE line")
        samples.append((name, labels, v))
    return types, helps, samples, errors


def metric(samples, name, **labels):
    return sum(v for n, lab, v in samples if n == name
               and all(lab.get(k) == want for k, want in labels.items()))


# ---------------------------------------------------------------- the test

def main():
    for exe in (LIKENESSD, LIKENESS):
        if not os.access(exe, os.X_OK):
            skip(f"{exe} is not built (set LIKENESS_BIN)")
    if not os.path.isdir(LFW):
        skip(f"LFW photos missing at {LFW} (set LIKENESS_SHARED)")
    if not os.path.exists(SOLVAY):
        skip(f"group photo missing at {SOLVAY}")
    if not os.path.exists(MODEL):
        skip(f"model missing at {MODEL}")
    for tool in ("curl", "openssl"):
        if shutil.which(tool) is None:
            skip(f"the {tool} command is missing (Debian package {tool})")
    try:
        import PIL  # noqa: F401
    except ImportError:
        skip("Pillow is missing (Debian package python3-pil)")
    # Node and the schema validator are part of this check, not optional.
    if shutil.which("node") is None or shutil.which("npm") is None:
        check(False, "node and npm are installed (needed for tests/api/validate.mjs); "
                     "install nodejs and npm")
        return finish()
    if not os.path.isdir(os.path.join(API_DIR, "node_modules", "ajv")):
        r = run(["npm", "ci", "--no-audit", "--no-fund"], timeout=600, cwd=API_DIR)
        if not ck(r.returncode == 0, f"npm ci in tests/api ({r.stderr.strip()[-300:]})"):
            return finish()

    t_start = time.time()
    with tempfile.TemporaryDirectory(prefix="lk-api-") as d:
        return run_all(d, t_start)


def run_all(d, t_start):
    ca = f"{d}/certs/ca.crt"
    r = run(["sh", CERT_SCRIPT, f"{d}/certs"])
    if not ck(r.returncode == 0, f"make-dev-certs.sh ({r.stderr.strip()[:200]})"):
        return finish()
    keyfile = f"{d}/master.key"
    r = run([LIKENESS, "keys", "init", "--key-file", keyfile])
    check(r.returncode == 0 and os.path.exists(keyfile),
          f"likeness keys init --key-file ({r.stderr.strip()[:200]})")
    if not os.path.exists(keyfile):
        return finish()
    check(stat.S_IMODE(os.stat(keyfile).st_mode) == 0o600, "the key file has mode 0600")
    store = f"{d}/store.db"
    port = free_port()
    cfg = f"{d}/likenessd.ini"
    write_config(cfg, port, d, store, keyfile)

    tok = {s: api_key(cfg, f"desk-{s}", s) for s in ("verify", "enrol", "delete", "audit")}
    tok["all"] = api_key(cfg, "desk-all", "verify,enrol,delete,audit")
    overload_tokens = [api_key(cfg, f"burst-{i}", "verify") for i in range(10)]
    tok["rate"] = api_key(cfg, "rate", "verify")
    tok["rate2"] = api_key(cfg, "rate2", "verify")

    imgs = make_images(d)
    srv = Server(cfg, port, f"{d}/likenessd.log")
    if not ck(srv.start(ca), f"likenessd --config starts and answers /healthz on port {port}"):
        print(open(srv.log, "rb").read().decode("utf-8", "replace")[-3000:])
        srv.stop()
        return finish()
    c = Client(port, ca)
    try:
        state = {"store_path": store}
        part_basics(c, tok, state)
        part_auth(c, tok, d, port, ca)
        part_verify(c, tok, state, d, port, ca)
        part_image_problems(c, tok, imgs, state)
        part_request_problems(c, tok, state, d, port, ca)
        part_templates(c, tok, state, imgs)
        part_tamper(c, tok, state, store)
        part_mtls(c, tok, state, d, port, ca)
        part_metrics(c, tok, state, store)
        part_tls_versions(d, port, ca)
        part_rotation(c, tok, state, cfg, keyfile)
        part_audit(c, tok, state, cfg)
        part_problem_docs(c)
    finally:
        alive = srv.alive()
        code = srv.stop()
    check(alive, "likenessd was still running after the main parts")
    check(code == 0, f"likenessd exits 0 after SIGTERM (drained; got {code})")
    part_logs(srv.log, tok, overload_tokens)

    # A second instance: one worker, a one-job queue and a tiny rate.
    port2 = free_port()
    cfg2 = f"{d}/likenessd-tight.ini"
    write_config(cfg2, port2, d, store, keyfile, rate=0.2, burst=2, workers=1, queue_depth=1,
                 mtls=False)
    srv2 = Server(cfg2, port2, f"{d}/likenessd-tight.log")
    if ck(srv2.start(ca), "a second likenessd (workers=1, queue_depth=1, rate 0.2/s) starts"):
        try:
            part_overload(Client(port2, ca), overload_tokens, state)
            part_rate(Client(port2, ca), tok)
        finally:
            code = srv2.stop()
        check(code == 0, f"the second likenessd exits 0 after SIGTERM (got {code})")
    part_logs(srv2.log, tok, overload_tokens)

    r = run([LIKENESS, "audit", "verify", "--config", cfg])
    check(r.returncode == 0, "likeness audit verify --config passes after everything"
          + ("" if r.returncode == 0 else f" ({(r.stdout + r.stderr).strip()[:300]})"))
    part_audit_tamper(d, cfg, store)
    part_request_ids()
    part_validate()
    print(f"note: {len(BODIES)} JSON bodies validated; {time.time() - t_start:.0f} s in all")
    return finish()


# ---------------------------------------------------------------- parts

def part_basics(c, tok, state):
    print("--- health, readiness, model")
    body = expect_json("GET /healthz", c.req("GET", "/healthz"), 200, "Health")
    check(body == {"status": "ok"}, f"/healthz body is {{\"status\":\"ok\"}} ({body})")
    ready = expect_json("GET /readyz", c.req("GET", "/readyz"), 200, "Readiness")
    model = expect_json("GET /v1/model (verify scope)", c.req("GET", "/v1/model", token=tok["verify"]),
                        200, "Model")
    for s in ("enrol", "delete", "audit"):
        r = c.req("GET", "/v1/model", token=tok[s])
        check(r.status == 200, f"GET /v1/model with only the {s} scope: 200 (any caller)")
    state["model"] = model or {}
    if not model:
        return
    check(ready and ready.get("model_id") == model.get("model_id"),
          "/readyz names the model /v1/model describes")
    pts = model.get("operating_points") or []
    state["points"] = pts
    fmrs = [p.get("target_fmr") for p in pts]
    check(fmrs == sorted(fmrs), "operating points ascend in target_fmr")
    # The threshold at the configured target FMR is that of the row with the
    # largest target FMR not above it (never looser than asked).
    rows = [p for p in pts if p.get("target_fmr", 1) <= model.get("target_fmr", 0) + 1e-15]
    check(bool(rows) and rows[-1].get("threshold") == model.get("threshold"),
          f"model threshold {model.get('threshold')} is that of the operating point for "
          f"target_fmr {model.get('target_fmr')}")
    check(model.get("target_fmr") == model.get("default_target_fmr"),
          "without [model] target_fmr the configured target is the model's default")
    cli = cli_verify(lfw("Colin_Powell", 1), lfw("Colin_Powell", 2))
    check(cli.get("model_id") == model.get("model_id"),
          f"the service's model_id is that of `likeness verify` with the same file "
          f"({cli.get('model_id')} vs {model.get('model_id')})")
    state["cli_default_threshold"] = cli.get("threshold")


def part_auth(c, tok, d, port, ca):
    print("--- authentication and scopes")
    protected = [("POST", "/v1/verifications"), ("POST", "/v1/templates"),
                 ("GET", "/v1/templates/" + "0" * 32), ("DELETE", "/v1/templates/" + "0" * 32),
                 ("GET", "/v1/model"), ("GET", "/v1/audit/records")]
    bad_tokens = {
        "no token": None,
        "unknown key id": "lkk_0123456789abcdef_" + "A" * 43,
        "right key id, wrong secret": tok["all"][:21] + ("B" if tok["all"][21] != "B" else "C")
        + tok["all"][22:],
        "malformed token": "not-a-token",
    }
    for what, t in bad_tokens.items():
        for method, path in protected:
            body, ctype = (b'{"probe": "!!"}', "application/json") if method == "POST" else (None, None)
            rid = f"auth-fail-{next(AUTH_FAIL_IDS)}"
            r = c.req(method, path, body, {"Content-Type": ctype} if ctype else None, token=t,
                      req_id=rid)
            expect_problem(f"{method} {path} with {what}", r, "unauthorised", path)
            check(r.header("WWW-Authenticate") == 'Bearer realm="likeness"',
                  f"{method} {path} with {what}: WWW-Authenticate: Bearer realm=\"likeness\" "
                  f"(got {r.header('WWW-Authenticate')!r})")
            if t is not None and what != "no token" and method == "GET" and path == "/v1/model":
                AUDIT_EXPECT.append((rid, "authentication_failure", 401, ""))
    r = c.req("GET", "/v1/model", headers={"Authorization": "Basic dXNlcjpwYXNz"})
    expect_problem("GET /v1/model with Basic credentials", r, "unauthorised", "/v1/model")
    r = c.req("GET", "/v1/model", headers={"Authorization": "Bearer"})
    expect_problem("GET /v1/model with an empty bearer", r, "unauthorised", "/v1/model")

    # 403: a valid caller without the scope, with otherwise valid requests.
    probe = read(lfw("Colin_Powell", 1))
    ref = read(lfw("Colin_Powell", 2))
    vbody = {"probe": b64(probe), "reference": b64(ref)}
    r = c.json_post("/v1/verifications", vbody, token=tok["enrol"])
    expect_problem("POST /v1/verifications with enrol scope only", r, "forbidden",
                   "/v1/verifications", required_scope="verify")
    r = c.json_post("/v1/templates", {"images": [b64(ref)]}, token=tok["verify"])
    expect_problem("POST /v1/templates with verify scope only", r, "forbidden", "/v1/templates",
                   required_scope="enrol")
    tid = "0123456789abcdef0123456789abcdef"
    r = c.req("GET", f"/v1/templates/{tid}", token=tok["delete"])
    expect_problem("GET /v1/templates/{id} with delete scope only", r, "forbidden",
                   f"/v1/templates/{tid}", required_scope="enrol")
    r = c.req("DELETE", f"/v1/templates/{tid}", token=tok["enrol"])
    expect_problem("DELETE /v1/templates/{id} with enrol scope only", r, "forbidden",
                   f"/v1/templates/{tid}", required_scope="delete")
    r = c.req("GET", "/v1/audit/records", token=tok["verify"])
    expect_problem("GET /v1/audit/records with verify scope only", r, "forbidden",
                   "/v1/audit/records", required_scope="audit")
    # Authentication comes before the body is looked at.
    r = c.req("POST", "/v1/verifications", b"{not json", {"Content-Type": "application/json"})
    expect_problem("bad JSON without credentials: 401 before parsing", r, "unauthorised",
                   "/v1/verifications")


def verification_ok(label, r, expect_type):
    body = expect_json(label, r, 200, "Verification")
    if not body:
        return None
    s, t = body.get("score"), body.get("threshold")
    if isinstance(s, (int, float)) and isinstance(t, (int, float)):
        check(body.get("decision") == ("match" if s >= t else "non_match"),
              f"{label}: decision {body.get('decision')} is score {s} >= threshold {t}")
    check(body.get("reference_type") == expect_type, f"{label}: reference_type {expect_type}")
    check(UUID4_RE.match(str(body.get("decision_id"))) is not None,
          f"{label}: decision_id is a UUID v4")
    return body


def part_verify(c, tok, state, d, port, ca):
    print("--- verification of a probe against a reference photo")
    model = state.get("model", {})
    # A same-person pair the model matches offline (the model is about 80 %
    # right on LFW, so candidates are tried in a fixed order).
    candidates = [("Colin_Powell", 1, 2), ("Tony_Blair", 1, 2), ("Donald_Rumsfeld", 1, 2),
                  ("Gerhard_Schroeder", 1, 2), ("Colin_Powell", 3, 4), ("Tony_Blair", 3, 4),
                  ("Ariel_Sharon", 1, 2), ("Hugo_Chavez", 1, 2)]
    mated = None
    for name, i, j in candidates:
        cli = cli_verify(lfw(name, i), lfw(name, j))
        if cli.get("decision") == "match":
            mated = (lfw(name, i), lfw(name, j), cli)
            break
    if not ck(mated is not None, "a same-person LFW pair that `likeness verify` matches"):
        return
    state["mated"] = mated
    pa, pb, cli = mated
    print(f"note: mated pair {os.path.basename(pa)} / {os.path.basename(pb)}, "
          f"offline score {cli['score']}")
    # Through curl's own multipart encoder.
    rid = "visitor-desk.verify-1"
    r = curl(port, ca, "POST", "/v1/verifications",
             ["-F", f"probe=@{pa};type=image/jpeg", "-F", f"reference=@{pb};type=image/jpeg"],
             token=tok["verify"], tmp=d, req_id=rid)
    body = verification_ok("POST /v1/verifications multipart (curl -F), mated pair", r, "image")
    if body:
        check(abs(body["score"] - cli["score"]) <= 1e-9,
              f"service score {body['score']} equals `likeness verify` score {cli['score']} (1e-9)")
        check(body["decision"] == "match", "the mated pair is a match, as offline")
        check(body.get("threshold") == cli.get("threshold") and
              body.get("target_fmr") == cli.get("target_fmr"),
              "threshold and target_fmr equal those of `likeness verify`")
        check(body.get("model_id") == model.get("model_id"), "model_id is that of /v1/model")
        check(r.header("X-Request-Id") == rid, "a valid X-Request-Id of the caller is echoed")
        q = body.get("quality", {})
        for role in ("probe", "reference"):
            check(q.get(role, {}).get("reasons") == cli["quality"][role]["reasons"]
                  and q.get(role, {}).get("face") == cli["quality"][role].get("face"),
                  f"quality.{role} reasons and face box equal those of `likeness verify`")
        check(isinstance(body.get("timings_ms"), dict)
              and body["timings_ms"].get("total", 0) >= body["timings_ms"].get("compare", -1),
              "timings_ms.total is at least timings_ms.compare")
        AUDIT_EXPECT.append((rid, "verification", 200, ""))
        state["match_score"] = body["score"]
        state["match_request"] = (rid, body)
    # The same pair as JSON (base64): the same score.
    r = c.json_post("/v1/verifications", {"probe": b64(read(pa)), "reference": b64(read(pb))},
                    token=tok["verify"])
    body = verification_ok("POST /v1/verifications JSON, mated pair", r, "image")
    if body:
        check(abs(body["score"] - cli["score"]) <= 1e-9, "JSON request: the same score as offline")
    # Other pairs: decision is score >= threshold and the score is the CLI's.
    pairs = [(lfw("Colin_Powell", 2), lfw("Tony_Blair", 2)),
             (lfw("Donald_Rumsfeld", 3), lfw("Gerhard_Schroeder", 3)),
             (lfw("Tony_Blair", 5), lfw("Tony_Blair", 6)),
             (lfw("Hugo_Chavez", 3), lfw("Ariel_Sharon", 3))]
    for a, b in pairs:
        cl = cli_verify(a, b)
        fields, ctype = multipart([("probe", read(a), "probe.jpg"), ("reference", read(b), "ref.jpg")])
        r = c.req("POST", "/v1/verifications", fields, {"Content-Type": ctype}, token=tok["verify"])
        label = f"verify {os.path.basename(a)} vs {os.path.basename(b)}"
        if "score" in cl:
            body = verification_ok(label, r, "image")
            if body:
                check(abs(body["score"] - cl["score"]) <= 1e-9 and body["decision"] == cl["decision"],
                      f"{label}: score {body['score']} and decision equal the CLI's ({cl['score']})")
        else:
            check(r.status == 422, f"{label}: unusable offline ({cl.get('error')}), 422 here too")
    # target_fmr: an operating point's own target gives that row's threshold,
    # the same as `likeness verify --fmr`.
    pts = state.get("points") or []
    if pts:
        row = pts[len(pts) // 2]
        fmr = row["target_fmr"]
        fields, ctype = multipart([("probe", read(pa), "p.jpg"), ("reference", read(pb), "r.jpg"),
                                   ("target_fmr", repr(fmr), None)])
        r = c.req("POST", "/v1/verifications", fields, {"Content-Type": ctype}, token=tok["verify"])
        body = verification_ok(f"multipart target_fmr {fmr}", r, "image")
        cl = cli_verify(pa, pb, fmr)
        if body:
            check(body.get("target_fmr") == fmr and body.get("threshold") == row["threshold"],
                  f"target_fmr {fmr}: threshold {body.get('threshold')} is the operating point's "
                  f"{row['threshold']}")
            check(body.get("threshold") == cl.get("threshold")
                  and abs(body["score"] - cl["score"]) <= 1e-9,
                  "and equals `likeness verify --fmr` (threshold and score)")
        r = c.json_post("/v1/verifications", {"probe": b64(read(pa)), "reference": b64(read(pb)),
                                              "target_fmr": fmr}, token=tok["verify"])
        body = verification_ok(f"JSON target_fmr {fmr}", r, "image")
        if body:
            check(body.get("threshold") == row["threshold"], "JSON target_fmr: the same threshold")
        low = pts[0]["target_fmr"] / 10
        r = c.json_post("/v1/verifications", {"probe": b64(read(pa)), "reference": b64(read(pb)),
                                              "target_fmr": low}, token=tok["verify"])
        expect_problem(f"target_fmr {low} below the smallest operating point", r,
                       "malformed-request", "/v1/verifications", field="target_fmr")
    for bad in (0, 1, 1.5, -0.1, "0.01"):
        r = c.json_post("/v1/verifications", {"probe": b64(read(pa)), "reference": b64(read(pb)),
                                              "target_fmr": bad}, token=tok["verify"])
        expect_problem(f"JSON target_fmr {bad!r}", r, "malformed-request", "/v1/verifications",
                       field="target_fmr")
    fields, ctype = multipart([("probe", read(pa), "p.jpg"), ("reference", read(pb), "r.jpg"),
                               ("target_fmr", "often", None)])
    r = c.req("POST", "/v1/verifications", fields, {"Content-Type": ctype}, token=tok["verify"])
    expect_problem("multipart target_fmr 'often'", r, "malformed-request", "/v1/verifications",
                   field="target_fmr")


def part_image_problems(c, tok, imgs, state):
    print("--- unusable images")
    # A usable photo for the other side (the mated pair's reference).
    good = read(state["mated"][1]) if state.get("mated") else read(lfw("Tony_Blair", 1))
    cands = [imgs[k] for k in imgs if k.startswith(("gray", "noise", "tiny_", "blur_", "dark",
                                                     "bright", "group_", "two_faces"))]
    det = cli_detect(cands)
    by_reason = {}
    for p in cands:
        q = (det.get(p) or {}).get("quality") or {}
        reasons = q.get("reasons") or []
        if len(reasons) == 1 and not q.get("usable", True):
            by_reason.setdefault(reasons[0], []).append(p)
    for reason in ("no_face", "multiple_faces", "face_too_small"):
        check(reason in by_reason,
              f"a crafted image `likeness detect` flags with {reason} alone "
              f"({[os.path.basename(p) for p in by_reason.get(reason, [])]})")
    poor = [r for r in ("too_blurry", "badly_exposed", "too_rotated") if r in by_reason]
    check(bool(poor), f"a crafted image `likeness detect` flags as poor quality ({poor})")
    state["noface"] = by_reason.get("no_face", [imgs["gray.png"]])[0]
    # Each crafted image as probe (multipart) and as reference (JSON): the
    # problem of its first reason, with the CLI's reasons and quality.
    for reason, paths in sorted(by_reason.items()):
        p = paths[0]
        slug = REASON_SLUG[reason]
        q = det[p]["quality"]
        fields, ctype = multipart([("probe", read(p), "probe.png"), ("reference", good, "r.jpg")])
        r = c.req("POST", "/v1/verifications", fields, {"Content-Type": ctype}, token=tok["verify"])
        body = expect_problem(f"probe {os.path.basename(p)} ({reason})", r, slug,
                              "/v1/verifications", image="probe", reasons=[reason])
        if body:
            check(body.get("quality", {}).get("reasons") == q["reasons"]
                  and body.get("quality", {}).get("face_count") == q["face_count"],
                  f"probe {os.path.basename(p)}: quality equals `likeness detect`'s")
        r = c.json_post("/v1/verifications", {"probe": b64(good), "reference": b64(read(p))},
                        token=tok["verify"])
        expect_problem(f"reference {os.path.basename(p)} ({reason}), JSON", r, slug,
                       "/v1/verifications", image="reference", reasons=[reason])
    # Decoding problems: only the image member.
    decode = [("text.txt", "unsupported-image"), ("face.gif", "unsupported-image"),
              ("truncated.jpg", "corrupt-image"), ("huge_20000x20000.png", "image-too-large"),
              ("huge_8000x6000.png", "image-too-large")]
    for name, slug in decode:
        fields, ctype = multipart([("probe", good, "p.jpg"), ("reference", read(imgs[name]), name)])
        r = c.req("POST", "/v1/verifications", fields, {"Content-Type": ctype}, token=tok["verify"])
        expect_problem(f"reference {name}", r, slug, "/v1/verifications", image="reference",
                       quality=ABSENT, reasons=ABSENT)
        r = c.json_post("/v1/verifications", {"probe": b64(read(imgs[name])), "reference": b64(good)},
                        token=tok["verify"])
        expect_problem(f"probe {name}, JSON", r, slug, "/v1/verifications", image="probe")
    r = c.json_post("/v1/verifications", {"probe": "", "reference": b64(good)}, token=tok["verify"])
    check(r.status in (400, 422), f"an empty probe is refused with 400 or 422 (got {r.status})")
    if r.status == 422:
        expect_problem("empty probe", r, "unsupported-image", "/v1/verifications", image="probe")
    elif r.status == 400:
        expect_problem("empty probe", r, "malformed-request", "/v1/verifications")


def part_request_problems(c, tok, state, d, port, ca):
    print("--- malformed requests, media types, routes, methods, body size")
    good = b64(read(lfw("Colin_Powell", 1)))
    t = tok["all"]
    cases = [
        ("bad JSON", b'{"probe": "' + good.encode()[:20], None),
        ("JSON array", b"[1, 2]", None),
        # RFC 4648 section 4: alphabet A-Z a-z 0-9 + /, "=" padding to a
        # multiple of 4 characters ("abcd" is "YWJjZA==").
        ("bad base64 (characters)", json.dumps({"probe": "YWJj$A==", "reference": good}).encode(), "probe"),
        ("bad base64 (no padding)", json.dumps({"probe": "YWJjZA", "reference": good}).encode(), "probe"),
        ("bad base64 (short padding)", json.dumps({"probe": "YWJjZA=", "reference": good}).encode(), "probe"),
        ("bad base64 (whitespace)", json.dumps({"probe": "YWJj ZA==", "reference": good}).encode(), "probe"),
        ("base64url alphabet", json.dumps({"probe": "-_-_", "reference": good}).encode(), "probe"),
        ("missing probe", json.dumps({"reference": good}).encode(), "probe"),
        ("probe only", json.dumps({"probe": good}).encode(), None),
        ("reference and template_id", json.dumps({"probe": good, "reference": good,
                                                  "template_id": "0" * 32}).encode(), None),
        ("extra field", json.dumps({"probe": good, "reference": good, "subject": "x"}).encode(), None),
        ("probe is a number", json.dumps({"probe": 5, "reference": good}).encode(), "probe"),
        ("template_id ../etc/passwd", json.dumps({"probe": good, "template_id": "../etc/passwd"}).encode(),
         "template_id"),
        ("template_id SQL", json.dumps({"probe": good, "template_id": "1' OR '1'='1"}).encode(),
         "template_id"),
        ("template_id upper-case hex", json.dumps({"probe": good, "template_id": "A" * 32}).encode(),
         "template_id"),
        ("template_id 31 hex", json.dumps({"probe": good, "template_id": "a" * 31}).encode(),
         "template_id"),
        ("empty body", b"", None),
    ]
    for what, body, field in cases:
        r = c.req("POST", "/v1/verifications", body, {"Content-Type": "application/json"}, token=t)
        expect_problem(f"verification, {what}", r, "malformed-request", "/v1/verifications",
                       **({"field": field} if field else {}))
    # Multipart damage.
    img = read(lfw("Colin_Powell", 1))
    body, ctype = multipart([("probe", img, "p.jpg"), ("reference", img, "r.jpg")])
    mp_cases = [
        ("no boundary", body, "multipart/form-data"),
        ("no close delimiter", body[:-len("--\r\n") - 30], ctype),
        ("wrong boundary", body, "multipart/form-data; boundary=somethingElse"),
    ]
    b2, c2 = multipart([("probe", img, "p.jpg"), ("reference", img, "r.jpg"), ("colour", "blue", None)])
    mp_cases.append(("unknown part", b2, c2))
    b3, c3 = multipart([("probe", img, "p.jpg"), ("probe", img, "p2.jpg"), ("reference", img, "r.jpg")])
    mp_cases.append(("two probe parts", b3, c3))
    b4, c4 = multipart([("reference", img, "r.jpg")])
    mp_cases.append(("no probe part", b4, c4))
    for what, b, ct in mp_cases:
        r = c.req("POST", "/v1/verifications", b, {"Content-Type": ct}, token=t)
        expect_problem(f"multipart {what}", r, "malformed-request", "/v1/verifications")
    # Enrolment request problems.
    enrol_cases = [
        ("no images member", {"subject_ref": "x"}, "images"),
        ("empty images", {"images": []}, "images"),
        ("eleven images", {"images": [good] * 11}, "images"),
        ("ttl_seconds 0", {"images": [good], "ttl_seconds": 0}, "ttl_seconds"),
        ("ttl_seconds -5", {"images": [good], "ttl_seconds": -5}, "ttl_seconds"),
        ("ttl_seconds 1.5", {"images": [good], "ttl_seconds": 1.5}, "ttl_seconds"),
        ("subject_ref 256 bytes", {"images": [good], "subject_ref": "v" * 256}, "subject_ref"),
        ("subject_ref 128 two-byte characters", {"images": [good], "subject_ref": "\u00e9" * 128},
         "subject_ref"),
        ("subject_ref a number", {"images": [good], "subject_ref": 142}, "subject_ref"),
        ("images not base64", {"images": [good, "%%%"]}, None),
    ]
    for what, obj, field in enrol_cases:
        r = c.json_post("/v1/templates", obj, token=t)
        expect_problem(f"enrolment, {what}", r, "malformed-request", "/v1/templates",
                       **({"field": field} if field else {}))
    # Invalid UTF-8 (a Latin-1 byte) inside a JSON string.
    r = c.req("POST", "/v1/templates", b'{"images": ["' + good.encode() + b'"], "subject_ref": "caf\xe9"}',
              {"Content-Type": "application/json"}, token=t)
    expect_problem("enrolment, subject_ref not UTF-8", r, "malformed-request", "/v1/templates")
    b6, c6 = multipart([("image", img, "a.jpg"), ("subject_ref", b"caf\xe9", None)])
    r = c.req("POST", "/v1/templates", b6, {"Content-Type": c6}, token=t)
    expect_problem("enrolment multipart, subject_ref not UTF-8", r, "malformed-request",
                   "/v1/templates", field="subject_ref")
    b5, c5 = multipart([("image", img, "a.jpg"), ("ttl_seconds", "soon", None)])
    r = c.req("POST", "/v1/templates", b5, {"Content-Type": c5}, token=t)
    expect_problem("enrolment multipart ttl_seconds 'soon'", r, "malformed-request",
                   "/v1/templates", field="ttl_seconds")
    # Audit query parameters.
    for q, field in (("after=-1", "after"), ("after=x", "after"), ("limit=0", "limit"),
                     ("limit=1001", "limit"), ("limit=ten", "limit"), ("after=1e3", "after")):
        r = c.req("GET", f"/v1/audit/records?{q}", token=t)
        expect_problem(f"audit records ?{q}", r, "malformed-request", "/v1/audit/records",
                       **({"field": field} if field else {}))
    # 415.
    body, ctype = multipart([("probe", img, "p.jpg"), ("reference", img, "r.jpg")])
    for ct in ("text/plain", "application/x-www-form-urlencoded", "image/jpeg", None):
        h = {"Content-Type": ct} if ct else {}
        r = c.req("POST", "/v1/verifications", body, h, token=t)
        expect_problem(f"verification with Content-Type {ct}", r, "unsupported-media-type",
                       "/v1/verifications")
    r = c.req("POST", "/v1/templates", b"images", {"Content-Type": "text/csv"}, token=t)
    expect_problem("enrolment with Content-Type text/csv", r, "unsupported-media-type",
                   "/v1/templates")
    # Unknown routes (authenticated, so only the route is wrong).
    for path in UNKNOWN_PATHS:
        r = c.req("GET", path, token=t)
        expect_problem(f"GET {path}", r, "not-found", path)
    # Methods a route does not have: 405 with Allow.
    for method, path, allowed in (("GET", "/v1/verifications", {"POST"}),
                                  ("PUT", "/v1/verifications", {"POST"}),
                                  ("DELETE", "/v1/model", {"GET"}),
                                  ("POST", "/v1/model", {"GET"}),
                                  ("PUT", "/v1/templates/" + "0" * 32, {"GET", "DELETE"}),
                                  ("GET", "/v1/templates", {"POST"}),
                                  ("POST", "/healthz", {"GET"}),
                                  ("DELETE", "/v1/audit/records", {"GET"})):
        body = b"{}" if method in ("POST", "PUT") else None
        r = c.req(method, path, body, {"Content-Type": "application/json"} if body else None, token=t)
        expect_problem(f"{method} {path}", r, "method-not-allowed", path)
        allow = {m.strip() for m in (r.header("Allow") or "").split(",") if m.strip()}
        check(allowed <= allow and allow <= allowed | {"HEAD", "OPTIONS"},
              f"{method} {path}: Allow lists {sorted(allowed)} (got {r.header('Allow')!r})")
    # Bodies over max_body_bytes (curl: declared length; http.client: chunked).
    big = os.path.join(d, "big.json")
    with open(big, "wb") as f:
        f.write(b'{"probe": "' + b"A" * (MAX_BODY + 1) + b'"}')
    r = curl(port, ca, "POST", "/v1/verifications",
             ["-H", "Content-Type: application/json", "--data-binary", f"@{big}"], token=t, tmp=d)
    expect_problem(f"a {MAX_BODY + 13}-byte body (limit {MAX_BODY})", r, "payload-too-large",
                   "/v1/verifications", limit_bytes=MAX_BODY)
    chunks = [b'{"probe": "'] + [b"A" * 65536] * (MAX_BODY // 65536 + 2) + [b'"}']
    r = c.req("POST", "/v1/templates", chunks, {"Content-Type": "application/json"}, token=t,
              chunked=True)
    expect_problem("a chunked body over the limit", r, "payload-too-large", "/v1/templates",
                   limit_bytes=MAX_BODY)
    # Just under the limit is read (and refused for what it is, not its size).
    with open(big, "wb") as f:
        f.write(b'{"probe": "' + b"A" * (MAX_BODY - 100) + b'"}')
    r = curl(port, ca, "POST", "/v1/verifications",
             ["-H", "Content-Type: application/json", "--data-binary", f"@{big}"], token=t, tmp=d)
    check(r.status in (400, 422), f"a body just under the limit is parsed (400/422, got {r.status})")


def part_templates(c, tok, state, imgs):
    print("--- templates: enrol, read, verify against, delete, expire")
    model = state.get("model", {})
    mated = state.get("mated")
    if not mated:
        check(False, "templates need the mated pair")
        return
    pa, pb, _ = mated
    n_before = state.setdefault("templates_live", 0)
    # Multipart enrolment of two photos of one person.
    rid = "visitor-desk.enrol-1"
    body, ctype = multipart([("image", read(pb), "a.jpg"), ("image", read(lfw("Colin_Powell", 5)), "b.jpg"),
                             ("subject_ref", "visitor-2026-0142", None), ("ttl_seconds", "3600", None)])
    r = c.req("POST", "/v1/templates", body, {"Content-Type": ctype}, token=tok["enrol"], req_id=rid)
    created = expect_json("POST /v1/templates multipart, two images", r, 201, "TemplateCreated")
    if not created:
        return
    tid = created.get("template_id", "")
    AUDIT_EXPECT.append((rid, "enrolment", 201, tid))
    state["templates_live"] = n_before + 1
    check(r.header("Location") == f"/v1/templates/{tid}",
          f"Location is /v1/templates/<id> (got {r.header('Location')})")
    check(created.get("image_count") == 2 and len(created.get("quality", [])) == 2,
          "image_count 2 and one quality object per image")
    check(created.get("subject_ref") == "visitor-2026-0142", "subject_ref echoed")
    check(created.get("model_id") == model.get("model_id"), "model_id is that of /v1/model")
    try:
        ttl = (parse_time(created["expires"]) - parse_time(created["created"])).total_seconds()
        check(abs(ttl - 3600) < 0.002, f"expires - created = ttl_seconds 3600 (got {ttl})")
        now = datetime.datetime.utcnow()
        check(abs((parse_time(created["created"]) - now).total_seconds()) < 300,
              "created is the current UTC time")
    except (KeyError, TypeError, ValueError) as e:
        check(False, f"created/expires are RFC 3339 UTC times ({e})")
    info = expect_json("GET /v1/templates/{id}", c.req("GET", f"/v1/templates/{tid}", token=tok["enrol"]),
                       200, "TemplateInfo")
    if info:
        same = all(info.get(k) == created.get(k) for k in
                   ("template_id", "subject_ref", "image_count", "model_id", "created", "expires"))
        check(same, "GET answers the enrolment's metadata")
        check(KEYID_RE.match(str(info.get("key_id"))) is not None, f"key_id {info.get('key_id')}")
        check(not any(k in info for k in ("features", "vector", "record", "template")),
              "GET never shows features")
    # Verification against the template (JSON and multipart).
    rid = "visitor-desk.verify-tpl-1"
    r = c.json_post("/v1/verifications", {"probe": b64(read(pa)), "template_id": tid},
                    token=tok["verify"], req_id=rid)
    v = verification_ok("verify against the template (JSON)", r, "template")
    if v:
        AUDIT_EXPECT.append((rid, "verification", 200, tid))
        check(v.get("template_id") == tid, "template_id echoed")
        check("reference" not in v.get("quality", {}) and "reference" not in v.get("timings_ms", {}),
              "no reference quality or timings for a template")
    body, ctype = multipart([("probe", read(pa), "p.jpg"), ("template_id", tid, None)])
    r = c.req("POST", "/v1/verifications", body, {"Content-Type": ctype}, token=tok["verify"])
    v2 = verification_ok("verify against the template (multipart)", r, "template")
    if v and v2:
        check(v2["score"] == v["score"], "multipart and JSON give the same score against a template")
    # A one-photo template compares exactly like the photo itself.
    r = c.json_post("/v1/templates", {"images": [b64(read(pb))]}, token=tok["enrol"])
    one = expect_json("POST /v1/templates JSON, one image", r, 201, "TemplateCreated")
    if one:
        state["templates_live"] += 1
        check(one.get("subject_ref") is None and one.get("expires") is None,
              "without subject_ref and ttl_seconds: both null")
        state["tid_one"] = one["template_id"]
        r = c.json_post("/v1/verifications", {"probe": b64(read(pa)), "template_id": one["template_id"]},
                        token=tok["verify"])
        v1 = verification_ok("verify against the one-photo template", r, "template")
        if v1 and "match_score" in state:
            check(abs(v1["score"] - state["match_score"]) <= 1e-9,
                  f"probe vs one-photo template scores as probe vs that photo "
                  f"({v1['score']} vs {state['match_score']})")
    # An unusable image in an enrolment: its problem, image[i], nothing stored.
    noface = read(state.get("noface") or imgs["gray.png"])
    n_tpl = template_count(state)
    r = c.json_post("/v1/templates", {"images": [b64(read(pa)), b64(noface)], "subject_ref": "x"},
                    token=tok["enrol"])
    expect_problem("enrolment with an unusable second image", r, "no-face", "/v1/templates",
                   image="image[1]")
    body, ctype = multipart([("image", read(imgs["truncated.jpg"]), "a.jpg"), ("image", read(pa), "b.jpg")])
    r = c.req("POST", "/v1/templates", body, {"Content-Type": ctype}, token=tok["enrol"])
    expect_problem("enrolment with a corrupt first image", r, "corrupt-image", "/v1/templates",
                   image="image[0]")
    check(template_count(state) == n_tpl, "a refused enrolment stores nothing")
    # Unknown and malformed ids.
    unknown = "0123456789abcdef0123456789abcdef"
    r = c.req("GET", f"/v1/templates/{unknown}", token=tok["enrol"])
    expect_problem("GET an unknown template", r, "template-not-found", f"/v1/templates/{unknown}",
                   template_id=unknown)
    r = c.json_post("/v1/verifications", {"probe": b64(read(pa)), "template_id": unknown},
                    token=tok["verify"])
    expect_problem("verify against an unknown template", r, "template-not-found", "/v1/verifications",
                   template_id=unknown)
    for raw in ("1%27%20OR%20%271%27%3D%271", "ABCDEF0123456789ABCDEF0123456789", "abc",
                "0123456789abcdef0123456789abcdef0", "%2e%2e%2fetc%2fpasswd", "..%2Fetc%2Fpasswd"):
        for method, scope in (("GET", "enrol"), ("DELETE", "delete")):
            path = f"/v1/templates/{raw}"
            r = c.req(method, path, token=tok[scope])
            body = r.json if isinstance(r.json, dict) else {}
            check(r.status == 404 and body.get("type") in ("/problems/template-not-found",
                                                          "/problems/not-found"),
                  f"{method} {path}: 404 (got {r!r})")
            if r.status == 404 and body.get("type") in ("/problems/template-not-found",
                                                         "/problems/not-found"):
                expect_problem(f"{method} {path}", r, body.get("type", "").rsplit("/", 1)[-1],
                               body.get("instance") or path, template_id=ABSENT)
                check(b"root:" not in r.body, f"{method} {path}: no file content in the answer")
    r = c.req("GET", "/v1/templates/../etc/passwd", token=tok["enrol"])
    check(r.status == 404 and b"root:" not in r.body,
          f"GET /v1/templates/../etc/passwd (dot segments as sent): 404 (got {r!r})")
    # Delete; then it is gone everywhere.
    rid = "visitor-desk.delete-1"
    r = c.req("DELETE", f"/v1/templates/{tid}", token=tok["delete"], req_id=rid)
    check(r.status == 204 and r.body == b"", f"DELETE the template: 204, no body (got {r!r})")
    if r.status == 204:
        AUDIT_EXPECT.append((rid, "deletion", 204, tid))
        state["templates_live"] -= 1
    r = c.req("GET", f"/v1/templates/{tid}", token=tok["enrol"])
    expect_problem("GET after DELETE", r, "template-not-found", f"/v1/templates/{tid}",
                   template_id=tid)
    r = c.json_post("/v1/verifications", {"probe": b64(read(pa)), "template_id": tid},
                    token=tok["verify"])
    expect_problem("verify against a deleted template", r, "template-not-found",
                   "/v1/verifications", template_id=tid)
    r = c.req("DELETE", f"/v1/templates/{tid}", token=tok["delete"])
    expect_problem("DELETE again", r, "template-not-found", f"/v1/templates/{tid}", template_id=tid)
    # Expiry.
    r = c.json_post("/v1/templates", {"images": [b64(read(pb))], "ttl_seconds": 1},
                    token=tok["enrol"])
    short = expect_json("enrol with ttl_seconds 1", r, 201, "TemplateCreated")
    if short:
        time.sleep(2.2)
        r = c.req("GET", f"/v1/templates/{short['template_id']}", token=tok["enrol"])
        expect_problem("GET an expired template", r, "template-not-found",
                       f"/v1/templates/{short['template_id']}", template_id=short["template_id"])
        r = c.json_post("/v1/verifications", {"probe": b64(read(pa)),
                                              "template_id": short["template_id"]}, token=tok["verify"])
        expect_problem("verify against an expired template", r, "template-not-found",
                       "/v1/verifications")
        state["expired_tid"] = short["template_id"]


def template_count(state):
    db = state.get("store_path")
    if not db:
        return None
    with sqlite3.connect(db, timeout=30) as con:
        return con.execute("SELECT count(*) FROM templates").fetchone()[0]


def part_tamper(c, tok, state, store):
    print("--- a stored template altered on disk")
    mated = state.get("mated")
    if not mated:
        return
    pa, pb, _ = mated
    r = c.json_post("/v1/templates", {"images": [b64(read(pb))]}, token=tok["enrol"])
    t = expect_json("enrol a template to alter", r, 201, "TemplateCreated")
    if not t:
        return
    tid = t["template_id"]
    con = sqlite3.connect(store, timeout=30)
    rec = con.execute("SELECT record FROM templates WHERE template_id = ?", (tid,)).fetchone()
    if not ck(rec is not None, "the template's row is in templates (sqlite3)"):
        return
    rec = bytearray(rec[0])
    rec[len(rec) // 2] ^= 0x01
    con.execute("UPDATE templates SET record = ? WHERE template_id = ?", (bytes(rec), tid))
    con.commit()
    con.close()
    rid = "visitor-desk.refused-1"
    r = c.json_post("/v1/verifications", {"probe": b64(read(pa)), "template_id": tid},
                    token=tok["verify"], req_id=rid)
    expect_problem("verify against a template with one flipped bit", r, "template-unusable",
                   "/v1/verifications", template_id=tid, reason="integrity")
    AUDIT_EXPECT.append((rid, "template_refused", 409, tid))
    # Removed so that key rotation does not meet it.
    r = c.req("DELETE", f"/v1/templates/{tid}", token=tok["delete"])
    check(r.status == 204, f"the altered template can still be deleted (got {r.status})")


def part_mtls(c, tok, state, d, port, ca):
    print("--- mutual TLS")
    mated = state.get("mated")
    if not mated:
        return
    pa, pb, _ = mated
    mc = Client(port, ca, f"{d}/certs/client.crt", f"{d}/certs/client.key")
    rid = "visitor-desk.mtls-1"
    r = mc.json_post("/v1/verifications", {"probe": b64(read(pa)), "reference": b64(read(pb))},
                     req_id=rid)
    v = verification_ok("client certificate (scope verify), no bearer token", r, "image")
    if v:
        AUDIT_EXPECT.append((rid, "verification", 200, ""))
        state["mtls_request"] = rid
    r = mc.json_post("/v1/templates", {"images": [b64(read(pb))]})
    expect_problem("client certificate without the enrol scope", r, "forbidden", "/v1/templates",
                   required_scope="enrol")
    r = mc.req("GET", "/v1/model")
    check(r.status == 200, f"client certificate: GET /v1/model 200 (got {r.status})")
    # A certificate of another CA is not an identity.
    run(["sh", CERT_SCRIPT, f"{d}/other"])
    oc = Client(port, ca, f"{d}/other/client.crt", f"{d}/other/client.key")
    r = oc.req("GET", "/v1/model")
    check(r.status in (0, 401), f"a client certificate of another CA: handshake refused or 401 "
                                f"(got {r.status} {r.error or ''})")
    if r.status == 401:
        expect_problem("client certificate of another CA", r, "unauthorised", "/v1/model")


def part_metrics(c, tok, state, store):
    print("--- /metrics")
    r = c.req("GET", "/metrics")
    check(r.status == 200, f"GET /metrics without credentials: 200 (got {r.status})")
    ct = r.ctype.replace(" ", "")
    check(ct.startswith("text/plain") and "version=0.0.4" in ct,
          f"Content-Type text/plain; version=0.0.4 (got '{r.ctype}')")
    types, helps, samples, errors = parse_prometheus(r.body.decode("utf-8", "replace"))
    check(not errors, f"Prometheus text format 0.0.4 parses ({errors[:3]})")
    want = {"likeness_http_requests_total": "counter",
            "likeness_http_request_duration_seconds": "histogram",
            "likeness_decisions_total": "counter", "likeness_queue_depth": "gauge",
            "likeness_workers": "gauge", "likeness_templates": "gauge"}
    for name, typ in want.items():
        check(types.get(name) == typ, f"{name} is a {typ} (got {types.get(name)})")
        check(name in helps, f"{name} has a HELP line")
    reqs = [lab for n, lab, _ in samples if n == "likeness_http_requests_total"]
    check(bool(reqs) and all({"route", "method", "status"} <= set(lab) for lab in reqs),
          "likeness_http_requests_total samples carry route, method, status")
    routes = {lab.get("route") for lab in reqs}
    check(not any(HEX32_RE.search(x or "") or re.search(r"[0-9a-f]{32}", x or "") for x in routes),
          f"no template id in a route label (bounded label values; routes {sorted(routes)})")
    check(not (routes & set(UNKNOWN_PATHS)), f"unknown paths are not route labels ({sorted(routes)})")
    check(metric(samples, "likeness_workers") == WORKERS, f"likeness_workers is {WORKERS}")
    check(metric(samples, "likeness_templates") == template_count({"store_path": store}),
          "likeness_templates equals the rows of templates in the store (sqlite3)")
    # Histogram: cumulative buckets, +Inf equals _count (exposition format).
    hb = {}
    for n, lab, v in samples:
        if n == "likeness_http_request_duration_seconds_bucket":
            hb.setdefault(lab.get("route"), []).append((float(lab.get("le", "nan")), v))
    hist_ok = bool(hb)
    for route, bs in hb.items():
        bs.sort()
        cnt = metric(samples, "likeness_http_request_duration_seconds_count", route=route)
        if any(bs[i][1] > bs[i + 1][1] for i in range(len(bs) - 1)) or bs[-1][0] != float("inf") \
                or bs[-1][1] != cnt:
            hist_ok = False
    check(hist_ok, "duration histogram: cumulative buckets by route, le=+Inf equals _count")
    # Counting: three more /healthz, one more match.
    before = metric(samples, "likeness_http_requests_total", route="/healthz", method="GET",
                    status="200")
    m_before = metric(samples, "likeness_decisions_total", decision="match")
    for _ in range(3):
        c.req("GET", "/healthz")
    mated = state.get("mated")
    if mated:
        c.json_post("/v1/verifications", {"probe": b64(read(mated[0])), "reference": b64(read(mated[1]))},
                    token=tok["verify"])
    _, _, samples2, _ = parse_prometheus(c.req("GET", "/metrics").body.decode("utf-8", "replace"))
    after = metric(samples2, "likeness_http_requests_total", route="/healthz", method="GET",
                   status="200")
    check(after - before == 3, f"three GET /healthz add 3 to likeness_http_requests_total"
                               f"{{route=\"/healthz\",method=\"GET\",status=\"200\"}} ({before} -> {after})")
    if mated:
        m_after = metric(samples2, "likeness_decisions_total", decision="match")
        check(m_after - m_before == 1, f"a match adds 1 to likeness_decisions_total{{decision=\"match\"}}"
                                       f" ({m_before} -> {m_after})")


def s_client(port, version, ca, extra=()):
    r = run(["openssl", "s_client", "-connect", f"127.0.0.1:{port}", "-servername", "localhost",
             "-CAfile", ca, f"-{version}", "-cipher", "DEFAULT@SECLEVEL=0", *extra],
            timeout=30, input="")
    # s_client prints "New, (NONE), Cipher is (NONE)" when no handshake
    # completed, else "New, V, Cipher is C" where V is the cipher suite's
    # version; the "Protocol :" line of the session names the version used
    # (but appears even after a failure, and not at all for TLS 1.3 when the
    # session ticket has not arrived yet).
    m = re.search(r"^New, (\S+), Cipher is (\S+)", r.stdout, re.M)
    if not m or m.group(1) == "(NONE)":
        return r.returncode, None, r.stdout + r.stderr
    p = re.search(r"^\s*Protocol\s*:\s*(\S+)", r.stdout, re.M)
    proto = p.group(1) if p else m.group(1)
    return r.returncode, ("TLSv1.0" if proto == "TLSv1" else proto), r.stdout + r.stderr


def part_tls_versions(d, port, ca):
    print("--- TLS protocol versions")
    # Control: the same client does speak TLS 1.0 and 1.1 to a server that
    # offers them (openssl s_server), so a refusal below is the service's.
    for version, name in (("tls1", "TLSv1.0"), ("tls1_1", "TLSv1.1")):
        cport = free_port()
        srv = subprocess.Popen(["openssl", "s_server", "-accept", f"127.0.0.1:{cport}",
                                "-cert", f"{d}/certs/server.crt", "-key", f"{d}/certs/server.key",
                                f"-{version}", "-cipher", "DEFAULT@SECLEVEL=0", "-naccept", "1",
                                "-quiet"], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                               stdin=subprocess.DEVNULL)
        rc, proto = 1, None
        for _ in range(50):
            rc, proto, _ = s_client(cport, version, ca)
            if proto:
                break
            time.sleep(0.1)
        srv.kill()
        srv.wait()
        control = proto == name
        check(control, f"control: openssl s_client -{version} negotiates {name} with openssl s_server")
        rc, proto, out = s_client(port, version, ca)
        check(proto is None and rc != 0,
              f"likenessd refuses {name} (s_client -{version}: exit {rc}, protocol {proto})")
    for version, name in (("tls1_2", "TLSv1.2"), ("tls1_3", "TLSv1.3")):
        rc, proto, out = s_client(port, version, ca, ("-verify_return_error",))
        check(rc == 0 and proto == name,
              f"likenessd accepts {name} with a certificate chain to the dev CA "
              f"(exit {rc}, protocol {proto})")


def part_rotation(c, tok, state, cfg, keyfile):
    print("--- key rotation under traffic")
    mated = state.get("mated")
    tid = state.get("tid_one")
    if not mated or not tid:
        check(False, "key rotation needs the one-photo template")
        return
    info = c.req("GET", f"/v1/templates/{tid}", token=tok["enrol"]).json or {}
    old_key = info.get("key_id")
    state["keyfile_before_rotation"] = open(keyfile, "rb").read()
    probe = b64(read(mated[0]))
    results = []
    stop = threading.Event()
    tc = c  # a new connection per request: safe to share with the thread

    def traffic():
        while not stop.is_set():
            r = tc.json_post("/v1/verifications", {"probe": probe, "template_id": tid},
                             token=tok["verify"], label="rotation traffic")
            results.append((r.status, (r.json or {}).get("score") if isinstance(r.json, dict) else None,
                            r))

    th = threading.Thread(target=traffic)
    th.start()
    deadline = time.time() + 60
    while len(results) < 3 and time.time() < deadline:
        time.sleep(0.05)
    rot = run([LIKENESS, "keys", "rotate", "--config", cfg])
    check(rot.returncode == 0, "likeness keys rotate --config while verifications run"
          + ("" if rot.returncode == 0 else f" ({rot.stderr.strip()[:300]})"))
    new_key = old_key
    deadline = time.time() + 20
    while time.time() < deadline:
        new_key = (c.req("GET", f"/v1/templates/{tid}", token=tok["enrol"]).json or {}).get("key_id")
        if new_key != old_key:
            break
        time.sleep(0.2)
    n = len(results)
    while len(results) < n + 3 and time.time() < deadline + 30:
        time.sleep(0.05)
    stop.set()
    th.join(120)
    statuses = [s for s, _, _ in results]
    scores = {s for _, s, _ in results}
    check(len(results) >= 6 and all(s == 200 for s in statuses),
          f"every verification during the rotation answered 200 ({len(results)} requests, "
          f"statuses {sorted(set(statuses))}; "
          f"{[r for s, _, r in results if s != 200][:1]})")
    check(len(scores) == 1, f"every verification during the rotation has the same score ({scores})")
    check(new_key != old_key and KEYID_RE.match(str(new_key)) is not None,
          f"afterwards the template's key_id is the new key ({old_key} -> {new_key})")
    # The new data key lives in the store, wrapped (docs/key-file.md); the
    # key file itself is unchanged by a rotation.
    with sqlite3.connect(f"file:{state['store_path']}?mode=ro", uri=True) as db:
        cur = [r[0] for r in db.execute("SELECT key_id FROM template_keys WHERE is_current = 1")]
    check(cur == [new_key], f"the new key id is the store's current template key ({cur})")
    check(open(keyfile, "rb").read() == state.get("keyfile_before_rotation", b""),
          "the key file is unchanged by the rotation")
    check(stat.S_IMODE(os.stat(keyfile).st_mode) == 0o600, "the rotated key file keeps mode 0600")
    r = c.req("GET", "/v1/model", token=tok["verify"])
    check(r.status == 200, "API keys still authenticate after the rotation")
    state["rotation_after"] = time.time()


def audit_all(c, tok):
    recs, after = [], 0
    for _ in range(1000):
        r = c.req("GET", f"/v1/audit/records?after={after}&limit=1000", token=tok["audit"])
        page = expect_json(f"GET /v1/audit/records?after={after}&limit=1000", r, 200, "AuditPage")
        if not page:
            return recs, None
        recs += page.get("records", [])
        if page.get("next_after") == page.get("head") or not page.get("records"):
            return recs, page.get("head")
        after = page.get("next_after")
    return recs, None


def part_audit(c, tok, state, cfg):
    print("--- audit records")
    recs, head = audit_all(c, tok)
    if not ck(bool(recs), "the audit chain has records"):
        return
    seqs = [x.get("seq") for x in recs]
    check(seqs == list(range(1, len(recs) + 1)), f"seq runs 1..{len(recs)} without gaps")
    check(head == seqs[-1], f"head is the last seq ({head})")
    check(recs[0].get("prev_hash") == "0" * 64, "the first record's prev_hash is 32 zero bytes")
    check(all(recs[i].get("prev_hash") == recs[i - 1].get("hash") for i in range(1, len(recs))),
          "each prev_hash is the hash of the record before")
    check(all(TIME_RE.match(str(x.get("time"))) for x in recs), "times are RFC 3339 UTC with ms")
    times = [x.get("time") for x in recs]
    check(times == sorted(times), "times do not go backwards")
    by_rid = {}
    for x in recs:
        by_rid.setdefault(x.get("request_id"), []).append(x)
    last_seq = 0
    for rid, op, status, tid in AUDIT_EXPECT:
        found = [x for x in by_rid.get(rid, []) if x.get("operation") == op]
        if not ck(len(found) == 1, f"audit: one {op} record for request {rid} "
                                      f"(found {[x.get('operation') for x in by_rid.get(rid, [])]})"):
            continue
        x = found[0]
        check(x["seq"] > last_seq, f"audit: {rid} ({op}) comes after the operations made before it")
        last_seq = max(last_seq, x["seq"])
        check(x.get("status") == status, f"audit: {rid} status {status} (got {x.get('status')})")
        if tid:
            check(x.get("template_id") == tid, f"audit: {rid} names template {tid}")
    if "match_request" in state:
        rid, body = state["match_request"]
        x = [y for y in by_rid.get(rid, []) if y.get("operation") == "verification"]
        if x:
            x = x[0]
            got = {k: x.get(k) for k in ("decision", "threshold", "model_id")}
            want = {k: body.get(k) for k in ("decision", "threshold", "model_id")}
            check(got == want, "audit: the verification's decision, threshold and model_id "
                               "as answered" + ("" if got == want else f" ({got} vs {want})"))
            # Both print the shortest decimal that reads back to the same double.
            check(x.get("score") == body["score"],
                  f"audit: the score exactly as answered ({x.get('score')!r} vs {body['score']!r})")
            check(x.get("caller") == "key:" + tok["verify"][4:20],
                  f"audit: the caller of a bearer request is its API key id ({x.get('caller')})")
            check(tok["verify"][21:] not in json.dumps(recs), "audit: no token secret in any record")
    if "mtls_request" in state:
        x = by_rid.get(state["mtls_request"], [{}])[0]
        check("visitor-desk-1" in str(x.get("caller")),
              f"audit: the caller of an mTLS request names the certificate subject ({x.get('caller')})")
    rot = [x for x in recs if x.get("operation") == "key_rotation"]
    check(len(rot) >= 1 and rot[-1].get("status") == 0,
          "audit: the key rotation is recorded (status 0, by the likeness command)")
    ops = {x.get("operation") for x in recs}
    check({"verification", "enrolment", "deletion", "authentication_failure",
           "template_refused", "key_rotation"} <= ops, f"audit: all operations seen ({sorted(ops)})")
    # Paging: limit and after.
    p = expect_json("audit page limit=2", c.req("GET", "/v1/audit/records?limit=2", token=tok["audit"]),
                    200, "AuditPage")
    if p:
        check([x["seq"] for x in p["records"]] == [1, 2] and p["next_after"] == 2,
              "limit=2: records 1 and 2, next_after 2")
    p = expect_json("audit page after=3&limit=2",
                    c.req("GET", "/v1/audit/records?after=3&limit=2", token=tok["audit"]), 200, "AuditPage")
    if p:
        check([x["seq"] for x in p["records"]] == [4, 5] and p["next_after"] == 5
              and p["records"] == recs[3:5], "after=3&limit=2: records 4 and 5, as in the full list")
    p = expect_json("audit page after=head",
                    c.req("GET", f"/v1/audit/records?after={head}", token=tok["audit"]), 200, "AuditPage")
    if p:
        check(p["records"] == [] and p["next_after"] == head,
              "after=head: no records, next_after is after")
    p = expect_json("audit page default", c.req("GET", "/v1/audit/records", token=tok["audit"]),
                    200, "AuditPage")
    if p:
        check(len(p["records"]) == min(100, len(recs)), "default limit is 100")
    r = run([LIKENESS, "audit", "verify", "--config", cfg])
    check(r.returncode == 0, "likeness audit verify --config passes while the service runs"
          + ("" if r.returncode == 0 else f" ({(r.stdout + r.stderr).strip()[:300]})"))


def part_problem_docs(c):
    print("--- problem type documentation")
    for slug in PROBLEMS:
        r = c.req("GET", f"/problems/{slug}")
        check(r.status == 200 and r.ctype.split(";")[0].strip() == "text/plain" and len(r.body) > 20,
              f"GET /problems/{slug} without credentials: 200 text/plain ({r.status} {r.ctype})")
    r = c.req("GET", "/problems/no-such-problem")
    expect_problem("GET /problems/no-such-problem", r, "not-found", "/problems/no-such-problem")
    missing = {"no-face", "multiple-faces", "face-too-small", "poor-quality", "unsupported-image",
               "corrupt-image", "image-too-large", "template-not-found", "template-unusable",
               "unauthorised", "forbidden", "payload-too-large", "malformed-request",
               "unsupported-media-type", "not-found", "method-not-allowed"} - SEEN_SLUGS
    check(not missing, f"every problem type reachable from outside was caused (missing {sorted(missing)})")


def part_overload(c, tokens, state):
    print("--- overload: one worker, a one-job queue")
    mated = state.get("mated")
    if not mated:
        return
    body = json.dumps({"probe": b64(read(mated[0])), "reference": b64(read(mated[1]))}).encode()
    got = []
    for _round in range(3):
        results = [None] * len(tokens)
        gate = threading.Barrier(len(tokens))

        def one(i):
            gate.wait()
            results[i] = c.req("POST", "/v1/verifications", body,
                               {"Content-Type": "application/json"}, token=tokens[i])

        ths = [threading.Thread(target=one, args=(i,)) for i in range(len(tokens))]
        for t in ths:
            t.start()
        for t in ths:
            t.join(300)
        got = [r for r in results if r is not None]
        if any(r.status == 503 for r in got):
            break
        time.sleep(6)  # refill each caller's bucket (0.2/s) before another round
    statuses = sorted(r.status for r in got)
    check(all(s in (200, 503) for s in statuses), f"concurrent verifications: 200 or 503 ({statuses})")
    over = [r for r in got if r.status == 503]
    check(bool(over), f"{len(tokens)} simultaneous verifications overfill a one-job queue: some 503")
    for r in over[:2]:
        expect_problem("queue full", r, "overloaded", "/v1/verifications", retry_after=1)
        check(r.header("Retry-After") == "1", f"overloaded: Retry-After: 1 (got {r.header('Retry-After')})")
    check(any(r.status == 200 for r in got), "and the ones that got in were answered")


def part_rate(c, tok):
    print("--- rate limit: 0.2 per second, burst 2")
    time.sleep(0.1)
    rs = [c.req("GET", "/v1/model", token=tok["rate"]) for _ in range(4)]
    st = [r.status for r in rs]
    check(st[:2] == [200, 200], f"the first two requests (the burst) pass ({st})")
    limited = [r for r in rs[2:] if r.status == 429]
    check(len(limited) == 2, f"the third and fourth are refused with 429 ({st})")
    for r in limited[:1]:
        body = expect_problem("over the rate", r, "rate-limited", "/v1/model", retry_after=PRESENT)
        ra = r.header("Retry-After") or ""
        check(ra.isdigit() and 1 <= int(ra) <= 5,
              f"Retry-After is whole seconds, at most 1/rate = 5 (got {ra!r})")
        if body and ra.isdigit():
            check(body.get("retry_after") == int(ra), "retry_after equals the Retry-After header")
    r = c.req("GET", "/v1/model", token=tok["rate2"])
    check(r.status == 200, f"another caller has its own bucket: 200 (got {r.status})")
    r = c.req("GET", "/healthz")
    check(r.status == 200, f"/healthz is not rate limited (got {r.status})")


def part_logs(log, tok, more_tokens):
    print(f"--- the service's log ({os.path.basename(log)})")
    text = open(log, "rb").read()
    secrets = [t[21:] for t in list(tok.values()) + list(more_tokens)]
    check(not any(s.encode() in text for s in secrets), "no API token secret in the log")
    jpg = read(lfw("Colin_Powell", 1))
    check(b64(jpg)[:64].encode() not in text and jpg[:64] not in text and b"\xff\xd8\xff" not in text,
          "no image bytes (raw or base64) in the log")


def part_audit_tamper(d, cfg, store):
    print("--- the audit chain altered on disk")
    copy = f"{d}/tampered.db"
    with sqlite3.connect(store, timeout=30) as src, sqlite3.connect(copy) as dst:
        src.backup(dst)
    with sqlite3.connect(copy) as con:
        row = con.execute("SELECT seq FROM audit_records WHERE score IS NOT NULL ORDER BY seq LIMIT 1").fetchone()
        if not ck(row is not None, "a scored audit record to alter"):
            return
        con.execute("UPDATE audit_records SET score = score / 2 WHERE seq = ?", (row[0],))
    r = run([LIKENESS, "audit", "verify", "--config", cfg, "--store", f"sqlite:{copy}"])
    check(r.returncode != 0, f"likeness audit verify fails on a copy with one score halved "
                             f"(record {row[0]}; exit {r.returncode})")


def part_request_ids():
    print("--- X-Request-Id on every response")
    bad = [(lab, got) for lab, got, sent in RESPONSES
           if not (got and REQID_RE.match(got) and (got == sent if sent and REQID_RE.match(sent)
                                                    else UUID4_RE.match(got)))]
    check(not bad, f"all {len(RESPONSES)} responses carry X-Request-Id: the caller's valid one, "
                   f"else a UUID v4 ({bad[:3]})")
    ids = [got for _, got, sent in RESPONSES if not sent and got]
    check(len(ids) == len(set(ids)), "generated request ids are all different")


def part_validate():
    print("--- JSON Schema validation of every body (Ajv, api-spec/openapi.yaml)")
    lines = "\n".join(json.dumps({"schema": s, "body": b, "label": lab}) for lab, s, b in BODIES)
    r = run(["node", os.path.join(API_DIR, "validate.mjs")], timeout=300, input=lines + "\n")
    if not ck(r.returncode in (0, 1), f"validate.mjs runs ({r.stderr.strip()[:300]})"):
        return
    res = [json.loads(x) for x in r.stdout.splitlines() if x.strip()]
    check(len(res) == len(BODIES), f"validate.mjs answered for all {len(BODIES)} bodies")
    for x in res:
        if not x["valid"]:
            check(False, f"{x['label']}: body valid against {x['schema']}: {x['errors'][:3]}")
    check(all(x["valid"] for x in res), f"{sum(x['valid'] for x in res)}/{len(res)} bodies valid")


if __name__ == "__main__":
    sys.exit(main())
