-- wrk script for scripts/bench.sh: POST explore-mode choose requests,
-- cycling over the first $CHOOSE_STATES (default 4096) states of the load
-- command's generated traffic (load/episodes.go stateName). Requests are
-- formatted once per thread, so each costs wrk only a table lookup.
-- QTALLY_TOKEN is the API token to send.
local n = tonumber(os.getenv("CHOOSE_STATES") or "4096")
local requests = {}
local i = 0

-- The service checks a token on every request, as in production.
local headers = { ["Content-Type"] = "application/json",
  ["Authorization"] = "Bearer " .. (os.getenv("QTALLY_TOKEN") or "") }

function init(args)
  for k = 0, n - 1 do
    local state = string.format("tier=%d|day=%d|reason=%d", k % 7, math.floor(k / 7) % 30, math.floor(k / 210))
    requests[k + 1] = wrk.format("POST", nil, headers,
      '{"state":"' .. state .. '","mode":"explore"}')
  end
end

function request()
  i = i % n + 1
  return requests[i]
end
