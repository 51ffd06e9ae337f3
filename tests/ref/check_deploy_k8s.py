"""deploy/k8s/*.yaml, read with PyYAML (Debian's python3-yaml; there is no
kubectl or cluster here, so the manifests are checked field by field, not
applied): a Deployment of 2 replicas with HTTPS readiness (/readyz) and
liveness (/healthz) probes, resources, a non-root read-only container with
every capability dropped and a grace period above the drain timeout; a
Service reaching the container's port; a Secret of placeholders only; a
ConfigMap whose INI names only keys of deploy/likenessd.ini.example and a
postgres:// store. Field names follow the Kubernetes API reference (apps/v1
Deployment, core/v1 Service, Secret, ConfigMap)."""
import configparser
import glob
import os
import sys

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
from lkref import check, finish, skip  # noqa: E402

try:
    import yaml
except ImportError:
    skip("PyYAML (Debian package python3-yaml) is not installed")

SRC = os.environ.get("LIKENESS_SOURCE", os.path.join(HERE, "..", ".."))
docs = []
for f in sorted(glob.glob(os.path.join(SRC, "deploy", "k8s", "*.yaml"))):
    try:
        docs += [(os.path.basename(f), d) for d in yaml.safe_load_all(open(f)) if d]
        check(True, f"{os.path.basename(f)} is YAML")
    except yaml.YAMLError as e:
        check(False, f"{os.path.basename(f)} is YAML: {e}")
by_kind = {}
for name, d in docs:
    check(isinstance(d, dict) and d.get("apiVersion") and d.get("kind") and
          (d.get("metadata") or {}).get("name"),
          f"{name}: apiVersion, kind and metadata.name are set")
    by_kind.setdefault(d.get("kind"), []).append(d)
for k in ("Deployment", "Service", "Secret", "ConfigMap"):
    check(len(by_kind.get(k, [])) == 1, f"one {k}")
if any(len(by_kind.get(k, [])) != 1 for k in ("Deployment", "Service", "Secret", "ConfigMap")):
    sys.exit(finish())
dep, svc, sec, cm = (by_kind[k][0] for k in ("Deployment", "Service", "Secret", "ConfigMap"))

# ---- ConfigMap: the INI ----
ini_text = next(iter(cm.get("data", {}).values()), "")
ini = configparser.ConfigParser()
ini.read_string(ini_text)
example = configparser.ConfigParser()
example.read(os.path.join(SRC, "deploy", "likenessd.ini.example"))
unknown = [f"{s}.{k}" for s in ini.sections() for k in ini[s]
           if not s.startswith("client:") and not (example.has_section(s) and
                                                   k in example[s])]
# Keys commented out in the example ('#file = ...' under [model]) are keys too.
commented = {ln.lstrip("#").split("=")[0].strip() for ln in
             open(os.path.join(SRC, "deploy", "likenessd.ini.example"))
             if ln.startswith("#") and "=" in ln}
unknown = [u for u in unknown if u.split(".", 1)[1] not in commented]
check(not unknown, f"the ConfigMap's INI names only documented keys ({unknown})")
url = ini.get("store", "url", fallback="")
check(url.startswith("postgres://"), f"[store] url is a PostgreSQL URL ({url})")
drain = ini.getint("server", "drain_timeout_s", fallback=example.getint("server",
                                                                        "drain_timeout_s"))

# ---- Deployment ----
spec = dep.get("spec", {})
pod = spec.get("template", {}).get("spec", {})
check(spec.get("replicas") == 2, f"2 replicas ({spec.get('replicas')})")
sel = spec.get("selector", {}).get("matchLabels", {})
labels = spec.get("template", {}).get("metadata", {}).get("labels", {})
check(sel and all(labels.get(k) == v for k, v in sel.items()),
      "the selector matches the pod template's labels")
grace = pod.get("terminationGracePeriodSeconds", 30)
pre = 0
ctrs = pod.get("containers", [])
check(len(ctrs) == 1, f"one container ({len(ctrs)})")
c = ctrs[0] if ctrs else {}
cmd = (((c.get("lifecycle") or {}).get("preStop") or {}).get("exec") or {}).get("command", [])
if len(cmd) == 2 and cmd[0].endswith("sleep"):
    pre = int(cmd[1])
