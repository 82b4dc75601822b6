package summarize

import (
	"bytes"
	"context"
	"fmt"
	"io"
	"strings"

	"github.com/apache/beam/sdks/v2/go/pkg/beam"
	"github.com/apache/beam/sdks/v2/go/pkg/beam/io/fileio"
	"github.com/apache/beam/sdks/v2/go/pkg/beam/register"

	"github.com/apportion/apportion/samples"
)

func init() {
	register.DoFn3x1[context.Context, fileio.ReadableFile, func(Row), error](&readFn{})
	register.Emitter1[Row]()
}

// Row is one row of a data set: its key, its place, its group and values,
// or why it could not be read.
type Row struct {
	// Key keys the row in the summary: each row of a data set needs its
	// own, the same wherever the row is read (see samples.RowKey).
	Key uint64
	// File and Where say where the row is: "data/part-3.csv", "line 7".
	File, Where string
	// Group is the row's subgroup; "" for none.
	Group string
	// Values are the row's features, in the model's order; nil when Error
	// is set.
	Values []float64
	// Error says why the row could not be read; "" when it was.
	Error string
}

// ReadFiles reads the rows of the files that match glob (CSV files with a
// header, or .npy, .json and .pb files of samples, each optionally
// compressed with gzip, on any file system Beam has) as NewPlan read the
// first of them. Rows are keyed by the plan's key column, or by file name
// and place without one. A file that cannot be read, or lacks a column,
// stops the pipeline with its error; a row that cannot be read keeps its
// error and goes on, to be counted as skipped.
func ReadFiles(s beam.Scope, p *Plan, glob string) beam.PCollection {
	s = s.Scope("summarize.ReadFiles")
	files := fileio.ReadMatches(s, fileio.MatchFiles(s, glob, fileio.MatchEmptyDisallow()))
	return beam.ParDo(s, &readFn{Plan: p}, beam.Reshuffle(s, files))
}

// readFn reads the rows of one file.
type readFn struct {
	Plan *Plan
}

func (f *readFn) ProcessElement(ctx context.Context, file fileio.ReadableFile, emit func(Row)) error {
	path := file.Metadata.Path
	rc, err := file.Open(ctx)
	if err != nil {
		return fmt.Errorf("input %s: %w", path, err)
	}
	defer rc.Close()
	raw, err := io.ReadAll(io.LimitReader(rc, samples.MaxBytes+1))
	if err != nil {
		return fmt.Errorf("input %s: %w", path, err)
	}
	if len(raw) > samples.MaxBytes {
		return fmt.Errorf("input %s: more than the %d bytes a file may have; split it into several files", path, samples.MaxBytes)
	}
	rows, err := f.Plan.readTable(raw, path)
	if err != nil {
		return err
	}
	for _, r := range rows {
		emit(r)
	}
	return nil
}

// readTable reads the rows of the file at path, whose content is raw
// (decompressed: a name ending in .gz names the format before it).
func (p *Plan) readTable(raw []byte, path string) ([]Row, error) {
	c := &p.Config
	opt := samples.TableOptions{Features: p.Columns, Size: len(p.Columns), Key: c.Key}
	if c.By != ByPredicted {
		opt.Group = c.By
	}
	name := strings.TrimSuffix(path, ".gz")
	t, err := samples.ReadTable(bytes.NewReader(raw), name, p.Spec, opt)
	if err != nil {
		return nil, err
	}
	rows := make([]Row, len(t.Rows))
	for i, r := range t.Rows {
		row := Row{Key: r.Key, File: path, Where: r.Where, Group: r.Group, Values: r.Values}
		if c.Key == "" {
			row.Key = samples.PlaceKey(name, r.Where)
		}
		if r.Err != nil {
			row.Values, row.Error = nil, r.Err.Error()
		}
		rows[i] = row
	}
	return rows, nil
}
