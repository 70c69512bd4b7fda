package jet_test

import (
	"context"
	"errors"
	"fmt"
	"testing"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"github.com/plumb-forecast/plumb/stream"
	"github.com/plumb-forecast/plumb/stream/jet"
	"github.com/plumb-forecast/plumb/stream/jet/jettest"
)

// siteIDs returns n distinct valid site ids of varied shapes.
func siteIDs(n int) []string {
	ids := make([]string, 0, n)
	shapes := []string{"site-%d", "WF_%03d", "pv%dx", "a-%d-b_c", "%d"}
	for i := 0; len(ids) < n; i++ {
		ids = append(ids, fmt.Sprintf(shapes[i%len(shapes)], i))
	}
	return ids
}

// TestPartitionOfMatchesServer publishes inputs for many sites to a real
// input stream and checks that the partition the server stored each one
// under is the one PartitionOf gives, for weather and meter alike.
func TestPartitionOfMatchesServer(t *testing.T) {
	_, js := jettest.Connect(t, jettest.Server(t))
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()

	for _, n := range []int{16, 7} {
		t.Run(fmt.Sprintf("partitions=%d", n), func(t *testing.T) {
			if err := js.DeleteStream(ctx, jet.InputStream); err != nil && !errors.Is(err, jetstream.ErrStreamNotFound) {
				t.Fatal(err)
			}
			if err := jet.Ensure(ctx, js, jet.Layout{Partitions: n}); err != nil {
				t.Fatal(err)
			}
			sites := siteIDs(300)
			pt, err := jet.NewPartitioner(n)
			if err != nil {
				t.Fatal(err)
			}
			type pub struct {
				subject string
				seq     uint64
			}
			var pubs []pub
			for _, site := range sites {
				for _, subj := range []string{stream.WeatherSubject(site), stream.MeterSubject(site)} {
					ack, err := js.Publish(ctx, subj, []byte("{}"))
					if err != nil {
						t.Fatal(err)
					}
					pubs = append(pubs, pub{subj, ack.Sequence})
				}
			}
			s, err := js.Stream(ctx, jet.InputStream)
			if err != nil {
				t.Fatal(err)
			}
			used := make(map[int]bool)
			for _, p := range pubs {
				m, err := s.GetMsg(ctx, p.seq)
				if err != nil {
					t.Fatal(err)
				}
				orig, part, err := jet.InputSubject(m.Subject)
				if err != nil {
					t.Fatalf("stored subject %q: %v", m.Subject, err)
				}
				if orig != p.subject {
					t.Fatalf("stored %q turns back into %q, published %q", m.Subject, orig, p.subject)
				}
				_, site, err := stream.ParseInputSubject(orig)
				if err != nil {
					t.Fatal(err)
				}
				want, err := jet.PartitionOf(site, n)
				if err != nil {
					t.Fatal(err)
				}
				if got, _ := pt.Of(site); got != want {
					t.Fatalf("Partitioner.Of(%q) = %d, PartitionOf = %d", site, got, want)
				}
				if part != want {
					t.Errorf("site %q: server stored %q in partition %d, PartitionOf says %d", site, m.Subject, part, want)
				}
				used[part] = true
			}
			// 300 sites over n partitions leave none empty unless the
			// hash ignored the site.
			if len(used) != n {
				t.Errorf("sites fell in %d partitions of %d", len(used), n)
			}
		})
	}
}

func TestPartitionOfInvalid(t *testing.T) {
	tests := []struct {
		name string
		site string
		n    int
		want error
	}{
		{"empty site", "", 16, jet.ErrBadSite},
		{"dot in site", "a.b", 16, jet.ErrBadSite},
		{"wildcard site", "*", 16, jet.ErrBadSite},
		{"zero partitions", "a", 0, jet.ErrBadLayout},
		{"negative partitions", "a", -3, jet.ErrBadLayout},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			if _, err := jet.PartitionOf(tt.site, tt.n); !errors.Is(err, tt.want) {
				t.Errorf("PartitionOf(%q, %d) error = %v, want %v", tt.site, tt.n, err, tt.want)
			}
		})
	}
}

