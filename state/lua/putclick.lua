-- putclick.lua: stores a click's index entry unless the click id is taken,
-- and takes the conversion that was parked waiting for it, if any. The
-- orphan is marked claimed, not deleted: a redelivered click takes it
-- again, and the experiment's conversion marker keeps it from counting
-- twice. An orphan its sweep is expiring (state "x") is left to the sweep.
-- IndexClicks stores entries with plain SET NX GET and runs this script
-- only for a click whose orphan key exists.
--
-- KEYS[1] click entry <p>:{k:<click>}:c
-- KEYS[2] orphan      <p>:{k:<click>}:o
-- ARGV[1] the entry's bytes (they include the click's origin); ARGV[2] its
-- TTL in ms
--
-- Reply, first element a status:
--   {"duplicate", entry}     another click (other bytes) holds the id;
--                            nothing was written
--   {"new"} or {"new", o}    the entry was stored now
--   {"again"} or {"again", o} the same entry was stored before (a
--                            redelivery); its TTL is kept
-- where o is the parked orphan hash as a flat array (field "s" is its state
-- before this call: "p" parked or "c" claimed).

local prev = redis.call('GET', KEYS[1])
if prev and prev ~= ARGV[1] then
  return {'duplicate', prev}
end
local status = 'again'
if not prev then
  redis.call('SET', KEYS[1], ARGV[1], 'PX', ARGV[2])
  status = 'new'
end
local o = redis.call('HGETALL', KEYS[2])
if #o == 0 then
  return {status}
end
if redis.call('HGET', KEYS[2], 's') == 'x' then
  return {status}
end
redis.call('HSET', KEYS[2], 's', 'c')
return {status, o}
