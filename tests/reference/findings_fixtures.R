#!/usr/bin/env Rscript
# Reference fixtures for src/findings: the prediction t and p of candidate
# corrections of a suspicious record (causes.rs), and the leverage of a
# high-leverage record after more samples are added (advice.rs), computed
# by R's stats package.
#
# Regenerate from the repository root with:
#   Rscript tests/reference/findings_fixtures.R
#
# Writes tests/fixtures/findings/causes.json and advice.json.
#
# ALL DATA BELOW ARE INVENTED INPUTS: made-up monitoring series (decimal
# years or distances, concentrations) built from a stated line plus a fixed
# deterministic wiggle (a sine, no random numbers), rounded the way a lab
# reports. They are not measurements and come from no publication. Only the
# expected values (fitted values, standard errors, t, p, hat values) are
# R's; nothing here is taken from the Rust code under test. The candidate
# corrections are enumerated here independently, from the rules written in
# the module documentation of src/findings/causes.rs.
#
# Calls used:
#   fit <- lm(Y ~ X)                        (X, Y on the fitted scale)
#   pr  <- predict(fit, data.frame(X = x'), interval = "prediction",
#                  level = 0.95, se.fit = TRUE)
#   se_pred = sqrt(pr$se.fit^2 + pr$residual.scale^2)
#   t = (y' - pr$fit[, "fit"]) / se_pred;  p = 2 * pt(-abs(t), pr$df)
#   leverage_factor v = pr$se.fit^2 / pr$residual.scale^2  (= 1/n + (x'-xbar)^2/Sxx)
#   hatvalues(lm(y ~ x)) on the series with the added samples appended.
#
# Floats are written with 17 significant digits ("%.17g"), which identifies a
# double exactly; every number written is read back and compared.

options(warn = 1)

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
out_dir <- file.path(repo_root, "tests", "fixtures", "findings")
dir.create(out_dir, recursive = TRUE, showWarnings = FALSE)

r_version <- R.version.string

# ---- minimal JSON writer ---------------------------------------------------

json_num <- function(v) {
  stopifnot(length(v) == 1L, is.numeric(v))
  if (!is.finite(v)) stop("non-finite value in a fixture")
  s <- sprintf("%.17g", v)
  if (as.numeric(s) != v) stop("value does not round-trip: ", s)
  s
}
json_int <- function(v) {
  stopifnot(length(v) == 1L, v == round(v))
  sprintf("%d", as.integer(v))
}
json_str <- function(s) {
  if (is.null(s) || (length(s) == 1L && is.na(s))) return("null")
  s <- gsub("\\\\", "\\\\\\\\", s)
  s <- gsub("\"", "\\\\\"", s)
  paste0("\"", s, "\"")
}
json_arr <- function(v) {
  paste0("[", paste(vapply(v, json_num, ""), collapse = ", "), "]")
}
json_obj <- function(keys, values) {
  paste0("{", paste(paste0(json_str(keys), ": ", values), collapse = ", "), "}")
}
json_list <- function(items, sep = ",\n    ") {
  paste0("[", paste(items, collapse = sep), "]")
}

# ---- shared ----------------------------------------------------------------

# The deterministic wiggle used as "noise" in the invented series.
wiggle <- function(n, amp, phase) amp * sin(1.7 * seq_len(n) + phase)

fx <- function(transform, x) if (transform %in% c("log-x", "log-log")) log(x) else x
fy <- function(transform, y) if (transform %in% c("log-y", "log-log")) log(y) else y

# ---- causes ----------------------------------------------------------------

