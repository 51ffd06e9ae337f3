"""deploy/systemd/likenessd.service: the hardening settings are there with
the values the deployment needs, TimeoutStopSec is above the drain timeout
of deploy/likenessd.ini.example, and systemd's own checker accepts it:
`systemd-analyze verify` on a copy whose ExecStart names the built likenessd
(verify needs the binary to exist), and `systemd-analyze security
--offline=yes` (systemd 252 and later) prints its exposure score, which must
be in the band systemd calls "OK" (below 2.0). The reference is systemd
itself (systemd.exec(5), systemd-analyze(1)). systemd-analyze is required:
without it this check fails, saying what to install."""
import configparser
import os
import re
import shutil
import subprocess
import sys
import tempfile

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
from lkref import check, finish, skip  # noqa: E402

SRC = os.environ.get("LIKENESS_SOURCE", os.path.join(HERE, "..", ".."))
BIN = os.environ.get("LIKENESS_BIN", "build/bin")
UNIT = os.path.join(SRC, "deploy", "systemd", "likenessd.service")
SA = shutil.which("systemd-analyze") or "/usr/bin/systemd-analyze"
if not os.access(SA, os.X_OK):
    print("FAIL: systemd-analyze is missing: apt-get install systemd (or run "
          "deploy/install-deps.sh)", file=sys.stderr)
    sys.exit(1)
DAEMON = os.path.abspath(os.path.join(BIN, "likenessd"))
if not os.path.exists(DAEMON):
    skip(f"{DAEMON} is not built")

text = open(UNIT).read()
# A unit file repeats keys (SystemCallFilter=...), so it is read by hand:
# section -> key -> list of values, comments and blank lines skipped
# (systemd.syntax(7)).
unit, sec = {}, None
for ln in text.splitlines():
    s = ln.strip()
    if not s or s[0] in "#;":
        continue
    if s.startswith("["):
        sec = s.strip("[]")
        continue
    k, _, v = s.partition("=")
    unit.setdefault(sec, {}).setdefault(k.strip(), []).append(v.strip())
svc = unit.get("Service", {})


def one(key):
    v = svc.get(key, [])
    return v[-1] if v else None


want = {
    "NoNewPrivileges": "yes", "ProtectSystem": "strict", "ProtectHome": "yes",
    "PrivateTmp": "yes", "PrivateDevices": "yes", "ReadWritePaths": "/var/lib/likeness",
    "CapabilityBoundingSet": "", "MemoryDenyWriteExecute": "yes",
    "RestrictAddressFamilies": "AF_INET AF_INET6 AF_UNIX", "LockPersonality": "yes",
    "RestrictNamespaces": "yes", "ProtectKernelTunables": "yes",
    "ProtectKernelModules": "yes", "ProtectKernelLogs": "yes",
    "ProtectControlGroups": "yes", "UMask": "0077", "User": "likeness",
    "ExecStart": "/usr/bin/likenessd --config /etc/likeness/likenessd.ini",
    "KillSignal": "SIGTERM", "Restart": "on-failure",
}
for k, v in want.items():
    check(one(k) == v, f"{k}={v} ({one(k)!r})")
check("@system-service" in svc.get("SystemCallFilter", []),
      f"SystemCallFilter=@system-service ({svc.get('SystemCallFilter')})")
# A reload that sent SIGTERM would drain the service and leave it stopped
# (exit 0 is not restarted by Restart=on-failure): no ExecReload at all.
check(one("ExecReload") is None, f"no ExecReload that would stop the service ({one('ExecReload')})")
ini = configparser.ConfigParser()
ini.read(os.path.join(SRC, "deploy", "likenessd.ini.example"))
drain = ini.getint("server", "drain_timeout_s")
m = re.fullmatch(r"(\d+)s?", one("TimeoutStopSec") or "")
check(m is not None and int(m.group(1)) > drain,
      f"TimeoutStopSec ({one('TimeoutStopSec')}) is above drain_timeout_s ({drain})")

d = tempfile.mkdtemp(prefix="lk-systemd-")
try:
    path = os.path.join(d, "likenessd.service")
    with open(path, "w") as f:
        f.write(text.replace("/usr/bin/likenessd", DAEMON))
    v = subprocess.run([SA, "verify", path], capture_output=True, text=True)
    print((v.stdout + v.stderr).strip())
    complaints = [ln for ln in (v.stdout + v.stderr).splitlines() if "likenessd.service" in ln]
    check(v.returncode == 0 and not complaints,
          f"systemd-analyze verify accepts the unit (exit {v.returncode}, {len(complaints)} "
          "complaints about it)")
    # The check can fail: the same unit naming a binary that is not there.
    bad = os.path.join(d, "bad", "likenessd.service")
    os.makedirs(os.path.dirname(bad))
    with open(bad, "w") as f:
        f.write(text.replace("/usr/bin/likenessd", os.path.join(d, "absent", "likenessd")))
    v = subprocess.run([SA, "verify", bad], capture_output=True, text=True)
    check(v.returncode != 0, "systemd-analyze verify refuses it when ExecStart's binary is absent")

    s = subprocess.run([SA, "security", "--offline=yes", path], capture_output=True, text=True)
    if "--offline" in s.stderr and s.returncode != 0:
        print("systemd-analyze security --offline is not supported by this systemd: "
              + s.stderr.strip())
    else:
        m = re.search(r"Overall exposure level for \S+: ([0-9.]+) (\S+)", s.stdout)
        print(m.group(0) if m else s.stdout[-500:] + s.stderr)
        check(m is not None and float(m.group(1)) < 2.0,
              f"systemd-analyze security: exposure {m.group(1) if m else '?'} is below 2.0")
finally:
    shutil.rmtree(d, ignore_errors=True)
sys.exit(finish())
