"""Helpers shared by the deployment checks (tests/ref/check_deploy_*.py,
tests/ref/check_failover.py) and tests/deploy/bench_replicas.sh: free ports,
a throwaway PostgreSQL, development certificates, likenessd replicas, and
deploy/nginx/likeness.conf rendered with local paths and ports.

Run as a program it renders the nginx configuration:
  python3 lkdeploy.py render-nginx SRC_CONF OUT_DIR LISTEN_PORT TLS_DIR PORT...
and prints the rendered file's path."""
import os
import shutil
import ssl
import subprocess
import sys
import time

sys.path.insert(0, os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "ref"))
from lkref import free_port, write_ini  # noqa: E402,F401
from lkref import make_dev_certs as make_certs  # noqa: E402,F401


def fail(msg):
    """A missing prerequisite that the deployment checks require: they fail
    (exit 1) saying what to install, they never skip."""
    print("FAIL: " + msg, file=sys.stderr)
    sys.exit(1)


def find_nginx():
    p = shutil.which("nginx") or ("/usr/sbin/nginx" if os.access("/usr/sbin/nginx", os.X_OK)
                                  else None)
    if not p:
        fail("nginx is not installed: apt-get install nginx (or run deploy/install-deps.sh)")
    return p


PGBIN = "/usr/lib/postgresql/15/bin"


def need_postgres():
    missing = [t for t in ("initdb", "pg_ctl", "postgres", "psql")
               if not os.access(os.path.join(PGBIN, t), os.X_OK)]
    if missing:
        fail(f"{', '.join(missing)} not found in {PGBIN}: install the PostgreSQL 15 server and "
             "client (apt-get install postgresql-15 postgresql-client-15, or run "
             "deploy/install-deps.sh)")


# ---- nginx ----

def render_nginx(text, out_dir, listen_port, tls_dir, upstream_ports):
    """deploy/nginx/likeness.conf with the lines marked "# rendered" pointed
    at out_dir (pid, logs, temp files), 127.0.0.1:listen_port, the
    development certificates of make-dev-certs.sh in tls_dir (issued for
    localhost) and replicas on 127.0.0.1:upstream_ports. Raises ValueError
    when a marked line is not one it knows, so a changed configuration
    cannot be checked half-rendered."""
    out, seen = [], {}
    for line in text.splitlines():
        if "# rendered" not in line:
            out.append(line)
            continue
        ind = line[:len(line) - len(line.lstrip())]
        body = line.split("#", 1)[0].strip()
        word = body.split()[0]
        seen[word] = seen.get(word, 0) + 1
        if word == "user":
            # Workers of a master started by root switch to this user; when
            # not root, nginx ignores the directive (with a warning), so it
            # goes.
            if os.geteuid() == 0:
                out.append(ind + "user root;")
        elif word == "pid":
            out.append(f"{ind}pid {out_dir}/nginx.pid;")
        elif word == "error_log":
            out.append(f"{ind}error_log {out_dir}/error.log {body.split()[2].rstrip(';')};")
        elif word == "access_log":
            out.append(f"{ind}access_log {out_dir}/access.log {body.split()[2].rstrip(';')};")
        elif word.endswith("_temp_path"):
            out.append(f"{ind}{word} {out_dir}/{word[:-len('_temp_path')]}-temp;")
        elif word == "server":
            if seen[word] == 1:
                params = body.rstrip(";").split()[2:]
                for p in upstream_ports:
                    out.append(f"{ind}server 127.0.0.1:{p} {' '.join(params)};")
        elif word == "listen":
            if "[::]" not in body:
                out.append(f"{ind}listen 127.0.0.1:{listen_port} ssl;")
        elif word == "ssl_certificate":
            out.append(f"{ind}ssl_certificate {tls_dir}/server.crt;")
        elif word == "ssl_certificate_key":
            out.append(f"{ind}ssl_certificate_key {tls_dir}/server.key;")
        elif word == "proxy_ssl_trusted_certificate":
            out.append(f"{ind}proxy_ssl_trusted_certificate {tls_dir}/ca.crt;")
        elif word == "proxy_ssl_name":
            out.append(f"{ind}proxy_ssl_name localhost;")
        else:
            raise ValueError(f"render_nginx does not know the rendered line: {line.strip()}")
    for word in ("pid", "error_log", "access_log", "server", "listen", "ssl_certificate",
                 "ssl_certificate_key", "proxy_ssl_trusted_certificate", "proxy_ssl_name",
                 "client_body_temp_path", "proxy_temp_path"):
        if word not in seen:
            raise ValueError(f"deploy/nginx/likeness.conf has no rendered '{word}' line")
    return "\n".join(out) + "\n"


