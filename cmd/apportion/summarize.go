package main

import (
	"bytes"
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"runtime"
	"sort"
	"strings"
	"time"

	"github.com/schollz/progressbar/v3"
	"golang.org/x/term"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/render"
	"github.com/apportion/apportion/samples"
)

// byPredicted is the -by value that groups rows by the predicted class.
const byPredicted = "predicted"

// demoSummaryFile and demoSummaryBy are what summarize reads without -model
// and -input: the pumps demo's held-out set, grouped by production line.
const (
	demoSummaryFile = "pumps_test.csv"
	demoSummaryBy   = "pump_line"
)

// maxFirstRow bounds -first-row, so that row keys cannot wrap around.
const maxFirstRow = 1 << 62

// summarizeConfig holds summarize's flags; the method flags are explain's.
type summarizeConfig struct {
	ex        explainConfig
	by        string
	format    string
	out       string
	bootstrap int
	firstRow  uint64
	key       string
	merge     bool
	files     []string // the summaries to merge
}

// summarizeMergeFlags are the flags that make sense with -merge.
var summarizeMergeFlags = map[string]bool{"merge": true, "format": true, "out": true}

func runSummarize(args []string, stdin io.Reader, stdout, stderr io.Writer) int {
	fs := newFlagSet("summarize", "[-model PATH -input DATA.csv] [-by COLUMN|predicted] [flags]\n       apportion summarize -merge [-format F] [-out FILE] a.json b.json ...",
		"apportion summarize -model model.onnx -input data.csv -by region -format json -out all.json\n"+
			"\tapportion summarize -input part2.csv -first-row 250 -format json -out part2.json\n"+
			"\tapportion summarize -merge part1.json part2.json",
		"Explains every row of -input and summarises the attributions per feature:\n"+
			"mean |attribution| and mean signed attribution, each with a 95% interval\n"+
			"from a Poisson bootstrap (every row gets -bootstrap weights drawn from\n"+
			"-seed and its row key), over all rows and per subgroup of -by: a column of\n"+
			"the CSV the model does not see, or predicted for the predicted class.\n"+
			"Features are ranked by mean |attribution|. For a model of token ids (its\n"+
			"texts read as for explain), the summary is per token string instead:\n"+
			"occurrences, mean a and mean |a| with 95% Student t intervals, as a table\n"+
			"or as json that merges only with summaries per token string.\n\n"+
			"The model's features are the CSV columns named in its feature_names\n"+
			"metadata, else the first numeric columns. A bad row (wrong length, NaN,\n"+
			"not a number) is reported with its line and skipped; the status is then 1,\n"+
			"but the summary is written. Rows whose completeness check fails are\n"+
			"summarised and counted (incomplete_rows); the status is then 1 as well\n"+
			"(0 with -allow-incomplete). Rows are keyed -first-row, -first-row+1, ...:\n"+
			"summaries of parts of one data set (-format json) merge exactly with\n"+
			"-merge, into the summary of the whole. With -key, rows are keyed by their\n"+
			"value in that column (whole numbers as they are, other text by its\n"+
			"SHA-256), whichever part they are in. Without -model and -input,\n"+
			"summarize runs the embedded, invented pumps demo on its held-out set, by\n"+
			"pump_line, against the mean of its reference set.\n\n"+caution, stderr)
	var sc summarizeConfig
	c := &sc.ex
	fs.StringVar(&c.modelPath, "model", "", "ONNX model `file` (default: the embedded pumps demo)")
	fs.StringVar(&c.inputPath, "input", "", "rows to explain: a .csv `file` with a header (or .npy, .json, .pb); required with -model")
	registerPrecisionFlag(fs, &c.precision)
	registerMethodFlags(fs, "",
		"baseline `kind` for ig, surrogate and occlusion: zero, constant:V, mean or median (of -reference), uniform:LO:HI, or the path of a file of baseline samples (results averaged over them) (default: mean of the demo's reference set without -model, zero with -model)",
		"reference samples `file` for expected-grad, shapley and -baseline mean (default without -model: the demo's reference set)")
	fs.Uint64Var(&c.seed, "seed", gradattr.DefaultSeed, "seed of the bootstrap weights (and of smoothgrad and expected-grad)")
	fs.StringVar(&sc.by, "by", "", "group rows by this CSV `column`, or by the predicted class with predicted (default for the demo: pump_line)")
	fs.StringVar(&sc.format, "format", "table", "output format: table, json (mergeable), csv or png (needs -out)")
	fs.StringVar(&sc.out, "out", "", "write the summary to `file` instead of standard output")
	fs.IntVar(&sc.bootstrap, "bootstrap", gradattr.DefaultBootstrap, "number `B` of bootstrap replicates")
	fs.Uint64Var(&sc.firstRow, "first-row", 0, "row key `K` of the first data row, for a part of a larger data set")
	fs.StringVar(&sc.key, "key", "", "key each row by its value in this CSV `column`, which tells rows apart (instead of -first-row and the row's place)")
	fs.BoolVar(&sc.merge, "merge", false, "merge the summary JSON files given as arguments instead of explaining rows")
	fs.BoolVar(&c.allowIncomplete, "allow-incomplete", false, "exit 0 even when rows fail their completeness check (they are summarised and counted either way)")

	flagArgs, files := splitFileArgs(fs, args)
	if code, done := parseFlags(fs, flagArgs, stdout); done {
		return code
	}
	sc.files = files
	if err := c.readSettings(fs); err != nil {
		return fail(stderr, "summarize", err)
	}
	// -seed seeds the bootstrap, and the method when it is a random one.
	c.settings.Seed = c.seed
	if msg := sc.validate(); msg != "" {
		return usageError(stderr, "summarize", "%s", msg)
	}
	if sc.merge {
		return sc.runMerge(stdout, stderr)
	}
	if err := c.settings.Check(); err != nil {
		return fail(stderr, "summarize", err)
	}

	s, skipped, name, err := sc.summarize(context.Background(), stderr)
	if err != nil {
		return fail(stderr, "summarize", err)
	}
	notes(stderr, "summarize", c.ignored)
	if fs, ok := s.(*gradattr.Summary); ok {
		for _, w := range render.SummaryWarnings(fs) {
			fmt.Fprintf(stderr, "apportion summarize: warning: %s\n", w)
		}
	}
	if err := sc.write(stdout, s, name); err != nil {
		return failure(stderr, "summarize", err)
	}
	for _, r := range skipped {
		fmt.Fprintf(stderr, "apportion summarize: %s: %v\n", r.Where, r.Err)
	}
	code := exitOK
	if n := s.IncompleteRows(); n > 0 {
		fmt.Fprintf(stderr, "apportion summarize: %d of the %s summarised failed their completeness check (attributions that do not add up to the output's change, by more than -tolerance)\n",
			n, render.Count(s.Rows(), "row", "rows"))
		if !c.allowIncomplete {
			code = exitFail
		}
	}
	if len(skipped) > 0 {
		fmt.Fprintf(stderr, "apportion summarize: %d of %s skipped\n", len(skipped), render.Count(s.Rows()+s.SkippedRows(), "row", "rows"))
		return exitFail
	}
	return code
}

