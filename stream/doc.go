// Package stream holds everything plumb says on the wire and how it reaches
// NATS: the subject names, the JSON input decoders and their reject reasons,
// the Arrow quantile bundle codec, the embedded NATS server and connection
// options, and the replay of a history folder as live inputs.
//
// Sub-package history reads and writes the canonical history layout.
package stream
