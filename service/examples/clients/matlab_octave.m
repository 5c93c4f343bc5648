function out = matlab_octave(outdir)
% Solve a fixq example from MATLAB or GNU Octave: submit it, follow its
% progress, read the value function and the policy into arrays (right shape,
% right axis order), read the CSV table, and see how a bad document is refused.
%
% Tested: the fixq test suite runs this exact file under Octave 7 against a
% live server, with an API key. The MATLAB branch (matlab.net.http, R2016b and
% later) sends the same requests but is NOT run here: MATLAB is not installed
% on the test machine.
%
%   setenv('FIXQ_URL', 'http://127.0.0.1:8000'); setenv('FIXQ_KEY', '...');
%   out = matlab_octave();          % or matlab_octave('some/folder')
%   octave-cli --eval "matlab_octave"   (from this folder)
%
% FIXQ_KEY may be left unset when the server runs with auth off; FIXQ_EXAMPLE
% picks another bundled example (default household_saving). With OUTDIR, the
% arrays are also written there as text in MATLAB's own order (first axis
% fastest), with their sizes. OUT holds the job, the result, the arrays and
% the CSV columns.
%
% Why not webwrite: Octave 7's webwrite form-encodes its data and sends a JSON
% text as an empty form body, whatever MediaType says (the API answers 400
% "the request body is empty"), and neither MATLAB's webwrite nor
% Octave's hands back the body of a 422, where fixq lists the faults. So HTTP
% goes through one function, fixq_call: matlab.net.http in MATLAB, and curl
% (7.55 or later, for -H @file; on the PATH on Linux, macOS and Windows 10+)
% in Octave, which has no built-in way to send a JSON body (short of Java,
% which a plain Octave install lacks).
%
% Shapes and jsondecode / jsonencode:
% * jsondecode turns [x] into x, null into [] (NaN inside a numeric array) and
%   drops axes of length 1, so the arrays are rebuilt below from the lengths
%   of the axes, whatever rank jsondecode returned.
% * To send a list of one element, wrap it in a cell: {0.5} encodes as [0.5].
%   fixq also takes a bare string where a list of strings is expected.
%   jsonencode writes [] for an empty value: leave an optional field out
%   (rmfield) instead of sending it empty.
% * Octave 7's jsonencode sends a number smaller than about 1e-15 in size as
%   0 (1.5e-16 becomes 0, 1e-12 stays); fine for a model's parameters and
%   tolerances, but know it.
% * Struct fields keep their order, but key order never changes what fixq
%   solves; the value array's axis order is in the result's axis_order (older
%   servers: the order of the fields of axes). containers.Map sorts its keys.

if nargin < 1, outdir = ''; end
api.url = getenv('FIXQ_URL');
if isempty(api.url), api.url = 'http://127.0.0.1:8000'; end
api.key = getenv('FIXQ_KEY');
api.octave = exist('OCTAVE_VERSION', 'builtin') ~= 0;
api.patience_s = 120;   % how long a GET waits out an outage (see fixq_json)
example = getenv('FIXQ_EXAMPLE');
if isempty(example), example = 'household_saving'; end

% 1. Start from a bundled example (an invented scenario).
doc = fixq_json(api, 'GET', ['/v1/examples/' example]);
if strcmp(example, 'household_saving')
    doc.label = 'household saving at a 2% interest rate (invented scenario)';
    doc.model.params.r = 0.02;
end

% 2. Submit.
job = fixq_json(api, 'POST', '/v1/jobs', jsonencode(doc));
fprintf('submitted job %s\n', job.id);

% 3. Follow its progress until it is no longer queued or running.
seen = 0;
while any(strcmp(job.state, {'queued', 'running'}))
    pause(0.25);
    job = fixq_json(api, 'GET', ['/v1/jobs/' job.id]);
    if isstruct(job.progress) && job.progress.iteration > seen
        seen = job.progress.iteration;
        fprintf('  iteration %d, error bound %.3g\n', seen, job.progress.error_bound);
    end
end
if ~strcmp(job.state, 'done')
    reason = '';
    if isfield(job, 'error') && ischar(job.error), reason = [': ' job.error]; end
    error('fixq:job', 'job %s ended %s%s', job.id, job.state, reason);
end

% 4. The result. Axes in array order: axis_order when the server states it,
%    else the order of the fields of axes.
result = fixq_json(api, 'GET', ['/v1/jobs/' job.id '/result']);
if isfield(result, 'axis_order')
    names = cellstr(result.axis_order)';
else
    names = fieldnames(result.axes)';
end
dims = cellfun(@(name) numel(result.axes.(name)), names);
value = nested_array(result.value, dims);
choices = fieldnames(result.policy)';
policy = struct();
for c = choices
    policy.(c{1}) = nested_array(result.policy.(c{1}), dims);
end
fprintf('%s after %d iterations, error bound %.3g\n', result.status, result.iterations, result.error_bound);
fprintf('value array %s (%s)\n', strjoin(arrayfun(@num2str, dims, 'UniformOutput', false), ' x '), ...
        strjoin(names, ' x '));
