#!/usr/bin/python3
"""Reference fixtures: Theil-Sen slope with its confidence interval and
Kendall's tau-b with its p-value, computed by scipy.stats.

Regenerate from the repository root with (Debian's Python, which has the
python3-scipy package; run the R OLS script first, because the series taken
from R's datasets are read from the R fixtures):

    Rscript tests/reference/make_ols_fixtures.R
    /usr/bin/python3 tests/reference/make_robust_fixtures.py

Writes tests/fixtures/reference/scipy/<name>.json. Calls, for every series:

    scipy.stats.theilslopes(y, x, 0.95, method="separate")
    scipy.stats.kendalltau(x, y, method="asymptotic")   # variant "b"

Both are written out in full (positional alpha = 0.95, the method named), so
the result does not depend on scipy's defaults. Deterministic: no randomness.
Floats are written with 17 significant digits ("%.17g") and read back;
non-finite values are written as null.
"""

import csv
import inspect
import json
import math
import pathlib
import subprocess

import numpy as np
import scipy
from scipy import stats

REPO = pathlib.Path(__file__).resolve().parents[2]
if not (REPO / "Cargo.toml").exists():
    raise SystemExit(f"cannot locate the repository root from {__file__}")
OUT = REPO / "tests" / "fixtures" / "reference" / "scipy"
R_FIXTURES = REPO / "tests" / "fixtures" / "reference" / "r"
NORRIS = REPO / "tests" / "fixtures" / "nist" / "norris.csv"

LEVEL = 0.95


def deb_version(pkg):
    try:
        return subprocess.run(
            ["dpkg-query", "-W", "-f=${Version}", pkg],
            capture_output=True, text=True, check=True,
        ).stdout.strip() or "unknown"
    except (OSError, subprocess.CalledProcessError):
        return "unknown"


THEIL_SIG = str(inspect.signature(stats.theilslopes))
KENDALL_SIG = str(inspect.signature(stats.kendalltau))
METHOD = (
    f"scipy {scipy.__version__} (Debian python3-scipy "
    f"{deb_version('python3-scipy')}, numpy {np.__version__}): "
    f"stats.theilslopes(y, x, {LEVEL}, method='separate') "
    f"[signature theilslopes{THEIL_SIG}]; "
    "stats.kendalltau(x, y, method='asymptotic') (tau-b, asymptotic "
    "two-sided p without continuity correction) "
    f"[signature kendalltau{KENDALL_SIG}]"
)


# ---- JSON writer -----------------------------------------------------------

def num(v):
    v = float(v)
    if not math.isfinite(v):
        return "null"
    s = "%.17g" % v
    if float(s) != v:
        raise ValueError(f"value does not round-trip: {s}")
    return s


def arr(values):
    return "[" + ", ".join(num(v) for v in values) + "]"


def obj(pairs):
    return "{" + ", ".join(f"{json.dumps(k)}: {v}" for k, v in pairs) + "}"


# ---- data sources ----------------------------------------------------------

def from_r_fixture(name):
    d = json.loads((R_FIXTURES / f"{name}.json").read_text(encoding="utf-8"))
    if d["transform"] != "none":
        raise ValueError(f"{name}: expected an untransformed R fixture")
    cite = d["source"].split("), ", 1)[0] + ")"
    return d["x"], d["y"], f"{cite}, model {d['model']}"


def from_engel():
    import statsmodels
    import statsmodels.datasets as smd

    data = smd.engel.load_pandas().data
    return (
        data["income"].tolist(), data["foodexp"].tolist(),
        "statsmodels.datasets.engel (Engel (1857) food expenditure data; "
        "Koenker, R. and Bassett, G (1982) Robust Tests of Heteroscedasticity "
        "based on Regression Quantiles; Econometrica 50, 43-61; distributed "
        "with the R package quantreg; public domain), statsmodels "
        f"{statsmodels.__version__}, x = income, y = foodexp",
    )


def from_norris():
    with NORRIS.open(newline="") as f:
        rows = list(csv.DictReader(f))
    return (
        [float(r["x"]) for r in rows], [float(r["y"]) for r in rows],
        "NIST StRD Linear Regression dataset Norris (Norris, J., NIST, "
        "Calibration of Ozone Monitors; public domain), read from "
        "tests/fixtures/nist/norris.csv; METHODS.md section 10 item 1",
    )


def seq(values):
    return [float(i) for i in range(1, len(values) + 1)], [float(v) for v in values]