# Prediction of y' at x' from the fit of (x, y), all on the fitted scale.
# Returns NULL when (x', y') cannot be put on the fitted scale.
judge <- function(series, transform, xc, yc) {
  if (transform %in% c("log-x", "log-log") && xc <= 0) return(NULL)
  if (transform %in% c("log-y", "log-log") && yc <= 0) return(NULL)
  d <- data.frame(X = fx(transform, series$x), Y = fy(transform, series$y))
  fit <- lm(Y ~ X, data = d)
  pr <- predict(fit, newdata = data.frame(X = fx(transform, xc)),
                interval = "prediction", level = 0.95, se.fit = TRUE)
  se_pred <- sqrt(pr$se.fit^2 + pr$residual.scale^2)
  t <- (fy(transform, yc) - pr$fit[1, "fit"]) / se_pred
  list(fit = unname(pr$fit[1, "fit"]), lwr = unname(pr$fit[1, "lwr"]),
       upr = unname(pr$fit[1, "upr"]), se_fit = unname(pr$se.fit),
       residual_scale = pr$residual.scale, df = pr$df, se_pred = unname(se_pred),
       t = unname(t), p = unname(2 * pt(-abs(t), pr$df)),
       leverage_factor = unname(pr$se.fit^2 / pr$residual.scale^2))
}

scale10 <- function(v, k) if (k >= 0) v * 10^k else v / 10^(-k)

# Adjacent, different digits swapped in the text, everything else in place.
# (Only plain decimal texts are used below, so as.numeric reads them.)
swaps <- function(raw) {
  ch <- strsplit(raw, "")[[1]]
  pos <- which(grepl("[0-9]", ch))
  out <- character(0)
  for (w in seq_len(length(pos) - 1L)) {
    a <- pos[w]
    b <- pos[w + 1L]
    if (ch[a] == ch[b]) next
    s <- ch
    s[c(a, b)] <- ch[c(b, a)]
    out <- c(out, paste(s, collapse = ""))
  }
  out
}

# Candidates in the order causes.rs documents: decimal slips (10^1, 10^-1,
# 10^2, 10^-2, 10^3, 10^-3 minus the unit steps), unit steps (in the order
# given), sign, y digit swaps, x digit swaps, then x decimal slips (x10, /10)
# for a distance or wrong years (-1, +1, -10, +10) for a decimal year, then
# other series. `unit_steps` lists the powers of ten the series' unit has a
# neighbour for (read off the unit table by hand for each case).
enumerate <- function(cs) {
  r <- cs$record
  out <- list()
  add <- function(kind, xc, yc, series = NA) {
    out[[length(out) + 1L]] <<- list(kind = kind, x = xc, y = yc, series = series)
  }
  for (k in setdiff(c(1, -1, 2, -2, 3, -3), cs$unit_steps)) add("decimal_slip", r$x, scale10(r$y, k))
  for (k in cs$unit_steps) add("unit", r$x, scale10(r$y, k))
  add("sign", r$x, -r$y)
  for (s in swaps(r$y_raw)) add("swap_y", r$x, as.numeric(s))
  for (s in swaps(r$x_raw)) add("swap_x", as.numeric(s), r$y)
  if (cs$x_kind == "decimal-year") {
    for (dy in c(-1, 1, -10, 10)) add("wrong_year", r$x + dy, r$y)
  } else {
    for (k in c(1, -1)) add("decimal_slip_x", scale10(r$x, k), r$y)
  }
  for (o in cs$others) add("other_series", r$x, r$y, o$name)
  # A candidate equal to the record as written is dropped.
  keep <- vapply(out, function(c) !(c$kind != "other_series" && c$x == r$x && c$y == r$y), TRUE)
  out[keep]
}

moves_x <- c("swap_x", "decimal_slip_x", "wrong_year", "other_series")

run_cause_case <- function(cs) {
  r <- cs$record
  as_written <- judge(cs$series, cs$transform, r$x, r$y)
  cands <- enumerate(cs)
  scored <- list()
  off_scale <- 0L
  for (c in cands) {
    series <- if (c$kind == "other_series") {
      Filter(function(o) o$name == c$series, cs$others)[[1]]
    } else {
      cs$series
    }
    j <- judge(series, cs$transform, c$x, c$y)
    if (is.null(j)) {
      off_scale <- off_scale + 1L
    } else {
      scored[[length(scored) + 1L]] <- c(c, j)
    }
  }
  needed <- if (is.null(as_written)) 0.05 else max(0.05, 20 * as_written$p)
  p <- vapply(scored, `[[`, 0, "p")
  v <- vapply(scored, `[[`, 0, "leverage_factor")
  kinds <- vapply(scored, `[[`, "", "kind")
  ok <- p >= needed & (!(kinds %in% moves_x) | v <= 1)
  idx <- which(ok)
  idx <- idx[order(-p[idx], idx)]
  idx <- head(idx, cs$max)
  list(as_written = as_written, scored = scored, off_scale = off_scale,
       needed = needed, ranked = scored[idx])
}

