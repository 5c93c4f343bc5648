"""The Lua scripts behind every transition of a job, so that each is atomic in Redis.

Writes made on behalf of an execution (``CLAIM`` .. ``FINISH``) do nothing
unless the lease still holds the execution's token; the reaper's
(``REQUEUE_ABANDONED``, ``RESCUE_LOST``) act only on a job whose lease lapsed.
Scripts that change a job's state are prefixed with ``LUA_PRELUDE``.
"""

from __future__ import annotations

__all__ = [
    "CANCEL",
    "CLAIM",
    "CREATE",
    "FINISH",
    "LUA_PRELUDE",
    "RELEASE",
    "RENEW",
    "REQUEUE_ABANDONED",
    "RESCUE_LOST",
    "SAVE_CHECKPOINT",
    "WRITE_LOG",
]

# Every transition script gets the five state sets as KEYS[1..5] (in
# JOB_STATES order) and the job hash as KEYS[6], so that the sets and the
# record's `state` field change together.  `retire` gives a job that reached a
# terminal state its lifetime (job_ttl_s): record, document and log expire.
LUA_PRELUDE = """
local STATE_SET = {queued = 1, running = 2, done = 3, failed = 4, canceled = 5}
local function move(id, from, to)
  if from and STATE_SET[from] then redis.call('SREM', KEYS[STATE_SET[from]], id) end
  redis.call('SADD', KEYS[STATE_SET[to]], id)
  redis.call('HSET', KEYS[6], 'state', to)
end
local function retire(job, doc, log, ttl)
  redis.call('EXPIRE', job, ttl)
  redis.call('EXPIRE', doc, ttl)
  redis.call('EXPIRE', log, ttl)
end
local function is_terminal(state)
  return state == 'done' or state == 'failed' or state == 'canceled'
end
"""

# KEYS 7 doc, 8 jobs, 9 owner jobs, 10 idempotency key, 11 owners.
# ARGV 1 id, 2 score ms, 3 doc blob, 4 idempotency ttl s ('' = none), 5 owner, 6.. field/value pairs.
CREATE = """
if ARGV[4] ~= '' then
  local existing = redis.call('GET', KEYS[10])
  if existing then return existing end
end
if redis.call('EXISTS', KEYS[6]) == 1 then return redis.error_reply('job id collision') end
redis.call('HSET', KEYS[6], unpack(ARGV, 6))
redis.call('SET', KEYS[7], ARGV[3])
redis.call('SADD', KEYS[11], ARGV[5])
redis.call('ZADD', KEYS[8], ARGV[2], ARGV[1])
redis.call('ZADD', KEYS[9], ARGV[2], ARGV[1])
redis.call('SADD', KEYS[1], ARGV[1])
if ARGV[4] ~= '' then redis.call('SET', KEYS[10], ARGV[1], 'EX', ARGV[4]) end
return ARGV[1]
"""

# KEYS 7 lease, 8 cancel, 9 checkpoint, 10 log, 11 doc.
# ARGV 1 id, 2 token, 3 lease ms, 4 now iso, 5 worker, 6 job ttl s.
CLAIM = """
local state = redis.call('HGET', KEYS[6], 'state')
if not state then return 'missing' end
if is_terminal(state) then return 'terminal' end
if not redis.call('SET', KEYS[7], ARGV[2], 'NX', 'PX', ARGV[3]) then return 'busy' end
if redis.call('EXISTS', KEYS[8]) == 1 then
  redis.call('HSET', KEYS[6], 'finished_at', ARGV[4])
  move(ARGV[1], state, 'canceled')
  redis.call('DEL', KEYS[7], KEYS[8], KEYS[9])
  retire(KEYS[6], KEYS[11], KEYS[10], ARGV[6])
  return 'canceled'
end
redis.call('HINCRBY', KEYS[6], 'attempts', 1)
redis.call('HSETNX', KEYS[6], 'started_at', ARGV[4])
redis.call('HSET', KEYS[6], 'worker', ARGV[5])
if state ~= 'running' then move(ARGV[1], state, 'running') end
return 'ok'
"""

RENEW = """
if redis.call('GET', KEYS[1]) ~= ARGV[1] then return 0 end
redis.call('PEXPIRE', KEYS[1], ARGV[2])
return 1
"""

