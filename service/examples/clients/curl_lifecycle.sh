#!/usr/bin/env bash
# The whole life of a fixq job with curl (and jq to read JSON).
#
# Tested: the fixq test suite runs this exact script against a live server.
#
#   FIXQ_URL=http://127.0.0.1:8000 FIXQ_KEY=... bash curl_lifecycle.sh [OUTDIR]
#
# Fetches the bundled machine-shop example (an invented scenario), checks it,
# submits it, follows its progress, reads the result as JSON and as a CSV
# table, saves a plot, lists jobs by tag, and cancels a second job.
# FIXQ_KEY may be left unset when the server runs with auth off.
set -euo pipefail

url=${FIXQ_URL:-http://127.0.0.1:8000}
out=${1:-.}
mkdir -p "$out"

auth=()
if [ -n "${FIXQ_KEY:-}" ]; then
    auth=(-H "Authorization: Bearer $FIXQ_KEY")
fi
# --fail-with-body: exit non-zero on 4xx/5xx but still print fixq's problem details.
fixq() { curl -sS --fail-with-body "${auth[@]}" "$@"; }
# A GET that waits out a short outage, up to two minutes: while Redis restarts
# fixq answers 503, while the API restarts the connection is refused or cut
# (curl's --retry would write each 503's body into the output, and never
# retries a cut connection, so the loop is written out).
fixq_get() {
    local body code deadline=$((SECONDS + 120))
    body=$(mktemp)
    while :; do
        code=$(curl -sS "${auth[@]}" -o "$body" -w '%{http_code}' "$@") || code=000
        case $code in
        000 | 502 | 503 | 504) [ $SECONDS -lt $deadline ] || break
            echo "fixq is unreachable for now (HTTP $code); trying again in 1 s" >&2
            sleep 1 ;;
        *) break ;;
        esac
    done
    cat "$body"
    rm -f "$body"
    case $code in 2??) return 0 ;; *) echo "fixq answered $code" >&2; return 22 ;; esac
}

# 1. An example document to start from; edit it as you like.
fixq "$url/v1/examples/machine_replacement" >"$out/problem.json"
jq '.label = "machine shop, base case (invented scenario)" | .tags += ["curl"]' \
    "$out/problem.json" >"$out/problem.edited.json"

# 2. Validate and estimate without queueing anything.
fixq -X POST -H "Content-Type: application/json" --data-binary @"$out/problem.edited.json" \
    "$url/v1/check" | jq -c '{points: .estimate.points, choice_points: .estimate.choice_points}'

# 3. Submit. The Idempotency-Key makes a retried POST return the same job.
job=$(fixq -X POST -H "Content-Type: application/json" -H "Idempotency-Key: machine-shop-base-1" \
    --data-binary @"$out/problem.edited.json" "$url/v1/jobs" | jq -r .id)
echo "submitted job $job"

# 4. Wait: poll the job record (or follow the live log: curl -N -H 'Accept: text/event-stream' .../log).
state=queued
for _ in $(seq 1 240); do
    state=$(fixq_get "$url/v1/jobs/$job" | jq -r .state)
    case $state in queued | running) sleep 0.5 ;; *) break ;; esac
done
echo "job $job is $state"
[ "$state" = done ] || exit 1

# 5. The result: status and error bound, the policy per state, the long CSV table, a plot, the log.
fixq_get "$url/v1/jobs/$job/result" >"$out/result.json"
jq -r '"\(.status): \(.iterations) iterations, error bound \(.error_bound)"' "$out/result.json"
jq -r '[.axes.state_label, .policy.action] | transpose[] | "\(.[0])\t\(.[1])"' "$out/result.json"
fixq_get "$url/v1/jobs/$job/result?format=csv" >"$out/result.csv"
fixq_get "$url/v1/jobs/$job/plots/policy.png" >"$out/policy.png"
fixq_get "$url/v1/jobs/$job/log" | jq -c '.data[-1]'

# 6. Find jobs again by tag.
fixq "$url/v1/jobs?tag=curl" | jq -r '.data[] | "\(.id) \(.state) \(.label)"'

# 7. Cancel a job: a queued or running job stops (a finished one is left as it is).
slow=$(jq '.solver = {"method": "value_iteration", "tolerance": 1e-12, "max_iterations": 100000}' \
    "$out/problem.edited.json" | fixq -X POST -H "Content-Type: application/json" --data-binary @- "$url/v1/jobs" | jq -r .id)
fixq -X DELETE "$url/v1/jobs/$slow" | jq -c '{id, state}'