# Worked examples listed in METHODS.md section 10 (the project's methods
# sheet, kept in shared/reference/METHODS.md). The numbers are the published
# example values exactly as quoted there; where an example gives only a
# sequence, x = 1..n.
WORKED = {
    "methods10_mann_kendall_hand": (
        seq([12.9, 14.8, 13.2, 15.7, 13.8, 15.6, 12.9, 11.0, 17.3, 15.9,
             19.0, 18.3, 20.1, 21.7]),
        "Mann-Kendall hand-calculation example from a Holy Cross note, as "
        "quoted in METHODS.md section 10 item 3 (published "
        "there: S = 54, Var(S) = 332.67, Z = 2.9058, one-sided p about "
        "0.0018); sequence only, x = 1..14",
    ),
    "methods10_epa_qag9s": (
        seq([10, 10, 10, 5, 10, 20, 18, 17, 15, 24, 15]),
        "US EPA (2006) Data Quality Assessment: Statistical Methods for "
        "Practitioners, EPA QA/G-9S, p. 109 example, as quoted in a secondary "
        "source and in METHODS.md section 10 item 4 (published there: S = 22, "
        "Var(S) = 155.33, Z = 1.685); sequence only, x = 1..11",
    ),
    "methods10_kendall_ex43": (
        ([1.5, 1.5, 3, 4, 6, 6, 6, 8, 9.5, 9.5, 11, 12],
         [2.5, 2.5, 7, 4.5, 1, 4.5, 6, 11.5, 11.5, 8.5, 8.5, 10]),
        "Kendall, M. G., Rank Correlation Methods, Example 4.3, as quoted in "
        "public R documentation and in METHODS.md section 10 item 5 "
        "(published there: S = 34, Var(S) = 203.30 with ties in both x and y)",
    ),
    "methods10_hollander_wolfe_theil": (
        ([67, 28, 30, 28, 52, 40, 25, 37, 44, 10, 14, 20, 28, 40, 51],
         [21, 4, 9, 12, 35, 18, 10, 22, 24, 1, 6, 8, 13, 16, 19]),
        "Hollander, M. and Wolfe, D. A. (1999) Nonparametric Statistical "
        "Methods, 2nd ed., Wiley: Theil-Sen example as quoted in public R "
        "documentation and in METHODS.md section 10 item 6 (published there: "
        "slope 0.5, 95% CI [0.3243, 0.75] with nearest-integer ranks)",
    ),
    "methods10_wisconsin_table_a": (
        seq([100, 50, 85, 75, 50]),
        "Wisconsin Administrative Code, Mann-Kendall Table A example "
        "(reproduced in a site report), as quoted in METHODS.md section 10 "
        "item 7 (published there: S = -5); sequence only, x = 1..5",
    ),
}


def series():
    for name in ["cars", "women", "faithful", "trees", "stackloss",
                 "anscombe1", "anscombe2", "anscombe3", "anscombe4",
                 "lifecyclesavings", "bod"]:
        x, y, cite = from_r_fixture(name)
        yield name, x, y, f"{cite}, x/y read from tests/fixtures/reference/r/{name}.json"
    x, y, cite = from_engel()
    yield "engel", x, y, cite
    x, y, cite = from_norris()
    yield "methods10_norris", x, y, cite
    for name, ((x, y), cite) in WORKED.items():
        yield name, [float(v) for v in x], [float(v) for v in y], cite


def make_fixture(name, x, y, cite):
    xa = np.asarray(x, dtype=float)
    ya = np.asarray(y, dtype=float)
    ts = stats.theilslopes(ya, xa, LEVEL, method="separate")
    kt = stats.kendalltau(xa, ya, method="asymptotic")
    source = f"{cite}; n = {len(xa)}; {METHOD}"
    theil = obj([
        ("slope", num(ts.slope)), ("intercept", num(ts.intercept)),
        ("ci_low", num(ts.low_slope)), ("ci_high", num(ts.high_slope)),
        ("level", num(LEVEL)),
    ])
    kendall = obj([("tau_b", num(kt.correlation)), ("p", num(kt.pvalue))])
    text = "{" + ",\n ".join([
        f'"dataset": {json.dumps(name)}',
        f'"source": {json.dumps(source, ensure_ascii=False)}',
        f'"x": {arr(xa)}',
        f'"y": {arr(ya)}',
        f'"theil_sen": {theil}',
        f'"kendall": {kendall}',
    ]) + "}\n"
    path = OUT / f"{name}.json"
    path.write_text(text, encoding="utf-8")
    back = json.loads(path.read_text(encoding="utf-8"))
    assert back["x"] == xa.tolist() and back["y"] == ya.tolist()
    assert back["theil_sen"]["slope"] == float(ts.slope)
    print(f"{name:<32} n = {len(xa):3d}  slope {ts.slope:.6g} "
          f"[{ts.low_slope:.6g}, {ts.high_slope:.6g}]  tau_b {kt.correlation:.6g} "
          f"p {kt.pvalue:.6g}" + ("  (null written)" if "null" in text else ""))


def main():
    OUT.mkdir(parents=True, exist_ok=True)
    for name, x, y, cite in series():
        make_fixture(name, x, y, cite)


if __name__ == "__main__":
    main()
