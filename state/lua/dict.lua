-- dict.lua: the id of a name in the click index dictionary, assigned on
-- first use, so that index entries name their experiment, arm and origin
-- topic with a small number.
--
-- KEYS[1] dictionary <p>:{i}:dict
-- ARGV[1] the name: "a:<experiment>\n<arm>" or "t:<topic>"
--
-- Reply: the id (an integer >= 1). The dictionary maps the name to its
-- id and "#<id>" back to the name; "#next" is the last id given.

local id = redis.call('HGET', KEYS[1], ARGV[1])
if id then
  return tonumber(id)
end
id = redis.call('HINCRBY', KEYS[1], '#next', 1)
redis.call('HSET', KEYS[1], ARGV[1], id, '#' .. id, ARGV[1])
return id
