// Command apportion-beam summarises the attributions of a data set larger
// than one machine on Apache Beam: every row of the files that match
// -input is explained on the workers, and the attributions are combined
// into the summary apportion summarize writes (-format json), overall and
// per subgroup of -by, mergeable with it.
//
// Usage:
//
//	apportion-beam -model M -input 'GLOB' [-by COLUMN|predicted] [-key COLUMN] -output summary.json [flags] [Beam flags]
//
// The explain flags are apportion summarize's, except -model-output, which
// names the model output to explain (summarize's -output). Beam's flags
// choose the runner: --runner prism (the default, in this process),
// dataflow, flink or spark, with the flags each needs (see the README).
// The exit status is 0 on success, 1 when the pipeline failed or rows were
// skipped (the summary is written), and 2 on a usage error.
package main

import (
	"bytes"
	"compress/gzip"
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"sort"
	"strings"

	"github.com/apache/beam/sdks/v2/go/pkg/beam"
	"github.com/apache/beam/sdks/v2/go/pkg/beam/io/filesystem"
	"github.com/apache/beam/sdks/v2/go/pkg/beam/x/beamx"

	"github.com/apportion/apportion/beam/summarize"
	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/internal/settingflags"
	"github.com/apportion/apportion/onnxlite"
	"github.com/apportion/apportion/samples"
)

// Exit statuses.
const (
	exitOK    = 0
	exitFail  = 1
	exitUsage = 2
)

// methodFlags are the flags of the explain settings, in the order they
// are applied.
var methodFlags = []struct {
	field explain.Field
	flag  string
}{
	{explain.FieldMethod, "method"}, {explain.FieldTarget, "target"}, {explain.FieldOutput, "model-output"},
	{explain.FieldLogits, "logits"}, {explain.FieldBaseline, "baseline"}, {explain.FieldReference, "reference"},
	{explain.FieldSteps, "steps"}, {explain.FieldRule, "rule"}, {explain.FieldTolerance, "tolerance"},
	{explain.FieldSamples, "samples"}, {explain.FieldNoise, "noise"},
}

var (
	modelPath  = flag.String("model", "", "ONNX model `file` (required; any file system Beam has, gs://... too)")
	input      = flag.String("input", "", "`glob` of the files of rows: CSV with a header (or .npy, .json, .pb), optionally .gz (required)")
	by         = flag.String("by", "", "group rows by this CSV `column`, or by the predicted class with predicted")
	key        = flag.String("key", "", "key each row by its value in this CSV `column` (default: by file name and line)")
	output     = flag.String("output", "", "write the summary JSON document to this `file` (required)")
	deadLetter = flag.String("dead-letter", "", "write the rows that could not be read or explained to this `file`, as JSON lines")
	bootstrap  = flag.Int("bootstrap", gradattr.DefaultBootstrap, "number `B` of bootstrap replicates")
	seed       = flag.Uint64("seed", gradattr.DefaultSeed, "seed of the bootstrap weights (and of smoothgrad and expected-grad)")
	batch      = flag.Int("batch", summarize.DefaultBatch, "rows a worker explains at once, on all its cores")
)

func init() {
	fields := make([]explain.Field, len(methodFlags))
	for i, m := range methodFlags {
		fields[i] = m.field
	}
	settingflags.Define(flag.CommandLine, func(f explain.Field) string { return flagName(f)[1:] }, fields...)
	flag.Usage = func() {
		w := flag.CommandLine.Output()
		fmt.Fprintln(w, "Usage: apportion-beam -model M -input 'GLOB' [-by COLUMN|predicted] [-key COLUMN] -output summary.json [flags] [Beam flags]")
		fmt.Fprintln(w, "\nExplains every row of the files that match -input on Apache Beam and writes the")
		fmt.Fprintln(w, "summary apportion summarize -format json writes, mergeable with it. Beam's")
		fmt.Fprintln(w, "--runner is prism (in this process) unless given: dataflow, flink, spark.")
		fmt.Fprintln(w, "\nFlags (Beam's included):")
		flag.PrintDefaults()
		fmt.Fprintln(w, "\nExample:\n\n\tapportion-beam -model pumps.onnx -input 'rows/part-*.csv' -by pump_line -key reading \\")
		fmt.Fprintln(w, "\t\t-reference reference.csv -baseline mean -output summary.json")
	}
}

func main() {
	flag.Parse()
	beam.Init() // a worker started by a runner stops here
	os.Exit(run(context.Background(), os.Stderr))
}

// usageError is a flag given wrong.
type usageError struct{ msg string }

func (e *usageError) Error() string { return e.msg }

// flagName names a setting as a flag of this command.
func flagName(f explain.Field) string {
	for _, m := range methodFlags {
		if m.field == f {
			return "-" + m.flag
		}
	}
	return "-" + string(f)
}

func run(ctx context.Context, stderr io.Writer) int {
	code, err := pipeline(ctx, stderr)
	var fe *explain.FieldError
	var ue *usageError
	switch {
	case err == nil:
		return code
	case errors.As(err, &fe) && !fe.Input:
		fmt.Fprintf(stderr, "apportion-beam: %s\nRun 'apportion-beam -h' for usage.\n", fe.Wording(flagName))
		return exitUsage
	case errors.As(err, &fe):
		fmt.Fprintf(stderr, "apportion-beam: %s\n", fe.Wording(flagName))
		return exitFail
	case errors.As(err, &ue):
		fmt.Fprintf(stderr, "apportion-beam: %s\nRun 'apportion-beam -h' for usage.\n", ue.msg)
		return exitUsage
	}
	fmt.Fprintf(stderr, "apportion-beam: %v\n", err)
	return exitFail
}

