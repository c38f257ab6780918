#!/usr/bin/env Rscript
# Reference values for Student t and the standard normal from R's stats
# package (pt, qt, pnorm, qnorm).
#
# Regenerate from the repository root with:
#   Rscript tests/reference/make_dist_fixtures.R
#
# Writes tests/fixtures/reference/r/distributions.json. Deterministic: a fixed
# grid, no data. Floats use 17 significant digits ("%.17g"); each one is read
# back and compared.

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

r_version <- paste(R.version$major, R.version$minor, sep = ".")
deb_version <- local({
  v <- tryCatch(
    system2("dpkg-query", c("-W", shQuote("-f=${Version}"), "r-base-core"),
            stdout = TRUE, stderr = FALSE),
    error = function(e) character(0)
  )
  if (length(v) == 1L && nzchar(v)) v else "unknown"
})

num <- function(v) {
  if (!is.finite(v)) return("null")
  s <- sprintf("%.17g", v)
  if (as.numeric(s) != v) stop("value does not round-trip: ", s)
  s
}
obj <- function(keys, values) {
  paste0("{", paste(paste0("\"", keys, "\": ", values), collapse = ", "), "}")
}
arr <- function(items) paste0("[\n  ", paste(items, collapse = ",\n  "), "\n ]")

t_grid <- c(0, 0.5, 1.96, 2.228, 3, 8, 12, 30, 50)
df_grid <- c(1, 2, 3, 5, 10, 34, 45, 100, 1000, 1e5)
prob_grid <- c(0.9, 0.95, 0.975, 0.995, 0.9995)

t_two_sided <- character(0)
for (df in df_grid) for (t in t_grid) {
  t_two_sided <- c(t_two_sided,
                   obj(c("t", "df", "p_two_sided"),
                       c(num(t), num(df), num(2 * pt(-abs(t), df)))))
}
# The outlier rule's Bonferroni critical values, t(1 - alpha/2k, df), for
# alpha 0.001 and 0.05 and k up to a few hundred records of one series in
# one file, at more df in the range series actually reach.
bonferroni_grid <- 1 - as.vector(outer(c(0.001, 0.05), 2 * c(1, 6, 50, 156, 400), "/"))
t_quantile <- character(0)
for (df in sort(c(df_grid, 4, 7, 250, 998))) for (p in c(prob_grid, bonferroni_grid)) {
  t_quantile <- c(t_quantile,
                  obj(c("prob", "df", "quantile"),
                      c(num(p), num(df), num(qt(p, df)))))
}
normal_quantile <- vapply(prob_grid, function(p) {
  obj(c("prob", "z"), c(num(p), num(qnorm(p))))
}, "")
normal_two_sided <- vapply(t_grid, function(z) {
  obj(c("z", "p_two_sided"), c(num(z), num(2 * pnorm(-abs(z)))))
}, "")

source <- sprintf(paste0(
  "R %s stats: p_two_sided = 2*pt(-abs(t), df); quantile = qt(prob, df); ",
  "z = qnorm(prob); normal p_two_sided = 2*pnorm(-abs(z)); ",
  "Debian r-base-core %s"), r_version, deb_version)

text <- paste0(
  "{\"source\": \"", source, "\",\n",
  " \"t_two_sided\": ", arr(t_two_sided), ",\n",
  " \"t_quantile\": ", arr(t_quantile), ",\n",
  " \"normal_quantile\": ", arr(normal_quantile), ",\n",
  " \"normal_two_sided\": ", arr(normal_two_sided), "}\n")

path <- file.path(out_dir, "distributions.json")
con <- file(path, open = "wb")
writeLines(text, con, sep = "")
close(con)
cat(sprintf("wrote tests/fixtures/reference/r/distributions.json (%d t tail, %d t quantile, %d normal quantile, %d normal tail)\n",
            length(t_two_sided), length(t_quantile), length(normal_quantile),
            length(normal_two_sided)))
