-- lookup.lua: joins one conversion to its click, or parks it as an orphan
-- until the click arrives. Atomic with putclick.lua (same slot), so a click
-- and its conversion consumed at the same moment by two instances are
-- joined exactly once.
--
-- KEYS[1] click entry <p>:{k:<click>}:c
-- KEYS[2] orphan      <p>:{k:<click>}:o
-- ARGV[1] "1" if the conversion may be parked, "0" if its partition is at
--         its orphan cap; ARGV[2] orphan TTL in ms; ARGV[3] origin;
--         ARGV[4] conversion time; ARGV[5] deadline; ARGV[6] topic;
--         ARGV[7] partition; ARGV[8] the conversion's original bytes
--
-- Reply, first element a status:
--   {"found", entry bytes}        the click is indexed
--   {"again", state}              this conversion (same origin) is already
--                                 parked; state "p" parked or "c" claimed
--   {"duplicate", origin}         another conversion of the click is parked
--   {"cap"}                       not found and not allowed to park
--   {"parked"}                    parked now

local c = redis.call('GET', KEYS[1])
if c then
  return {'found', c}
end
local prev = redis.call('HMGET', KEYS[2], 'org', 's')
if prev[1] then
  if prev[1] == ARGV[3] then
    return {'again', prev[2]}
  end
  return {'duplicate', prev[1]}
end
if ARGV[1] ~= '1' then
  return {'cap'}
end
redis.call('HSET', KEYS[2], 's', 'p', 'org', ARGV[3], 'ts', ARGV[4], 'dl', ARGV[5],
  'tp', ARGV[6], 'pt', ARGV[7], 'raw', ARGV[8])
redis.call('PEXPIRE', KEYS[2], ARGV[2])
return {'parked'}
