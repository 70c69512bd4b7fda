package lease

import (
	"slices"
	"testing"
	"time"

	"github.com/nats-io/nats.go/jetstream"
)

func TestAim(t *testing.T) {
	tests := []struct {
		name       string
		n, workers int
		want       int
	}{
		{"one worker takes all", 16, 1, 16},
		{"three share sixteen", 16, 3, 6},
		{"four share sixteen", 16, 4, 4},
		{"more workers than partitions", 4, 9, 1},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			if got := aim(tt.n, tt.workers); got != tt.want {
				t.Errorf("aim(%d, %d) = %d, want %d", tt.n, tt.workers, got, tt.want)
			}
		})
	}
}

func TestToRelease(t *testing.T) {
	tests := []struct {
		name    string
		owned   []int
		workers int
		want    []int
	}{
		{"at aim", []int{0, 1, 2, 3, 4, 5}, 3, nil},
		{"below aim", []int{0, 1}, 3, nil},
		{"all of sixteen when a second joins", []int{0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15}, 2, []int{8, 9, 10, 11, 12, 13, 14, 15}},
		{"two above", []int{1, 3, 5, 7, 9, 11}, 4, []int{9, 11}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			if got := toRelease(tt.owned, 16, tt.workers); !slices.Equal(got, tt.want) {
				t.Errorf("toRelease = %v, want %v", got, tt.want)
			}
		})
	}
}

func TestCandidates(t *testing.T) {
	tests := []struct {
		name   string
		start  int
		owned  []int
		leased map[int]bool
		want   []int
	}{
		{"all free from 0", 0, nil, nil, []int{0, 1, 2, 3, 4}},
		{"wraps from 3", 3, nil, nil, []int{3, 4, 0, 1, 2}},
		{"skips owned and leased", 1, []int{2}, map[int]bool{4: true, 0: true}, []int{1, 3}},
		{"none free", 0, []int{0, 1}, map[int]bool{2: true, 3: true, 4: true}, nil},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			if got := candidates(5, tt.start, tt.owned, tt.leased); !slices.Equal(got, tt.want) {
				t.Errorf("candidates = %v, want %v", got, tt.want)
			}
		})
	}
}

// entry is a bucket change as a watch delivers it.
type entry struct {
	jetstream.KeyValueEntry
	key string
	op  jetstream.KeyValueOp
}

func (e entry) Key() string                     { return e.key }
func (e entry) Operation() jetstream.KeyValueOp { return e.op }
func (e entry) Created() time.Time              { return time.Time{} }

func TestNudges(t *testing.T) {
	known := map[string]bool{"w1": true, "w2": true}
	tests := []struct {
		name string
		e    entry
		want bool
	}{
		{"lease renewed", entry{key: "lease.3", op: jetstream.KeyValuePut}, false},
		{"lease released", entry{key: "lease.3", op: jetstream.KeyValueDelete}, true},
		{"lease expired", entry{key: "lease.3", op: jetstream.KeyValuePurge}, true},
		{"known worker beats", entry{key: "worker.w1", op: jetstream.KeyValuePut}, false},
		{"worker joins", entry{key: "worker.w3", op: jetstream.KeyValuePut}, true},
		{"worker leaves", entry{key: "worker.w2", op: jetstream.KeyValueDelete}, true},
		{"worker expires", entry{key: "worker.w2", op: jetstream.KeyValuePurge}, true},
		{"other key", entry{key: "other", op: jetstream.KeyValueDelete}, false},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			if got := nudges(tt.e, known); got != tt.want {
				t.Errorf("nudges = %v, want %v", got, tt.want)
			}
		})
	}
}
