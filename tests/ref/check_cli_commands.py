"""The likeness command: help on every command, JSON output, overlays and
errors that say what to do.

Outside references: Pillow (Debian python3-pil) opens the overlay PNG; the
LFW View 1 test pairs (pairsDevTest.txt, Huang et al. 2007) supply pairs of
one identity and of two identities; the decision must match the protocol's
label on a clear majority of a small sample (a weak, loud check that the
default model is wired in the right way round; accuracy itself is measured by
the learn checks and the README's LFW figure)."""
import json
import os
import subprocess
import sys
import tempfile

BIN = os.environ.get("LIKENESS_BIN", "build/bin")
SHARED = os.environ.get("LIKENESS_SHARED", "../shared")
SOURCE = os.environ.get("LIKENESS_SOURCE", ".")
LFW = os.path.join(SHARED, "datasets", "lfw")
EXE = os.path.join(BIN, "likeness")
failures = 0


def check(cond, msg):
    global failures
    if not cond:
        failures += 1
        print("FAIL:", msg)
    else:
        print("ok:", msg)


def run(*args):
    p = subprocess.run([EXE, *args], capture_output=True, text=True, timeout=600)
    return p.returncode, p.stdout, p.stderr


def main():
    if not os.path.isdir(os.path.join(LFW, "lfw-deepfunneled")):
        print(f"SKIPPED: LFW not found under {LFW}")
        return 77
    from PIL import Image

    rc, out, _ = run("--help")
    check(rc == 0 and "commands:" in out, "likeness --help")
    for cmd in ["detect", "features", "verify", "train", "evaluate", "lfw"]:
        rc, out, _ = run(cmd, "--help")
        check(rc == 0 and out.startswith("usage: likeness " + cmd), f"likeness {cmd} --help")
    rc, _, err = run("no-such-command")
    check(rc == 2 and "--help" in err, "unknown command names the way to help")

    img = os.path.join(LFW, "lfw-deepfunneled", "Aaron_Peirsol", "Aaron_Peirsol_0001.jpg")
    with tempfile.TemporaryDirectory() as tmp:
        ov = os.path.join(tmp, "overlay.png")
        rc, out, err = run("detect", "--draw", ov, img)
        check(rc == 0, f"detect exit 0 ({err.strip()})")
        j = json.loads(out)
        check(len(j["faces"]) >= 1 and j["quality"]["usable"], "detect finds a usable face")
        with Image.open(img) as a, Image.open(ov) as b:
            check(a.size == b.size and b.mode == "RGB", "overlay is an RGB PNG of the input's size")

        bad = os.path.join(tmp, "bad.jpg")
        with open(img, "rb") as f:
            data = f.read()
        with open(bad, "wb") as f:
            f.write(data[: len(data) // 3])
        rc, out, _ = run("detect", bad)
        check(rc == 1 and json.loads(out)["error"]["type"] == "image_corrupt",
              "truncated JPEG -> image_corrupt")
        txt = os.path.join(tmp, "notes.txt")
        with open(txt, "w") as f:
            f.write("not an image\n")
        rc, out, _ = run("detect", txt)
        check(rc == 1 and json.loads(out)["error"]["type"] == "image_unsupported",
              "text file -> image_unsupported")
        rc, out, _ = run("detect", os.path.join(tmp, "missing.jpg"))
        check(rc == 1 and json.loads(out)["error"]["type"] == "io_error", "missing file -> io_error")

        vec = os.path.join(tmp, "f.bin")
        rc, out, _ = run("features", "-o", vec, img)
        j = json.loads(out)
        check(rc == 0 and os.path.getsize(vec) == 4 * j["dimension"],
              "features writes dimension x float32")

        model = os.path.join(SOURCE, "models", "likeness-lfw.lkmodel")
        if not os.path.exists(model):
            check(False, f"default model {model} is missing")
        else:
            with open(os.path.join(LFW, "pairsDevTest.txt")) as f:
                lines = f.read().split("\n")
            n = int(lines[0])
            right = total = 0
            root = os.path.join(LFW, "lfw-deepfunneled")
            for line in lines[1:11] + lines[1 + n:11 + n]:
                p = line.split("\t")
                if len(p) == 3:
                    a = f"{root}/{p[0]}/{p[0]}_{int(p[1]):04d}.jpg"
                    b = f"{root}/{p[0]}/{p[0]}_{int(p[2]):04d}.jpg"
                    mated = True
                else:
                    a = f"{root}/{p[0]}/{p[0]}_{int(p[1]):04d}.jpg"
                    b = f"{root}/{p[2]}/{p[2]}_{int(p[3]):04d}.jpg"
                    mated = False
                rc, out, err = run("verify", "--model", model, "--fmr", "0.1", a, b)
                j = json.loads(out)
                if rc != 0:
                    print("  unusable pair:", j.get("error"))
                    continue
                for key in ["decision_id", "decision", "score", "threshold", "target_fmr",
                            "model_id", "quality", "timings"]:
                    if key not in j:
                        check(False, f"verify output lacks {key}")
                check(0 <= j["score"] <= 1 and j["decision"] in ("match", "non_match"),
                      "score is a probability, decision a known word")
                total += 1
                right += (j["decision"] == "match") == mated
            print(f"verify: {right} of {total} decisions agree with the LFW labels at FMR 0.1")
            # 20 pairs; a working model at FMR 10 % is right on most (rule of thumb).
            check(total >= 15 and right >= 0.7 * total, "verify agrees with most LFW labels")
            rc, out, _ = run("verify", "--model", model, img, txt)
            check(rc == 1 and json.loads(out)["error"]["image"] == "reference",
                  "verify names the unusable image")
    print(f"{failures} failed")
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main())
