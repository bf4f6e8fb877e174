package metrics

import (
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/qtally/qtally/training"
)

// visitBuckets are the upper bounds of the visit-count histogram: counts
// of updates per pair, from a single visit to a million.
var visitBuckets = []int64{1, 2, 3, 5, 10, 20, 50, 100, 200, 500, 1000, 2000, 5000, 10000, 100000, 1000000}

// ReplicaStatser gives the figures of a process's in-memory Q copies.
type ReplicaStatser interface {
	Stats(atLeast ...int64) []training.ReplicaStats
}

// ReplicaCollector exports, at scrape time, what this process's in-memory
// copy of each policy's Q table holds: its age and revision, its size, the
// distribution of visit counts and the coverage. The copy keeps these
// figures as rows arrive, so a scrape costs the same with a million pairs
// as with ten. Register it in API processes (they hold the copies); every
// API process reports its own copy, so aggregate these across processes
// with max, not sum.
type ReplicaCollector struct {
	replica        ReplicaStatser
	coverageVisits int64
	// atLeast asks the copy, per bucket bound b, for the pairs with at
	// least b+1 visits, and last for the coverage threshold.
	atLeast []int64

	age, revision, states, pairs, visits, coverage, coverageVisitsDesc *prometheus.Desc
}

// NewReplicaCollector exports replica's figures; a pair counts as covered
// once it has at least coverageVisits visits.
func NewReplicaCollector(replica ReplicaStatser, coverageVisits int64) *ReplicaCollector {
	policy := []string{"policy"}
	c := &ReplicaCollector{
		replica: replica, coverageVisits: coverageVisits,
		age: prometheus.NewDesc("qtally_q_copy_age_seconds",
			"Time since this process last confirmed its in-memory Q copy current.", policy, nil),
		revision: prometheus.NewDesc("qtally_q_copy_revision",
			"Training revision of this process's in-memory Q copy.", policy, nil),
		states: prometheus.NewDesc("qtally_q_states",
			"States with at least one visited pair, in this process's Q copy.", policy, nil),
		pairs: prometheus.NewDesc("qtally_q_pairs",
			"State-action pairs visited at least once, in this process's Q copy.", policy, nil),
		visits: prometheus.NewDesc("qtally_q_pair_visits",
			"Distribution of the visit count N(s,a) over the visited pairs of this process's Q copy.", policy, nil),
		coverage: prometheus.NewDesc("qtally_q_coverage_ratio",
			"Share of the pairs of seen states (actions x states) with at least qtally_q_coverage_min_visits visits; 0 while no state is seen.", policy, nil),
		coverageVisitsDesc: prometheus.NewDesc("qtally_q_coverage_min_visits",
			"Visits a pair needs to count as covered in qtally_q_coverage_ratio (--coverage-visits).", nil, nil),
	}
	for _, b := range visitBuckets {
		c.atLeast = append(c.atLeast, b+1)
	}
	c.atLeast = append(c.atLeast, coverageVisits)
	return c
}

// Describe implements prometheus.Collector.
func (c *ReplicaCollector) Describe(ch chan<- *prometheus.Desc) {
	for _, d := range []*prometheus.Desc{c.age, c.revision, c.states, c.pairs, c.visits, c.coverage, c.coverageVisitsDesc} {
		ch <- d
	}
}

// Collect implements prometheus.Collector.
func (c *ReplicaCollector) Collect(ch chan<- prometheus.Metric) {
	now := time.Now()
	ch <- prometheus.MustNewConstMetric(c.coverageVisitsDesc, prometheus.GaugeValue, float64(c.coverageVisits))
	for _, st := range c.replica.Stats(c.atLeast...) {
		p := st.Policy
		ch <- prometheus.MustNewConstMetric(c.age, prometheus.GaugeValue, now.Sub(st.SyncedAt).Seconds(), p)
		ch <- prometheus.MustNewConstMetric(c.revision, prometheus.GaugeValue, float64(st.Revision), p)
		ch <- prometheus.MustNewConstMetric(c.states, prometheus.GaugeValue, float64(st.States), p)
		ch <- prometheus.MustNewConstMetric(c.pairs, prometheus.GaugeValue, float64(st.Pairs), p)
		buckets := make(map[float64]uint64, len(visitBuckets))
		for i, b := range visitBuckets {
			buckets[float64(b)] = uint64(int64(st.Pairs) - st.PairsAtLeast[i])
		}
		ch <- prometheus.MustNewConstHistogram(c.visits, uint64(st.Pairs), float64(st.Visits), buckets, p)
		coverage := 0.0
		if seen := int64(st.Actions) * int64(st.States); seen > 0 {
			coverage = float64(st.PairsAtLeast[len(visitBuckets)]) / float64(seen)
		}
		ch <- prometheus.MustNewConstMetric(c.coverage, prometheus.GaugeValue, coverage, p)
	}
}
