"""certs-example/make-dev-certs.sh: the development CA, server and client
certificates it makes are accepted by OpenSSL (the `openssl verify` command,
and a real TLS handshake through Python's ssl module, which is OpenSSL),
with the subjectAltNames, validity, key modes and subject the script
documents; it is idempotent and --force replaces the set."""
import datetime
import os
import socket
import ssl
import stat
import subprocess
import sys
import tempfile
import threading

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from lkref import check, finish, skip  # noqa: E402

SRC = os.environ.get("LIKENESS_SOURCE",
                     os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))))
SCRIPT = os.path.join(SRC, "certs-example", "make-dev-certs.sh")
FILES = ["ca.crt", "ca.key", "server.crt", "server.key", "client.crt", "client.key"]


def run(*args, **kw):
    return subprocess.run(list(args), capture_output=True, text=True, **kw)


def x509(path, *opts):
    r = run("openssl", "x509", "-in", path, "-noout", *opts)
    return r.stdout if r.returncode == 0 else ""


def not_after(path):
    # `openssl x509 -enddate` prints e.g. "notAfter=Mar  6 07:36:17 2029 GMT".
    s = x509(path, "-enddate").strip().split("=", 1)[1]
    return datetime.datetime.strptime(s, "%b %d %H:%M:%S %Y %Z")


def not_before(path):
    s = x509(path, "-startdate").strip().split("=", 1)[1]
    return datetime.datetime.strptime(s, "%b %d %H:%M:%S %Y %Z")


def handshake(d, server_hostname, connect_host, family):
    """A TLS 1.2+ handshake between Python ssl contexts loaded with the made
    files: the server requires a client certificate from the CA; the client
    checks the server's name. Returns (ok, client subject seen, error)."""
    sctx = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)
    sctx.minimum_version = ssl.TLSVersion.TLSv1_2
    sctx.load_cert_chain(os.path.join(d, "server.crt"), os.path.join(d, "server.key"))
    sctx.load_verify_locations(os.path.join(d, "ca.crt"))
    sctx.verify_mode = ssl.CERT_REQUIRED
    cctx = ssl.create_default_context(cafile=os.path.join(d, "ca.crt"))
    cctx.minimum_version = ssl.TLSVersion.TLSv1_2
    cctx.load_cert_chain(os.path.join(d, "client.crt"), os.path.join(d, "client.key"))
    lsock = socket.socket(family, socket.SOCK_STREAM)
    lsock.bind((connect_host, 0))
    lsock.listen(1)
    port = lsock.getsockname()[1]
    seen = {}

    def serve():
        try:
            conn, _ = lsock.accept()
            with sctx.wrap_socket(conn, server_side=True) as t:
                seen["subject"] = t.getpeercert().get("subject")
                t.sendall(b"x")
        except (ssl.SSLError, OSError) as e:
            seen["error"] = str(e)

    th = threading.Thread(target=serve)
    th.start()
    err = None
    try:
        with socket.create_connection((connect_host, port), timeout=10) as raw:
            with cctx.wrap_socket(raw, server_hostname=server_hostname) as t:
                t.recv(1)
    except (ssl.SSLError, OSError) as e:
        err = str(e)
    th.join(10)
    lsock.close()
    return err is None and "error" not in seen, seen.get("subject"), err or seen.get("error")


