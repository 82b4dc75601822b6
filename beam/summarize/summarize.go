// Package summarize summarises the attributions of data sets larger than
// one machine on Apache Beam: the rows are explained on the workers and
// their attributions combined, per subgroup, into one summary whose JSON
// document is the one apportion summarize writes, and merges with it.
//
// The steps: NewPlan checks a Config (the model, the explain settings, the
// grouping and key columns) against the first file of the data; ReadFiles
// reads the rows of files, or a pipeline brings its own Rows; Summarize
// explains them (each worker compiles the model once, in Setup, and
// explains rows in batches) and combines the outcomes with a CombineFn
// whose accumulator is the summary state (gradattr.Summary), merged
// exactly; the rows that could not be read or explained come out as a
// dead-letter PCollection of Failed, and the summary counts them as
// skipped. Write and WriteFailed write the two outputs.
//
// Rows are keyed by a key column (samples.RowKey) or, without one, by file
// name and place (samples.PlaceKey). A row's bootstrap weights follow its
// key, so the summary does not depend on how the rows were split into
// files, bundles or workers: with the same key column, settings and seed
// it equals, byte for byte, apportion summarize -key COLUMN on all the
// rows in one file.
package summarize

import (
	"context"
	"encoding/json"
	"fmt"

	"github.com/apache/beam/sdks/v2/go/pkg/beam"
	"github.com/apache/beam/sdks/v2/go/pkg/beam/io/filesystem"
	"github.com/apache/beam/sdks/v2/go/pkg/beam/io/textio"
	"github.com/apache/beam/sdks/v2/go/pkg/beam/register"
)

func init() {
	register.DoFn2x1[context.Context, []byte, error](&writeFn{})
	register.Function1x2(failedJSON)
}

// Summarize explains rows, a PCollection of Row, and returns the summary,
// a PCollection holding one JSON document ([]byte, as apportion summarize
// -format json writes it; gradattr.DecodeSummary reads it), and the rows
// that failed, a PCollection of Failed. With no rows, the summary
// PCollection is empty.
func Summarize(s beam.Scope, p *Plan, rows beam.PCollection) (summary, failed beam.PCollection) {
	s = s.Scope("summarize.Summarize")
	byGroup, failed := beam.ParDo2(s, &explainFn{Plan: p}, rows)
	groups := beam.DropKey(s, beam.CombinePerKey(s, &groupFn{Empty: p.Empty}, byGroup))
	return beam.Combine(s, &mergeFn{Empty: p.Empty}, groups), failed
}

// Files reads the files that match glob (ReadFiles) and summarises their
// rows (Summarize).
func Files(s beam.Scope, p *Plan, glob string) (summary, failed beam.PCollection) {
	return Summarize(s, p, ReadFiles(s, p, glob))
}

// Write writes the summary document to path, on any file system Beam has.
func Write(s beam.Scope, path string, summary beam.PCollection) {
	s = s.Scope("summarize.Write")
	filesystem.ValidateScheme(path)
	beam.ParDo0(s, &writeFn{Path: path}, summary)
}

type writeFn struct {
	Path string
}

func (f *writeFn) ProcessElement(ctx context.Context, doc []byte) error {
	fs, err := filesystem.New(ctx, f.Path)
	if err != nil {
		return err
	}
	defer fs.Close()
	w, err := fs.OpenWrite(ctx, f.Path)
	if err != nil {
		return fmt.Errorf("writing the summary: %w", err)
	}
	if _, err := w.Write(doc); err != nil {
		w.Close()
		return fmt.Errorf("writing the summary to %s: %w", f.Path, err)
	}
	return w.Close()
}

// WriteFailed writes the rows that failed to path as JSON lines, one
// {"key", "file", "where", "group", "error"} object per row, in no
// particular order.
func WriteFailed(s beam.Scope, path string, failed beam.PCollection) {
	s = s.Scope("summarize.WriteFailed")
	textio.Write(s, path, beam.ParDo(s, failedJSON, failed))
}

func failedJSON(f Failed) (string, error) {
	raw, err := json.Marshal(f)
	return string(raw), err
}
