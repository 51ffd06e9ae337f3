-- wrk script: POSTs one fixed request body, read from the file named by the
-- environment variable BODY, with the Content-Type in CTYPE and the bearer
-- token in TOKEN. Counts answers by status so a benchmark cannot pass off
-- errors as throughput.
local f = assert(io.open(os.getenv("BODY"), "rb"))
wrk.method = "POST"
wrk.body = f:read("*a")
f:close()
wrk.headers["Content-Type"] = os.getenv("CTYPE")
wrk.headers["Authorization"] = "Bearer " .. os.getenv("TOKEN")

local threads = {}
function setup(thread)
  table.insert(threads, thread)
end
function init(args)
  statuses = {}
end
function response(status, headers, body)
  statuses[status] = (statuses[status] or 0) + 1
end
function done(summary, latency, requests)
  local all = {}
  for _, t in ipairs(threads) do
    local s = t:get("statuses")
    for k, v in pairs(s) do all[k] = (all[k] or 0) + v end
  end
  local parts = {}
  for k, v in pairs(all) do table.insert(parts, k .. "=" .. v) end
  io.write(string.format("RESULT rps=%.2f p50_ms=%.1f p99_ms=%.1f requests=%d errors=%d statuses=%s\n",
    summary.requests / (summary.duration / 1e6), latency:percentile(50) / 1000,
    latency:percentile(99) / 1000, summary.requests,
    summary.errors.connect + summary.errors.read + summary.errors.write + summary.errors.timeout,
    table.concat(parts, ",")))
end
