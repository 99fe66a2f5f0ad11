-- progress.lua: records the event-time progress of some partitions of one
-- topic, as their owner reports it. Times only move forward (a late or
-- stale report never lowers them); the idle flag is taken from a writer of
-- the newest generation seen for the partition.
--
-- KEYS[1] progress hash <p>:{p:<topic>}:progress, fields per partition n:
--         "<n>:s" latest event time seen, "<n>:a" applied through,
--         "<n>:i" "1" if idle, "<n>:g" generation of the newest writer,
--         "<n>:r" refits done through (click partitions), "<n>:w" orphans
--         swept through (conversion partitions)
--
-- ARGV[1] mode: "report" or "refit"
-- report: ARGV[2] generation; ARGV[3] N; then N quintuples (partition,
--         seen or "", applied or "", idle "1"/"0", swept or "")
-- refit:  ARGV[2] partition; ARGV[3] tick
--
-- Reply: 1.

local function raise(field, v)
  if v == '' then
    return
  end
  local cur = redis.call('HGET', KEYS[1], field)
  if not cur or tonumber(cur) < tonumber(v) then
    redis.call('HSET', KEYS[1], field, v)
  end
end

if ARGV[1] == 'refit' then
  raise(ARGV[2] .. ':r', ARGV[3])
  return 1
end

local gen = tonumber(ARGV[2])
local n = tonumber(ARGV[3])
local pos = 4
for i = 1, n do
  local p = ARGV[pos]
  raise(p .. ':s', ARGV[pos + 1])
  raise(p .. ':a', ARGV[pos + 2])
  raise(p .. ':w', ARGV[pos + 4])
  local g = redis.call('HGET', KEYS[1], p .. ':g')
  if not g or tonumber(g) <= gen then
    redis.call('HSET', KEYS[1], p .. ':g', ARGV[2], p .. ':i', ARGV[pos + 3])
  end
  pos = pos + 5
end
return 1
