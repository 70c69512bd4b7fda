package stream

import (
	"compress/gzip"
	"encoding/csv"
	"encoding/json"
	"errors"
	"fmt"
	"github.com/plumb-forecast/plumb/internal/sharedtest"
	"io"
	"math"
	"os"
	"path/filepath"
	"reflect"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/model"
)

// testSites is an invented fleet: a 5 MW PV plant and a 20 MW wind farm.
func testSites() map[string]model.Site {
	return map[string]model.Site{
		"pv-a":   {ID: "pv-a", Kind: model.KindPV, CapacityMW: 5},
		"wind-b": {ID: "wind-b", Kind: model.KindWind, CapacityMW: 20},
	}
}

func testDecoder() *Decoder { return &Decoder{Sites: testSites()} }

func utc(s string) time.Time {
	t, err := time.Parse(time.RFC3339, s)
	if err != nil {
		panic(err)
	}
	return t.UTC()
}

// meterJSON builds one meter row; extra is spliced in verbatim
// (`"availability":0.5`), and a field set to "-" is left out.
func meterJSON(site, start, minutes, power string, extra ...string) string {
	var parts []string
	add := func(k, v string) {
		if v != "-" {
			parts = append(parts, fmt.Sprintf("%q:%s", k, v))
		}
	}
	add("site", site)
	add("interval_start", start)
	add("interval_minutes", minutes)
	add("power_mw", power)
	parts = append(parts, extra...)
	return "{" + strings.Join(parts, ",") + "}"
}

// goodMeter is a valid reading of pv-a.
func goodMeter(extra ...string) string {
	return meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "15", "3.2", extra...)
}

func TestMeterGood(t *testing.T) {
	cases := []struct {
		name string
		dec  *Decoder
		subj string
		data string
		want []model.Reading
	}{
		{
			name: "single object, all fields",
			subj: "pv-a",
			data: `{"site":"pv-a","interval_start":"2026-03-01T10:00:00Z","interval_minutes":15,"power_mw":3.2,"availability":0.9,"curtailed":true}`,
			want: []model.Reading{{Site: "pv-a", IntervalStart: utc("2026-03-01T10:00:00Z"), IntervalMinutes: 15, PowerMW: 3.2, Availability: 0.9, Curtailed: true}},
		},
		{
			name: "defaults: availability 1, not curtailed",
			subj: "pv-a",
			data: goodMeter(),
			want: []model.Reading{{Site: "pv-a", IntervalStart: utc("2026-03-01T10:00:00Z"), IntervalMinutes: 15, PowerMW: 3.2, Availability: 1}},
		},
		{
			name: "null optional fields take their defaults",
			subj: "pv-a",
			data: goodMeter(`"availability":null`, `"curtailed":null`),
			want: []model.Reading{{Site: "pv-a", IntervalStart: utc("2026-03-01T10:00:00Z"), IntervalMinutes: 15, PowerMW: 3.2, Availability: 1}},
		},
		{
			name: "batch keeps message order; offsets become UTC; unknown fields ignored",
			subj: "pv-a",
			data: "[" + meterJSON(`"pv-a"`, `"2026-03-01T11:15:00+01:00"`, "15", "2") + ",\n " +
				meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "5", "0", `"note":"x"`) + "]",
			want: []model.Reading{
				{Site: "pv-a", IntervalStart: utc("2026-03-01T10:15:00Z"), IntervalMinutes: 15, PowerMW: 2, Availability: 1},
				{Site: "pv-a", IntervalStart: utc("2026-03-01T10:00:00Z"), IntervalMinutes: 5, PowerMW: 0, Availability: 1},
			},
		},
		{
			name: "small negative power within tolerance, whole-day interval, minutes written 60.0",
			subj: "pv-a",
			data: "[" + meterJSON(`"pv-a"`, `"2026-03-01T00:00:00Z"`, "1440", "-0.05") + "," +
				meterJSON(`"pv-a"`, `"2026-03-01T23:00:00Z"`, "60.0", "0") + "]",
			want: []model.Reading{
				{Site: "pv-a", IntervalStart: utc("2026-03-01T00:00:00Z"), IntervalMinutes: 1440, PowerMW: -0.05, Availability: 1},
				{Site: "pv-a", IntervalStart: utc("2026-03-01T23:00:00Z"), IntervalMinutes: 60, PowerMW: 0, Availability: 1},
			},
		},
		{
			name: "power at the default factor bound (5.5 MW for 5 MW)",
			subj: "pv-a",
			data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "15", "5.5"),
			want: []model.Reading{{Site: "pv-a", IntervalStart: utc("2026-03-01T10:00:00Z"), IntervalMinutes: 15, PowerMW: 5.5, Availability: 1}},
		},
		{
			name: "PowerFactor option widens the bound",
			dec:  &Decoder{Sites: testSites(), PowerFactor: 1.2},
			subj: "pv-a",
			data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "15", "5.9"),
			want: []model.Reading{{Site: "pv-a", IntervalStart: utc("2026-03-01T10:00:00Z"), IntervalMinutes: 15, PowerMW: 5.9, Availability: 1}},
		},
		{
			name: "no subject: several known sites",
			subj: "",
			data: "[" + goodMeter() + "," + meterJSON(`"wind-b"`, `"2026-03-01T10:00:00Z"`, "15", "19") + "]",
			want: []model.Reading{
				{Site: "pv-a", IntervalStart: utc("2026-03-01T10:00:00Z"), IntervalMinutes: 15, PowerMW: 3.2, Availability: 1},
				{Site: "wind-b", IntervalStart: utc("2026-03-01T10:00:00Z"), IntervalMinutes: 15, PowerMW: 19, Availability: 1},
			},
		},
		{
			name: "batch spanning exactly 31 days",
			subj: "pv-a",
			data: "[" + goodMeter() + "," + meterJSON(`"pv-a"`, `"2026-04-01T10:00:00Z"`, "15", "1") + "]",
			want: []model.Reading{
				{Site: "pv-a", IntervalStart: utc("2026-03-01T10:00:00Z"), IntervalMinutes: 15, PowerMW: 3.2, Availability: 1},
				{Site: "pv-a", IntervalStart: utc("2026-04-01T10:00:00Z"), IntervalMinutes: 15, PowerMW: 1, Availability: 1},
			},
		},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			dec := tc.dec
			if dec == nil {
				dec = testDecoder()
			}
			got, err := dec.Meter(tc.subj, []byte(tc.data))
			if err != nil {
				t.Fatalf("Meter: %v", err)
			}
			if !reflect.DeepEqual(got, tc.want) {
				t.Errorf("Meter =\n%+v\nwant\n%+v", got, tc.want)
			}
			for _, r := range got {
				if r.IntervalStart.Location() != time.UTC {
					t.Errorf("interval start %v not in UTC", r.IntervalStart)
				}
			}
		})
	}
}

