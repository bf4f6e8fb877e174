-- wrk script for scripts/bench.sh: POST explore-mode choose requests,
-- cycling over the first $CHOOSE_STATES (default 4096) states of the load
-- command's generated traffic (load/episodes.go stateName). Requests are
-- formatted once per thread, so each costs wrk only a table lookup.
local n = tonumber(os.getenv("CHOOSE_STATES") or "4096")
local requests = {}
local i = 0

function init(args)
  for k = 0, n - 1 do
    local state = string.format("tier=%d|day=%d|reason=%d", k % 7, math.floor(k / 7) % 30, math.floor(k / 210))
    requests[k + 1] = wrk.format("POST", nil, { ["Content-Type"] = "application/json" },
      '{"state":"' .. state .. '","mode":"explore"}')
  end
end

function request()
  i = i % n + 1
  return requests[i]
end