pred_json <- function(j) {
  keys <- c("fit", "lwr", "upr", "se_fit", "residual_scale", "df", "se_pred",
            "t", "p", "leverage_factor")
  vals <- c(json_num(j$fit), json_num(j$lwr), json_num(j$upr), json_num(j$se_fit),
            json_num(j$residual_scale), json_int(j$df), json_num(j$se_pred),
            json_num(j$t), json_num(j$p), json_num(j$leverage_factor))
  json_obj(keys, vals)
}
cand_json <- function(c, with_pred) {
  keys <- c("kind", "series", "x", "y")
  vals <- c(json_str(c$kind), json_str(c$series), json_num(c$x), json_num(c$y))
  if (with_pred) {
    keys <- c(keys, "prediction")
    vals <- c(vals, pred_json(c))
  }
  json_obj(keys, vals)
}
series_json <- function(s) json_obj(c("x", "y"), c(json_arr(s$x), json_arr(s$y)))

# Invented series (see the header): quarterly decimal years.
quarters <- function(from, n) from + 0.25 * (0:(n - 1))

s_slow_rise <- local({
  x <- quarters(2019, 20)
  list(x = x, y = round(4.00 + 0.15 * (x - 2019) + wiggle(20, 0.04, 0.3), 2))
})

cause_cases <- list(
  # Value typed ten times too large: 47.3 where about 4.75 was expected.
  list(name = "decimal_slip", expect_first = "decimal_slip", transform = "none",
       x_kind = "decimal-year", unit = "mg/L", unit_steps = c(-3, 3, -6), max = 3L,
       series = s_slow_rise, others = list(),
       record = list(x = 2024.0, y = 47.3, x_raw = "2024.0", y_raw = "47.3")),
  # Two digits transposed: "1.44" typed for 4.14 (ln y fitted).
  list(name = "digit_swap", expect_first = "swap_y", transform = "log-y",
       x_kind = "decimal-year", unit = "µg/L", unit_steps = c(-3, 3, 6), max = 3L,
       series = local({
         x <- 2016 + 0.5 * (0:14)
         list(x = x, y = round(5.0 * exp(-0.025 * (x - 2016)) * exp(wiggle(15, 0.015, 1.1)), 3))
       }),
       others = list(),
       record = list(x = 2023.5, y = 1.44, x_raw = "2023.5", y_raw = "1.44")),
  # Minus sign typed: -10.9 where about 10.8 was expected (y on ln distance).
  list(name = "sign", expect_first = "sign", transform = "log-x",
       x_kind = "distance", unit = "mg/kg", unit_steps = c(-3, 3, -6), max = 3L,
       series = local({
         d <- c(5, 10, 15, 20, 25, 30, 40, 45, 50, 60)
         list(x = d, y = round(25 - 4 * log(d) + wiggle(10, 0.2, 0.7), 2))
       }),
       others = list(),
       record = list(x = 35, y = -10.9, x_raw = "35", y_raw = "-10.9")),
  # The value fits another well's trend (B), not its own (A) or C's.
  list(name = "other_series", expect_first = "other_series", transform = "none",
       x_kind = "decimal-year", unit = "µg/L", unit_steps = c(-3, 3, 6), max = 3L,
       series = local({
         x <- quarters(2020, 14)
         list(x = x, y = round(8 + 0.5 * (x - 2020) + wiggle(14, 0.15, 0.2), 2))
       }),
       others = list(
         local({
           x <- quarters(2020, 13)
           list(name = "MW-B", x = x, y = round(2.0 + 0.05 * (x - 2020) + wiggle(13, 0.05, 2.0), 2))
         }),
         local({
           x <- quarters(2019.5, 16)
           list(name = "MW-C", x = x, y = round(30 - 1.0 * (x - 2019.5) + wiggle(16, 0.4, 0.9), 1))
         })),
       record = list(x = 2023.5, y = 2.13, x_raw = "2023.5", y_raw = "2.13")),
  # A record that fits: nothing to propose.
  list(name = "clean", expect_first = NA, transform = "none",
       x_kind = "decimal-year", unit = "mg/L", unit_steps = c(-3, 3, -6), max = 3L,
       series = s_slow_rise, others = list(),
       record = list(x = 2024.0, y = 4.77, x_raw = "2024.0", y_raw = "4.77")),
  # 62.1 entered for a series kept in mg/L: a µg/L value (0.0621 mg/L).
  list(name = "unit_mixup", expect_first = "unit", transform = "none",
       x_kind = "decimal-year", unit = "mg/L", unit_steps = c(-3, 3, -6), max = 3L,
       series = local({
         x <- 2018 + 0.5 * (0:11)
         list(x = x, y = round(0.050 + 0.002 * (x - 2018) + wiggle(12, 0.001, 0.5), 4))
       }),
       others = list(),
       record = list(x = 2024.0, y = 62.1, x_raw = "2024.0", y_raw = "62.1")),
  # Dated a year early: the value belongs to 2019.5 on a steep trend.
  list(name = "wrong_year", expect_first = "wrong_year", transform = "none",
       x_kind = "decimal-year", unit = NA, unit_steps = c(-3, 3), max = 3L,
       series = local({
         x <- quarters(2015, 20)
         list(x = x, y = round(10 + 2.0 * (x - 2015) + wiggle(20, 0.1, 1.4), 2))
       }),
       others = list(),
       record = list(x = 2018.5, y = 19.04, x_raw = "2018.5", y_raw = "19.04")),
  # "40" for about 4.0: 40 / 10 and the swap "04" give the same value (a tie).
  list(name = "tie", expect_first = "decimal_slip", transform = "none",
       x_kind = "decimal-year", unit = "mg/L", unit_steps = c(-3, 3, -6), max = 3L,
       series = local({
         x <- quarters(2019, 12)
         list(x = x, y = round(4.0 + wiggle(12, 0.08, 0.1), 2))
       }),
       others = list(),
       record = list(x = 2021.0, y = 40, x_raw = "2021.0", y_raw = "40")),
  # Flat trend, y too high: x / 10 far outside the surveyed distances would
  # "fit" only because the prediction interval is wide there; not listed.
  list(name = "far_x_guard", expect_first = NA, transform = "none",
       x_kind = "distance", unit = "mg/L", unit_steps = c(-3, 3, -6), max = 3L,
       series = local({
         d <- seq(10, 60, by = 5)
         list(x = d, y = round(5.0 + wiggle(11, 0.08, 0.6), 2))
       }),
       others = list(),
       record = list(x = 30, y = 5.6, x_raw = "30", y_raw = "5.6"))
)