% e.g. for household_saving: value(i, j) is the value at assets(i), income(j).
first = policy.(choices{1});
fprintf('policy %s at the first point of every axis: %s\n', choices{1}, shown(first(1)));
fprintf('policy %s at the last point of every axis: %s\n', choices{1}, shown(first(end)));

% 5. The same solution as one long table: a row per grid point, the last
%    axis varying fastest; a column goes back into an array by one reshape.
table = csv_columns(fixq_text(api, 'GET', ['/v1/jobs/' job.id '/result?format=csv']));
fromCsv = row_major(table.value, dims);
fprintf('CSV and JSON values agree: largest difference %.3g\n', max(abs(fromCsv(:) - value(:))));
if max(abs(fromCsv(:) - value(:))) > 1e-12 * max(1, max(abs(value(:))))
    error('fixq:csv', 'the CSV table and the JSON result differ');
end

% 6. A bad document is refused with 422 and the path of each fault.
bad = doc;
bad.discount = 1.5;
bad.solver.tolerance = -1;
[status, text] = fixq_call(api, 'POST', '/v1/jobs', jsonencode(bad));
problem = jsondecode(text);
fprintf('the bad document was refused with %d\n', status);
faults = problem.errors;
if isstruct(faults), faults = num2cell(faults); end   % a cell when the messages differ in fields
for k = 1:numel(faults)
    fprintf('  %s: %s...\n', faults{k}.path, faults{k}.message(1:min(60, end)));
end

out = struct('job', job, 'result', result, 'axis_names', {names}, 'value', value, ...
             'policy', policy, 'table', table);
if ~isempty(outdir)
    if ~exist(outdir, 'dir'), mkdir(outdir); end
    save_array(fullfile(outdir, 'value.txt'), value, dims, names);
    for c = choices
        save_array(fullfile(outdir, ['policy.' c{1} '.txt']), policy.(c{1}), dims, names);
    end
    write_text(fullfile(outdir, 'job_id.txt'), job.id);
end
end


function a = nested_array(v, dims)
% The result's nested lists as an array of size dims (one size per axis).
shape = [dims, ones(1, 2 - numel(dims))];   % reshape wants two sizes at least
if isnumeric(v) || islogical(v)
    % jsondecode put list[i][j][k] at v(i, j, k), leaving out axes of length 1;
    % dropping those moves no element in MATLAB's (column-major) order.
    kept = size(v); kept(kept == 1) = [];
    wanted = dims; wanted(wanted == 1) = [];
    if ~isequal(kept, wanted), error('fixq:shape', 'unexpected shape from jsondecode'); end
    a = reshape(v, shape);
