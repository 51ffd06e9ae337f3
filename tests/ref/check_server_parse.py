"""Request parsers of the service against Python's standard library:
multipart/form-data bodies (RFC 7578 / RFC 2046) against the email package's
MIME parser, UTF-8 validation (RFC 3629) against Python's strict UTF-8
codec, base64 (RFC 4648 section 4) against the base64 module. Bodies are
made by the email package's generator and by hand per RFC 7578, with random
binary payloads that contain CRLF and near-boundary byte sequences."""
import base64
import email.parser
import email.policy
import os
import random
import subprocess
import sys
import tempfile

sys.path.insert(0, os.path.dirname(__file__))
from lkref import check, finish, skip  # noqa: E402

BIN = os.environ.get("LIKENESS_BIN", "build/bin")
TOOL = os.path.join(BIN, "lkt_server_parse")
if not os.path.exists(TOOL):
    skip(f"{TOOL} is not built")
rng = random.Random(20261202)
tmp = tempfile.mkdtemp()


def run(*args, data):
    path = os.path.join(tmp, "in")
    with open(path, "wb") as f:
        f.write(data)
    out = subprocess.run([TOOL, *args, path], capture_output=True, check=True)
    return out.stdout.decode()


def reference_parts(ctype, body):
    """The email package's reading of a form body: (name, filename?, bytes)."""
    msg = email.parser.BytesParser(policy=email.policy.HTTP).parsebytes(
        b"Content-Type: " + ctype.encode() + b"\r\n\r\n" + body)
    parts = []
    for p in msg.iter_parts():
        name = p.get_param("name", header="content-disposition")
        parts.append((name, p.get_filename() is not None, p.get_payload(decode=True)))
    return parts


def ours(ctype, body):
    out = run("multipart", ctype, data=body)
    if out.startswith("error"):
        return out.strip()
    parts = []
    for line in out.splitlines():
        name, flag, _ct, n, hx = line.split(" ")
        data = bytes.fromhex(hx)
        assert len(data) == int(n)
        parts.append((name, flag == "1", data))
    return parts


def nasty_payload(boundary):
    """Random bytes with CRLFs, dashes and a prefix of the delimiter inside."""
    chunks = []
    for _ in range(rng.randint(0, 12)):
        k = rng.random()
        if k < 0.3:
            chunks.append(b"\r\n")
        elif k < 0.5:
            chunks.append(b"\r\n--" + boundary.encode()[: rng.randint(0, len(boundary) - 1)])
        elif k < 0.6:
            chunks.append(b"--")
        else:
            chunks.append(os.urandom(rng.randint(0, 300)))
    return b"".join(chunks)


def by_hand(fields, boundary):
    """RFC 7578 section 4: CRLF line ends, one delimiter per part, close delimiter."""
    out = b""
    for name, filename, data in fields:
        disp = f'form-data; name="{name}"' + (f'; filename="{filename}"' if filename else "")
        out += b"--" + boundary.encode() + b"\r\nContent-Disposition: " + disp.encode() + b"\r\n"
        if filename:
            out += b"Content-Type: application/octet-stream\r\n"
        out += b"\r\n" + data + b"\r\n"
    return out + b"--" + boundary.encode() + b"--\r\n"


# 1. Hand-made bodies with hostile payloads: both parsers agree with the input.
agree = 0
cases = 200
for i in range(cases):
    boundary = "".join(rng.choice("abcdefghijklmnopqrstuvwxyz0123456789'()+_,-./:=?")
                       for _ in range(rng.randint(1, 70)))
    fields = [(rng.choice(["probe", "reference", "image", "subject_ref"]),
               rng.choice([None, "photo.jpg"]), nasty_payload(boundary))
              for _ in range(rng.randint(1, 5))]
    body = by_hand(fields, boundary)
    ctype = f'multipart/form-data; boundary="{boundary}"'
    got = ours(ctype, body)
    want = [(n, f is not None, d) for n, f, d in fields]
    ok = got == want
    if ok:
        ref = reference_parts(ctype, body)
        # The email package drops nothing and adds nothing (reference check).
        ok = [(n, f, d) for n, f, d in ref] == want
    agree += ok
    if not ok and agree + 3 > i:
        print("mismatch on case", i, "boundary", repr(boundary), "ours:",
              [(n, f, len(d)) for n, f, d in got] if isinstance(got, list) else got,
              "want:", [(n, f, len(d)) for n, f, d in want])
        open(os.path.join(tmp, "case%d" % i), "wb").write(body)