cause_json <- vapply(cause_cases, function(cs) {
  res <- run_cause_case(cs)
  others <- json_list(vapply(cs$others, function(o) {
    json_obj(c("name", "x", "y"), c(json_str(o$name), json_arr(o$x), json_arr(o$y)))
  }, ""), sep = ", ")
  if (length(cs$others) == 0L) others <- "[]"
  rec <- cs$record
  json_obj(
    c("name", "expect_first", "transform", "x_kind", "unit", "level", "max",
      "series", "others", "record", "as_written", "candidates", "off_scale",
      "needed_p", "ranked"),
    c(json_str(cs$name), json_str(cs$expect_first), json_str(cs$transform),
      json_str(cs$x_kind), json_str(cs$unit), json_num(0.95), json_int(cs$max),
      series_json(cs$series), others,
      json_obj(c("x", "y", "x_raw", "y_raw"),
               c(json_num(rec$x), json_num(rec$y), json_str(rec$x_raw), json_str(rec$y_raw))),
      if (is.null(res$as_written)) "null" else pred_json(res$as_written),
      json_list(vapply(res$scored, cand_json, "", with_pred = TRUE), sep = ",\n      "),
      json_int(res$off_scale), json_num(res$needed),
      if (length(res$ranked) == 0L) "[]" else
        json_list(vapply(res$ranked, cand_json, "", with_pred = FALSE), sep = ", "))
  )
}, "")