// rejectCase is one bad input and the reason it must give.
type rejectCase struct {
	name   string
	dec    *Decoder
	subj   string
	data   string
	reason Reason
	site   string // the RejectError's site; "" means subj
}

func checkReject(t *testing.T, tc rejectCase, decode func(*Decoder, string, []byte) error) {
	t.Helper()
	dec := tc.dec
	if dec == nil {
		dec = testDecoder()
	}
	err := decode(dec, tc.subj, []byte(tc.data))
	if err == nil {
		t.Fatalf("no error, want %s", tc.reason)
	}
	var re *RejectError
	if !errors.As(err, &re) {
		t.Fatalf("error %v (%T) is not a *RejectError", err, err)
	}
	if re.Reason != tc.reason {
		t.Errorf("reason %s (%v), want %s", re.Reason, err, tc.reason)
	}
	wantSite := tc.site
	if wantSite == "" {
		wantSite = tc.subj
	}
	if re.Site != wantSite {
		t.Errorf("site %q (%v), want %q", re.Site, err, wantSite)
	}
	if re.Detail == "" {
		t.Errorf("empty detail")
	}
}

func TestMeterRejects(t *testing.T) {
	rows := func(n int, row string) string {
		return "[" + strings.Repeat(row+",", n-1) + row + "]"
	}
	cases := []rejectCase{
		// malformed
		{name: "not JSON", subj: "pv-a", data: `{"site":`, reason: ReasonMalformed},
		{name: "trailing garbage", subj: "pv-a", data: goodMeter() + " x", reason: ReasonMalformed},
		{name: "JSON string payload", subj: "pv-a", data: `"hello"`, reason: ReasonMalformed},
		{name: "JSON number payload", subj: "pv-a", data: `42`, reason: ReasonMalformed},
		{name: "empty payload", subj: "pv-a", data: ``, reason: ReasonMalformed},
		{name: "empty batch", subj: "pv-a", data: `[]`, reason: ReasonMalformed},
		{name: "array of numbers", subj: "pv-a", data: `[1,2]`, reason: ReasonMalformed},
		{name: "power as a numeric string", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "15", `"3.2"`), reason: ReasonMalformed},
		{name: "power as a boolean", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "15", `true`), reason: ReasonMalformed},
		{name: "minutes as an object", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, `{}`, "1"), reason: ReasonMalformed},
		{name: "site as a number", subj: "pv-a", data: meterJSON(`7`, `"2026-03-01T10:00:00Z"`, "15", "1"), reason: ReasonMalformed},
		{name: "interval_start as a number", subj: "pv-a", data: meterJSON(`"pv-a"`, `1772359200`, "15", "1"), reason: ReasonMalformed},
		{name: "curtailed as a string", subj: "pv-a", data: goodMeter(`"curtailed":"yes"`), reason: ReasonMalformed},
		// missing_field
		{name: "missing site", subj: "pv-a", data: meterJSON("-", `"2026-03-01T10:00:00Z"`, "15", "1"), reason: ReasonMissingField},
		{name: "null site", subj: "pv-a", data: meterJSON("null", `"2026-03-01T10:00:00Z"`, "15", "1"), reason: ReasonMissingField},
		{name: "missing interval_start", subj: "pv-a", data: meterJSON(`"pv-a"`, "-", "15", "1"), reason: ReasonMissingField},
		{name: "missing interval_minutes", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "-", "1"), reason: ReasonMissingField},
		{name: "missing power_mw", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "15", "-"), reason: ReasonMissingField},
		{name: "null power_mw", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "15", "null"), reason: ReasonMissingField},
		{name: "empty object in a batch", subj: "pv-a", data: "[" + goodMeter() + ",{}]", reason: ReasonMissingField},
		// unknown_site and site_mismatch
		{name: "unknown subject site", subj: "pv-z", data: goodMeter(), reason: ReasonUnknownSite},
		{name: "unknown payload site, no subject", subj: "", data: meterJSON(`"pv-z"`, `"2026-03-01T10:00:00Z"`, "15", "1"), reason: ReasonUnknownSite, site: "pv-z"},
		{name: "unknown payload site that is no valid id, no subject", subj: "", data: meterJSON(`"a.b"`, `"2026-03-01T10:00:00Z"`, "15", "1"), reason: ReasonUnknownSite},
		{name: "zero decoder knows no site", dec: &Decoder{}, subj: "pv-a", data: goodMeter(), reason: ReasonUnknownSite},
		{name: "site mismatch", subj: "pv-a", data: meterJSON(`"wind-b"`, `"2026-03-01T10:00:00Z"`, "15", "1"), reason: ReasonSiteMismatch, site: "wind-b"},
		{name: "site mismatch in row 2", subj: "pv-a", data: "[" + goodMeter() + "," + meterJSON(`"pv-b"`, `"2026-03-01T10:00:00Z"`, "15", "1") + "]", reason: ReasonSiteMismatch, site: "pv-b"},
		// not_finite
		{name: "power string NaN", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "15", `"NaN"`), reason: ReasonNotFinite},
		{name: "power string Infinity", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "15", `"Infinity"`), reason: ReasonNotFinite},
		{name: "power string -inf", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "15", `"-inf"`), reason: ReasonNotFinite},
		{name: "power beyond float64", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "15", `1e400`), reason: ReasonNotFinite},
		{name: "power bare NaN token", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "15", `NaN`), reason: ReasonNotFinite},
		{name: "power bare -Infinity token", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "15", `-Infinity`), reason: ReasonNotFinite},
		{name: "availability NaN", subj: "pv-a", data: goodMeter(`"availability":"NaN"`), reason: ReasonNotFinite},
		{name: "minutes NaN", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, `"nan"`, "1"), reason: ReasonNotFinite},
		// out_of_range
		{name: "negative power", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "15", "-1"), reason: ReasonOutOfRange},
		{name: "power just above 1.1 x capacity", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "15", "5.51"), reason: ReasonOutOfRange},
		{name: "power way above capacity (kW sent as MW)", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "15", "3200"), reason: ReasonOutOfRange},
		{name: "power above a PowerFactor of 1.2", dec: &Decoder{Sites: testSites(), PowerFactor: 1.2}, subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "15", "6.1"), reason: ReasonOutOfRange},
		{name: "availability above 1", subj: "pv-a", data: goodMeter(`"availability":1.5`), reason: ReasonOutOfRange},
		{name: "availability below 0", subj: "pv-a", data: goodMeter(`"availability":-0.1`), reason: ReasonOutOfRange},
		// bad_interval
		{name: "zero-length interval", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "0", "1"), reason: ReasonBadInterval},
		{name: "negative interval", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "-15", "1"), reason: ReasonBadInterval},
		{name: "interval over a day", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T00:00:00Z"`, "1441", "1"), reason: ReasonBadInterval},
		{name: "fractional minutes", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "7.5", "1"), reason: ReasonBadInterval},
		{name: "15 minutes starting 10:07", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:07:00Z"`, "15", "1"), reason: ReasonBadInterval},
		{name: "start with seconds", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:30Z"`, "15", "1"), reason: ReasonBadInterval},
		{name: "start with a fraction of a second", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00.5Z"`, "15", "1"), reason: ReasonBadInterval},
		{name: "whole day starting 01:00 UTC (midnight local)", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T00:00:00-01:00"`, "1440", "1"), reason: ReasonBadInterval},
		// bad_time
		{name: "unparseable time", subj: "pv-a", data: meterJSON(`"pv-a"`, `"yesterday"`, "15", "1"), reason: ReasonBadTime},
		{name: "time with a space", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01 10:00:00Z"`, "15", "1"), reason: ReasonBadTime},
		{name: "time without zone", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2026-03-01T10:00:00"`, "15", "1"), reason: ReasonBadTime},
		{name: "before 1990", subj: "pv-a", data: meterJSON(`"pv-a"`, `"1989-12-31T23:45:00Z"`, "15", "1"), reason: ReasonBadTime},
		{name: "the epoch", subj: "pv-a", data: meterJSON(`"pv-a"`, `"1970-01-01T00:00:00Z"`, "15", "1"), reason: ReasonBadTime},
		{name: "year 2200", subj: "pv-a", data: meterJSON(`"pv-a"`, `"2200-01-01T00:00:00Z"`, "15", "1"), reason: ReasonBadTime},
		{name: "batch spread over 32 days", subj: "pv-a", data: "[" + goodMeter() + "," + meterJSON(`"pv-a"`, `"2026-04-02T10:00:00Z"`, "15", "1") + "]", reason: ReasonBadTime},
		// too_large
		{name: "payload over MaxBytes", dec: &Decoder{Sites: testSites(), MaxBytes: 64}, subj: "pv-a", data: goodMeter(), reason: ReasonTooLarge},
		{name: "payload over the default 1 MiB", subj: "pv-a", data: goodMeter() + strings.Repeat(" ", DefaultMaxBytes), reason: ReasonTooLarge},
		{name: "rows over MaxRows", dec: &Decoder{Sites: testSites(), MaxRows: 2}, subj: "pv-a", data: rows(3, goodMeter()), reason: ReasonTooLarge},
		{name: "rows over the default 10000", subj: "pv-a", data: rows(DefaultMaxRows+1, "{}"), reason: ReasonTooLarge},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			checkReject(t, tc, func(d *Decoder, subj string, data []byte) error {
				got, err := d.Meter(subj, data)
				if err != nil && got != nil {
					t.Errorf("readings %v returned with an error", got)
				}
				return err
			})
		})
	}
}

func TestMeterLimitsOff(t *testing.T) {
	// Negative MaxBytes and MaxRows lift the limits.
	dec := &Decoder{Sites: testSites(), MaxBytes: -1, MaxRows: -1}
	row := goodMeter()
	data := "[" + strings.Repeat(row+",", DefaultMaxRows) + row + "]" + strings.Repeat(" ", DefaultMaxBytes)
	got, err := dec.Meter("pv-a", []byte(data))
	if err != nil {
		t.Fatalf("Meter: %v", err)
	}
	if len(got) != DefaultMaxRows+1 {
		t.Errorf("%d readings, want %d", len(got), DefaultMaxRows+1)
	}
}

// weatherJSON builds one weather row from key/value pairs given in order
// (values verbatim JSON).
func weatherJSON(kv ...string) string {
	var parts []string
	for i := 0; i < len(kv); i += 2 {
		parts = append(parts, fmt.Sprintf("%q:%s", kv[i], kv[i+1]))
	}
	return "{" + strings.Join(parts, ",") + "}"
}

// wrow is a valid weather row of pv-a with extra fields appended; a key
// given again replaces the earlier value (the last one wins in JSON objects,
// as in encoding/json), and a value "-" removes the field.
func wrow(kv ...string) string {
	base := []string{"site", `"pv-a"`, "issued_at", `"2026-03-01T06:00:00Z"`, "source", `"nwp-1"`,
		"valid_start", `"2026-03-01T10:00:00Z"`, "valid_minutes", "60", "ghi_wm2", "512.3", "temp_c", "11.2"}
	for i := 0; i < len(kv); i += 2 {
		found := false
		for j := 0; j < len(base); j += 2 {
			if base[j] == kv[i] {
				base[j+1] = kv[i+1]
				found = true
			}
		}
		if !found {
			base = append(base, kv[i], kv[i+1])
		}
	}
	var out []string
	for i := 0; i < len(base); i += 2 {
		if base[i+1] != "-" {
			out = append(out, base[i], base[i+1])
		}
	}
	return weatherJSON(out...)
}

func TestWeatherGood(t *testing.T) {
	nan := math.NaN()
	cases := []struct {
		name string
		subj string
		data string
		want []model.WeatherRun
	}{
		{
			name: "single row",
			subj: "pv-a",
			data: wrow(),
			want: []model.WeatherRun{{Site: "pv-a", IssuedAt: utc("2026-03-01T06:00:00Z"), Source: "nwp-1",
				Vars: []string{"ghi_wm2", "temp_c"},
				Rows: []model.WeatherRow{{ValidStart: utc("2026-03-01T10:00:00Z"), ValidMinutes: 60, Values: []float64{512.3, 11.2}}}}},
		},
		{
			name: "rows sorted, union of variables, null is NaN, unknown variable kept",
			subj: "pv-a",
			data: "[" + wrow("valid_start", `"2026-03-01T12:00:00Z"`, "temp_c", "null", "snow_depth_m", "0.25") + "," +
				wrow("valid_start", `"2026-03-01T11:00:00Z"`, "wind_ms", "3.5", "temp_c", "-") + "," +
				wrow() + "]",
			want: []model.WeatherRun{{Site: "pv-a", IssuedAt: utc("2026-03-01T06:00:00Z"), Source: "nwp-1",
				Vars: []string{"ghi_wm2", "snow_depth_m", "temp_c", "wind_ms"},
				Rows: []model.WeatherRow{
					{ValidStart: utc("2026-03-01T10:00:00Z"), ValidMinutes: 60, Values: []float64{512.3, nan, 11.2, nan}},
					{ValidStart: utc("2026-03-01T11:00:00Z"), ValidMinutes: 60, Values: []float64{512.3, nan, nan, 3.5}},
					{ValidStart: utc("2026-03-01T12:00:00Z"), ValidMinutes: 60, Values: []float64{512.3, 0.25, nan, nan}},
				}}},
		},
		{
			name: "rows grouped into runs by issue time and source, runs sorted; overlap across runs is fine",
			subj: "pv-a",
			data: "[" + wrow("issued_at", `"2026-03-01T12:00:00+00:00"`) + "," +
				wrow("source", "-") + "," +
				wrow("source", "null", "valid_start", `"2026-03-01T11:00:00Z"`) + "," +
				wrow() + "," +
				wrow("valid_start", `"2026-03-01T11:00:00Z"`, "valid_minutes", "30") + "]",
			want: []model.WeatherRun{
				{Site: "pv-a", IssuedAt: utc("2026-03-01T06:00:00Z"), Source: "", Vars: []string{"ghi_wm2", "temp_c"},
					Rows: []model.WeatherRow{
						{ValidStart: utc("2026-03-01T10:00:00Z"), ValidMinutes: 60, Values: []float64{512.3, 11.2}},
						{ValidStart: utc("2026-03-01T11:00:00Z"), ValidMinutes: 60, Values: []float64{512.3, 11.2}},
					}},
				{Site: "pv-a", IssuedAt: utc("2026-03-01T06:00:00Z"), Source: "nwp-1", Vars: []string{"ghi_wm2", "temp_c"},
					Rows: []model.WeatherRow{
						{ValidStart: utc("2026-03-01T10:00:00Z"), ValidMinutes: 60, Values: []float64{512.3, 11.2}},
						{ValidStart: utc("2026-03-01T11:00:00Z"), ValidMinutes: 30, Values: []float64{512.3, 11.2}},
					}},
				{Site: "pv-a", IssuedAt: utc("2026-03-01T12:00:00Z"), Source: "nwp-1", Vars: []string{"ghi_wm2", "temp_c"},
					Rows: []model.WeatherRow{
						{ValidStart: utc("2026-03-01T10:00:00Z"), ValidMinutes: 60, Values: []float64{512.3, 11.2}},
					}},
			},
		},
		{
			name: "edges of the plausible ranges and of the valid window",
			subj: "pv-a",
			data: "[" + wrow("ghi_wm2", "-0.18", "temp_c", "-90", "cloud_frac", "1.00001", "rh_pct", "102.8",
				"valid_start", `"2026-02-19T06:00:00Z"`) + "," +
				wrow("ghi_wm2", "1500", "temp_c", "70", "cloud_frac", "0", "rh_pct", "0",
					"valid_start", `"2026-03-17T06:00:00Z"`) + "]",
			want: []model.WeatherRun{{Site: "pv-a", IssuedAt: utc("2026-03-01T06:00:00Z"), Source: "nwp-1",
				Vars: []string{"cloud_frac", "ghi_wm2", "rh_pct", "temp_c"},
				Rows: []model.WeatherRow{
					{ValidStart: utc("2026-02-19T06:00:00Z"), ValidMinutes: 60, Values: []float64{1.00001, -0.18, 102.8, -90}},
					{ValidStart: utc("2026-03-17T06:00:00Z"), ValidMinutes: 60, Values: []float64{0, 1500, 0, 70}},
				}}},
		},
		{
			name: "no subject: runs of two sites",
			subj: "",
			data: "[" + wrow("site", `"wind-b"`, "ghi_wm2", "-", "temp_c", "-", "wind_ms", "7") + "," + wrow() + "]",
			want: []model.WeatherRun{
				{Site: "pv-a", IssuedAt: utc("2026-03-01T06:00:00Z"), Source: "nwp-1", Vars: []string{"ghi_wm2", "temp_c"},
					Rows: []model.WeatherRow{{ValidStart: utc("2026-03-01T10:00:00Z"), ValidMinutes: 60, Values: []float64{512.3, 11.2}}}},
				{Site: "wind-b", IssuedAt: utc("2026-03-01T06:00:00Z"), Source: "nwp-1", Vars: []string{"wind_ms"},
					Rows: []model.WeatherRow{{ValidStart: utc("2026-03-01T10:00:00Z"), ValidMinutes: 60, Values: []float64{7}}}},
			},
		},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			got, err := testDecoder().Weather(tc.subj, []byte(tc.data))
			if err != nil {
				t.Fatalf("Weather: %v", err)
			}
			if !equalRuns(got, tc.want) {
				t.Errorf("Weather =\n%+v\nwant\n%+v", got, tc.want)
			}
		})
	}
}

