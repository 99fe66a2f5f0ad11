-- compact.lua: compare-and-set rewrite of one arm hash into canonical form.
-- The rewrite happens only if the hash still holds exactly the fields and
-- values the caller read, so no concurrent increment is ever lost.
--
-- KEYS[1] arm hash <p>:{x:<exp>}:a:<arm>
--
-- ARGV[1] N, the number of fields read; ARGV[2 .. 1+2N] those N
-- (field, value) pairs; ARGV[2+2N ..] the (field, value) pairs of the
-- canonical hash that replaces them.
--
-- Reply: 1 if rewritten, 0 if the hash changed since it was read.

local n = tonumber(ARGV[1])
if redis.call('HLEN', KEYS[1]) ~= n then
  return 0
end
for i = 0, n - 1 do
  if redis.call('HGET', KEYS[1], ARGV[2 + 2 * i]) ~= ARGV[3 + 2 * i] then
    return 0
  end
end
redis.call('DEL', KEYS[1])
for i = 2 + 2 * n, #ARGV, 2 do
  redis.call('HSET', KEYS[1], ARGV[i], ARGV[i + 1])
end
return 1
