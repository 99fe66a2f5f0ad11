-- load.lua: reads one experiment's whole state at one instant.
--
-- KEYS[1]        meta hash     <p>:{x:<exp>}:meta
-- KEYS[2]        arm name set  <p>:{x:<exp>}:arms
-- KEYS[3]        offsets hash  <p>:{x:<exp>}:off
-- KEYS[4 .. 3+A] arm hashes    <p>:{x:<exp>}:a:<arm>, in ARGV order
--
-- ARGV[1 .. A] the arm names the caller read from the arm set, matching
-- KEYS[4 ..].
--
-- Reply:
--   {"missing"}  the experiment has no meta hash
--   {"retry"}    the arm set no longer matches ARGV (an arm was added since
--                the caller read it); read the set again
--   {"ok", meta fields and values, offsets fields and values,
--    arm 1 fields and values, ..., arm A fields and values}
--    each as a flat array like HGETALL's.

if redis.call('EXISTS', KEYS[1]) == 0 then
  return {'missing'}
end
if redis.call('SCARD', KEYS[2]) ~= #ARGV then
  return {'retry'}
end
for i = 1, #ARGV do
  if redis.call('SISMEMBER', KEYS[2], ARGV[i]) == 0 then
    return {'retry'}
  end
end
local reply = {'ok', redis.call('HGETALL', KEYS[1]), redis.call('HGETALL', KEYS[3])}
for i = 1, #ARGV do
  reply[#reply + 1] = redis.call('HGETALL', KEYS[3 + i])
end
return reply