// splitFileArgs separates positional arguments (the files of -merge) from
// flags and their values, so that flags may follow the files.
func splitFileArgs(fs *flag.FlagSet, args []string) (flagArgs, files []string) {
	for i := 0; i < len(args); i++ {
		a := args[i]
		if a == "--" {
			return flagArgs, append(files, args[i+1:]...)
		}
		if !strings.HasPrefix(a, "-") || a == "-" {
			files = append(files, a)
			continue
		}
		flagArgs = append(flagArgs, a)
		name := strings.TrimLeft(a, "-")
		if strings.Contains(name, "=") {
			continue
		}
		f := fs.Lookup(name)
		if f == nil {
			continue
		}
		if b, ok := f.Value.(interface{ IsBoolFlag() bool }); ok && b.IsBoolFlag() {
			continue
		}
		if i+1 < len(args) {
			flagArgs = append(flagArgs, args[i+1])
			i++
		}
	}
	return flagArgs, files
}

// validate checks the flags; it returns a usage message or "".
func (sc *summarizeConfig) validate() string {
	c := &sc.ex
	switch sc.format {
	case "table", "json", "csv":
	case "png":
		if sc.out == "" {
			return "-format png needs -out, the file to write the image to"
		}
	default:
		return fmt.Sprintf("-format must be table, json, csv or png, got %q", sc.format)
	}
	if sc.merge {
		var extra []string
		for name := range c.set {
			if !summarizeMergeFlags[name] {
				extra = append(extra, "-"+name)
			}
		}
		sort.Strings(extra)
		if len(extra) > 0 {
			return fmt.Sprintf("-merge combines summaries already made; %s cannot be given with it", strings.Join(extra, ", "))
		}
		if len(sc.files) == 0 {
			return "-merge needs the summary JSON files to merge as arguments"
		}
		return ""
	}
	if len(sc.files) > 0 {
		return fmt.Sprintf("unexpected arguments: %s (files are read with -input, or merged with -merge)", strings.Join(sc.files, " "))
	}
	if sc.bootstrap < 1 || sc.bootstrap > gradattr.MaxBootstrap {
		return fmt.Sprintf("-bootstrap must be from 1 to %d, got %d", gradattr.MaxBootstrap, sc.bootstrap)
	}
	if sc.firstRow > maxFirstRow {
		return fmt.Sprintf("-first-row must be at most %d, got %d", uint64(maxFirstRow), sc.firstRow)
	}
	if sc.key != "" && sc.firstRow != 0 {
		return "-key keys rows by a column, -first-row by their place; give one of them"
	}
	if c.modelPath != "" && c.inputPath == "" {
		return "-input is required with -model"
	}
	s := &c.settings
	if c.modelPath == "" && c.inputPath == "" && sc.by == "" {
		sc.by = demoSummaryBy
	}
	if c.modelPath == "" && s.Reference == nil && s.Method == explain.DefaultMethod && !s.Given(explain.FieldBaseline) {
		// The demo's zero point (0 °C, 0 h since service, ...) is far
		// from any pump; its healthy reference pumps make a baseline that
		// answers "why not normal?".
		s.Baseline = explain.Baseline{Kind: gradattr.BaselineMean}
	}
	if s.Method.Reads(gradattr.ParamBaseline) && s.NeedsReference() && s.Reference == nil && c.modelPath != "" {
		return fmt.Sprintf("-baseline %s needs -reference here: the %s of the rows themselves would differ between parts of a data set, whose summaries could then not be merged", s.Baseline.Kind, s.Baseline.Kind)
	}
	if s.NeedsReference() && !s.Method.Reads(gradattr.ParamBaseline) && s.Reference == nil && c.modelPath != "" {
		return fmt.Sprintf("-method %s needs -reference, a file of reference samples", s.Method)
	}
	return ""
}