cause_source <- paste0(
  "Invented series (tests/reference/findings_fixtures.R); expected values from ",
  r_version, " stats: lm, predict.lm(interval = \"prediction\", level = 0.95, se.fit = TRUE), pt. ",
  "se_pred = sqrt(se.fit^2 + residual.scale^2); t = (y' - fit) / se_pred; p = 2*pt(-abs(t), df); ",
  "leverage_factor = se.fit^2 / residual.scale^2. Candidates enumerated in R from the rules of ",
  "src/findings/causes.rs; ranked: p >= max(0.05, 20 * p_as_written), moved-x candidates need ",
  "leverage_factor <= 1, sorted by p, first `max`.")
cause_text <- paste0("{\"source\": ", json_str(cause_source), ",\n \"cases\": [\n  ",
                     paste(cause_json, collapse = ",\n  "), "\n]}\n")
cause_path <- file.path(out_dir, "causes.json")
con <- file(cause_path, open = "wb")
writeLines(enc2utf8(cause_text), con, sep = "", useBytes = TRUE)
close(con)

# ---- advice ----------------------------------------------------------------

# hat value of row `rec` of lm(y ~ X), X on the fitted scale. y does not
# enter the hat matrix; an invented y keeps lm happy.
hat_at <- function(x, rec, transform) {
  X <- fx(transform, x)
  y <- seq_along(x) %% 3
  unname(hatvalues(lm(y ~ X))[rec])
}

run_advice_case <- function(cs) {
  x <- cs$x
  rec <- cs$record + 1L # JSON is 0-based
  n <- length(x)
  x0 <- x[rec]
  k <- cs$multiplier
  cut <- function(N) k * 2 / N
  h0 <- hat_at(x, rec, cs$transform)
  stopifnot(h0 > cut(n))
  others <- x[-rec]
  edge <- if (fx(cs$transform, x0) >= mean(fx(cs$transform, x))) max(others[others < x0]) else min(others[others > x0])
  h_rep <- function(m) hat_at(c(x, rep(x0, m)), rec, cs$transform)
  h_fill <- function(m) {
    a <- fx(cs$transform, edge)
    b <- fx(cs$transform, x0)
    inner <- seq(a, b, length.out = m + 2L)[2:(m + 1L)]
    added <- if (cs$transform %in% c("log-x", "log-log")) exp(inner) else inner
    hat_at(c(x, added), rec, cs$transform)
  }
  first <- function(h) {
    for (m in seq_len(cs$bound)) if (h(m) <= cut(n + m)) return(m)
    NA
  }
  reps <- first(h_rep)
  fill <- first(h_fill)
  top <- min(max(c(reps, fill, 5), na.rm = TRUE) + 2L, cs$bound)
  rows <- vapply(seq_len(top), function(m) {
    json_obj(c("m", "h_replicates", "h_fill", "cutoff"),
             c(json_int(m), json_num(h_rep(m)), json_num(h_fill(m)), json_num(cut(n + m))))
  }, "")
  json_obj(
    c("name", "transform", "x", "record", "multiplier", "bound", "leverage",
      "cutoff", "edge", "replicates", "fill_gap", "table"),
    c(json_str(cs$name), json_str(cs$transform), json_arr(x), json_int(cs$record),
      json_num(k), json_int(cs$bound), json_num(h0), json_num(cut(n)), json_num(edge),
      if (is.na(reps)) "null" else json_int(reps),
      if (is.na(fill)) "null" else json_int(fill),
      json_list(rows, sep = ",\n      "))
  )
}

