"""Bagged decision stumps: a small model in plain Python, run by probity as a command family.

probity's protocol (see the README, "External command families"):
  PROBITY_FIT     CSV with the feature columns and the target of the fitting rows
  PROBITY_SCORE   CSV with the feature columns of the rows to score (never the target)
  PROBITY_OUT     where to write the predictions: a header, then one row per scored row
  PROBITY_SEED    the seed to use (derived by probity; replay depends on it)
  PROBITY_PARAMS  the grid point, as JSON: here {"stumps": 50, "sample": 0.8}
  PROBITY_TARGET, PROBITY_TASK ("regression" | "classification"), PROBITY_CLASSES (JSON list)

Each stump splits one numeric feature at one threshold, chosen on a bootstrap sample of the
fitting rows to minimise the squared error (regression) or the Brier score of the class shares
(classification); text columns are ignored and a missing cell takes the column mean. The
prediction is the average over the stumps: a mean (regression), or class probabilities
(classification).
"""

import csv
import json
import os
import random
import sys


def read(path):
    with open(path, newline="") as f:
        rows = list(csv.reader(f))
    return rows[0], rows[1:]


def numeric_columns(header, rows, skip):
    cols = []
    for j, name in enumerate(header):
        if name == skip:
            continue
        vals = [r[j] for r in rows if r[j] != ""]
        try:
            [float(v) for v in vals]
        except ValueError:
            continue
        cols.append(j)
    return cols


def matrix(rows, cols, means):
    return [[float(r[j]) if r[j] != "" else means[j] for j in cols] for r in rows]


def stump(X, targets, idx, width):
    """Best (feature, threshold, left value, right value) on the rows idx; targets are vectors."""
    best = None
    total = [sum(targets[i][k] for i in idx) for k in range(width)]
    n = len(idx)
    for f in range(len(X[0])):
        order = sorted(idx, key=lambda i: X[i][f])
        left = [0.0] * width
        for pos in range(1, n):
            i = order[pos - 1]
            for k in range(width):
                left[k] += targets[i][k]
            if X[order[pos]][f] == X[i][f]:
                continue
            nl, nr = pos, n - pos
            # Minimising squared error = maximising sum of squared leaf sums over leaf sizes.
            gain = sum(left[k] ** 2 for k in range(width)) / nl + sum((total[k] - left[k]) ** 2 for k in range(width)) / nr
            if best is None or gain > best[0]:
                thr = (X[i][f] + X[order[pos]][f]) / 2
                best = (gain, f, thr, [v / nl for v in left], [(total[k] - left[k]) / nr for k in range(width)])
    if best is None:
        mean = [t / n for t in total]
        return (0, float("inf"), mean, mean)
    return best[1:]


def main():
    target = os.environ["PROBITY_TARGET"]
    classes = json.loads(os.environ.get("PROBITY_CLASSES", "[]"))
    params = json.loads(os.environ["PROBITY_PARAMS"])
    rng = random.Random(int(os.environ["PROBITY_SEED"]))
    header, fit = read(os.environ["PROBITY_FIT"])
    score_header, score = read(os.environ["PROBITY_SCORE"])
    if target in score_header:
        sys.exit("the score file must not hold the target")
    t = header.index(target)
    cols = numeric_columns(header, fit, target)
    means = {j: sum(float(r[j]) for r in fit if r[j] != "") / max(1, sum(1 for r in fit if r[j] != "")) for j in cols}
    X = matrix(fit, cols, means)
    if classes:
        targets = [[1.0 if r[t] == c else 0.0 for c in classes] for r in fit]
    else:
        targets = [[float(r[t])] for r in fit]
    width = len(targets[0])
    names = [header[j] for j in cols]
    S = matrix(score, [score_header.index(n) for n in names], {score_header.index(n): means[j] for n, j in zip(names, cols)})
    n = len(fit)
    m = max(1, int(round(params.get("sample", 1.0) * n)))
    stumps = [stump(X, targets, [rng.randrange(n) for _ in range(m)], width) for _ in range(int(params.get("stumps", 10)))]
    with open(os.environ["PROBITY_OUT"], "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(["prediction"] + [f"p_{c}" for c in classes])
        for x in S:
            v = [0.0] * width
            for feat, thr, lo, hi in stumps:
                leaf = lo if x[feat] <= thr else hi
                for k in range(width):
                    v[k] += leaf[k] / len(stumps)
            if classes:
                s = sum(v)
                v = [p / s for p in v]
                w.writerow([classes[max(range(width), key=lambda k: (v[k], -k))]] + [repr(p) for p in v])
            else:
                w.writerow([repr(v[0])])


if __name__ == "__main__":
    main()
