# Solve a fixq example from R with httr2 + jsonlite: submit it, follow its
# progress, read the value function and the policy into R arrays (right shape,
# right axis order), read the CSV table, and see how a bad document is refused.
#
# Tested: the fixq test suite runs this exact script against a live server
# (R 4.2, httr2 0.2, jsonlite 1.8), with an API key.
#
#   FIXQ_URL=http://127.0.0.1:8000 FIXQ_KEY=... Rscript r_httr2.R [OUTDIR]
#   or, in a session: Sys.setenv(FIXQ_URL = ..., FIXQ_KEY = ...); source("r_httr2.R")
#
# install.packages(c("httr2", "jsonlite")) if needed. FIXQ_KEY may be unset
# when the server runs with auth off. FIXQ_EXAMPLE picks another bundled
# example (default household_saving). With OUTDIR, the arrays are also
# written there as text in R's own (column-major) order, with their dimensions.
#
# Sending documents from R (jsonlite, which httr2's req_body_json calls):
# * auto_unbox = TRUE writes a length-1 vector as a bare value: 0.5, not [0.5].
#   Where the document needs a list of one element (a per-period param of a
#   one-period horizon, say), wrap it: I(0.5) or list(0.5). fixq also takes a
#   bare string where a list of strings is expected (feasible, tags).
# * NULL is sent as null (httr2's default null = "null"); an empty list() is
#   sent as [] and a named empty list, setNames(list(), character(0)), as {}.
# * NA is sent as the string "NA" unless you pass na = "null" (done below); a
#   fixq document has no missing values, so treat an NA as a bug upstream.
# * jsonlite writes at most 15 significant digits (digits = NA); that is
#   plenty for a model's parameters.
# * Key order never changes what fixq solves; the value array's axis order is
#   in the result's axis_order (older servers: the order of the keys of axes).
#   Build documents from named lists, which keep their order; an environment
#   (or a list sorted by name) loses the order of states and shocks, and with
#   it the axis order you expect.

library(httr2)
library(jsonlite)

# Under a locale that is not UTF-8 (LANG=C: cron, containers, ssh sessions)
# R reads this file's text, and Sys.getenv() and readLines() theirs, as bytes
# of no known encoding, which jsonlite sends as "Z<c3><bc>rich" for "Zürich"
# (seen with R 4.2, jsonlite 1.8). So the session's character type is
# switched to UTF-8 first (this file is UTF-8; so should your own be).
if (!l10n_info()[["UTF-8"]]) {
  for (utf8 in c("C.UTF-8", "en_US.UTF-8")) if (nzchar(suppressWarnings(Sys.setlocale("LC_CTYPE", utf8)))) break
  if (!l10n_info()[["UTF-8"]]) warning("no UTF-8 locale: text outside ASCII will be sent mangled")
}

fixq_url <- Sys.getenv("FIXQ_URL", "http://127.0.0.1:8000")
fixq_key <- Sys.getenv("FIXQ_KEY")
example <- Sys.getenv("FIXQ_EXAMPLE", "household_saving")
outdir <- commandArgs(trailingOnly = TRUE)[1]

fixq_base <- function(path) {
  req <- request(paste0(fixq_url, path))
  if (nzchar(fixq_key)) req <- req_auth_bearer_token(req, fixq_key)
  req
}

fixq_request <- function(path) {
  req <- fixq_base(path)
  # On 4xx/5xx, stop with fixq's own explanation (RFC 9457 problem details);
  # a body that is not JSON (a proxy's error page) is shown as it is.
  req_error(req, body = function(resp) {
    problem <- tryCatch(resp_body_json(resp), error = function(e) list(detail = substr(resp_body_string(resp), 1, 200)))
    c(problem$detail, vapply(problem$errors, function(e) paste0(e$path, ": ", e$message), ""))
  })
}

fixq_get <- function(path) {
  fixq_request(path) |> req_perform() |> resp_body_json(simplifyVector = FALSE)
}

