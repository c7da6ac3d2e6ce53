-- wrk script: POST the file named by the first script argument (content type: second argument, default
-- application/json; Accept: third argument, if any) on every request, and print one machine-readable summary
-- line at the end.
--   wrk -t1 -c16 -d10s --latency -s post.lua http://127.0.0.1:8000/path -- body.json [content-type [accept]]

function init(args)
   local path = args[1]
   local handle = assert(io.open(path, "rb"), "cannot open " .. tostring(path))
   wrk.body = handle:read("*a")
   handle:close()
   wrk.method = "POST"
   wrk.headers["Content-Type"] = args[2] or "application/json"
   if args[3] then
      wrk.headers["Accept"] = args[3]
   end
end

function done(summary, latency, requests)
   local e = summary.errors
   io.write(string.format(
      'WRK_JSON {"requests": %d, "duration_us": %d, "bytes": %d, "p50_us": %d, "p90_us": %d, "p99_us": %d, ' ..
      '"max_us": %d, "mean_us": %.1f, "connect_errors": %d, "read_errors": %d, "write_errors": %d, ' ..
      '"status_errors": %d, "timeouts": %d}\n',
      summary.requests, summary.duration, summary.bytes, latency:percentile(50), latency:percentile(90),
      latency:percentile(99), latency.max, latency.mean, e.connect, e.read, e.write, e.status, e.timeout))
end