def write_nginx(src_conf, out_dir, listen_port, tls_dir, upstream_ports):
    with open(src_conf) as f:
        text = render_nginx(f.read(), out_dir, listen_port, tls_dir, upstream_ports)
    path = os.path.join(out_dir, "nginx.conf")
    with open(path, "w") as f:
        f.write(text)
    return path


# ---- PostgreSQL, certificates, replicas ----

def start_postgres(src, base, port):
    """Starts tests/pg/pg-test-server.sh in base/pg; returns its URL. base
    must let the postgres OS user through (mode 0711) when run as root."""
    need_postgres()
    script = os.path.join(src, "tests", "pg", "pg-test-server.sh")
    if not os.path.exists(script):
        fail(f"{script} is missing")
    os.chmod(base, 0o711)
    out = subprocess.run(["bash", script, "start", os.path.join(base, "pg"), str(port)],
                         capture_output=True, text=True)
    if out.returncode != 0:
        fail("pg-test-server.sh start failed: " + out.stderr.strip())
    return out.stdout.strip().splitlines()[-1]


def stop_postgres(src, base):
    subprocess.run(["bash", os.path.join(src, "tests", "pg", "pg-test-server.sh"), "stop",
                    os.path.join(base, "pg")], capture_output=True)


def write_replica_config(path, port, tls_dir, model, store_url, key_file, workers=1,
                         checkpoint_interval=100, drain_timeout_s=5):
    write_ini(path, [("server", {"listen": "127.0.0.1", "port": port,
                                 "cert_file": f"{tls_dir}/server.crt",
                                 "key_file": f"{tls_dir}/server.key", "workers": workers,
                                 "queue_depth": 64, "drain_timeout_s": drain_timeout_s,
                                 "per_ip_connection_limit": 64}),
                     ("model", {"file": model}), ("store", {"url": store_url}),
                     ("keys", {"file": key_file}),
                     ("limits", {"rate_per_second": 100000, "burst": 100000}),
                     ("audit", {"checkpoint_interval": checkpoint_interval})])


def tls_context(ca_file):
    ctx = ssl.create_default_context(cafile=ca_file)
    ctx.check_hostname = False  # certificates are for localhost; we connect to 127.0.0.1
    return ctx


def https_status(port, path, ctx, timeout=2.0):
    """GET https://127.0.0.1:port/path; the status, or None when no answer."""
    import http.client
    try:
        c = http.client.HTTPSConnection("127.0.0.1", port, context=ctx, timeout=timeout)
        c.request("GET", path)
        st = c.getresponse().status
        c.close()
        return st
    except (OSError, http.client.HTTPException):
        return None


def wait_ready(port, ctx, proc=None, seconds=60, path="/readyz"):
    t0 = time.time()
    while time.time() - t0 < seconds:
        if proc is not None and proc.poll() is not None:
            return False
        if https_status(port, path, ctx) == 200:
            return True
        time.sleep(0.2)
    return False


def multipart(fields, boundary="lkdeploy0b7c3e"):
    """A multipart/form-data body (RFC 7578) of (name, filename or None,
    bytes) fields; returns (content_type, body)."""
    parts = []
    for name, filename, data in fields:
        disp = f'form-data; name="{name}"' + (f'; filename="{filename}"' if filename else "")
        head = f"--{boundary}\r\nContent-Disposition: {disp}\r\n"
        if filename:
            head += "Content-Type: image/jpeg\r\n"
        parts.append(head.encode() + b"\r\n" + data + b"\r\n")
    return (f"multipart/form-data; boundary={boundary}",
            b"".join(parts) + f"--{boundary}--\r\n".encode())


if __name__ == "__main__":
    if len(sys.argv) >= 7 and sys.argv[1] == "render-nginx":
        print(write_nginx(sys.argv[2], sys.argv[3], int(sys.argv[4]), sys.argv[5],
                          [int(p) for p in sys.argv[6:]]))
    else:
        print(__doc__, file=sys.stderr)
        sys.exit(2)
