package stream

import (
	"bytes"
	"cmp"
	"errors"
	"fmt"
	"math/rand/v2"
	"reflect"
	"slices"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/plumb-forecast/plumb/model"
)

// Tests of the two JSON readers (see scan.go): on any input the fast reader
// either gives up or reads what encoding/json reads, so that Weather and
// Meter give the same runs, readings and rejects whichever reads.

// field is one object member as written: name and value are verbatim JSON,
// so a test can write escapes, bad UTF-8 or bare tokens into either.
type field struct{ name, value string }

// msgRow is one array element: an object of fields, or raw (verbatim JSON)
// when raw is not empty.
type msgRow struct {
	fields []field
	raw    string
}

// jsonSpace is the white space of JSON (RFC 8259, section 2).
const jsonSpace = " \t\n\r"

// msgWriter writes messages with random white space between tokens.
type msgWriter struct {
	rng *rand.Rand
	sb  strings.Builder
}

func (w *msgWriter) space() {
	if w.rng.IntN(3) == 0 {
		for n := 1 + w.rng.IntN(3); n > 0; n-- {
			w.sb.WriteByte(jsonSpace[w.rng.IntN(len(jsonSpace))])
		}
	}
}

func (w *msgWriter) tok(s string) {
	w.space()
	w.sb.WriteString(s)
}

// writeMsg writes rows as an array, or as one object when single.
func writeMsg(rng *rand.Rand, rows []msgRow, single bool) string {
	w := &msgWriter{rng: rng}
	if !single {
		w.tok("[")
	}
	for i, r := range rows {
		if i > 0 {
			w.tok(",")
		}
		if r.raw != "" {
			w.tok(r.raw)
			continue
		}
		w.tok("{")
		for j, f := range r.fields {
			if j > 0 {
				w.tok(",")
			}
			w.tok(f.name)
			w.tok(":")
			w.tok(f.value)
		}
		w.tok("}")
	}
	if !single {
		w.tok("]")
	}
	w.space()
	return w.sb.String()
}

func jstr(s string) string { return `"` + s + `"` }

// jsonNum writes x as a JSON number (RFC 8259, section 6) in one of several
// spellings: shortest, exponent form with either 'e' or 'E', fixed point.
func jsonNum(rng *rand.Rand, x float64) string {
	switch rng.IntN(4) {
	case 0:
		return strconv.FormatFloat(x, 'g', -1, 64)
	case 1:
		return strconv.FormatFloat(x, 'e', -1, 64)
	case 2:
		return strconv.FormatFloat(x, 'E', 8, 64)
	}
	return strconv.FormatFloat(x, 'f', 3, 64)
}

// jsonTime writes t in RFC 3339, in UTC ("Z") or with a numeric offset.
func jsonTime(rng *rand.Rand, t time.Time) string {
	if rng.IntN(3) == 0 {
		t = t.In(time.FixedZone("", (rng.IntN(27)-12)*3600))
	}
	return jstr(t.Format(time.RFC3339))
}

// minutesJSON writes a whole number of minutes in one of several spellings.
func minutesJSON(rng *rand.Rand, m int) string {
	switch rng.IntN(4) {
	case 0:
		return strconv.Itoa(m) + ".0"
	case 1:
		return strconv.FormatFloat(float64(m), 'e', -1, 64)
	}
	return strconv.Itoa(m)
}

// weatherVarNames are the variables generated rows give; snow_depth_m has
// no plausible range in varRange.
var weatherVarNames = []string{"ghi_wm2", "temp_c", "cloud_frac", "u10_ms", "v10_ms", "pressure_hpa", "rh_pct",
	"precip_mm", "wind100_ms", "snow_depth_m"}

// shuffled returns fs in random order.
func shuffled(rng *rand.Rand, fs []field) []field {
	rng.Shuffle(len(fs), func(i, j int) { fs[i], fs[j] = fs[j], fs[i] })
	return fs
}

