-- index_open.lua: creates the click index descriptor, or raises its
-- horizon, and returns it.
--
-- KEYS[1] descriptor <p>:{i}:meta
-- ARGV[1] layout version; ARGV[2] generation length in ms; ARGV[3]
-- horizon in ms; ARGV[4] legacy bound (event time, ms) or "" for none;
-- ARGV[5] a random creation id (the epoch: a descriptor created again has
-- another, so that Stores drop what they cached of the lost one)
--
-- Reply: {"ok", descriptor fields and values (flat, as HGETALL)}, or
-- {"version", stored version} when another layout version is stored.
-- Generation length and legacy bound are only set on creation; the
-- horizon only grows.

local v = redis.call('HGET', KEYS[1], 'v')
if not v then
  redis.call('HSET', KEYS[1], 'v', ARGV[1], 'g', ARGV[2], 'h', ARGV[3], 'e', ARGV[5])
  if ARGV[4] ~= '' then
    redis.call('HSET', KEYS[1], 'legacy', ARGV[4])
  end
elseif v ~= ARGV[1] then
  return {'version', v}
elseif tonumber(redis.call('HGET', KEYS[1], 'h')) < tonumber(ARGV[3]) then
  redis.call('HSET', KEYS[1], 'h', ARGV[3])
end
return {'ok', redis.call('HGETALL', KEYS[1])}
