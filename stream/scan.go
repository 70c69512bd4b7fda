package stream

import (
	"bytes"
	"io"
	"slices"
	"strings"
	"sync"

	"github.com/go-json-experiment/json/jsontext"
)

// Decoding a message takes two steps: the JSON is read into the raw value
// of each field of each row (meterWire, rowFields), then those are checked
// and converted (meterRow, weatherRow, groupRuns). The first step has two
// implementations that give the same raw values for the same input:
//
//   - meterRowsJSON and scratch.weatherFieldsJSON use encoding/json. They
//     take any input and turn each JSON fault into its reject.
//   - scratch.meterRows and scratch.weatherFields use the jsontext streaming
//     tokenizer and allocate next to nothing. They take plain input only
//     and give up (return false) on anything else; the caller then runs the
//     encoding/json reader, so rejects keep their exact wording.
//
// Plain input is valid JSON (RFC 8259) in valid UTF-8, an object or an array
// of objects, whose object names have no escape and are not repeated within
// an object, with at most MaxRows rows. On such input encoding/json succeeds
// and hands each field the exact bytes of its value, as jsontext does, so
// both readers agree. Anything else (a syntax error, a repeated or escaped
// name, invalid UTF-8, a row that is not an object, too many rows) goes to
// encoding/json, which decides. Meter rows are read by encoding/json into a
// struct, whose field names it matches without regard to case: a meter name
// that equals a field name only when case is ignored gives up too.

// scratch is the reusable working memory of one decode call. It is kept in
// a sync.Pool, so the Decoder itself holds no mutable state.
type scratch struct {
	data []byte            // the message being read
	in   bytes.Buffer      // wraps data, without copying
	dec  *jsontext.Decoder // reads in (jsontext reads a bytes.Buffer in place)
	strs map[string]string // the strings of the message, interned

	meter  []meterWire
	fields []rowFields
	vars   []rawVar // the variables of every row in fields, row after row
	order  varOrder
	rows   []weatherRow
	vals   []namedValue
}

// varOrder remembers the variable names of the last weather row read, so
// that a row giving the same names in the same order (the usual case)
// needs neither a map lookup per name nor a sort.
type varOrder struct {
	names []string // in the order they came
	rank  []int    // rank[k] is the place of names[k] once sorted
	tmp   []rawVar
}

// maxKeptRows bounds the scratch kept for reuse: one that served a larger
// message is left to the garbage collector.
const maxKeptRows = 4096

var scratchPool = sync.Pool{New: func() any {
	sc := &scratch{strs: make(map[string]string)}
	sc.dec = jsontext.NewDecoder(&sc.in)
	return sc
}}

func getScratch() *scratch { return scratchPool.Get().(*scratch) }

// putScratch drops every reference into the message and returns sc to the
// pool, unless it grew large.
func putScratch(sc *scratch) {
	if cap(sc.meter) > maxKeptRows || cap(sc.fields) > maxKeptRows || cap(sc.vars) > 16*maxKeptRows ||
		len(sc.strs) > maxKeptRows {
		return
	}
	sc.data, sc.in = nil, bytes.Buffer{}
	sc.dec.Reset(&sc.in)
	clear(sc.strs)
	clear(sc.meter[:cap(sc.meter)])
	clear(sc.fields[:cap(sc.fields)])
	clear(sc.vars[:cap(sc.vars)])
	sc.order.names = sc.order.names[:0]
	clear(sc.order.tmp[:cap(sc.order.tmp)])
	scratchPool.Put(sc)
}

// str returns the text of a raw JSON string value, as jsonString does,
// interned when it has no escape. sc may be nil: no interning then.
func (sc *scratch) str(b []byte) (string, bool) {
	if sc == nil || len(b) < 2 || b[0] != '"' || bytes.IndexByte(b, '\\') >= 0 {
		return jsonString(b)
	}
	return sc.intern(b[1 : len(b)-1]), true
}

// intern returns string(b): the same string for the same bytes within a
// message, so that names and sites repeated in every row are allocated once.
func (sc *scratch) intern(b []byte) string {
	if s, ok := sc.strs[string(b)]; ok {
		return s
	}
	s := string(b)
	sc.strs[s] = s
	return s
}

// meterRows reads a plain meter message (see above) into sc.meter and
// returns its rows; false means the input is not plain.
func (sc *scratch) meterRows(data []byte, maxRows int) ([]meterWire, bool) {
	batch, ok := sc.begin(data)
	rows := sc.meter[:0]
	for ok && sc.another(batch, len(rows), maxRows) {
		rows = append(rows, meterWire{})
		ok = sc.meterObject(&rows[len(rows)-1])
	}
	sc.meter = rows
	return rows, ok && sc.end(batch)
}

// meterObject reads one meter row object into w, which must be zero.
func (sc *scratch) meterObject(w *meterWire) bool {
	return sc.object(func(name, raw []byte) bool {
		switch string(name) {
		case "site":
			w.Site = rawString(sc, raw)
		case "interval_start":
			w.IntervalStart = rawTime(raw)
		case "interval_minutes":
			w.IntervalMinutes = rawNum(raw)
		case "power_mw":
			w.PowerMW = rawNum(raw)
		case "availability":
			w.Availability = rawNum(raw)
		case "curtailed":
			_ = w.Curtailed.UnmarshalJSON(raw) // never fails
		default:
			if foldsToMeterField(name) {
				return false // encoding/json would fill that field
			}
		}
		return true
	})
}