// equalRuns compares runs, NaN equal to NaN.
func equalRuns(a, b []model.WeatherRun) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		x, y := &a[i], &b[i]
		if x.Site != y.Site || !x.IssuedAt.Equal(y.IssuedAt) || x.Source != y.Source ||
			!reflect.DeepEqual(x.Vars, y.Vars) || len(x.Rows) != len(y.Rows) {
			return false
		}
		for j := range x.Rows {
			r, s := &x.Rows[j], &y.Rows[j]
			if !r.ValidStart.Equal(s.ValidStart) || r.ValidMinutes != s.ValidMinutes || len(r.Values) != len(s.Values) {
				return false
			}
			for k := range r.Values {
				if r.Values[k] != s.Values[k] && !(math.IsNaN(r.Values[k]) && math.IsNaN(s.Values[k])) {
					return false
				}
			}
		}
	}
	return true
}

func TestWeatherRejects(t *testing.T) {
	cases := []rejectCase{
		// malformed
		{name: "not JSON", subj: "pv-a", data: `[{"site":"pv-a",]`, reason: ReasonMalformed},
		{name: "number payload", subj: "pv-a", data: `3`, reason: ReasonMalformed},
		{name: "empty batch", subj: "pv-a", data: ` [ ] `, reason: ReasonMalformed},
		{name: "a number in a batch", subj: "pv-a", data: "[" + wrow() + ",5]", reason: ReasonMalformed},
		{name: "variable as a numeric string", subj: "pv-a", data: wrow("ghi_wm2", `"512.3"`), reason: ReasonMalformed},
		{name: "variable as a boolean", subj: "pv-a", data: wrow("ghi_wm2", `false`), reason: ReasonMalformed},
		{name: "variable as an array", subj: "pv-a", data: wrow("ghi_wm2", `[1]`), reason: ReasonMalformed},
		{name: "variable name not lowercase", subj: "pv-a", data: wrow("GHI_wm2", `1`), reason: ReasonMalformed},
		{name: "variable name without unit", subj: "pv-a", data: wrow("note", `1`), reason: ReasonMalformed},
		{name: "source as a number", subj: "pv-a", data: wrow("source", `3`), reason: ReasonMalformed},
		{name: "site as a number", subj: "pv-a", data: wrow("site", `3`), reason: ReasonMalformed},
		{name: "issued_at as a number", subj: "pv-a", data: wrow("issued_at", `3`), reason: ReasonMalformed},
		// missing_field
		{name: "missing site", subj: "pv-a", data: wrow("site", "-"), reason: ReasonMissingField},
		{name: "missing issued_at", subj: "pv-a", data: wrow("issued_at", "-"), reason: ReasonMissingField},
		{name: "null issued_at", subj: "pv-a", data: wrow("issued_at", "null"), reason: ReasonMissingField},
		{name: "missing valid_start", subj: "pv-a", data: wrow("valid_start", "-"), reason: ReasonMissingField},
		{name: "missing valid_minutes", subj: "pv-a", data: wrow("valid_minutes", "-"), reason: ReasonMissingField},
		{name: "no variable", subj: "pv-a", data: wrow("ghi_wm2", "-", "temp_c", "-"), reason: ReasonMissingField},
		{name: "null row in a batch", subj: "pv-a", data: "[" + wrow() + ",null]", reason: ReasonMissingField},
		// unknown_site and site_mismatch
		{name: "unknown subject site", subj: "pv-z", data: wrow(), reason: ReasonUnknownSite},
		{name: "unknown payload site, no subject", subj: "", data: wrow("site", `"pv-z"`), reason: ReasonUnknownSite, site: "pv-z"},
		{name: "site mismatch", subj: "wind-b", data: wrow(), reason: ReasonSiteMismatch, site: "pv-a"},
		// not_finite
		{name: "variable string NaN", subj: "pv-a", data: wrow("ghi_wm2", `"NaN"`), reason: ReasonNotFinite},
		{name: "unknown variable string -Infinity", subj: "pv-a", data: wrow("snow_depth_m", `"-Infinity"`), reason: ReasonNotFinite},
		{name: "variable beyond float64", subj: "pv-a", data: wrow("snow_depth_m", `-1e999`), reason: ReasonNotFinite},
		{name: "bare NaN token", subj: "pv-a", data: wrow("temp_c", `NaN`), reason: ReasonNotFinite},
		{name: "minutes Infinity", subj: "pv-a", data: wrow("valid_minutes", `"Infinity"`), reason: ReasonNotFinite},
		// out_of_range
		{name: "negative irradiance", subj: "pv-a", data: wrow("ghi_wm2", "-50"), reason: ReasonOutOfRange},
		{name: "irradiance above 1500", subj: "pv-a", data: wrow("ghi_wm2", "2000"), reason: ReasonOutOfRange},
		{name: "negative wind speed", subj: "pv-a", data: wrow("wind_ms", "-1"), reason: ReasonOutOfRange},
		{name: "wind speed above 100 m/s", subj: "pv-a", data: wrow("wind_ms", "150"), reason: ReasonOutOfRange},
		{name: "wind component below -100 m/s", subj: "pv-a", data: wrow("u10_ms", "-101"), reason: ReasonOutOfRange},
		{name: "temperature in kelvin", subj: "pv-a", data: wrow("temp_c", "284.3"), reason: ReasonOutOfRange},
		{name: "temperature below -90", subj: "pv-a", data: wrow("temp_c", "-100"), reason: ReasonOutOfRange},
		{name: "cloud fraction in percent", subj: "pv-a", data: wrow("cloud_frac", "75"), reason: ReasonOutOfRange},
		{name: "wind direction above 360", subj: "pv-a", data: wrow("wind_dir_deg", "400"), reason: ReasonOutOfRange},
		{name: "pressure in pascal", subj: "pv-a", data: wrow("pressure_hpa", "101325"), reason: ReasonOutOfRange},
		// bad_interval
		{name: "zero-length valid interval", subj: "pv-a", data: wrow("valid_minutes", "0"), reason: ReasonBadInterval},
		{name: "valid interval over a day", subj: "pv-a", data: wrow("valid_minutes", "2880"), reason: ReasonBadInterval},
		{name: "hourly row starting 10:30", subj: "pv-a", data: wrow("valid_start", `"2026-03-01T10:30:00Z"`), reason: ReasonBadInterval},
		{name: "duplicate valid interval in a run", subj: "pv-a", data: "[" + wrow() + "," + wrow("temp_c", "12") + "]", reason: ReasonBadInterval},
		{name: "overlapping valid intervals in a run", subj: "pv-a", data: "[" + wrow() + "," + wrow("valid_start", `"2026-03-01T10:45:00Z"`, "valid_minutes", "15") + "]", reason: ReasonBadInterval},
		// bad_time
		{name: "unparseable issued_at", subj: "pv-a", data: wrow("issued_at", `"06:00"`), reason: ReasonBadTime},
		{name: "unparseable valid_start", subj: "pv-a", data: wrow("valid_start", `"2026-03-01"`), reason: ReasonBadTime},
		{name: "issued before 1990", subj: "pv-a", data: wrow("issued_at", `"1980-01-01T00:00:00Z"`, "valid_start", `"1980-01-01T10:00:00Z"`), reason: ReasonBadTime},
		{name: "valid after 2200", subj: "pv-a", data: wrow("issued_at", `"2200-01-01T00:00:00Z"`, "valid_start", `"2200-01-01T10:00:00Z"`), reason: ReasonBadTime},
		{name: "valid 17 days after issue", subj: "pv-a", data: wrow("valid_start", `"2026-03-18T06:00:00Z"`), reason: ReasonBadTime},
		{name: "valid 11 days before issue", subj: "pv-a", data: wrow("valid_start", `"2026-02-18T06:00:00Z"`), reason: ReasonBadTime},
		// too_large
		{name: "payload over MaxBytes", dec: &Decoder{Sites: testSites(), MaxBytes: 100}, subj: "pv-a", data: wrow(), reason: ReasonTooLarge},
		{name: "rows over MaxRows", dec: &Decoder{Sites: testSites(), MaxRows: 1}, subj: "pv-a", data: "[" + wrow() + "," + wrow() + "]", reason: ReasonTooLarge},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			checkReject(t, tc, func(d *Decoder, subj string, data []byte) error {
				got, err := d.Weather(subj, data)
				if err != nil && got != nil {
					t.Errorf("runs %v returned with an error", got)
				}
				return err
			})
		})
	}
}

