package load

import (
	"context"
	"net/http"
	"sort"
	"time"

	vegeta "github.com/tsenart/vegeta/v12/lib"
)

// Figures summarise one attack.
type Figures struct {
	Requests     uint64         `json:"requests"`
	Throughput   float64        `json:"throughput_per_s"`
	Success      float64        `json:"success_ratio"`
	P50          time.Duration  `json:"p50"`
	P99          time.Duration  `json:"p99"`
	Max          time.Duration  `json:"max"`
	StatusCodes  map[string]int `json:"status_codes"`
	Errors       []string       `json:"errors,omitempty"`
	UnitsPerReq  int            `json:"units_per_request"`
	UnitsPerSec  float64        `json:"units_per_s"`
	DurationSecs float64        `json:"duration_s"`
	// Processor time a request (microseconds, user and system) of the load
	// generator itself, the service (its /metrics) and PostgreSQL (when
	// Config.PostgresPID names it); 0 when not read.
	ClientCPU   float64 `json:"client_cpu_us_per_request"`
	ServiceCPU  float64 `json:"service_cpu_us_per_request"`
	PostgresCPU float64 `json:"postgres_cpu_us_per_request"`
}

// attack runs targets at cfg.Rate (or as fast as cfg.Workers allow when
// the rate is 0) for cfg.Duration. units is what one request carries
// (steps for posts), for the units/s figure.
func attack(ctx context.Context, cfg Config, name string, next func(*vegeta.Target) error, units int) Figures {
	opts := []func(*vegeta.Attacker){vegeta.KeepAlive(true), vegeta.Connections(cfg.Workers),
		vegeta.MaxConnections(cfg.Workers), vegeta.Timeout(30 * time.Second)}
	var pacer vegeta.Pacer = vegeta.ConstantPacer{Freq: cfg.Rate, Per: time.Second}
	if cfg.Rate == 0 {
		pacer = vegeta.ConstantPacer{}
		opts = append(opts, vegeta.Workers(uint64(cfg.Workers)), vegeta.MaxWorkers(uint64(cfg.Workers)))
	} else {
		opts = append(opts, vegeta.Workers(uint64(cfg.Workers)))
	}
	a := vegeta.NewAttacker(opts...)
	var m vegeta.Metrics
	before := readCPUTimes(ctx, cfg)
	results := a.Attack(next, pacer, cfg.Duration, name)
	for {
		select {
		case <-ctx.Done():
			a.Stop()
		case r, ok := <-results:
			if !ok {
				m.Close()
				f := figures(&m, units)
				f.perRequest(before, readCPUTimes(ctx, cfg))
				return f
			}
			m.Add(r)
		}
	}
}

func figures(m *vegeta.Metrics, units int) Figures {
	errs := append([]string(nil), m.Errors...)
	sort.Strings(errs)
	if len(errs) > 5 {
		errs = errs[:5]
	}
	return Figures{Requests: m.Requests, Throughput: m.Throughput, Success: m.Success,
		P50: m.Latencies.P50, P99: m.Latencies.P99, Max: m.Latencies.Max, StatusCodes: m.StatusCodes,
		Errors: errs, UnitsPerReq: units, UnitsPerSec: m.Throughput * float64(units), DurationSecs: m.Duration.Seconds()}
}

func jsonHeader(token string) http.Header {
	h := http.Header{"Content-Type": []string{"application/json"}}
	if token != "" {
		h.Set("Authorization", "Bearer "+token)
	}
	return h
}