// genWeatherRows returns the rows of a valid weather message: one to three
// runs of one to five rows, variables in a random subset, some null, keys
// in one random order for all rows (as encoders write them) or in random
// order in each row, rows shuffled. single is a suggestion to send one
// object.
func genWeatherRows(rng *rand.Rand) (rows []msgRow, single bool) {
	base := utc("2026-03-01T06:00:00Z")
	place := map[string]int{} // the place of each name when rows keep one order
	for _, name := range append([]string{"site", "issued_at", "source", "valid_start", "valid_minutes"}, weatherVarNames...) {
		place[jstr(name)] = rng.Int()
	}
	order := shuffled
	if rng.IntN(2) == 0 {
		order = func(_ *rand.Rand, fs []field) []field {
			slices.SortFunc(fs, func(a, b field) int { return cmp.Compare(place[a.name], place[b.name]) })
			return fs
		}
	}
	for k := range 1 + rng.IntN(3) {
		site := jstr("pv-a")
		if rng.IntN(5) == 0 {
			site = jstr("wind-b")
		}
		issued := base.Add(time.Duration(k*6) * time.Hour)
		var source *field
		switch rng.IntN(4) {
		case 0: // absent
		case 1:
			source = &field{jstr("source"), "null"}
		default:
			source = &field{jstr("source"), jstr(fmt.Sprintf("nwp-%d", rng.IntN(3)))}
		}
		minutes := []int{15, 30, 60}[rng.IntN(3)]
		start := issued.Add(time.Duration(rng.IntN(48)-12) * time.Hour)
		vars := slices.Clone(weatherVarNames)
		rng.Shuffle(len(vars), func(i, j int) { vars[i], vars[j] = vars[j], vars[i] })
		vars = vars[:1+rng.IntN(5)]
		for i := range 1 + rng.IntN(5) {
			fs := []field{{jstr("site"), site}, {jstr("issued_at"), jsonTime(rng, issued)},
				{jstr("valid_start"), jsonTime(rng, start.Add(time.Duration(i*minutes)*time.Minute))},
				{jstr("valid_minutes"), minutesJSON(rng, minutes)}}
			if source != nil {
				fs = append(fs, *source)
			}
			for j, v := range vars {
				if j > 0 && rng.IntN(6) == 0 {
					continue // a row may lack a variable of its run
				}
				val := "null"
				if rng.IntN(8) > 0 {
					x := rng.NormFloat64() * 10
					if lo, hi, ok := varRange(v); ok {
						x = lo + rng.Float64()*(hi-lo)
					}
					val = jsonNum(rng, x)
				}
				fs = append(fs, field{jstr(v), val})
			}
			rows = append(rows, msgRow{fields: order(rng, fs)})
		}
	}
	rng.Shuffle(len(rows), func(i, j int) { rows[i], rows[j] = rows[j], rows[i] })
	return rows, len(rows) == 1 && rng.IntN(2) == 0
}

// genMeterRows returns the rows of a valid meter message of pv-a: one to
// eight 15-minute readings, optional fields present, null or absent, an
// unknown field now and then, keys in random order.
func genMeterRows(rng *rand.Rand) (rows []msgRow, single bool) {
	base := utc("2026-03-01T00:00:00Z").Add(time.Duration(rng.IntN(96)) * 15 * time.Minute)
	for i := range 1 + rng.IntN(8) {
		fs := []field{{jstr("site"), jstr("pv-a")},
			{jstr("interval_start"), jsonTime(rng, base.Add(time.Duration(i)*15*time.Minute))},
			{jstr("interval_minutes"), minutesJSON(rng, 15)},
			{jstr("power_mw"), jsonNum(rng, -0.1+rng.Float64()*5.6)}}
		switch rng.IntN(3) {
		case 0:
			fs = append(fs, field{jstr("availability"), jsonNum(rng, rng.Float64())})
		case 1:
			fs = append(fs, field{jstr("availability"), "null"})
		}
		switch rng.IntN(4) {
		case 0:
			fs = append(fs, field{jstr("curtailed"), "true"})
		case 1:
			fs = append(fs, field{jstr("curtailed"), "false"})
		case 2:
			fs = append(fs, field{jstr("curtailed"), "null"})
		}
		switch rng.IntN(6) {
		case 0:
			fs = append(fs, field{jstr("note"), jstr("x")})
		case 1:
			fs = append(fs, field{jstr("meta"), ` { "a" : [ 1 , { "b" : null } ] , "c" : "d" } `})
		}
		rows = append(rows, msgRow{fields: shuffled(rng, fs)})
	}
	return rows, len(rows) == 1 && rng.IntN(2) == 0
}

// A mutation spoils a valid message. plain tells whether the result is
// still plain input (see scan.go): true when it must be taken by the fast
// reader, false when the fast reader must give up, unknown when either may
// happen (a syntax error, say, that only one spelling brings about).
type plainness int

const (
	plainYes plainness = iota
	plainNo
	plainUnknown
)

type mutation struct {
	name  string
	plain plainness
	// rows changes the rows (nil: no change); msg then changes the written
	// message (nil: no change).
	rows func(rng *rand.Rand, rows []msgRow) []msgRow
	msg  func(rng *rand.Rand, msg string) string
}

// setField sets (or adds) a field of a random object row; value "-" removes it.
func setField(name, value string) func(*rand.Rand, []msgRow) []msgRow {
	return func(rng *rand.Rand, rows []msgRow) []msgRow {
		r := &rows[rng.IntN(len(rows))]
		fs := r.fields[:0:0]
		for _, f := range r.fields {
			if f.name != jstr(name) {
				fs = append(fs, f)
			}
		}
		if value != "-" {
			fs = append(fs, field{jstr(name), value})
		}
		r.fields = shuffled(rng, fs)
		return rows
	}
}