// TestRejectDetailIsDeterministic sends a row with several faults many
// times: the first fault in a fixed order is reported, whatever the order
// of map iteration.
func TestRejectDetailIsDeterministic(t *testing.T) {
	data := []byte(wrow("zz_a", `"x"`, "aa_b", `"NaN"`, "mm_c", `true`))
	var first string
	for i := 0; i < 50; i++ {
		_, err := testDecoder().Weather("pv-a", data)
		if err == nil {
			t.Fatal("no error")
		}
		if i == 0 {
			first = err.Error()
			if !strings.Contains(first, "aa_b") {
				t.Errorf("error %q does not name the first faulty variable aa_b", first)
			}
		} else if err.Error() != first {
			t.Fatalf("error changed between calls: %q then %q", first, err.Error())
		}
	}
}

// TestWeatherOverlapDetail pins the wording of interval faults: rows of a
// run are compared in ValidStart order, rows with equal starts in message
// order, and runs in the order of their first row. The details are those
// the decoder gave before groupRuns was rewritten to allocate per run
// instead of per row.
func TestWeatherOverlapDetail(t *testing.T) {
	cases := []struct{ data, detail string }{
		{"[" + wrow("valid_minutes", "60") + "," + wrow("valid_minutes", "30") + "]",
			`run issued at 2026-03-01T06:00:00Z, source "nwp-1": valid intervals starting 2026-03-01T10:00:00Z (60 min) and 2026-03-01T10:00:00Z (30 min) repeat`},
		{"[" + wrow("valid_minutes", "30") + "," + wrow("valid_minutes", "60") + "]",
			`run issued at 2026-03-01T06:00:00Z, source "nwp-1": valid intervals starting 2026-03-01T10:00:00Z (30 min) and 2026-03-01T10:00:00Z (60 min) repeat`},
		{"[" + wrow("valid_start", `"2026-03-01T11:00:00Z"`) + "," + wrow("source", `"nwp-2"`, "valid_minutes", "30") + "," +
			wrow("source", `"nwp-2"`, "valid_start", `"2026-03-01T10:15:00Z"`, "valid_minutes", "15") + "," + wrow() + "," +
			wrow("valid_start", `"2026-03-01T10:30:00Z"`, "valid_minutes", "30") + "]",
			`run issued at 2026-03-01T06:00:00Z, source "nwp-1": valid intervals starting 2026-03-01T10:00:00Z (60 min) and 2026-03-01T10:30:00Z (30 min) overlap`},
	}
	for _, tc := range cases {
		_, err := testDecoder().Weather("pv-a", []byte(tc.data))
		var re *RejectError
		if !errors.As(err, &re) || re.Reason != ReasonBadInterval || re.Detail != tc.detail {
			t.Errorf("%s:\n%v\nwant bad_interval: %s", tc.data, err, tc.detail)
		}
	}
}

