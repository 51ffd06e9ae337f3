"""api-spec/openapi.yaml: Redocly's linter (recommended rules, tests/api/redocly.yaml)
accepts it, and tests/api/validate.mjs (Ajv, JSON Schema 2020-12) compiles every
schema and tells valid bodies from invalid ones. Needs node and npm; the
packages are installed from tests/api/package-lock.json when absent."""
import json
import re
import os
import shutil
import subprocess
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from lkref import check, finish  # noqa: E402

SRC = os.environ.get("LIKENESS_SOURCE",
                     os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))))
API_DIR = os.path.join(SRC, "tests", "api")
SPEC = os.path.join(SRC, "api-spec", "openapi.yaml")
ENV = dict(os.environ, REDOCLY_TELEMETRY="off", REDOCLY_SUPPRESS_UPDATE_NOTICE="true")


def run(args, **kw):
    return subprocess.run(args, capture_output=True, text=True, cwd=API_DIR, env=ENV, timeout=600, **kw)


def main():
    # node is part of this check, not optional: fail loudly without it.
    if shutil.which("node") is None or shutil.which("npm") is None:
        check(False, "node and npm are installed (Debian packages nodejs, npm)")
        return finish()
    if not os.path.isdir(os.path.join(API_DIR, "node_modules", "@redocly", "cli")):
        r = run(["npm", "ci", "--no-audit", "--no-fund"])
        check(r.returncode == 0, f"npm ci in tests/api ({r.stderr.strip()[-300:]})")
        if r.returncode != 0:
            return finish()
    r = run(["npx", "--no-install", "redocly", "lint", "--config", "redocly.yaml", SPEC])
    out = r.stdout + r.stderr
    check(r.returncode == 0 and "valid" in out,
          "redocly lint accepts api-spec/openapi.yaml" + ("" if r.returncode == 0 else "\n" + out[-3000:]))
    # Redocly ends with "You have N warnings." when there are any.
    check(re.search(r"You have \d+ warnings?", out) is None,
          "and warns about nothing beyond the listed exceptions")

    names = run(["node", "validate.mjs", "--list"]).stdout.split()
    check(len(names) > 40 and "Verification" in names and "ImageProblem" in names,
          f"validate.mjs compiles the {len(names)} schemas")
    problem = {"type": "/problems/rate-limited", "title": "Too many requests", "status": 429,
               "detail": "Wait 2 s.", "instance": "/v1/verifications", "request_id": "a-1",
               "retry_after": 2}
    cases = [  # (schema, body, valid?) — what each schema must accept and refuse
        ("Health", {"status": "ok"}, True),
        ("Health", {"status": "ok", "extra": 1}, False),
        ("RateLimitedProblem", problem, True),
        ("RateLimitedProblem", dict(problem, retry_after=0), False),
        ("RateLimitedProblem", dict(problem, type="/problems/forbidden"), False),
        ("RateLimitedProblem", dict(problem, status=400), False),
        ("RateLimitedProblem", dict(problem, secret="x"), False),
        ("Problem", dict(problem, type="/problems/no-such-type"), False),
        # A decoding problem names the image and has no other extension.
        ("ImageProblem", dict(problem, type="/problems/corrupt-image", status=422, image="image[3]"),
         False),
        ("ImageProblem", {k: v for k, v in dict(problem, type="/problems/corrupt-image", status=422,
                                                 image="image[3]").items() if k != "retry_after"}, True),
        ("ImageProblem", {k: v for k, v in dict(problem, type="/problems/corrupt-image", status=422,
                                                 image="picture").items() if k != "retry_after"}, False),
        ("TemplateId", "0123456789abcdef0123456789abcdef", True),
        ("TemplateId", "../etc/passwd", False),
        ("Timestamp", "2026-12-02T10:00:00.123Z", True),
        ("Timestamp", "2026-12-02T10:00:00Z", False),
        ("VerificationRequestJson", {"probe": "YWJjZA==", "template_id": "0" * 32}, True),
        ("VerificationRequestJson", {"probe": "YWJjZA", "template_id": "0" * 32}, False),
        ("VerificationRequestJson", {"probe": "YWJjZA==", "reference": "YWJj", "template_id": "0" * 32},
         False),
        ("AuditPage", {"records": [], "head": 0, "next_after": 0}, True),
    ]
    lines = "\n".join(json.dumps({"schema": s, "body": b, "label": i}) for i, (s, b, _) in enumerate(cases))
    r = run(["node", "validate.mjs"], input=lines + "\n")
    res = [json.loads(x) for x in r.stdout.splitlines() if x.strip()]
    check(len(res) == len(cases), f"validate.mjs answers once per line ({len(res)}/{len(cases)})")
    for x in res:
        s, b, want = cases[x["label"]]
        check(x["valid"] == want, f"{s} {'accepts' if want else 'refuses'} {json.dumps(b)[:90]}")
    check(r.returncode == 1, "validate.mjs exits 1 when any body is invalid")
    r = run(["node", "validate.mjs"], input=json.dumps({"schema": "Health", "body": {"status": "ok"}}) + "\n")
    check(r.returncode == 0, "and 0 when all are valid")
    return finish()


if __name__ == "__main__":
    sys.exit(main())
