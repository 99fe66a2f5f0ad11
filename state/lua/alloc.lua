-- alloc.lua: stores an experiment's latest allocation with a new sequence
-- number.
--
-- KEYS[1] meta hash <p>:{x:<exp>}:meta
-- ARGV[1] the allocation JSON
--
-- Reply: the new sequence number (1 for the first allocation).

local seq = redis.call('HINCRBY', KEYS[1], 'seq', 1)
redis.call('HSET', KEYS[1], 'alloc', ARGV[1])
return seq