func BenchmarkMeter(b *testing.B) {
	// One day of 15-minute readings in one message.
	var sb strings.Builder
	sb.WriteByte('[')
	start := utc("2026-03-01T00:00:00Z")
	for i := 0; i < 96; i++ {
		if i > 0 {
			sb.WriteByte(',')
		}
		fmt.Fprintf(&sb, `{"site":"pv-a","interval_start":%q,"interval_minutes":15,"power_mw":%.3f,"availability":1,"curtailed":false}`,
			start.Add(time.Duration(i)*15*time.Minute).Format(time.RFC3339), 2.5+math.Sin(float64(i)/10))
	}
	sb.WriteByte(']')
	data := []byte(sb.String())
	dec := testDecoder()
	b.SetBytes(int64(len(data)))
	b.ReportAllocs()
	for b.Loop() {
		if _, err := dec.Meter("pv-a", data); err != nil {
			b.Fatal(err)
		}
	}
}

// weatherBenchMessage is the message of BenchmarkWeather: one run of 48
// hourly rows with 8 variables.
func weatherBenchMessage() []byte {
	var sb strings.Builder
	sb.WriteByte('[')
	start := utc("2026-03-01T00:00:00Z")
	for i := 0; i < 48; i++ {
		if i > 0 {
			sb.WriteByte(',')
		}
		fmt.Fprintf(&sb, `{"site":"pv-a","issued_at":"2026-03-01T00:00:00Z","source":"nwp-1","valid_start":%q,"valid_minutes":60,`+
			`"ghi_wm2":%.1f,"temp_c":11.2,"cloud_frac":0.4,"u10_ms":2.1,"v10_ms":-1.3,"pressure_hpa":1012.5,"rh_pct":70.2,"precip_mm":0}`,
			start.Add(time.Duration(i)*time.Hour).Format(time.RFC3339), 400+100*math.Sin(float64(i)))
	}
	sb.WriteByte(']')
	return []byte(sb.String())
}

