package jet

import (
	"cmp"
	"context"
	"errors"
	"fmt"
	"strconv"
	"time"

	"github.com/nats-io/nats.go/jetstream"
)

// Defaults of a zero [ConsumerOptions].
const (
	DefaultMaxAckPending = 256
	DefaultAckWait       = 30 * time.Second
)

// ConsumerOptions configures the consumer of one partition. The zero value
// resumes where the partition's acknowledgements left off.
type ConsumerOptions struct {
	// StartSeq, if not 0, makes the consumer deliver from this input stream
	// sequence on: a worker taking a partition over passes one more than the
	// lowest sequence its restored snapshots cover. An existing durable
	// consumer of the partition is deleted and created anew, even one made
	// with the same start: it may have acknowledged past it, and the
	// inputs the snapshots do not cover must be delivered again. With 0 an
	// existing durable consumer is kept, and a new one starts at the
	// beginning of the stream.
	StartSeq uint64
	// MaxAckPending bounds the messages delivered and not yet acknowledged;
	// 0 means 256. The server stops delivering at the bound, which bounds
	// the worker's queue.
	MaxAckPending int
	// AckWait is how long the server waits for an acknowledgement before
	// delivering a message again; 0 means 30 seconds.
	AckWait time.Duration
	// Owner, if not empty, names a consumer of the partition's current
	// reader alone: plumb-in-<p>-<Owner> (a KV-key-like token: letters,
	// digits, '-', '_'). A worker that lost its lease without knowing it
	// yet then reads from a consumer of its own, and cannot take deliveries
	// from its successor's. Such a consumer is deleted by the server after
	// InactiveAfter without a pull.
	Owner string
	// InactiveAfter: see Owner; 0 means 5 minutes. Not used without Owner.
	InactiveAfter time.Duration
}

// DefaultInactiveAfter is the default ConsumerOptions.InactiveAfter.
const DefaultInactiveAfter = 5 * time.Minute

// ConsumerName returns the name of the shared durable consumer of
// partition p: plumb-in-<p>. It outlives its reader, so the next one
// resumes from its acknowledgements. Durable workers do not share it: each
// read uses a consumer named for its reader (ConsumerOptions.Owner) and
// starts from the sequence its snapshots cover.
func ConsumerName(p int) string { return "plumb-in-" + strconv.Itoa(p) }

// PartitionConsumer creates, or updates, the durable pull consumer of
// partition p of the input stream: filtered on plumb.in.<p>.>, with explicit
// acknowledgements, a bounded number of pending acknowledgements and the
// start sequence of o. A non-zero StartSeq always makes delivery start
// there, replacing an existing consumer (whatever it acknowledged); with
// StartSeq 0 an existing consumer resumes where its acknowledgements left
// off. Only the holder of the partition's lease should call it, since it
// may delete and recreate the consumer.
func PartitionConsumer(ctx context.Context, js jetstream.JetStream, p int, o ConsumerOptions) (jetstream.Consumer, error) {
	if p < 0 {
		panic("jet: negative partition " + strconv.Itoa(p))
	}
	if o.MaxAckPending == 0 {
		o.MaxAckPending = DefaultMaxAckPending
	}
	if o.AckWait == 0 {
		o.AckWait = DefaultAckWait
	}
	if o.MaxAckPending < 0 || o.AckWait < 0 {
		return nil, fmt.Errorf("jet: consumer options: negative MaxAckPending or AckWait")
	}
	name := ConsumerName(p)
	var inactive time.Duration
	if o.Owner != "" {
		if !validOwner(o.Owner) {
			return nil, fmt.Errorf("jet: consumer owner %q: letters, digits, '-' and '_' only", o.Owner)
		}
		name += "-" + o.Owner
		inactive = cmp.Or(o.InactiveAfter, DefaultInactiveAfter)
	}
	cfg := jetstream.ConsumerConfig{
		InactiveThreshold: inactive,
		Durable:           name,
		Description:       "plumb inputs of partition " + strconv.Itoa(p),
		FilterSubject:     PartitionFilter(p),
		AckPolicy:         jetstream.AckExplicitPolicy,
		AckWait:           o.AckWait,
		MaxAckPending:     o.MaxAckPending,
		DeliverPolicy:     jetstream.DeliverAllPolicy,
	}
	if o.StartSeq > 0 {
		cfg.DeliverPolicy = jetstream.DeliverByStartSequencePolicy
		cfg.OptStartSeq = o.StartSeq
	}
	c, err := js.Consumer(ctx, InputStream, name)
	switch {
	case errors.Is(err, jetstream.ErrConsumerNotFound):
	case err != nil:
		return nil, fmt.Errorf("jet: look up consumer %s: %w", name, err)
	case o.StartSeq == 0:
		// Keep where it starts; update the rest.
		have := c.CachedInfo().Config
		cfg.DeliverPolicy, cfg.OptStartSeq = have.DeliverPolicy, have.OptStartSeq
	default:
		// Delivery must start at StartSeq even when the consumer was made
		// with the same start before and has acknowledged past it (a
		// restore from snapshots that cover less than was acknowledged):
		// replace it.
		if err := js.DeleteConsumer(ctx, InputStream, name); err != nil && !errors.Is(err, jetstream.ErrConsumerNotFound) {
			return nil, fmt.Errorf("jet: replace consumer %s: %w", name, err)
		}
	}
	c, err = js.CreateOrUpdateConsumer(ctx, InputStream, cfg)
	if err != nil {
		return nil, fmt.Errorf("jet: consumer %s: %w", name, err)
	}
	return c, nil
}

func validOwner(s string) bool {
	if len(s) > 64 {
		return false
	}
	for _, r := range s {
		switch {
		case r >= 'a' && r <= 'z', r >= 'A' && r <= 'Z', r >= '0' && r <= '9', r == '-', r == '_':
		default:
			return false
		}
	}
	return true
}
