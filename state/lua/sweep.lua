-- sweep.lua: phase one of settling an orphan whose deadline entry came due
-- in its partition's due set. An unclaimed orphan past its deadline is
-- marked expiring (state "x") and returned; it is deleted only by settle
-- (phase three) after the caller applied or dead-lettered it (phase two),
-- so a crash in between loses nothing: the next sweep returns it again. A
-- click arriving meanwhile leaves it alone.
--
-- KEYS[1] parked orphans <p>:{i:<group>}:o
-- ARGV[1] the click's field; ARGV[2] "<topic>/<partition>/" of the
-- sweeping partition; ARGV[3] watermark (event time, ms)
--
-- Reply, first element a status:
--   {"gone"}               no orphan (expired by TTL or already settled)
--   {"other"}              the orphan belongs to another partition; kept
--   {"claimed"}            it was joined to its click; deleted now
--   {"later", deadline}    its deadline is after the watermark; kept
--   {"expired", record}    unclaimed past its deadline (or marked expiring
--                          by an earlier sweep); marked, its record
--                          returned (see lookup.lua)

local v = redis.call('HGET', KEYS[1], ARGV[1])
if not v then
  return {'gone'}
end
local st = string.sub(v, 1, 1)
local nl = string.find(v, '\n', 2, true)
local org = string.sub(v, 2, nl - 1)
if string.sub(org, 1, #ARGV[2]) ~= ARGV[2] then
  return {'other'}
end
if st == 'c' then
  redis.call('HDEL', KEYS[1], ARGV[1])
  return {'claimed'}
end
if st ~= 'x' then
  local nl2 = string.find(v, '\n', nl + 1, true)
  local dl = string.sub(v, nl + 1, nl2 - 1)
  if tonumber(dl) > tonumber(ARGV[3]) then
    return {'later', dl}
  end
  v = 'x' .. string.sub(v, 2)
  redis.call('HSET', KEYS[1], ARGV[1], v)
end
return {'expired', v}
