#!/usr/bin/env Rscript
# Reference fixtures: ordinary least squares of y on x with inference and
# per-point influence diagnostics, computed by R's stats package.
#
# Regenerate from the repository root with:
#   Rscript tests/reference/make_ols_fixtures.R
#
# Writes tests/fixtures/reference/r/<name>.json, one file per dataset.
# Every dataset comes from R's own `datasets` package (shipped with
# r-base-core); nothing is downloaded and nothing is random, so the output is
# the same on every run with the same R build.
#
# Floats are written with 17 significant digits ("%.17g"), which identifies a
# double exactly; every written number is read back and compared. Non-finite
# values (NaN, Inf) are written as JSON null.

options(warn = 1)

# ---- where to write --------------------------------------------------------

repo_root <- local({
  args <- commandArgs(trailingOnly = FALSE)
  file_arg <- sub("^--file=", "", args[grep("^--file=", args)])
  root <- if (length(file_arg) == 1L) {
    normalizePath(file.path(dirname(file_arg), "..", ".."))
  } else {
    getwd()
  }
  if (!file.exists(file.path(root, "Cargo.toml"))) {
    stop("cannot locate the repository root (no Cargo.toml in ", root, ")")
  }
  root
})
out_dir <- file.path(repo_root, "tests", "fixtures", "reference", "r")
dir.create(out_dir, recursive = TRUE, showWarnings = FALSE)

# ---- versions recorded in every "source" line ------------------------------

r_version <- paste(R.version$major, R.version$minor, sep = ".")
deb_version <- local({
  v <- tryCatch(
    system2("dpkg-query", c("-W", shQuote("-f=${Version}"), "r-base-core"),
            stdout = TRUE, stderr = FALSE),
    error = function(e) character(0)
  )
  if (length(v) == 1L && nzchar(v)) v else "unknown"
})

# ---- minimal JSON writer ---------------------------------------------------

json_num <- function(v) {
  stopifnot(length(v) == 1L, is.numeric(v))
  if (!is.finite(v)) return("null")
  s <- sprintf("%.17g", v)
  if (as.numeric(s) != v) stop("value does not round-trip: ", s)
  s
}
json_int <- function(v) {
  stopifnot(length(v) == 1L, v == round(v))
  sprintf("%d", as.integer(v))
}
json_str <- function(s) {
  s <- gsub("\\\\", "\\\\\\\\", s)
  s <- gsub("\"", "\\\\\"", s)
  paste0("\"", s, "\"")
}
json_arr <- function(v) {
  paste0("[", paste(vapply(v, json_num, ""), collapse = ", "), "]")
}
json_obj <- function(keys, values, sep = ", ") {
  paste0("{", paste(paste0(json_str(keys), ": ", values), collapse = sep), "}")
}

# ---- datasets --------------------------------------------------------------
# data: name of the data frame in package `datasets`; xcol/ycol: columns;
# transform: what is applied before fitting (natural logs);
# cite: the Source (and main reference) as given in R's help page for it.