// rowSummary is a summary per feature (*gradattr.Summary) or per token
// string (*gradattr.TokenSummary).
type rowSummary interface {
	Rows() int
	SkippedRows() int
	IncompleteRows() int
	MarshalJSON() ([]byte, error)
}

// summarize explains every row and returns the summary, the skipped rows
// in row order, and the model's name.
func (sc *summarizeConfig) summarize(ctx context.Context, stderr io.Writer) (rowSummary, []explain.Skipped, string, error) {
	c := &sc.ex
	l, err := loadModel(c.modelPath, demo.Default)
	if err != nil {
		return nil, nil, "", err
	}
	m := l.model
	_, tokens := m.Tokens()
	tokens = tokens && c.settings.Layer == "" && c.settings.Method != gradattr.MethodGradCAM
	if tokens && sc.format != "table" && sc.format != "json" {
		return nil, nil, "", &usageErr{fmt.Sprintf("-format %s: a summary of a model of token ids is per token string, written as a table or as json, not %s", sc.format, sc.format)}
	}
	if tokens && c.set["bootstrap"] {
		c.ignored = append(c.ignored, "-bootstrap is not used: a summary per token string has Student t intervals over each token's occurrences")
	}
	spec, err := m.Input()
	if err != nil {
		return nil, nil, "", err
	}
	if _, err := m.Output(c.settings.Output); err != nil {
		return nil, nil, "", err
	}
	tr, closer, err := sc.openRows(m, spec)
	if err != nil {
		return nil, nil, "", err
	}
	defer closer.Close()
	l.noteIgnored(sc.inputName(), tr.Ignored)
	// The rows up to the first that can be read, which sizes the model's
	// input; an input that ends first has no row to summarise.
	n := chunkSamples(spec)
	var ahead [][]samples.Row
	var first []float64
	ended := false
	for first == nil && !ended {
		rows, err := tr.Next(n)
		switch {
		case err == io.EOF:
			ended = true
		case err != nil:
			return nil, nil, "", err
		}
		ahead = append(ahead, rows)
		for _, r := range rows {
			if r.Err == nil {
				first = r.Values
				break
			}
		}
	}
	if first == nil {
		r := ahead[0][0]
		return nil, nil, "", fmt.Errorf("input %s: no row could be read (first problem: %s: %v)", sc.inputName(), r.Where, r.Err)
	}
	shape := []int{1, len(first)}
	if tr.SampleShape != nil {
		shape = append([]int{1}, tr.SampleShape...)
	}
	one := &samples.Batch{Name: sc.inputName(), Shape: shape, Data: first, Samples: 1}
	dtype, err := explain.ParsePrecision(c.precision)
	if err != nil {
		return nil, nil, "", &usageErr{"-" + err.Error()}
	}
	if err := m.Compile(explain.CompileOptions{InputShapes: explain.OpenShapes(spec, one), Parallel: runtime.GOMAXPROCS(0), DType: dtype}); err != nil {
		return nil, nil, "", err
	}
	if err := l.readDatasets(&c.settings); err != nil {
		return nil, nil, "", err
	}
	head, err := m.Head(c.settings.Output, c.settings.Logits)
	if err != nil {
		return nil, nil, "", err
	}
	ex, err := explain.New(m, head, c.settings)
	if err != nil {
		return nil, nil, "", err
	}
	s, summarizeRows, err := sc.newSummary(ex, tr.Columns, tokens)
	if err != nil {
		return nil, nil, "", err
	}
	// The number of rows is known when the input ended in the rows read
	// ahead (the bar counts them); otherwise the bar counts without an end.
	todo := -1
	if rows, err := tr.Next(n); err == io.EOF {
		todo = 0
		for _, part := range ahead {
			for _, r := range part {
				if r.Err == nil {
					todo++
				}
			}
		}
	} else if err != nil {
		return nil, nil, "", err
	} else {
		ahead = append(ahead, rows)
	}
	tick, done := summaryProgress(stderr, todo)
	defer done()
	var skipped []explain.Skipped
	offset := 0
	for {
		var rows []samples.Row
		if len(ahead) > 0 {
			rows, ahead = ahead[0], ahead[1:]
		} else if rows, err = tr.Next(n); err == io.EOF {
			break
		} else if err != nil {
			return nil, nil, "", err
		}
		part, err := summarizeRows(ctx, rows, explain.SummarizeOptions{
			FirstKey: sc.firstRow + uint64(offset), Keyed: sc.key != "", ByPredicted: sc.by == byPredicted, Progress: tick,
		})
		if err != nil {
			return nil, nil, "", err
		}
		for _, r := range part {
			r.Row += offset
			skipped = append(skipped, r)
		}
		offset += len(rows)
		if chunkDone != nil {
			chunkDone()
		}
	}
	c.ignored = append(c.ignored, l.ignored...)
	return s, skipped, m.Name, nil
}