# Waiting rides out a short outage. While Redis restarts, fixq answers 503
# (with Retry-After); while the API restarts, the connection is refused or
# cut. patiently() retries those (and 502/504 from a proxy) for up to
# patience_s seconds, honouring Retry-After; any other error (401, 404, ...)
# stops at once.
patience_s <- 120
transient <- function(e) {
  inherits(e, c("httr2_failed", "fixq_connection", "httr2_http_502", "httr2_http_503", "httr2_http_504"))
}
patiently <- function(action) {
  deadline <- Sys.time() + patience_s
  repeat {
    outcome <- tryCatch(list(value = action()), error = function(e) {
      if (transient(e) && Sys.time() < deadline) e else stop(e)
    })
    if (!inherits(outcome, "error")) return(outcome$value)
    after <- if (is.null(outcome$resp)) NULL else resp_header(outcome$resp, "Retry-After")
    pause <- if (is.null(after)) 1 else as.numeric(after)
    cat("  fixq is unreachable for now (", strsplit(conditionMessage(outcome), "\n")[[1]][1],
        "); trying again in ", pause, " s\n", sep = "")
    Sys.sleep(min(pause, 30))
  }
}

# The result's nested lists are row-major (the last axis varies fastest); R
# fills an array first axis fastest. So: read the leaves in order (a null
# becomes NA), fill an array of the reversed dimensions, and reverse its axes.
# This works for any number of axes. (fromJSON with simplifyVector = TRUE
# builds the same arrays from rectangular lists; doing it by hand shows the
# reshape the CSV columns need too.)
leaves <- function(x) {
  if (!is.list(x)) return(x)
  unlist(lapply(x, function(e) if (is.null(e)) NA else leaves(e)), use.names = FALSE)
}
row_major_array <- function(flat, axes) {
  dims <- lengths(axes)
  stopifnot(length(flat) == prod(dims))
  a <- aperm(array(flat, dim = rev(dims)), rev(seq_along(dims)))
  dimnames(a) <- lapply(axes, as.character)
  a
}

# 1. Start from a bundled example (an invented scenario). simplifyVector =
#    FALSE keeps the document's lists as lists, so it goes back as it came.
document <- fixq_get(paste0("/v1/examples/", example))
if (example == "household_saving") {
  document$label <- "household saving at a 2% interest rate, β = 0.96 (invented scenario)"
  document$model$params$r <- 0.02
}

# 2. Submit (na = "null": see the notes at the top).
job <- fixq_request("/v1/jobs") |>
  req_body_json(document, auto_unbox = TRUE, digits = NA, na = "null") |>
  req_perform() |>
  resp_body_json()
cat("submitted job", job$id, "\n")

# 3. Follow its progress live: the job's log as server-sent events, one
#    "entry" event per iteration, then "end" when the job has finished.
#    (Polling GET /v1/jobs/{id}, whose progress holds the latest iteration,
#    works too; matlab_octave.m does that.) httr2 1.0 renamed req_stream.
#    A stream cut short (the API restarting, or "event: error" while Redis
#    is away) is opened again with Last-Event-ID, the last iteration shown,
#    so the log goes on where it stopped and no iteration is shown twice.
stream <- if (exists("req_perform_stream", asNamespace("httr2"))) httr2::req_perform_stream else httr2::req_stream
pending <- ""
last_seen <- NA
ended <- FALSE
follow <- function(bytes) {
  pending <<- paste0(pending, rawToChar(bytes))
  events <- strsplit(pending, "\n\n")[[1]]
  complete <- endsWith(pending, "\n\n")
  pending <<- if (complete) "" else events[length(events)]
  if (!complete) events <- events[-length(events)]
  for (event in events) {
    lines <- strsplit(event, "\n")[[1]]
    kind <- sub("^event: ", "", grep("^event: ", lines, value = TRUE))
    data <- sub("^data: ", "", grep("^data: ", lines, value = TRUE))
    if (length(data) == 0) next  # a comment line that keeps the connection open
    data <- fromJSON(data)
    if (identical(kind, "entry")) {
      last_seen <<- data$iteration
      cat(sprintf("  iteration %d, error bound %.3g\n", data$iteration, data$error_bound))
    } else if (identical(kind, "end")) {
      ended <<- TRUE
      return(FALSE)  # stop reading: the job has finished
    }
  }
  TRUE
}
open_log <- function() {
  req <- fixq_request(paste0("/v1/jobs/", job$id, "/log")) |> req_headers(Accept = "text/event-stream")
  if (!is.na(last_seen)) req <- req_headers(req, `Last-Event-ID` = last_seen)
  pending <<- ""
  # A connection that fails under the stream is a plain R error: mark it as
  # one patiently() retries (an HTTP error status keeps its own class).
  tryCatch(invisible(stream(req, follow)), error = function(e) {
    if (inherits(e, "httr2_http")) stop(e)
    stop(structure(class = c("fixq_connection", "error", "condition"),
                   list(message = conditionMessage(e), call = NULL)))
  })
}
finished <- FALSE
repeat {
  patiently(open_log)
  if (ended || finished) break
  # The stream ended without "end": open it again, and once more after the
  # job has finished (a finished job's log is sent to its end).
  job <- patiently(function() fixq_get(paste0("/v1/jobs/", job$id)))
  finished <- !(job$state %in% c("queued", "running"))
  if (!finished) Sys.sleep(0.5)
}
job <- patiently(function() fixq_get(paste0("/v1/jobs/", job$id)))
if (job$state != "done") stop("job ", job$id, " ended ", job$state, if (!is.null(job$error)) paste(":", job$error))

