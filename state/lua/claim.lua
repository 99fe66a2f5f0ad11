-- claim.lua: takes the conversion parked for a click that was indexed
-- now. The orphan is marked claimed, not deleted: a redelivered click
-- takes it again, and the experiment's conversion marker keeps it from
-- counting twice. An orphan its sweep is expiring (state "x") is left to
-- the sweep. Store.IndexClicks runs it only for a click whose field it
-- found in the orphans hash after indexing the click.
--
-- KEYS[1] parked orphans <p>:{i:<group>}:o
-- ARGV[1] the click's field
--
-- Reply: {} when there is nothing to take, else {record}, the orphan
-- record (see lookup.lua) with its state before this call: "p" parked or
-- "c" claimed.

local v = redis.call('HGET', KEYS[1], ARGV[1])
if not v then
  return {}
end
local st = string.sub(v, 1, 1)
if st == 'x' then
  return {}
end
if st == 'p' then
  redis.call('HSET', KEYS[1], ARGV[1], 'c' .. string.sub(v, 2))
end
return {v}