// pipeline checks the flags, builds the pipeline, runs it and reports the
// summary's counts.
func pipeline(ctx context.Context, stderr io.Writer) (int, error) {
	cfg, err := config(ctx)
	if err != nil {
		return exitFail, err
	}
	files, err := match(ctx, *input)
	if err != nil {
		return exitFail, err
	}
	first, err := readAll(ctx, files[0], samples.MaxBytes)
	if err != nil {
		return exitFail, err
	}
	plan, err := summarize.NewPlan(cfg, bytes.NewReader(first), strings.TrimSuffix(files[0], ".gz"))
	if err != nil {
		return exitFail, err
	}
	p, s := beam.NewPipelineWithRoot()
	summary, failed := summarize.Files(s, plan, *input)
	summarize.Write(s, *output, summary)
	if *deadLetter != "" {
		summarize.WriteFailed(s, *deadLetter, failed)
	}
	if err := beamx.Run(ctx, p); err != nil {
		return exitFail, err
	}
	doc, err := readAll(ctx, *output, samples.MaxBytes)
	if err != nil {
		return exitFail, fmt.Errorf("the pipeline ran but wrote no summary (no rows?): %w", err)
	}
	sum, err := gradattr.DecodeSummary(bytes.NewReader(doc))
	if err != nil {
		return exitFail, err
	}
	fmt.Fprintf(stderr, "apportion-beam: %d rows summarised, %d skipped: %s\n", sum.Rows(), sum.SkippedRows(), *output)
	if sum.SkippedRows() > 0 {
		return exitFail, nil
	}
	return exitOK, nil
}

// config reads the flags into a summarize.Config, with the files they
// name.
func config(ctx context.Context) (summarize.Config, error) {
	var missing []string
	for _, f := range []struct{ name, value string }{{"-model", *modelPath}, {"-input", *input}, {"-output", *output}} {
		if f.value == "" {
			missing = append(missing, f.name)
		}
	}
	if len(missing) > 0 {
		return summarize.Config{}, &usageError{strings.Join(missing, ", ") + " required"}
	}
	if flag.NArg() > 0 {
		return summarize.Config{}, &usageError{"unexpected arguments: " + strings.Join(flag.Args(), " ")}
	}
	if *bootstrap < 1 || *bootstrap > gradattr.MaxBootstrap {
		return summarize.Config{}, &usageError{fmt.Sprintf("-bootstrap must be from 1 to %d, got %d", gradattr.MaxBootstrap, *bootstrap)}
	}
	if *batch < 1 {
		return summarize.Config{}, &usageError{fmt.Sprintf("-batch must be at least 1, got %d", *batch)}
	}
	cfg := summarize.Config{ModelName: *modelPath, By: *by, Key: *key, Bootstrap: *bootstrap, Seed: *seed, Batch: *batch}
	given := map[string]bool{}
	flag.Visit(func(f *flag.Flag) { given[f.Name] = true })
	for _, m := range methodFlags {
		if given[m.flag] {
			cfg.Settings = append(cfg.Settings, summarize.Setting{Field: m.field, Text: flag.Lookup(m.flag).Value.String()})
		}
	}
	var err error
	if cfg.Model, err = readAll(ctx, *modelPath, onnxlite.DefaultLimits.MaxModelBytes); err != nil {
		return cfg, err
	}
	settings := explain.Defaults()
	for _, s := range cfg.Settings {
		if err := settings.Set(s.Field, s.Text); err != nil {
			return cfg, err
		}
	}
	if settings.Reference != nil {
		if cfg.Reference, err = readFile(ctx, settings.Reference.Name); err != nil {
			return cfg, fmt.Errorf("-reference: %w", err)
		}
	}
	if b := settings.Baseline; b.Kind == gradattr.BaselineValues {
		if cfg.Baseline, err = readFile(ctx, b.Samples.Name); err != nil {
			return cfg, fmt.Errorf("-baseline: %w", err)
		}
	}
	return cfg, nil
}

// match returns the files that match glob, in name order.
func match(ctx context.Context, glob string) ([]string, error) {
	fs, err := filesystem.New(ctx, glob)
	if err != nil {
		return nil, fmt.Errorf("-input %s: %w", glob, err)
	}
	defer fs.Close()
	files, err := fs.List(ctx, glob)
	if err != nil {
		return nil, fmt.Errorf("-input %s: %w", glob, err)
	}
	if len(files) == 0 {
		return nil, &usageError{fmt.Sprintf("-input %s: no file matches", glob)}
	}
	sort.Strings(files)
	return files, nil
}

func readFile(ctx context.Context, path string) (*summarize.File, error) {
	raw, err := readAll(ctx, path, samples.MaxBytes)
	return &summarize.File{Name: path, Data: raw}, err
}

// readAll reads the file at path, on any file system Beam has, refusing
// one of more than limit bytes; a .gz file is decompressed.
func readAll(ctx context.Context, path string, limit int64) ([]byte, error) {
	fs, err := filesystem.New(ctx, path)
	if err != nil {
		return nil, err
	}
	defer fs.Close()
	rc, err := fs.OpenRead(ctx, path)
	if err != nil {
		return nil, err
	}
	defer rc.Close()
	r := io.Reader(rc)
	if strings.HasSuffix(path, ".gz") {
		zr, err := gzip.NewReader(rc)
		if err != nil {
			return nil, fmt.Errorf("%s: %w", path, err)
		}
		r = zr
	}
	raw, err := io.ReadAll(io.LimitReader(r, limit+1))
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	if int64(len(raw)) > limit {
		return nil, fmt.Errorf("%s: more than the %d bytes it may have", path, limit)
	}
	return raw, nil
}