// object reads one object, handing each of its fields, name (without its
// quotes) and raw value, to field; false when the input is not plain (see
// above) or field says so.
func (sc *scratch) object(field func(name, raw []byte) bool) bool {
	if tok, err := sc.dec.ReadToken(); err != nil || tok.Kind() != '{' {
		return false
	}
	for sc.dec.PeekKind() == '"' {
		name, ok := sc.name()
		if !ok {
			return false
		}
		raw, ok := sc.value()
		if !ok || !field(name, raw) {
			return false
		}
	}
	tok, err := sc.dec.ReadToken()
	return err == nil && tok.Kind() == '}'
}

// foldsToMeterField reports whether name equals the JSON name of a
// meterWire field when case is ignored (encoding/json's rule for struct
// fields: bytes.EqualFold).
func foldsToMeterField(name []byte) bool {
	for _, f := range [...]string{"site", "interval_start", "interval_minutes", "power_mw", "availability", "curtailed"} {
		if strings.EqualFold(string(name), f) {
			return true
		}
	}
	return false
}

// weatherFields reads a plain weather message (see above) into sc.fields;
// false means the input is not plain.
func (sc *scratch) weatherFields(data []byte, maxRows int) bool {
	batch, ok := sc.begin(data)
	fields := sc.fields[:0]
	sc.vars = sc.vars[:0]
	for ok && sc.another(batch, len(fields), maxRows) {
		fields = append(fields, rowFields{})
		ok = sc.weatherObject(&fields[len(fields)-1])
	}
	sc.fields = fields
	return ok && sc.end(batch)
}

// weatherObject reads one weather row object into f, which must be zero.
func (sc *scratch) weatherObject(f *rowFields) bool {
	from := len(sc.vars)
	same := true // the variables so far are those of the last row, in order
	ok := sc.object(func(name, raw []byte) bool {
		switch string(name) {
		case "site":
			f.site = raw
		case "issued_at":
			f.issuedAt = raw
		case "source":
			f.source = raw
		case "valid_start":
			f.validStart = raw
		case "valid_minutes":
			f.validMinutes = raw
		default:
			last := sc.order.names
			if k := len(sc.vars) - from; same && k < len(last) && last[k] == string(name) {
				sc.vars = append(sc.vars, rawVar{name: last[k], raw: raw})
			} else {
				same = false
				sc.vars = append(sc.vars, rawVar{name: sc.intern(name), raw: raw})
			}
		}
		return true
	})
	if !ok {
		return false
	}
	f.vars = sc.order.sort(sc.vars[from:], same)
	return true
}

// sort sorts the variables of a row, as sortVars does. same reports that
// each name is the last row's name at the same place; if there are as many
// as the last row had, each takes the place its name took then. Otherwise
// they are sorted and become the last row. Names are distinct within a row
// (jsontext refuses repeats).
func (o *varOrder) sort(vars []rawVar, same bool) []rawVar {
	if same && len(vars) == len(o.names) {
		o.tmp = append(o.tmp[:0], vars...)
		for k, v := range o.tmp {
			vars[o.rank[k]] = v
		}
		return vars[:len(vars):len(vars)]
	}
	o.names = o.names[:0]
	for _, v := range vars {
		o.names = append(o.names, v.name)
	}
	vars = sortVars(vars)
	o.rank = o.rank[:0]
	for _, name := range o.names {
		i, _ := slices.BinarySearchFunc(vars, name, func(v rawVar, name string) int { return strings.Compare(v.name, name) })
		o.rank = append(o.rank, i)
	}
	return vars
}

// begin starts reading data. batch reports an array; ok is false when data
// is neither an object nor an array.
func (sc *scratch) begin(data []byte) (batch, ok bool) {
	sc.data = data
	sc.in = *bytes.NewBuffer(data)
	sc.dec.Reset(&sc.in)
	switch firstByte(data) {
	case '{':
		return false, true
	case '[':
		tok, err := sc.dec.ReadToken()
		return true, err == nil && tok.Kind() == '['
	}
	return false, false
}

// another reports whether a row object comes next, n rows having been
// read: the single object of a message that is one, else the next element
// of the array. It reports false once n reaches maxRows (negative: no
// limit); end then fails if more rows follow.
func (sc *scratch) another(batch bool, n, maxRows int) bool {
	switch {
	case maxRows >= 0 && n >= maxRows:
		return false
	case !batch:
		return n == 0
	}
	return sc.dec.PeekKind() == '{'
}

// end reports whether the input ends cleanly after the last row.
func (sc *scratch) end(batch bool) bool {
	if batch {
		if tok, err := sc.dec.ReadToken(); err != nil || tok.Kind() != ']' {
			return false
		}
	}
	_, err := sc.dec.ReadToken()
	return err == io.EOF
}

// name reads an object name and returns its text; false when it has an
// escape (its text is then not its bytes) or on any error.
func (sc *scratch) name() ([]byte, bool) {
	v, ok := sc.value()
	if !ok || len(v) < 2 || v[0] != '"' || bytes.IndexByte(v, '\\') >= 0 {
		return nil, false
	}
	return v[1 : len(v)-1], true
}

// value reads the next value and returns its bytes within the message,
// which stay valid after further reads (jsontext's own slice would not).
func (sc *scratch) value() ([]byte, bool) {
	v, err := sc.dec.ReadValue()
	if err != nil {
		return nil, false
	}
	end := int(sc.dec.InputOffset())
	if end < len(v) || end > len(sc.data) {
		return nil, false
	}
	raw := sc.data[end-len(v) : end : end]
	return raw, bytes.Equal(raw, v)
}