RELEASE = """
if redis.call('GET', KEYS[1]) ~= ARGV[1] then return 0 end
return redis.call('DEL', KEYS[1])
"""

# KEYS 1 lease, 2 log, 3 job.  ARGV 1 token, 2 progress json ('' = keep),
# 3 trim: 0 none, -1 drop the whole log, n > 0 drop tail entries whose
# iteration >= n; 4 keep first, 5 keep latest, 6 stride, 7 last iteration
# (worker.convergence_log: the entries to append are already the ones kept),
# 8.. entries to append.  With the stride unchanged only the latest entries
# stored can have become droppable; a new stride re-reads the whole log (a
# few thousand entries, once per doubling).  The record's `log_dropped` is
# then the last iteration minus the entries held, `log_stride` the stride.
WRITE_LOG = """
if redis.call('GET', KEYS[1]) ~= ARGV[1] then return 0 end
local function iteration_of(raw)
  local ok, entry = pcall(cjson.decode, raw)
  return ok and type(entry) == 'table' and tonumber(entry['iteration']) or nil
end
local trim = tonumber(ARGV[3])
if trim < 0 then
  redis.call('DEL', KEYS[2])
  redis.call('HDEL', KEYS[3], 'log_stride')
elseif trim > 0 then
  while true do
    local tail = redis.call('LINDEX', KEYS[2], -1)
    if not tail then break end
    local iteration = iteration_of(tail)
    if iteration and iteration >= trim then redis.call('RPOP', KEYS[2]) else break end
  end
end
if #ARGV >= 8 then
  local first, latest = tonumber(ARGV[4]), tonumber(ARGV[5])
  local stride, last = tonumber(ARGV[6]), tonumber(ARGV[7])
  local from = 0
  if tonumber(redis.call('HGET', KEYS[3], 'log_stride') or '0') == stride then from = -latest end
  local stored = redis.call('LRANGE', KEYS[2], from, -1)
  local keep = {}
  for _, raw in ipairs(stored) do
    local i = iteration_of(raw)
    if not i or i <= first or i > last - latest or (i - first) % stride == 0 then keep[#keep + 1] = raw end
  end
  if #keep < #stored then
    redis.call('LTRIM', KEYS[2], 0, -#stored - 1)
    for i = 1, #keep, 500 do
      redis.call('RPUSH', KEYS[2], unpack(keep, i, math.min(i + 499, #keep)))
    end
  end
  redis.call('HSET', KEYS[3], 'log_stride', stride)
  for i = 8, #ARGV, 500 do
    redis.call('RPUSH', KEYS[2], unpack(ARGV, i, math.min(i + 499, #ARGV)))
  end
end
local tail = redis.call('LINDEX', KEYS[2], -1)
local last_logged = tail and iteration_of(tail) or 0
redis.call('HSET', KEYS[3], 'log_dropped', math.max(0, last_logged - redis.call('LLEN', KEYS[2])))
if ARGV[2] ~= '' then redis.call('HSET', KEYS[3], 'progress', ARGV[2]) end
return 1
"""

# KEYS 1 lease, 2 checkpoint.  ARGV 1 token, 2 iteration, 3 blob, 4 ttl ms.
SAVE_CHECKPOINT = """
if redis.call('GET', KEYS[1]) ~= ARGV[1] then return 'lease_lost' end
local head = redis.call('GETRANGE', KEYS[2], 0, 40)
local stored = tonumber(string.match(head, '^fixq%-ckpt:(%d+)\\n'))
if stored and stored > tonumber(ARGV[2]) then return 'stale' end
redis.call('SET', KEYS[2], ARGV[3], 'PX', ARGV[4])
return 'saved'
"""

