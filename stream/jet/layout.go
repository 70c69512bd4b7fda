// Package jet is plumb's JetStream layout as code: the streams and key-value
// buckets plumb needs, how input subjects are partitioned, publish helpers
// that let the server drop duplicate inputs, and the durable pull consumer of
// one partition.
//
// # Streams and buckets
//
//	name             kind       captures / holds
//	PLUMB_INPUTS     stream     plumb.in.weather.<site>, plumb.in.meter.<site>,
//	                            stored as plumb.in.<partition>.<kind>.<site>
//	PLUMB_BUNDLES    stream     plumb.out.quantiles.> (one message per subject:
//	                            the latest bundle of each site)
//	plumb_snapshots  KV bucket  key <site>: the site actor's snapshot
//	plumb_leases     KV bucket  partition leases and worker heartbeats (package
//	                            lease); entries expire after the lease TTL
//
// Ensure creates all of them, or updates them to the given [Layout].
//
// # Partitions
//
// Sites are spread over partitions by the NATS server's own deterministic
// partition function, applied by the input stream's subject transform:
//
//	plumb.in.*.*  ->  plumb.in.{{partition(P,2)}}.{{wildcard(1)}}.{{wildcard(2)}}
//
// The partition hashes the site token only, so the weather runs and the meter
// readings of one site land in the same partition. The transform lives in the
// stream's configuration: no mapping is needed in the server's configuration,
// publishers keep publishing on plumb.in.<kind>.<site>, and a worker reads one
// partition with a consumer filtered on plumb.in.<p>.> ([PartitionConsumer]).
// [PartitionOf] computes the same partition with the server's own transform
// code, and [InputSubject] turns a stored subject back into the published one.
//
// Changing the number of partitions of an existing input stream would split
// the history of a site over two partitions; [Ensure] refuses it with
// [ErrPartitionsChanged].
//
// # Duplicates and restarts
//
// Publishers use [PublishWeather] and [PublishMeter], which set the message
// id (Nats-Msg-Id) of the input, so the input stream drops a second copy
// published inside the duplicate window. Workers publish bundles with core
// NATS as before; the bundle stream captures them.
//
// A worker that gains the lease of a partition (package lease) restores the
// snapshots of the partition's sites, each stamped with the last input stream
// sequence it covers, and calls [PartitionConsumer] with a start sequence one
// past the lowest of them, skipping for each site the inputs its snapshot
// already covers. The durable consumer of a partition is shared by whoever holds
// the lease in turn.
package jet

import (
	"context"
	"errors"
	"fmt"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"github.com/plumb-forecast/plumb/stream"
)

// The input subjects of the wire contract (package stream), as wildcards.
const (
	weatherWildcard = "plumb.in.weather.*"
	meterWildcard   = "plumb.in.meter.*"
)

// Names of plumb's streams and buckets.
const (
	// InputStream keeps weather runs and meter readings, partitioned.
	InputStream = "PLUMB_INPUTS"
	// BundleStream keeps the latest quantile bundle of each site.
	BundleStream = "PLUMB_BUNDLES"
	// SnapshotBucket is the KV bucket of site actor snapshots, keyed by site id.
	SnapshotBucket = "plumb_snapshots"
	// LeaseBucket is the KV bucket of partition leases and worker heartbeats.
	LeaseBucket = "plumb_leases"
)

// Defaults of a zero [Layout].
const (
	DefaultPartitions      = 16
	DefaultReplicas        = 1
	DefaultDuplicateWindow = 2 * time.Minute
	DefaultInputMaxAge     = 7 * 24 * time.Hour
	DefaultBundleMaxAge    = 48 * time.Hour
	DefaultLeaseTTL        = 10 * time.Second
)

