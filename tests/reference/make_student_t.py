"""Reference values of Student's t for probity's unit tests (src/guard/stats.rs).

Writes tests/reference/student_t.json: two-sided p-values P(|T| >= t) = 2 sf(t) and the
0.975 quantiles, from scipy.stats.t (the library and its version are recorded in the file).
Run: python3 tests/reference/make_student_t.py
"""
import json
import pathlib

import scipy
from scipy import stats

cases = []
for df in [1, 2, 3, 4, 5, 9, 10, 19, 24, 49, 99, 299, 999]:
    for t in [0.0, 0.1, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0, 4.785458, 6.0, 10.0]:
        cases.append({"t": t, "df": df, "p_two_sided": float(2.0 * stats.t.sf(t, df))})
quantiles = [{"df": df, "t_0975": float(stats.t.ppf(0.975, df))} for df in [1, 2, 4, 9, 24, 99, 999]]
out = {
    "source": f"scipy {scipy.__version__}, scipy.stats.t.sf and scipy.stats.t.ppf",
    "cases": cases,
    "quantiles": quantiles,
}
path = pathlib.Path(__file__).with_name("student_t.json")
path.write_text(json.dumps(out, indent=1) + "\n")
print(f"wrote {len(cases)} cases and {len(quantiles)} quantiles to {path}")
