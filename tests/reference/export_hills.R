#!/usr/bin/env Rscript
# Exports MASS's `hills` data (record times of 35 Scottish hill races, 1984)
# to tests/fixtures/public/hills.csv for tests/findings.rs, which replays the
# races one file per record and checks that slopewarden flags the record the
# data's documentation calls into question.
#
# Source of the data: R package MASS (Debian package r-cran-mass; the
# version is written into the fixture's provenance note below), dataset
# `hills`. MASS's help page (`help(hills, package = "MASS")`) gives its
# source as A.C. Atkinson (1986) Comment: Aspects of diagnostic regression
# analysis. Statistical Science 1, 397-402, and says: "A.C. Atkinson (1988)
# Transformations unmasked. Technometrics 30, 311-318 'corrects' the time for
# Knock Hill from 78.65 to 18.65. It is unclear if this based on the original
# records." Reference: Venables, W. N. and Ripley, B. D. (2002) Modern
# Applied Statistics with S, 4th edition, Springer.
#
# Regenerate from the repository root with:
#   Rscript tests/reference/export_hills.R
#
# Writes two files:
# - hills.csv: columns race (the row name), dist (miles, on the map), climb
#   (feet), time (record time, minutes), in MASS's row order. The values are
#   written exactly as MASS stores them (at most three decimals; every value
#   is read back and compared).
# - hills_replay.json: R's own numbers for the replay in tests/findings.rs.
#   The races arrive one per file from the longest to the shortest
#   (order(-dist), which keeps MASS's row order among equal distances), and
#   the series is fitted on the log-log scale, log(time) on log(dist). For
#   Knock Hill, as recorded (78.65) and as Atkinson (1988) "corrects" it
#   (18.65), against the races that arrived before it:
#     fit <- lm(log(time) ~ log(dist), before)
#     pr  <- predict(fit, knock, se.fit = TRUE)
#     prediction_t = (log(time) - pr$fit) / sqrt(pr$se.fit^2 + pr$residual.scale^2)
#     cooks_distance = cooks.distance(lm(log(time) ~ log(dist), rbind(before, knock)))
#     outlier_cutoff = qt(1 - 0.001 / 2, df.residual(fit))
#     cooks_cutoff = qf(0.5, 2, nrow(before) + 1 - 2)   (median of F(p, n - p))
#   and the largest |prediction t| and Cook's distance among the races that
#   arrive before it once the series holds 10 points (slopewarden's default
#   findings.min_points), computed the same way.
#   Floats are written with "%.17g" and read back.

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
out_dir <- file.path(repo_root, "tests", "fixtures", "public")
dir.create(out_dir, recursive = TRUE, showWarnings = FALSE)

data("hills", package = "MASS")
stopifnot(nrow(hills) == 35L, identical(names(hills), c("dist", "climb", "time")))

fmt <- function(v) {
  s <- format(v, scientific = FALSE, trim = TRUE, drop0trailing = TRUE, digits = 15)
  if (any(as.numeric(s) != v)) stop("a value does not round-trip: ", paste(s, collapse = " "))
  s
}

out <- data.frame(
  race = rownames(hills),
  dist = vapply(hills$dist, fmt, ""),
  climb = vapply(hills$climb, fmt, ""),
  time = vapply(hills$time, fmt, ""),
  stringsAsFactors = FALSE
)
stopifnot(!any(grepl("[,\"]", out$race)))
path <- file.path(out_dir, "hills.csv")
con <- file(path, open = "wb")
writeLines(c("race,dist,climb,time", paste(out$race, out$dist, out$climb, out$time, sep = ",")),
           con, sep = "\n")
close(con)

back <- read.csv(path, stringsAsFactors = FALSE)
stopifnot(identical(back$race, rownames(hills)),
          all(back$dist == hills$dist), all(back$climb == hills$climb),
          all(back$time == hills$time))
order_desc <- order(-hills$dist)
replay <- hills[order_desc, ]
knock_at <- which(rownames(replay) == "Knock Hill")
stopifnot(knock_at > 20L)

judge <- function(before, newcomer) {
  fit <- lm(log(time) ~ log(dist), before)
  pr <- predict(fit, newcomer, se.fit = TRUE)
  t <- (log(newcomer$time) - pr$fit) / sqrt(pr$se.fit^2 + pr$residual.scale^2)
  with <- rbind(before, newcomer)
  d <- cooks.distance(lm(log(time) ~ log(dist), with))[nrow(with)]
  list(prediction_t = unname(t), cooks_distance = unname(d),
       outlier_cutoff = qt(1 - 0.001 / 2, df.residual(fit)),
       cooks_cutoff = qf(0.5, 2, nrow(with) - 2))
}
before <- replay[seq_len(knock_at - 1L), ]
recorded <- judge(before, replay[knock_at, ])
corrected_row <- replay[knock_at, ]
corrected_row$time <- 18.65
corrected <- judge(before, corrected_row)
clean <- lapply(11:(knock_at - 1L), function(i) judge(replay[seq_len(i - 1L), ], replay[i, ]))
max_t <- max(vapply(clean, function(j) abs(j$prediction_t), 0))
max_d <- max(vapply(clean, function(j) j$cooks_distance, 0))

num <- function(v) {
  s <- sprintf("%.17g", v)
  if (as.numeric(s) != v) stop("value does not round-trip: ", s)
  s
}
obj <- function(j) {
  sprintf("{\"prediction_t\": %s, \"cooks_distance\": %s, \"outlier_cutoff\": %s, \"cooks_cutoff\": %s}",
          num(j$prediction_t), num(j$cooks_distance), num(j$outlier_cutoff), num(j$cooks_cutoff))
}
source_text <- paste0(
  "MASS ", as.character(packageVersion("MASS")), " dataset hills (Debian r-cran-mass), ",
  R.version.string, "; order(-dist); lm(log(time) ~ log(dist)); ",
  "see tests/reference/export_hills.R for the calls")
json <- c(
  "{",
  sprintf("  \"source\": \"%s\",", source_text),
  sprintf("  \"order\": [%s],", paste0("\"", rownames(replay), "\"", collapse = ", ")),
  sprintf("  \"knock_hill_arrives\": %d,", knock_at),
  sprintf("  \"knock_hill_recorded\": %s,", obj(recorded)),
  sprintf("  \"knock_hill_corrected_1865\": %s,", obj(corrected)),
  sprintf("  \"before_knock_hill_max_abs_prediction_t\": %s,", num(max_t)),
  sprintf("  \"before_knock_hill_max_cooks_distance\": %s", num(max_d)),
  "}")
json_path <- file.path(out_dir, "hills_replay.json")
con <- file(json_path, open = "wb")
writeLines(json, con, sep = "\n")
close(con)
if (requireNamespace("jsonlite", quietly = TRUE)) {
  back_json <- jsonlite::fromJSON(json_path)
  stopifnot(identical(back_json$order, rownames(replay)),
            back_json$knock_hill_recorded$prediction_t == recorded$prediction_t,
            back_json$knock_hill_corrected_1865$cooks_distance == corrected$cooks_distance)
}

cat("wrote", path, "with", nrow(back), "races and", json_path, "(Knock Hill arrives", knock_at, "); MASS", as.character(packageVersion("MASS")),
    "on", R.version.string, "\n")