check(grace > drain + pre, f"terminationGracePeriodSeconds {grace} > preStop {pre} + "
      f"drain_timeout_s {drain}")
ports = {p.get("name"): p.get("containerPort") for p in c.get("ports", [])}
check(ini.getint("server", "port", fallback=0) in ports.values(),
      f"the container port is the INI's port ({ports})")
for probe, path in (("readinessProbe", "/readyz"), ("livenessProbe", "/healthz")):
    g = (c.get(probe) or {}).get("httpGet") or {}
    port = g.get("port")
    check(g.get("path") == path and g.get("scheme") == "HTTPS" and
          (port in ports or port in ports.values()),
          f"{probe}: GET {path} over HTTPS on the service's port ({g})")
res = c.get("resources", {})
check(all(res.get(a, {}).get(b) for a in ("requests", "limits") for b in ("cpu", "memory")),
      f"cpu and memory requests and limits ({res})")
psc, csc = pod.get("securityContext", {}), c.get("securityContext", {})
check(psc.get("runAsNonRoot") is True or csc.get("runAsNonRoot") is True, "runAsNonRoot")
check(psc.get("runAsUser", csc.get("runAsUser", 0)) != 0, "a non-zero runAsUser")
every = [c] + pod.get("initContainers", [])
for x in every:
    xs = x.get("securityContext", {})
    check(xs.get("readOnlyRootFilesystem") is True and
          xs.get("allowPrivilegeEscalation") is False and
          (xs.get("capabilities") or {}).get("drop") == ["ALL"],
          f"{x.get('name')}: readOnlyRootFilesystem, no privilege escalation, drop ALL")
vols = {v["name"]: v for v in pod.get("volumes", [])}
for x in every:
    for m in x.get("volumeMounts", []):
        check(m.get("name") in vols, f"{x.get('name')}: volume {m.get('name')} exists")
cm_refs = [v["configMap"]["name"] for v in vols.values() if "configMap" in v]
sec_refs = [v["secret"]["secretName"] for v in vols.values() if "secret" in v]
check(cm_refs == [cm["metadata"]["name"]], f"the ConfigMap is mounted ({cm_refs})")
check(sec_refs and set(sec_refs) == {sec["metadata"]["name"]}, f"the Secret is mounted "
      f"({sec_refs})")
sec_keys = set((sec.get("stringData") or {}).keys()) | set((sec.get("data") or {}).keys())
items = [i["key"] for v in vols.values() if "secret" in v for i in v["secret"].get("items", [])]
check(set(items) <= sec_keys, f"every Secret item mounted exists in the Secret ({items})")
mounted = {m["mountPath"].rstrip("/") for x in every for m in x.get("volumeMounts", [])}
for key in (("server", "cert_file"), ("server", "key_file"), ("keys", "file")):
    p = ini.get(*key, fallback="")
    check(os.path.dirname(p) in mounted, f"[{key[0]}] {key[1]} = {p} lies in a mounted volume")

# ---- Secret: placeholders only ----
vals = list((sec.get("stringData") or {}).values()) + list((sec.get("data") or {}).values())
check(vals and all("PLACEHOLDER" in str(v) for v in vals) and
      not any("BEGIN" in str(v) for v in vals),
      "the Secret holds placeholders only (no PEM, no key material)")
check({"keys", "tls.crt", "tls.key"} <= sec_keys, f"the Secret has keys, tls.crt, tls.key "
      f"({sorted(sec_keys)})")

# ---- Service ----
ss = svc.get("spec", {})
check(ss.get("selector") and all(labels.get(k) == v for k, v in ss["selector"].items()),
      "the Service selects the Deployment's pods")
tp = [p.get("targetPort") for p in ss.get("ports", [])]
check(tp and all(t in ports or t in ports.values() for t in tp),
      f"the Service's targetPort is the container's port ({tp})")
sys.exit(finish())
