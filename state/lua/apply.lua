-- apply.lua: applies one experiment's delta and records the Kafka offsets
-- it covers, atomically. Every key carries the experiment's hash tag.
--
-- KEYS[1]            meta hash      <p>:{x:<exp>}:meta
-- KEYS[2]            arm name set   <p>:{x:<exp>}:arms
-- KEYS[3]            offsets hash   <p>:{x:<exp>}:off
-- KEYS[4 .. 3+A]     arm hashes     <p>:{x:<exp>}:a:<arm>, in ARGV arm order
-- KEYS[4+A .. ]      conversion markers <p>:{x:<exp>}:cv:<click>, one per
--                    conversion, in ARGV order (arm by arm)
--
-- ARGV[1] layout string; ARGV[2] delta watermark; ARGV[3] generation;
-- ARGV[4] marker TTL in ms; ARGV[5] R, the number of ranges, followed by R
-- triples (offsets field "<topic>/<partition>", first offset, last offset);
-- then A, the number of arms, and per arm: name, the click record (the
-- arm's click counts in the binary base encoding, "" for none), C, then C
-- quintuples (origin, bucket field "v:<l>:<i>" or "mv", delay field
-- "d:<bin>", delay ms, click field "b:<l>:<i>" or "mc" of a click that
-- counts with the conversion, or "" for none). A click that comes with its
-- conversion (self-attributed) is guarded by the conversion marker like the
-- conversion itself, so a re-read counts neither twice.
--
-- Each arm gets up to two record fields: "u:<n>" holding its click record
-- and "c:<n>" the counts of the conversions counted now, summed per field
-- as "<field> <count>" pairs; "#" numbers the records and "#b" adds up
-- their bytes (see state/armformat.go).
--
-- Reply, first element a status:
--   {"fenced", field, stored generation}  a range's partition has a newer owner
--   {"layout", stored layout}             the experiment has another layout
--   {"overlap", field, stored offset}     a range overlaps one already applied
--   {"skipped"}                           every range was applied before
--   {"applied", counted, redelivered, sizes, i1, origin1, i2, origin2, ...}
--     where sizes holds, per arm in ARGV order, the hash's field count and
--     record bytes after the write, and (i, origin) are given for every
--     duplicate conversion: its 1-based position among the delta's
--     conversions and the origin that was counted.
-- Nothing is written unless the status is "applied". A delta with no
-- ranges (R = 0) carries only conversions, each guarded by its marker; it is
-- always applied.

local gen = tonumber(ARGV[3])
local nr = tonumber(ARGV[5])
local pos = 6

-- Parse and check every range before writing anything.
local ranges = {}
for r = 1, nr do
  local field, from, to = ARGV[pos], tonumber(ARGV[pos + 1]), tonumber(ARGV[pos + 2])
  pos = pos + 3
  local stored = redis.call('HGET', KEYS[3], field)
  local sgen, soff = nil, nil
  if stored then
    local g, o = string.match(stored, '^(-?%d+):(-?%d+)$')
    sgen, soff = tonumber(g), tonumber(o)
    if sgen > gen then
      return {'fenced', field, g}
    end
  end
  ranges[r] = {field, from, to, soff, ARGV[pos - 1]}
end

local stored_layout = redis.call('HGET', KEYS[1], 'layout')
if stored_layout and stored_layout ~= ARGV[1] then
  return {'layout', stored_layout}
end

-- A range is applied before when it ends at or below the stored offset,
-- fresh when it starts above it, and overlapping otherwise. A mix of applied
-- and fresh ranges is refused as an overlap too: applying would count the
-- applied ones twice, skipping would lose the fresh ones.
local first_applied = nil
local fresh = 0
for r = 1, nr do
  local field, from, to, soff = ranges[r][1], ranges[r][2], ranges[r][3], ranges[r][4]
  if soff and to <= soff then
    first_applied = first_applied or r
  elseif soff and from <= soff then
    return {'overlap', field, string.format('%d', soff)}
  else
    fresh = fresh + 1
  end
end
if fresh == 0 and nr > 0 then
  return {'skipped'}
end
if first_applied then
  return {'overlap', ranges[first_applied][1], string.format('%d', ranges[first_applied][4])}
end

if not stored_layout then
  redis.call('HSET', KEYS[1], 'layout', ARGV[1])
end

local na = tonumber(ARGV[pos])
pos = pos + 1
local ttl = ARGV[4]
local counted, redelivered = 0, 0
local dups = {}
local ci = 0
local sizes = {}
for a = 1, na do
  local akey = KEYS[3 + a]
  local name, rec, nc = ARGV[pos], ARGV[pos + 1], tonumber(ARGV[pos + 2])
  pos = pos + 3
  redis.call('SADD', KEYS[2], name)
  local sum, order = {}, {}
  local function add(f, n)
    if sum[f] then
      sum[f] = sum[f] + n
    else
      sum[f] = n
      order[#order + 1] = f
    end
  end
  for c = 1, nc do
    ci = ci + 1
    local mkey = KEYS[3 + na + ci]
    local origin, bfield, dfield, dms, cfield = ARGV[pos], ARGV[pos + 1], ARGV[pos + 2], ARGV[pos + 3], ARGV[pos + 4]
    pos = pos + 5
    local prev = redis.call('SET', mkey, origin, 'NX', 'GET', 'PX', ttl)
    if not prev then
      if cfield ~= '' then
        add(cfield, 1)
      end
      add(bfield, 1)
      add(dfield, 1)
      add('dn', 1)
      add('ds', tonumber(dms))
      counted = counted + 1
    elseif prev == origin then
      redelivered = redelivered + 1
    else
      dups[#dups + 1] = ci
      dups[#dups + 1] = prev
    end
  end
  local parts = {}
  for _, f in ipairs(order) do
    parts[#parts + 1] = f .. ' ' .. string.format('%.0f', sum[f])
  end
  local bytes = 0
  if rec ~= '' or #parts > 0 then
    local n = redis.call('HINCRBY', akey, '#', 1)
    local size = #rec
    if rec ~= '' then
      redis.call('HSET', akey, 'u:' .. n, rec)
    end
    if #parts > 0 then
      local conv = table.concat(parts, ' ')
      redis.call('HSET', akey, 'c:' .. n, conv)
      size = size + #conv
    end
    bytes = redis.call('HINCRBY', akey, '#b', size)
  end
  sizes[#sizes + 1] = redis.call('HLEN', akey)
  sizes[#sizes + 1] = bytes
end

for r = 1, nr do
  redis.call('HSET', KEYS[3], ranges[r][1], ARGV[3] .. ':' .. ranges[r][5])
end
local wm = redis.call('HGET', KEYS[1], 'wm')
if not wm or tonumber(wm) < tonumber(ARGV[2]) then
  redis.call('HSET', KEYS[1], 'wm', ARGV[2])
end
redis.call('HSET', KEYS[1], 'arms', redis.call('SCARD', KEYS[2]))

local reply = {'applied', counted, redelivered, sizes}
for i = 1, #dups do
  reply[#reply + 1] = dups[i]
end
return reply
