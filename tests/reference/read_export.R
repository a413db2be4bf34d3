# Reads the CSV files `framewarden export` wrote with base R's read.csv, as
# an R user would (an empty field is missing; time_point_text kept as text,
# so "0003" stays "0003"), and writes what R read in a canonical form that
# check_export_r.py compares with the database.
#
# Usage: Rscript read_export.R DIR, where DIR holds <name>.csv for frames,
# objects, alerts, flags and frames_run1. Writes DIR/<name>.r.tsv: a line of
# column names, then one line per row, fields tab-separated: "" for NA,
# "i:<n>" for an integer, "d:<17 significant digits>" for a double,
# "s:<text>" for text (backslash, tab and newline escaped as \\, \t, \n).

dir <- commandArgs(trailingOnly = TRUE)[1]

escape <- function(text) {
  text <- gsub("\\", "\\\\", text, fixed = TRUE)
  text <- gsub("\t", "\\t", text, fixed = TRUE)
  gsub("\n", "\\n", text, fixed = TRUE)
}

canonical <- function(column) {
  out <- if (is.integer(column)) {
    paste0("i:", column)
  } else if (is.double(column)) {
    paste0("d:", sprintf("%.17g", column))
  } else {
    paste0("s:", escape(as.character(column)))
  }
  out[is.na(column)] <- ""
  out
}

for (name in c("frames", "objects", "alerts", "flags", "frames_run1")) {
  table <- read.csv(file.path(dir, paste0(name, ".csv")),
                    na.strings = "", stringsAsFactors = FALSE,
                    check.names = FALSE, encoding = "UTF-8",
                    colClasses = c(time_point_text = "character"))
  lines <- paste(escape(names(table)), collapse = "\t")
  if (nrow(table) > 0) {
    cells <- vapply(table, canonical, character(nrow(table)))
    cells <- matrix(cells, nrow = nrow(table))
    lines <- c(lines, apply(cells, 1, paste, collapse = "\t"))
  }
  writeLines(lines, file.path(dir, paste0(name, ".r.tsv")), useBytes = TRUE)
}