// renameField writes the name of a random field of a random row another
// way; only, when not nil, restricts the choice of fields.
func renameField(only func(name string) bool, rename func(name string) string) func(*rand.Rand, []msgRow) []msgRow {
	return func(rng *rand.Rand, rows []msgRow) []msgRow {
		r := &rows[rng.IntN(len(rows))]
		var pick []int
		for i, f := range r.fields {
			if only == nil || only(f.name[1:len(f.name)-1]) {
				pick = append(pick, i)
			}
		}
		if len(pick) > 0 {
			f := &r.fields[pick[rng.IntN(len(pick))]]
			f.name = jstr(rename(f.name[1 : len(f.name)-1]))
		}
		return rows
	}
}

// isMeterField reports whether name is the JSON name of a meterWire field.
func isMeterField(name string) bool {
	return slices.Contains([]string{"site", "interval_start", "interval_minutes", "power_mw", "availability", "curtailed"}, name)
}

// repeatField gives a random field of a random row again, with the value
// of the same field in another row (often equal, sometimes not).
func repeatField(rng *rand.Rand, rows []msgRow) []msgRow {
	r := &rows[rng.IntN(len(rows))]
	f := r.fields[rng.IntN(len(r.fields))]
	for _, f2 := range rows[rng.IntN(len(rows))].fields {
		if f2.name == f.name {
			f.value = f2.value
		}
	}
	r.fields = append(r.fields, f)
	return rows
}

// messageMutations apply to both kinds of message.
var messageMutations = []mutation{
	{name: "repeated name", plain: plainNo, rows: repeatField},
	{name: "name with an escape", plain: plainNo, rows: renameField(nil, func(n string) string {
		return fmt.Sprintf(`\u%04x`, n[0]) + n[1:]
	})},
	{name: "name with invalid UTF-8", plain: plainNo, rows: renameField(nil, func(n string) string { return n + "\xff" })},
	{name: "string value with an escape", plain: plainYes, rows: func(rng *rand.Rand, rows []msgRow) []msgRow {
		return setField("site", `"pv-\u0061"`)(rng, rows)
	}},
	{name: "string value with invalid UTF-8", plain: plainNo, rows: func(rng *rand.Rand, rows []msgRow) []msgRow {
		return setField("site", "\"pv-a\xc3\"")(rng, rows)
	}},
	{name: "bare NaN", plain: plainNo, rows: setField("power_mw", "NaN")},
	{name: "bare -Infinity", plain: plainNo, rows: setField("temp_c", "-Infinity")},
	{name: "element null", plain: plainNo, rows: func(rng *rand.Rand, rows []msgRow) []msgRow {
		return slices.Insert(rows, rng.IntN(len(rows)+1), msgRow{raw: "null"})
	}},
	{name: "element number", plain: plainNo, rows: func(rng *rand.Rand, rows []msgRow) []msgRow {
		return slices.Insert(rows, rng.IntN(len(rows)+1), msgRow{raw: "5"})
	}},
	{name: "element array", plain: plainNo, rows: func(rng *rand.Rand, rows []msgRow) []msgRow {
		return slices.Insert(rows, rng.IntN(len(rows)+1), msgRow{raw: "[]"})
	}},
	{name: "empty object", plain: plainYes, rows: func(rng *rand.Rand, rows []msgRow) []msgRow {
		return slices.Insert(rows, rng.IntN(len(rows)+1), msgRow{raw: "{ }"})
	}},
	{name: "empty batch", plain: plainYes, msg: func(*rand.Rand, string) string { return " [ ] " }},
	{name: "string payload", plain: plainNo, msg: func(*rand.Rand, string) string { return `"hello"` }},
	{name: "trailing garbage", plain: plainNo, msg: func(_ *rand.Rand, m string) string { return m + " x" }},
	{name: "second value", plain: plainNo, msg: func(_ *rand.Rand, m string) string { return m + "{}" }},
	{name: "trailing comma", plain: plainNo, msg: func(_ *rand.Rand, m string) string {
		if i := strings.LastIndexByte(m, '}'); i >= 0 {
			return m[:i+1] + "," + m[i+1:]
		}
		return m
	}},
	{name: "truncated", plain: plainNo, msg: func(rng *rand.Rand, m string) string {
		m = strings.TrimRight(m, jsonSpace) // a proper prefix of the rest is never JSON
		return m[:rng.IntN(len(m))]
	}},
	{name: "byte changed", plain: plainUnknown, msg: func(rng *rand.Rand, m string) string {
		b := []byte(m)
		b[rng.IntN(len(b))] = "{}[]:,\"\\0e-. x\x00\x7f\xe2"[rng.IntN(17)]
		return string(b)
	}},
}

