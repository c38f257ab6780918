#!/usr/bin/python3
"""Reference fixtures: OLS of y on x with inference and influence diagnostics,
computed by statsmodels.

Regenerate from the repository root with (Debian's Python, which has the
python3-statsmodels package; run the R script first, because the cars and
anscombe4 fixtures here read their x/y from the R fixtures):

    Rscript tests/reference/make_ols_fixtures.R
    /usr/bin/python3 tests/reference/make_ols_fixtures.py

Writes tests/fixtures/reference/statsmodels/<name>.json in the same shape as
the R fixtures. Data come from statsmodels' bundled datasets (no network) and,
for the cross-library checks, from the R fixtures. Deterministic: no
randomness. Floats are written with 17 significant digits ("%.17g"), each read
back and compared; non-finite values are written as null.
"""

import json
import math
import pathlib
import subprocess
import warnings

import numpy as np
import scipy
import statsmodels
import statsmodels.api as sm
import statsmodels.datasets as smd
from statsmodels.stats.outliers_influence import OLSInfluence
from statsmodels.stats.stattools import durbin_watson

REPO = pathlib.Path(__file__).resolve().parents[2]
if not (REPO / "Cargo.toml").exists():
    raise SystemExit(f"cannot locate the repository root from {__file__}")
OUT = REPO / "tests" / "fixtures" / "reference" / "statsmodels"
R_FIXTURES = REPO / "tests" / "fixtures" / "reference" / "r"


def deb_version(pkg):
    try:
        return subprocess.run(
            ["dpkg-query", "-W", "-f=${Version}", pkg],
            capture_output=True, text=True, check=True,
        ).stdout.strip() or "unknown"
    except (OSError, subprocess.CalledProcessError):
        return "unknown"