func BenchmarkWeather(b *testing.B) {
	data := weatherBenchMessage()
	dec := testDecoder()
	b.SetBytes(int64(len(data)))
	b.ReportAllocs()
	for b.Loop() {
		if _, err := dec.Weather("pv-a", data); err != nil {
			b.Fatal(err)
		}
	}
}

// checkReadings asserts what every successfully decoded meter message
// guarantees.
func checkReadings(t *testing.T, dec *Decoder, subj string, got []model.Reading) {
	t.Helper()
	if len(got) == 0 {
		t.Fatal("no reading and no error")
	}
	lo, hi := got[0].IntervalStart, got[0].IntervalStart
	for i, r := range got {
		site, ok := dec.Sites[r.Site]
		if !ok || (subj != "" && r.Site != subj) {
			t.Fatalf("reading %d: site %q unknown or not the subject's %q", i, r.Site, subj)
		}
		checkInterval(t, r.IntervalStart, r.IntervalMinutes)
		if !model.Finite(r.PowerMW) || r.PowerMW < -NegativePowerTolerance*site.CapacityMW || r.PowerMW > dec.powerFactor()*site.CapacityMW {
			t.Fatalf("reading %d: power %v out of range for capacity %v", i, r.PowerMW, site.CapacityMW)
		}
		if !(r.Availability >= 0 && r.Availability <= 1) {
			t.Fatalf("reading %d: availability %v", i, r.Availability)
		}
		if r.IntervalStart.Before(lo) {
			lo = r.IntervalStart
		}
		if r.IntervalStart.After(hi) {
			hi = r.IntervalStart
		}
	}
	if hi.Sub(lo) > 31*24*time.Hour {
		t.Fatalf("readings span %v", hi.Sub(lo))
	}
}

// checkInterval asserts a positive interval of at most a day, in UTC, in
// 1990..2199, starting on a multiple of its length from 00:00 UTC.
func checkInterval(t *testing.T, start time.Time, minutes int) {
	t.Helper()
	if start.Location() != time.UTC || start.Year() < 1990 || start.Year() >= 2200 {
		t.Fatalf("start %v not in UTC or not in 1990..2199", start)
	}
	if minutes < 1 || minutes > 1440 {
		t.Fatalf("interval of %d minutes", minutes)
	}
	if sinceMidnight := start.Sub(start.Truncate(24 * time.Hour)); sinceMidnight%(time.Duration(minutes)*time.Minute) != 0 {
		t.Fatalf("start %v not aligned to %d minutes", start, minutes)
	}
}