var weatherMutations = []mutation{
	{name: "site a number", plain: plainYes, rows: setField("site", "7")},
	{name: "site unknown", plain: plainYes, rows: setField("site", jstr("pv-z"))},
	{name: "site not an id", plain: plainYes, rows: setField("site", jstr("a.b"))},
	{name: "site of the other plant", plain: plainYes, rows: setField("site", jstr("wind-b"))},
	{name: "site null", plain: plainYes, rows: setField("site", "null")},
	{name: "site missing", plain: plainYes, rows: setField("site", "-")},
	{name: "issued_at not a time", plain: plainYes, rows: setField("issued_at", jstr("06:00"))},
	{name: "issued_at a number", plain: plainYes, rows: setField("issued_at", "3")},
	{name: "issued_at before 1990", plain: plainYes, rows: setField("issued_at", jstr("1980-01-01T00:00:00Z"))},
	{name: "issued_at with a space", plain: plainYes, rows: setField("issued_at", jstr("2026-03-01 06:00:00Z"))},
	{name: "issued_at missing", plain: plainYes, rows: setField("issued_at", "-")},
	{name: "valid_start off its grid", plain: plainYes, rows: setField("valid_start", jstr("2026-03-01T10:05:00Z"))},
	{name: "valid_start with a fraction", plain: plainYes, rows: setField("valid_start", jstr("2026-03-01T10:00:00.5Z"))},
	{name: "valid_start a month on", plain: plainYes, rows: setField("valid_start", jstr("2026-04-01T00:00:00Z"))},
	{name: "valid_start escaped", plain: plainYes, rows: setField("valid_start", `"2026-03-01T10:00:00\u005a"`)},
	{name: "valid_start escaped, bad", plain: plainYes, rows: setField("valid_start", `"2026-03-01T10:00:00\n"`)},
	{name: "valid_minutes zero", plain: plainYes, rows: setField("valid_minutes", "0")},
	{name: "valid_minutes fractional", plain: plainYes, rows: setField("valid_minutes", "7.5")},
	{name: "valid_minutes a string", plain: plainYes, rows: setField("valid_minutes", jstr("60"))},
	{name: "valid_minutes Infinity", plain: plainYes, rows: setField("valid_minutes", jstr("Infinity"))},
	{name: "valid_minutes beyond float64", plain: plainYes, rows: setField("valid_minutes", "1e999")},
	{name: "valid_minutes two days", plain: plainYes, rows: setField("valid_minutes", "2880")},
	{name: "source a number", plain: plainYes, rows: setField("source", "3")},
	{name: "source empty", plain: plainYes, rows: setField("source", `""`)},
	{name: "variable NaN string", plain: plainYes, rows: setField("ghi_wm2", jstr("NaN"))},
	{name: "variable -inf string", plain: plainYes, rows: setField("snow_depth_m", jstr(" -inf"))},
	{name: "variable beyond float64", plain: plainYes, rows: setField("temp_c", "-1e400")},
	{name: "variable a numeric string", plain: plainYes, rows: setField("ghi_wm2", jstr("512"))},
	{name: "variable a boolean", plain: plainYes, rows: setField("rh_pct", "true")},
	{name: "variable an array", plain: plainYes, rows: setField("rh_pct", "[1, 2]")},
	{name: "variable an object", plain: plainYes, rows: setField("rh_pct", `{"a":"b"}`)},
	{name: "variable out of range", plain: plainYes, rows: setField("ghi_wm2", "2000")},
	{name: "variable below range", plain: plainYes, rows: setField("temp_c", "-9.1e1")},
	{name: "variable -0", plain: plainYes, rows: setField("u10_ms", "-0")},
	{name: "variable name upper case", plain: plainYes, rows: setField("GHI_wm2", "1")},
	{name: "variable name without unit", plain: plainYes, rows: setField("note", "1")},
	{name: "variable name ending in _", plain: plainYes, rows: setField("snow_", "1")},
	{name: "no variable", plain: plainYes, rows: func(rng *rand.Rand, rows []msgRow) []msgRow {
		r := &rows[rng.IntN(len(rows))]
		r.fields = slices.DeleteFunc(r.fields, func(f field) bool {
			return !slices.Contains([]string{"site", "issued_at", "source", "valid_start", "valid_minutes"}, f.name[1:len(f.name)-1])
		})
		return rows
	}},
	{name: "row repeated", plain: plainYes, rows: func(rng *rand.Rand, rows []msgRow) []msgRow {
		r := rows[rng.IntN(len(rows))]
		return append(rows, msgRow{fields: shuffled(rng, slices.Clone(r.fields))})
	}},
	{name: "many rows", plain: plainYes, rows: func(rng *rand.Rand, rows []msgRow) []msgRow {
		for len(rows) < 5 {
			rows = append(rows, rows...)
		}
		return rows
	}},
}

