% Solve a fixq example from MATLAB with webread/webwrite, and read the
% policy into a matrix and a table.
%
% NOT TESTED HERE: MATLAB is not installed on the machine that runs fixq's tests.
% The same steps are tested in Python (python_httpx.py) and with curl.
%
%   setenv('FIXQ_URL', 'http://127.0.0.1:8000'); setenv('FIXQ_KEY', '...');
%   matlab_webwrite
%
% FIXQ_KEY may be left unset when the server runs with auth off.

url = getenv('FIXQ_URL');
if isempty(url), url = 'http://127.0.0.1:8000'; end
key = getenv('FIXQ_KEY');

% Read the document as text and decode it ourselves, so that jsonencode
% writes it back with the same shape.
textOptions = weboptions('ContentType', 'text', 'Timeout', 30);
jsonOptions = weboptions('ContentType', 'json', 'MediaType', 'application/json', 'Timeout', 30);
if ~isempty(key)
    textOptions.HeaderFields = {'Authorization', ['Bearer ' key]};
    jsonOptions.HeaderFields = {'Authorization', ['Bearer ' key]};
end

% 1. Start from the bundled household-saving example (an invented scenario).
doc = jsondecode(webread([url '/v1/examples/household_saving'], textOptions));
doc.label = 'household saving at a 2% interest rate (invented scenario)';
doc.model.params.r = 0.02;

% 2. Submit. (On 4xx MATLAB raises an error quoting the status; the same
%    request with curl shows fixq's field-by-field explanation.)
job = webwrite([url '/v1/jobs'], jsonencode(doc), jsonOptions);
fprintf('submitted job %s\n', job.id);

% 3. Wait until the job is no longer queued or running.
while any(strcmp(job.state, {'queued', 'running'}))
    pause(0.5);
    job = webread([url '/v1/jobs/' job.id], jsonOptions);
end
if ~strcmp(job.state, 'done'), error('job %s ended %s', job.id, job.state); end

% 4. The result. jsondecode turns the nested policy lists into a matrix:
%    rows follow the first axis (assets), columns the second (income).
result = webread([url '/v1/jobs/' job.id '/result'], jsonOptions);
assets = result.axes.assets;
income = result.axes.income;
savingRule = result.policy.assets_next;            % numel(assets) x numel(income)
fprintf('%s after %d iterations, error bound %.3g\n', result.status, result.iterations, result.error_bound);

T = array2table(savingRule, 'VariableNames', compose('income_%d', 1:numel(income)));
T = addvars(T, assets, 'Before', 1);
disp(T(round(linspace(1, numel(assets), 8)), :));

% The long table (one row per grid point), straight from the server as CSV.
csvFile = [tempname '.csv'];
websave(csvFile, [url '/v1/jobs/' job.id '/result?format=csv'], textOptions);
policyLong = readtable(csvFile);
head(policyLong)