else
    % Strings (a tabular model's action labels) come as nested cells.
    a = row_major(leaves(v), dims);
end
end


function a = row_major(flat, dims)
% A list whose last axis varies fastest (nested JSON lists, the CSV rows) as
% an array of size dims: MATLAB fills the first axis fastest, so fill the
% reversed shape and reverse the axes.
shape = [dims, ones(1, 2 - numel(dims))];
a = reshape(flat(:), fliplr(shape));
a = permute(a, numel(shape):-1:1);
end


function flat = leaves(v)
% The leaves of nested cells in order (depth first), as a cell column.
if ~iscell(v)
    if ischar(v) || isscalar(v), flat = {v}; else, flat = num2cell(v(:)); end
    return
end
flat = cell(0, 1);
for k = 1:numel(v)
    flat = [flat; leaves(v{k})]; %#ok<AGROW>
end
end


function s = shown(x)
if iscell(x), x = x{1}; end
if ischar(x), s = x; else, s = num2str(x, 7); end
end


function columns = csv_columns(text)
% A CSV table (header first) as a struct of columns: numbers where a column
% is all numbers, else cells of strings. Works in MATLAB and Octave alike
% (readtable is MATLAB only). A header that is no MATLAB name, such as a
% taste-shock model's P(action=run), becomes one (P_action_run_), as
% jsondecode does with keys.
lines = regexp(text, '\r?\n', 'split');
lines = lines(~cellfun(@isempty, lines));
header = textscan(lines{1}, '%q', 'Delimiter', ',');
header = matlab.lang.makeValidName(header{1}');
cells = textscan(strjoin(lines(2:end), sprintf('\n')), repmat('%q', 1, numel(header)), 'Delimiter', ',');
columns = struct();
for k = 1:numel(header)
    numbers = str2double(cells{k});
    if any(isnan(numbers) & ~strcmpi(cells{k}, 'nan'))
        columns.(header{k}) = cells{k};
    else
        columns.(header{k}) = numbers;
    end
end
end


function save_array(file, a, dims, names)
if isnumeric(a), cells = arrayfun(@(x) sprintf('%.17g', x), a(:), 'UniformOutput', false); else, cells = a(:); end
write_text(file, strjoin([{num2str(dims)}, {strjoin(names, ' ')}, cells'], sprintf('\n')));
end


function write_text(file, text)
fid = fopen(file, 'w');
fprintf(fid, '%s\n', text);
fclose(fid);
end


function data = fixq_json(api, method, path, body)
% Call fixq and decode its JSON answer (see fixq_text).
if nargin < 4, body = ''; end
data = jsondecode(fixq_text(api, method, path, body));
end


function text = fixq_text(api, method, path, body)
% Call fixq and return its answer's text; on 4xx/5xx, stop with fixq's own
% explanation (RFC 9457 problem details: detail, then each fault's path).
% A GET rides out a short outage: while Redis restarts fixq answers 503, while
% the API restarts the connection is refused or cut; those (and 502/504 from
% a proxy) are tried again, a second apart, for up to api.patience_s seconds.
if nargin < 4, body = ''; end
started = tic;
while true
    try
        [status, text] = fixq_call(api, method, path, body);
        failure = '';
    catch caught
        if ~strcmp(method, 'GET'), rethrow(caught); end
        status = 0;
        failure = caught.message;
    end
    if ~strcmp(method, 'GET') || ~any(status == [0 502 503 504]) || toc(started) > api.patience_s
        break
    end
    if status == 0, reason = failure; else, reason = sprintf('HTTP %d', status); end
    fprintf('  fixq is unreachable for now (%s); trying again in 1 s\n', reason);
    pause(1);
end
if status == 0, error('fixq:unreachable', '%s', failure); end
if status >= 400
    problem = problem_of(status, text);
    message = sprintf('fixq answered %d: %s', status, problem.detail);
    if isfield(problem, 'errors')
        faults = problem.errors;
        if isstruct(faults), faults = num2cell(faults); end
        for k = 1:numel(faults)
            message = sprintf('%s\n  %s: %s', message, faults{k}.path, faults{k}.message);
        end
    end
    error('fixq:problem', '%s', message);
end
end


function problem = problem_of(status, text)
% The problem details of an error answer; a body that is not fixq's JSON (a
% proxy's error page) becomes the detail as it is.
try
    problem = jsondecode(text);
catch
    problem = struct();
end
if ~isstruct(problem) || ~isfield(problem, 'detail')
    problem = struct('detail', sprintf('HTTP %d: %s', status, text(1:min(200, end))));
end
end


function [status, text] = fixq_call(api, method, path, body)
% One HTTP request: its status code and its body as text. A JSON body is
% sent as is (Content-Type: application/json).
if nargin < 4, body = ''; end
if api.octave
    [status, text] = call_with_curl(api, method, path, body);
else
    [status, text] = call_with_matlab(api, method, path, body);
end
end


function [status, text] = call_with_matlab(api, method, path, body)
% MATLAB: matlab.net.http, with the JSON text as the raw payload and the
% answer left unconverted (its text, whatever the status).
fields = {};
if ~isempty(api.key)
    fields{end + 1} = matlab.net.http.field.AuthorizationField('Authorization', ['Bearer ' api.key]);
end
payload = [];
if ~isempty(body)
    fields{end + 1} = matlab.net.http.field.ContentTypeField('application/json');
    payload = matlab.net.http.MessageBody();
    payload.Payload = unicode2native(body, 'UTF-8');
end
header = [fields{:}];                                  % [] when there are none
request = matlab.net.http.RequestMessage(method, header, payload);
options = matlab.net.http.HTTPOptions('ConvertResponse', false, 'ConnectTimeout', 30);
response = send(request, matlab.net.URI([api.url path]), options);
status = double(response.StatusCode);
data = response.Body.Data;
if isempty(data)
    text = '';
elseif isnumeric(data)
    text = native2unicode(reshape(data, 1, []), 'UTF-8');
else
    text = char(data);
end
end


function [status, text] = call_with_curl(api, method, path, body)
% Octave: curl. The key goes in a header file (-H @file), not on the command
% line, where other users of the machine could see it.
answer = [tempname() '.out'];
scratch = {answer};
% A connection that takes over 10 s to open, or an answer that stalls (under
% 1 byte a second for 60 s), fails instead of hanging: fixq_json tries a GET again.
args = sprintf('-sS --connect-timeout 10 --speed-limit 1 --speed-time 60 -X %s -o "%s" -w "%%{http_code}"', ...
               method, answer);
if ~isempty(api.key)
    scratch{end + 1} = [tempname() '.hdr'];
    write_text(scratch{end}, ['Authorization: Bearer ' api.key]);
    args = sprintf('%s -H "@%s"', args, scratch{end});
end
if ~isempty(body)
    scratch{end + 1} = [tempname() '.json'];
    fid = fopen(scratch{end}, 'w');
    fwrite(fid, body);
    fclose(fid);
    args = sprintf('%s -H "Content-Type: application/json" --data-binary "@%s"', args, scratch{end});
end
[failed, code] = system(sprintf('curl %s "%s%s"', args, api.url, path));
text = '';
if exist(answer, 'file'), text = fileread(answer); end
for k = 1:numel(scratch)
    if exist(scratch{k}, 'file'), delete(scratch{k}); end
end
if failed, error('fixq:curl', 'curl could not reach %s (curl exit code %d)', api.url, failed); end
status = str2double(code);
end
