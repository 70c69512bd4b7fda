package jet_test

import (
	"context"
	"slices"
	"testing"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"github.com/plumb-forecast/plumb/stream"
	"github.com/plumb-forecast/plumb/stream/jet"
	"github.com/plumb-forecast/plumb/stream/jet/jettest"
)

// TestPartitionConsumer checks that a partition's consumer sees its
// partition's inputs only, with explicit acks and the bound on pending acks,
// and that a start sequence replays from there.
func TestPartitionConsumer(t *testing.T) {
	_, js := jettest.Connect(t, jettest.Server(t))
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	const n = 4
	if err := jet.Ensure(ctx, js, jet.Layout{Partitions: n}); err != nil {
		t.Fatal(err)
	}
	pt, err := jet.NewPartitioner(n)
	if err != nil {
		t.Fatal(err)
	}
	// Inputs of sites in partition 0, and of others, interleaved.
	var wantSeqs []uint64 // sequences of partition 0's inputs
	t0 := time.Date(2024, 5, 1, 0, 0, 0, 0, time.UTC)
	for i, site := range siteIDs(24) {
		ack, err := jet.PublishMeter(ctx, js, site, t0.Add(time.Duration(i)*time.Minute), []byte(site))
		if err != nil {
			t.Fatal(err)
		}
		if p, _ := pt.Of(site); p == 0 {
			wantSeqs = append(wantSeqs, ack.Sequence)
		}
	}
	if len(wantSeqs) < 3 {
		t.Fatalf("only %d of 24 sites in partition 0; pick other ids", len(wantSeqs))
	}

	// fetchSeqs reads and acks n messages, waiting for them at most 5s; with
	// n = 0 it takes what is there at once.
	fetchSeqs := func(c jetstream.Consumer, n int) []uint64 {
		t.Helper()
		var batch jetstream.MessageBatch
		var err error
		if n == 0 {
			batch, err = c.FetchNoWait(10)
		} else {
			batch, err = c.Fetch(n, jetstream.FetchMaxWait(5*time.Second))
		}
		if err != nil {
			t.Fatal(err)
		}
		var seqs []uint64
		for m := range batch.Messages() {
			md, err := m.Metadata()
			if err != nil {
				t.Fatal(err)
			}
			subj, p, err := jet.InputSubject(m.Subject())
			if err != nil || p != 0 {
				t.Errorf("partition 0 consumer got %q (partition %d, %v)", m.Subject(), p, err)
			}
			if _, site, err := stream.ParseInputSubject(subj); err != nil || string(m.Data()) != site {
				t.Errorf("message %q holds %q", subj, m.Data())
			}
			seqs = append(seqs, md.Sequence.Stream)
			if err := m.Ack(); err != nil {
				t.Fatal(err)
			}
		}
		if err := batch.Error(); err != nil {
			t.Fatal(err)
		}
		return seqs
	}

	c, err := jet.PartitionConsumer(ctx, js, 0, jet.ConsumerOptions{MaxAckPending: 2})
	if err != nil {
		t.Fatal(err)
	}
	cfg := c.CachedInfo().Config
	if cfg.Durable != jet.ConsumerName(0) || cfg.AckPolicy != jetstream.AckExplicitPolicy || cfg.MaxAckPending != 2 || cfg.FilterSubject != jet.PartitionFilter(0) {
		t.Errorf("consumer config %+v", cfg)
	}
	// Unacked, the bound stops delivery at 2.
	batch, err := c.FetchNoWait(10)
	if err != nil {
		t.Fatal(err)
	}
	var held []jetstream.Msg
	for m := range batch.Messages() {
		held = append(held, m)
	}
	if err := batch.Error(); err != nil {
		t.Fatal(err)
	}
	if len(held) != 2 {
		t.Errorf("fetched %d unacked messages with MaxAckPending 2", len(held))
	}
	for _, m := range held {
		if err := m.Ack(); err != nil {
			t.Fatal(err)
		}
	}
	// Widen the bound, keep the position, read the rest.
	c, err = jet.PartitionConsumer(ctx, js, 0, jet.ConsumerOptions{MaxAckPending: 100})
	if err != nil {
		t.Fatal(err)
	}
	got := fetchSeqs(c, len(wantSeqs)-2)
	if !slices.Equal(got, wantSeqs[2:]) {
		t.Errorf("resumed consumer read %v, want %v", got, wantSeqs[2:])
	}
	// A restart from a snapshot covering up to the second input replays
	// from the sequence after it.
	from := wantSeqs[1] + 1
	c, err = jet.PartitionConsumer(ctx, js, 0, jet.ConsumerOptions{StartSeq: from})
	if err != nil {
		t.Fatal(err)
	}
	if got := fetchSeqs(c, len(wantSeqs)-2); !slices.Equal(got, wantSeqs[2:]) {
		t.Errorf("consumer from seq %d read %v, want %v", from, got, wantSeqs[2:])
	}
	// Two owners' consumers of the same partition are apart: each gets
	// every input from its start (a worker that lost its lease without
	// knowing cannot take its successor's deliveries), and is deleted by
	// the server once inactive.
	a, err := jet.PartitionConsumer(ctx, js, 0, jet.ConsumerOptions{StartSeq: from, Owner: "w1-1"})
	if err != nil {
		t.Fatal(err)
	}
	b, err := jet.PartitionConsumer(ctx, js, 0, jet.ConsumerOptions{StartSeq: wantSeqs[0], Owner: "w2-1", InactiveAfter: time.Minute})
	if err != nil {
		t.Fatal(err)
	}
	if ia, ib := a.CachedInfo(), b.CachedInfo(); ia.Name != "plumb-in-0-w1-1" || ib.Name != "plumb-in-0-w2-1" ||
		ia.Config.InactiveThreshold != jet.DefaultInactiveAfter || ib.Config.InactiveThreshold != time.Minute {
		t.Errorf("owned consumers %q (inactive after %v), %q (%v)", ia.Name, ia.Config.InactiveThreshold, ib.Name, ib.Config.InactiveThreshold)
	}
	if got := fetchSeqs(a, len(wantSeqs)-2); !slices.Equal(got, wantSeqs[2:]) {
		t.Errorf("owner w1-1 read %v, want %v", got, wantSeqs[2:])
	}
	if got := fetchSeqs(b, len(wantSeqs)); !slices.Equal(got, wantSeqs) {
		t.Errorf("owner w2-1 read %v, want %v", got, wantSeqs)
	}
	if _, err := jet.PartitionConsumer(ctx, js, 0, jet.ConsumerOptions{StartSeq: 1, Owner: "w1.x"}); err == nil {
		t.Error("an owner with a dot was taken")
	}
	// Asking again for the same start replays from it again, although
	// the consumer has acknowledged past it: a worker restored from
	// snapshots that cover less than was acknowledged (a crash between
	// snapshots) must see those inputs again.
	c, err = jet.PartitionConsumer(ctx, js, 0, jet.ConsumerOptions{StartSeq: from})
	if err != nil {
		t.Fatal(err)
	}
	if got := fetchSeqs(c, len(wantSeqs)-2); !slices.Equal(got, wantSeqs[2:]) {
		t.Errorf("consumer asked again from seq %d read %v, want %v", from, got, wantSeqs[2:])
	}
}
