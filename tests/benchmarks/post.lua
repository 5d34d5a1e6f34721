-- wrk script: POST the JSON body read from the file named by $BENCH_BODY, then print one RESULT line
-- with exact latency percentiles (microseconds) and error counts for the benchmark to parse.
local path = os.getenv("BENCH_BODY")
local file = assert(io.open(path, "rb"), "cannot open BENCH_BODY file " .. tostring(path))
wrk.method = "POST"
wrk.body = file:read("*a")
file:close()
wrk.headers["Content-Type"] = "application/json"
local token = os.getenv("BENCH_TOKEN")  -- a bearer token, for a server started with a tokens file
if token and token ~= "" then
  wrk.headers["Authorization"] = "Bearer " .. token
end

function done(summary, latency, requests)
  io.write(string.format(
    "RESULT requests=%d duration_us=%d p50_us=%d p90_us=%d p99_us=%d max_us=%d non2xx=%d connect=%d read=%d write=%d timeout=%d\n",
    summary.requests, summary.duration, latency:percentile(50), latency:percentile(90), latency:percentile(99),
    latency.max, summary.errors.status, summary.errors.connect, summary.errors.read, summary.errors.write,
    summary.errors.timeout))
end