// Layout sets the sizes and lifetimes of plumb's streams and buckets. The
// zero value is a valid single-server layout; each zero field means its
// default.
type Layout struct {
	// Partitions is the number of input partitions, the unit of work a worker
	// leases; 0 means 16. It cannot change once the input stream exists.
	Partitions int
	// Replicas of every stream and bucket; 0 means 1. Use 3 on a 3-server
	// cluster so that losing one server loses nothing.
	Replicas int
	// DuplicateWindow is how long the input stream remembers message ids
	// (Nats-Msg-Id) to drop duplicates; 0 means 2 minutes.
	DuplicateWindow time.Duration
	// InputMaxAge is how long inputs are kept; 0 means 7 days. Snapshots must
	// be taken more often than this for a restart to replay from them.
	InputMaxAge time.Duration
	// InputMaxBytes caps the input stream's size, the oldest inputs going
	// first; 0 means no cap.
	InputMaxBytes int64
	// BundleMaxAge is how long the latest bundle of a site is kept; 0 means
	// 48 hours (a bundle reaches to the end of the next day at most).
	BundleMaxAge time.Duration
	// LeaseTTL is the lifetime of a partition lease or worker heartbeat that
	// is not renewed; 0 means 10 seconds. At least 1 second (the server's
	// minimum for the expiry markers the lease bucket keeps).
	LeaseTTL time.Duration
}

// ErrPartitionsChanged is returned by Ensure when the input stream exists
// with another number of partitions.
var ErrPartitionsChanged = errors.New("jet: the input stream exists with another number of partitions")

// ErrBadLayout is returned by Ensure for a layout with invalid values.
var ErrBadLayout = errors.New("jet: invalid layout")

func (l Layout) withDefaults() (Layout, error) {
	def := func(d *time.Duration, v time.Duration) {
		if *d == 0 {
			*d = v
		}
	}
	if l.Partitions == 0 {
		l.Partitions = DefaultPartitions
	}
	if l.Replicas == 0 {
		l.Replicas = DefaultReplicas
	}
	def(&l.DuplicateWindow, DefaultDuplicateWindow)
	def(&l.InputMaxAge, DefaultInputMaxAge)
	def(&l.BundleMaxAge, DefaultBundleMaxAge)
	def(&l.LeaseTTL, DefaultLeaseTTL)
	switch {
	case l.Partitions < 1:
		return l, fmt.Errorf("%w: %d partitions", ErrBadLayout, l.Partitions)
	case l.Replicas < 1 || l.Replicas > 5:
		return l, fmt.Errorf("%w: %d replicas (1 to 5)", ErrBadLayout, l.Replicas)
	case l.DuplicateWindow < 0 || l.InputMaxAge < 0 || l.BundleMaxAge < 0:
		return l, fmt.Errorf("%w: negative duration", ErrBadLayout)
	case l.DuplicateWindow > l.InputMaxAge:
		return l, fmt.Errorf("%w: duplicate window %v longer than input max age %v", ErrBadLayout, l.DuplicateWindow, l.InputMaxAge)
	case l.InputMaxBytes < 0:
		return l, fmt.Errorf("%w: negative input max bytes", ErrBadLayout)
	case l.LeaseTTL < time.Second:
		return l, fmt.Errorf("%w: lease TTL %v under 1s", ErrBadLayout, l.LeaseTTL)
	}
	return l, nil
}

// InputStreamConfig returns the configuration Ensure gives the input stream.
func (l Layout) InputStreamConfig() (jetstream.StreamConfig, error) {
	l, err := l.withDefaults()
	if err != nil {
		return jetstream.StreamConfig{}, err
	}
	maxBytes := l.InputMaxBytes
	if maxBytes == 0 {
		maxBytes = -1
	}
	src, dest := PartitionMapping(l.Partitions)
	return jetstream.StreamConfig{
		Name:             InputStream,
		Description:      "plumb inputs: weather runs and meter readings, partitioned by site",
		Subjects:         []string{weatherWildcard, meterWildcard},
		SubjectTransform: &jetstream.SubjectTransformConfig{Source: src, Destination: dest},
		Retention:        jetstream.LimitsPolicy,
		Discard:          jetstream.DiscardOld,
		MaxAge:           l.InputMaxAge,
		MaxBytes:         maxBytes,
		Duplicates:       l.DuplicateWindow,
		Storage:          jetstream.FileStorage,
		Replicas:         l.Replicas,
		MaxMsgSize:       -1,
	}, nil
}