// newSummary returns an empty summary of the rows ex explains, per token
// string for a model of token ids explained at its embedding, else per
// feature, and the function that adds rows to it.
func (sc *summarizeConfig) newSummary(ex *explain.Explainer, columns []string, tokens bool) (rowSummary, func(context.Context, []samples.Row, explain.SummarizeOptions) ([]explain.Skipped, error), error) {
	if tokens {
		opt, err := ex.TokenSummaryOptions(sc.by)
		if err != nil {
			return nil, nil, err
		}
		s, err := gradattr.NewTokenSummary(opt)
		if err != nil {
			return nil, nil, err
		}
		return s, func(ctx context.Context, rows []samples.Row, o explain.SummarizeOptions) ([]explain.Skipped, error) {
			return ex.SummarizeTokens(ctx, rows, s, o)
		}, nil
	}
	opt, err := ex.SummaryOptions(ex.Features(columns), sc.by, sc.bootstrap, sc.ex.seed)
	if err != nil {
		return nil, nil, err
	}
	s, err := gradattr.NewSummary(opt)
	if err != nil {
		return nil, nil, err
	}
	return s, func(ctx context.Context, rows []samples.Row, o explain.SummarizeOptions) ([]explain.Skipped, error) {
		return ex.Summarize(ctx, rows, s, o)
	}, nil
}