// checkRuns asserts what every successfully decoded weather message
// guarantees.
func checkRuns(t *testing.T, dec *Decoder, subj string, runs []model.WeatherRun) {
	t.Helper()
	if len(runs) == 0 {
		t.Fatal("no run and no error")
	}
	for k, run := range runs {
		if _, ok := dec.Sites[run.Site]; !ok || (subj != "" && run.Site != subj) {
			t.Fatalf("run %d: site %q unknown or not the subject's %q", k, run.Site, subj)
		}
		if k > 0 {
			p := runs[k-1]
			if c := strings.Compare(p.Site, run.Site); c > 0 || c == 0 && (p.IssuedAt.After(run.IssuedAt) ||
				p.IssuedAt.Equal(run.IssuedAt) && p.Source >= run.Source) {
				t.Fatalf("runs %d and %d not sorted or not distinct", k-1, k)
			}
		}
		if len(run.Vars) == 0 || len(run.Rows) == 0 {
			t.Fatalf("run %d: %d vars, %d rows", k, len(run.Vars), len(run.Rows))
		}
		for i, v := range run.Vars {
			if !validVarName(v) || i > 0 && run.Vars[i-1] >= v {
				t.Fatalf("run %d: vars %q not valid, sorted and distinct", k, run.Vars)
			}
		}
		for i, r := range run.Rows {
			checkInterval(t, r.ValidStart, r.ValidMinutes)
			if lead := r.ValidStart.Sub(run.IssuedAt); lead < -10*24*time.Hour || lead > 16*24*time.Hour {
				t.Fatalf("run %d row %d: valid %v from issue", k, i, lead)
			}
			if i > 0 && r.ValidStart.Before(run.Rows[i-1].End()) {
				t.Fatalf("run %d: rows %d and %d overlap or are not sorted", k, i-1, i)
			}
			if len(r.Values) != len(run.Vars) {
				t.Fatalf("run %d row %d: %d values for %d vars", k, i, len(r.Values), len(run.Vars))
			}
			for j, v := range r.Values {
				if math.IsInf(v, 0) {
					t.Fatalf("run %d row %d: %s is %v", k, i, run.Vars[j], v)
				}
				if lo, hi, ok := varRange(run.Vars[j]); ok && !math.IsNaN(v) && (v < lo || v > hi) {
					t.Fatalf("run %d row %d: %s %v outside [%v, %v]", k, i, run.Vars[j], v, lo, hi)
				}
			}
		}
	}
}

// meterWireOf writes readings back in the wire format.
func meterWireOf(rs []model.Reading) []byte {
	rows := make([]map[string]any, len(rs))
	for i, r := range rs {
		rows[i] = map[string]any{"site": r.Site, "interval_start": r.IntervalStart.Format(time.RFC3339Nano),
			"interval_minutes": r.IntervalMinutes, "power_mw": r.PowerMW, "availability": r.Availability, "curtailed": r.Curtailed}
	}
	data, err := json.Marshal(rows)
	if err != nil {
		panic(err)
	}
	return data
}

// weatherWireOf writes runs back in the wire format, a missing value as null.
func weatherWireOf(runs []model.WeatherRun) []byte {
	var rows []map[string]any
	for _, run := range runs {
		for _, r := range run.Rows {
			m := map[string]any{"site": run.Site, "issued_at": run.IssuedAt.Format(time.RFC3339Nano), "source": run.Source,
				"valid_start": r.ValidStart.Format(time.RFC3339Nano), "valid_minutes": r.ValidMinutes}
			for j, v := range run.Vars {
				if math.IsNaN(r.Values[j]) {
					m[v] = nil
				} else {
					m[v] = r.Values[j]
				}
			}
			rows = append(rows, m)
		}
	}
	data, err := json.Marshal(rows)
	if err != nil {
		panic(err)
	}
	return data
}

func FuzzMeter(f *testing.F) {
	for _, s := range []string{
		goodMeter(),
		goodMeter(`"availability":0.5`, `"curtailed":true`),
		"[" + goodMeter() + "," + meterJSON(`"pv-a"`, `"2026-03-01T10:15:00+01:00"`, "15", "-0.1") + "]",
		"[" + goodMeter() + "," + meterJSON(`"wind-b"`, `"2026-03-01T00:00:00Z"`, "1440", "21.9") + "]",
		meterJSON(`"pv-a"`, `"2026-03-01T10:07:00Z"`, "15", "1"),
		meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "15", `"NaN"`),
		meterJSON(`"pv-a"`, `"2026-03-01T10:00:00Z"`, "15", `1e400`),
		meterJSON(`"pv-a"`, `"1989-12-31T23:45:00Z"`, "15", "1"),
		`{"site":"pv-a","interval_start":"2026-03-01T10:00:00.000000001Z","interval_minutes":1,"power_mw":0}`,
		`[{}]`, `[]`, `{"site":`, `NaN`,
	} {
		f.Add([]byte(s), false)
		f.Add([]byte(s), true)
	}
	addGenerated(f, genMeterRows, meterMutations)
	dec := testDecoder()
	f.Fuzz(func(t *testing.T, data []byte, noSubject bool) {
		subj := "pv-a"
		if noSubject {
			subj = ""
		}
		_, got, err := checkMeterPaths(t, dec, subj, data) // both readers agree
		if err != nil {
			var re *RejectError
			if !errors.As(err, &re) || re.Reason == "" || got != nil {
				t.Fatalf("error %v (%T) is not a *RejectError, or readings returned", err, err)
			}
			return
		}
		checkReadings(t, dec, subj, got)
		again, err := dec.Meter(subj, meterWireOf(got))
		if err != nil {
			t.Fatalf("re-encoded readings rejected: %v", err)
		}
		if !reflect.DeepEqual(again, got) {
			t.Fatalf("re-encoded readings decode differently:\n%+v\n%+v", again, got)
		}
	})
}