# 4. The result. Axes in array order: axis_order when the server states it,
#    else the order of the keys of axes (jsonlite keeps key order).
result <- patiently(function() fixq_get(paste0("/v1/jobs/", job$id, "/result")))
axis_names <- if (is.null(result$axis_order)) names(result$axes) else unlist(result$axis_order)
axes <- lapply(result$axes[axis_names], unlist)
value <- row_major_array(leaves(result$value), axes)
policy <- lapply(result$policy, function(p) row_major_array(leaves(p), axes))
cat(result$status, "after", result$iterations, "iterations, error bound", result$error_bound, "\n")
cat("value array", paste(dim(value), collapse = " x "), "(", paste(axis_names, collapse = " x "), ")\n")
# e.g. for household_saving: value["-1", "1"] is the value at assets = -1, income = 1.
first <- names(policy)[1]
cat("policy", first, "at the first point of every axis:", policy[[first]][1], "\n")
cat("policy", first, "at the last point of every axis:", policy[[first]][length(policy[[first]])], "\n")

# 5. The same solution as one long table (a row per grid point, the last axis
#    varying fastest: expand.grid with its arguments reversed). A column goes
#    back into an array with the same reshape as the nested lists above.
csv <- patiently(function() {
  fixq_request(paste0("/v1/jobs/", job$id, "/result")) |> req_url_query(format = "csv") |> req_perform()
})
table <- read.csv(text = resp_body_string(csv), check.names = FALSE)
print(head(table))
from_csv <- row_major_array(table$value, axes)
cat(sprintf("CSV and JSON values agree: largest difference %.3g\n", max(abs(from_csv - value))))
stopifnot(isTRUE(all.equal(from_csv, value, tolerance = 1e-12)))

# 6. A bad document is refused with 422 and the path of each fault. Here the
#    error is handled instead of stopping: is_error = FALSE keeps the response.
bad <- document
bad$discount <- 1.5
bad$solver$tolerance <- -1
refused <- fixq_base("/v1/jobs") |>
  req_body_json(bad, auto_unbox = TRUE, digits = NA, na = "null") |>
  req_error(is_error = function(resp) FALSE) |>
  req_perform()
problem <- resp_body_json(refused)
cat("the bad document was refused with", resp_status(refused), "\n")
for (fault in problem$errors) cat("  ", fault$path, ": ", substr(fault$message, 1, 60), "...\n", sep = "")

# With OUTDIR: the arrays as text, in R's own order (first axis fastest).
if (!is.na(outdir)) {
  dir.create(outdir, showWarnings = FALSE, recursive = TRUE)
  save_array <- function(a, name) {
    cells <- if (is.numeric(a)) sprintf("%.17g", as.vector(a)) else as.vector(a)
    writeLines(c(paste(dim(a), collapse = " "), paste(names(dimnames(a)), collapse = " "), cells),
               file.path(outdir, paste0(name, ".txt")))
  }
  save_array(value, "value")
  for (name in names(policy)) save_array(policy[[name]], paste0("policy.", name))
  writeLines(job$id, file.path(outdir, "job_id.txt"))
}
