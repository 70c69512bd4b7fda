package stream

import (
	"fmt"
	"io"
	"slices"

	"github.com/apache/arrow-go/v18/arrow"
	"github.com/apache/arrow-go/v18/arrow/ipc"

	"github.com/plumb-forecast/plumb/model"
)

// ForecastFile writes many bundles of one model and calibrator to one Arrow
// IPC file (the random-access file format), one record batch per bundle,
// with the bundle's columns. The schema metadata holds plumb.schema,
// plumb.model and plumb.calibrator; per-bundle metadata (site, issue time)
// is in the columns. Close must be called to write the footer.
type ForecastFile struct {
	enc    *BundleEncoder
	w      *ipc.FileWriter
	schema *arrow.Schema
	levels []float64
}

// NewForecastFile starts a file of bundles with the given levels.
func NewForecastFile(w io.Writer, levels []float64, modelName, calibrator string) (*ForecastFile, error) {
	md := arrow.NewMetadata(
		[]string{MetaSchema, MetaModel, MetaCalibrator},
		[]string{BundleSchemaVersion, modelName, calibrator},
	)
	schema := arrow.NewSchema(bundleFields(levels), &md)
	fw, err := ipc.NewFileWriter(w, ipc.WithSchema(schema))
	if err != nil {
		return nil, fmt.Errorf("stream: forecast file: %w", err)
	}
	return &ForecastFile{enc: NewBundleEncoder(), w: fw, schema: schema, levels: slices.Clone(levels)}, nil
}

// Write appends one bundle; its levels must be the file's.
func (f *ForecastFile) Write(b *model.Bundle) error {
	if !slices.Equal(b.Levels, f.levels) {
		return fmt.Errorf("stream: forecast file: bundle levels differ from the file's")
	}
	if err := checkBundle(b); err != nil {
		return fmt.Errorf("stream: forecast file: %w", err)
	}
	rec := f.enc.record(f.schema, b)
	defer rec.Release()
	if err := f.w.Write(rec); err != nil {
		return fmt.Errorf("stream: forecast file: %w", err)
	}
	return nil
}

// Close writes the file's footer.
func (f *ForecastFile) Close() error {
	if err := f.w.Close(); err != nil {
		return fmt.Errorf("stream: forecast file: %w", err)
	}
	return nil
}
