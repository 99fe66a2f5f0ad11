-- legacy_sweep.lua: phase one of settling an orphan of the first layout of
-- the click index (sweep.lua does it for the second) whose deadline entry
-- came due in its partition's due set. An unclaimed orphan past its
-- deadline is marked expiring (state "x", field "sw" = the sweeper) and
-- returned; it is deleted only by settle (phase three) after the caller applied or
-- dead-lettered it (phase two), so a crash in between loses nothing: the
-- next sweep returns it again. A click arriving meanwhile leaves it alone.
--
-- KEYS[1] orphan <p>:{k:<click>}:o
-- ARGV[1] topic; ARGV[2] partition; ARGV[3] watermark (event time);
-- ARGV[4] the sweeper's name
--
-- Reply, first element a status:
--   {"gone"}               no orphan (expired by TTL or already settled)
--   {"other"}              the orphan belongs to another partition; kept
--   {"claimed"}            it was joined to its click; deleted now
--   {"later", deadline}    its deadline is after the watermark; kept
--   {"expired", fields}    unclaimed past its deadline (or marked expiring
--                          by an earlier sweep); marked, its hash returned
--                          flat

local h = redis.call('HGETALL', KEYS[1])
if #h == 0 then
  return {'gone'}
end
local o = {}
for i = 1, #h, 2 do
  o[h[i]] = h[i + 1]
end
if o['tp'] ~= ARGV[1] or o['pt'] ~= ARGV[2] then
  return {'other'}
end
if o['s'] == 'c' then
  redis.call('DEL', KEYS[1])
  return {'claimed'}
end
if o['s'] ~= 'x' then
  if tonumber(o['dl']) > tonumber(ARGV[3]) then
    return {'later', o['dl']}
  end
  redis.call('HSET', KEYS[1], 's', 'x', 'sw', ARGV[4])
end
return {'expired', h}
