"""Classification reference fixtures, computed with scikit-learn (versions recorded in the output).

Writes, next to this script:
  breast_cancer.csv  Wisconsin diagnostic breast cancer data as shipped by scikit-learn
                     (load_breast_cancer; Street, Wolberg & Mangasarian 1993), 569 rows,
                     30 features, target `diagnosis` = benign | malignant
  wine.csv           the wine recognition data as shipped by scikit-learn (load_wine; from the
                     UCI repository, Forina et al.), 178 rows, 13 features, target `cultivar`
                     = class_0 | class_1 | class_2
  classification.expected.json  expected validation-row probabilities and metrics

Conventions (the same as diabetes.csv in this folder):
- part: data-row index i gives test when i % 5 == 4, validation when i % 5 == 3, else train.
- Fit on part == train, score part == validation. Features are z-scored with the mean and the
  population sd of the training rows (StandardScaler).
- logistic(lambda) = LogisticRegression(C = 1/lambda) on the z-scored features: the summed
  log-loss + (lambda/2) ||w||^2, intercepts unpenalised; multinomial for three classes.
  Solved with solver="newton-cholesky", tol=1e-12 (recorded below with the largest probability
  change against solver="lbfgs", tol=1e-12, as a cross-check).
- knn(k) = KNeighborsClassifier(n_neighbors=k): vote fractions as probabilities. The script
  checks that no validation row has a distance tie at the k-th neighbour, so no tie rule matters.
- mean: the class shares of the training rows.
- Metrics are computed here from the probabilities by their definitions: accuracy with the
  first class winning ties; balanced accuracy as the mean recall over classes present; log-loss
  with probabilities clipped to [1e-15, 1 - 1e-15] (natural log); Brier: binary mean (p - y)^2
  on the positive (second) class, multiclass mean squared distance to the one-hot truth (Brier
  1950); AUC (binary): the Mann-Whitney statistic. accuracy, balanced accuracy and AUC are
  cross-checked against sklearn.metrics.

Run: python3 make_classification.py (needs numpy and scikit-learn).
"""

import json
import os

import numpy as np
import scipy
import sklearn
from sklearn.datasets import load_breast_cancer, load_wine
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import accuracy_score, balanced_accuracy_score, roc_auc_score
from sklearn.neighbors import KNeighborsClassifier
from sklearn.preprocessing import StandardScaler

HERE = os.path.dirname(os.path.abspath(__file__))


def part_of(i):
    return "test" if i % 5 == 4 else "validation" if i % 5 == 3 else "train"


def write_csv(name, feature_names, X, labels, target):
    with open(os.path.join(HERE, name), "w", newline="\n") as f:
        f.write(",".join(feature_names + [target, "part"]) + "\n")
        for i in range(X.shape[0]):
            f.write(",".join([repr(float(v)).removesuffix(".0") if float(v).is_integer() else repr(float(v)) for v in X[i]] + [labels[i], part_of(i)]) + "\n")


def metrics(y, P, classes):
    n, c = P.shape
    pred = P.argmax(axis=1)  # first class wins ties
    acc = float(np.mean(pred == y))
    recalls = [np.mean(pred[y == k] == k) for k in range(c) if np.any(y == k)]
    bal = float(np.mean(recalls))
    clipped = np.clip(P[np.arange(n), y], 1e-15, 1 - 1e-15)
    ll = float(-np.mean(np.log(clipped)))
    if c == 2:
        brier = float(np.mean((P[:, 1] - (y == 1)) ** 2))
        # Mann-Whitney with ties one half
        pos, neg = P[y == 1, 1], P[y == 0, 1]
        auc = float(sum((p > q) + 0.5 * (p == q) for p in pos for q in neg) / (len(pos) * len(neg)))
        assert abs(auc - roc_auc_score(y, P[:, 1])) < 1e-12
    else:
        onehot = np.eye(c)[y]
        brier = float(np.mean(np.sum((P - onehot) ** 2, axis=1)))
        auc = None
    assert abs(acc - accuracy_score(y, pred)) < 1e-15
    assert abs(bal - balanced_accuracy_score(y, pred)) < 1e-12
    return {"accuracy": acc, "balanced_accuracy": bal, "log_loss": ll, "brier": brier, "auc": auc}


