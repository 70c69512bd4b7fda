package jet

import (
	"errors"
	"fmt"
	"strconv"
	"strings"

	"github.com/nats-io/nats-server/v2/server"

	"github.com/plumb-forecast/plumb/model"
	"github.com/plumb-forecast/plumb/stream"
)

// partitionSource is the source of the input stream's subject transform: the
// input subjects plumb.in.<kind>.<site>.
const partitionSource = "plumb.in.*.*"

// storedPrefix starts every subject stored in the input stream.
const storedPrefix = "plumb.in."

// PartitionMapping returns the subject transform the input stream applies
// for n partitions, as a source and destination in the NATS server's mapping
// syntax. The pair gives the same partitions as an account mapping on the
// server, but plumb does not need one, and must not have one: the input
// stream would no longer see the subjects it captures.
func PartitionMapping(n int) (src, dest string) {
	return partitionSource, "plumb.in.{{partition(" + strconv.Itoa(n) + ",2)}}.{{wildcard(1)}}.{{wildcard(2)}}"
}

// PartitionFilter returns the subject filter selecting partition p in the
// input stream: plumb.in.<p>.>.
func PartitionFilter(p int) string { return storedPrefix + strconv.Itoa(p) + ".>" }

// ErrBadSite is returned for a site id that model.ValidID refuses.
var ErrBadSite = errors.New("jet: invalid site id")

// Partitioner computes the partition of a site with the NATS server's own
// subject transform code, so it agrees with the input stream by construction.
// It is safe for concurrent use.
type Partitioner struct {
	n  int
	tr server.SubjectTransformer
}

// NewPartitioner returns a Partitioner for n partitions (n >= 1).
func NewPartitioner(n int) (*Partitioner, error) {
	if n < 1 {
		return nil, fmt.Errorf("%w: %d partitions", ErrBadLayout, n)
	}
	src, dest := PartitionMapping(n)
	tr, err := server.NewSubjectTransform(src, dest)
	if err != nil {
		return nil, fmt.Errorf("jet: partition transform: %w", err)
	}
	return &Partitioner{n: n, tr: tr}, nil
}

// N returns the number of partitions.
func (pt *Partitioner) N() int { return pt.n }

// Of returns the partition, in [0, N), of site's inputs. It returns
// ErrBadSite for an invalid site id.
func (pt *Partitioner) Of(site string) (int, error) {
	if !model.ValidID(site) {
		return 0, fmt.Errorf("%w: %q", ErrBadSite, site)
	}
	stored, err := pt.tr.Match(stream.MeterSubject(site))
	if err != nil {
		return 0, fmt.Errorf("jet: partition of %q: %w", site, err)
	}
	_, p, err := InputSubject(stored)
	if err != nil {
		return 0, fmt.Errorf("jet: partition of %q: %w", site, err)
	}
	return p, nil
}

// PartitionOf returns the partition, in [0, n), the input stream puts site
// in when it has n partitions. Callers asking often should keep a
// [Partitioner].
func PartitionOf(site string, n int) (int, error) {
	pt, err := NewPartitioner(n)
	if err != nil {
		return 0, err
	}
	return pt.Of(site)
}

// ErrNotStored is returned by InputSubject for a subject that is not of the
// form the input stream stores.
var ErrNotStored = errors.New("jet: not a stored input subject")

// InputSubject turns a subject stored in the input stream,
// plumb.in.<partition>.<kind>.<site>, back into the subject the input was
// published on, plumb.in.<kind>.<site>, and its partition. It checks the
// form only; stream.ParseInputSubject checks the kind and the site.
func InputSubject(stored string) (subject string, partition int, err error) {
	rest, ok := strings.CutPrefix(stored, storedPrefix)
	ptok, tail, ok2 := strings.Cut(rest, ".")
	if !ok || !ok2 || tail == "" {
		return "", 0, fmt.Errorf("%w: %q", ErrNotStored, stored)
	}
	p, err := strconv.Atoi(ptok)
	if err != nil || p < 0 || strconv.Itoa(p) != ptok {
		return "", 0, fmt.Errorf("%w: %q: partition token %q", ErrNotStored, stored, ptok)
	}
	return storedPrefix + tail, p, nil
}