var meterMutations = []mutation{
	{name: "name in upper case", plain: plainNo, rows: renameField(isMeterField, strings.ToUpper)},
	{name: "name with a long s", plain: plainNo, rows: renameField(func(n string) bool { return n == "site" }, func(string) string {
		return "\u017fite" // U+017F folds to "s" (Unicode simple folding)
	})},
	{name: "name with a Kelvin sign", plain: plainYes, rows: setField("\u212a", "1")}, // folds to "k": no field
	{name: "site a number", plain: plainYes, rows: setField("site", "7")},
	{name: "site unknown", plain: plainYes, rows: setField("site", jstr("pv-z"))},
	{name: "site of the other plant", plain: plainYes, rows: setField("site", jstr("wind-b"))},
	{name: "site missing", plain: plainYes, rows: setField("site", "-")},
	{name: "interval_start not a time", plain: plainYes, rows: setField("interval_start", jstr("yesterday"))},
	{name: "interval_start a number", plain: plainYes, rows: setField("interval_start", "1772359200")},
	{name: "interval_start off its grid", plain: plainYes, rows: setField("interval_start", jstr("2026-03-01T10:07:00Z"))},
	{name: "interval_start 40 days on", plain: plainYes, rows: setField("interval_start", jstr("2026-04-10T10:00:00Z"))},
	{name: "interval_start in 2200", plain: plainYes, rows: setField("interval_start", jstr("2200-01-01T00:00:00Z"))},
	{name: "interval_minutes an object", plain: plainYes, rows: setField("interval_minutes", "{}")},
	{name: "interval_minutes nan", plain: plainYes, rows: setField("interval_minutes", jstr("nan"))},
	{name: "interval_minutes over a day", plain: plainYes, rows: setField("interval_minutes", "1441")},
	{name: "power null", plain: plainYes, rows: setField("power_mw", "null")},
	{name: "power a string", plain: plainYes, rows: setField("power_mw", jstr("3.2"))},
	{name: "power Infinity string", plain: plainYes, rows: setField("power_mw", jstr("Infinity"))},
	{name: "power beyond float64", plain: plainYes, rows: setField("power_mw", "1E400")},
	{name: "power above capacity", plain: plainYes, rows: setField("power_mw", "5.51")},
	{name: "power below zero", plain: plainYes, rows: setField("power_mw", "-1")},
	{name: "availability above 1", plain: plainYes, rows: setField("availability", "1.5")},
	{name: "availability NaN", plain: plainYes, rows: setField("availability", jstr("NaN"))},
	{name: "curtailed a string", plain: plainYes, rows: setField("curtailed", jstr("yes"))},
	{name: "curtailed a number", plain: plainYes, rows: setField("curtailed", "1")},
	{name: "many rows", plain: plainYes, rows: func(rng *rand.Rand, rows []msgRow) []msgRow {
		for len(rows) < 5 {
			rows = append(rows, rows...)
		}
		return rows
	}},
}

// genMessage returns a message of the kind gen makes: unchanged one time in
// three, else spoilt by a mutation picked from the lists, whose name and
// plainness come back (name "" for an unchanged message).
func genMessage(rng *rand.Rand, gen func(*rand.Rand) ([]msgRow, bool), own []mutation) (msg string, m mutation) {
	rows, single := gen(rng)
	if rng.IntN(3) == 0 {
		return writeMsg(rng, rows, single), mutation{plain: plainYes}
	}
	all := append(slices.Clip(messageMutations), own...)
	m = all[rng.IntN(len(all))]
	if m.rows != nil {
		rows = m.rows(rng, rows)
		single = single && len(rows) == 1 && rows[0].raw == ""
	}
	msg = writeMsg(rng, rows, single)
	if m.msg != nil {
		msg = m.msg(rng, msg)
	}
	return msg, m
}

// addGenerated adds generated messages, good and spoilt, to a fuzz target's
// seed corpus.
func addGenerated(f *testing.F, gen func(*rand.Rand) ([]msgRow, bool), own []mutation) {
	rng := rand.New(rand.NewPCG(5, 6))
	for i := range 40 {
		msg, _ := genMessage(rng, gen, own)
		f.Add([]byte(msg), i%2 == 0)
	}
}

// diffDecoders are the decoders the differential tests run: the default
// limits and small ones.
func diffDecoders() []*Decoder {
	return []*Decoder{testDecoder(), {Sites: testSites(), MaxRows: 4, MaxBytes: 3000}}
}

// sameReject reports whether two errors are equal *RejectErrors (both nil
// counts too).
func sameReject(a, b error) bool {
	var ra, rb *RejectError
	if a == nil || b == nil {
		return a == nil && b == nil
	}
	return errors.As(a, &ra) && errors.As(b, &rb) && *ra == *rb
}

// equalFields compares the rows read by the two weather readers.
func equalFields(a, b []rowFields) bool {
	return slices.EqualFunc(a, b, func(x, y rowFields) bool {
		return bytes.Equal(x.site, y.site) && bytes.Equal(x.issuedAt, y.issuedAt) && bytes.Equal(x.source, y.source) &&
			bytes.Equal(x.validStart, y.validStart) && bytes.Equal(x.validMinutes, y.validMinutes) &&
			slices.EqualFunc(x.vars, y.vars, func(v, w rawVar) bool { return v.name == w.name && bytes.Equal(v.raw, w.raw) })
	})
}

