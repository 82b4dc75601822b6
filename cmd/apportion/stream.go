package main

import (
	"bufio"
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"os"
	"runtime"
	"strings"

	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/nn"
	"github.com/apportion/apportion/render"
	"github.com/apportion/apportion/samples"
)

// chunkValues is about how many input values the command line reads and
// explains, predicts or summarises at a time: a file of any length is
// handled in batches of about this many values, so that memory does not
// grow with its rows. (A variable for tests.)
var chunkValues = 1 << 16

// chunkSamples is the number of samples of a batch for spec: chunkValues
// values, or 64 samples when the sample size is not declared.
func chunkSamples(spec samples.Spec) int {
	if ps, ok := spec.FixedSample(); ok {
		return max(1, chunkValues/max(1, samples.Product(ps)))
	}
	return 64
}

// inputBatches is an input read in batches: the batches read ahead, then
// the rest of the stream. An input of at most two batches is read whole,
// as one batch, the way the whole-file readers read it.
type inputBatches struct {
	ahead  []*samples.Batch
	stream *samples.Stream // nil when ahead holds all
	closer io.Closer
	// reopen reads the input again, whole.
	reopen func() (*samples.Batch, error)
}

// openInput reads the first batches of the samples at path (the demo's
// sample of l when path is ""), with opt.
func openInput(l *loadedModel, path string, spec samples.Spec, opt samples.Options) (*inputBatches, error) {
	in := &inputBatches{}
	var err error
	if path == "" {
		raw, name := l.demo.Sample, l.demo.SampleFile
		in.reopen = func() (*samples.Batch, error) { return samples.Read(bytes.NewReader(raw), name, spec, opt) }
		in.stream, err = samples.NewStream(bytes.NewReader(raw), name, spec, opt)
	} else {
		in.reopen = func() (*samples.Batch, error) { return samples.ReadFile(path, spec, opt) }
		in.stream, in.closer, err = samples.OpenStream(path, spec, opt)
	}
	if err != nil {
		return nil, err
	}
	n := chunkSamples(spec)
	for len(in.ahead) < 2 {
		b, err := in.stream.Next(n)
		if err == io.EOF {
			// A short input: read whole, as ever.
			return in, in.readWhole()
		}
		if err != nil {
			in.close()
			return nil, err
		}
		in.ahead = append(in.ahead, b)
	}
	return in, nil
}

// readWhole replaces a stream by the whole input read as one batch.
func (in *inputBatches) readWhole() error {
	in.close()
	b, err := in.reopen()
	if err != nil {
		return err
	}
	in.ahead, in.stream = []*samples.Batch{b}, nil
	return nil
}

// first is the first batch.
func (in *inputBatches) first() *samples.Batch { return in.ahead[0] }

// whole reports whether the input is one batch.
func (in *inputBatches) whole() bool { return in.stream == nil }

// next returns the next batch, or io.EOF.
func (in *inputBatches) next(n int) (*samples.Batch, error) {
	if len(in.ahead) > 0 {
		b := in.ahead[0]
		in.ahead = in.ahead[1:]
		return b, nil
	}
	if in.stream == nil {
		return nil, io.EOF
	}
	return in.stream.Next(n)
}

func (in *inputBatches) close() {
	if in.closer != nil {
		in.closer.Close()
		in.closer = nil
	}
}

// predictStream runs the model on the samples of the file at path, for
// its one runtime input, a batch at a time: the outputs are kept, the
// inputs are not. It returns the outputs of all the samples, as one run
// on them all gives them (a sample's outputs do not depend on its batch),
// and their number. A sample that cannot be read is left out and listed
// in the prediction's Errors, its good neighbours kept (Rows). The
// columns of a CSV file the model does not read are noted on stderr.
func predictStream(m *explain.Model, path string, spec samples.Spec, opt samples.Options, dtype nn.DType, stderr io.Writer) (*explain.Prediction, int, error) {
	// A model that fixes its batch (other than to one, which the engine
	// relaxes) takes the samples as the file gives them, or none.
	fixed := spec.HasShape && len(spec.Shape) > 0 && spec.Shape[0] > 1
	if !fixed {
		keep := opt
		keep.KeepBad = true
		res, n, err := predictRows(m, path, spec, keep, dtype, stderr)
		if !errors.Is(err, errNoGoodSample) {
			return res, n, err
		}
		// No sample could be run: a strict read words why, at the file's
		// first bad sample, before any model pass.
		stderr = io.Discard
	}
	return predictRows(m, path, spec, opt, dtype, stderr)
}