def cases(X, y, classes):
    parts = np.array([part_of(i) for i in range(len(y))])
    tr, va = parts == "train", parts == "validation"
    scaler = StandardScaler().fit(X[tr])
    Ztr, Zva = scaler.transform(X[tr]), scaler.transform(X[va])
    out = []
    prior = np.bincount(y[tr], minlength=len(classes)) / tr.sum()
    P = np.tile(prior, (va.sum(), 1))
    out.append({"id": "mean", "model": "mean", "probabilities": P.tolist(), "metrics": metrics(y[va], P, classes)})
    for lam in [0.1, 1.0, 10.0]:
        m = LogisticRegression(C=1.0 / lam, solver="newton-cholesky", tol=1e-12, max_iter=10000).fit(Ztr, y[tr])
        P = m.predict_proba(Zva)
        check = LogisticRegression(C=1.0 / lam, solver="lbfgs", tol=1e-12, max_iter=100000).fit(Ztr, y[tr]).predict_proba(Zva)
        out.append({
            "id": f"logistic(lambda={lam})", "model": "logistic", "lambda": lam,
            "probabilities": P.tolist(), "metrics": metrics(y[va], P, classes),
            "lbfgs_max_abs_probability_difference": float(np.max(np.abs(P - check))),
        })
    for k in [1, 5, 15]:
        m = KNeighborsClassifier(n_neighbors=k).fit(Ztr, y[tr])
        # No distance tie at the k-th neighbour for any validation row.
        d = np.sqrt(((Zva[:, None, :] - Ztr[None, :, :]) ** 2).sum(axis=2))
        s = np.sort(d, axis=1)
        gap = float(np.min((s[:, k] - s[:, k - 1]) / s[:, k]))
        assert gap > 1e-9, gap
        P = m.predict_proba(Zva)
        out.append({
            "id": f"knn(k={k})", "model": "knn", "k": k, "probabilities": P.tolist(),
            "metrics": metrics(y[va], P, classes), "smallest_relative_gap_kth_to_next_distance": gap,
        })
    return out


def main():
    bc = load_breast_cancer()
    names = [n.replace(" ", "_") for n in bc.feature_names]
    labels = [str(bc.target_names[t]) for t in bc.target]  # malignant | benign
    write_csv("breast_cancer.csv", names, bc.data, labels, "diagnosis")
    classes = sorted(set(labels))  # benign, malignant: the positive (second) class is malignant
    y = np.array([classes.index(l) for l in labels])
    wine = load_wine()
    wnames = [n.replace("/", "_per_") for n in wine.feature_names]
    wlabels = [f"class_{t}" for t in wine.target]
    write_csv("wine.csv", wnames, wine.data, wlabels, "cultivar")
    wclasses = sorted(set(wlabels))
    wy = np.array([wclasses.index(l) for l in wlabels])
    out = {
        "source": "scikit-learn datasets load_breast_cancer and load_wine; see the docstring of make_classification.py",
        "versions": {"scikit-learn": sklearn.__version__, "numpy": np.__version__, "scipy": scipy.__version__},
        "datasets": {
            "breast_cancer.csv": {"target": "diagnosis", "classes": classes, "n_fit": int(sum(part_of(i) == "train" for i in range(len(y)))), "cases": cases(bc.data, y, classes)},
            "wine.csv": {"target": "cultivar", "classes": wclasses, "n_fit": int(sum(part_of(i) == "train" for i in range(len(wy)))), "cases": cases(wine.data, wy, wclasses)},
        },
    }
    with open(os.path.join(HERE, "classification.expected.json"), "w") as f:
        json.dump(out, f, indent=1)
    print("wrote breast_cancer.csv, wine.csv, classification.expected.json")


if __name__ == "__main__":
    main()
