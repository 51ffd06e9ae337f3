"""The TLS face of likenessd as testssl.sh (Debian's package testssl.sh, an
outside scanner) sees it, through tests/harden/tls_scan.sh: no SSLv2, SSLv3,
TLS 1.0 or TLS 1.1; TLS 1.2 and TLS 1.3 offered; no NULL, anonymous, export,
LOW, RC4, 3DES/IDEA or "average" (CBC) cipher categories, not vulnerable to
SWEET32 or LUCKY13 (the CBC attacks); forward secrecy offered. The other
findings of severity LOW and above are printed for the record. The service
scanned is $LIKENESS_BIN's (the sanitized build under CTest); its stderr must
hold no sanitizer report.
Without testssl.sh this check fails: the hardening suite needs it
(apt-get install testssl.sh)."""
import json
import os
import re
import shutil
import subprocess
import sys
import tempfile

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
from lkref import check, finish, skip  # noqa: E402

SRC = os.environ.get("LIKENESS_SOURCE", os.path.dirname(os.path.dirname(HERE)))
BIN = os.environ.get("LIKENESS_BIN", os.path.join(SRC, "build", "bin"))
if not os.path.exists(os.path.join(BIN, "likenessd")):
    skip(f"{BIN}/likenessd is missing")
if not (shutil.which("testssl") or shutil.which("testssl.sh")):
    print("FAIL: testssl.sh is not installed: apt-get install testssl.sh")
    sys.exit(1)

out = os.path.join(tempfile.mkdtemp(prefix="lk-tls-"), "scan.json")
env = dict(os.environ, BIN=BIN, ASAN_OPTIONS="detect_leaks=1:abort_on_error=1",
           UBSAN_OPTIONS="halt_on_error=1:print_stacktrace=1")
r = subprocess.run(["bash", os.path.join(SRC, "tests", "harden", "tls_scan.sh"), out],
                   capture_output=True, text=True, env=env, timeout=600)
print(r.stdout.strip())
check(r.returncode == 0, f"tls_scan.sh ran (exit {r.returncode}) {r.stderr.strip()[-500:]}")
findings = {}
if os.path.exists(out):
    with open(out) as f:
        for item in json.load(f):
            findings[item["id"]] = item


def finding(fid):
    return findings.get(fid, {}).get("finding", "(absent)")


for fid in ("SSLv2", "SSLv3", "TLS1", "TLS1_1"):
    check(finding(fid) == "not offered", f"{fid}: {finding(fid)}")
check(finding("TLS1_2") == "offered", f"TLS1_2: {finding('TLS1_2')}")
check(finding("TLS1_3").startswith("offered"), f"TLS1_3: {finding('TLS1_3')}")
for fid in ("cipherlist_NULL", "cipherlist_aNULL", "cipherlist_EXPORT", "cipherlist_LOW",
            "cipherlist_3DES_IDEA", "cipherlist_AVERAGE"):
    check(finding(fid) == "not offered", f"{fid}: {finding(fid)}")
for fid in ("RC4", "SWEET32", "LUCKY13"):
    sev = findings.get(fid, {}).get("severity")
    check(sev == "OK", f"{fid}: {sev} {finding(fid)}")
check(findings.get("PFS", {}).get("severity") == "OK" and finding("PFS") == "offered",
      f"forward secrecy: {finding('PFS')} ({finding('PFS_ciphers')})")
pfs = finding("PFS_ciphers").split()
check(bool(pfs) and all(c.startswith(("TLS_", "ECDHE-")) for c in pfs),
      f"every cipher offered has an ephemeral key exchange: {pfs}")

order = {"LOW": 1, "MEDIUM": 2, "HIGH": 3, "CRITICAL": 4, "WARN": 0}
rest = [f for f in findings.values() if f.get("severity") in order]
print("--- other findings of severity LOW and above (and scanner warnings):")
for f in sorted(rest, key=lambda f: -order[f["severity"]]):
    print(f"  {f['severity']:8} {f['id']}: {f['finding']}")

log = out + ".likenessd.log"
text = open(log, errors="replace").read() if os.path.exists(log) else ""
m = re.search(r"ERROR: (Address|Leak)Sanitizer|runtime error:", text)
check(bool(text) and not m, "no sanitizer report in the scanned service's stderr"
      + (":\n" + text[m.start() - 200:m.start() + 3000] if m else ""))
sys.exit(finish())