// errNoGoodSample is predictRows's error for an input none of whose
// samples could be read.
var errNoGoodSample = errors.New("no sample could be read")

// predictRows is predictStream with the read options opt: with
// opt.KeepBad, samples that cannot be read are left out and listed.
func predictRows(m *explain.Model, path string, spec samples.Spec, opt samples.Options, dtype nn.DType, stderr io.Writer) (*explain.Prediction, int, error) {
	in, err := openInput(nil, path, spec, opt)
	if err != nil {
		return nil, 0, err
	}
	defer in.close()
	if n := ignoredNote(in.first().Name, in.first().Ignored); n != "" {
		notes(stderr, "predict", []string{n})
	}
	if err := m.Compile(explain.CompileOptions{InputShapes: explain.OpenShapes(spec, in.first()), Parallel: runtime.GOMAXPROCS(0), DType: dtype}); err != nil {
		return nil, 0, err
	}
	var all *explain.Prediction
	var rows []int
	var bad []explain.RowError
	count := 0
	for {
		b, err := in.next(chunkSamples(spec))
		if err == io.EOF {
			break
		}
		if err != nil {
			return nil, 0, err
		}
		var res *explain.Prediction
		if opt.KeepBad {
			res, err = m.PredictSamples(context.Background(), b, spec)
		} else {
			res, err = m.PredictBatch(context.Background(), b, spec)
		}
		if err != nil {
			return nil, 0, err
		}
		bad = append(bad, res.Errors...)
		rows = append(rows, res.Rows...)
		n := len(res.Rows)
		if res.Outputs == nil {
			continue
		}
		res.Rows, res.Errors = nil, nil
		if all == nil {
			all = res
		} else if err := all.Append(res, n); err != nil {
			return nil, 0, err
		}
		count += n
		if chunkDone != nil {
			chunkDone()
		}
	}
	if all == nil {
		return nil, 0, errNoGoodSample
	}
	if len(bad) > 0 {
		all.Rows, all.Errors = rows, bad
	}
	return all, count, nil
}

// chunkDone, when set (by tests), is called after each batch of a stream
// is explained, predicted or summarised.
var chunkDone func()

// writeExplanations explains the input and writes the explanations in
// c's format: a whole input at once, a stream batch by batch, the table,
// CSV, JSON document and PNGs written as they come. It returns the exit
// status.
func (c *explainConfig) writeExplanations(ex *explain.Explainer, in *inputBatches, spec samples.Spec, stdout, stderr io.Writer) int {
	ctx := context.Background()
	if in.whole() {
		rep, err := ex.Explain(ctx, in.first(), progress(stderr))
		if err != nil {
			return fail(stderr, "explain", err)
		}
		if c.format == "png" {
			if err := writePNGs(c.out, rep, len(rep.Explanations), c.render); err != nil {
				return failure(stderr, "explain", err)
			}
			return c.reportFailed(stderr, rep)
		}
		w := stdout
		var buf bytes.Buffer
		if c.out != "" {
			w = &buf
		}
		switch c.format {
		case "json":
			err = rep.WriteJSON(w)
		case "csv":
			err = render.CSV(w, rep)
		case "npy":
			err = render.NPY(w, rep)
		case "html":
			err = render.HTML(w, rep, c.render)
		default:
			err = render.Table(w, rep, c.render)
		}
		if err != nil {
			return failure(stderr, "explain", err)
		}
		if c.out != "" {
			if err := os.WriteFile(c.out, buf.Bytes(), 0o644); err != nil {
				return failure(stderr, "explain", err)
			}
		}
		if c.format == "npy" && rep.Settings.Groups != nil {
			// The group sums are a second array, in a file of their own.
			var g bytes.Buffer
			path := groupsPath(c.out)
			if err := render.GroupsNPY(&g, rep); err != nil {
				return failure(stderr, "explain", err)
			}
			if err := os.WriteFile(path, g.Bytes(), 0o644); err != nil {
				return failure(stderr, "explain", err)
			}
			fmt.Fprintf(stderr, "apportion explain: wrote the group sums, %s × %s, to %s\n", render.Count(len(rep.Explanations), "sample", "samples"), render.Count(len(rep.Settings.Groups), "group", "groups"), path)
		}
		return c.reportFailed(stderr, rep)
	}

	out := &lazyFile{path: c.out, w: stdout}
	defer out.close()
	var doc *explain.DocumentWriter
	var header string // what the table or CSV writes before the first sample
	show, done := streamProgress(stderr)
	defer done()
	var t tally
	for {
		b, err := in.next(chunkSamples(spec))
		if err == io.EOF {
			break
		}
		if err != nil {
			return fail(stderr, "explain", err)
		}
		rep, err := ex.Explain(ctx, b, func(n, _ int) { show(b.First + n) })
		if err != nil {
			return fail(stderr, "explain", err)
		}
		switch c.format {
		case "png":
			err = writePNGs(c.out, rep, 2, c.render) // many samples: numbered files
		case "json":
			if doc == nil {
				doc = explain.NewDocumentWriter(out)
			}
			err = doc.Write(rep)
		default:
			if t.total == 0 {
				header, err = renderHead(c.format, rep, c.render)
			}
			if err == nil {
				err = writeWithoutHead(out, c.format, rep, c.render, header, t.total > 0)
			}
		}
		if err == nil {
			err = out.err()
		}
		if err != nil {
			return failure(stderr, "explain", err)
		}
		t.add(stderr, rep)
		if chunkDone != nil {
			chunkDone()
		}
	}
	if doc != nil {
		if err := doc.Close(); err != nil {
			return failure(stderr, "explain", err)
		}
	}
	if err := out.close(); err != nil {
		return failure(stderr, "explain", err)
	}
	return c.status(stderr, &t)
}