// summaryProgress shows a progress bar on stderr when it is a terminal:
// of total rows, or (total −1) counting rows without an end.
func summaryProgress(stderr io.Writer, total int) (tick, done func()) {
	f, ok := stderr.(*os.File)
	if !ok || (total >= 0 && total < 2) || !term.IsTerminal(int(f.Fd())) {
		return func() {}, func() {}
	}
	bar := progressbar.NewOptions(total,
		progressbar.OptionSetWriter(f),
		progressbar.OptionSetDescription("explaining rows"),
		progressbar.OptionShowCount(),
		progressbar.OptionThrottle(100*time.Millisecond),
		progressbar.OptionClearOnFinish())
	return func() { _ = bar.Add(1) }, func() { _ = bar.Finish() }
}

func (sc *summarizeConfig) inputName() string {
	if sc.ex.inputPath == "" {
		return "demo:" + demoSummaryFile
	}
	return sc.ex.inputPath
}

// openRows starts reading the rows to explain and the names of their
// columns; the closer closes the file.
func (sc *summarizeConfig) openRows(m *explain.Model, spec samples.Spec) (*samples.TableReader, io.Closer, error) {
	c := &sc.ex
	name := sc.inputName()
	var r io.Reader
	closer := io.NopCloser(nil)
	if c.inputPath == "" {
		raw, err := demo.File(demoSummaryFile)
		if err != nil {
			return nil, nil, err
		}
		r = bytes.NewReader(raw)
	} else {
		f, err := os.Open(c.inputPath)
		if err != nil {
			return nil, nil, fmt.Errorf("input %s: %w", c.inputPath, err)
		}
		r, closer = f, f
	}
	opt := samples.TableOptions{Features: m.Meta.Features, Vocabulary: m.Vocabulary()}
	if ps, ok := spec.FixedSample(); ok {
		opt.Size = samples.Product(ps)
	}
	if sc.by != byPredicted {
		opt.Group = sc.by
	}
	opt.Key = sc.key
	if f, _ := samples.FormatOf(name); f != samples.CSV && opt.Group != "" {
		closer.Close()
		return nil, nil, &usageErr{fmt.Sprintf("-by %s names a column, and %s is not a CSV file; use -by predicted", sc.by, name)}
	}
	if f, _ := samples.FormatOf(name); f != samples.CSV && opt.Key != "" {
		closer.Close()
		return nil, nil, &usageErr{fmt.Sprintf("-key %s names a column, and %s is not a CSV file", sc.key, name)}
	}
	t, err := samples.NewTableReader(r, name, spec, opt)
	var ce *samples.ColumnError
	if errors.As(err, &ce) && (ce.Column == sc.by || ce.Column == sc.key) {
		flag := "-by"
		if ce.Column == sc.key {
			flag = "-key"
		}
		err = &usageErr{fmt.Sprintf("%s %s: no such column in %s (columns: %s)", flag, ce.Column, name, strings.Join(ce.Columns, ", "))}
	}
	if err != nil {
		closer.Close()
		return nil, nil, err
	}
	return t, closer, nil
}

