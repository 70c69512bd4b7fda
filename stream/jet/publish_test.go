package jet_test

import (
	"context"
	"errors"
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/stream/jet"
	"github.com/plumb-forecast/plumb/stream/jet/jettest"
)

func TestMsgIDs(t *testing.T) {
	t0 := time.Date(2024, 3, 1, 6, 0, 0, 0, time.UTC)
	east := time.FixedZone("east", 3600)
	tests := []struct {
		name string
		a, b string
		same bool
	}{
		{"weather same run, other zone", jet.WeatherMsgID("s1", t0, "nwp-a"), jet.WeatherMsgID("s1", t0.In(east), "nwp-a"), true},
		{"weather other source", jet.WeatherMsgID("s1", t0, "nwp-a"), jet.WeatherMsgID("s1", t0, "nwp-b"), false},
		{"weather other issue", jet.WeatherMsgID("s1", t0, ""), jet.WeatherMsgID("s1", t0.Add(time.Hour), ""), false},
		{"weather other site", jet.WeatherMsgID("s1", t0, ""), jet.WeatherMsgID("s2", t0, ""), false},
		{"weather source cannot fake a site", jet.WeatherMsgID("s1", t0, "x/y"), jet.WeatherMsgID("s1", t0, "x%2Fy"), false},
		{"meter same interval, other zone", jet.MeterMsgID("s1", t0), jet.MeterMsgID("s1", t0.In(east)), true},
		{"meter other interval", jet.MeterMsgID("s1", t0), jet.MeterMsgID("s1", t0.Add(15*time.Minute)), false},
		{"meter and weather apart", jet.MeterMsgID("s1", t0), jet.WeatherMsgID("s1", t0, ""), false},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			if (tt.a == tt.b) != tt.same {
				t.Errorf("%q vs %q: same = %v, want %v", tt.a, tt.b, tt.a == tt.b, tt.same)
			}
		})
	}
	if id := jet.WeatherMsgID("s1", t0, "line\r\nbreak"); containsAny(id, "\r\n ") {
		t.Errorf("message id %q holds characters a header value cannot", id)
	}
}

func containsAny(s, chars string) bool {
	for _, c := range chars {
		for _, r := range s {
			if r == c {
				return true
			}
		}
	}
	return false
}

// TestDuplicateDropped publishes the same weather run and meter reading twice
// inside the duplicate window: the stream keeps one of each.
func TestDuplicateDropped(t *testing.T) {
	_, js := jettest.Connect(t, jettest.Server(t))
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	if err := jet.Ensure(ctx, js, jet.Layout{}); err != nil {
		t.Fatal(err)
	}
	issued := time.Date(2024, 3, 1, 6, 0, 0, 0, time.UTC)
	type pubFn func() (dup bool, seq uint64, err error)
	weather := func(at time.Time) pubFn {
		return func() (bool, uint64, error) {
			ack, err := jet.PublishWeather(ctx, js, "hill-3", at, "nwp-a", []byte(`{"run":1}`))
			if err != nil {
				return false, 0, err
			}
			return ack.Duplicate, ack.Sequence, nil
		}
	}
	meter := func(at time.Time) pubFn {
		return func() (bool, uint64, error) {
			ack, err := jet.PublishMeter(ctx, js, "hill-3", at, []byte(`{"power_mw":1}`))
			if err != nil {
				return false, 0, err
			}
			return ack.Duplicate, ack.Sequence, nil
		}
	}
	steps := []struct {
		name    string
		pub     pubFn
		dup     bool
		wantSeq uint64
	}{
		{"weather first", weather(issued), false, 1},
		{"weather again", weather(issued), true, 1},
		{"weather again in another zone", weather(issued.In(time.FixedZone("x", -7200))), true, 1},
		{"meter first", meter(issued), false, 2},
		{"meter again", meter(issued), true, 2},
		{"meter next interval", meter(issued.Add(15 * time.Minute)), false, 3},
	}
	for _, st := range steps {
		dup, seq, err := st.pub()
		if err != nil {
			t.Fatalf("%s: %v", st.name, err)
		}
		if dup != st.dup || seq != st.wantSeq {
			t.Errorf("%s: duplicate %v at seq %d, want %v at %d", st.name, dup, seq, st.dup, st.wantSeq)
		}
	}
	s, err := js.Stream(ctx, jet.InputStream)
	if err != nil {
		t.Fatal(err)
	}
	info, err := s.Info(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if info.State.Msgs != 3 {
		t.Errorf("input stream holds %d messages, want 3", info.State.Msgs)
	}
	if _, err := jet.PublishMeter(ctx, js, "bad.site", issued, nil); !errors.Is(err, jet.ErrBadSite) {
		t.Errorf("publish for an invalid site: %v, want ErrBadSite", err)
	}
}
