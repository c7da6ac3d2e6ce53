-- wrk script for the mixed load (bench/load_mixed.py): POST JSON bodies, one per line of the file named by the
-- first script argument (taken in turn), paced to a fixed rate, counting every response status.
--   wrk -t1 -c16 -d20s --timeout 60s -s paced.lua http://127.0.0.1:8000/path -- bodies.jsonl RATE
-- RATE: requests per second for the whole wrk run (all its threads); 0 = closed loop (each connection sends its
-- next request as soon as the answer arrives: the peak measurement, through the same code path).
--
-- Pacing: each thread owns a schedule of send slots (1 / rate apart, absolute times from a monotonic clock, so
-- rounding never accumulates). wrk asks delay() before each request a connection sends; the request takes the
-- next free slot and waits for it. If every connection is busy when a slot falls due, the request is sent as
-- soon as one frees (the schedule catches up, as open-loop arrivals would) and counted as late (> 10 ms behind
-- its slot): wrk measures latency from the moment it sends, so late sends mean that queueing time in the
-- generator is missing from the latency figures. Zero late sends = the offered rate was held open-loop.

local ffi = require("ffi")
ffi.cdef [[
typedef struct { long tv_sec; long tv_nsec; } segscore_timespec;
int clock_gettime(int clock_id, segscore_timespec *tp);
]]
local CLOCK_MONOTONIC = 1
local clock = ffi.new("segscore_timespec")

local function now_s()
   ffi.C.clock_gettime(CLOCK_MONOTONIC, clock)
   return tonumber(clock.tv_sec) + tonumber(clock.tv_nsec) * 1e-9
end

local LATE_S = 0.010
local threads = {}
local thread_count = 0

function setup(thread)
   thread_count = thread_count + 1
   thread:set("id", thread_count)
   table.insert(threads, thread)
end

function init(args)
   bodies = {}
   for line in assert(io.open(args[1], "rb"), "cannot open " .. tostring(args[1])):lines() do
      if #line > 0 then
         bodies[#bodies + 1] = line
      end
   end
   assert(#bodies > 0, "no bodies in " .. args[1])
   -- each thread's share of the rate (wrk sets `id` before init; the count of threads is known by then too)
   local rate = tonumber(args[2] or "0")
   local n_threads = tonumber(args[3] or "1")
   interval = rate > 0 and n_threads / rate or 0
   next_slot = nil
   late, worst_lag_ms = 0, 0
   counts = {}
   index = id or 1
   requests_built = {}
   for i, body in ipairs(bodies) do
      requests_built[i] = wrk.format("POST", nil, {["Content-Type"] = "application/json"}, body)
   end
end

function request()
   index = index % #requests_built + 1
   return requests_built[index]
end

function delay()
   if interval == 0 then
      return 0
   end
   local now = now_s()
   local slot = next_slot or now
   next_slot = slot + interval
   local wait = slot - now
   if wait < -LATE_S then
      late = late + 1
      local lag = -wait * 1000
      if lag > worst_lag_ms then
         worst_lag_ms = lag
      end
   end
   if wait <= 0 then
      return 0
   end
   return math.floor(wait * 1000 + 0.5)
end

function response(status, headers, body)
   counts[status] = (counts[status] or 0) + 1
end

function done(summary, latency, requests)
   local statuses, total_late, worst = {}, 0, 0
   for _, thread in ipairs(threads) do
      for status, n in pairs(thread:get("counts")) do
         statuses[status] = (statuses[status] or 0) + n
      end
      total_late = total_late + thread:get("late")
      worst = math.max(worst, thread:get("worst_lag_ms"))
   end
   local parts = {}
   for status, n in pairs(statuses) do
      parts[#parts + 1] = string.format('"%d": %d', status, n)
   end
   local e = summary.errors
   io.write(string.format(
      'WRK_JSON {"requests": %d, "duration_us": %d, "p50_us": %d, "p90_us": %d, "p99_us": %d, "max_us": %d, ' ..
      '"connect_errors": %d, "read_errors": %d, "write_errors": %d, "timeouts": %d, "late": %d, ' ..
      '"worst_lag_ms": %.1f, "statuses": {%s}}\n',
      summary.requests, summary.duration, latency:percentile(50), latency:percentile(90), latency:percentile(99),
      latency.max, e.connect, e.read, e.write, e.timeout, total_late, worst, table.concat(parts, ", ")))
end