specs <- list(
  list(name = "cars", data = "cars", xcol = "speed", ycol = "dist",
       transform = "none", model = "dist ~ speed",
       cite = "Ezekiel, M. (1930) Methods of Correlation Analysis. Wiley"),
  list(name = "women", data = "women", xcol = "height", ycol = "weight",
       transform = "none", model = "weight ~ height",
       cite = "The World Almanac and Book of Facts, 1975"),
  list(name = "faithful", data = "faithful", xcol = "eruptions",
       ycol = "waiting", transform = "none", model = "waiting ~ eruptions",
       cite = "W. H\u00e4rdle; H\u00e4rdle, W. (1991) Smoothing Techniques with Implementation in S. New York: Springer"),
  list(name = "trees", data = "trees", xcol = "Girth", ycol = "Volume",
       transform = "none", model = "Volume ~ Girth",
       cite = "Ryan, T. A., Joiner, B. L. and Ryan, B. F. (1976) The Minitab Student Handbook. Duxbury Press"),
  list(name = "trees_loglog", data = "trees", xcol = "Girth", ycol = "Volume",
       transform = "log-log", model = "log(Volume) ~ log(Girth)",
       cite = "Ryan, T. A., Joiner, B. L. and Ryan, B. F. (1976) The Minitab Student Handbook. Duxbury Press"),
  list(name = "pressure_logy", data = "pressure", xcol = "temperature",
       ycol = "pressure", transform = "log-y",
       model = "log(pressure) ~ temperature",
       cite = "Weast, R. C., ed. (1973) Handbook of Chemistry and Physics. CRC Press"),
  list(name = "anscombe1", data = "anscombe", xcol = "x1", ycol = "y1",
       transform = "none", model = "y1 ~ x1",
       cite = "Anscombe, Francis J. (1973) Graphs in statistical analysis. The American Statistician, 27, 17-21; R's copy from Tufte, E. R. (1989) The Visual Display of Quantitative Information, 13-14. Graphics Press"),
  list(name = "anscombe2", data = "anscombe", xcol = "x2", ycol = "y2",
       transform = "none", model = "y2 ~ x2",
       cite = "Anscombe, Francis J. (1973) Graphs in statistical analysis. The American Statistician, 27, 17-21; R's copy from Tufte, E. R. (1989) The Visual Display of Quantitative Information, 13-14. Graphics Press"),
  list(name = "anscombe3", data = "anscombe", xcol = "x3", ycol = "y3",
       transform = "none", model = "y3 ~ x3",
       cite = "Anscombe, Francis J. (1973) Graphs in statistical analysis. The American Statistician, 27, 17-21; R's copy from Tufte, E. R. (1989) The Visual Display of Quantitative Information, 13-14. Graphics Press"),
  list(name = "anscombe4", data = "anscombe", xcol = "x4", ycol = "y4",
       transform = "none", model = "y4 ~ x4",
       cite = "Anscombe, Francis J. (1973) Graphs in statistical analysis. The American Statistician, 27, 17-21; R's copy from Tufte, E. R. (1989) The Visual Display of Quantitative Information, 13-14. Graphics Press"),
  list(name = "stackloss", data = "stackloss", xcol = "Air.Flow",
       ycol = "stack.loss", transform = "none", model = "stack.loss ~ Air.Flow",
       cite = "Brownlee, K. A. (1960, 2nd ed. 1965) Statistical Theory and Methodology in Science and Engineering. New York: Wiley. pp. 491-500"),
  list(name = "lifecyclesavings", data = "LifeCycleSavings", xcol = "ddpi",
       ycol = "sr", transform = "none", model = "sr ~ ddpi",
       cite = "Belsley, D. A., Kuh, E. and Welsch, R. E. (1980) Regression Diagnostics. New York: Wiley, who obtained the data from Sterling, Arnie (1977) Unpublished BS Thesis, Massachusetts Institute of Technology"),
  list(name = "bod", data = "BOD", xcol = "Time", ycol = "demand",
       transform = "none", model = "demand ~ Time",
       cite = "Bates, D. M. and Watts, D. G. (1988) Nonlinear Regression Analysis and Its Applications, Wiley, Appendix A1.4; originally from Marske (1967) Biochemical Oxygen Demand Data Interpretation Using Sum of Squares Surface, M.Sc. Thesis, University of Wisconsin - Madison")
)

# ---- one fixture -----------------------------------------------------------

