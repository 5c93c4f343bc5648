# Solve a fixq example from Julia with HTTP.jl + JSON3, and read the policy
# into a Matrix.
#
# NOT TESTED HERE: Julia is not installed on the machine that runs fixq's tests.
# The same steps are tested in Python (python_httpx.py) and with curl.
#
#   FIXQ_URL=http://127.0.0.1:8000 FIXQ_KEY=... julia julia_http.jl
#
# ] add HTTP JSON3   if needed. FIXQ_KEY may be unset when auth is off.

using HTTP, JSON3

const FIXQ_URL = get(ENV, "FIXQ_URL", "http://127.0.0.1:8000")
const FIXQ_KEY = get(ENV, "FIXQ_KEY", "")

headers = ["Accept" => "application/json", "Content-Type" => "application/json"]
isempty(FIXQ_KEY) || push!(headers, "Authorization" => "Bearer $FIXQ_KEY")

# HTTP.jl throws on 4xx/5xx; show fixq's explanation (RFC 9457 problem details).
function fixq(method, path; body = nothing)
    try
        response = HTTP.request(method, FIXQ_URL * path, headers, body === nothing ? UInt8[] : body)
        return JSON3.read(response.body)
    catch err
        err isa HTTP.StatusError || rethrow()
        problem = JSON3.read(err.response.body)
        lines = [string(problem.detail); [string(e.path, ": ", e.message) for e in get(problem, :errors, [])]]
        error("fixq answered $(err.status):\n  " * join(lines, "\n  "))
    end
end

# 1. Start from the bundled household-saving example (an invented scenario).
#    copy() turns the read-only JSON3 object into nested Dicts we can edit.
document = copy(fixq("GET", "/v1/examples/household_saving"))
document[:label] = "household saving at a 2% interest rate (invented scenario)"
document[:model][:params][:r] = 0.02

# 2. Submit, 3. wait.
job = fixq("POST", "/v1/jobs"; body = JSON3.write(document))
println("submitted job ", job.id)
while job.state in ("queued", "running")
    sleep(0.5)
    global job = fixq("GET", "/v1/jobs/$(job.id)")
end
job.state == "done" || error("job $(job.id) ended $(job.state)")

# 4. The result: axes in array-axis order (state variables, then shocks), so
#    policy.assets_next is a vector (over assets) of vectors (over income).
result = fixq("GET", "/v1/jobs/$(job.id)/result")
assets = Float64.(result.axes.assets)
income = Float64.(result.axes.income)
saving_rule = permutedims(reduce(hcat, [Float64.(row) for row in result.policy.assets_next]))
println(result.status, " after ", result.iterations, " iterations, error bound ", result.error_bound)
println("policy matrix ", size(saving_rule), " (assets × income)")
for i in round.(Int, range(1, length(assets); length = 8))
    println(rpad(round(assets[i]; digits = 3), 10), join(rpad.(round.(saving_rule[i, :]; digits = 3), 10)))
end
