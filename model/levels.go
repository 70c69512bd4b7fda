package model

import (
	"fmt"
	"math"
	"slices"
	"sort"
	"strconv"
	"strings"
)

// DefaultLevels returns the quantile levels 0.05, 0.10, ..., 0.95.
func DefaultLevels() []float64 { return LevelGrid(20) }

// LevelGrid returns the n-1 levels 1/n, 2/n, ..., (n-1)/n, rounded to 1e-9
// (LevelGrid(100) is the GEFCom-style grid 0.01..0.99).
func LevelGrid(n int) []float64 {
	if n < 2 {
		panic("model: LevelGrid needs n >= 2")
	}
	out := make([]float64, n-1)
	for i := range out {
		out[i] = math.Round(float64(i+1)/float64(n)*1e9) / 1e9
	}
	return out
}

// ParseLevels reads a comma-separated list of levels in (0, 1), or one of the
// names "default" (0.05..0.95) and "percentiles" (0.01..0.99). The result is
// sorted and free of duplicates.
func ParseLevels(s string) ([]float64, error) {
	switch strings.TrimSpace(s) {
	case "", "default":
		return DefaultLevels(), nil
	case "percentiles":
		return LevelGrid(100), nil
	}
	var out []float64
	for _, f := range strings.Split(s, ",") {
		v, err := strconv.ParseFloat(strings.TrimSpace(f), 64)
		if err != nil {
			return nil, fmt.Errorf("levels: %q is not a number", f)
		}
		if !(v > 0 && v < 1) {
			return nil, fmt.Errorf("levels: %v is outside (0, 1)", v)
		}
		out = append(out, v)
	}
	sort.Float64s(out)
	for i := 1; i < len(out); i++ {
		if out[i] == out[i-1] {
			return nil, fmt.Errorf("levels: %v given twice", out[i])
		}
	}
	return out, nil
}

// LevelColumn names the bundle column of a level: "q0.05", "q0.5", "q0.975".
func LevelColumn(level float64) string {
	return "q" + FormatLevel(level)
}

// FormatLevel writes a level with as few digits as needed, at least two
// decimals ("0.05", "0.50", "0.975").
func FormatLevel(level float64) string {
	s := strconv.FormatFloat(level, 'f', -1, 64)
	if i := strings.IndexByte(s, '.'); i >= 0 && len(s)-i-1 < 2 {
		s += strings.Repeat("0", 2-(len(s)-i-1))
	} else if i < 0 {
		s += ".00"
	}
	return s
}

// SortNearly sorts q as slices.Sort does, by insertion when q is short and
// free of NaN: quantiles at a grid of levels are nearly sorted, which
// insertion sorts in about one pass. Equal values are the same float but
// for the sign of a zero.
func SortNearly(q []float64) {
	if len(q) > 128 {
		slices.Sort(q)
		return
	}
	for _, v := range q {
		if v != v {
			slices.Sort(q)
			return
		}
	}
	for i := 1; i < len(q); i++ {
		v := q[i]
		j := i
		for j > 0 && v < q[j-1] {
			q[j] = q[j-1]
			j--
		}
		q[j] = v
	}
}

// SameBits reports whether p and q hold the same floats, bit for bit (NaN
// payloads and signed zeros included): what memos of quantile rows compare.
func SameBits(p, q []float64) bool {
	if len(p) != len(q) {
		return false
	}
	for j, v := range p {
		if math.Float64bits(v) != math.Float64bits(q[j]) {
			return false
		}
	}
	return true
}
