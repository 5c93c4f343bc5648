# Solve a fixq example from Julia with HTTP.jl + JSON3: submit it, follow its
# progress, read the value function and the policy into Julia arrays (right
# shape, right axis order), read the CSV table, and see how a bad document is
# refused.
#
# NOT TESTED HERE: Julia is not installed on the machine that runs fixq's tests.
# The same requests, and the same reshapes, are tested in R (r_httr2.R) and
# Octave (matlab_octave.m); the raw exchange is in curl_lifecycle.sh.
#
#   FIXQ_URL=http://127.0.0.1:8000 FIXQ_KEY=... julia julia_http.jl
#
# ] add HTTP JSON3 OrderedCollections   if needed (DelimitedFiles is a standard
# library). FIXQ_KEY may be unset when auth is off. It starts from
# GET /v1/examples/household_saving; FIXQ_EXAMPLE picks another bundled example.
#
# Key order: copy() of a JSON3 object gives a Dict, which forgets the order
# of the keys. fixq solves the same model whatever the order, but the order
# of `states` and `shocks` is the value array's axis order unless the result
# says otherwise, so `thaw` below makes OrderedDicts, which keep it, and the
# arrays are read in the result's `axis_order`.

using HTTP, JSON3, OrderedCollections, DelimitedFiles

const FIXQ_URL = get(ENV, "FIXQ_URL", "http://127.0.0.1:8000")
const FIXQ_KEY = get(ENV, "FIXQ_KEY", "")
const EXAMPLE = get(ENV, "FIXQ_EXAMPLE", "household_saving")

# (Accept must not list text/csv: the result would then come as the CSV table.)
headers = ["Accept" => "application/json", "Content-Type" => "application/json"]
isempty(FIXQ_KEY) || push!(headers, "Authorization" => "Bearer $FIXQ_KEY")

# One request: its status and its body as text (no exception on 4xx/5xx).
# A GET rides out a short outage, as the R and Octave clients do: while Redis
# restarts fixq answers 503, while the API restarts the connection is refused
# or cut; those (and 502/504 from a proxy) are tried again for up to
# PATIENCE_S seconds, waiting as Retry-After says (1 s when it says nothing).
const PATIENCE_S = 120.0
function call(method, path; body = UInt8[])
    started = time()
    while true
        response = try
            HTTP.request(method, FIXQ_URL * path, headers, body; status_exception = false, retry = false)
        catch err
            # A refused or cut connection (HTTP.jl's ConnectError, RequestError or an IOError); never Ctrl-C.
            (method == "GET" && !(err isa InterruptException) && time() - started < PATIENCE_S) || rethrow()
            println("  fixq is unreachable for now ($(typeof(err))); trying again in 1 s")
            sleep(1)
            continue
        end
        method == "GET" && response.status in (502, 503, 504) && time() - started < PATIENCE_S || return response
        wait_s = something(tryparse(Float64, HTTP.header(response, "Retry-After", "1")), 1.0)
        println("  fixq is unreachable for now (HTTP $(response.status)); trying again in $(wait_s) s")
        sleep(clamp(wait_s, 0.25, 10.0))
    end
end

# The JSON answer; on 4xx/5xx, stop with fixq's explanation (RFC 9457 problem details).
function fixq(method, path; body = UInt8[])
    response = call(method, path; body)
    response.status < 400 && return JSON3.read(response.body)
    problem = JSON3.read(response.body)
    lines = [string(problem.detail); [string(e.path, ": ", e.message) for e in get(problem, :errors, [])]]
    error("fixq answered $(response.status):\n  " * join(lines, "\n  "))
end

# A read-only JSON3 value as editable, order-keeping Julia values.
thaw(x::JSON3.Object) = OrderedDict{String,Any}(String(k) => thaw(v) for (k, v) in pairs(x))
thaw(x::JSON3.Array) = Any[thaw(v) for v in x]
thaw(x) = x

# Nested lists (or CSV rows) are row-major: the last axis varies fastest. Julia
# fills an array first axis fastest, so fill the reversed shape and reverse the
# axes. Any number of axes; a null becomes NaN.
leaves!(out, x::AbstractVector) = (foreach(e -> leaves!(out, e), x); out)
leaves!(out, x) = push!(out, x === nothing ? NaN : x)
function row_major_array(flat::AbstractVector, dims)
    length(flat) == prod(dims) || error("expected $(prod(dims)) values, got $(length(flat))")
    values = all(x -> x isa Real, flat) ? Float64.(flat) : String.(flat)
    a = reshape(values, Tuple(reverse(dims)))
    return length(dims) == 1 ? a : permutedims(a, Tuple(length(dims):-1:1))
end
nested_array(nested, dims) = row_major_array(leaves!(Any[], nested), dims)

# 1. Start from a bundled example (an invented scenario), keeping key order.
document = thaw(fixq("GET", "/v1/examples/$EXAMPLE"))
if EXAMPLE == "household_saving"
    document["label"] = "household saving at a 2% interest rate (invented scenario)"
    document["model"]["params"]["r"] = 0.02
end

# 2. Submit (JSON3 writes every digit of a Float64), 3. follow the progress.
job = fixq("POST", "/v1/jobs"; body = JSON3.write(document))
println("submitted job ", job.id)
seen = 0
while job.state in ("queued", "running")
    sleep(0.25)
    global job = fixq("GET", "/v1/jobs/$(job.id)")
    if job.progress !== nothing && job.progress.iteration > seen
        global seen = job.progress.iteration
        println("  iteration $seen, error bound $(round(job.progress.error_bound; sigdigits = 3))")
    end
end
job.state == "done" || error("job $(job.id) ended $(job.state)")

# 4. The result. Axes in array order: axis_order when the server states it,
#    else the order of the keys of axes (JSON3 keeps it).
result = fixq("GET", "/v1/jobs/$(job.id)/result")
axis_names = haskey(result, :axis_order) ? String.(result.axis_order) : String.(keys(result.axes))
dims = [length(result.axes[Symbol(name)]) for name in axis_names]
value = nested_array(result.value, dims)
policy = OrderedDict(String(c) => nested_array(p, dims) for (c, p) in pairs(result.policy))
println(result.status, " after ", result.iterations, " iterations, error bound ", result.error_bound)
println("value array ", join(size(value), " × "), " (", join(axis_names, " × "), ")")
# e.g. for household_saving: value[i, j] is the value at assets[i], income[j].

# 5. The same solution as one long table (a header, then a row per grid point,
#    the last axis fastest); a column goes back into an array by the same reshape.
table, header = readdlm(IOBuffer(String(call("GET", "/v1/jobs/$(job.id)/result?format=csv").body)), ',';
                        header = true)
from_csv = row_major_array(table[:, findfirst(==("value"), vec(header))], dims)
println("CSV and JSON values agree: largest difference ", maximum(abs.(from_csv .- value)))

# 6. A bad document is refused with 422 and the path of each fault.
bad = deepcopy(document)
bad["discount"] = 1.5
get!(bad, "solver", OrderedDict{String,Any}())["tolerance"] = -1
refused = call("POST", "/v1/jobs"; body = JSON3.write(bad))
println("the bad document was refused with ", refused.status)
for fault in JSON3.read(refused.body).errors
    println("  ", fault.path, ": ", fault.message)
end
