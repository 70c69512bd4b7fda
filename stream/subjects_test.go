package stream

import (
	"testing"

	"github.com/nats-io/nats-server/v2/server"
)

func TestSubjectBuilders(t *testing.T) {
	cases := []struct {
		name     string
		build    func(string) string
		site     string
		want     string
		wildcard string
	}{
		{"weather", WeatherSubject, "pv-a", "plumb.in.weather.pv-a", InputsWildcard},
		{"meter", MeterSubject, "wind_B2", "plumb.in.meter.wind_B2", InputsWildcard},
		{"quantiles", QuantilesSubject, "pv-a", "plumb.out.quantiles.pv-a", QuantilesWildcard},
		{"alarms", AlarmsSubject, "pv-a", "plumb.out.alarms.pv-a", AlarmsWildcard},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			got := tc.build(tc.site)
			if got != tc.want {
				t.Fatalf("subject %q, want %q", got, tc.want)
			}
			// Checked with the NATS server's own subject rules.
			if !server.IsValidLiteralSubject(got) {
				t.Errorf("%q is not a valid literal NATS subject", got)
			}
			if !server.SubjectMatchesFilter(got, tc.wildcard) {
				t.Errorf("%q does not match %q", got, tc.wildcard)
			}
			for _, other := range []string{InputsWildcard, QuantilesWildcard, AlarmsWildcard} {
				if other != tc.wildcard && server.SubjectMatchesFilter(got, other) {
					t.Errorf("%q also matches %q", got, other)
				}
			}
			if server.SubjectMatchesFilter(RejectsSubject, tc.wildcard) {
				t.Errorf("%q matches %q", RejectsSubject, tc.wildcard)
			}
		})
	}
	if !server.IsValidLiteralSubject(RejectsSubject) {
		t.Errorf("%q is not a valid literal subject", RejectsSubject)
	}
}

func TestSubjectBuilderPanicsOnBadSite(t *testing.T) {
	for _, site := range []string{"", "a.b", "*", ">", "pv a"} {
		func() {
			defer func() {
				if recover() == nil {
					t.Errorf("WeatherSubject(%q) did not panic", site)
				}
			}()
			WeatherSubject(site)
		}()
	}
}

func TestParseInputSubject(t *testing.T) {
	good := []struct {
		subject string
		kind    InputKind
		site    string
	}{
		{"plumb.in.weather.pv-a", InputWeather, "pv-a"},
		{"plumb.in.meter.wind_B2", InputMeter, "wind_B2"},
		{WeatherSubject("x"), InputWeather, "x"},
		{MeterSubject("x"), InputMeter, "x"},
	}
	for _, tc := range good {
		kind, site, err := ParseInputSubject(tc.subject)
		if err != nil || kind != tc.kind || site != tc.site {
			t.Errorf("ParseInputSubject(%q) = %v, %q, %v; want %v, %q", tc.subject, kind, site, err, tc.kind, tc.site)
		}
	}
	bad := []struct{ name, subject string }{
		{"empty", ""},
		{"no site", "plumb.in.weather."},
		{"prefix only", "plumb.in.meter"},
		{"two site tokens", "plumb.in.meter.pv.a"},
		{"wildcard site *", "plumb.in.meter.*"},
		{"wildcard site >", "plumb.in.weather.>"},
		{"unknown kind", "plumb.in.radar.pv-a"},
		{"output subject", "plumb.out.quantiles.pv-a"},
		{"rejects subject", RejectsSubject},
		{"upper-case prefix", "PLUMB.in.meter.pv-a"},
		{"space in site", "plumb.in.meter.pv a"},
	}
	for _, tc := range bad {
		t.Run(tc.name, func(t *testing.T) {
			kind, site, err := ParseInputSubject(tc.subject)
			if err == nil {
				t.Fatalf("no error; got %v, %q", kind, site)
			}
			if r, ok := RejectOf(err); !ok || r != ReasonBadSubject {
				t.Errorf("reason %v (%v), want %s", r, err, ReasonBadSubject)
			}
			if kind != 0 || site != "" {
				t.Errorf("kind %v, site %q returned with an error", kind, site)
			}
		})
	}
}

func TestParseInputSubjectAllocs(t *testing.T) {
	// ParseInputSubject runs for every input message.
	n := testing.AllocsPerRun(100, func() {
		if _, _, err := ParseInputSubject("plumb.in.meter.pv-a"); err != nil {
			t.Fatal(err)
		}
	})
	if n != 0 {
		t.Errorf("%v allocations per call, want 0", n)
	}
}

func TestInputKindString(t *testing.T) {
	for k, want := range map[InputKind]string{InputWeather: "weather", InputMeter: "meter", 0: "InputKind(0)", 7: "InputKind(7)"} {
		if got := k.String(); got != want {
			t.Errorf("InputKind(%d).String() = %q, want %q", int(k), got, want)
		}
	}
}
