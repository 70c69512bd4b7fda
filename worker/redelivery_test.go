package worker

import (
	"bytes"
	"context"
	"math/rand/v2"
	"slices"
	"testing"
	"time"

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
	return finalStatesWith(t, sites, Config{}, submit)
}

// finalStatesWith is finalStates with the actors' Config.
func finalStatesWith(t *testing.T, sites []model.Site, cfg Config, submit func(p *Pool)) map[string][]byte {
	t.Helper()
	p, err := NewPool(sites, cfg, &recorder{}, PoolOptions{Health: HealthOptions{Every: -1}})
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
		if again, err := a.Snapshot(seq); err != nil || !bytes.Equal(again, data) {
			t.Fatalf("%s: the restored actor's snapshot differs from the one it was restored from (%v)", s.ID, err)
		}
		if cfg.Reorder > 0 && a.Held() == 0 {
			t.Errorf("%s: nothing held by the reorder window at the end", s.ID)
		}
		if out[s.ID], err = a.Snapshot(0); err != nil {
			t.Fatal(err)
		}
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

// TestShuffledWithinWindowKeepsState: inputs that arrive shuffled within
// the reorder window (each arriving before any input later than it by the
// window or more), under stream sequences in their order of arrival, and
// each delivered twice, leave every site in the state that inputs in
// order leave; without the window the shuffled order does not (the test
// can tell).
func TestShuffledWithinWindowKeepsState(t *testing.T) {
	h := synth.Fleet(synth.FleetOptions{Days: 8})
	type msg struct {
		subject string
		data    []byte
		key     time.Time // event time
		arrive  time.Time
	}
	const window = 2 * time.Hour
	rng := rand.New(rand.NewPCG(3, 5))
	var inOrder []msg
	for _, ev := range h.Events() {
		var m msg
		switch {
		case ev.Run != nil:
			m = msg{stream.WeatherSubject(ev.Run.Site), stream.AppendWeatherJSON(nil, ev.Run), ev.Run.IssuedAt, time.Time{}}
		case ev.Reading != nil:
			m = msg{stream.MeterSubject(ev.Reading.Site), stream.AppendMeterJSON(nil, ev.Reading), ev.Reading.End(), time.Time{}}
		}
		// Arriving at event time plus a delay under the window: whatever
		// arrives before an input is earlier than it plus the window.
		m.arrive = m.key.Add(time.Duration(rng.Int64N(int64(window))))
		inOrder = append(inOrder, m)
	}
	shuffled := slices.Clone(inOrder)
	slices.SortStableFunc(shuffled, func(a, b msg) int { return a.arrive.Compare(b.arrive) })
	moved := 0
	for i := range shuffled {
		if shuffled[i].subject != inOrder[i].subject || !bytes.Equal(shuffled[i].data, inOrder[i].data) {
			moved++
		}
	}
	if moved < len(inOrder)/4 {
		t.Fatalf("only %d of %d inputs moved by the shuffle", moved, len(inOrder))
	}
	t.Logf("%d of %d inputs of %d sites arrive out of place (window %s), each twice", moved, len(inOrder), len(h.Sites), window)
	submit := func(ms []msg, twice bool) func(p *Pool) {
		return func(p *Pool) {
			for i, m := range ms {
				for range 1 + btoi(twice) {
					if err := p.SubmitSeq(m.subject, m.data, uint64(i+1), nil); err != nil {
						t.Fatal(err)
					}
				}
			}
		}
	}
	cfg := Config{Reorder: window}
	clean := finalStatesWith(t, h.Sites, cfg, submit(inOrder, false))
	mixed := finalStatesWith(t, h.Sites, cfg, submit(shuffled, true))
	for _, s := range h.Sites {
		if len(clean[s.ID]) == 0 {
			t.Fatalf("%s: empty state", s.ID)
		}
		if !bytes.Equal(mixed[s.ID], clean[s.ID]) {
			t.Errorf("%s: inputs shuffled within the %s window (and redelivered) change the state", s.ID, window)
		}
	}
	// Without the window, the same shuffle is seen.
	plain := finalStates(t, h.Sites, submit(inOrder, false))
	plainMixed := finalStates(t, h.Sites, submit(shuffled, false))
	differ := 0
	for _, s := range h.Sites {
		if !bytes.Equal(plain[s.ID], plainMixed[s.ID]) {
			differ++
		}
	}
	if differ == 0 {
		t.Error("without a reorder window the shuffled inputs leave the same states: the test cannot tell")
	}
}

func btoi(b bool) int {
	if b {
		return 1
	}
	return 0
}
