package stream

import (
	"math"
	"strconv"
	"time"

	"github.com/plumb-forecast/plumb/model"
)

// AppendMeterJSON appends the JSON input message of one meter reading to dst.
// Availability is written only when below 1, curtailed only when true.
func AppendMeterJSON(dst []byte, r *model.Reading) []byte {
	dst = append(dst, `{"site":`...)
	dst = strconv.AppendQuote(dst, r.Site)
	dst = append(dst, `,"interval_start":"`...)
	dst = r.IntervalStart.UTC().AppendFormat(dst, time.RFC3339)
	dst = append(dst, `","interval_minutes":`...)
	dst = strconv.AppendInt(dst, int64(r.IntervalMinutes), 10)
	dst = append(dst, `,"power_mw":`...)
	dst = appendNumber(dst, r.PowerMW)
	if r.Availability < 1 {
		dst = append(dst, `,"availability":`...)
		dst = appendNumber(dst, r.Availability)
	}
	if r.Curtailed {
		dst = append(dst, `,"curtailed":true`...)
	}
	return append(dst, '}')
}

// AppendWeatherJSON appends the JSON input message of one weather run to dst:
// an array of flat rows, a missing value written as null.
func AppendWeatherJSON(dst []byte, w *model.WeatherRun) []byte {
	dst = append(dst, '[')
	for i := range w.Rows {
		row := &w.Rows[i]
		if i > 0 {
			dst = append(dst, ',')
		}
		dst = append(dst, `{"site":`...)
		dst = strconv.AppendQuote(dst, w.Site)
		dst = append(dst, `,"issued_at":"`...)
		dst = w.IssuedAt.UTC().AppendFormat(dst, time.RFC3339)
		dst = append(dst, '"')
		if w.Source != "" {
			dst = append(dst, `,"source":`...)
			dst = strconv.AppendQuote(dst, w.Source)
		}
		dst = append(dst, `,"valid_start":"`...)
		dst = row.ValidStart.UTC().AppendFormat(dst, time.RFC3339)
		dst = append(dst, `","valid_minutes":`...)
		dst = strconv.AppendInt(dst, int64(row.ValidMinutes), 10)
		for j, name := range w.Vars {
			dst = append(dst, ',')
			dst = strconv.AppendQuote(dst, name)
			dst = append(dst, ':')
			dst = appendNumber(dst, row.Values[j])
		}
		dst = append(dst, '}')
	}
	return append(dst, ']')
}

func appendNumber(dst []byte, v float64) []byte {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return append(dst, "null"...)
	}
	return strconv.AppendFloat(dst, v, 'g', -1, 64)
}
