// Package metrics exports a tallyward pipeline's Stats to Prometheus.
//
// A Collector reads Stats at each scrape and turns them into metrics; it
// keeps no state of its own, so a restarted process continues from the
// counters the pipeline committed. Register one per pipeline:
//
//	reg.MustRegister(metrics.New(live, metrics.Options{}))
//
// Names follow Prometheus's conventions: base units (seconds, bytes),
// counters end in _total, event times are Unix seconds. Counters persist
// across restarts because the pipeline commits them with its state; after
// a crash they resume from the last commit (events re-read after it are
// not counted twice).
//
// The root package does not import this one, so a service that embeds only
// the core does not pull in the Prometheus client.
//
// # Concurrency
//
// Collect calls Stats from the scraping goroutine. Live.Stats is safe for
// that; a bare Pipeline is not, so wrap one in a function that takes your
// own lock.
package metrics

import (
	"math"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/tallyward/tallyward"
)

// Source is anything that reports a pipeline's Stats: *tallyward.Live, or
// a StatsFunc.
type Source interface {
	Stats() tallyward.Stats
}

// StatsFunc adapts a function to Source.
type StatsFunc func() tallyward.Stats

// Stats implements Source.
func (f StatsFunc) Stats() tallyward.Stats { return f() }

// Options configures a Collector. The zero value is valid.
type Options struct {
	// Namespace prefixes every metric name. Default: "tallyward".
	Namespace string
	// ConstLabels are added to every metric, e.g. {"pipeline": "signin"}
	// when one process runs several pipelines. Default: none.
	ConstLabels prometheus.Labels
}

// Collector is a prometheus.Collector over one pipeline's Stats.
type Collector struct {
	src   Source
	descs []*prometheus.Desc

	events, applied, emitted, late, tooOld, rejected         *prometheus.Desc
	expired, erased, erasedSkips, hits, misses, commits      *prometheus.Desc
	watermark, newest, lag, live, held, cachedKeys           *prometheus.Desc
	cachedBytes, diskBytes, hitRatio, nextSeq, commitSeconds *prometheus.Desc
}

// New returns a Collector reading src.
func New(src Source, opts Options) *Collector {
	ns := opts.Namespace
	if ns == "" {
		ns = "tallyward"
	}
	c := &Collector{src: src}
	d := func(name, help string, labels ...string) *prometheus.Desc {
		desc := prometheus.NewDesc(prometheus.BuildFQName(ns, "", name), help, labels, opts.ConstLabels)
		c.descs = append(c.descs, desc)
		return desc
	}
	c.events = d("events_total", "Source events consumed (re-reads after a restart not counted).")
	c.applied = d("events_applied_total", "Events applied to state.")
	c.emitted = d("rows_emitted_total", "Feature rows emitted.")
	c.late = d("events_late_total", "Events below the watermark on arrival, whatever the lateness policy did with them.")
	c.rejected = d("events_rejected_total", "Events rejected before reaching state, by reason.", "reason")
	c.tooOld = d("updates_too_old_total", "Feature updates an aggregate refused as older than it keeps.")
	c.expired = d("entities_expired_total", "Entity records removed by TTL expiry.")
	c.erased = d("entities_erased_total", "Entity records removed by erasure.")
	c.erasedSkips = d("erased_skips_total", "Entity updates skipped because the key had been erased.")
	c.hits = d("cache_hits_total", "Entity record lookups served by the in-memory cache.")
	c.misses = d("cache_misses_total", "Entity record lookups that went to the store.")
	c.commits = d("commits_total", "Commits since the process opened the pipeline.")
	c.watermark = d("watermark_seconds", "The watermark, Unix seconds (+Inf after a flush; absent before any event).")
	c.newest = d("newest_event_time_seconds", "Newest event time seen, Unix seconds (absent before any event).")
	c.lag = d("watermark_lag_seconds", "Newest event time minus the watermark (absent while undefined).")
	c.live = d("live_entities", "Entity records stored.")
	c.held = d("held_events", "Settled mode: events waiting for the watermark.")
	c.cachedKeys = d("cache_entities", "Entity records held in memory.")
	c.cachedBytes = d("state_memory_bytes", "Approximate memory of the entity records held in memory.")
	c.diskBytes = d("state_disk_bytes", "The store's estimated size on disk.")
	c.hitRatio = d("cache_hit_ratio", "Share of record lookups served by the cache since the process started (absent before any lookup).")
	c.nextSeq = d("next_sequence", "Sequence number the next source event will get.")
	c.commitSeconds = d("commit_duration_seconds", "Latency of commits (state, source position and watermark in one synced write) since the process opened the pipeline.")
	return c
}

// Describe implements prometheus.Collector.
func (c *Collector) Describe(ch chan<- *prometheus.Desc) {
	for _, d := range c.descs {
		ch <- d
	}
}

// Collect implements prometheus.Collector.
func (c *Collector) Collect(ch chan<- prometheus.Metric) {
	s := c.src.Stats()
	counter := func(d *prometheus.Desc, v uint64, labels ...string) {
		ch <- prometheus.MustNewConstMetric(d, prometheus.CounterValue, float64(v), labels...)
	}
	gauge := func(d *prometheus.Desc, v float64) {
		ch <- prometheus.MustNewConstMetric(d, prometheus.GaugeValue, v)
	}
	counter(c.events, s.Events)
	counter(c.applied, s.Applied)
	counter(c.emitted, s.Emitted)
	counter(c.late, s.Late)
	for _, r := range []tallyward.Reason{tallyward.ZeroTime, tallyward.BadValue, tallyward.FutureTime} {
		counter(c.rejected, s.Rejected[r], r.String())
	}
	counter(c.tooOld, s.TooOld)
	counter(c.expired, s.Expired)
	counter(c.erased, s.Erased)
	counter(c.erasedSkips, s.ErasedSkips)
	counter(c.hits, s.CacheHits)
	counter(c.misses, s.CacheMisses)
	counter(c.commits, s.Commits)
	switch s.Watermark {
	case math.MinInt64:
	case math.MaxInt64:
		gauge(c.watermark, math.Inf(1))
	default:
		gauge(c.watermark, unixSeconds(s.Watermark))
	}
	if s.Newest != 0 {
		gauge(c.newest, unixSeconds(s.Newest))
	}
	if s.WatermarkLag != math.MaxInt64 {
		gauge(c.lag, time.Duration(s.WatermarkLag).Seconds())
	}
	gauge(c.live, float64(s.LiveEntities))
	gauge(c.held, float64(s.Held))
	gauge(c.cachedKeys, float64(s.CachedKeys))
	gauge(c.cachedBytes, float64(s.CachedBytes))
	gauge(c.diskBytes, float64(s.DiskBytes))
	if s.CacheHits+s.CacheMisses > 0 {
		gauge(c.hitRatio, s.HitRate())
	}
	gauge(c.nextSeq, float64(s.NextSeq))

	buckets := make(map[float64]uint64, len(tallyward.CommitBuckets))
	var n uint64
	for i, b := range tallyward.CommitBuckets {
		n += s.CommitCounts[i]
		buckets[b.Seconds()] = n
	}
	n += s.CommitCounts[len(tallyward.CommitBuckets)]
	ch <- prometheus.MustNewConstHistogram(c.commitSeconds, n, s.TotalCommitDuration.Seconds(), buckets)
}

// unixSeconds converts Unix nanoseconds to seconds without losing the
// integer part to float rounding first.
func unixSeconds(ns int64) float64 {
	return float64(ns/1e9) + float64(ns%1e9)/1e9
}
