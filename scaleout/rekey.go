package scaleout

import (
	"context"
	"errors"

	"github.com/twmb/franz-go/pkg/kgo"
)

// RekeyConfig configures Rekey.
type RekeyConfig struct {
	// Brokers are the seed brokers. Required.
	Brokers []string
	// Group is the consumer group of the re-keying instances. Required.
	Group string
	// From is the topic read; To the topic written. Required, distinct.
	From, To string
	// Key returns the record's new key: the entity the To topic is
	// partitioned by. A record it fails on is skipped (and counted in
	// RekeyStats.Skipped) rather than stopping the step. Required.
	Key func(*kgo.Record) ([]byte, error)
	// TransactionalID makes the step exactly-once: each batch of written
	// records commits with the offsets it was read at, so a restart
	// neither drops nor repeats a record in To (for read-committed
	// readers). Unique per running instance. Required.
	TransactionalID string
	// MaxPollRecords bounds one transaction. Default: 1000.
	MaxPollRecords int
	// ClientOpts are extra franz-go client options. Default: none.
	ClientOpts []kgo.Opt
	// OnBatch, if set, is told of each committed batch. Default: nil.
	OnBatch func(RekeyStats)
}

// RekeyStats counts what Rekey did.
type RekeyStats struct {
	Moved   int64 // records written to To and committed
	Skipped int64 // records Key failed on
	Aborted int64 // batches aborted (a rebalance), read again
}

// Validate reports every problem with c at once.
func (c *RekeyConfig) Validate() error {
	var errs []error
	bad := groupChecks(&errs, c.Brokers, c.Group)
	if c.From == "" || c.To == "" || c.From == c.To {
		bad("From %q and To %q must be set and differ", c.From, c.To)
	}
	if c.Key == nil {
		bad("Key is nil")
	}
	if c.TransactionalID == "" {
		bad("TransactionalID is empty")
	}
	if c.MaxPollRecords < 0 {
		bad("negative MaxPollRecords")
	}
	return errors.Join(errs...)
}

// Rekey copies every record of From to To under a new key, in
// transactions that also commit the group's offsets in From: the step
// that lets an event naming two entities reach the instances that own
// the second one. Run one or more instances in one group; it runs until
// ctx ends (returning nil) or the transaction fails for good.
//
// Records of one From partition keep their order in To; records from
// different From partitions interleave in no set order, so the To
// topic's pipelines need a MaxDisorder that covers how far the re-keying
// instances may lag each other.
func Rekey(ctx context.Context, cfg RekeyConfig) (RekeyStats, error) {
	var st RekeyStats
	if err := cfg.Validate(); err != nil {
		return st, err
	}
	if cfg.MaxPollRecords == 0 {
		cfg.MaxPollRecords = 1000
	}
	opts := append([]kgo.Opt{
		kgo.SeedBrokers(cfg.Brokers...),
		kgo.ConsumerGroup(cfg.Group),
		kgo.ConsumeTopics(cfg.From),
		kgo.ConsumeResetOffset(kgo.NewOffset().AtStart()),
		kgo.FetchIsolationLevel(kgo.ReadCommitted()),
		kgo.RequireStableFetchOffsets(),
		kgo.TransactionalID(cfg.TransactionalID),
		kgo.DefaultProduceTopic(cfg.To),
	}, cfg.ClientOpts...)
	s, err := kgo.NewGroupTransactSession(opts...)
	if err != nil {
		return st, err
	}
	defer s.Close()
	for ctx.Err() == nil {
		fs := s.PollRecords(ctx, cfg.MaxPollRecords)
		if fs.IsClientClosed() || ctx.Err() != nil {
			break
		}
		if fs.NumRecords() == 0 {
			continue
		}
		if err := s.Begin(); err != nil {
			return st, err
		}
		var moved, skipped int64
		var prodErr error
		fs.EachRecord(func(r *kgo.Record) {
			k, err := cfg.Key(r)
			if err != nil {
				skipped++
				return
			}
			moved++
			s.Produce(ctx, &kgo.Record{Key: k, Value: r.Value, Headers: r.Headers, Timestamp: r.Timestamp}, func(_ *kgo.Record, err error) {
				if err != nil && prodErr == nil {
					prodErr = err
				}
			})
		})
		committed, err := s.End(context.WithoutCancel(ctx), kgo.TransactionEndTry(prodErr == nil))
		if err != nil {
			return st, err
		}
		if !committed {
			st.Aborted++ // the session rewound to the committed offsets
			continue
		}
		st.Moved += moved
		st.Skipped += skipped
		if cfg.OnBatch != nil {
			cfg.OnBatch(st)
		}
	}
	return st, nil
}
