-- lookup.lua: joins one conversion to its click, or parks it as an orphan
-- until the click arrives. Every key is in the click id's index group (one
-- slot), so this runs atomically with the click's indexing there: a click
-- and its conversion consumed at the same moment by two instances are
-- joined exactly once (see Store.IndexClicks).
--
-- KEYS[1]     parked orphans   <p>:{i:<group>}:o
-- KEYS[2]     generation sizes <p>:{i:<group>}:g
-- KEYS[3 ..]  the click's sub-keys <p>:{i:<group>}:<gen>:<sub> of the
--             generations the caller knows the size of, newest first
-- ARGV[1] the click's field; ARGV[2] "1" if the conversion may be parked,
-- "0" if its partition is at its orphan cap; ARGV[3] orphan TTL in ms;
-- ARGV[4] the conversion's origin; ARGV[5] its deadline (event time, ms);
-- ARGV[6] the rest of its orphan record; ARGV[7] U, then U generations
-- the conversion's window covers whose size the caller does not know.
--
-- Reply, first element a status:
--   {"retry", gen, size}    a generation of the U has sub-keys now: look
--                           up again with its sub-key; nothing was written
--   {"found", entry, i}     the click's entry, in KEYS[2 + i]
--   {"again", state}        this conversion (same origin) is already
--                           parked; state "p" parked or "c" claimed
--   {"duplicate", origin}   another conversion of the click is parked
--   {"cap"}                 not found and not allowed to park
--   {"parked"}              parked now
--
-- An orphan record is one string: its state ("p", "c" claimed or "x"
-- expiring), the origin, "\n", the deadline in decimal, "\n", then the
-- binary rest written by the caller.

for i = 1, tonumber(ARGV[7]) do
  local m = redis.call('HGET', KEYS[2], ARGV[7 + i])
  if m then
    return {'retry', ARGV[7 + i], m}
  end
end
for i = 3, #KEYS do
  local e = redis.call('HGET', KEYS[i], ARGV[1])
  if e then
    return {'found', e, i - 2}
  end
end
local prev = redis.call('HGET', KEYS[1], ARGV[1])
if prev then
  local nl = string.find(prev, '\n', 2, true)
  local org = string.sub(prev, 2, nl - 1)
  if org == ARGV[4] then
    return {'again', string.sub(prev, 1, 1)}
  end
  return {'duplicate', org}
end
if ARGV[2] ~= '1' then
  return {'cap'}
end
redis.call('HSET', KEYS[1], ARGV[1], 'p' .. ARGV[4] .. '\n' .. ARGV[5] .. '\n' .. ARGV[6])
redis.call('PEXPIRE', KEYS[1], ARGV[3])
return {'parked'}
