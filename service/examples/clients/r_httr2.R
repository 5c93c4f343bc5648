# Solve a fixq example from R with httr2 + jsonlite, and read the policy into
# a matrix and a long data frame.
#
# NOT TESTED HERE: R is not installed on the machine that runs fixq's tests.
# The same steps are tested in Python (python_httpx.py) and with curl.
#
#   Sys.setenv(FIXQ_URL = "http://127.0.0.1:8000", FIXQ_KEY = "...")
#   source("r_httr2.R")
#
# install.packages(c("httr2", "jsonlite")) if needed. FIXQ_KEY may be unset
# when the server runs with auth off.

library(httr2)
library(jsonlite)

fixq_url <- Sys.getenv("FIXQ_URL", "http://127.0.0.1:8000")
fixq_key <- Sys.getenv("FIXQ_KEY")

fixq_request <- function(path) {
  req <- request(paste0(fixq_url, path))
  if (nzchar(fixq_key)) req <- req_auth_bearer_token(req, fixq_key)
  # On 4xx/5xx, stop with fixq's own explanation (RFC 9457 problem details).
  req_error(req, body = function(resp) {
    problem <- resp_body_json(resp)
    c(problem$detail, vapply(problem$errors, function(e) paste0(e$path, ": ", e$message), ""))
  })
}

# 1. Start from the bundled household-saving example (an invented scenario).
#    simplifyVector = FALSE keeps the document's lists as lists, so it goes
#    back to the server exactly as it came.
document <- fixq_request("/v1/examples/household_saving") |>
  req_perform() |>
  resp_body_json(simplifyVector = FALSE)
document$label <- "household saving at a 2% interest rate (invented scenario)"
document$model$params$r <- 0.02

# 2. Submit (digits = NA keeps every digit of the numbers).
job <- fixq_request("/v1/jobs") |>
  req_body_json(document, auto_unbox = TRUE, digits = NA) |>
  req_perform() |>
  resp_body_json()
message("submitted job ", job$id)

# 3. Wait until the job is no longer queued or running.
while (job$state %in% c("queued", "running")) {
  Sys.sleep(0.5)
  job <- fixq_request(paste0("/v1/jobs/", job$id)) |> req_perform() |> resp_body_json()
}
if (job$state != "done") stop("job ", job$id, " ended ", job$state)

# 4. The result. With simplifyVector = TRUE the nested policy list becomes a
#    matrix: rows follow the first axis (assets), columns the second (income).
result <- fixq_request(paste0("/v1/jobs/", job$id, "/result")) |>
  req_perform() |>
  resp_body_json(simplifyVector = TRUE)
assets <- result$axes$assets
income <- result$axes$income
saving_rule <- result$policy$assets_next
dimnames(saving_rule) <- list(assets = format(assets, digits = 4), income = format(income, digits = 4))
cat(result$status, "after", result$iterations, "iterations, error bound", result$error_bound, "\n")
print(saving_rule[round(seq(1, length(assets), length.out = 8)), ])

# A long data frame: expand.grid varies its first argument fastest, as
# as.vector() reads a matrix column by column.
policy_long <- data.frame(
  expand.grid(assets = assets, income = income),
  assets_next = as.vector(result$policy$assets_next)
)
head(policy_long)

# The same long table, straight from the server as CSV.
policy_csv <- fixq_request(paste0("/v1/jobs/", job$id, "/result")) |>
  req_url_query(format = "csv") |>
  req_perform() |>
  resp_body_string() |>
  (\(text) read.csv(text = text))()
head(policy_csv)
