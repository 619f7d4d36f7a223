"""Reference values of the association between two columns (src/guard/stats.rs).

Writes tests/reference/association.json: for fixed small columns, Spearman's rank correlation
(scipy.stats.spearmanr, average ranks for ties) and Cramer's V without continuity correction
(scipy.stats.contingency.association(method="cramer", correction=False)) of their contingency
table (scipy.stats.contingency.crosstab); and the correlation ratio eta of a grouped by b, from the
one-way ANOVA F of scipy.stats.f_oneway (eta^2 = F (k - 1) / (F (k - 1) + n - k)), for the cases
where every group of b holds two rows or more. The library and its version are recorded in the
file.
Run: python3 tests/reference/make_association.py (needs scipy and numpy)
"""
import json
import pathlib

import numpy as np
import scipy
from scipy import stats
from scipy.stats import contingency

# Columns are given as numbers: for text, the code of each value in byte order of the levels
# (what probity orders text by).
cases = [
    # A copy, a monotone transform, a reversal.
    ([3.1, 4.2, 2.0, 5.5, 4.2, 1.0, 7.3, 6.6], [3.1, 4.2, 2.0, 5.5, 4.2, 1.0, 7.3, 6.6]),
    ([3.1, 4.2, 2.0, 5.5, 4.2, 1.0, 7.3, 6.6], [3100.0, 4200.0, 2000.0, 5500.0, 4200.0, 1000.0, 7300.0, 6600.0]),
    ([3.1, 4.2, 2.0, 5.5, 4.2, 1.0, 7.3, 6.6], [-1.0, -2.0, 0.5, -3.0, -2.0, 4.0, -9.0, -8.0]),
    # Loosely related, with ties.
    ([1.0, 2.0, 2.0, 3.0, 4.0, 5.0, 5.0, 6.0, 7.0, 8.0], [2.0, 1.0, 4.0, 3.0, 3.0, 6.0, 5.0, 9.0, 7.0, 7.0]),
    ([1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0, 9.0, 10.0], [5.0, 3.0, 9.0, 1.0, 7.0, 2.0, 10.0, 4.0, 8.0, 6.0]),
    # Two-valued against continuous (a median split).
    ([0.0, 0.0, 0.0, 0.0, 0.0, 1.0, 1.0, 1.0, 1.0, 1.0], [1.5, 2.5, 0.5, 3.5, 4.5, 5.5, 9.5, 6.5, 8.5, 7.5]),
    # Three classes relabelled out of order: ranks disagree, the table does not.
    ([0.0, 1.0, 2.0, 0.0, 1.0, 2.0, 0.0, 1.0, 2.0, 0.0, 1.0, 2.0, 0.0, 1.0, 2.0],
     [2.0, 0.0, 1.0, 2.0, 0.0, 1.0, 2.0, 0.0, 1.0, 2.0, 0.0, 1.0, 2.0, 0.0, 1.0]),
    # A coarsened copy: twelve values cut into three classes labelled out of order.
    ([1.2, 3.4, 2.2, 5.1, 4.4, 6.0, 7.5, 8.1, 2.9, 6.6, 9.0, 1.8],
     [1.0, 1.0, 1.0, 2.0, 2.0, 2.0, 0.0, 0.0, 1.0, 2.0, 0.0, 1.0]),
    # Two classes against three, partly related.
    ([0.0, 0.0, 0.0, 0.0, 0.0, 1.0, 1.0, 1.0, 1.0, 1.0, 0.0, 1.0, 0.0, 1.0, 1.0],
     [0.0, 0.0, 1.0, 0.0, 2.0, 2.0, 1.0, 2.0, 2.0, 1.0, 0.0, 2.0, 1.0, 2.0, 0.0]),
]

out_cases = []
for a, b in cases:
    rho = stats.spearmanr(a, b).statistic
    _, table = contingency.crosstab(np.array(a), np.array(b))
    v = contingency.association(table, method="cramer", correction=False)
    case = {"a": a, "b": b, "spearman": float(rho), "cramer_v": float(v)}
    groups = {}
    for x, g in zip(a, b):
        groups.setdefault(g, []).append(x)
    if len(groups) >= 2 and all(len(g) >= 2 for g in groups.values()):
        f = stats.f_oneway(*groups.values()).statistic
        k, n = len(groups), len(a)
        if np.isfinite(f):
            case["eta"] = float(np.sqrt(f * (k - 1) / (f * (k - 1) + n - k)))
    out_cases.append(case)
out = {
    "source": f"scipy {scipy.__version__} (numpy {np.__version__}): scipy.stats.spearmanr, "
    "scipy.stats.contingency.crosstab and association(method='cramer', correction=False), "
    "scipy.stats.f_oneway (eta)",
    "cases": out_cases,
}
path = pathlib.Path(__file__).with_name("association.json")
path.write_text(json.dumps(out, indent=1) + "\n")
print(f"wrote {len(out_cases)} cases to {path}")