// renderText renders rep as a table or CSV.
func renderText(w io.Writer, format string, rep *explain.Report, opt render.Options) error {
	if format == "csv" {
		return render.CSV(w, rep)
	}
	return render.Table(w, rep, opt)
}

// renderHead is what the table or CSV of rep writes before its first
// sample: the rendering of rep without explanations.
func renderHead(format string, rep *explain.Report, opt render.Options) (string, error) {
	empty := *rep
	empty.Explanations = nil
	var b strings.Builder
	err := renderText(&b, format, &empty, opt)
	return b.String(), err
}

// writeWithoutHead renders rep, leaving out the head the first batch has
// already written when later is set.
func writeWithoutHead(w io.Writer, format string, rep *explain.Report, opt render.Options, head string, later bool) error {
	var b bytes.Buffer
	if err := renderText(&b, format, rep, opt); err != nil {
		return err
	}
	text := b.Bytes()
	if later {
		if !bytes.HasPrefix(text, []byte(head)) {
			return fmt.Errorf("internal error: the %s of a batch does not start with the head of the first", format)
		}
		text = text[len(head):]
	}
	_, err := w.Write(text)
	return err
}

// lazyFile is standard output, or the file at path created when something
// is first written to it, so that a run that fails before its first
// result leaves no file.
type lazyFile struct {
	path string
	w    io.Writer
	f    *os.File
	buf  *bufio.Writer
	werr error
}

func (l *lazyFile) Write(p []byte) (int, error) {
	if l.werr != nil {
		return 0, l.werr
	}
	if l.path != "" && l.f == nil {
		if l.f, l.werr = os.Create(l.path); l.werr != nil {
			return 0, l.werr
		}
		l.buf = bufio.NewWriter(l.f)
		l.w = l.buf
	}
	var n int
	n, l.werr = l.w.Write(p)
	return n, l.werr
}

func (l *lazyFile) err() error { return l.werr }

// close flushes and closes the file, if one was made.
func (l *lazyFile) close() error {
	if l.f == nil {
		return l.werr
	}
	if err := l.buf.Flush(); err != nil && l.werr == nil {
		l.werr = err
	}
	if err := l.f.Close(); err != nil && l.werr == nil {
		l.werr = err
	}
	l.f = nil
	return l.werr
}

// streamProgress reports the samples done of a stream of unknown length
// on w when w is a terminal; done clears the line.
func streamProgress(w io.Writer) (show func(done int), done func()) {
	p := progress(w)
	if p == nil {
		return func(int) {}, func() {}
	}
	return func(n int) { fmt.Fprintf(w, "\rexplained %d samples", n) }, func() { fmt.Fprint(w, "\r\033[K") }
}