# KEYS 7 lease, 8 result, 9 checkpoint, 10 cancel, 11 log, 12 seconds histogram,
# 13 iterations histogram, 14 doc.  ARGV 1 id, 2 token, 3 new state, 4 now iso,
# 5 result blob ('' = none), 6 result ttl s, 7 seconds bucket ('' = record
# nothing), 8 seconds, 9 iterations bucket, 10 iterations, 11 job ttl s,
# 12.. field/value pairs.
FINISH = """
if redis.call('GET', KEYS[7]) ~= ARGV[2] then return 0 end
local state = redis.call('HGET', KEYS[6], 'state')
if ARGV[5] ~= '' then redis.call('SET', KEYS[8], ARGV[5], 'NX', 'EX', ARGV[6]) end
if #ARGV >= 12 then redis.call('HSET', KEYS[6], unpack(ARGV, 12)) end
redis.call('HSET', KEYS[6], 'finished_at', ARGV[4])
move(ARGV[1], state, ARGV[3])
redis.call('DEL', KEYS[7], KEYS[9], KEYS[10])
retire(KEYS[6], KEYS[14], KEYS[11], ARGV[11])
if ARGV[7] ~= '' then
  redis.call('HINCRBY', KEYS[12], ARGV[7], 1)
  redis.call('HINCRBY', KEYS[12], 'count', 1)
  redis.call('HINCRBYFLOAT', KEYS[12], 'sum', ARGV[8])
  redis.call('HINCRBY', KEYS[13], ARGV[9], 1)
  redis.call('HINCRBY', KEYS[13], 'count', 1)
  redis.call('HINCRBYFLOAT', KEYS[13], 'sum', ARGV[10])
end
return 1
"""

# KEYS 7 cancel, 8 RQ queue list, 9 RQ job hash, 10 log, 11 doc.
# ARGV 1 id, 2 RQ job id, 3 now iso, 4 flag ttl s, 5 job ttl s.
CANCEL = """
local state = redis.call('HGET', KEYS[6], 'state')
if not state then return 'missing' end
if state == 'queued' then
  redis.call('LREM', KEYS[8], 0, ARGV[2])
  redis.call('DEL', KEYS[9], KEYS[7])
  redis.call('HSET', KEYS[6], 'finished_at', ARGV[3])
  move(ARGV[1], state, 'canceled')
  retire(KEYS[6], KEYS[11], KEYS[10], ARGV[5])
  return 'canceled'
end
if state == 'running' then
  redis.call('SET', KEYS[7], '1', 'EX', ARGV[4])
  return 'cancel_requested'
end
return 'unchanged'
"""

# KEYS 7 lease, 8 cancel, 9 checkpoint, 10 log, 11 doc.
# ARGV 1 id, 2 max attempts, 3 now iso, 4 now ms, 5 job ttl s, 6 error json.
REQUEUE_ABANDONED = """
local state = redis.call('HGET', KEYS[6], 'state')
if state ~= 'running' then return {'skip'} end
if redis.call('EXISTS', KEYS[7]) == 1 then return {'alive'} end
local priority = redis.call('HGET', KEYS[6], 'priority') or 'normal'
if redis.call('EXISTS', KEYS[8]) == 1 then
  redis.call('HSET', KEYS[6], 'finished_at', ARGV[3])
  move(ARGV[1], state, 'canceled')
  redis.call('DEL', KEYS[8], KEYS[9])
  retire(KEYS[6], KEYS[11], KEYS[10], ARGV[5])
  return {'canceled'}
end
local attempts = tonumber(redis.call('HGET', KEYS[6], 'attempts')) or 0
if attempts >= tonumber(ARGV[2]) then
  redis.call('HSET', KEYS[6], 'finished_at', ARGV[3], 'error', ARGV[6])
  move(ARGV[1], state, 'failed')
  redis.call('DEL', KEYS[9])
  retire(KEYS[6], KEYS[11], KEYS[10], ARGV[5])
  return {'failed'}
end
local n = redis.call('HINCRBY', KEYS[6], 'enqueues', 1)
local rq_job = ARGV[1] .. '-' .. n
redis.call('HSET', KEYS[6], 'rq_job', rq_job, 'enqueued_at', ARGV[4])
move(ARGV[1], state, 'queued')
return {'requeued', rq_job, priority}
"""

# KEYS 7 lease.  ARGV 1 id, 2 expected RQ job id, 3 now ms.
RESCUE_LOST = """
if redis.call('HGET', KEYS[6], 'state') ~= 'queued' then return false end
if redis.call('HGET', KEYS[6], 'rq_job') ~= ARGV[2] then return false end
if redis.call('EXISTS', KEYS[7]) == 1 then return false end
local n = redis.call('HINCRBY', KEYS[6], 'enqueues', 1)
local rq_job = ARGV[1] .. '-' .. n
redis.call('HSET', KEYS[6], 'rq_job', rq_job, 'enqueued_at', ARGV[3])
return {rq_job, redis.call('HGET', KEYS[6], 'priority') or 'normal'}
"""
