"""likeness train / evaluate / lfw end to end on a miniature of LFW.

Outside references: scikit-learn's roc_auc_score on the per-pair scores
that `evaluate --scores` writes must equal the AUC it reports; numpy's mean
and standard error of the per-fold accuracies must equal what `lfw` reports
(LFW protocol: mean and standard error over the folds, Huang et al. 2007).
The data are real LFW images (../shared), arranged into small
folder-per-identity sets and LFW-format pairs files by this test."""
import csv
import json
import os
import subprocess
import sys
import tempfile

import numpy as np

from lkref import check, finish  # noqa: E402

BIN = os.environ.get("LIKENESS_BIN", "build/bin")
SHARED = os.environ.get("LIKENESS_SHARED", "../shared")
LFW = os.path.abspath(os.path.join(SHARED, "datasets", "lfw", "lfw-deepfunneled"))
EXE = os.path.join(BIN, "likeness")


def run(*args):
    p = subprocess.run([EXE, *args], capture_output=True, text=True, timeout=1200)
    if p.returncode != 0:
        print(p.stderr[-2000:])
    return p


def identities(min_images):
    out = []
    for nm in sorted(os.listdir(LFW)):
        n = len(os.listdir(os.path.join(LFW, nm)))
        if n >= min_images:
            out.append((nm, n))
    return out


def main():
    if not os.path.isdir(LFW):
        print(f"SKIPPED: LFW not found at {LFW}", file=sys.stderr)
        return 77
    from sklearn.metrics import roc_auc_score

    ids = identities(5)
    train_ids, eval_ids = ids[:24], ids[24:44]
    with tempfile.TemporaryDirectory() as tmp:
        ds = os.path.join(tmp, "train")
        for nm, _ in train_ids:
            os.makedirs(os.path.join(ds, nm))
            for i in range(1, 6):
                fn = f"{nm}_{i:04d}.jpg"
                os.symlink(os.path.join(LFW, nm, fn), os.path.join(ds, nm, fn))
        model = os.path.join(tmp, "m.lkmodel")
        p = run("train", "--data", ds, "-o", model, "--pca", "20", "--pairs-per-class", "150",
                "--calibration-share", "0.25", "--center-fallback", "--default-fmr", "0.1")
        check(p.returncode == 0 and os.path.exists(model), "train writes a model")
        desc = json.loads(p.stdout) if p.returncode == 0 else {}
        check(desc.get("pair_dimension") == 20 and desc.get("projection_norm") == "l2",
              "the model has the recipe's projection")

        # LFW-format pairs of identities the model never saw.
        root = os.path.join(tmp, "root")
        os.makedirs(root)
        os.symlink(LFW, os.path.join(root, "lfw-deepfunneled"))
        lines = ["10"]
        lines += [f"{nm}\t1\t2" for nm, _ in eval_ids[:10]]
        lines += [f"{a[0]}\t3\t{b[0]}\t4" for a, b in zip(eval_ids[10:20], eval_ids[:10])]
        pairs = os.path.join(tmp, "pairs.txt")
        with open(pairs, "w") as f:
            f.write("\n".join(lines) + "\n")
        out_json, out_csv, out_html = (os.path.join(tmp, x) for x in ("e.json", "s.csv", "r.html"))
        p = run("evaluate", "--model", model, "--pairs", pairs, "--lfw-root", root,
                "--center-fallback", "--json", out_json, "--scores", out_csv, "--report", out_html)
        check(p.returncode == 0, "evaluate runs")
        if p.returncode == 0:
            j = json.load(open(out_json))
            rows = list(csv.DictReader(open(out_csv)))
            check(len(rows) == 20, "one score row per pair")
            y = np.array([int(r["mated"]) for r in rows if r["svm_value"]])
            v = np.array([float(r["svm_value"]) for r in rows if r["svm_value"]])
            auc = roc_auc_score(y, v)
            check(abs(auc - j["auc"]) < 1e-12, f"AUC {j['auc']:.4f} equals sklearn's {auc:.4f}")
            sc = np.array([float(r["score"]) for r in rows if r["score"]])
            check(np.all((sc >= 0) & (sc <= 1)) and np.all(np.argsort(v) == np.argsort(sc)) or
                  len(set(v)) < len(v), "scores are probabilities, monotone in the SVM value")
            html = open(out_html).read()
            check(html.count("<svg") == 3 and "DET" in html, "report has ROC, DET and histogram")
            # The offline verify of one pair gives the same score as evaluate.
            r0 = rows[0]
            pv = run("verify", "--model", model, r0["path_a"], r0["path_b"])
            if pv.returncode == 0 and r0["score"]:
                s = json.loads(pv.stdout)["score"]
                check(abs(s - float(r0["score"])) < 1e-9, f"verify score {s:.6f} == evaluate's")

        # A miniature View 2: 10 folds of 2 mated + 2 non-mated pairs, disjoint
        # identities per fold, in LFW's pairs.txt format.
        fold_ids = ids[44:44 + 40]
        lines = ["10\t2"]
        for f in range(10):
            chunk = fold_ids[4 * f:4 * f + 4]
            lines += [f"{nm}\t1\t2" for nm, _ in chunk[:2]]
            lines += [f"{chunk[2][0]}\t1\t{chunk[3][0]}\t2", f"{chunk[3][0]}\t3\t{chunk[2][0]}\t3"]
        mini = os.path.join(tmp, "mini")
        os.makedirs(os.path.join(mini, "lfw-deepfunneled"))
        for nm, _ in fold_ids:
            os.symlink(os.path.join(LFW, nm), os.path.join(mini, "lfw-deepfunneled", nm))
        with open(os.path.join(mini, "pairs.txt"), "w") as f:
            f.write("\n".join(lines) + "\n")
        out = os.path.join(tmp, "v2.json")
        p = run("lfw", "--lfw-root", mini, "--pca", "10", "--pairs-per-class", "40",
                "--json", out)
        check(p.returncode == 0, "lfw runs the ten folds")
        if p.returncode == 0:
            j = json.load(open(out))
            acc = np.array([f["accuracy"] for f in j["per_fold"]])
            check(len(acc) == 10, "ten folds reported")
            check(abs(acc.mean() - j["mean_accuracy"]) < 1e-12, "mean accuracy over folds")
            se = acc.std(ddof=1) / np.sqrt(len(acc))
            check(abs(se - j["standard_error"]) < 1e-12, f"standard error {se:.4f}")
    return finish()


if __name__ == "__main__":
    sys.exit(main())