check(agree == cases, f"multipart: {agree}/{cases} hostile hand-made bodies parsed as the email "
      "package parses them and as they were made")

# 2. Bodies made by the email package's own generator (HTTP policy: CRLF).
from email.mime.application import MIMEApplication  # noqa: E402
from email.mime.multipart import MIMEMultipart  # noqa: E402
from email.mime.text import MIMEText  # noqa: E402

agree = 0
for i in range(50):
    m = MIMEMultipart("form-data")
    want = []
    for _ in range(rng.randint(1, 4)):
        # No CR or LF bytes: the generator would rewrite them to its line end.
        data = bytes(b for b in os.urandom(rng.randint(1, 2000)) if b not in (10, 13)) or b"x"
        p = MIMEApplication(data, "octet-stream")
        del p["Content-Transfer-Encoding"]
        p.set_payload(data)
        name = rng.choice(["probe", "reference", "image"])
        p.add_header("Content-Disposition", "form-data", name=name, filename="x.jpg")
        m.attach(p)
        want.append((name, True, data))
    t = MIMEText("visitor-17", "plain", "utf-8")
    del t["Content-Transfer-Encoding"]
    t.set_payload(b"visitor-17")
    t.add_header("Content-Disposition", "form-data", name="subject_ref")
    m.attach(t)
    want.append(("subject_ref", False, b"visitor-17"))
    raw = m.as_bytes(policy=email.policy.HTTP)
    head, body = raw.split(b"\r\n\r\n", 1)
    ctype = m["Content-Type"]
    agree += ours(ctype, body) == want
check(agree == 50, f"multipart: {agree}/50 bodies made by Python's email generator parsed exactly")

# 3. Broken bodies are refused, never half-read: every truncation of a valid
#    body that removes the close delimiter (RFC 2046 section 5.1.1 requires it).
boundary = "lkBoundary7"
body = by_hand([("probe", "a.jpg", os.urandom(64)), ("reference", "b.jpg", os.urandom(64))],
               boundary)
ctype = f"multipart/form-data; boundary={boundary}"
close = body.rindex(b"--" + boundary.encode() + b"--")
bad = [n for n in range(0, close + len(boundary) + 4) if not ours(ctype, body[:n]).startswith("error")]
check(not bad, f"multipart: all {close + len(boundary) + 4} truncations before the close "
      f"delimiter's end are refused (accepted: {bad[:5]})")
for ct, what in [("multipart/form-data", "no boundary"),
                 ("multipart/form-data; boundary=" + "x" * 71, "71-character boundary"),
                 ("multipart/form-data; boundary=\"open", "unterminated quote")]:
    check(ours(ct, body).startswith("error"), f"multipart: refused with {what}")
check(ours("multipart/form-data; boundary=other", body).startswith("error"),
      "multipart: a body without its boundary is refused")

# 4. UTF-8 validity equals Python's strict decoder (which follows RFC 3629:
#    no overlong forms, no surrogates, nothing above U+10FFFF).
edge = [b"", b"plain", "Zoë Ångström ✓ 😀".encode(), b"\xc0\xaf", b"\xe0\x80\xaf",
        b"\xed\xa0\x80", b"\xf4\x90\x80\x80", b"\xf8\x88\x80\x80\x80", b"\xc2", b"\xe2\x82",
        b"\xef\xbf\xbf", b"\xf4\x8f\xbf\xbf", b"\x80", b"\xfe\xff"]