make_fixture <- function(spec) {
  df <- get(spec$data, envir = asNamespace("datasets"))
  raw_x <- as.numeric(df[[spec$xcol]])
  raw_y <- as.numeric(df[[spec$ycol]])
  x <- switch(spec$transform, "none" = raw_x, "log-y" = raw_x,
              "log-x" = log(raw_x), "log-log" = log(raw_x))
  y <- switch(spec$transform, "none" = raw_y, "log-x" = raw_y,
              "log-y" = log(raw_y), "log-log" = log(raw_y))
  n <- length(x)

  fit <- lm(y ~ x)
  s <- summary(fit)
  co <- s$coefficients
  ci <- confint(fit, level = 0.95)
  im <- influence.measures(fit)$infmat
  stopifnot(identical(colnames(im),
                      c("dfb.1_", "dfb.x", "dffit", "cov.r", "cook.d", "hat")))
  rstd <- rstandard(fit)
  rstu <- rstudent(fit)

  # Durbin-Watson on residuals ordered by x; ties keep the original row order.
  e <- unname(residuals(fit))
  ord <- order(x, seq_len(n))
  dw <- sum(diff(e[ord])^2) / sum(e^2)

  fit_json <- json_obj(
    c("n", "intercept", "slope", "intercept_se", "slope_se", "slope_t",
      "slope_p", "slope_ci_low", "slope_ci_high", "r_squared", "residual_sd",
      "df"),
    c(json_int(n), json_num(co[1, 1]), json_num(co[2, 1]), json_num(co[1, 2]),
      json_num(co[2, 2]), json_num(co[2, 3]), json_num(co[2, 4]),
      json_num(ci[2, 1]), json_num(ci[2, 2]), json_num(s$r.squared),
      json_num(s$sigma), json_int(fit$df.residual))
  )
  point_json <- vapply(seq_len(n), function(i) {
    json_obj(
      c("leverage", "standardized_residual", "studentized_residual",
        "cooks_distance", "dffits", "dfbetas_intercept", "dfbetas_slope",
        "covariance_ratio"),
      c(json_num(im[i, "hat"]), json_num(rstd[[i]]), json_num(rstu[[i]]),
        json_num(im[i, "cook.d"]), json_num(im[i, "dffit"]),
        json_num(im[i, "dfb.1_"]), json_num(im[i, "dfb.x"]),
        json_num(im[i, "cov.r"]))
    )
  }, "")

  source <- sprintf(paste0(
    "R datasets::%s (%s), %s n = %d; R %s stats::lm + summary.lm + ",
    "confint(level = 0.95) + influence.measures + rstandard + rstudent; ",
    "durbin_watson computed in R as sum(diff(e)^2)/sum(e^2) with residuals ",
    "ordered by x (ties in original row order); Debian r-base-core %s"),
    spec$data, spec$cite,
    if (spec$transform == "none") "no transform," else
      sprintf("transform %s (natural logs),", spec$transform),
    n, r_version, deb_version)

  keys <- c("dataset", "source", "model", "transform")
  vals <- c(json_str(spec$name), json_str(source), json_str(spec$model),
            json_str(spec$transform))
  if (spec$transform != "none") {
    keys <- c(keys, "raw_x", "raw_y")
    vals <- c(vals, json_arr(raw_x), json_arr(raw_y))
  }
  keys <- c(keys, "x", "y", "fit", "points", "durbin_watson")
  vals <- c(vals, json_arr(x), json_arr(y), fit_json,
            paste0("[\n  ", paste(point_json, collapse = ",\n  "), "\n ]"),
            json_num(dw))
  text <- paste0("{", paste(paste0(json_str(keys), ": ", vals),
                            collapse = ",\n "), "}\n")

  path <- file.path(out_dir, paste0(spec$name, ".json"))
  con <- file(path, open = "wb", encoding = "UTF-8")
  writeLines(enc2utf8(text), con, sep = "", useBytes = TRUE)
  close(con)

  # Read back and compare every number (jsonlite, if available).
  if (requireNamespace("jsonlite", quietly = TRUE)) {
    back <- jsonlite::fromJSON(path, simplifyVector = TRUE)
    stopifnot(identical(as.numeric(back$x), x),
              identical(as.numeric(back$y), y),
              identical(as.numeric(back$fit$slope), unname(co[2, 1])),
              identical(as.numeric(back$fit$slope_p), unname(co[2, 4])),
              identical(as.numeric(back$durbin_watson), dw))
  }
  n_null <- sum(!is.finite(c(im, rstd, rstu)))
  cat(sprintf("%-18s n = %3d  wrote %s%s\n", spec$name, n,
              file.path("tests", "fixtures", "reference", "r",
                        paste0(spec$name, ".json")),
              if (n_null > 0) sprintf("  (%d non-finite -> null)", n_null) else ""))
}

invisible(lapply(specs, make_fixture))
