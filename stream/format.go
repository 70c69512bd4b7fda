package stream

import (
	"fmt"
	"io"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/plumb-forecast/plumb/model"
)

// TableOptions chooses what WriteBundleTable shows.
type TableOptions struct {
	// Leads lists the lead times (minutes) whose steps are shown: for each,
	// the first step at or beyond it. Nil means 0, 1, 2, 4, 8, 16, 24 and 36 h.
	Leads []int
	// AllRows shows every step instead.
	AllRows bool
	// AllLevels shows every level; by default at most 7 are shown, spread
	// over the grid and always including the extremes and the median.
	AllLevels bool
}

// WriteBundleTable writes a bundle for people: a header line and a table of
// selected steps and levels, in MW.
func WriteBundleTable(w io.Writer, b *model.Bundle, o TableOptions) error {
	wi := ""
	if !b.WeatherIssuedAt.IsZero() {
		wi = ", weather run " + b.WeatherIssuedAt.UTC().Format("01-02 15:04")
	}
	fmt.Fprintf(w, "== %s  issued %s  %d steps  capacity %s MW x %s%s  model %s  calibrator %s\n",
		b.Site, b.IssuedAt.UTC().Format(time.RFC3339), len(b.Steps), num(b.CapacityMW), num(b.Availability),
		wi, b.Model, b.Calibrator)
	cols := levelColumns(b.Levels, o.AllLevels)
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprint(tw, "valid_start\tlead\t")
	for _, j := range cols {
		fmt.Fprintf(tw, "%s\t", model.LevelColumn(b.Levels[j]))
	}
	fmt.Fprint(tw, "expected\t\n")
	for _, i := range rowsToShow(b, o) {
		s := b.Steps[i]
		fmt.Fprintf(tw, "%s\t%s\t", s.ValidStart.UTC().Format("01-02 15:04"), leadString(s.LeadMinutes))
		row := b.Row(i)
		for _, j := range cols {
			fmt.Fprintf(tw, "%.3f\t", row[j])
		}
		fmt.Fprintf(tw, "%.3f\t\n", b.Expected[i])
	}
	return tw.Flush()
}

// WriteBundleCSV writes every step of a bundle as CSV rows, with the header
// line first when header is true. Columns follow the Arrow schema.
func WriteBundleCSV(w io.Writer, b *model.Bundle, header bool) error {
	var sb strings.Builder
	if header {
		sb.WriteString("site,issued_at,valid_start,valid_minutes,lead_minutes")
		for _, l := range b.Levels {
			sb.WriteString("," + model.LevelColumn(l))
		}
		sb.WriteString(",expected_mw,capacity_mw,availability\n")
	}
	issued := b.IssuedAt.UTC().Format(time.RFC3339)
	for i, s := range b.Steps {
		sb.WriteString(b.Site + "," + issued + "," + s.ValidStart.UTC().Format(time.RFC3339) + ",")
		sb.WriteString(strconv.Itoa(s.ValidMinutes) + "," + strconv.Itoa(s.LeadMinutes))
		for _, v := range b.Row(i) {
			sb.WriteString("," + num(v))
		}
		sb.WriteString("," + num(b.Expected[i]) + "," + num(b.CapacityMW) + "," + num(b.Availability) + "\n")
	}
	_, err := io.WriteString(w, sb.String())
	return err
}

func num(v float64) string { return strconv.FormatFloat(v, 'g', 6, 64) }

func leadString(m int) string {
	if m%60 == 0 {
		return strconv.Itoa(m/60) + "h"
	}
	return fmt.Sprintf("%dh%02d", m/60, m%60)
}

func rowsToShow(b *model.Bundle, o TableOptions) []int {
	if o.AllRows {
		out := make([]int, len(b.Steps))
		for i := range out {
			out[i] = i
		}
		return out
	}
	leads := o.Leads
	if leads == nil {
		leads = []int{0, 60, 120, 240, 480, 960, 1440, 2160}
	}
	var out []int
	for _, l := range leads {
		for i, s := range b.Steps {
			if s.LeadMinutes >= l {
				if len(out) == 0 || out[len(out)-1] != i {
					out = append(out, i)
				}
				break
			}
		}
	}
	return out
}

func levelColumns(levels []float64, all bool) []int {
	n := len(levels)
	if all || n <= 7 {
		out := make([]int, n)
		for i := range out {
			out[i] = i
		}
		return out
	}
	want := []float64{levels[0], 0.1, 0.25, 0.5, 0.75, 0.9, levels[n-1]}
	var out []int
	for _, t := range want {
		best := 0
		for j, l := range levels {
			if abs(l-t) < abs(levels[best]-t) {
				best = j
			}
		}
		if len(out) == 0 || out[len(out)-1] < best {
			out = append(out, best)
		}
	}
	return out
}

func abs(x float64) float64 {
	if x < 0 {
		return -x
	}
	return x
}