func FuzzWeather(f *testing.F) {
	for _, s := range []string{
		wrow(),
		"[" + wrow("valid_start", `"2026-03-01T12:00:00Z"`, "temp_c", "null", "snow_depth_m", "0.25") + "," +
			wrow("valid_start", `"2026-03-01T11:00:00Z"`, "wind_ms", "3.5", "temp_c", "-") + "," + wrow() + "]",
		"[" + wrow("issued_at", `"2026-03-01T12:00:00+00:00"`) + "," + wrow("source", "-") + "," + wrow("site", `"wind-b"`) + "]",
		"[" + wrow() + "," + wrow("temp_c", "12") + "]",
		wrow("ghi_wm2", `"NaN"`),
		wrow("valid_start", `"2026-03-18T06:00:00Z"`),
		wrow("ghi_wm2", "-0.18", "cloud_frac", "1.00001", "rh_pct", "102.8"),
		wrow("x_y", `{"a":[1,"b\"c"]}`),
		wrow("site", `"pv-\u0061"`),
		`[null]`, `[]`, `{`, `[{"site":"pv-a","temp_c":-Infinity}]`,
	} {
		f.Add([]byte(s), false)
		f.Add([]byte(s), true)
	}
	addGenerated(f, genWeatherRows, weatherMutations)
	dec := testDecoder()
	f.Fuzz(func(t *testing.T, data []byte, noSubject bool) {
		subj := "pv-a"
		if noSubject {
			subj = ""
		}
		_, got, err := checkWeatherPaths(t, dec, subj, data) // both readers agree
		if err != nil {
			var re *RejectError
			if !errors.As(err, &re) || re.Reason == "" || got != nil {
				t.Fatalf("error %v (%T) is not a *RejectError, or runs returned", err, err)
			}
			return
		}
		checkRuns(t, dec, subj, got)
		again, err := dec.Weather(subj, weatherWireOf(got))
		if err != nil {
			t.Fatalf("re-encoded runs rejected: %v", err)
		}
		if !equalRuns(again, got) {
			t.Fatalf("re-encoded runs decode differently:\n%+v\n%+v", again, got)
		}
	})
}

// csvRows reads a gzipped CSV file and calls fn for every row after the
// header, at most limit rows (limit <= 0: all).
func csvRows(t *testing.T, path string, limit int, fn func(header, row []string)) int {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	zr, err := gzip.NewReader(f)
	if err != nil {
		t.Fatal(err)
	}
	r := csv.NewReader(zr)
	r.ReuseRecord = true
	header, err := r.Read()
	if err != nil {
		t.Fatal(err)
	}
	header = slices.Clone(header)
	n := 0
	for limit <= 0 || n < limit {
		row, err := r.Read()
		if err == io.EOF {
			break
		}
		if err != nil {
			t.Fatal(err)
		}
		fn(header, row)
		n++
	}
	return n
}

// TestDecodeSharedData sends every reading and every weather row of the
// open data sets (README of shared/data) through the decoders, as the
// producers of the wire contract would write them, and expects no reject:
// the plausibility checks must accept real measurements and real weather
// model output. With -short only the first rows of each file are used.
func TestDecodeSharedData(t *testing.T) {
	root := sharedtest.Data(t, "")
	limit := 0
	if testing.Short() {
		limit = 5000
	}
	for _, set := range []string{"gefcom2012-wind", "gefcom2014-solar", "serf-pv-15min"} {
		t.Run(set, func(t *testing.T) {
			dir := filepath.Join(root, set)
			sites, err := model.LoadSites(filepath.Join(dir, "sites.json"))
			if err != nil {
				t.Fatal(err)
			}
			dec := &Decoder{Sites: map[string]model.Site{}}
			for _, s := range sites {
				dec.Sites[s.ID] = s
			}

			// Meter: batches of up to 96 consecutive readings of one site.
			var batch []string
			batchSite := ""
			sent, decoded, empty := 0, 0, 0
			flushMeter := func() {
				if len(batch) == 0 {
					return
				}
				got, err := dec.Meter(batchSite, []byte("["+strings.Join(batch, ",")+"]"))
				if err != nil {
					t.Fatalf("meter batch of %s rejected: %v", batchSite, err)
				}
				decoded += len(got)
				batch = batch[:0]
			}
			csvRows(t, filepath.Join(dir, "meter.csv.gz"), limit, func(h, row []string) {
				if row[3] == "" {
					empty++ // no reading for the interval: nothing is sent
					return
				}
				if row[0] != batchSite || len(batch) == 96 {
					flushMeter()
					batchSite = row[0]
				}
				batch = append(batch, fmt.Sprintf(`{"site":%q,"interval_start":%q,"interval_minutes":%s,"power_mw":%s}`, row[0], row[1], row[2], row[3]))
				sent++
			})
			flushMeter()
			if decoded != sent || sent == 0 {
				t.Errorf("meter: %d readings decoded of %d sent", decoded, sent)
			}

			// Weather: one message per (site, issued_at), empty cells as null.
			var first []float64 // the values of the file's first row
			var firstVars []string
			batchKey := ""
			sentRows, decodedRows, runs := 0, 0, 0
			flushWeather := func() {
				if len(batch) == 0 {
					return
				}
				got, err := dec.Weather(batchSite, []byte("["+strings.Join(batch, ",")+"]"))
				if err != nil {
					t.Fatalf("weather message %s rejected: %v", batchKey, err)
				}
				if first != nil && runs == 0 {
					row := got[0].Rows[0]
					if !reflect.DeepEqual(got[0].Vars, firstVars) {
						t.Errorf("vars %v, want %v", got[0].Vars, firstVars)
					}
					for j := range first {
						if row.Values[j] != first[j] && !(math.IsNaN(first[j]) && math.IsNaN(row.Values[j])) {
							t.Errorf("%s = %v, the file says %v", got[0].Vars[j], row.Values[j], first[j])
						}
					}
				}
				for _, run := range got {
					decodedRows += len(run.Rows)
					runs++
				}
				batch = batch[:0]
			}
			csvRows(t, filepath.Join(dir, "weather.csv.gz"), limit, func(h, row []string) {
				if key := row[0] + "|" + row[1]; key != batchKey {
					flushWeather()
					batchKey, batchSite = key, row[0]
				}
				var sb strings.Builder
				fmt.Fprintf(&sb, `{"site":%q,"issued_at":%q,"valid_start":%q,"valid_minutes":%s`, row[0], row[1], row[2], row[3])
				type kv struct {
					k string
					v float64
				}
				var vars []kv
				for j := 4; j < len(row); j++ {
					v := row[j]
					if v == "" {
						v = "null"
					}
					fmt.Fprintf(&sb, `,%q:%s`, h[j], v)
					if first == nil {
						x := math.NaN()
						if row[j] != "" {
							if x, err = strconv.ParseFloat(row[j], 64); err != nil {
								t.Fatal(err)
							}
						}
						vars = append(vars, kv{h[j], x})
					}
				}
				if first == nil {
					slices.SortFunc(vars, func(a, b kv) int { return strings.Compare(a.k, b.k) })
					for _, p := range vars {
						firstVars = append(firstVars, p.k)
						first = append(first, p.v)
					}
				}
				sb.WriteByte('}')
				batch = append(batch, sb.String())
				sentRows++
			})
			flushWeather()
			if decodedRows != sentRows || sentRows == 0 {
				t.Errorf("weather: %d rows decoded of %d sent", decodedRows, sentRows)
			}
			t.Logf("%s: %d readings (%d empty cells skipped), %d weather rows in %d runs, all accepted", set, sent, empty, sentRows, runs)
		})
	}
}