def main():
    if not os.path.exists(SCRIPT):
        skip(f"{SCRIPT} is missing")
    if run("sh", "-c", "command -v openssl").returncode != 0:
        skip("the openssl command is missing (Debian package openssl)")
    with tempfile.TemporaryDirectory() as tmp:
        d = os.path.join(tmp, "certs")
        r = run("sh", SCRIPT, d)
        check(r.returncode == 0, f"make-dev-certs.sh DIR exits 0 ({r.stderr.strip()[:200]})")
        for f in FILES:
            check(os.path.isfile(os.path.join(d, f)), f"{f} made")
        if r.returncode != 0:
            return finish()
        check("made" in r.stdout and "ca.crt" in r.stdout and "server.crt" in r.stdout
              and "client.crt" in r.stdout, "it prints what it made")
        for f in ("ca.key", "server.key", "client.key"):
            mode = stat.S_IMODE(os.stat(os.path.join(d, f)).st_mode)
            check(mode == 0o600, f"{f} has mode 0600 (got {mode:o})")

        # openssl verify: both leaves chain to the CA, each for its purpose.
        v = run("openssl", "verify", "-CAfile", os.path.join(d, "ca.crt"),
                os.path.join(d, "server.crt"), os.path.join(d, "client.crt"))
        check(v.returncode == 0 and v.stdout.count(": OK") == 2,
              f"openssl verify -CAfile accepts both leaves ({v.stdout.strip()} {v.stderr.strip()})")
        v = run("openssl", "verify", "-CAfile", os.path.join(d, "ca.crt"), "-purpose", "sslserver",
                os.path.join(d, "server.crt"))
        check(v.returncode == 0, "server.crt is valid for the sslserver purpose")
        v = run("openssl", "verify", "-CAfile", os.path.join(d, "ca.crt"), "-purpose", "sslclient",
                os.path.join(d, "client.crt"))
        check(v.returncode == 0, "client.crt is valid for the sslclient purpose")
        v = run("openssl", "verify", "-CAfile", os.path.join(d, "ca.crt"), "-purpose", "sslserver",
                os.path.join(d, "client.crt"))
        check(v.returncode != 0, "client.crt is refused for the sslserver purpose (EKU clientAuth only)")

        # SANs as OpenSSL prints them (an IPv6 address is printed in full).
        san = x509(os.path.join(d, "server.crt"), "-ext", "subjectAltName")
        names = sorted(x.strip() for x in san.splitlines()[1].split(",")) if "\n" in san else []
        check(names == sorted(["DNS:localhost", "IP Address:127.0.0.1",
                               "IP Address:0:0:0:0:0:0:0:1"]),
              f"server subjectAltName is DNS:localhost, IP:127.0.0.1, IP:::1 (got {names})")
        bc = x509(os.path.join(d, "ca.crt"), "-ext", "basicConstraints")
        check("CA:TRUE" in bc, "ca.crt has basicConstraints CA:TRUE")
        bc = x509(os.path.join(d, "server.crt"), "-ext", "basicConstraints")
        check("CA:FALSE" in bc, "server.crt has basicConstraints CA:FALSE")

        # Validity: CA ten years, leaves at most 825 days (CA/Browser Forum
        # Baseline Requirements, ballot 193).
        for f, lo, hi in (("ca.crt", 3649, 3651), ("server.crt", 1, 825), ("client.crt", 1, 825)):
            p = os.path.join(d, f)
            days = (not_after(p) - not_before(p)).total_seconds() / 86400
            check(lo <= days <= hi, f"{f} is valid {days:.1f} days (expected {lo}..{hi})")
        pk = x509(os.path.join(d, "server.crt"), "-text")
        check("prime256v1" in pk or "P-256" in pk or "RSA Public-Key: (3072 bit)" in pk
              or "Public-Key: (3072 bit)" in pk, "server key is EC P-256 or RSA 3072")
        subj = x509(os.path.join(d, "client.crt"), "-subject", "-nameopt", "RFC2253").strip()
        check(subj == "subject=CN=visitor-desk-1,O=Example Visitor Desk",
              f"client subject in RFC 4514 form is CN=visitor-desk-1,O=Example Visitor Desk ({subj})")
        check("CN=visitor-desk-1,O=Example Visitor Desk" in r.stdout,
              "the script prints the client subject for the configuration")

        # A real handshake through OpenSSL (Python's ssl): name checks for
        # localhost and both IP addresses, client certificate required.
        ok, subject, err = handshake(d, "localhost", "127.0.0.1", socket.AF_INET)
        check(ok, f"TLS handshake with hostname check 'localhost' and a client certificate ({err})")
        cn = dict(x[0] for x in subject or ()).get("commonName")
        check(cn == "visitor-desk-1", f"the server sees the client certificate's CN ({cn})")
        ok, _, err = handshake(d, "127.0.0.1", "127.0.0.1", socket.AF_INET)
        check(ok, f"TLS handshake with IP address check 127.0.0.1 ({err})")
        if socket.has_ipv6:
            try:
                ok, _, err = handshake(d, "::1", "::1", socket.AF_INET6)
                check(ok, f"TLS handshake with IP address check ::1 ({err})")
            except OSError as e:
                print(f"note: no IPv6 loopback here ({e}); the ::1 SAN is checked above only")
        ok, _, err = handshake(d, "visitor-desk.example", "127.0.0.1", socket.AF_INET)
        check(not ok, "a name not in the certificate is refused by the client's hostname check")

        # Idempotent: a second run changes nothing.
        before = {f: open(os.path.join(d, f), "rb").read() for f in FILES}
        r2 = run("sh", SCRIPT, d)
        after = {f: open(os.path.join(d, f), "rb").read() for f in FILES}
        check(r2.returncode == 0 and before == after, "a second run leaves every file unchanged")
        check("nothing to do" in r2.stdout, "and says there was nothing to do")
        # A missing leaf is made again under the existing CA.
        os.unlink(os.path.join(d, "client.crt"))
        r3 = run("sh", SCRIPT, d)
        check(r3.returncode == 0 and os.path.exists(os.path.join(d, "client.crt"))
              and open(os.path.join(d, "ca.crt"), "rb").read() == before["ca.crt"]
              and open(os.path.join(d, "server.crt"), "rb").read() == before["server.crt"],
              "a missing client certificate is made again; CA and server certificate kept")
        # --force: everything anew, still valid.
        r4 = run("sh", SCRIPT, "--force", d)
        new = {f: open(os.path.join(d, f), "rb").read() for f in FILES}
        check(r4.returncode == 0 and all(new[f] != before[f] for f in FILES),
              "--force replaces every file")
        v = run("openssl", "verify", "-CAfile", os.path.join(d, "ca.crt"),
                os.path.join(d, "server.crt"), os.path.join(d, "client.crt"))
        check(v.returncode == 0, "the forced set verifies")
        # The old server certificate does not chain to the new CA.
        old = os.path.join(tmp, "old-server.crt")
        with open(old, "wb") as f:
            f.write(before["server.crt"])
        v = run("openssl", "verify", "-CAfile", os.path.join(d, "ca.crt"), old)
        check(v.returncode != 0, "openssl verify refuses a server certificate of another CA")
        # Without its CA, existing leaves are not silently re-issued.
        os.unlink(os.path.join(d, "ca.key"))
        r5 = run("sh", SCRIPT, d)
        check(r5.returncode != 0 and "--force" in r5.stderr,
              "leaves without their CA key: refused, and the message names --force")
        r6 = run("sh", SCRIPT)
        check(r6.returncode == 2 and "usage" in r6.stderr, "no DIR: usage error (exit 2)")
    return finish()


if __name__ == "__main__":
    sys.exit(main())