VERSIONS = (
    f"statsmodels {statsmodels.__version__} (Debian python3-statsmodels "
    f"{deb_version('python3-statsmodels')}), numpy {np.__version__}, "
    f"scipy {scipy.__version__}"
)
METHOD = (
    "sm.OLS(y, sm.add_constant(x)).fit() + conf_int(0.05) + "
    "OLSInfluence(res).summary_frame() + cov_ratio + "
    "resid_studentized_internal/external; durbin_watson = "
    "statsmodels.stats.stattools.durbin_watson on residuals ordered by x "
    "(stable sort: ties in original row order)"
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


def integer(v):
    if float(v) != int(v):
        raise ValueError(f"not an integer: {v}")
    return str(int(v))


def arr(values):
    return "[" + ", ".join(num(v) for v in values) + "]"


def obj(pairs):
    return "{" + ", ".join(f"{json.dumps(k)}: {v}" for k, v in pairs) + "}"


# ---- datasets --------------------------------------------------------------

def from_statsmodels(module, xcol, ycol):
    data = getattr(smd, module).load_pandas().data
    return (data[xcol].to_numpy(dtype=float), data[ycol].to_numpy(dtype=float))


def from_r_fixture(name):
    d = json.loads((R_FIXTURES / f"{name}.json").read_text(encoding="utf-8"))
    if d["transform"] != "none":
        raise ValueError("cross-checks use untransformed fixtures")
    return np.array(d["x"], dtype=float), np.array(d["y"], dtype=float)


SPECS = [
    {
        "name": "engel", "model": "foodexp ~ income",
        "load": lambda: from_statsmodels("engel", "income", "foodexp"),
        "data": "statsmodels.datasets.engel (Engel (1857) food expenditure "
                "data; Koenker, R. and Bassett, G (1982) Robust Tests of "
                "Heteroscedasticity based on Regression Quantiles; "
                "Econometrica 50, 43-61; distributed with the R package "
                "quantreg; public domain)",
    },
    {
        "name": "longley", "model": "TOTEMP ~ GNP",
        "load": lambda: from_statsmodels("longley", "GNP", "TOTEMP"),
        "data": "statsmodels.datasets.longley (Longley, J.W. (1967) An "
                "Appraisal of Least Squares Programs for the Electronic "
                "Computer from the Point of View of the User. Journal of the "
                "American Statistical Association 62.319, 819-41; public "
                "domain)",
    },
    {
        "name": "stackloss", "model": "STACKLOSS ~ AIRFLOW",
        "load": lambda: from_statsmodels("stackloss", "AIRFLOW", "STACKLOSS"),
        "data": "statsmodels.datasets.stackloss (Brownlee, K. A. (1965) "
                "Statistical Theory and Methodology in Science and "
                "Engineering, 2nd edition, New York: Wiley; public domain; "
                "the same 21 rows as R datasets::stackloss)",
    },
    {
        "name": "cars", "model": "dist ~ speed",
        "load": lambda: from_r_fixture("cars"),
        "data": "R datasets::cars (Ezekiel, M. (1930) Methods of Correlation "
                "Analysis. Wiley), x/y read from "
                "tests/fixtures/reference/r/cars.json",
    },
    {
        "name": "anscombe4", "model": "y4 ~ x4",
        "load": lambda: from_r_fixture("anscombe4"),
        "data": "R datasets::anscombe set 4 (Anscombe, Francis J. (1973) "
                "Graphs in statistical analysis. The American Statistician, "
                "27, 17-21), x/y read from "
                "tests/fixtures/reference/r/anscombe4.json",
    },
]


def make_fixture(spec):
    x, y = spec["load"]()
    n = len(x)
    res = sm.OLS(y, sm.add_constant(x, has_constant="raise")).fit()
    ci = res.conf_int(0.05)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        infl = OLSInfluence(res)
        frame = infl.summary_frame()
        cov_ratio = np.asarray(infl.cov_ratio)
        r_int = np.asarray(infl.resid_studentized_internal)
        r_ext = np.asarray(infl.resid_studentized_external)
    # summary_frame's columns agree with the named attributes.
    np.testing.assert_array_equal(frame["standard_resid"].to_numpy(), r_int)
    np.testing.assert_array_equal(frame["student_resid"].to_numpy(), r_ext)

    order = np.argsort(x, kind="stable")
    dw = durbin_watson(np.asarray(res.resid)[order])

    fit = obj([
        ("n", integer(res.nobs)),
        ("intercept", num(res.params[0])), ("slope", num(res.params[1])),
        ("intercept_se", num(res.bse[0])), ("slope_se", num(res.bse[1])),
        ("slope_t", num(res.tvalues[1])), ("slope_p", num(res.pvalues[1])),
        ("slope_ci_low", num(ci[1, 0])), ("slope_ci_high", num(ci[1, 1])),
        ("r_squared", num(res.rsquared)),
        ("residual_sd", num(math.sqrt(res.scale))),
        ("df", integer(res.df_resid)),
    ])
    points = []
    for i in range(n):
        points.append(obj([
            ("leverage", num(frame["hat_diag"].iloc[i])),
            ("standardized_residual", num(r_int[i])),
            ("studentized_residual", num(r_ext[i])),
            ("cooks_distance", num(frame["cooks_d"].iloc[i])),
            ("dffits", num(frame["dffits"].iloc[i])),
            ("dfbetas_intercept", num(frame["dfb_const"].iloc[i])),
            ("dfbetas_slope", num(frame["dfb_x1"].iloc[i])),
            ("covariance_ratio", num(cov_ratio[i])),
        ]))
    source = f"{spec['data']}, no transform, n = {n}; {VERSIONS}; {METHOD}"
    text = (
        "{" + ",\n ".join([
            f'"dataset": {json.dumps(spec["name"])}',
            f'"source": {json.dumps(source, ensure_ascii=False)}',
            f'"model": {json.dumps(spec["model"])}',
            '"transform": "none"',
            f'"x": {arr(x)}',
            f'"y": {arr(y)}',
            f'"fit": {fit}',
            '"points": [\n  ' + ",\n  ".join(points) + "\n ]",
            f'"durbin_watson": {num(dw)}',
        ]) + "}\n"
    )
    path = OUT / f"{spec['name']}.json"
    path.write_text(text, encoding="utf-8")

    back = json.loads(path.read_text(encoding="utf-8"))
    assert back["x"] == [float(v) for v in x] and back["y"] == [float(v) for v in y]
    assert back["fit"]["slope"] == float(res.params[1])
    nulls = text.count("null")
    notes = sorted({str(w.message).splitlines()[0] for w in caught})
    print(f"{spec['name']:<10} n = {n:3d}  wrote {path.relative_to(REPO)}"
          + (f"  ({nulls} null)" if nulls else "")
          + (f"  warnings: {notes}" if notes else ""))


def main():
    OUT.mkdir(parents=True, exist_ok=True)
    for spec in SPECS:
        make_fixture(spec)


if __name__ == "__main__":
    main()
