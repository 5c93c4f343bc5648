* Solve a fixq example from Stata by shelling out to curl, and read the
* solution table (CSV) into the dataset in memory.
*
* NOT TESTED HERE: Stata is not installed on the machine that runs fixq's tests.
* The same curl calls are tested in curl_lifecycle.sh.
*
*   FIXQ_URL and FIXQ_KEY come from the environment (FIXQ_KEY may be unset
*   when the server runs with auth off). Then:  do stata_curl.do
*
* curl must be on the PATH, version 7.55.0 (2017) or later, for -H @file,
* which keeps the key off the command line where other users of the machine
* could read it; curl --version shows yours. Windows 10 (since version 1803)
* and 11 ship it as curl.exe; macOS and Linux have it. Stata's shell does not
* see curl's exit status, so the script reads each answer instead: a refused
* request leaves fixq's explanation (problem details, with the path of each
* fault in a bad document) in the file, and the script shows it.
*
* Numbers: Stata reads a CSV's decimals as float (about 7 digits) unless told
* otherwise; the asdouble option of import delimited keeps all 16-17 digits of
* fixq's values. The table has one row per grid point, the last axis varying
* fastest, so a long dataset needs no reshaping at all; reshape wide as below
* when you want one column per value of the last axis.

version 16
clear all

local url : env FIXQ_URL
if "`url'" == "" local url "http://127.0.0.1:8000"
local key : env FIXQ_KEY
tempfile document jobfile headers
local auth ""
if "`key'" != "" {
    file open fh using "`headers'", write text replace
    file write fh "Authorization: Bearer `key'" _n
    file close fh
    local auth `"-H "@`headers'""'
}
local curl `"curl -sS `auth'"'

* 1. The bundled household-saving example (an invented scenario), as is.
shell `curl' -o "`document'" "`url'/v1/examples/household_saving"

* 2. Submit it; fixq answers 202 with the job record, whose "id" we read.
shell `curl' -H "Content-Type: application/json" --data-binary @"`document'" -o "`jobfile'" "`url'/v1/jobs"
file open fh using "`jobfile'", read text
file read fh line
file close fh
if !regexm(`"`macval(line)'"', `""id" *: *"([0-9a-f]+)""') {
    * Problem details: "detail", then "errors", a list of {"path", "message"}.
    display as error `"fixq did not accept the job: `macval(line)'"'
    exit 498
}
local job = regexs(1)
display "submitted job `job'"

* 3. Wait until the job is no longer queued or running.
local state "queued"
forvalues attempt = 1/240 {
    shell `curl' -o "`jobfile'" "`url'/v1/jobs/`job'"
    file open fh using "`jobfile'", read text
    file read fh line
    file close fh
    if regexm(`"`macval(line)'"', `""state" *: *"([a-z]+)""') local state = regexs(1)
    if !inlist("`state'", "queued", "running") continue, break
    sleep 500
}
if "`state'" != "done" {
    display as error "job `job' ended `state'"
    exit 498
}

* 4. The long table: one row per grid point with assets, income, value, assets_next.
*    Fetched again, a second apart for up to two minutes, while fixq is briefly
*    unreachable (Redis or the API restarting: a 503 answer, or no answer at all),
*    as the R and Octave clients do; the table's first line names its columns.
tempfile table
local header ""
forvalues attempt = 1/120 {
    capture erase "`table'"
    shell `curl' -o "`table'" "`url'/v1/jobs/`job'/result?format=csv"
    capture confirm file "`table'"
    if !_rc {
        file open fh using "`table'", read text
        file read fh header
        file close fh
        if regexm(`"`macval(header)'"', "^[a-z_][a-z0-9_]*,") continue, break
    }
    display "fixq is unreachable for now; trying again in 1 s"
    sleep 1000
}
if !regexm(`"`macval(header)'"', "^[a-z_][a-z0-9_]*,") {
    display as error `"fixq did not send the table: `macval(header)'"'
    exit 498
}
import delimited using "`table'", clear asdouble varnames(1)
describe
list in 1/10

* The saving rule as a wide table: one column of next assets per income value.
keep assets income assets_next
egen income_index = group(income)
drop income
reshape wide assets_next, i(assets) j(income_index)
list in 1/10