// checkWeatherPaths decodes data with both readers and fails the test if
// they differ in any way; it returns whether the fast reader took the
// input and the outcome.
func checkWeatherPaths(t *testing.T, dec *Decoder, subj string, data []byte) (fast bool, runs []model.WeatherRun, err error) {
	t.Helper()
	orig := slices.Clone(data)
	runs, err = dec.weather(subj, data, true)
	want, wantErr := dec.weather(subj, data, false)
	if !sameReject(err, wantErr) || !equalRuns(runs, want) || (err == nil) != (runs != nil) {
		t.Fatalf("%q, subject %q:\nfast reader: %+v, %v\nencoding/json: %+v, %v", data, subj, runs, err, want, wantErr)
	}
	if !bytes.Equal(data, orig) {
		t.Fatalf("%q: the decoder changed its input to %q", orig, data)
	}

	if dec.precheck(subj, data) != nil {
		return false, runs, err
	}
	a, b := getScratch(), getScratch()
	defer putScratch(a)
	defer putScratch(b)
	if fast = a.weatherFields(data, dec.maxRows()); fast {
		if rerr := b.weatherFieldsJSON(subj, data); rerr != nil {
			t.Fatalf("%q: the fast reader took input that encoding/json refuses: %v", data, rerr)
		}
		if !equalFields(a.fields, b.fields) {
			t.Fatalf("%q: the readers read different fields:\nfast: %+v\nencoding/json: %+v", data, a.fields, b.fields)
		}
	}
	return fast, runs, err
}

// checkMeterPaths is checkWeatherPaths for meter messages.
func checkMeterPaths(t *testing.T, dec *Decoder, subj string, data []byte) (fast bool, got []model.Reading, err error) {
	t.Helper()
	orig := slices.Clone(data)
	got, err = dec.meter(subj, data, true)
	want, wantErr := dec.meter(subj, data, false)
	if !sameReject(err, wantErr) || !reflect.DeepEqual(got, want) {
		t.Fatalf("%q, subject %q:\nfast reader: %+v, %v\nencoding/json: %+v, %v", data, subj, got, err, want, wantErr)
	}
	if !bytes.Equal(data, orig) {
		t.Fatalf("%q: the decoder changed its input to %q", orig, data)
	}

	if dec.precheck(subj, data) != nil {
		return false, got, err
	}
	sc := getScratch()
	defer putScratch(sc)
	rows, fast := sc.meterRows(data, dec.maxRows())
	if fast {
		jrows, rerr := meterRowsJSON(subj, data)
		if rerr != nil {
			t.Fatalf("%q: the fast reader took input that encoding/json refuses: %v", data, rerr)
		}
		if !reflect.DeepEqual(rows, jrows) && !(len(rows) == 0 && len(jrows) == 0) {
			t.Fatalf("%q: the readers read different rows:\nfast: %+v\nencoding/json: %+v", data, rows, jrows)
		}
	}
	return fast, got, err
}

// diffRun drives a differential test: n generated messages, each decoded
// by every diffDecoder with and without a subject by check, which compares
// the readers and reports whether the fast one took the input. diffRun
// checks that the fast reader takes plain input and gives up on the rest,
// and that the generator makes good messages and every reject reason it
// should (else the comparison would prove little).
func diffRun(t *testing.T, n int, gen func(*rand.Rand) ([]msgRow, bool), own []mutation, reasons []Reason,
	check func(*testing.T, *Decoder, string, []byte) (bool, error)) {
	t.Helper()
	rng := rand.New(rand.NewPCG(1, 2))
	seen := map[Reason]int{}
	good, fastGood := 0, 0
	for range n {
		msg, m := genMessage(rng, gen, own)
		for di, dec := range diffDecoders() {
			for _, subj := range []string{"pv-a", ""} {
				fast, err := check(t, dec, subj, []byte(msg))
				if err == nil {
					good++
					if fast {
						fastGood++
					}
				} else {
					reason, _ := RejectOf(err)
					seen[reason]++
				}
				if di > 0 || dec.precheck(subj, []byte(msg)) != nil {
					continue // the limits decide before or instead of the reader
				}
				switch {
				case m.plain == plainYes && !fast:
					t.Fatalf("mutation %q: the fast reader gave up on plain input %q", m.name, msg)
				case m.plain == plainNo && fast:
					t.Fatalf("mutation %q: the fast reader took input that is not plain: %q", m.name, msg)
				}
			}
		}
	}
	t.Logf("%d decodes accepted (%d by the fast reader); rejects: %v", good, fastGood, seen)
	if good < n/4 || fastGood < good*3/4 {
		t.Errorf("only %d decodes of %d messages accepted, %d by the fast reader", good, n, fastGood)
	}
	for _, r := range reasons {
		if seen[r] == 0 {
			t.Errorf("no message rejected as %s: the generator misses a kind of fault", r)
		}
	}
}