// BundleStreamConfig returns the configuration Ensure gives the latest-bundle
// stream: one message per subject, so a late reader gets the current bundle
// of each site at once (for example with a consumer delivering the last
// message per subject, or a direct get of the last message for a subject).
func (l Layout) BundleStreamConfig() (jetstream.StreamConfig, error) {
	l, err := l.withDefaults()
	if err != nil {
		return jetstream.StreamConfig{}, err
	}
	return jetstream.StreamConfig{
		Name:              BundleStream,
		Description:       "plumb quantile bundles: the latest of each site",
		Subjects:          []string{stream.QuantilesWildcard},
		Retention:         jetstream.LimitsPolicy,
		Discard:           jetstream.DiscardOld,
		MaxMsgsPerSubject: 1,
		MaxAge:            l.BundleMaxAge,
		MaxBytes:          -1,
		MaxMsgSize:        -1,
		Storage:           jetstream.FileStorage,
		Replicas:          l.Replicas,
		AllowDirect:       true,
	}, nil
}

// SnapshotBucketConfig returns the configuration Ensure gives the snapshot
// bucket: the latest snapshot of each site, kept until replaced.
func (l Layout) SnapshotBucketConfig() (jetstream.KeyValueConfig, error) {
	l, err := l.withDefaults()
	if err != nil {
		return jetstream.KeyValueConfig{}, err
	}
	return jetstream.KeyValueConfig{
		Bucket:      SnapshotBucket,
		Description: "plumb site actor snapshots, keyed by site id",
		History:     1,
		Storage:     jetstream.FileStorage,
		Replicas:    l.Replicas,
	}, nil
}

// LeaseBucketConfig returns the configuration Ensure gives the lease bucket:
// every entry expires LeaseTTL after its last write (the bucket's MaxAge, on
// the servers' clocks), and the expiry leaves a marker, kept LeaseTTL long, so
// that watchers learn of it at once.
func (l Layout) LeaseBucketConfig() (jetstream.KeyValueConfig, error) {
	l, err := l.withDefaults()
	if err != nil {
		return jetstream.KeyValueConfig{}, err
	}
	return jetstream.KeyValueConfig{
		Bucket:         LeaseBucket,
		Description:    "plumb partition leases and worker heartbeats",
		History:        1,
		TTL:            l.LeaseTTL,
		LimitMarkerTTL: l.LeaseTTL,
		Storage:        jetstream.FileStorage,
		Replicas:       l.Replicas,
	}, nil
}

// Ensure creates plumb's streams and buckets, or updates them to l; it is
// idempotent. It returns ErrBadLayout for invalid values and
// ErrPartitionsChanged if the input stream exists with another number of
// partitions (nothing is changed then).
func Ensure(ctx context.Context, js jetstream.JetStream, l Layout) error {
	in, err := l.InputStreamConfig()
	if err != nil {
		return err
	}
	bundles, err := l.BundleStreamConfig()
	if err != nil {
		return err
	}
	snaps, err := l.SnapshotBucketConfig()
	if err != nil {
		return err
	}
	leases, err := l.LeaseBucketConfig()
	if err != nil {
		return err
	}

	switch s, err := js.Stream(ctx, InputStream); {
	case errors.Is(err, jetstream.ErrStreamNotFound):
	case err != nil:
		return fmt.Errorf("jet: look up stream %s: %w", InputStream, err)
	default:
		tr := s.CachedInfo().Config.SubjectTransform
		if tr == nil || *tr != *in.SubjectTransform {
			have := "none"
			if tr != nil {
				have = tr.Destination
			}
			return fmt.Errorf("%w: stream %s maps to %s, layout wants %s", ErrPartitionsChanged, InputStream, have, in.SubjectTransform.Destination)
		}
	}
	for _, cfg := range []jetstream.StreamConfig{in, bundles} {
		if _, err := js.CreateOrUpdateStream(ctx, cfg); err != nil {
			return fmt.Errorf("jet: ensure stream %s: %w", cfg.Name, err)
		}
	}
	for _, cfg := range []jetstream.KeyValueConfig{snaps, leases} {
		if _, err := js.CreateOrUpdateKeyValue(ctx, cfg); err != nil {
			return fmt.Errorf("jet: ensure bucket %s: %w", cfg.Bucket, err)
		}
	}
	return nil
}
