-- putclick.lua: stores a click's index entry and takes the conversion that
-- was parked waiting for it, if any. The orphan is marked claimed, not
-- deleted: a redelivered click takes it again, and the experiment's
-- conversion marker keeps it from counting twice.
--
-- KEYS[1] click entry <p>:{k:<click>}:c
-- KEYS[2] orphan      <p>:{k:<click>}:o
-- ARGV[1] the entry's bytes; ARGV[2] its TTL in ms
--
-- Reply: 0 if no orphan is parked, else the orphan hash as a flat array
-- (field "s" is its state before this call: "p" parked or "c" claimed).

redis.call('SET', KEYS[1], ARGV[1], 'PX', ARGV[2])
local o = redis.call('HGETALL', KEYS[2])
if #o == 0 then
  return 0
end
redis.call('HSET', KEYS[2], 's', 'c')
return o
