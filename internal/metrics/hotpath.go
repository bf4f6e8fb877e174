package metrics

import (
	"strconv"
	"sync"
	"time"

	"github.com/prometheus/client_golang/prometheus"
)

// The series that every request, and every choose, updates are kept once
// found: a vector's own lookup checks and hashes every label value on each
// call. The caches grow as the series do, no further: their keys are the
// series' labels.

type requestSeries struct {
	route, method string
	status        int
}

type choiceSeries struct {
	policy, mode    string
	explored, known bool
}

// seriesCache maps a series' labels to the collector that vec returns for them.
type seriesCache[K comparable, V any] struct {
	mu     sync.RWMutex
	series map[K]V
}

func (c *seriesCache[K, V]) get(k K, lookup func() V) V {
	c.mu.RLock()
	v, ok := c.series[k]
	c.mu.RUnlock()
	if ok {
		return v
	}
	v = lookup()
	c.mu.Lock()
	if c.series == nil {
		c.series = map[K]V{}
	}
	c.series[k] = v
	c.mu.Unlock()
	return v
}

// ObserveRequest records an answered request in HTTPDuration.
func (m *Metrics) ObserveRequest(route, method string, status int, took time.Duration) {
	m.requests.get(requestSeries{route, method, status}, func() prometheus.Observer {
		return m.HTTPDuration.WithLabelValues(route, method, strconv.Itoa(status))
	}).Observe(took.Seconds())
}

// CountChoice counts one chosen action in Choices.
func (m *Metrics) CountChoice(policy, mode string, explored, knownState bool) {
	m.choices.get(choiceSeries{policy, mode, explored, knownState}, func() prometheus.Counter {
		return m.Choices.WithLabelValues(policy, mode, strconv.FormatBool(explored), strconv.FormatBool(knownState))
	}).Inc()
}