func TestWeatherReadersAgree(t *testing.T) {
	n := 3000
	if testing.Short() {
		n = 400
	}
	diffRun(t, n, genWeatherRows, weatherMutations,
		[]Reason{ReasonMalformed, ReasonMissingField, ReasonUnknownSite, ReasonSiteMismatch, ReasonNotFinite,
			ReasonOutOfRange, ReasonBadInterval, ReasonBadTime, ReasonTooLarge},
		func(t *testing.T, dec *Decoder, subj string, data []byte) (bool, error) {
			fast, runs, err := checkWeatherPaths(t, dec, subj, data)
			if err == nil {
				checkRuns(t, dec, subj, runs)
			}
			return fast, err
		})
}

func TestMeterReadersAgree(t *testing.T) {
	n := 3000
	if testing.Short() {
		n = 400
	}
	diffRun(t, n, genMeterRows, meterMutations,
		[]Reason{ReasonMalformed, ReasonMissingField, ReasonUnknownSite, ReasonSiteMismatch, ReasonNotFinite,
			ReasonOutOfRange, ReasonBadInterval, ReasonBadTime, ReasonTooLarge},
		func(t *testing.T, dec *Decoder, subj string, data []byte) (bool, error) {
			fast, got, err := checkMeterPaths(t, dec, subj, data)
			if err == nil {
				checkReadings(t, dec, subj, got)
			}
			return fast, err
		})
}

// TestRepeatedNames pins what a name given twice in one object does: RFC
// 8259 (section 4) leaves it to the implementation, and encoding/json, which
// both decoders used before the fast reader came, keeps the last value. The
// fast reader gives up on such input, so the behaviour stays.
func TestRepeatedNames(t *testing.T) {
	dec := testDecoder()
	row := wrow("temp_c", "1")
	runs, err := dec.Weather("pv-a", []byte(row[:len(row)-1]+`,"temp_c":2,"site":"wind-b","site":"pv-a"}`))
	if err != nil {
		t.Fatal(err)
	}
	if got := runs[0].Rows[0].Values[runs[0].Var("temp_c")]; got != 2 {
		t.Errorf("temp_c given as 1 then 2 decodes as %v, want the last, 2", got)
	}
	if runs[0].Site != "pv-a" {
		t.Errorf("site given as wind-b then pv-a decodes as %q", runs[0].Site)
	}
	_, err = dec.Weather("pv-a", []byte(`{"site":"pv-a","issued_at":"2026-03-01T06:00:00Z","valid_start":"2026-03-01T10:00:00Z",`+
		`"valid_minutes":60,"temp_c":11,"temp_c":"NaN"}`))
	if r, _ := RejectOf(err); r != ReasonNotFinite {
		t.Errorf("temp_c given as 11 then \"NaN\": %v, want %s", err, ReasonNotFinite)
	}

	got, err := dec.Meter("pv-a", []byte(goodMeter(`"power_mw":1`, `"curtailed":true`, `"curtailed":false`)))
	if err != nil {
		t.Fatal(err)
	}
	if got[0].PowerMW != 1 || got[0].Curtailed {
		t.Errorf("power_mw 3.2 then 1, curtailed true then false decode as %v and %v", got[0].PowerMW, got[0].Curtailed)
	}
}

// TestMeterNameCase pins that meter field names match without regard to
// case, Unicode simple folding included (encoding/json's rule for struct
// fields, kept by the fast reader giving up on such names), while weather
// names are exact (a map in encoding/json).
func TestMeterNameCase(t *testing.T) {
	dec := testDecoder()
	for _, data := range []string{
		`{"SITE":"pv-a","Interval_Start":"2026-03-01T10:00:00Z","interval_MINUTES":15,"power_mw":3.2}`,
		"{\"\u017fite\":\"pv-a\",\"interval_start\":\"2026-03-01T10:00:00Z\",\"interval_minutes\":15,\"power_mw\":3.2}",
	} {
		got, err := dec.Meter("pv-a", []byte(data))
		if err != nil {
			t.Fatalf("%s: %v", data, err)
		}
		want := []model.Reading{{Site: "pv-a", IntervalStart: utc("2026-03-01T10:00:00Z"), IntervalMinutes: 15, PowerMW: 3.2, Availability: 1}}
		if !reflect.DeepEqual(got, want) {
			t.Errorf("%s: %+v, want %+v", data, got, want)
		}
	}
	_, err := dec.Weather("pv-a", []byte(wrow("site", "-", "SITE", `"pv-a"`)))
	if r, _ := RejectOf(err); r != ReasonMissingField {
		t.Errorf("weather row with SITE and no site: %v, want %s", err, ReasonMissingField)
	}
}