late <- c(quarters(2020, 16), 2031.5)
advice_cases <- list(
  # Quarterly 2020-2023, then one sample in mid-2031.
  list(name = "late_sample_2pn", transform = "none", x = late, record = 16L,
       multiplier = 2, bound = 300L),
  list(name = "late_sample_3pn", transform = "none", x = late, record = 16L,
       multiplier = 3, bound = 300L),
  # A distance survey (ln distance fitted) with one well close to the source.
  list(name = "near_source_logx", transform = "log-x",
       x = c(50, 60, 80, 100, 120, 150, 200, 250, 2), record = 8L,
       multiplier = 2, bound = 300L),
  # Irregular dates, one early record far before the rest (low side).
  list(name = "early_record_uneven", transform = "none",
       x = c(2005.25, 2016.0, 2016.4, 2017.1, 2017.3, 2018.0, 2018.9, 2019.5, 2020.2, 2021.0),
       record = 0L, multiplier = 2, bound = 300L)
)

advice_source <- paste0(
  "Invented x values (tests/reference/findings_fixtures.R); expected values from ",
  r_version, " stats: hatvalues(lm(y ~ X)) with X on the fitted scale, on the series with m ",
  "samples appended at the record's x (h_replicates) or at seq(edge, x0, length.out = m + 2) ",
  "without its ends, on the fitted scale (h_fill); replicates / fill_gap: smallest m <= bound ",
  "with h <= multiplier * 2 / (n + m), by trying m = 1, 2, ...; null if none.")
advice_json <- vapply(advice_cases, run_advice_case, "")
advice_text <- paste0("{\"source\": ", json_str(advice_source), ",\n \"cases\": [\n  ",
                      paste(advice_json, collapse = ",\n  "), "\n]}\n")
advice_path <- file.path(out_dir, "advice.json")
con <- file(advice_path, open = "wb")
writeLines(enc2utf8(advice_text), con, sep = "", useBytes = TRUE)
close(con)

# ---- read back -------------------------------------------------------------

back <- jsonlite::fromJSON(cause_path, simplifyVector = FALSE)
stopifnot(length(back$cases) == length(cause_cases))
for (i in seq_along(cause_cases)) {
  res <- run_cause_case(cause_cases[[i]])
  got <- back$cases[[i]]$candidates
  stopifnot(length(got) == length(res$scored))
  for (j in seq_along(got)) {
    # jsonlite reads whole numbers as integers: compare as doubles.
    stopifnot(identical(as.numeric(got[[j]]$prediction$t), res$scored[[j]]$t),
              identical(as.numeric(got[[j]]$prediction$p), res$scored[[j]]$p),
              identical(as.numeric(got[[j]]$x), res$scored[[j]]$x),
              identical(as.numeric(got[[j]]$y), res$scored[[j]]$y))
  }
}
back <- jsonlite::fromJSON(advice_path, simplifyVector = FALSE)
stopifnot(length(back$cases) == length(advice_cases))
for (cs in back$cases) {
  for (row in cs$table) stopifnot(is.numeric(row$h_replicates), is.numeric(row$h_fill))
}

for (cs in cause_cases) {
  res <- run_cause_case(cs)
  guarded <- Filter(function(c) c$kind %in% moves_x && c$p >= res$needed && c$leverage_factor > 1, res$scored)
  cat(sprintf("%-14s p0=%-10.3g scored=%2d off=%d guarded=%d listed: %s\n", cs$name,
              if (is.null(res$as_written)) NA else res$as_written$p,
              length(res$scored), res$off_scale, length(guarded),
              paste(vapply(res$ranked, function(c) sprintf("%s(%g,%g p=%.3g)", c$kind, c$x, c$y, c$p), ""),
                    collapse = "; ")))
}
for (cs in back$cases) {
  cat(sprintf("%-20s h=%.4f cut=%.4f edge=%g replicates=%s fill=%s\n", cs$name, cs$leverage,
              cs$cutoff, cs$edge, format(cs$replicates), format(cs$fill_gap)))
}
cat("wrote", cause_path, "and", advice_path, "\n")
