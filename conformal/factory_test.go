package conformal

import (
	"errors"
	"math"
	"slices"
	"strings"
	"testing"
)

func TestNew(t *testing.T) {
	cases := []struct {
		name   string
		opt    Options
		method string
		gamma  float64 // for aci
	}{
		{"empty method is aci", Options{}, "aci", DefaultGamma},
		{"aci with gamma", Options{Method: "aci", Gamma: 0.05}, "aci", 0.05},
		{"case and spaces ignored", Options{Method: " ACI "}, "aci", DefaultGamma},
		{"none", Options{Method: "none", Gamma: 0.3}, "none", 0},
		{"pid", Options{Method: "pid", Gamma: 0.3}, "pid", 0},
		{"dtaci", Options{Method: "DtACI"}, "dtaci", 0},
		{"split", Options{Method: "split"}, "split", 0},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			cal, err := New(0.9, c.opt)
			if err != nil {
				t.Fatal(err)
			}
			if cal.Name() != c.method {
				t.Fatalf("method %q, want %q", cal.Name(), c.method)
			}
			if a, ok := cal.(*ACI); ok && a.Gamma() != c.gamma {
				t.Errorf("gamma %v, want %v", a.Gamma(), c.gamma)
			}
		})
	}
}

func TestNewErrors(t *testing.T) {
	cases := []struct {
		name    string
		level   float64
		opt     Options
		unknown bool
		want    string
	}{
		{"unknown method", 0.5, Options{Method: "magic"}, true, `"magic" (known methods: aci, none, pid, dtaci, split)`},
		{"level 0", 0, Options{}, false, "level 0 is outside (0, 1)"},
		{"level above 1", 1.2, Options{Method: "none"}, false, "outside (0, 1)"},
		{"negative gamma", 0.5, Options{Gamma: -1}, false, "gamma -1"},
		{"NaN gamma", 0.5, Options{Gamma: math.NaN()}, false, "gamma NaN"},
		{"level 1 for pid", 1, Options{Method: "pid"}, false, "level 1 is outside"},
		{"pid negative LR", 0.5, Options{Method: "pid", Tracker: TrackerOptions{LR: -1}}, false, "pid lr -1"},
		{"dtaci sigma 2", 0.5, Options{Method: "dtaci", DtACI: DtACIOptions{Sigma: 2}}, false, "dtaci sigma 2"},
		{"split window -1", 0.5, Options{Method: "split", Split: SplitOptions{Window: -1}}, false, "split window -1"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			cal, err := New(c.level, c.opt)
			if err == nil {
				t.Fatalf("New gave %v, want an error", cal.Name())
			}
			if errors.Is(err, ErrUnknownMethod) != c.unknown {
				t.Errorf("errors.Is(err, ErrUnknownMethod) = %v, want %v", !c.unknown, c.unknown)
			}
			if !strings.Contains(err.Error(), c.want) || !strings.HasPrefix(err.Error(), "conformal: ") {
				t.Errorf("error %q: want the prefix conformal: and %q", err, c.want)
			}
		})
	}
}

func TestMethodsAreAllBuildable(t *testing.T) {
	m := Methods()
	if !slices.Equal(m, []string{"aci", "none", "pid", "dtaci", "split"}) {
		t.Errorf("Methods() = %v", m)
	}
	for _, name := range m {
		cal, err := New(0.5, Options{Method: name})
		if err != nil || cal.Name() != name {
			t.Errorf("New(%q): %v, %v", name, cal, err)
		}
	}
	m[0] = "changed"
	if Methods()[0] != "aci" {
		t.Error("Methods returns a shared slice")
	}
}

func TestNone(t *testing.T) {
	n := NewNone(0.25)
	for _, o := range []Outcome{missOutcome, hitOutcome, {Y: math.NaN()}} {
		n.Update(o)
		if l, off := n.Adjust(); l != 0.25 || off != 0 {
			t.Errorf("Adjust = (%v, %v), want (0.25, 0)", l, off)
		}
	}
	b, _ := n.MarshalBinary()
	var r None
	if err := r.UnmarshalBinary(b); err != nil || r.Level() != 0.25 {
		t.Errorf("round trip: level %v, err %v", r.Level(), err)
	}
	for _, bad := range [][]byte{nil, {9, 0, 0, 0, 0, 0, 0, 0, 0}, b[:5], appendFloat([]byte{1}, 2)} {
		if err := r.UnmarshalBinary(bad); !errors.Is(err, ErrState) {
			t.Errorf("UnmarshalBinary(% x) = %v, want ErrState", bad, err)
		}
	}
	if err := r.UnmarshalBinary([]byte{9, 0, 0, 0, 0, 0, 0, 0, 0}); !strings.Contains(err.Error(), "unknown version 9") {
		t.Errorf("error %q does not name the unknown version", err)
	}
	defer func() {
		if recover() == nil {
			t.Error("NewNone(1) did not panic")
		}
	}()
	NewNone(1)
}

// TestNewPassesOptions: each method gets its own options from New.
func TestNewPassesOptions(t *testing.T) {
	o := Options{
		Tracker: TrackerOptions{LR: 0.02, Window: 30},
		DtACI:   DtACIOptions{Experts: 3},
		Split:   SplitOptions{Window: 40},
	}
	o.Method = "pid"
	if c, err := New(0.9, o); err != nil || c.(*Tracker).Options().LR != 0.02 || c.(*Tracker).Options().Window != 30 {
		t.Errorf("pid: %v %v", c, err)
	}
	o.Method = "dtaci"
	if c, err := New(0.9, o); err != nil || len(c.(*DtACI).gammas) != 3 {
		t.Errorf("dtaci: %v %v", c, err)
	}
	o.Method = "split"
	if c, err := New(0.9, o); err != nil || c.(*Split).Window() != 40 {
		t.Errorf("split: %v %v", c, err)
	}
	// Options stay comparable (no slices or maps): this map would not
	// compile otherwise.
	if m := map[Options]bool{o: true}; !m[o] {
		t.Error("Options is not usable as a map key")
	}
}