// TestFastReaderTakesPlainInput checks that the fast reader is the one
// that reads well-formed messages, of every shape, and that it gives up on
// the unusual; the differential tests above only show agreement.
func TestFastReaderTakesPlainInput(t *testing.T) {
	bench := weatherBenchMessage()
	cases := []struct {
		name  string
		data  string
		plain bool
	}{
		{"one object", wrow(), true},
		{"a batch of runs", "[" + wrow() + ",\r\n\t" + wrow("issued_at", `"2026-03-01T07:00:00+01:00"`) + " ]", true},
		{"numbers in exponent form", wrow("valid_minutes", "6E1", "ghi_wm2", "5.123e+2", "temp_c", "-1.5E-1"), true},
		{"the benchmark's run", string(bench), true},
		{"an escaped value", wrow("source", `"nwp\/1"`), true},
		{"an escaped name", strings.Replace(wrow(), `"temp_c"`, `"temp\u005fc"`, 1), false},
		{"a repeated name", wrow()[:len(wrow())-1] + `,"temp_c":2}`, false},
		{"invalid UTF-8", wrow("source", "\"\xff\""), false},
		{"a bare NaN", wrow("temp_c", "NaN"), false},
		{"a null row", "[" + wrow() + ",null]", false},
		{"a trailing comma", "[" + wrow() + ",]", false},
		{"two values", wrow() + wrow(), false},
	}
	for _, tc := range cases {
		sc := getScratch()
		if got := sc.weatherFields([]byte(tc.data), DefaultMaxRows); got != tc.plain {
			t.Errorf("%s: fast reader took it: %v, want %v", tc.name, got, tc.plain)
		}
		putScratch(sc)
	}
	sc := getScratch()
	defer putScratch(sc)
	if sc.weatherFields(bench, 47) {
		t.Errorf("fast reader took 48 rows with a limit of 47")
	}
	if _, ok := sc.meterRows([]byte("["+goodMeter()+","+goodMeter(`"Note":1`)+"]"), DefaultMaxRows); !ok {
		t.Errorf("fast reader gave up on a meter batch with an unknown field")
	}
	if _, ok := sc.meterRows([]byte(goodMeter(`"Curtailed":true`)), DefaultMaxRows); ok {
		t.Errorf("fast reader took a meter name that folds to a field name")
	}
}

// TestDecodeResultsOwnTheirMemory decodes messages concurrently, keeping
// each result while the pooled scratch serves other messages, and checks
// that no result changes afterwards.
func TestDecodeResultsOwnTheirMemory(t *testing.T) {
	dec := testDecoder()
	rng := rand.New(rand.NewPCG(3, 4))
	var msgs [][]byte
	var want [][]model.WeatherRun
	for len(msgs) < 40 {
		rows, single := genWeatherRows(rng)
		data := []byte(writeMsg(rng, rows, single))
		runs, err := dec.weather("", data, false)
		if err != nil {
			continue
		}
		msgs, want = append(msgs, data), append(want, runs)
	}
	got := make([][][]model.WeatherRun, 4)
	var wg sync.WaitGroup
	for g := range got {
		wg.Go(func() {
			for k := range 5 {
				for i := range msgs {
					runs, err := dec.Weather("", msgs[(i+g+k)%len(msgs)])
					if err != nil {
						t.Error(err)
						return
					}
					if k == 0 {
						got[g] = append(got[g], runs)
					}
				}
			}
		})
	}
	wg.Wait()
	for g := range got {
		for i, runs := range got[g] {
			if w := want[(i+g)%len(msgs)]; !equalRuns(runs, w) {
				t.Fatalf("goroutine %d, message %d: result changed to\n%+v\nwant\n%+v", g, i, runs, w)
			}
		}
	}
}

// BenchmarkWeatherJSON is BenchmarkWeather read by encoding/json only, the
// reader the fast one falls back to.
func BenchmarkWeatherJSON(b *testing.B) {
	data := weatherBenchMessage()
	dec := testDecoder()
	b.SetBytes(int64(len(data)))
	b.ReportAllocs()
	for b.Loop() {
		if _, err := dec.weather("pv-a", data, false); err != nil {
			b.Fatal(err)
		}
	}
}

// TestNestingLimit checks the readers agree at the nesting limit, which
// only a value nobody reads (an unknown meter field) can reach while the
// message stays good: encoding/json refuses more than 10000 nested arrays
// and objects (maxNestingDepth in its scanner), and so must the fast
// reader, or it would accept what encoding/json refuses.
func TestNestingLimit(t *testing.T) {
	dec := testDecoder()
	for depth := 9998; depth <= 10001; depth++ { // the row object and the array around it included
		inner := strings.Repeat("[", depth-2) + strings.Repeat("]", depth-2)
		data := []byte("[" + goodMeter(`"meta":`+inner) + "]")
		fast, _, err := checkMeterPaths(t, dec, "pv-a", data)
		if ok := depth <= 10000; fast != ok || (err == nil) != ok {
			t.Errorf("depth %d: fast reader took it: %v, error %v; want both readers to accept: %v", depth, fast, err, ok)
		}
	}
}
