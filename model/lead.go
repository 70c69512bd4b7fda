package model

import "fmt"

// Buckets splits lead times into the bands over which residuals, calibrators
// and coverage are pooled. Edges are in minutes: bucket i holds leads in
// [Edges[i], Edges[i+1]); the last bucket is open-ended.
type Buckets struct {
	Edges []int
}

// DefaultBuckets: 0-1 h, 1-2 h, 2-4 h, 4-8 h, 8-16 h, 16-24 h, 24-36 h, 36 h and beyond.
func DefaultBuckets() Buckets {
	return Buckets{Edges: []int{0, 60, 120, 240, 480, 960, 1440, 2160}}
}

// Len returns the number of buckets.
func (b Buckets) Len() int { return len(b.Edges) }

// Of returns the bucket of a lead time in minutes; negative leads fall in bucket 0.
func (b Buckets) Of(leadMinutes int) int {
	i := 0
	for i+1 < len(b.Edges) && leadMinutes >= b.Edges[i+1] {
		i++
	}
	return i
}

// Name returns a short label such as "4h-8h" or "36h+".
func (b Buckets) Name(i int) string {
	h := func(m int) string {
		if m%60 == 0 {
			return fmt.Sprintf("%dh", m/60)
		}
		return fmt.Sprintf("%dm", m)
	}
	if i+1 >= len(b.Edges) {
		return h(b.Edges[i]) + "+"
	}
	return h(b.Edges[i]) + "-" + h(b.Edges[i+1])
}