samples = edge + [bytes(rng.randrange(256) for _ in range(rng.randint(1, 8))) for _ in range(400)]
samples += ["".join(chr(rng.choice([rng.randint(0x20, 0x7e), rng.randint(0xa0, 0xd7ff),
                                    rng.randint(0xe000, 0x10ffff)])) for _ in range(6)).encode()
            for _ in range(100)]
mism = 0
for s in samples:
    try:
        s.decode("utf-8", "strict")
        want = "1"
    except UnicodeDecodeError:
        want = "0"
    mism += run("utf8", data=s).strip() != want
check(mism == 0, f"UTF-8: {len(samples) - mism}/{len(samples)} byte strings judged as Python's "
      "strict UTF-8 decoder judges them")

# 5. base64: canonical encodings decode to the same bytes as Python's
#    base64.b64decode(validate=True); malformed ones are refused.
mism = 0
for _ in range(200):
    raw = os.urandom(rng.randint(1, 100))
    enc = base64.b64encode(raw)
    mism += run("base64", data=enc).strip() != raw.hex()
check(mism == 0, f"base64: 200 random encodings decode like Python's base64 module ({mism} differ)")
bad = [b"QUJD\n", b"QUJ", b"QU=D", b"QUJD====", b"Q!JD", b"QUJD QUJD", b"", b"QQ"]
refused = [b for b in bad if run("base64", data=b).strip() == "error"]
check(len(refused) == len(bad), f"base64: {len(refused)}/{len(bad)} malformed strings refused "
      "(RFC 4648 section 4: padded, standard alphabet, no whitespace)")

# 6. Request bodies: JSON and multipart give the same request; wrong shapes name the field.
img = base64.b64encode(b"\xff\xd8 not really a jpeg").decode()
tid = "0123456789abcdef0123456789abcdef"
cases = [
    ("verify", "application/json", f'{{"probe":"{img}","reference":"{img}"}}', "probe=20 reference=20"),
    ("verify", "application/json", f'{{"probe":"{img}","template_id":"{tid}","target_fmr":0.001}}',
     f"template={tid} fmr=0.001"),
    ("verify", "application/json", f'{{"probe":"{img}"}}', "error field:reference"),
    ("verify", "application/json", f'{{"probe":"{img}","reference":"{img}","x":1}}', "error field:"),
    ("verify", "application/json", f'{{"probe":"{img}","template_id":"../../etc/passwd"}}',
     "error field:template_id"),
    ("verify", "application/json", f'{{"probe":"{img}","template_id":"1\' OR \'1\'=\'1"}}',
     "error field:template_id"),
    ("verify", "application/json", '{"probe": "QUJ"}', "error field:probe"),
    ("verify", "application/json", '[1,2]', "error field:"),
    ("verify", "application/json", '{"probe": "' + img + '"', "error field:"),
    ("verify", "text/plain", "hello", "error media"),
    ("enrol", "application/json", f'{{"images":["{img}","{img}"],"subject_ref":"v-1","ttl_seconds":60}}',
     "images=2 subject=v-1 ttl=60"),
    ("enrol", "application/json", f'{{"images":[{",".join([chr(34) + img + chr(34)] * 11)}]}}',
     "error field:images"),
    ("enrol", "application/json", '{"images":[], "ttl_seconds": -1}', "error field:ttl_seconds"),
]
for kind, ct, body, want in cases:
    got = run("request", kind, ct, data=body.encode()).strip()
    check(want in got, f"request {kind} {ct} {body[:50]!r}...: got {got!r}, expected {want!r}")
deep = ("[" * 5000 + "]" * 5000).encode()
check(run("request", "verify", "application/json", data=deep).startswith("error"),
      "request: 5000-deep JSON nesting refused without a crash")
check(run("request", "verify", "application/json", data=b'{"probe":"\xff\xfe"}').startswith("error"),
      "request: invalid UTF-8 in JSON refused")
sys.exit(finish())
