-- legacy_claim.lua: takes the conversion parked in the first layout of the
-- click index (one orphan hash per click) for a click indexed now, if
-- any. The orphan is marked claimed, not deleted: a redelivered click
-- takes it again, and the experiment's conversion marker keeps it from
-- counting twice. An orphan its sweep is expiring (state "x") is left to
-- the sweep. Nothing parks in the first layout any more; the index reads
-- it until it has expired (see state/legacyindex.go).
--
-- KEYS[1] orphan <p>:{k:<click>}:o
--
-- Reply: {} when there is nothing to take, else {o}, the orphan hash as a
-- flat array (field "s" is its state before this call: "p" parked or "c"
-- claimed).

local o = redis.call('HGETALL', KEYS[1])
if #o == 0 then
  return {}
end
if redis.call('HGET', KEYS[1], 's') == 'x' then
  return {}
end
redis.call('HSET', KEYS[1], 's', 'c')
return {o}
