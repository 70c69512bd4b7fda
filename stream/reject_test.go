package stream

import (
	"encoding/json"
	"errors"
	"fmt"
	"strings"
	"testing"
)

func TestRejectErrorMessage(t *testing.T) {
	cases := []struct {
		name string
		err  *RejectError
		want string
	}{
		{"with site", &RejectError{Reason: ReasonUnknownSite, Site: "x", Detail: "not in the registry"},
			`reject unknown_site: site "x": not in the registry`},
		{"without site", &RejectError{Reason: ReasonMalformed, Detail: "empty batch"}, `reject malformed: empty batch`},
		{"reason only", &RejectError{Reason: ReasonTooLate}, `reject too_late`},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			if got := tc.err.Error(); got != tc.want {
				t.Errorf("Error() = %q, want %q", got, tc.want)
			}
		})
	}
}

func TestRejectOf(t *testing.T) {
	inner := &RejectError{Reason: ReasonDuplicate, Site: "pv-a"}
	wrapped := fmt.Errorf("worker: apply: %w", inner)
	if r, ok := RejectOf(wrapped); !ok || r != ReasonDuplicate {
		t.Errorf("RejectOf(wrapped) = %q, %v; want %q, true", r, ok, ReasonDuplicate)
	}
	if r, ok := RejectOf(errors.New("plain")); ok || r != "" {
		t.Errorf("RejectOf(plain) = %q, %v; want \"\", false", r, ok)
	}
	if _, ok := RejectOf(nil); ok {
		t.Error("RejectOf(nil) reports a reason")
	}
}

func TestReasonsAreUniqueSnakeCase(t *testing.T) {
	seen := map[Reason]bool{}
	for _, r := range Reasons() {
		if seen[r] {
			t.Errorf("reason %q listed twice", r)
		}
		seen[r] = true
		if r == "" || strings.Trim(string(r), "abcdefghijklmnopqrstuvwxyz_") != "" {
			t.Errorf("reason %q is not snake_case", r)
		}
	}
	if len(seen) != 12 {
		t.Errorf("%d reasons, want 12", len(seen))
	}
}

func TestNewReject(t *testing.T) {
	err := fmt.Errorf("decode: %w", &RejectError{Reason: ReasonNotFinite, Site: "pv-a", Detail: `field "power_mw" is "NaN"`})
	got := NewReject("plumb.in.meter.pv-a", 93, err)
	want := Reject{Subject: "plumb.in.meter.pv-a", Site: "pv-a", Reason: "not_finite", Detail: `field "power_mw" is "NaN"`, Bytes: 93}
	if got != want {
		t.Errorf("NewReject = %+v, want %+v", got, want)
	}
	got = NewReject("plumb.in.meter.pv-a", 5, errors.New("boom"))
	if got.Reason != string(ReasonMalformed) || got.Detail != "boom" {
		t.Errorf("NewReject(plain error) = %+v", got)
	}
}

// TestGoldenReject pins the JSON form of a Reject payload, a wire format.
func TestGoldenReject(t *testing.T) {
	_, err := testDecoder().Meter("pv-a", []byte(meterJSON(`"pv-a"`, `"2026-03-01T10:07:00Z"`, "15", "1")))
	if err == nil {
		t.Fatal("misaligned reading accepted")
	}
	r := NewReject(MeterSubject("pv-a"), 88, err)
	got, jerr := json.MarshalIndent(r, "", "  ")
	if jerr != nil {
		t.Fatal(jerr)
	}
	checkGolden(t, "reject.json", append(got, '\n'))
}

func TestQuoteTruncates(t *testing.T) {
	long := strings.Repeat("é", 100) // 200 bytes
	q := quote(long)
	if !strings.HasSuffix(q, `"...`) || len(q) > maxQuoted+8 {
		t.Errorf("quote of a long string = %q", q)
	}
	if strings.Contains(q, `\x`) {
		t.Errorf("quote split a UTF-8 sequence: %q", q)
	}
}