// runMerge merges the summary files and writes the result. Every error
// names the file at fault after -merge. Summaries per feature merge with
// each other, summaries per token string with each other.
func (sc *summarizeConfig) runMerge(stdout, stderr io.Writer) int {
	var all rowSummary
	kind := ""
	for i, path := range sc.files {
		fail := func(err error) int { return failure(stderr, "summarize", fmt.Errorf("-merge %s: %w", path, err)) }
		raw, err := samples.ReadLimited(path)
		if err != nil {
			var pe *os.PathError
			if errors.As(err, &pe) {
				err = pe.Err // the path is named already
			}
			return fail(err)
		}
		// A document that is not JSON is left to DecodeSummary to word.
		format, _ := gradattr.SummaryDocumentFormat(raw)
		if i > 0 && format != kind && (format == gradattr.TokenSummaryFormat || kind == gradattr.TokenSummaryFormat) {
			return fail(fmt.Errorf("it is %s, and %s is %s: a summary per token string and one per feature do not merge", summaryKind(format), sc.files[0], summaryKind(kind)))
		}
		kind = format
		var s rowSummary
		if format == gradattr.TokenSummaryFormat {
			s, err = gradattr.DecodeTokenSummary(bytes.NewReader(raw))
		} else {
			s, err = gradattr.DecodeSummary(bytes.NewReader(raw))
		}
		if err != nil {
			return fail(err)
		}
		if all == nil {
			all = s
			continue
		}
		switch a := all.(type) {
		case *gradattr.Summary:
			err = a.Merge(s.(*gradattr.Summary))
		case *gradattr.TokenSummary:
			err = a.Merge(s.(*gradattr.TokenSummary))
		}
		if err != nil {
			return fail(mergeError(err, sc.files[:i]))
		}
	}
	if err := sc.write(stdout, all, ""); err != nil {
		return failure(stderr, "summarize", err)
	}
	return exitOK
}

// summaryKind words what a summary document of the given format holds.
func summaryKind(format string) string {
	if format == gradattr.TokenSummaryFormat {
		return "a summary per token string (of a model of token ids)"
	}
	return "a summary per feature"
}

// mergeError words why a summary does not merge with those of the files
// before it.
func mergeError(err error, before []string) error {
	var me *gradattr.MismatchError
	if !errors.As(err, &me) {
		return err
	}
	with := strings.Join(before, ", ")
	if me.What == "row key" {
		return fmt.Errorf("it holds row key %s, as %s does: row keys count from -first-row (0 unless given), so each part of a data set must be summarized with -first-row set to the index of its first row in the whole", me.A, with)
	}
	return fmt.Errorf("it differs from %s in its %s (%s there, %s here): only summaries made with the same model and settings merge", with, me.What, me.A, me.B)
}

// write renders the summary in the chosen format to stdout or -out.
func (sc *summarizeConfig) write(stdout io.Writer, rs rowSummary, modelName string) error {
	var buf bytes.Buffer
	var err error
	s, perFeature := rs.(*gradattr.Summary)
	switch {
	case sc.format == "json":
		var raw []byte
		if raw, err = rs.MarshalJSON(); err == nil {
			buf.Write(raw)
			buf.WriteByte('\n')
		}
	case !perFeature && sc.format == "table":
		render.TokenSummaryTable(&buf, rs.(*gradattr.TokenSummary), modelName)
	case !perFeature:
		err = fmt.Errorf("-format %s: a summary per token string is written as a table or as json", sc.format)
	case sc.format == "csv":
		err = render.SummaryCSV(&buf, s)
	case sc.format == "png":
		err = render.SummaryPNG(&buf, s)
	default:
		render.SummaryTable(&buf, s, modelName)
	}
	if err != nil {
		return err
	}
	if sc.out != "" {
		return os.WriteFile(sc.out, buf.Bytes(), 0o644)
	}
	_, err = stdout.Write(buf.Bytes())
	return err
}
