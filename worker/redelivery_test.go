package worker

import (
	"bytes"
	"context"
	"testing"

	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/model/synth"
	"github.com/plumb-forecast/plumb/stream"
)

// streamInputs turns a history into input messages (subject, payload), in
// event-time order, as plumb replay publishes them.
func streamInputs(t *testing.T, days int) ([]model.Site, [][2][]byte) {
	t.Helper()
	h := synth.Fleet(synth.FleetOptions{Days: days})
	var out [][2][]byte
	for _, ev := range h.Events() {
		switch {
		case ev.Run != nil:
			out = append(out, [2][]byte{[]byte(stream.WeatherSubject(ev.Run.Site)), stream.AppendWeatherJSON(nil, ev.Run)})
		case ev.Reading != nil:
			out = append(out, [2][]byte{[]byte(stream.MeterSubject(ev.Reading.Site)), stream.AppendMeterJSON(nil, ev.Reading)})
		}
	}
	return h.Sites, out
}

// finalStates runs a pool over the submissions and returns, per site, the
// actor's snapshot re-taken at sequence 0 (so that runs fed different
// sequence numbers compare by state alone).
func finalStates(t *testing.T, sites []model.Site, submit func(p *Pool)) map[string][]byte {
	t.Helper()
	p, err := NewPool(sites, Config{}, &recorder{}, PoolOptions{Health: HealthOptions{Every: -1}})
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- p.Run(ctx) }()
	submit(p)
	waitIdle(t, p)
	out := map[string][]byte{}
	for _, s := range sites {
		data, seq, err := p.Snapshot(context.Background(), s.ID)
		if err != nil {
			t.Fatal(err)
		}
		a, _, err := RestoreActor(s, p.Config(), data)
		if err != nil {
			t.Fatal(err)
		}
		if out[s.ID], err = a.Snapshot(0); err != nil {
			t.Fatal(err)
		}
		_ = seq
	}
	cancel()
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	return out
}

// TestRedeliveryAndDuplicatesKeepState: the same inputs delivered once,
// delivered twice under the same stream sequence (a redelivery after a
// lost acknowledgement), and published twice under two sequences (a
// duplicate the stream did not catch) leave every site in the same state.
func TestRedeliveryAndDuplicatesKeepState(t *testing.T) {
	sites, msgs := streamInputs(t, 6)
	clean := finalStates(t, sites, func(p *Pool) {
		for i, m := range msgs {
			if err := p.SubmitSeq(string(m[0]), m[1], uint64(i+1), nil); err != nil {
				t.Fatal(err)
			}
		}
	})
	redelivered := finalStates(t, sites, func(p *Pool) {
		for i, m := range msgs {
			for range 2 {
				if err := p.SubmitSeq(string(m[0]), m[1], uint64(i+1), nil); err != nil {
					t.Fatal(err)
				}
			}
			// And an old one again, out of order, now and then.
			if i%97 == 0 && i > 10 {
				old := msgs[i-10]
				if err := p.SubmitSeq(string(old[0]), old[1], uint64(i-9), nil); err != nil {
					t.Fatal(err)
				}
			}
		}
	})
	duplicated := finalStates(t, sites, func(p *Pool) {
		for i, m := range msgs {
			for k := range 2 {
				if err := p.SubmitSeq(string(m[0]), m[1], uint64(2*i+k+1), nil); err != nil {
					t.Fatal(err)
				}
			}
		}
	})
	for _, s := range sites {
		if len(clean[s.ID]) == 0 {
			t.Fatalf("%s: empty state", s.ID)
		}
		if !bytes.Equal(redelivered[s.ID], clean[s.ID]) {
			t.Errorf("%s: redelivered inputs change the state", s.ID)
		}
		if !bytes.Equal(duplicated[s.ID], clean[s.ID]) {
			t.Errorf("%s: duplicated inputs change the state", s.ID)
		}
	}
}