func TestPartitionOfOnePartition(t *testing.T) {
	for _, site := range siteIDs(50) {
		if p, err := jet.PartitionOf(site, 1); err != nil || p != 0 {
			t.Fatalf("PartitionOf(%q, 1) = %d, %v; want 0", site, p, err)
		}
	}
}

func TestInputSubject(t *testing.T) {
	tests := []struct {
		name    string
		stored  string
		subject string
		part    int
		wantErr bool
	}{
		{"meter", "plumb.in.3.meter.site-a", "plumb.in.meter.site-a", 3, false},
		{"weather", "plumb.in.15.weather.WF_1", "plumb.in.weather.WF_1", 15, false},
		{"published form", "plumb.in.meter.site-a", "", 0, true},
		{"no tail", "plumb.in.3", "", 0, true},
		{"empty tail", "plumb.in.3.", "", 0, true},
		{"negative", "plumb.in.-1.meter.a", "", 0, true},
		{"leading zero", "plumb.in.03.meter.a", "", 0, true},
		{"other prefix", "plumb.out.3.meter.a", "", 0, true},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			subj, p, err := jet.InputSubject(tt.stored)
			if tt.wantErr {
				if !errors.Is(err, jet.ErrNotStored) {
					t.Errorf("InputSubject(%q) error = %v, want ErrNotStored", tt.stored, err)
				}
				return
			}
			if err != nil || subj != tt.subject || p != tt.part {
				t.Errorf("InputSubject(%q) = %q, %d, %v; want %q, %d", tt.stored, subj, p, err, tt.subject, tt.part)
			}
		})
	}
}

// TestInputSubjectsCaptured checks that the input stream captures exactly
// the input subjects of the wire contract (package stream).
func TestInputSubjectsCaptured(t *testing.T) {
	cfg, err := jet.Layout{}.InputStreamConfig()
	if err != nil {
		t.Fatal(err)
	}
	_, js := jettest.Connect(t, jettest.Server(t))
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	if _, err := js.CreateOrUpdateStream(ctx, cfg); err != nil {
		t.Fatal(err)
	}
	for _, subj := range []string{stream.WeatherSubject("s1"), stream.MeterSubject("s1")} {
		if _, _, err := stream.ParseInputSubject(subj); err != nil {
			t.Fatal(err)
		}
		if _, err := js.Publish(ctx, subj, nil); err != nil {
			t.Errorf("publish %s: %v", subj, err)
		}
	}
	// Not inputs: no stream answers.
	for _, subj := range []string{"plumb.in.other.s1", stream.QuantilesSubject("s1")} {
		if _, err := js.Publish(ctx, subj, nil); !errors.Is(err, jetstream.ErrNoStreamResponse) {
			t.Errorf("publish %s: error %v, want no stream response", subj, err)
		}
	}
}

// TestPartitionOfMatchesAccountMapping configures the partition mapping on a
// server's account instead of a stream, publishes on core NATS, and checks
// that each message arrives on the partition PartitionOf gives.
func TestPartitionOfMatchesAccountMapping(t *testing.T) {
	e, err := stream.StartEmbedded(stream.EmbeddedOptions{Port: -1, StoreDir: t.TempDir()})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(e.Shutdown)
	const n = 16
	src, dest := jet.PartitionMapping(n)
	if err := e.Server().GlobalAccount().AddMapping(src, dest); err != nil {
		t.Fatal(err)
	}
	nc, _ := jettest.Connect(t, e.URL())
	sub, err := nc.SubscribeSync("plumb.in.*.*.*")
	if err != nil {
		t.Fatal(err)
	}
	if err := nc.Flush(); err != nil {
		t.Fatal(err)
	}
	sites := siteIDs(200)
	for _, site := range sites {
		if err := nc.Publish(stream.WeatherSubject(site), nil); err != nil {
			t.Fatal(err)
		}
	}
	for _, site := range sites {
		m, err := sub.NextMsg(5 * time.Second)
		if err != nil {
			t.Fatal(err)
		}
		orig, part, err := jet.InputSubject(m.Subject)
		if err != nil || orig != stream.WeatherSubject(site) {
			t.Fatalf("mapped subject %q for site %q (%v)", m.Subject, site, err)
		}
		if want, _ := jet.PartitionOf(site, n); part != want {
			t.Errorf("site %q: account mapping gives partition %d, PartitionOf %d", site, part, want)
		}
	}
}
